"""Preconditioned conjugate gradients with scipy's calling convention.

:func:`cg` takes the arguments of :func:`scipy.sparse.linalg.cg` and returns
``(x, info)``; :func:`cg_with_history` runs the same iteration and also returns
the residual history and the iteration count (the solve layer uses it).

Stopping rule (scipy's): converged when ``norm(b - A @ x) <= max(rtol *
norm(b), atol)``, on the unpreconditioned residual.  The iteration tracks the
residual by the usual recurrence; when the recurrence says converged, the true
residual ``b - A @ x`` is computed once (one more product with A).  If it
meets the tolerance the solve stops; if not (round-off has made the recurrence
drift), the iteration continues from the true residual with a fresh search
direction (a restart), and the history records the true norm.

``info`` codes:

====  ==================================================================
 0    converged
 k>0  not converged after ``k = maxiter`` iterations
 -1   breakdown: ``p . A p <= 0`` (or not finite), A is not positive definite
 -2   breakdown: ``r . z <= 0`` with ``r != 0`` (or not finite), the
      preconditioner M is not positive definite
====  ==================================================================

A breakdown returns the last iterate and warns (:class:`RuntimeWarning`)
saying which operator failed and at which iteration.

When ``A`` is a scipy sparse matrix the products use the project's parallel
CSR kernel (other sparse formats are converted to CSR once; the input is not
modified); the vector updates are fused kernels whose dot products reduce
over fixed chunks, so a solve gives the same bits on 1 and 2 threads.  All
arithmetic is float64 (float32 and integer inputs are converted, complex ones
refused).  Two preconditioner shortcuts avoid a call of ``M.matvec`` per
iteration: an ``M`` with ``is_identity = True`` (the ``none`` preconditioner)
is treated as ``M=None``, and one that exposes ``inverse_diagonal`` (a float64
array of shape ``(n,)``, as ``jacobi`` does) is applied as that diagonal inside
the fused vector update.  An ``M`` with a method ``apply_into(r, out)`` (as
``gmg`` has) is called with CG's own vector as ``out``, saving a vector per
application.
"""

import math
import warnings
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import LinearOperator, aslinearoperator

from hatkernels._jit import sparse as _k
from hatkernels.errors import InputError
from hatkernels.sparse import as_csr, as_vector

__all__ = ["cg", "cg_with_history", "CGResult", "BREAKDOWN_MATRIX", "BREAKDOWN_PRECONDITIONER"]

#: ``info`` when ``p . A p <= 0``: the matrix is not positive definite.
BREAKDOWN_MATRIX = -1
#: ``info`` when ``r . z <= 0`` with ``r != 0``: the preconditioner is not positive definite.
BREAKDOWN_PRECONDITIONER = -2


@dataclass
class CGResult:
    """Outcome of :func:`cg_with_history`.

    Attributes
    ----------
    x : ndarray, shape (n,)
        Last iterate.
    info : int
        0 converged, >0 iterations without converging, <0 breakdown (see module docs).
    iterations : int
        Iterations done (products with A inside the loop).
    residuals : ndarray, shape (iterations + 1,)
        ``norm(b - A x_k)``, initial one first: the recursive value, or the
        true one where it was computed (at a convergence check).
    tolerance : float
        ``max(rtol * norm(b), atol)``.
    message : str
        What happened, in words.
    restarts : int
        Times the recursive residual met the tolerance but the true one did
        not, so the iteration went on from the true residual.
    """

    x: np.ndarray
    info: int
    iterations: int
    residuals: np.ndarray
    tolerance: float
    message: str
    restarts: int = 0

    @property
    def converged(self):
        return self.info == 0


class _CSRProduct:
    """Products with a checked CSR matrix through the parallel kernels."""

    def __init__(self, C):
        self.arrays = (C.indptr, C.indices, C.data)

    def matvec_dot(self, p, q):
        return _k.spmv_dot(*self.arrays, p, q)

    def residual(self, x, b, out):
        _k.residual(*self.arrays, x, b, out)


class _InPlaceProduct:
    """Products with an operator that writes into a given array (``matvec_into(x, out)``).

    The matrix-free :class:`hatkernels.StiffnessOperator` does; CG then
    allocates nothing per iteration.
    """

    def __init__(self, op):
        self.op = op

    def matvec_dot(self, p, q):
        self.op.matvec_into(p, q)
        return _k.dot(p, q)

    def residual(self, x, b, out):
        self.op.matvec_into(x, out)
        _k.xpby(b, -1.0, out)


class _OperatorProduct:
    """Products with any LinearOperator; the result is checked for shape."""

    def __init__(self, op, n):
        self.op = op
        self.n = n

    def _apply(self, v):
        y = np.asarray(self.op.matvec(v))
        if y.shape not in ((self.n,), (self.n, 1)):
            raise InputError(f"A.matvec returned shape {y.shape}, expected ({self.n},)")
        return y.reshape(self.n)

    def matvec_dot(self, p, q):
        q[:] = self._apply(p)
        return _k.dot(p, q)

    def residual(self, x, b, out):
        out[:] = b - self._apply(x)


def _operator(A):
    if isinstance(A, np.ndarray) and A.ndim == 2:
        A = sp.csr_array(A)
    if sp.issparse(A):
        C = as_csr(A, "A")
        return _CSRProduct(C), C.shape[0]
    if not isinstance(A, LinearOperator):
        try:
            A = aslinearoperator(A)
        except TypeError as exc:
            raise InputError(f"A must be a sparse matrix, an array or a LinearOperator ({exc})") \
                from None
    if len(A.shape) != 2 or A.shape[0] != A.shape[1] or A.shape[0] == 0:
        raise InputError(f"A must be square and non-empty, got shape {A.shape}")
    if A.dtype is not None and np.issubdtype(A.dtype, np.complexfloating):
        raise InputError(f"A is complex ({A.dtype}); only real operators are supported")
    if callable(getattr(A, "matvec_into", None)):
        return _InPlaceProduct(A), A.shape[0]
    return _OperatorProduct(A, A.shape[0]), A.shape[0]


class _Preconditioner:
    """z = M r for None (identity), a diagonal, or any LinearOperator."""

    def __init__(self, M, n):
        self.identity = M is None or getattr(M, "is_identity", False) is True
        self.dinv = None
        self.op = None
        self.into = None
        if self.identity:
            return
        dinv = getattr(M, "inverse_diagonal", None)
        if isinstance(dinv, np.ndarray) and dinv.shape == (n,) and dinv.dtype == np.float64:
            self.dinv = np.ascontiguousarray(dinv)
            return
        if not isinstance(M, LinearOperator):
            try:
                M = aslinearoperator(M)
            except TypeError as exc:
                raise InputError(f"M must be None, a matrix or a LinearOperator ({exc})") \
                    from None
        if M.shape != (n, n):
            raise InputError(f"M has shape {M.shape}, expected ({n}, {n}) to match A")
        self.op = M
        self.n = n
        # a preconditioner that writes into a given array (gmg) saves a vector per apply
        into = getattr(M, "apply_into", None)
        self.into = into if callable(into) else None

    def apply(self, r, z):
        """Fill ``z`` with ``M r``; return ``r . z``."""
        if self.dinv is not None:
            _k.jacobi_apply(self.dinv, r, z)
        elif self.into is not None:
            self.into(r, z)
        else:
            y = np.asarray(self.op.matvec(r))
            if y.shape not in ((self.n,), (self.n, 1)):
                raise InputError(f"M.matvec returned shape {y.shape}, expected ({self.n},)")
            z[:] = y.reshape(self.n)
        return _k.dot(r, z)


def _check_scalars(rtol, atol, maxiter, n, callback):
    for name, value in (("rtol", rtol), ("atol", atol)):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            raise InputError(f"{name} must be a real number, got {value!r}")
        if not (math.isfinite(value) and value >= 0):
            raise InputError(f"{name} must be finite and >= 0, got {value!r}")
    if maxiter is None:
        maxiter = 10 * n
    elif isinstance(maxiter, bool) or not isinstance(maxiter, (int, np.integer)):
        raise InputError(f"maxiter must be a positive integer or None, got {maxiter!r}")
    elif maxiter < 1:
        raise InputError(f"maxiter must be >= 1 (info > 0 reports the iterations done), "
                         f"got {maxiter}")
    if callback is not None and not callable(callback):
        raise InputError(f"callback must be callable or None, got {type(callback).__name__}")
    return float(rtol), float(atol), int(maxiter)


def cg_with_history(A, b, x0=None, *, rtol=1e-5, atol=0.0, maxiter=None, M=None,
                    callback=None, warn=True, monitor=None):
    """Preconditioned CG; like :func:`cg` but returns a :class:`CGResult`.

    ``warn=False`` suppresses the breakdown warning (the caller reports it,
    ``result.message`` holds the text).  ``monitor(iteration, residual_norm)``,
    if given, is called after every iteration (for progress reports).  Other
    arguments as in :func:`cg`.
    """
    product, n = _operator(A)
    b = as_vector(b, n, "b")
    rtol, atol, maxiter = _check_scalars(rtol, atol, maxiter, n, callback)
    precond = _Preconditioner(M, n)

    bnorm = math.sqrt(_k.dot(b, b))
    if bnorm == 0.0:
        # scipy's convention: the zero right-hand side has the zero solution.
        if x0 is not None:
            as_vector(x0, n, "x0")
        return CGResult(np.zeros(n), 0, 0, np.zeros(1), atol, "zero right-hand side")
    tol = max(atol, rtol * bnorm)

    if x0 is None:
        x = np.zeros(n)
        r = b.copy()
    else:
        x = as_vector(x0, n, "x0").copy()
        r = np.empty(n)
        product.residual(x, b, r)
    rr = _k.dot(r, r)
    history = [math.sqrt(rr)]
    if history[0] <= tol:
        return CGResult(x, 0, 0, np.array(history), tol, "initial guess meets the tolerance")

    z = r if precond.identity else np.empty(n)
    rz = rr if precond.identity else precond.apply(r, z)
    q = np.empty(n)
    iteration = 0
    restarts = 0
    info = maxiter
    message = f"not converged after {maxiter} iterations"
    if not (rz > 0.0 and math.isfinite(rz)):
        info, message = _breakdown_preconditioner(rz, 0)
    else:
        p = z.copy()
        while iteration < maxiter:
            pq = product.matvec_dot(p, q)
            if not (pq > 0.0 and math.isfinite(pq)):
                info = BREAKDOWN_MATRIX
                message = (f"breakdown in iteration {iteration + 1}: p.Ap = {pq:.3e} <= 0 "
                           f"(or not finite), so A is not positive definite "
                           f"(info = {BREAKDOWN_MATRIX})")
                break
            alpha = rz / pq
            if precond.dinv is not None:
                rr, rz_new = _k.cg_step_jacobi(alpha, p, q, precond.dinv, x, r, z)
            else:
                rr = _k.cg_step(alpha, p, q, x, r)
            iteration += 1
            if callback is not None:
                callback(x)
            rnorm = math.sqrt(rr)
            restart = False
            if rnorm <= tol:
                product.residual(x, b, r)
                rr = _k.dot(r, r)
                rnorm = math.sqrt(rr)
                if rnorm <= tol:
                    history.append(rnorm)
                    if monitor is not None:
                        monitor(iteration, rnorm)
                    info, message = 0, f"converged in {iteration} iterations"
                    break
                restart = True
                restarts += 1
            history.append(rnorm)
            if monitor is not None:
                monitor(iteration, rnorm)
            if iteration == maxiter:
                break
            if precond.identity:
                rz_new = rr
            elif restart or precond.dinv is None:
                rz_new = precond.apply(r, z)
            if not (rz_new > 0.0 and math.isfinite(rz_new)):
                info, message = _breakdown_preconditioner(rz_new, iteration)
                break
            if restart:
                p[:] = z
            else:
                _k.xpby(z, rz_new / rz, p)
            rz = rz_new

    if restarts and info != 0:
        message += (f" (the recursive residual met the tolerance {restarts} times but the "
                    f"true residual did not)")
    if info < 0 and warn:
        warnings.warn(f"cg: {message}", RuntimeWarning, stacklevel=2)
    return CGResult(x, info, iteration, np.array(history), tol, message, restarts)


def _breakdown_preconditioner(rz, iteration):
    return BREAKDOWN_PRECONDITIONER, (
        f"breakdown after iteration {iteration}: r.z = {rz:.3e} <= 0 (or not finite) with "
        f"r != 0, so the preconditioner M is not positive definite "
        f"(info = {BREAKDOWN_PRECONDITIONER})")


def cg(A, b, x0=None, *, rtol=1e-5, atol=0.0, maxiter=None, M=None, callback=None):
    """Solve ``A x = b`` by preconditioned conjugate gradients.

    Parameters
    ----------
    A : sparse matrix, ndarray or LinearOperator, shape (n, n)
        Symmetric positive definite.  Sparse matrices use the parallel CSR kernel.
    b : ndarray, shape (n,) or (n, 1)
    x0 : ndarray, optional
        Initial guess (never modified); zeros by default.
    rtol, atol : float
        Converged when ``norm(b - A @ x) <= max(rtol * norm(b), atol)``.
    maxiter : int, optional
        At most this many iterations (default ``10 * n``, as scipy).
    M : LinearOperator, matrix or None
        Symmetric positive definite preconditioner approximating ``A^{-1}``.
    callback : callable, optional
        Called as ``callback(xk)`` once per iteration with the current iterate
        (the live array, as scipy does: copy it to keep it).

    Returns
    -------
    x : ndarray, shape (n,)
    info : int
        0 converged; >0 the iterations done without converging; -1 A not
        positive definite; -2 M not positive definite (with a warning).

    Examples
    --------
    >>> import numpy as np
    >>> from pyamg.gallery import poisson
    >>> from hatkernels.krylov import cg
    >>> A = poisson((10,), format="csr")
    >>> x, info = cg(A, np.ones(10), rtol=1e-10)
    >>> info, bool(np.linalg.norm(A @ x - 1.0) <= 1e-10 * np.sqrt(10))
    (0, True)
    """
    result = cg_with_history(A, b, x0, rtol=rtol, atol=atol, maxiter=maxiter, M=M,
                             callback=callback, warn=False)
    if result.info < 0:
        warnings.warn(f"cg: {result.message}", RuntimeWarning, stacklevel=2)
    return result.x, result.info
