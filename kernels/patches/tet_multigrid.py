"""The multigrid of a never-stored refined tetrahedral mesh: the stored gmg's cycle on the
levels of a :class:`~hatkernels.patches.tets.TetLayout` (docs/patches.md, Tetrahedra)."""

from __future__ import annotations

import numpy as np

from hatkernels._jit import patches3d_moves as _m
from hatkernels.assembly import assemble_stiffness
from hatkernels.boundary import apply_dirichlet
from hatkernels.checks import integer_option, into_vectors
from hatkernels.coefficients import per_cell
from hatkernels.errors import InputError
from hatkernels.patches.solution import checked_kappa
from hatkernels.patches.tets import PiecewiseDiagonal, TetOperator, class_weights
from hatkernels.precond.chebyshev import ChebyshevSmoother
from hatkernels.precond.direct import SparseDirect, coarse_correction
from hatkernels.precond.registry import Preconditioner

__all__ = ["TetMultigrid"]


class TetMultigrid(Preconditioner):
    """Multigrid on the levels of a :class:`~hatkernels.patches.tets.TetLayout` (an SPD preconditioner):
    Chebyshev smoothing of ``degree`` on ``D^-1 A`` over ``[lower * top, top]`` (top
    Gershgorin's bound), linear interpolation and its transpose, the coarse mesh's
    assembled matrix factorised at the bottom.  ``cycle`` ``"F"`` (the default, as the
    stored gmg's on tetrahedra: its iterations do not grow with the depth) or ``"V"``."""

    name = "patch-multigrid-3d"
    kind = "geometric multigrid on refined tetrahedra, matrix-free stencils"
    needs_matrix = False

    def __init__(self, layout, kappa, *, degree=2, lower=1.0 / 6.0, nested_cycles=1,
                 cycle="F"):
        if cycle not in ("V", "F"):
            raise InputError(f"cycle must be 'V' or 'F', got {cycle!r}")
        self.cycle = cycle
        self.layout = layout
        k = layout.k
        if k < 1:
            raise InputError("the patch multigrid needs refine >= 1")
        super().__init__(layout.size(k))
        self.degree = integer_option(degree, "degree", minimum=1)
        self.nested_cycles = integer_option(nested_cycles, "nested_cycles", minimum=1)
        kappa = checked_kappa(kappa, layout.n_cells)
        # without held faces the stiffness matrix is singular (constants in its null
        # space): the grid transfers still serve, a cycle is refused by name
        self._singular = not layout.held_v.any()
        coarse = layout.coarse
        self.W, self.volumes = class_weights(coarse.points[layout.topo[0]], kappa)
        self.ops, self.smoothers, self.x, self.b, self.work = [], [], [], [], []
        # three work vectors shared by every level (views of the finest level's): a level
        # needs them only while it smooths and until its residual is restricted
        shared = tuple(np.empty(layout.size(k)) for _ in range(3))
        for level in range(1, k + 1):
            op = TetOperator(layout, self.W, level)
            diag, bound = op.block_diagonal_and_bound()
            dinv = PiecewiseDiagonal(layout, level, diag)  # one number per block of points
            size = layout.size(level)
            self.ops.append(op)
            self.smoothers.append(ChebyshevSmoother(
                op.matvec_into, self._residual(op), dinv, self.degree, bound=bound,
                estimate=False, lower=lower))
            self.work.append(tuple(w[:size] for w in shared))
            self.x.append(np.empty(size) if level < k else None)
            self.b.append(np.empty(size) if level < k else None)
        fixed = np.flatnonzero(layout.held_v)
        A = assemble_stiffness(coarse, per_cell(kappa))
        system = apply_dirichlet(A, np.zeros(coarse.n_points), fixed)
        self._coarse_free, self._coarse_A = system.free, system.A
        self._coarse_solver = (SparseDirect(system.A) if system.A.shape[0] and not self._singular
                               else None)
        self._coarse_x = np.empty(coarse.n_points)
        self._coarse_b = np.empty(coarse.n_points)
        self._held0 = fixed

    @staticmethod
    def _residual(op):
        def residual(x, b, out):
            op.matvec_into(x, out)
            _m.subtract_from(b, out)
        return residual

    def _apply(self, r):
        out = np.empty(self.shape[0])
        return self.apply_into(r, out)

    def apply_into(self, r, out):
        """``out = M r``: one cycle from a zero guess (``r`` must be 0 at held points);
        returns ``out``.  ``r`` is read only: any real vector of the finest level's size
        (copied unless it is a writable C-contiguous float64 one); ``out``
        must be a writable C-contiguous float64 ndarray of that size sharing no memory
        with ``r``, else an InputError names the argument
        (``hatkernels.checks.into_vectors``)."""
        r, = into_vectors("TetMultigrid.apply_into", self.shape[0], {"r": r}, {"out": out})
        self._cycle(self.layout.k, out, r, True, self.cycle)
        return out

    def full_cycle_into(self, r, out, cycles=None):
        """Full multigrid: the load restricted to every level, the coarse solve, then each
        level started from the interpolated solution below and ``cycles`` cycles; ``r``
        and ``out`` as in :meth:`apply_into`."""
        r, = into_vectors("TetMultigrid.full_cycle_into", self.shape[0], {"r": r},
                          {"out": out})
        cycles = self.nested_cycles if cycles is None else integer_option(
            cycles, "cycles", minimum=1)
        k = self.layout.k
        for level in range(k, 0, -1):
            self._restrict(level, r if level == k else self.b[level - 1])
        self._coarse_solve(self._coarse_x, self._coarse_b, True)
        for level in range(1, k + 1):
            x = out if level == k else self.x[level - 1]
            b = r if level == k else self.b[level - 1]
            x[:] = 0.0
            self._prolong_add(level, self._coarse_x if level == 1 else self.x[level - 2], x)
            for _ in range(cycles):
                self._cycle(level, x, b, False, self.cycle)
        return out

    def _below(self, level):
        if level == 1:
            return self._coarse_x, self._coarse_b
        return self.x[level - 2], self.b[level - 2]

    def _restrict(self, level, r):
        _, bc = self._below(level)
        _m.restrict(r, bc, 2**(level - 1), self.layout.topo, True,
                    self.layout.face_maps(level)[0], *self.layout.buffers(level - 1))

    def _prolong_add(self, level, xc, x):
        _m.prolong_add(xc, x, 2**(level - 1), self.layout.topo, True,
                       self.layout.face_maps(level - 1)[0])

    def _coarse_solve(self, x, b, zero_guess):
        if self._singular:
            raise InputError("the patch multigrid needs held faces: without them the "
                             "stiffness matrix is singular (constants are in its null space)")
        if self._coarse_solver is None:
            if zero_guess:
                x[:] = 0.0
            return
        coarse_correction(self._coarse_solver, self._coarse_A, self._coarse_free, x, b,
                          zero_guess)

    def _cycle(self, level, x, b, zero_guess, kind):
        if level == 0:
            self._coarse_solve(x, b, zero_guess)
            return
        sm, (r, d, q) = self.smoothers[level - 1], self.work[level - 1]
        sm.smooth(x, b, zero_guess, r, d, q)
        sm.residual(x, b, r)
        self._restrict(level, r)
        xc, bc = self._below(level)
        if kind == "V":
            self._cycle(level - 1, xc, bc, True, "V")
        else:  # F: the palindrome V, F, V keeps the cycle symmetric
            self._cycle(level - 1, xc, bc, True, "V")
            self._cycle(level - 1, xc, bc, False, "F")
            self._cycle(level - 1, xc, bc, False, "V")
        self._prolong_add(level, xc, x)
        sm.smooth(x, b, False, r, d, q)

    @property
    def memory_bytes(self):
        vectors = [v for v in self.x + self.b if v is not None] + list(self.work[-1])
        return int(sum(v.nbytes for v in vectors) + sum(s.dinv.nbytes for s in self.smoothers)
                   + sum(b.nbytes for b in self.layout.buffers(self.layout.k)))

    def _details(self):
        return (f"{self.layout.k} lattice levels over {self.layout.n_cells} coarse cells, "
                f"{self.cycle}-cycle, Chebyshev degree {self.degree}")
