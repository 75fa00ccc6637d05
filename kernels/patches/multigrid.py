"""The operator and the multigrid of a never-stored refined triangle mesh.

Level ``l`` (``n = 2**l`` fine edges per coarse edge, ``l = 1..k``) is applied
patch by patch with stencil kernels (:mod:`hatkernels._jit.patches`); level 0
is the coarse mesh, whose assembled matrix is factorised once.  This is the
block-structured refinement of an unstructured coarse mesh of B. Bergen,
T. Gradl, F. Hulsemann and U. Rude (A massively parallel multigrid method for
finite elements, Computing in Science & Engineering 8(6), 2006) and of
B. Gmeiner, U. Rude, H. Stengel, C. Waluga and B. Wohlmuth (Towards textbook
efficiency for parallel multigrid, Numer. Math. Theory Methods Appl. 8, 2015):
on each coarse cell the refined mesh is a structured lattice, so the operator
is a stencil and nothing fine but vectors is stored.

The cycle is the stored-mesh one of :mod:`hatkernels.precond.gmg` (the same
Chebyshev smoother on ``D^-1 A`` with Gershgorin's bound, linear interpolation
and its transpose, a direct solve at the bottom): on a mesh without obtuse
angles it is the same linear operator, which the tests check.
"""

from __future__ import annotations

import numpy as np
from scipy.sparse.linalg import LinearOperator

from hatkernels._jit import patches as _p
from hatkernels._jit import sparse as _k
from hatkernels.assembly import assemble_stiffness
from hatkernels.boundary import apply_dirichlet
from hatkernels.checks import integer_option
from hatkernels.coefficients import per_triangle
from hatkernels.errors import InputError
from hatkernels.precond.chebyshev import ChebyshevSmoother
from hatkernels.precond.direct import SparseDirect
from hatkernels.precond.registry import Preconditioner

__all__ = ["PatchOperator", "PatchMultigrid", "element_stiffness"]


def element_stiffness(coarse, kappa):
    """``(m, 3, 3)``: each coarse triangle's P1 stiffness times its coefficient ``kappa``
    (one number per cell); every fine triangle of its patch has the same matrix."""
    p = coarse.points[coarse.triangles]  # (m, 3, 2)
    d1, d2 = p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]
    det = d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0]
    # gradients of the barycentric functions: rows of inv([d1 d2])^T, and minus their sum
    g1 = np.column_stack([d2[:, 1], -d2[:, 0]]) / det[:, None]
    g2 = np.column_stack([-d1[:, 1], d1[:, 0]]) / det[:, None]
    g = np.stack([-g1 - g2, g1, g2], axis=1)  # (m, 3, 2)
    area = 0.5 * np.abs(det)
    return np.ascontiguousarray(np.einsum("mid,mjd->mij", g, g) * (area * kappa)[:, None, None])


class PatchOperator(LinearOperator):
    """The stiffness matrix on level ``level`` of a :class:`PatchLayout`, matrix-free.

    Held rows and columns are taken out (identity rows, as CG solves with) unless
    ``masked=False``.  ``K`` is :func:`element_stiffness` of the coarse cells.
    """

    def __init__(self, layout, K, level=None, masked=True):
        self.layout, self.K = layout, K
        self.level = layout.k if level is None else int(level)
        self.n = 2**self.level
        self.masked = bool(masked)
        self.pe, self.pv = layout.buffers(self.level)
        size = layout.size(self.level)
        super().__init__(dtype=np.dtype(np.float64), shape=(size, size))

    def _run(self, x, out, what):
        lay = self.layout
        _p.apply(x, out, self.n, self.K, lay.topo, lay.held_e, lay.held_v, self.masked,
                 self.pe, self.pv, what)

    def matvec_into(self, x, out):
        """``out = A x`` (distinct contiguous float64 vectors of the level's size)."""
        if out is x:
            raise InputError("PatchOperator.matvec_into: out must not be x")
        self._run(x, out, 0)
        return out

    def _matvec(self, x):
        x = np.ascontiguousarray(x, dtype=np.float64).reshape(-1)
        return self.matvec_into(x, np.empty(self.shape[0]))

    def _rmatvec(self, x):
        return self._matvec(x)

    def diagonal_and_bound(self):
        """``(diagonal, bound)``: the diagonal and Gershgorin's bound on ``D^-1 A`` (as
        :meth:`hatkernels.StiffnessOperator.diagonal_and_bound`, from each triangle's
        absolute entries)."""
        diag, rows = np.empty(self.shape[0]), np.empty(self.shape[0])
        dummy = np.zeros(self.shape[0])
        self._run(dummy, diag, 1)
        self._run(dummy, rows, 2)
        rows /= diag
        return diag, float(rows.max(initial=1.0))

    @property
    def nbytes(self):
        return self.pe.nbytes + self.pv.nbytes + self.K.nbytes


class _Level:
    def __init__(self, layout, K, level, degree, lower, own_x=True):
        self.op = PatchOperator(layout, K, level)
        size = self.op.shape[0]
        self.n = self.op.n
        self.r, self.d, self.q, self.b = (np.empty(size) for _ in range(4))
        self.x = np.empty(size) if own_x else None
        diag, bound = self.op.diagonal_and_bound()
        self.smoother = ChebyshevSmoother(self.op.matvec_into, self.residual,
                                          np.reciprocal(diag, out=diag), degree, bound=bound,
                                          estimate=False, lower=lower)
        self.pe, self.pv = layout.buffers(level)  # restriction into this level

    def residual(self, x, b, out):
        self.op.matvec_into(x, out)
        _k.xpby(b, -1.0, out)

    def smooth(self, x, b, zero_guess):
        self.smoother.smooth(x, b, zero_guess, self.r, self.d, self.q)

    @property
    def nbytes(self):
        vectors = (5 + (self.x is not None)) * self.r.nbytes
        return vectors + self.op.nbytes + self.pe.nbytes + self.pv.nbytes


class PatchMultigrid(Preconditioner):
    """V-cycle multigrid on the levels of a :class:`PatchLayout` (an SPD preconditioner).

    Parameters
    ----------
    layout : PatchLayout
    kappa : ndarray (n_cells,)
        The coefficient on each coarse cell (inherited by its patch).
    degree : int
        Chebyshev degree (products per smoothing).
    lower : float, optional
        Bottom of the smoother's interval as a fraction of its top.
    nested_cycles : int
        Cycles per level of :meth:`full_cycle_into`.
    """

    name = "patch-multigrid"
    kind = "geometric multigrid on refined patches, matrix-free stencils"
    needs_matrix = False

    def __init__(self, layout, kappa, *, degree=2, lower=1.0 / 6.0, nested_cycles=1):
        self.layout = layout
        k = layout.k
        if k < 1:
            raise InputError("the patch multigrid needs refine >= 1")
        super().__init__(layout.size(k))
        self.degree = integer_option(degree, "degree", minimum=1)
        self.nested_cycles = integer_option(nested_cycles, "nested_cycles", minimum=1)
        self.K = element_stiffness(layout.coarse, np.asarray(kappa, dtype=np.float64))
        self.levels = [_Level(layout, self.K, level, self.degree, lower, own_x=level < k)
                       for level in range(1, k + 1)]
        coarse = layout.coarse
        fixed = np.flatnonzero(layout.held_v | (np.diff(layout.topo[6]) == 0))
        A = assemble_stiffness(coarse, per_triangle(np.asarray(kappa, dtype=np.float64)))
        system = apply_dirichlet(A, np.zeros(coarse.n_points), fixed)
        if system.A.shape[0] == 0:
            raise InputError("every point of the coarse mesh is held")
        self._coarse_free, self._coarse_A = system.free, system.A
        self._coarse_solver = SparseDirect(system.A)
        self._coarse_x = np.empty(coarse.n_points)
        self._coarse_b = np.empty(coarse.n_points)
        self._held0 = fixed
        self._pe0, self._pv0 = layout.buffers(0)

    # -- applying -------------------------------------------------------------------------

    def _apply(self, r):
        out = np.empty(self.shape[0])
        return self.apply_into(r, out)

    def _finest_input(self, r):
        lay = self.layout
        b = self.levels[-1].b
        b[:] = r
        _p.zero_held(b, 2**lay.k, lay.topo, lay.held_e, lay.held_v)
        return b

    def _finest_output(self, r, out):
        lay = self.layout
        # identity rows are solved exactly: out = r at the held points
        _p.copy_held(r, out, 2**lay.k, lay.topo, lay.held_e, lay.held_v)
        return out

    def apply_into(self, r, out):
        """``out = M r``: one cycle from a zero guess."""
        b = self._finest_input(r)
        self._cycle(self.layout.k, out, b, True)
        return self._finest_output(r, out)

    def full_cycle_into(self, r, out, cycles=None):
        """Full multigrid: the load restricted to every level, the coarse solve, then each
        level started from the interpolated solution below and ``cycles`` V-cycles (as
        :meth:`hatkernels.precond.gmg.GeometricMultigrid.full_cycle_into`)."""
        cycles = self.nested_cycles if cycles is None else integer_option(
            cycles, "cycles", minimum=1)
        k = self.layout.k
        self._finest_input(r)
        for level in range(k, 0, -1):
            self._restrict(level, self.levels[level - 1].b)
        self._coarse_solve(self._coarse_x, self._coarse_b, True)
        for level in range(1, k + 1):
            lv = self.levels[level - 1]
            x = out if level == k else lv.x
            x[:] = 0.0
            xc = self._coarse_x if level == 1 else self.levels[level - 2].x
            self._prolong_add(level, xc, x)
            for _ in range(cycles):
                self._cycle(level, x, lv.b, False)
        return self._finest_output(r, out)

    def _below(self, level):
        if level == 1:
            return self._coarse_x, self._coarse_b
        c = self.levels[level - 2]
        return c.x, c.b

    def _restrict(self, level, r):
        lay = self.layout
        _, bc = self._below(level)
        if level == 1:
            pe, pv = self._pe0, self._pv0
        else:
            pe, pv = self.levels[level - 2].pe, self.levels[level - 2].pv
        _p.restrict(r, bc, 2**level, lay.topo, pe, pv)
        if level == 1:
            bc[self._held0] = 0.0
        else:
            _p.zero_held(bc, 2 ** (level - 1), lay.topo, lay.held_e, lay.held_v)

    def _prolong_add(self, level, xc, x):
        lay = self.layout
        _p.prolong_add(xc, x, 2**level, lay.topo)
        _p.zero_held(x, 2**level, lay.topo, lay.held_e, lay.held_v)

    def _coarse_solve(self, x, b, zero_guess):
        free = self._coarse_free
        if zero_guess:
            x[:] = 0.0
            x[free] = self._coarse_solver.matvec(b[free])
        else:
            rf = b[free] - self._coarse_A @ x[free]
            x[free] += self._coarse_solver.matvec(rf)

    def _cycle(self, level, x, b, zero_guess):
        if level == 0:
            self._coarse_solve(x, b, zero_guess)
            return
        lv = self.levels[level - 1]
        lv.smooth(x, b, zero_guess)
        lv.residual(x, b, lv.r)
        self._restrict(level, lv.r)
        xc, bc = self._below(level)
        self._cycle(level - 1, xc, bc, True)
        self._prolong_add(level, xc, x)
        lv.smooth(x, b, False)

    # -- describing -----------------------------------------------------------------------

    @property
    def memory_bytes(self):
        return (sum(lv.nbytes for lv in self.levels) + self._coarse_x.nbytes * 2
                + getattr(self._coarse_solver, "memory_bytes", 0))

    def _details(self):
        return (f"{len(self.levels) + 1} levels, V-cycle, Chebyshev degree {self.degree}, "
                f"{self.memory_bytes / 2**20:.0f} MiB")
