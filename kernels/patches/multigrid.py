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

from hatkernels._jit import patch_points as _pp
from hatkernels._jit import patch_product as _product
from hatkernels._jit import patch_smooth as _s
from hatkernels._jit import patches as _p
from hatkernels.assembly import assemble_mass, assemble_stiffness
from hatkernels.boundary import apply_dirichlet
from hatkernels.checks import integer_option, into_vectors
from hatkernels.coefficients import per_triangle
from hatkernels.errors import InputError
from hatkernels.patches.solution import checked_kappa
from hatkernels.precond.direct import SparseDirect, coarse_correction
from hatkernels.precond.registry import Preconditioner

__all__ = ["PatchOperator", "PatchMultigrid", "FinestSmoother", "element_mass",
           "element_stiffness"]

#: The P1 mass matrix of a triangle of unit area, consistent and lumped to its row sums.
_MASS = {False: (np.ones((3, 3)) + np.eye(3)) / 12.0, True: np.eye(3) / 3.0}


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


def element_mass(coarse, sigma, level, lumped=False):
    """``(m, 3, 3)``: the P1 mass matrix, times ``sigma`` (a number, or one per coarse cell;
    >= 0 and finite, else an InputError naming the cell), of
    every fine triangle of level ``level`` (``4**level`` per coarse cell, each of the
    coarse area over ``4**level``), consistent or lumped to its row sums.  Like the
    stiffness, it is the same for every fine triangle of a patch (it depends on the area
    alone), so ``element_stiffness + element_mass`` is the stencil of ``K + M_sigma``."""
    m = coarse.n_triangles
    s = np.asarray(sigma, dtype=np.float64)
    sigma = _per_cell_sigma(np.full(m, float(s)) if s.ndim == 0 else s, m)
    p = coarse.points[coarse.triangles]
    d1, d2 = p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]
    area = 0.5 * np.abs(d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0])
    return np.ascontiguousarray((area * sigma / 4.0**level)[:, None, None]
                                * _MASS[bool(lumped)])


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
        if what == 0 and self.n >= _product.SMALLEST:  # the product, its ring fused
            _product.product(x, out, self.n, self.K, lay.topo, lay.held_e, lay.held_v,
                             self.masked, self.pe, self.pv)
            return
        _p.apply(x, out, self.n, self.K, lay.topo, lay.held_e, lay.held_v, self.masked,
                 self.pe, self.pv, what)

    def matvec_into(self, x, out):
        """``out = A x``; returns ``out``.  ``x`` is read only: any real vector of the
        level's size (copied unless it is a writable C-contiguous float64
        one); ``out`` must be a writable C-contiguous float64 ndarray of that size sharing
        no memory with ``x``, else an InputError names the argument
        (``hatkernels.checks.into_vectors``)."""
        x, = into_vectors("PatchOperator.matvec_into", self.shape[0], {"x": x}, {"out": out})
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


def _per_cell_sigma(sigma, m):
    sigma = np.asarray(sigma, dtype=np.float64)
    if sigma.shape != (m,):
        raise InputError(f"sigma must hold one number per coarse cell ({m}), got shape "
                         f"{sigma.shape}")
    bad = np.flatnonzero(~(np.isfinite(sigma) & (sigma >= 0)))
    if bad.size:
        raise InputError(f"sigma must be >= 0 and finite; it is {float(sigma[bad[0]])!r} on coarse "
                         f"cell {int(bad[0])}")
    return sigma


def inverse_diagonals(layout, K):
    """``(per cell, per edge, per vertex)``: the inverse diagonal of a level's matrix with
    element matrices ``K`` (inside a patch, on a coarse edge, at a coarse vertex: one
    number each; 0 at held and unused points)."""
    tri, edge_cells = layout.topo[0], layout.topo[4]
    trace = K[:, 0, 0] + K[:, 1, 1] + K[:, 2, 2]
    dc = 1.0 / (2.0 * trace)
    de = trace[edge_cells[:, 0]] + np.where(edge_cells[:, 1] >= 0, trace[edge_cells[:, 1]], 0.0)
    dv = np.zeros(layout.n_vertices)
    for lv in range(3):
        np.add.at(dv, tri[:, lv], K[:, lv, lv])
    with np.errstate(divide="ignore"):
        de, dv = 1.0 / de, np.where(dv > 0, 1.0 / np.where(dv > 0, dv, 1.0), 0.0)
    de[layout.held_e] = 0.0
    dv[layout.held_v] = 0.0
    return dc, de, dv


class _Level:
    """One patch level: the fused Chebyshev smoother (:mod:`hatkernels._jit.patch_smooth`),
    its two work vectors and, below the finest level, the cycle's ``x`` and ``b``."""

    def __init__(self, layout, K, level, dinv, bound, degree, lower, finest, dtype, work):
        self.layout, self.K, self.level, self.n = layout, K, level, 2**level
        size = layout.size(level)
        # the work vectors are views into the finest level's: a level needs them only
        # while it smooths and until its residual is restricted
        self.r, self.d = work[0][:size], work[1][:size]
        self.x = None if finest else np.empty(size, dtype)
        self.b = None if finest else np.empty(size, dtype)
        self.pe, self.pv = layout.buffers(level)
        self.dinv = dinv
        self.degree = degree
        upper = bound
        low = lower * upper
        self.theta, self.delta = 0.5 * (upper + low), 0.5 * (upper - low)

    def _sweep(self, mode, last, b, x, c=0.0, c1=0.0, c2=0.0):
        lay = self.layout
        _s.sweep(mode, last, self.n, self.K, *self.dinv, lay.topo, lay.held_e, lay.held_v,
                 self.pe, self.pv, b, x, self.r, self.d, c, c1, c2)

    def residual(self, x, b):
        """``self.r = b - A x``."""
        self._sweep(_s.RESIDUAL, False, b, x)

    def smooth(self, x, b, zero_guess):
        """``degree`` Chebyshev steps on ``D^-1 A`` (as :class:`ChebyshevSmoother`)."""
        sigma = self.theta / self.delta
        rho = 1.0 / sigma
        c = 1.0 / self.theta
        steps = []
        for _ in range(1, self.degree):
            rho_new = 1.0 / (2.0 * sigma - rho)
            steps.append((rho_new * rho, 2.0 * rho_new / self.delta))
            rho = rho_new
        if not steps:
            if zero_guess:
                lay = self.layout
                _s.scaled_copy(self.n, *self.dinv, lay.topo, lay.held_e, lay.held_v, c, b, x)
            else:
                self._sweep(_s.START, True, b, x, c)
            return
        if zero_guess:
            self._sweep(_s.ZERO, len(steps) == 1, b, x, c, *steps[0])
            steps = steps[1:]
        else:
            self._sweep(_s.START, False, b, x, c)
        for i, (c1, c2) in enumerate(steps):
            self._sweep(_s.STEP, i == len(steps) - 1, b, x, c, c1, c2)

    @property
    def nbytes(self):
        """Bytes of this level's own vectors (the shared work vectors not counted)."""
        return 2 * (self.x is not None) * self.r.nbytes


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
    sigma : ndarray (n_cells,), optional
        A mass term: the operator is ``K + M_sigma`` (``M_sigma`` the mass matrix times
        ``sigma``, one number >= 0 per coarse cell, consistent or ``lumped``), every level
        its own rediscretisation (for nested P1 spaces and the consistent mass the same
        as the Galerkin product ``P^T A P``; lumped, close to it); the time step's
        ``M / tau + K`` with ``sigma = capacity / tau``.
    single : bool
        Keep the levels' vectors in single precision (the arithmetic stays double):
        half the preconditioner's memory, for the largest solves.  CG around it
        still converges to the asked tolerance (tests/test_patches_solve.py).
    """

    name = "patch-multigrid"
    kind = "geometric multigrid on refined patches, matrix-free stencils"
    needs_matrix = False

    def __init__(self, layout, kappa, *, degree=2, lower=1.0 / 6.0, nested_cycles=1,
                 single=False, sigma=None, lumped=False):
        self.layout = layout
        k = layout.k
        if k < 1:
            raise InputError("the patch multigrid needs refine >= 1")
        super().__init__(layout.size(k))
        self.degree = integer_option(degree, "degree", minimum=1)
        self.nested_cycles = integer_option(nested_cycles, "nested_cycles", minimum=1)
        kappa = checked_kappa(kappa, layout.n_cells)
        stiffness = element_stiffness(layout.coarse, kappa)
        if sigma is None:
            # the 2-D stiffness stencils do not change with the level, and Gershgorin's
            # bound is the same from level 2 up (rows inside, on an edge, at a vertex)
            E = [stiffness] * k
            dinv = [inverse_diagonals(layout, stiffness)] * k
            checked = range(1, min(k, 2) + 1)
        else:
            sigma = _per_cell_sigma(sigma, layout.n_cells)
            E = [stiffness + element_mass(layout.coarse, sigma, level, lumped)
                 for level in range(1, k + 1)]
            dinv = [inverse_diagonals(layout, e) for e in E]
            checked = range(1, k + 1)  # the mass term scales with the level
        bounds = [PatchOperator(layout, E[level - 1], level).diagonal_and_bound()[1]
                  for level in checked]
        self.K = E[-1]  # the finest level's element matrices
        dtype = np.float32 if single else np.float64
        size = layout.size(k)
        self._work = (np.empty(size, dtype), np.empty(size, dtype))
        self.levels = [_Level(layout, E[level - 1], level, dinv[level - 1],
                              bounds[min(level, len(bounds)) - 1], self.degree, lower,
                              finest=level == k, dtype=dtype, work=self._work)
                       for level in range(1, k + 1)]
        self.single = bool(single)
        self._scratch = None  # the finest right-hand side when r is not 0 at held points
        coarse = layout.coarse
        fixed = np.flatnonzero(layout.held_v | (np.diff(layout.topo[6]) == 0))
        A = assemble_stiffness(coarse, per_triangle(np.asarray(kappa, dtype=np.float64)))
        if sigma is not None:
            A = (A + assemble_mass(coarse, per_triangle(sigma), lumped=lumped)).tocsr()
        system = apply_dirichlet(A, np.zeros(coarse.n_points), fixed)
        self._coarse_free, self._coarse_A = system.free, system.A
        # every coarse point held: the coarse space has nothing to solve (its correction 0)
        self._coarse_solver = SparseDirect(system.A) if system.A.shape[0] else None
        self._coarse_x = np.empty(coarse.n_points)
        self._coarse_b = np.empty(coarse.n_points)
        self._held0 = fixed
        self._pe0, self._pv0 = layout.buffers(0)

    # -- applying -------------------------------------------------------------------------

    def _apply(self, r):
        out = np.empty(self.shape[0])
        return self.apply_into(r, out)

    def _finest_input(self, r):
        """``r`` itself when it is 0 at the held points (as CG's residuals are), else a copy
        with those zeroed."""
        lay = self.layout
        n = 2**lay.k
        if _pp.held_max_abs(r, n, lay.topo, lay.held_e, lay.held_v) == 0.0:
            return r
        if self._scratch is None:
            self._scratch = np.empty(self.shape[0])
        self._scratch[:] = r
        lay.zero_held(self._scratch)
        return self._scratch

    def _finest_output(self, r, out):
        lay = self.layout
        # identity rows are solved exactly: out = r at the held points
        lay.copy_held(r, out)
        return out

    def apply_into(self, r, out):
        """``out = M r``: one cycle from a zero guess; returns ``out``.  ``r`` is read only
        (any real vector of the finest level's size, copied unless it is a writable
        C-contiguous float64 one); ``out`` must be a writable C-contiguous float64
        ndarray of that size (with ``single`` too: only the levels' own vectors are
        float32) sharing no memory with ``r``; else an InputError names the argument
        (``hatkernels.checks.into_vectors``)."""
        r, = into_vectors("PatchMultigrid.apply_into", self.shape[0], {"r": r}, {"out": out})
        b = self._finest_input(r)
        self._cycle(self.layout.k, out, b, True)
        return self._finest_output(r, out)

    def full_cycle_into(self, r, out, cycles=None):
        """Full multigrid: the load restricted to every level, the coarse solve, then each
        level started from the interpolated solution below and ``cycles`` V-cycles (as
        :meth:`hatkernels.precond.gmg.GeometricMultigrid.full_cycle_into`); ``r`` and
        ``out`` as in :meth:`apply_into`."""
        r, = into_vectors("PatchMultigrid.full_cycle_into", self.shape[0], {"r": r},
                          {"out": out})
        cycles = self.nested_cycles if cycles is None else integer_option(
            cycles, "cycles", minimum=1)
        k = self.layout.k
        b = self._finest_input(r)
        for level in range(k, 0, -1):
            self._restrict(level, b if level == k else self.levels[level - 1].b)
        self._coarse_solve(self._coarse_x, self._coarse_b, True)
        for level in range(1, k + 1):
            lv = self.levels[level - 1]
            x = out if level == k else lv.x
            x[:] = 0.0
            xc = self._coarse_x if level == 1 else self.levels[level - 2].x
            self._prolong_add(level, xc, x)
            for _ in range(cycles):
                self._cycle(level, x, b if level == k else lv.b, False)
        return self._finest_output(r, out)

    def _below(self, level):
        if level == 1:
            return self._coarse_x, self._coarse_b
        c = self.levels[level - 2]
        return c.x, c.b

    def _restrict(self, level, r):
        lay = self.layout
        _, bc = self._below(level)
        pe, pv = (self._pe0, self._pv0) if level == 1 else (self.levels[level - 2].pe,
                                                             self.levels[level - 2].pv)
        _p.restrict(r, bc, 2**level, lay.topo, pe, pv)
        if level == 1:
            bc[self._held0] = 0.0
        else:
            lay.zero_held(bc, level - 1)

    def _prolong_add(self, level, xc, x):
        lay = self.layout
        _p.prolong_add(xc, x, 2**level, lay.topo)
        lay.zero_held(x, level)

    def _coarse_solve(self, x, b, zero_guess):
        if self._coarse_solver is None:
            if zero_guess:
                x[:] = 0.0
            return
        coarse_correction(self._coarse_solver, self._coarse_A, self._coarse_free, x, b,
                          zero_guess)

    def _cycle(self, level, x, b, zero_guess):
        if level == 0:
            self._coarse_solve(x, b, zero_guess)
            return
        lv = self.levels[level - 1]
        lv.smooth(x, b, zero_guess)
        lv.residual(x, b)
        self._restrict(level, lv.r)
        xc, bc = self._below(level)
        self._cycle(level - 1, xc, bc, True)
        self._prolong_add(level, xc, x)
        lv.smooth(x, b, False)

    # -- describing -----------------------------------------------------------------------

    @property
    def memory_bytes(self):
        pe, pv = self.layout.buffers(self.layout.k)
        return (sum(lv.nbytes for lv in self.levels) + self._coarse_x.nbytes * 2
                + sum(w.nbytes for w in self._work) + pe.nbytes + pv.nbytes
                + getattr(self._coarse_solver, "memory_bytes", 0))

    def _details(self):
        precision = "single" if self.single else "double"
        return (f"{len(self.levels) + 1} levels, V-cycle, Chebyshev degree {self.degree}, "
                f"{precision} precision vectors")


class FinestSmoother:
    """The finest level's Chebyshev smoother of a :class:`PatchMultigrid` from a zero guess,
    ``z = S r``, as a preconditioner (``apply_into``): symmetric and positive definite (its
    polynomial in ``D^-1 A`` is positive on the whole spectrum), one fused sweep per
    application at degree 2.  The patch march tries it before the V-cycle
    (:data:`hatkernels.transient_steps.SMOOTHER_ITERATIONS`)."""

    def __init__(self, multigrid):
        self.level = multigrid.levels[-1]
        self.shape = multigrid.shape

    def apply_into(self, r, z):
        """``z = S r``; returns ``z``.  ``r`` and ``z`` as ``r`` and ``out`` of
        :meth:`PatchMultigrid.apply_into`."""
        r, = into_vectors("FinestSmoother.apply_into", self.shape[0], {"r": r}, {"z": z})
        self.level.smooth(z, r, True)
        return z

