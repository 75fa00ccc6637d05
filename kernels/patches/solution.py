"""What the patch path returns (2-D and 3-D alike), and the checks both dimensions share:
the memory estimate's margins and refusal, the coefficient per coarse cell."""

from __future__ import annotations

import numpy as np

from hatkernels.errors import InputError
from hatkernels.patches.layout import RefinedMeshOnDemand
from hatkernels.problem import PoissonProblem
from hatkernels.stats import PoissonSolution

__all__ = ["PatchSolution", "MARGIN", "FIXED_BYTES", "check_memory", "checked_kappa",
           "per_coarse_cell", "flux_sides"]

# the estimate is measured, not a guess (bench/patches.py): a small margin, and the
# interpreter with its libraries and the coarse mesh's arrays as a fixed amount
MARGIN = 1.02
FIXED_BYTES = 2**29


def check_memory(size, need, have):
    """Refuse, before allocating, a solve on ``size`` fine points that needs ``need``
    bytes where ``have`` are available (None: not known, not checked)."""
    if have is not None and need > have:
        raise InputError(
            f"not enough memory: the patch path on {size:,} fine points needs about "
            f"{need / 2**30:.1f} GiB ({need / size:.0f} bytes per point), but "
            f"{have / 2**30:.1f} GiB are available; refine less, or pass "
            f"memory_check=False to try anyway")


def per_coarse_cell(coef, m, what):
    """A parsed coefficient constant on each coarse cell, as one number per cell."""
    if coef.kind == "constant" and np.ndim(coef.value) == 0:
        return np.full(m, float(coef.value))
    if coef.kind == "cell" and np.ndim(coef.value) == 1:
        return np.asarray(coef.value, dtype=np.float64)
    raise InputError(f"{what}: the patch path takes values constant on each coarse cell")


def flux_sides(problem, neumann, free_sides):
    """``(sides, h)`` of an imposed flux, or None without one: for ``{tag: number}`` the
    tags' sides as parsed (``h`` one number or one per side), for a number every boundary
    side not held (``free_sides()``, edges in 2-D, faces in 3-D)."""
    if neumann is None:
        return None
    if isinstance(neumann, dict):  # whole sides of boundary tags, as parsed
        flux = problem.flux
        if flux is None or not len(flux.sides):
            return None
        if flux.flux.kind not in ("constant", "edge"):
            raise InputError("neumann: the patch path takes numbers (per boundary tag)")
        return np.asarray(flux.sides, dtype=np.int64), np.asarray(flux.flux.value)
    h = float(neumann)
    if not np.isfinite(h):
        raise InputError(f"neumann must be a finite number, got {neumann!r}")
    sides = free_sides()
    return (sides, h) if len(sides) else None


def checked_kappa(kappa, n_cells):
    """``kappa`` as float64, one positive finite number per coarse cell; errors name the
    cell."""
    kappa = np.asarray(kappa, dtype=np.float64)
    if kappa.shape != (n_cells,):
        raise InputError(f"kappa must hold one number per coarse cell ({n_cells}), "
                         f"got shape {kappa.shape}")
    bad = np.flatnonzero(~(np.isfinite(kappa) & (kappa > 0)))
    if bad.size:
        raise InputError(f"kappa must be positive and finite; it is {float(kappa[bad[0]])!r} on "
                         f"coarse cell {int(bad[0])}")
    return kappa


class PatchSolution(RefinedMeshOnDemand, PoissonSolution):
    """What :func:`~hatkernels.patches.solve_on_patches` found: a :class:`~hatkernels.PoissonSolution` whose
    ``u``, ``mesh`` and ``problem`` are made on first use.

    Attributes
    ----------
    values : ndarray
        The solution in the patch layout (:mod:`hatkernels._jit.patches`): every
        fine point once, no fine mesh needed.
    layout : PatchLayout or TetLayout
    stats : SolveStats
    u : ndarray
        The solution in the numbering of ``coarse.refine()`` repeated ``k`` times,
        made on first use (one more vector of the fine size; on tetrahedra the places
        are found from the refined cells, so it builds ``mesh`` too).
    mesh : Mesh
        The refined mesh, built on first use (it costs what the patch path saves);
        refused before anything is built when it would not fit in the memory
        available (``hatkernels.memory.check_refine_memory``).
    problem : PoissonProblem
        The problem on :attr:`mesh`, built on first use.
    """

    def __init__(self, values, layout, stats, args):  # u, mesh, problem: properties here
        self.values, self.layout, self.stats = values, layout, stats
        self._args = args
        self._u = self._mesh = self._problem = None

    @property
    def converged(self):
        return self.stats.converged

    @property
    def u(self):
        if self._u is None:
            if self.layout.coarse.dim == 3:  # places found from the refined mesh's cells
                self._u = self.layout.to_refined(self.values, mesh=self.mesh)
            else:
                self._u = self.layout.to_refined(self.values)
        return self._u

    @property
    def problem(self):
        if self._problem is None:
            self._problem = PoissonProblem(self.mesh, **self._args)
        return self._problem

    def patch(self, cell):
        """``(lam, values)`` on coarse ``cell`` (:meth:`PatchLayout.patch`)."""
        return self.layout.patch(self.values, cell)

    def __repr__(self):
        s = self.stats
        return (f"PatchSolution({s.unknowns} unknowns, {s.iterations} iterations, "
                f"converged={s.converged}, {s.timings['total']:.3g} s)")
