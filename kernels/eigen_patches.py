"""Eigenmodes on a refinement that is never stored.

``eigenmodes(coarse, k, refine=r)`` takes this path when the data allow it
(:func:`eigen_patch_reason`): a triangle mesh; ``kappa`` and ``rho`` numbers
or ``{region: number}`` (constant on each coarse cell); ``u = 0`` on whole
coarse sides (the boundary, or boundary tags) with every part of the mesh
holding one; no Robin term; no preconditioner named; more than
:data:`~hatkernels.eigensolvers.SHIFT_INVERT_LIMIT` points.  It runs the
nested LOBPCG of :mod:`hatkernels.eigen` on the levels of a
:class:`~hatkernels.patches.PatchLayout`:

- the start: the finest level with at most ``SHIFT_INVERT_LIMIT`` unknowns
  (and twice the block), refined and stored (it is small), solved by
  shift-invert, its vectors taken into the patch layout;
- on each level above it: the stiffness and mass matrices as stencils
  (:class:`~hatkernels.patches.PatchOperator` with
  :func:`~hatkernels.patches.element_stiffness` and
  :func:`~hatkernels.patches.multigrid.element_mass`), the patch multigrid of
  the stiffness as preconditioner, the block interpolated from the level
  below; :data:`~hatkernels.eigensolvers.INTERMEDIATE` iterations on the levels
  between, and to ``rtol`` on the finest;
- blocks stored one vector per row, the layout the stencil kernels and the
  multigrid take (``hatkernels.eigenblock.run`` with ``by_rows``).

No fine index array, coordinate or matrix is stored: the memory is the
block (about ``100 m`` bytes per fine point for a block of ``m`` vectors),
the modes asked for (``8 k``) and the multigrid's vectors.  The vectors come
back in the numbering of ``coarse.refine()`` repeated ``r`` times, as the
stored path gives them on that mesh.
"""

from __future__ import annotations

import math
import numbers
import time

import numba
import numpy as np

from hatkernels import eigenblock as _eb
from hatkernels import eigensolvers as _es
from hatkernels._jit import patches as _p
from hatkernels._jit import sparse as _k
from hatkernels.checks import integer_option, real_option
from hatkernels.coefficients import parse_coefficient
from hatkernels.eigenresults import Eigenmodes, EigenStats
from hatkernels.errors import InputError
from hatkernels.memory import MARGIN, available_bytes
from hatkernels.patches import PatchLayout, PatchMultigrid, PatchOperator, element_stiffness
from hatkernels.patches.layout import RefinedMeshOnDemand
from hatkernels.patches.multigrid import element_mass
from hatkernels.patches.solution import per_coarse_cell
from hatkernels.patches.solve import (
    _held,
    _held_count,
    _is_number,
    _numbers_by_key,
    patch_path_reason,
)
from hatkernels.perf import peak_rss_bytes
from hatkernels.problem import PoissonProblem

__all__ = ["eigen_patch_reason", "eigenmodes_on_patches", "PatchEigenmodes", "PatchPencil",
           "BYTES_PER_POINT_AND_VECTOR"]

#: The memory estimate per fine point and per vector of the block (the block, its
#: products, the residuals and the interpolated start: about 12 vectors of 8 bytes each).
BYTES_PER_POINT_AND_VECTOR = 100


def eigen_patch_reason(mesh, refine, *, k=None, extra=None, coefficient=None, density=1.0,
                       dirichlet_on=None, robin=None, method="auto", preconditioner=None,
                       options=None):
    """None when ``eigenmodes(mesh, k, refine=refine, ...)`` can run on patches, else the
    reason it cannot (one sentence).  With ``k`` (and ``extra``) given, also whether
    some coarser level can start the nested iteration for that block."""
    if getattr(mesh, "dim", None) == 3:
        return "eigenmodes on patches take triangle meshes (tetrahedra: the stored path)"
    reason = patch_path_reason(mesh, refine, f=0.0, coefficient=coefficient,
                               dirichlet_on=dirichlet_on, robin=robin, options=options)
    if reason is not None:
        return reason
    if preconditioner is not None:
        return "a named preconditioner belongs to the stored path"
    if method not in ("auto", "lobpcg"):  # the stored path names a bad one
        return f"method={method!r} is the stored path's"
    if not (_is_number(density) or _numbers_by_key(density)):
        return "density is not a number or {region: number}"
    if not all(v is None or (isinstance(v, numbers.Integral) and not isinstance(v, bool)
                             and v >= low) for v, low in ((k, 1), (extra, 0))):
        return "k or extra is not a whole number in range (the stored path names which)"
    # zero_mean: a part that holds nothing is this function's to name, not an error here
    problem = PoissonProblem(mesh, 0.0, dirichlet_on=dirichlet_on, coefficient=coefficient,
                             zero_mean=True)
    sides = _held(mesh, problem, 0.0)[0]
    count, labels = mesh.components()
    holding = np.zeros(count, dtype=bool)
    holding[labels[np.asarray(sides, dtype=np.int64).reshape(-1)]] = True
    if not holding.all():
        return ("a part of the mesh holds no side (its constant is a zero mode, which the "
                "stored path handles)")
    layout = PatchLayout(mesh, int(refine), held_sides=sides)
    unknowns = _unknowns(layout, layout.k)
    if unknowns <= _es.SHIFT_INVERT_LIMIT:  # method="auto" is shift-invert there
        return (f"the problem has {unknowns} unknowns, few enough for shift-invert on the "
                f"stored mesh (at most {_es.SHIFT_INVERT_LIMIT})")
    if _unknowns(layout, 0) > _es.SHIFT_INVERT_LIMIT:
        return (f"the coarse mesh has {_unknowns(layout, 0)} unknowns, more than the nested "
                f"start's shift-invert takes ({_es.SHIFT_INVERT_LIMIT})")
    if k is not None and _start_level(layout, _block(k, extra)) is None:
        return (f"no coarser level has between 2 x {_block(k, extra)} (the block) and "
                f"{_es.SHIFT_INVERT_LIMIT} unknowns to start the nested iteration from")
    return None


def _block(k, extra):
    return k + (max(2, math.ceil(k / 4)) if extra is None else extra)


class PatchPencil(_eb.BlockOperators):
    """The stiffness and mass stencils of one level applied to blocks stored one vector per
    row (``hatkernels.eigenblock.run`` with ``by_rows``), and its multigrid
    (``hatkernels.eigenblock.BlockOperators``: counted and timed)."""

    by_rows = True
    M = None  # no constraints: every part holds a side, so there are no zero modes

    def __init__(self, K, M, preconditioner):
        super().__init__(preconditioner)
        self._K, self._M = K, M

    def products(self, X, KX, MX):
        """``KX[j] = K X[j]`` and ``MX[j] = M X[j]`` for every row."""
        t = time.perf_counter()
        for j in range(X.shape[0]):
            self._K.matvec_into(X[j], KX[j])
            self._M.matvec_into(X[j], MX[j])
        self._counted(X.shape[0], time.perf_counter() - t)


class PatchEigenmodes(RefinedMeshOnDemand, Eigenmodes):
    """:class:`~hatkernels.Eigenmodes` found on patches: the same tuple and attributes,
    with ``mesh`` (``coarse`` refined ``refine`` times) built on first use, and
    ``layout`` (the :class:`~hatkernels.patches.PatchLayout` of the finest level)."""

    def __new__(cls, values, vectors, zero_modes, stats, layout):
        self = super().__new__(cls, values, vectors, zero_modes, stats, None)
        self.layout = layout
        return self

    def __reduce__(self):
        return (PatchEigenmodes, (self[0], self[1], self.zero_modes, self.stats, self.layout))


def _unknowns(layout, level):
    return layout.size(level) - _held_count(layout, 2**level)


def _start_level(layout, block):
    """The finest level below the given mesh with between ``2 block`` and
    :data:`~hatkernels.eigensolvers.SHIFT_INVERT_LIMIT` unknowns, where the nested
    iteration starts by shift-invert; None when there is none."""
    fits = [lv for lv in range(layout.k)
            if 2 * block <= _unknowns(layout, lv) <= _es.SHIFT_INVERT_LIMIT]
    return fits[-1] if fits else None


def _start(layout, level, kappa, rho, block, seed, quadrature):
    """The first block on ``level``: shift-invert on that level's refined mesh, stored
    (rows: one vector each, in the patch layout)."""
    coarse = layout.coarse
    mesh = coarse
    for _ in range(level):
        mesh = mesh.refine()
    size = layout.size(level)
    held = np.zeros(size)
    layout.copy_held(np.ones(size), held, level)
    held = np.flatnonzero(layout.to_refined(held, level))
    times = 4**level  # the children of cell t are cells 4t .. 4t+3
    problem = _es.build_level(
        mesh, held, parse_coefficient(np.repeat(kappa, times), mesh, name="coefficient"),
        parse_coefficient(np.repeat(rho, times), mesh, name="density"), quadrature)
    X = problem.expand(_es.shift_invert(problem, block, seed)[1])
    rows = np.empty((block, size))
    for j in range(block):
        rows[j] = layout.from_refined(X[:, j], level)
    return rows


def _prolonged(layout, rows, level):
    """The block ``rows`` (on ``level - 1``) interpolated linearly to ``level``, held
    points 0."""
    out = np.zeros((rows.shape[0], layout.size(level)))
    for j in range(rows.shape[0]):
        _p.prolong_add(rows[j], out[j], 2**level, layout.topo)
        layout.zero_held(out[j], level)
    return out


def eigenmodes_on_patches(coarse, k, *, refine, coefficient=None, density=1.0,
                          dirichlet_on=None, rtol=1e-8, maxiter=100, extra=None, seed=0,
                          quadrature=2, memory_check=True):
    """The ``k`` smallest eigenpairs of ``-div(kappa grad u) = lambda rho u`` on ``coarse``
    refined ``refine`` times, the refinement never stored (module notes).

    The arguments are those of :func:`hatkernels.eigenmodes` (the data this path
    takes: :func:`eigen_patch_reason`).  Returns a :class:`PatchEigenmodes`;
    ``stats.work_units`` is NaN (no assembled matrix defines the unit here).
    ``memory_check`` refuses, before allocating, a call whose estimate
    (:data:`BYTES_PER_POINT_AND_VECTOR` per fine point and vector of the block,
    8 per mode) does not fit in the memory available.
    """
    t0 = time.perf_counter()
    k = integer_option(k, "k", minimum=1)
    extra = integer_option(extra, "extra", minimum=0, allow_none=True)
    reason = eigen_patch_reason(coarse, refine, coefficient=coefficient, density=density,
                                dirichlet_on=dirichlet_on)
    if reason is not None:
        raise InputError(f"eigenmodes on patches cannot take this problem: {reason}")
    rtol = real_option(rtol, "rtol", between=(0.0, 1.0))
    maxiter = integer_option(maxiter, "maxiter", minimum=1)
    seed = integer_option(seed, "seed", minimum=0)
    integer_option(quadrature, "quadrature", minimum=1)
    problem = PoissonProblem(coarse, 0.0, dirichlet_on=dirichlet_on, coefficient=coefficient,
                             quadrature=quadrature)
    cells = coarse.n_triangles
    kappa = per_coarse_cell(problem.coefficient, cells, "coefficient")
    rho = per_coarse_cell(parse_coefficient(density, coarse, name="density"), cells, "density")
    sides = _held(coarse, problem, 0.0)[0]
    r = int(refine)
    layout = PatchLayout(coarse, r, held_sides=sides)
    size, unknowns = layout.size(r), _unknowns(layout, r)
    block = _block(k, extra)
    if k >= unknowns:
        raise InputError(f"k = {k} eigenpairs asked for, but the problem has {unknowns} "
                         f"unknowns; k must be below {unknowns}")
    if unknowns < 5 * block:
        raise InputError(f"lobpcg needs at least 5 x {block} (the block) unknowns, but the "
                         f"problem has {unknowns}; use method='shift-invert'")
    start = _start_level(layout, block)
    if start is None:
        raise InputError(f"eigenmodes on patches needs a coarser level with between 2 x "
                         f"{block} (the block) and {_es.SHIFT_INVERT_LIMIT} unknowns to "
                         f"start from; ask for fewer modes, or leave it to eigenmodes, which "
                         f"then takes the stored path")
    if memory_check:
        need = size * (BYTES_PER_POINT_AND_VECTOR * block + 8 * k)
        have = available_bytes()
        if have is not None and need * MARGIN > have:
            raise InputError(
                f"not enough memory: eigenmodes on patches with {size:,} points and a block "
                f"of {block} needs about {need / 2**30:.1f} GiB, but {have / 2**30:.1f} GiB "
                f"are available; ask for fewer modes, refine less, or pass "
                f"memory_check=False to try anyway")
    timings = {"assemble": 0.0, "setup": 0.0, "solve": 0.0}
    stats = EigenStats(method="lobpcg", unknowns=unknowns, block=block, rtol=rtol,
                       threads=numba.get_num_threads(), shift=0.0)
    t = time.perf_counter()
    X = _start(layout, start, kappa, rho, block, seed, quadrature)
    timings["solve"] += time.perf_counter() - t
    stats.levels.append((_unknowns(layout, start), 0))
    stiffness = element_stiffness(coarse, kappa)
    used = {"stiffness": 0.0, "mass": 0.0, "preconditioner": 0.0}
    for level in range(start + 1, r + 1):
        t = time.perf_counter()
        X = _prolonged(layout, X, level)
        out = None  # the level below's vectors are a view of its whole block pool: let it go
        here = layout if level == r else PatchLayout(coarse, level, held_sides=sides)
        K = PatchOperator(here, stiffness, level)
        M = PatchOperator(here, element_mass(coarse, rho, level), level)
        T = PatchMultigrid(here, kappa)
        timings["setup"] += time.perf_counter() - t
        blocks = PatchPencil(K, M, T)
        t = time.perf_counter()
        out = _eb.run(blocks, X, None, k=k, rtol=rtol, maxiter=maxiter,
                      iterations=None if level == r else _es.INTERMEDIATE)
        timings["solve"] += time.perf_counter() - t
        for key, count in blocks.counts.items():
            used[key] += count * layout.size(level) / size
        for key, seconds in blocks.seconds.items():
            timings[key] = timings.get(key, 0.0) + seconds
        stats.levels.append((_unknowns(layout, level), out.iterations))
        X = out.vectors
    stats.iterations, stats.converged, stats.errors = out.iterations, out.converged, out.errors
    stats.products, stats.preconditioner = used, T.description
    if not out.converged:
        raise _eb.not_converged(out, rtol, k, unknowns)
    vectors = np.empty((size, k))
    v, mv = np.empty(size), np.empty(size)
    for j in range(k):
        M.matvec_into(X[j], mv)
        layout.to_refined(X[j], out=v)
        v /= math.sqrt(_k.dot(X[j], mv))
        if v[np.argmax(np.abs(v))] < 0:  # the largest entry (the first of equals) positive
            np.negative(v, out=v)
        vectors[:, j] = v
    timings["total"] = time.perf_counter() - t0
    stats.timings = timings
    stats.peak_rss_bytes = peak_rss_bytes()
    return PatchEigenmodes(out.values[:k].copy(), vectors, np.zeros(k, dtype=bool), stats,
                           layout)
