"""Geometric multigrid on nested refinements, matrix-free: the ``gmg`` preconditioner.

A mesh made by :meth:`hatkernels.Mesh.refine` remembers its coarser meshes;
each level gets a matrix-free :class:`~hatkernels.StiffnessOperator` (with
identity rows at the Dirichlet points), a Jacobi-scaled Chebyshev (or damped
Jacobi) smoother built on that operator and its diagonal, and transfers by
linear interpolation at edge midpoints (prolongation) and its transpose
(restriction), both matrix-free.  The coarsest level is solved by a sparse
factorisation of its assembled matrix.

One application is one cycle from a zero guess: a fixed linear operator.
It is symmetric because the smoother is a polynomial in ``D^-1 A`` (the
same one before and after the coarse correction), restriction is the
transpose of prolongation and every coarse correction is a palindrome of
symmetric cycles (V: one; W: two; F: V, F, V); it is positive definite
because the cycle converges.  So CG may use it.

Triangles and tetrahedra alike: the levels, transfers and smoothers only
see points, edges and the operator, so one code serves both (a
tetrahedron's eight children, a triangle's four).

Coefficients go down the levels: constants and callables are applied on
each level as given; per-cell values are averaged over the children of
each coarse cell; per-point values keep their coarse points; per-cell
tensors are averaged.  Jumps in the coefficient that
the coarse meshes do not resolve make the coarse operators poor
approximations, and iteration counts grow: then ``amg`` is the better choice
(see docs/matrix-free.md).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from hatkernels._jit import multigrid as _mg
from hatkernels._sets import index_complement, index_union
from hatkernels.assembly import assemble_stiffness
from hatkernels.boundary import apply_dirichlet
from hatkernels.checks import integer_option, into_vectors, point_indices, real_option
from hatkernels.coefficients import parse_coefficient
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh
from hatkernels.operators import StiffnessOperator
from hatkernels.precond.direct import SparseDirect, coarse_correction
from hatkernels.precond.gmg_levels import (
    Level,
    coarsen_coefficient,
    restrict_mass,
    transfer_indices,
)
from hatkernels.precond.registry import Preconditioner, make_preconditioner

__all__ = ["GeometricMultigrid", "coarsen_coefficient"]

_CYCLES = ("V", "W", "F")
_SMOOTHERS = ("chebyshev", "jacobi")
_COARSE = ("direct", "amg")

NO_HISTORY = (
    "gmg needs a mesh that remembers how it was refined: build it with Mesh.refine() from a "
    "coarse mesh (for example hatkernels.mesh.rectangle(16, 16).refine().refine().refine()), "
    "or use preconditioner='amg'"
)


def _checked_mass(mass, n):
    """``mass`` as a float64 vector of ``n`` finite nonnegative values, or None."""
    if mass is None:
        return None
    m = np.asarray(mass)
    if m.shape != (n,) or m.dtype.kind not in "fiu":
        raise InputError(f"gmg: mass must be {n} real numbers (one per point of the mesh), "
                         f"got shape {m.shape} and dtype {m.dtype}")
    m = m.astype(np.float64, copy=False)
    bad = ~(np.isfinite(m) & (m >= 0))
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"gmg: mass[{i}] = {float(m[i])!r}; it must be finite and >= 0")
    return m


class GeometricMultigrid(Preconditioner):
    """Geometric multigrid cycle as an SPD preconditioner (``gmg``).

    Parameters
    ----------
    A : StiffnessOperator, sparse matrix or LinearOperator
        The operator CG solves with.  A :class:`~hatkernels.StiffnessOperator`
        brings its mesh, coefficient and Dirichlet points along.  Otherwise
        ``mesh`` is required, and ``A`` is either the full system with
        identity rows at the Dirichlet points (size ``n_points``) or the
        reduced system of :func:`hatkernels.apply_dirichlet` (size ``n_free``).
    mesh : Mesh
        The finest mesh, made by :meth:`Mesh.refine` (it carries the levels).
    coefficient : any kind, optional
        The diffusion coefficient of ``A``.
    dirichlet : array of point indices, optional
        The Dirichlet points of ``A`` (default: the whole boundary).
    cycle : {"V", "W", "F"}, optional
        Default ``"V"`` on triangles and ``"F"`` on tetrahedra.  In 3-D the
        V-cycle's iterations grew with the depth of the hierarchy (rtol
        1e-8 on ``cuboid(2, 2, 2)`` refined 1 to 5 times: 5, 7, 8, 9, 10)
        while the F-cycle's stay put (5, 7, 8, 8, 7); a coarser level has an
        eighth of the points, so the F-cycle's extra visits cost about 15 %
        more work per cycle (``sum (l + 1) / 8^l`` against ``sum 1 / 8^l``).
    smoother : {"chebyshev", "jacobi"}
    degree : int
        Chebyshev degree (products per smoothing), or Jacobi sweeps.
    lower : float
        Bottom of the Chebyshev smoother's interval as a fraction of its top
        (Gershgorin's bound on the spectrum of ``D^-1 A``).
    omega : float
        Jacobi damping.
    coarse : {"direct", "amg"}
        Solver of the coarsest level (``amg`` when it is too big to factorise).
    nested_cycles : int
        Cycles per level of :meth:`full_cycle_into` (full multigrid, the
        ``start="nested"`` of :func:`hatkernels.solve`); default 1.
    variant : str, optional
        Matrix-free variant of the level operators (default: that of ``A``
        when it is a StiffnessOperator, whose data the finest level then
        shares; else :func:`hatkernels.operators.preferred_variant` of each level).
    mass : array of shape (n_points,), optional
        A lumped mass term of ``A``: its operator is the stiffness plus
        ``diag(mass)`` (a reaction, a Robin side or a time step's
        ``M / tau``, each lumped to its row sums; nonnegative, finite).  Every
        level gets its own, restricted from the finest (``P^T m``, which is the
        coarse mesh's lumped mass).  Without it the levels carry the stiffness
        alone, a poor preconditioner when the mass term is large (short time
        steps: 141 CG iterations for a step of ``1e-6`` where ``amg`` needed 3,
        docs/transient.md).

    The defaults (degree 2 on the interval [bound / 6, bound]) were the
    fastest of degrees 2 and 3 with bottoms bound / 30 to bound / 3 on
    ``rectangle(11, 11)`` refined 7 times: 8 CG iterations to rtol 1e-8,
    against 10 for degree 3 on [bound / 33, bound] (docs/matrix-free.md).

    Costs, per point of the finest mesh: 4 work vectors and the smoother's
    inverse diagonal (40 bytes; the caller's output serves as the finest
    solution), the transfer indices (about 20 bytes per coarse point, so 5
    per fine point), a third more for the coarser levels together; one
    V-cycle does ``2 degree`` fine-level products (a zero first guess saves
    one) plus a third more on the coarser levels.  A ``mass`` term adds its
    vector on every level (8 bytes per point) and one vector pass to each product.
    """

    name = "gmg"
    #: Peak bytes per point of a whole solve with it, beyond the mesh (measured at
    #: about 1e6 unknowns, docs/performance.md; hatkernels.memory uses it).
    solve_bytes_per_point = 160
    kind = "geometric multigrid on nested refinements (matrix-free)"
    needs_matrix = False
    prefers_matrix_free = True
    needs_mesh = True

    @classmethod
    def from_context(cls, A, context, **options):
        """Take the mesh, coefficient, held points and variant from ``context`` unless given.

        A :class:`~hatkernels.StiffnessOperator` ``A`` brings its own (and
        the finest level then shares its data), so the context is not read.
        """
        if isinstance(A, StiffnessOperator):
            return cls(A, **options)
        for key, value in (("mesh", context.mesh), ("coefficient", context.coefficient),
                           ("dirichlet", context.fixed), ("variant", context.variant),
                           ("mass", context.mass)):
            if value is not None:
                options.setdefault(key, value)
        options.setdefault("quadrature", context.quadrature)
        return cls(A, **options)

    def __init__(
        self,
        A,
        *,
        mesh=None,
        coefficient=None,
        dirichlet=None,
        cycle=None,
        smoother="chebyshev",
        degree=2,
        lower=1.0 / 6.0,
        omega=2.0 / 3.0,
        coarse="direct",
        variant=None,
        quadrature=2,
        nested_cycles=1,
        mass=None,
    ):
        fine_op = None
        if isinstance(A, StiffnessOperator):
            if (variant is None or variant == A.variant) and coefficient is None and dirichlet is None:
                # the finest level works with A itself: no second copy of its data
                fine_op = A
            variant = A.variant if variant is None else variant
            if mesh is not None and mesh is not A.mesh:
                raise InputError("gmg: mesh differs from the mesh of the StiffnessOperator A")
            mesh = A.mesh
            coefficient = A.coefficient if coefficient is None else coefficient
            dirichlet = A.fixed if dirichlet is None else dirichlet
        if mesh is None:
            raise InputError("gmg: pass mesh=... (the refined mesh A comes from); " + NO_HISTORY)
        if not isinstance(mesh, Mesh):
            raise InputError(f"gmg: mesh must be a hatkernels.Mesh, got {type(mesh).__name__}")
        if mesh.refinement is None:
            raise InputError("gmg: this mesh has no refinement history. " + NO_HISTORY)
        if cycle is None:
            cycle = "V" if mesh.dim == 2 else "F"
        for name, value, choices in (
            ("cycle", cycle, _CYCLES),
            ("smoother", smoother, _SMOOTHERS),
            ("coarse", coarse, _COARSE),
        ):
            if value not in choices:
                raise InputError(f"gmg: {name} must be one of {choices}, got {value!r}")
        degree = integer_option(degree, "gmg: degree", minimum=1)
        self.nested_cycles = integer_option(nested_cycles, "gmg: nested_cycles", minimum=1)
        lower = real_option(lower, "gmg: lower", between=(0, 1))
        n = mesh.n_points
        fixed = self._fixed(mesh, dirichlet)
        mass = _checked_mass(mass, n)
        if fixed.size == mesh.unused_points().size and (mass is None or not mass.any()):
            raise InputError(
                "gmg: the problem holds no point at a given value (no Dirichlet points) and "
                "has no mass term; gmg's levels would carry the stiffness alone, which is "
                "singular then: use preconditioner='amg'"
            )
        free = index_complement(n, fixed)
        if A.shape[0] == n:
            self._free = None
        elif A.shape[0] == free.size:
            self._free = free
        else:
            raise InputError(
                f"gmg: A has {A.shape[0]} rows, but the mesh has {n} points of which {free.size} "
                "are free: pass the Dirichlet points A was reduced with (dirichlet=...)"
            )
        super().__init__(A.shape[0])
        self.cycle = cycle
        self.smoother = smoother
        self.degree = int(degree)
        self.lower = float(lower)
        coef = parse_coefficient(coefficient, mesh, name="coefficient", tensor=True)

        meshes = mesh.levels()  # coarsest first
        coefs = [coef]
        fixeds = [fixed]
        for fine, coarse_mesh in zip(meshes[:0:-1], meshes[-2::-1], strict=True):
            coefs.append(coarsen_coefficient(coefs[-1], fine, coarse_mesh))
            is_fixed = np.zeros(fine.n_points, dtype=bool)
            is_fixed[fixeds[-1]] = True
            is_fixed_c = is_fixed[fine.refinement.coarse_points]
            is_fixed_c[coarse_mesh.unused_points()] = True
            fixeds.append(np.flatnonzero(is_fixed_c))
        coefs, fixeds = coefs[::-1], fixeds[::-1]
        transfers = [transfer_indices(m.refinement) for m in meshes[1:]]
        masses = [mass]
        for t in transfers[::-1]:
            masses.append(None if mass is None else restrict_mass(masses[-1], t))
        masses = masses[::-1]  # coarsest first, as the meshes
        ops = [None] * (len(meshes) - 2) + [fine_op]
        # the finest level's x is the caller's output, unless A acts on the free points only
        own_x = [True] * (len(meshes) - 2) + [self._free is not None]
        # one set of smoother work vectors for all levels: a level's are dead while the
        # levels below it work (V, W and F cycles and the nested start alike)
        self._scratch = tuple(np.empty(n) for _ in range(3))
        self.levels = [
            Level(m, c, f, variant, smoother, self.degree, omega, quadrature, op, own, lower, w,
                  self._scratch)
            for m, c, f, op, own, w in zip(meshes[1:], coefs[1:], fixeds[1:], ops, own_x,
                                           masses[1:], strict=True)
        ]
        for lv, t in zip(self.levels, transfers, strict=True):
            lv.set_transfer(t)
        self._setup_coarse(meshes[0], coefs[0], fixeds[0], coarse, quadrature, masses[0])

    @staticmethod
    def _fixed(mesh, dirichlet):
        if dirichlet is None:
            d = mesh.boundary_points().astype(np.int64)
        else:
            d = point_indices(dirichlet, mesh.n_points, "gmg: dirichlet")
        return index_union(mesh.n_points, d, mesh.unused_points())

    def _setup_coarse(self, mesh, coef, fixed, coarse, quadrature, mass=None):
        self.coarse_mesh = mesh
        self.coarse_fixed = fixed
        A = assemble_stiffness(mesh, coef, quadrature=quadrature)
        if mass is not None:
            A = (A + sp.diags_array(mass)).tocsr()
        system = apply_dirichlet(A, np.zeros(mesh.n_points), fixed)
        if system.A.shape[0] == 0:
            raise InputError("gmg: every point of the coarsest mesh is a Dirichlet point")
        self._coarse_free = system.free
        if coarse == "direct":
            self._coarse_solver = SparseDirect(system.A)
        else:
            self._coarse_solver = make_preconditioner(system.A, "amg")
        self._coarse_A = system.A
        self._coarse_x = np.empty(mesh.n_points)
        self._coarse_b = np.empty(mesh.n_points)

    # -- applying -------------------------------------------------------------------

    def _apply(self, r):
        out = np.empty(self.shape[0])
        self.apply_into(r, out)
        return out

    def _finest_input(self, r, out):
        """The finest level's right-hand side filled from ``r`` (zero at the fixed points),
        and the vector its solution goes into (``out`` itself when A acts on all points)."""
        fine = self.levels[-1]
        b = fine.b
        if self._free is None:
            x = out
            if not r[fine.fixed].any():
                return r, x  # the cycle reads b, never writes it: no copy needed
            b[:] = r
        else:
            b[:] = 0.0
            b[self._free] = r
            x = fine.x
        _mg.zero_at(fine.fixed, b)
        return b, x

    def _finest_output(self, r, out, x):
        if self._free is None:
            fixed = self.levels[-1].fixed
            x[fixed] = r[fixed]  # identity rows are solved exactly
        else:
            np.take(x, self._free, out=out)  # no temporary, unlike out[:] = x[free]
        return out

    def apply_into(self, r, out):
        """``out = M r`` (one cycle from a zero guess) with no allocation on the finest level;
        returns ``out``.

        ``r`` is read only: any real vector of length ``n`` (copied unless it is a
        writable C-contiguous float64 one); ``out`` must be a writable C-contiguous
        float64 ndarray of shape ``(n,)`` sharing no memory with ``r``, else an InputError
        names the argument (``hatkernels.checks.into_vectors``).
        """
        r, = into_vectors("GeometricMultigrid.apply_into", self.shape[0], {"r": r},
                          {"out": out})
        b, x = self._finest_input(r, out)
        self._cycle(len(self.levels), x, b, True, self.cycle)
        return self._finest_output(r, out, x)

    def full_cycle_into(self, r, out, cycles=None):
        """``out`` = full multigrid's approximation of ``A^-1 r``: nested iteration.

        The right-hand side goes down the levels by restriction (the
        transpose of the linear interpolation: on nested spaces, exactly the
        load the coarser mesh's own hat functions see); the coarsest level
        is solved; then each finer level starts from the interpolated
        solution of the one below and runs ``cycles`` cycles.  On a smooth
        problem each level's algebraic error then stays below its
        discretisation error (A. Brandt, Multi-level adaptive solutions to
        boundary-value problems, Math. Comp. 31, 1977; U. Trottenberg,
        C. W. Oosterlee and A. Schuller, Multigrid, 2001, section 2.6), for
        about ``cycles`` cycles' work and a third more (default: the
        ``nested_cycles`` the preconditioner was built with).  ``r`` and
        ``out`` as in :meth:`apply_into`; returns ``out``.
        """
        r, = into_vectors("GeometricMultigrid.full_cycle_into", self.shape[0], {"r": r},
                          {"out": out})
        cycles = self.nested_cycles if cycles is None else integer_option(
            cycles, "gmg: cycles", minimum=1)
        b, x = self._finest_input(r, out)
        count = len(self.levels)
        below = [(self._coarse_x, self._coarse_b, self.coarse_fixed)] + [
            (lv.x, lv.b, lv.fixed) for lv in self.levels[:-1]]
        loads = [lv.b for lv in self.levels[:-1]] + [b]
        for level in range(count, 0, -1):  # the loads, finest to coarsest
            lv = self.levels[level - 1]
            cp, e, mid, first_low, by_high_ptr, by_high = lv.transfer
            _, bc, cfixed = below[level - 1]
            _mg.restrict(cp, mid, first_low, by_high_ptr, by_high, loads[level - 1], bc)
            _mg.zero_at(cfixed, bc)
        self._coarse_solve(self._coarse_x, self._coarse_b, True)
        for level in range(1, count + 1):  # the solutions, coarsest to finest
            lv = self.levels[level - 1]
            xl = x if level == count else lv.x
            cp, e, mid = lv.transfer[:3]
            xl[:] = 0.0
            _mg.prolong_add(cp, e, mid, below[level - 1][0], xl)
            _mg.zero_at(lv.fixed, xl)
            for _ in range(cycles):
                self._cycle(level, xl, loads[level - 1], False, self.cycle)
        return self._finest_output(r, out, x)

    def _coarse_solve(self, x, b, zero_guess):
        coarse_correction(self._coarse_solver, self._coarse_A, self._coarse_free, x, b,
                          zero_guess)

    def _cycle(self, level, x, b, zero_guess, kind):
        """One cycle on ``level`` (1 = the first refined mesh, 0 = the coarsest)."""
        if level == 0:
            self._coarse_solve(x, b, zero_guess)
            return
        lv = self.levels[level - 1]
        lv.smooth(x, b, zero_guess)  # with a zero guess x is overwritten, not read
        lv.residual(x, b, lv.r)
        cp, e, mid, first_low, by_high_ptr, by_high = lv.transfer
        if level == 1:
            xc, bc, cfixed = self._coarse_x, self._coarse_b, self.coarse_fixed
        else:
            c = self.levels[level - 2]
            xc, bc, cfixed = c.x, c.b, c.fixed
        _mg.restrict(cp, mid, first_low, by_high_ptr, by_high, lv.r, bc)
        _mg.zero_at(cfixed, bc)
        if kind == "V":
            self._cycle(level - 1, xc, bc, True, "V")
        elif kind == "W":
            self._cycle(level - 1, xc, bc, True, "W")
            self._cycle(level - 1, xc, bc, False, "W")
        else:  # F: the palindrome V, F, V keeps the cycle symmetric
            self._cycle(level - 1, xc, bc, True, "V")
            self._cycle(level - 1, xc, bc, False, "F")
            self._cycle(level - 1, xc, bc, False, "V")
        # x is zero at the fixed points (identity rows, zero right-hand side
        # there): add the correction everywhere, then zero them again
        _mg.prolong_add(cp, e, mid, xc, x)
        _mg.zero_at(lv.fixed, x)
        lv.smooth(x, b, False)

    # -- describing -------------------------------------------------------------------

    @property
    def memory_bytes(self):
        coarse = self._coarse_solver.memory_bytes + self._coarse_A.data.nbytes * 2
        scratch = sum(v.nbytes for v in self._scratch)
        return int(sum(lv.nbytes for lv in self.levels) + scratch + coarse)

    def _details(self):
        sizes = "/".join(
            str(m.n_points) for m in [self.coarse_mesh] + [lv.mesh for lv in self.levels]
        )
        if self.smoother == "chebyshev":
            sm = f"Chebyshev degree {self.degree} on [{self.lower:.3g} x bound, bound]"
        else:
            sm = f"{self.degree} damped Jacobi sweeps"
        return (
            f"{len(self.levels) + 1} levels ({sizes} points), {self.cycle}-cycle, {sm}, "
            f"{self.levels[-1].op.variant} matrix-free operators, coarsest by "
            f"{self._coarse_solver.name}"
        )
