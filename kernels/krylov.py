"""Preconditioned conjugate gradients with scipy's calling convention.

:func:`cg` takes the arguments of :func:`scipy.sparse.linalg.cg` and returns
``(x, info)``; :func:`cg_with_history` runs the same iteration and also returns
the residual history and the iteration count (the solve layer uses it).  The
iteration itself is ``run`` in :mod:`hatkernels._cg`, the one loop that the
distributed CG (:mod:`hatkernels.distributed.cg`) runs too, with its global
reductions injected.

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
refused: the one deliberate difference from scipy's calling convention, see
:func:`cg`).

The preconditioner protocol
---------------------------
One protocol serves the serial and the distributed CG.  A preconditioner is
an object with

``apply_into(r, z)``
    fills ``z = M r``, M symmetric positive definite; ``r`` and ``z`` are
    distinct float64 contiguous arrays of the (local) length ``n``; ``r`` is
    not modified.  CG passes its own vector as ``z`` and computes ``r . z``
    itself (in the distributed CG, reduced over the ranks).
``inverse_diagonal`` (optional)
    a float64 array of shape ``(n,)``: M is that diagonal, and CG applies it
    inside its fused vector update instead of calling ``apply_into`` (as
    ``jacobi`` does).
``is_identity = True`` (optional)
    M is the identity: CG applies nothing (as ``none`` does).
``description`` (or ``describe()``), ``nbytes``
    one line saying what it is and what it costs, and the bytes it holds;
    for the solve layer's report, CG does not read them.

Built-in preconditioners (:mod:`hatkernels.precond`,
:mod:`hatkernels.distributed.precond`) follow it.  :func:`cg` also takes a
plain ``LinearOperator``, a matrix or an array as ``M``: it is wrapped once at
the start of the solve, its ``matvec`` called per application and its result
checked for shape.
"""

import warnings

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import LinearOperator, aslinearoperator

from hatkernels import _cg
from hatkernels._cg import BREAKDOWN_MATRIX, BREAKDOWN_PRECONDITIONER, CGResult
from hatkernels._jit import sparse as _k
from hatkernels.checks import integer_option, real_option
from hatkernels.errors import InputError
from hatkernels.sparse import as_csr, as_vector

__all__ = ["cg", "cg_with_history", "CGResult", "BREAKDOWN_MATRIX", "BREAKDOWN_PRECONDITIONER"]


class _CSRProduct:
    """Products with a checked CSR matrix through the parallel kernels."""

    def __init__(self, C):
        self.arrays = (C.indptr, C.indices, C.data)
        self.n_local = C.shape[0]

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
        self.n_local = op.shape[0]

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
        self.n = self.n_local = n

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


def _check_scalars(rtol, atol, maxiter, n, callback):
    """``(rtol, atol, maxiter)`` checked, ``maxiter`` defaulting to ``10 n`` as scipy's."""
    # inf is scipy's way of asking for no iteration (converged at once); NaN and
    # negative values are refused (scipy iterates on them to NaN)
    rtol = real_option(rtol, "rtol", minimum=0.0, finite=False)
    atol = real_option(atol, "atol", minimum=0.0, finite=False)
    maxiter = integer_option(maxiter, "maxiter", allow_none=True)
    if maxiter is None:
        maxiter = 10 * n
    elif maxiter < 1:
        raise InputError(f"maxiter must be >= 1 (info > 0 reports the iterations done), "
                         f"got {maxiter}")
    if callback is not None and not callable(callback):
        raise InputError(f"callback must be callable or None, got {type(callback).__name__}")
    return rtol, atol, maxiter


def _initial_guess(x0, b, M, n):
    """``x0`` checked; the string ``"Mb"`` (scipy's) is ``M @ b``, ``b`` without M."""
    if isinstance(x0, str):
        if x0 != "Mb":
            raise InputError(f"x0 must be an array, None or the string 'Mb' (M @ b), got {x0!r}")
        if M is None:
            return b.copy()
        z = np.empty(n)
        M.apply_into(b, z)
        if not np.isfinite(z).all():
            raise InputError(f"x0='Mb': M @ b has a non-finite entry at "
                             f"{int(np.argmin(np.isfinite(z)))}")
        return z
    return None if x0 is None else as_vector(x0, n, "x0")


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
    M = _cg.as_preconditioner(M, n)
    x0 = _initial_guess(x0, b, M, n)
    result = _cg.run(product, b, x0, M, _cg.LOCAL, rtol=rtol, atol=atol, maxiter=maxiter,
                     callback=callback, monitor=monitor)
    if result.info < 0 and warn:
        warnings.warn(f"cg: {result.message}", RuntimeWarning, stacklevel=2)
    return result


def cg(A, b, x0=None, *, rtol=1e-5, atol=0.0, maxiter=None, M=None, callback=None):
    """Solve ``A x = b`` by preconditioned conjugate gradients.

    Parameters
    ----------
    A : sparse matrix, ndarray or LinearOperator, shape (n, n)
        Symmetric positive definite.  Sparse matrices use the parallel CSR kernel.
    b : ndarray, shape (n,) or (n, 1)
    x0 : ndarray or ``"Mb"``, optional
        Initial guess (never modified); zeros by default; the string ``"Mb"``
        (scipy's) starts from ``M @ b``.
    rtol, atol : float
        Converged when ``norm(b - A @ x) <= max(rtol * norm(b), atol)``;
        ``>= 0``, inf allowed (converged at once, as in scipy).
    maxiter : int, optional
        At most this many iterations, ``>= 1`` (default ``10 * n``, as scipy).
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

    Notes
    -----
    It takes what :func:`scipy.sparse.linalg.cg` takes for real problems and
    returns the same ``info``, with one deliberate difference: complex ``A``,
    ``b``, ``x0`` or ``M`` are refused (InputError), the kernels being real.
    Values on which scipy gives no meaningful answer are refused too rather
    than iterated on: a negative or NaN ``rtol`` or ``atol`` (scipy's iterates
    turn NaN), a ``maxiter`` below 1 (scipy returns ``info`` 0, "converged",
    for 0 and a negative ``info``, "breakdown", below), another string than
    ``"Mb"`` for ``x0``.  Convergence is checked after every iteration on the
    true residual, so ``info`` is 0 where scipy, which checks before each
    iteration only, may report ``maxiter`` for an iterate that met the
    tolerance in the last one.

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
