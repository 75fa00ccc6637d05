"""Algebraic multigrid preconditioners on PyAMG hierarchies.

``amg-sa`` builds a smoothed-aggregation hierarchy
(``pyamg.smoothed_aggregation_solver``), ``amg-rs`` a classical Ruge-Stuben
one (``pyamg.ruge_stuben_solver``).  One application is one multigrid cycle
from a zero initial guess, which is a fixed linear operator.  It is
symmetric because the restriction is the transpose of the prolongation, the
post-smoother is the adjoint of the pre-smoother and the coarsest solve is
symmetric; it is positive definite because the cycle converges.  Two
smoothers keep that symmetry:

``smoother="gauss-seidel"`` (the default of ``amg-sa``)
    PyAMG's symmetric Gauss-Seidel (a forward then a backward sweep) before
    and after the coarse correction; serial compiled code.
``smoother="chebyshev"`` (the default of ``amg-rs``)
    Jacobi-scaled Chebyshev polynomial of ``degree`` steps, the same
    polynomial before and after; every product (A, P, R) and vector update
    runs on this project's parallel kernels.  Its interval's top is
    Gershgorin's bound (``estimate=False``) or 1.1 times a 10-step Lanczos
    estimate, its bottom ``lower`` times the top (PyAMG's 1/33 by default;
    ``amg-rs`` smooths [top/4, top], which its coarse levels complement:
    5 iterations on 2-D Poisson where PyAMG's interval needs 9 to 14).
    See docs/solvers.md for the measurements.

The cycle itself is driven here, not by ``MultilevelSolver.aspreconditioner``,
which also computes the residual norm before and after each cycle (two
extra fine-level products per application that a preconditioner does not need).
"""

import numpy as np
import pyamg
import scipy.sparse as sp

from hatkernels._jit import amg as _a
from hatkernels._jit import sparse as _k
from hatkernels.checks import integer_option, into_vectors, real_option
from hatkernels.errors import InputError
from hatkernels.precond.chebyshev import ChebyshevSmoother
from hatkernels.precond.registry import Preconditioner, require_csr
from hatkernels.sparse import as_csr

__all__ = ["SmoothedAggregationAMG", "RugeStubenAMG"]

_CYCLES = ("V", "W")
_SMOOTHERS = ("gauss-seidel", "chebyshev")
def _nbytes(M):
    if M is None:
        return 0
    if sp.issparse(M):
        M = M.tocsr() if M.format not in ("csr", "csc", "bsr") else M
        return M.data.nbytes + M.indices.nbytes + M.indptr.nbytes
    return int(getattr(M, "nbytes", 0))


class _ChebyshevLevel:
    """One level's arrays for the parallel cycle: A, P, R in CSR, 1/diag(A), coefficients."""

    def __init__(self, level, degree, lower=None, estimate=True):
        own = getattr(level, "own", False)
        known = getattr(level, "diagonal", None) if own else None
        if own:
            # built by ClassicalHierarchy from a checked matrix: well formed (the structure
            # checks of as_csr would cost a few passes per level); only finiteness is
            # checked, here unless the hierarchy found it while packing (``known``)
            A = level.A
            for name, M in (("A", A), ("P", level.P), ("R", level.R)):
                if known is None and M is not None and not _k.all_finite(M.data):
                    raise InputError(f"amg: a level's {name} has a non-finite entry (the "
                                     f"coarse levels overflowed: rescale the problem)")
            self.A = self._own(A)
        else:
            A = as_csr(level.A, "level A")
            self.A = (A.indptr, A.indices, A.data)
        transfer = self._own if own else self._csr
        self.P = transfer(level.P) if getattr(level, "P", None) is not None else None
        self.R = transfer(level.R) if getattr(level, "R", None) is not None else None
        self.n = A.shape[0]
        if known is not None:
            dinv, gershgorin = known  # the strength pass found them (its diagonals > 0)
        else:
            dinv = np.empty(self.n)
            # Gershgorin's bound on the spectrum of D^-1 A is guaranteed; Lanczos is tighter.
            gershgorin, row = _a.diagonal_and_bound(*self.A, dinv)
            if row >= 0:
                raise InputError(f"amg chebyshev smoother: diagonal entry of row {row} of a "
                                 f"level with {self.n} unknowns is {A.diagonal()[row]}; "
                                 f"it must be > 0")
        arrays = self.A
        self.smoother = ChebyshevSmoother(
            lambda x, out: _k.spmv(*arrays, x, out),
            lambda x, b, out: _k.residual(*arrays, x, b, out),
            dinv,
            degree,
            bound=float(gershgorin),
            estimate=estimate,
            lower=lower,
        )
        self.dinv = dinv

    @staticmethod
    def _own(M):
        itype = np.result_type(M.indptr.dtype, M.indices.dtype)
        return (np.ascontiguousarray(M.indptr, dtype=itype),
                np.ascontiguousarray(M.indices, dtype=itype), M.data)

    @staticmethod
    def _csr(M):
        C = sp.csr_array(M)
        used = C.indices[: C.indptr[-1]]
        if used.size and (used.min() < 0 or used.max() >= C.shape[1]):
            raise InputError("amg: a transfer operator has a column index out of range")
        itype = np.result_type(C.indptr.dtype, C.indices.dtype)
        return (np.ascontiguousarray(C.indptr, dtype=itype),
                np.ascontiguousarray(C.indices, dtype=itype),
                np.ascontiguousarray(C.data, dtype=np.float64))

    def smooth(self, x, b, zero_guess, r, d, q):
        """Chebyshev smoothing of ``A x = b`` in place; ``r``, ``d``, ``q`` are work vectors."""
        self.smoother.smooth(x, b, zero_guess, r, d, q)


class _AMG(Preconditioner):
    """Shared driver: setup through a PyAMG solver function, cycle with either smoother."""

    solver = None  # the pyamg function
    kind = "?"

    def __init__(self, A, cycle, smoother, degree, options, lower=None, estimate=True):
        C = require_csr(A, self.name)
        if cycle not in _CYCLES:
            raise InputError(f"{self.name}: cycle must be one of {_CYCLES} (symmetric cycles), "
                             f"got {cycle!r}")
        if smoother not in _SMOOTHERS:
            raise InputError(f"{self.name}: smoother must be one of {_SMOOTHERS}, "
                             f"got {smoother!r}")
        degree = integer_option(degree, f"{self.name}: degree", minimum=1)
        lower = real_option(lower, f"{self.name}: lower", between=(0, 1), allow_none=True)
        super().__init__(C.shape[0])
        self.ml = self._build(C, options)
        self.cycle = cycle
        self.smoother = smoother
        self.degree = int(degree)
        levels = self.ml.levels
        self._coarse_A = levels[-1].A
        self._work = None
        self.lower, self.estimate = lower, bool(estimate)
        if smoother == "chebyshev":
            self._cheb = [_ChebyshevLevel(lv, self.degree, lower, self.estimate)
                          for lv in levels[:-1]]
            # every vector a cycle needs, allocated and touched once here: an
            # application allocates nothing (r, d, q per level; b, x below the finest)
            self._work = [tuple(np.full(c.n, 0.0) for _ in range(3)) for c in self._cheb]
            sizes = [lv.A.shape[0] for lv in levels]
            self._b = [None] + [np.full(m, 0.0) for m in sizes[1:]]
            self._x = [None] + [np.full(m, 0.0) for m in sizes[1:]]
        # The coarsest solve is set up on first use in PyAMG; do it now, in setup.
        self.ml.coarse_solver(self._coarse_A, np.zeros(self._coarse_A.shape[0]))

    def _build(self, C, options):
        """The hierarchy (PyAMG's MultilevelSolver, or one with its few attributes used here)."""
        try:
            return type(self).solver(C, **options)
        except (ValueError, TypeError) as exc:
            raise InputError(f"{self.name}: pyamg rejected the options ({exc})") from None

    # -- applying ---------------------------------------------------------------
    def _apply(self, r):
        out = np.empty_like(r)
        self.apply_into(r, out)
        return out

    def apply_into(self, r, out):
        """``out = M r`` (one cycle from a zero guess); returns ``out``.

        ``r`` is read only: any real vector of length n (copied unless it is a
        writable C-contiguous float64 one); ``out`` must be a writable C-contiguous
        float64 ndarray of shape (n,) sharing no memory with ``r``, else an InputError
        names the argument (``hatkernels.checks.into_vectors``).  With the Chebyshev
        smoother nothing is allocated on any level but the coarsest.
        """
        r, = into_vectors(f"{type(self).__name__}.apply_into", self.shape[0], {"r": r},
                          {"out": out})
        if len(self.ml.levels) == 1:
            out[:] = self.ml.coarse_solver(self._coarse_A, r)
        elif self.smoother == "chebyshev":
            self._cycle_parallel(0, out, r, True)
        else:
            out[:] = 0.0
            self._cycle_pyamg(0, out, r)
        return out

    def full_cycle_into(self, b, x):
        """``x`` = full multigrid for ``A x = b`` (nested iteration): ``b`` restricted to
        every level, the coarsest solved, then on each level up the coarser solution
        interpolated and improved by one cycle from it.  Costs about two cycles; the
        ``"nested"`` start of :func:`hatkernels.solve`.  Returns ``x``; ``b`` read only and
        ``x`` written, checked as ``r`` and ``out`` of :meth:`apply_into`."""
        b, = into_vectors(f"{type(self).__name__}.full_cycle_into", self.shape[0], {"b": b},
                          {"x": x})
        levels = self.ml.levels
        if len(levels) == 1:
            x[:] = self.ml.coarse_solver(self._coarse_A, b)
            return x
        if self.smoother != "chebyshev":
            rhs = [b]
            for lv in levels[:-1]:
                rhs.append(lv.R @ rhs[-1])
            xc = np.asarray(self.ml.coarse_solver(self._coarse_A, rhs[-1]), dtype=np.float64)
            for lvl in range(len(levels) - 2, -1, -1):
                xc = np.asarray(levels[lvl].P @ xc, dtype=np.float64)
                self._cycle_pyamg(lvl, xc, rhs[lvl])
            x[:] = xc
            return x
        # the cycle's own vectors: level l's right-hand side and solution; a cycle on
        # level l writes those of the levels below it only, which are done by then
        rhs = [b] + self._b[1:]
        sol = [x] + self._x[1:]
        for lvl, c in enumerate(self._cheb):
            _k.spmv(*c.R, rhs[lvl], rhs[lvl + 1])
        sol[-1][:] = self.ml.coarse_solver(self._coarse_A, rhs[-1])
        for lvl in range(len(self._cheb) - 1, -1, -1):
            _k.spmv(*self._cheb[lvl].P, sol[lvl + 1], sol[lvl])
            self._cycle_parallel(lvl, sol[lvl], rhs[lvl], False)
        return x

    def _coarse(self, lvl, b):
        """Approximate solution of level ``lvl``'s system from a zero guess (PyAMG smoothers)."""
        if lvl == len(self.ml.levels) - 1:
            return np.asarray(self.ml.coarse_solver(self._coarse_A, b), dtype=np.float64)
        x = np.zeros_like(b)
        self._cycle_pyamg(lvl, x, b)
        if self.cycle == "W":
            self._cycle_pyamg(lvl, x, b)
        return x

    def _cycle_pyamg(self, lvl, x, b):
        level = self.ml.levels[lvl]
        A = level.A
        level.presmoother(A, x, b)
        coarse_b = level.R @ (b - A @ x)
        x += level.P @ self._coarse(lvl + 1, coarse_b)
        level.postsmoother(A, x, b)

    def _cycle_parallel(self, lvl, x, b, zero_guess):
        """One cycle on level ``lvl`` for ``A x = b``, in place; ``x`` is not read with ``zero_guess``."""
        c = self._cheb[lvl]
        r, d, q = self._work[lvl]
        c.smooth(x, b, zero_guess, r, d, q)
        _k.residual(*c.A, x, b, r)
        coarse_b, coarse_x = self._b[lvl + 1], self._x[lvl + 1]
        _k.spmv(*c.R, r, coarse_b)
        if lvl + 1 == len(self._cheb):
            coarse_x[:] = self.ml.coarse_solver(self._coarse_A, coarse_b)
        else:
            self._cycle_parallel(lvl + 1, coarse_x, coarse_b, True)
            if self.cycle == "W":
                self._cycle_parallel(lvl + 1, coarse_x, coarse_b, False)
        _k.spmv_add(*c.P, coarse_x, x)
        c.smooth(x, b, False, r, d, q)

    # -- describing -------------------------------------------------------------
    @property
    def memory_bytes(self):
        total = 0
        for lv in self.ml.levels:
            for attr in ("A", "P", "R"):
                total += _nbytes(getattr(lv, attr, None))
        coarse = self.ml.coarse_solver
        for attr in ("P", "LU", "L", "pinv"):
            held = getattr(coarse, attr, None)
            if isinstance(held, np.ndarray):
                total += held.nbytes
            elif isinstance(held, tuple):
                total += sum(a.nbytes for a in held if isinstance(a, np.ndarray))
        if self.smoother == "chebyshev":
            # 1/diag and three work vectors per level, right-hand side and solution below the finest
            total += sum(4 * c.dinv.nbytes for c in self._cheb)
            total += sum(v.nbytes for v in self._b[1:] + self._x[1:])
        return total

    def _details(self):
        ml = self.ml
        sizes = "/".join(str(lv.A.shape[0]) for lv in ml.levels)
        if self.smoother == "chebyshev":
            bottom = "1/30 of" if self.lower is None else f"{self.lower:.3g} x"
            top = "1.1 x a Lanczos estimate" if self.estimate else "Gershgorin's bound"
            smoothing = (f"Chebyshev degree {self.degree} smoothing on [{bottom} top, top = "
                         f"{top}] (parallel kernels)")
        else:
            smoothing = "symmetric Gauss-Seidel smoothing (pyamg)"
        coarsest = getattr(ml.coarse_solver, "description", None)
        coarsest = "" if coarsest is None else f", coarsest level by {coarsest}"
        return (f"{len(ml.levels)} levels ({sizes}), operator complexity "
                f"{ml.operator_complexity():.2f}, grid complexity {ml.grid_complexity():.2f}, "
                f"{self.cycle}-cycle, {smoothing}{coarsest}")


class SmoothedAggregationAMG(_AMG):
    """Smoothed-aggregation AMG (``pyamg.smoothed_aggregation_solver``) as an SPD preconditioner.

    Parameters
    ----------
    A : sparse matrix, shape (n, n)
        Symmetric positive definite.
    cycle : {"V", "W"}
    smoother : {"gauss-seidel", "chebyshev"}
        See the module docstring.
    degree : int
        Chebyshev steps per smoothing (``smoother="chebyshev"`` only).
    lower : float, optional
        Bottom of the Chebyshev interval as a fraction of its top (default:
        PyAMG's 1/33).
    estimate : bool
        Top of the Chebyshev interval from a Lanczos estimate (capped by
        Gershgorin's bound) rather than Gershgorin's bound alone.
    max_levels, max_coarse, strength, aggregate, smooth, coarse_solver
        Passed to ``pyamg.smoothed_aggregation_solver`` (its defaults apart
        from these).

    Costs: setup a few fine-level matrix products (operator complexity
    ~1.1-1.5 for 2-D meshes); one V-cycle ~ (5 to 6) x operator complexity
    fine-level SpMV equivalents (about 12 bytes and 2 flops per matrix entry each).
    """

    name = "amg-sa"
    #: Peak bytes per point of a whole solve with it, beyond the mesh (measured at
    #: about 1e6 unknowns, docs/performance.md; hatkernels.memory uses it).
    solve_bytes_per_point = 860
    kind = "smoothed-aggregation AMG (pyamg)"
    solver = staticmethod(pyamg.smoothed_aggregation_solver)

    def __init__(self, A, *, cycle="V", smoother="gauss-seidel", degree=3, lower=None,
                 estimate=True, max_levels=10, max_coarse=10, strength="symmetric",
                 aggregate="standard", smooth=("jacobi", {"omega": 4.0 / 3.0}),
                 coarse_solver="pinv"):
        options = {"max_levels": max_levels, "max_coarse": max_coarse, "strength": strength,
                   "aggregate": aggregate, "smooth": smooth, "coarse_solver": coarse_solver}
        super().__init__(A, cycle, smoother, degree, options, lower, estimate)


class RugeStubenAMG(_AMG):
    """Classical (Ruge-Stuben) AMG (``pyamg.ruge_stuben_solver``) as an SPD preconditioner.

    Parameters
    ----------
    A : sparse matrix, shape (n, n)
        Symmetric positive definite.
    cycle : {"V", "W"}
    smoother : {"chebyshev", "gauss-seidel"}
        Default Chebyshev on [top/4, top], top = Gershgorin's bound: on 2-D
        Poisson it needed 5 iterations where symmetric Gauss-Seidel needed 6,
        at half the solve time (parallel kernels) and less setup
        (docs/solvers.md).
    degree : int
        Chebyshev steps per smoothing (``smoother="chebyshev"`` only).
    lower, estimate
        The Chebyshev interval, as for ``amg-sa``.
    max_levels, max_coarse, strength, CF, interpolation, coarse_solver
        Passed to ``pyamg.ruge_stuben_solver``.

    Costs as for ``amg-sa``; classical coarsening usually gives a larger
    operator complexity (~1.5-2.5 in 2-D) and fewer iterations.
    """

    name = "amg-rs"
    #: Peak bytes per point of a whole solve with it, beyond the mesh (measured at
    #: about 1e6 unknowns, docs/performance.md; hatkernels.memory uses it).
    solve_bytes_per_point = 710
    kind = "classical Ruge-Stuben AMG (pyamg)"
    solver = staticmethod(pyamg.ruge_stuben_solver)

    def __init__(self, A, *, cycle="V", smoother="chebyshev", degree=3, lower=0.25,
                 estimate=False, max_levels=30, max_coarse=10,
                 strength=("classical", {"theta": 0.25}), CF=("RS", {"second_pass": False}),
                 interpolation="classical", coarse_solver="pinv"):
        options = {"max_levels": max_levels, "max_coarse": max_coarse, "strength": strength,
                   "CF": CF, "interpolation": interpolation, "coarse_solver": coarse_solver}
        super().__init__(A, cycle, smoother, degree, options, lower, estimate)
