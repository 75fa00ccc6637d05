"""The conjugate-gradient loop that the serial and the distributed solve share.

:func:`run` is the whole iteration of :func:`hatkernels.krylov.cg_with_history`
(stopping rule, true-residual restart, breakdowns, ``callback`` and
``monitor``), written once.  What differs between one process and many ranks
is injected:

``product``
    ``matvec_dot(p, q)`` fills ``q = A p`` and returns this process's part of
    ``p . q``; ``residual(x, b, out)`` fills ``out = b - A x``; ``n_local``
    is the length of ``p`` (the owned entries first; on a rank, room for the
    ghosts after them).  Every other vector has the owned length ``n``.
``M``
    None, or an object of the preconditioner protocol of
    :mod:`hatkernels.krylov` (``apply_into(r, z)``, optionally
    ``inverse_diagonal`` and ``is_identity``), already checked by the caller;
    :func:`as_preconditioner` turns what a user may pass into one.
``reductions``
    ``sum(*values)`` turns this process's parts of one or a few dot products
    into the global values (a float for one, a tuple for several), in one
    communication; ``maximum(value)`` gives the global maximum of one float
    (used only when the system must be rescaled, see below).  :data:`LOCAL` is
    the serial one: no communication, the values unchanged.  ``fuse_rz`` true (the MPI reducer) applies the
    preconditioner before the convergence test so that ``r . r`` and
    ``r . z`` share one reduction (one wasted application in the last
    iteration, one reduction saved in every other); false (serial) applies it
    after the test, so that the last iteration applies nothing.

Scale.  The squared norms ``r . r``, ``r . z`` and ``p . A p`` overflow or
underflow when the right-hand side or the operator is far from 1 (a mesh in
units of 1e100 gives a load vector near 1e200, whose square is inf).  So the
first ``b . b``, ``r . r``, ``r . z`` and ``p . A p`` are checked against a
comfortable range, ``[2**-SAFE_EXPONENT, 2**SAFE_EXPONENT]``, wide enough for
the residual to fall by 2**-300 and for sums of 1e12 terms.  When one is
outside, before anything is updated, the solve starts again on ``2**k b``
(and ``2**k x0``, ``2**k atol``): ``k`` brings the largest entry of ``b``
near 1, then centres the three squared norms, measured on normalised
vectors, on 1.  A power of two scales every operation exactly, so the
iteration has the bits it would have in an unbounded exponent range; the
solution, residual norms and tolerance are scaled back by ``2**-k``.
Systems that no single scale fits (the three squared norms spread over more
than ``2**(2 SAFE_EXPONENT)``) and solutions beyond float64's normal range
are refused with an InputError giving the sizes.  Problems inside the range
run exactly as before, without any extra pass.

Every decision depends on reduced values only, so all ranks take the same
branches.  With :data:`LOCAL` the kernels run in the order of the serial CG
of earlier versions, and with one rank the MPI reducer returns the values it
is given, so the iterates have the same bits on both paths.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.linalg import eigvalsh_tridiagonal
from scipy.sparse.linalg import LinearOperator, aslinearoperator

from hatkernels._jit import sparse as _k
from hatkernels.errors import InputError

__all__ = ["run", "CGResult", "LOCAL", "as_preconditioner", "condition_estimate",
           "BREAKDOWN_MATRIX", "BREAKDOWN_PRECONDITIONER", "SAFE_EXPONENT"]

#: ``info`` when ``p . A p <= 0``: the matrix is not positive definite.
BREAKDOWN_MATRIX = -1
#: ``info`` when ``r . z <= 0`` with ``r != 0``: the preconditioner is not positive definite.
BREAKDOWN_PRECONDITIONER = -2

#: Squared norms between ``2**-SAFE_EXPONENT`` and ``2**SAFE_EXPONENT`` at the start
#: leave room for a residual reduction of 2**-300 (squares 2**-600) above float64's
#: normal range (2**-1022) and for sums of 2**40 terms below its top (2**1024).
SAFE_EXPONENT = 600
_LOW = 2.0 ** -SAFE_EXPONENT
_HIGH = 2.0 ** SAFE_EXPONENT


class _LocalReductions:
    """Reductions of a solve on one process: the local sums are the global ones."""

    fuse_rz = False

    def sum(self, *values):
        return values[0] if len(values) == 1 else values

    def maximum(self, value):
        return value


#: The serial reductions (no communication).
LOCAL = _LocalReductions()


def condition_estimate(alphas, betas):
    """Estimate of the condition number of ``M A`` from the CG coefficients.

    CG's ``alpha`` and ``beta`` give the Lanczos tridiagonal matrix of the
    preconditioned operator; its extreme eigenvalues approach those of ``M A``
    from inside (G. H. Golub and C. F. Van Loan, Matrix Computations, 3rd ed.
    1996, section 10.2.6), so the ratio is a lower bound that tightens as
    the iteration proceeds.  NaN when there is nothing to estimate from.
    """
    k = min(len(alphas), len(betas) + 1)
    if k == 0:
        return float("nan")
    a = np.asarray(alphas[:k], dtype=np.float64)
    b = np.asarray(betas[: k - 1], dtype=np.float64)
    diag = 1.0 / a
    diag[1:] += b / a[:-1]
    off = np.sqrt(b) / a[:-1]
    ev = eigvalsh_tridiagonal(diag, off)
    return float(ev[-1] / ev[0]) if ev[0] > 0 else float("inf")


@dataclass
class CGResult:
    """Outcome of :func:`hatkernels.krylov.cg_with_history` and of the distributed CG.

    Attributes
    ----------
    x : ndarray, shape (n,)
        Last iterate (in the distributed CG, this rank's owned entries).
    info : int
        0 converged, >0 iterations without converging, <0 breakdown (see
        :mod:`hatkernels.krylov`).
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
    coefficients : tuple of two ndarrays, or None
        CG's ``alpha`` of every iteration and ``beta`` of every direction
        update, the data of the Lanczos tridiagonal matrix; None after a
        restart (the recurrence behind it was broken).
    """

    x: np.ndarray
    info: int
    iterations: int
    residuals: np.ndarray
    tolerance: float
    message: str
    restarts: int = 0
    coefficients: tuple | None = None

    @property
    def converged(self):
        return self.info == 0

    @property
    def condition_estimate(self):
        """Lower bound on the condition number of ``M A`` (:func:`condition_estimate`).

        NaN after a restart or without iterations.  Computed when asked for.
        """
        if self.coefficients is None:
            return float("nan")
        return condition_estimate(*self.coefficients)


class _Diagonal:
    """A preconditioner given by its inverse diagonal (applied inside CG's vector update)."""

    def __init__(self, dinv):
        self.inverse_diagonal = dinv

    def apply_into(self, r, z):
        _k.jacobi_apply(self.inverse_diagonal, r, z)


class _ApplyOnly:
    """A preconditioner's ``apply_into`` without its other attributes."""

    def __init__(self, apply_into):
        self.apply_into = apply_into


class _MatvecPreconditioner:
    """A LinearOperator's ``matvec`` as ``apply_into``; the result is checked for shape."""

    def __init__(self, op, n):
        self.op = op
        self.n = n

    def apply_into(self, r, z):
        y = np.asarray(self.op.matvec(r))
        if y.shape not in ((self.n,), (self.n, 1)):
            raise InputError(f"M.matvec returned shape {y.shape}, expected ({self.n},)")
        z[:] = y.reshape(self.n)


def as_preconditioner(M, n):
    """``M`` as an object of the preconditioner protocol, or None for the identity.

    Objects of the protocol (:mod:`hatkernels.krylov`) are used as they are
    (a valid ``inverse_diagonal`` first); anything else that scipy can turn
    into a LinearOperator of shape ``(n, n)`` is wrapped so that its
    ``matvec`` serves as ``apply_into``.
    """
    if M is None or getattr(M, "is_identity", False) is True:
        return None
    dinv = getattr(M, "inverse_diagonal", None)
    if isinstance(dinv, np.ndarray) and dinv.shape == (n,) and dinv.dtype == np.float64:
        return _Diagonal(np.ascontiguousarray(dinv))
    if callable(getattr(M, "apply_into", None)):
        shape = getattr(M, "shape", None)
        if shape is not None and tuple(shape) != (n, n):
            raise InputError(f"M has shape {shape}, expected ({n}, {n}) to match A")
        # an inverse diagonal of another length or dtype must not reach the fused kernel
        return M if dinv is None else _ApplyOnly(M.apply_into)
    if not isinstance(M, LinearOperator):
        try:
            M = aslinearoperator(M)
        except TypeError as exc:
            raise InputError(f"M must be None, a matrix, a LinearOperator or a preconditioner "
                             f"with apply_into ({exc})") from None
    if M.shape != (n, n):
        raise InputError(f"M has shape {M.shape}, expected ({n}, {n}) to match A")
    return _MatvecPreconditioner(M, n)


def _breakdown_preconditioner(rz, iteration):
    return BREAKDOWN_PRECONDITIONER, (
        f"breakdown after iteration {iteration}: r.z = {rz:.3e} <= 0 (or not finite) with "
        f"r != 0, so the preconditioner M is not positive definite "
        f"(info = {BREAKDOWN_PRECONDITIONER})")


def _comfortable(value):
    return _LOW <= value <= _HIGH


def _exponent(value):
    """``e`` with ``value = m 2**e``, ``0.5 <= |m| < 1`` (value finite, nonzero)."""
    return math.frexp(value)[1]


def _max_abs(v, reductions):
    """Global ``max |v|`` (0 for no entries)."""
    return reductions.maximum(float(np.max(np.abs(v))) if v.shape[0] else 0.0)


def _ldexp(value, k):
    """``value * 2**k`` as a float, inf where it overflows."""
    try:
        return math.ldexp(value, k)
    except OverflowError:
        return math.copysign(math.inf, value)


def _scaled(v, k):
    with np.errstate(over="ignore", under="ignore"):
        return np.ldexp(v, k)


def _centring_shift(product, b, x0, M, reductions, k):
    """Extra power of two ``j`` so that ``r.r``, ``r.z`` and ``p.Ap`` of the system scaled
    by ``2**(k + j)`` are near 1; measured on normalised vectors, so nothing overflows.

    Returns 0 when nothing can be measured (the scaled run then reports what it finds).
    """
    n = b.shape[0]
    r = np.empty(n)
    bs = _scaled(b, k)
    if x0 is None:
        r[:] = bs
    else:
        product.residual(_scaled(x0, k), bs, r)
    rmax = _max_abs(r, reductions)
    if not math.isfinite(rmax):
        raise InputError("the initial residual b - A x0 overflows float64: x0 is too large "
                         "for this operator")
    if rmax == 0.0:
        return 0
    er = _exponent(rmax)
    rn = _scaled(r, -er)
    w = np.empty(n)
    if M is None or getattr(M, "is_identity", False) is True:
        w[:] = rn
    elif getattr(M, "inverse_diagonal", None) is not None:
        _k.jacobi_apply(M.inverse_diagonal, rn, w)
    else:
        M.apply_into(rn, w)
    wmax = _max_abs(w, reductions)
    if math.isfinite(wmax) and wmax > 0.0:
        ew = _exponent(wmax)
        w = _scaled(w, -ew)
        p = np.zeros(product.n_local)
        p[:n] = w
        q = np.empty(n)
        values = reductions.sum(_k.dot(rn, rn), _k.dot(rn, w), product.matvec_dot(p, q))
        offsets = (2 * er, 2 * er + ew, 2 * er + 2 * ew)  # r.r, r.z, p.Ap with p = z
        logs = [math.log2(v) + o for v, o in zip(values, offsets, strict=True)
                if v > 0.0 and math.isfinite(v)]
    else:
        logs = [math.log2(reductions.sum(_k.dot(rn, rn))) + 2 * er]
    if not logs:
        return 0
    low, high = min(logs), max(logs)
    if high - low > 2 * SAFE_EXPONENT:
        raise InputError(
            f"cannot solve this system in float64: r.r, r.z and p.Ap span 2**{low:.0f} to "
            f"2**{high:.0f} (about 1e{low * math.log10(2):.0f} to 1e{high * math.log10(2):.0f}), "
            f"more than one scale can bring into range; the operator or the preconditioner "
            f"has entries too large or too small (rescale the problem's units)")
    return -math.floor((low + high) / 4)


def run(product, b, x0, M, reductions, *, rtol, atol, maxiter, callback=None, monitor=None):
    """Preconditioned CG on checked input; returns a :class:`CGResult`.

    ``b`` and ``x0`` (or None) are float64 contiguous arrays of the owned
    length ``n``; ``x0`` is copied, never modified.  ``rtol``, ``atol`` and
    ``maxiter`` are checked numbers (``rtol`` and ``atol`` may be inf).  It
    does not warn: the caller reports a breakdown (``info < 0``) from the
    message.  Raises InputError for a system outside float64's range (see the
    module's notes on scale).  Collective when ``reductions`` communicate.
    """
    options = dict(rtol=rtol, maxiter=maxiter, callback=callback, monitor=monitor)
    bb = reductions.sum(_k.dot(b, b))
    if _comfortable(bb):
        result = _iterate(product, b, x0, M, reductions, bb, atol=atol, **options)
        if result is not None:
            return result
    bmax = _max_abs(b, reductions)
    if bmax == 0.0:
        # scipy's convention: the zero right-hand side has the zero solution.
        return CGResult(np.zeros(b.shape[0]), 0, 0, np.zeros(1), atol, "zero right-hand side")
    k = -_exponent(bmax)  # the largest entry of 2**k b is in [0.5, 1)
    k += _centring_shift(product, b, x0, M, reductions, k)
    bs = _scaled(b, k)
    xs = None if x0 is None else _scaled(x0, k)
    if xs is not None and not np.isfinite(xs).all():
        raise InputError(f"x0 times 2**{k} (the scale that brings b into range) overflows: "
                         f"x0 is too large for this right-hand side")
    if callback is not None:
        options["callback"] = lambda x: callback(_scaled(x, -k))
    if monitor is not None:
        options["monitor"] = lambda it, rnorm: monitor(it, _ldexp(rnorm, -k))
    result = _iterate(product, bs, xs, M, reductions, reductions.sum(_k.dot(bs, bs)),
                      atol=_ldexp(atol, k), check_scale=False, **options)
    xmax = _max_abs(result.x, reductions)
    if xmax > 0.0:
        e = _exponent(xmax) - k  # exponent of the largest entry of the solution
        if e > 1024 or e < -1021:
            where = "beyond float64's largest" if e > 0 else "below float64's smallest normal"
            raise InputError(
                f"the solution's largest entry, about 2**{e} (1e{e * math.log10(2):.0f}), is "
                f"{where} number; rescale the problem's units")
    result.x = _scaled(result.x, -k)
    result.residuals = _scaled(result.residuals, -k)
    result.tolerance = _ldexp(result.tolerance, -k)
    if k:
        result.message += f" (solved scaled by 2**{k} to keep its norms in float64's range)"
    return result


def _iterate(product, b, x0, M, reductions, bb, *, rtol, atol, maxiter, callback, monitor,
             check_scale=True):
    """The CG iteration of :func:`run` with ``bb = b . b`` given (nonzero).

    With ``check_scale``, returns None, before updating anything, when the first
    ``r . r``, ``r . z`` or ``p . A p`` is outside the comfortable range (or over-
    or underflows): :func:`run` then rescales the system.
    """
    n = b.shape[0]
    total = reductions.sum  # the global sum of local parts (one communication per call)
    bnorm = math.sqrt(bb)
    tol = max(atol, rtol * bnorm)

    if x0 is None:
        x = np.zeros(n)
        r = b.copy()
    else:
        x = x0.copy()
        r = np.empty(n)
        product.residual(x, b, r)

    # Two shortcuts spare the call of M per iteration: the identity is not applied at
    # all, and a diagonal is applied inside the fused vector update.
    identity = M is None or getattr(M, "is_identity", False) is True
    dinv = None if identity else getattr(M, "inverse_diagonal", None)
    fuse = reductions.fuse_rz and not identity
    z = r if identity else np.empty(n)

    def precondition():
        """``z = M r``; return this process's part of ``r . z``."""
        if dinv is not None:
            _k.jacobi_apply(dinv, r, z)
        else:
            M.apply_into(r, z)
        return _k.dot(r, z)

    def out_of_range(value):
        # a negative or NaN value is a breakdown, reported as such below
        return check_scale and (value == 0.0 or value > 0.0) and not _comfortable(value)

    if fuse:
        rr, rz = total(_k.dot(r, r), precondition())
    else:
        rr = total(_k.dot(r, r))
    history = [math.sqrt(rr)]
    if history[0] <= tol:
        return CGResult(x, 0, 0, np.array(history), tol, "initial guess meets the tolerance")
    if identity:
        rz = rr
    elif not fuse:
        rz = total(precondition())
    if out_of_range(rr) or out_of_range(rz):
        return None

    iteration = 0
    restarts = 0
    info = maxiter
    message = f"not converged after {maxiter} iterations"
    alphas, betas = [], []
    lanczos = True
    if not (rz > 0.0 and math.isfinite(rz)):
        info, message = _breakdown_preconditioner(rz, 0)
    else:
        p = np.zeros(product.n_local)  # on a rank, room for the ghosts after the owned entries
        po = p if p.shape[0] == n else p[:n]
        po[:] = z
        q = np.empty(n)
        while iteration < maxiter:
            pq = total(product.matvec_dot(p, q))
            if iteration == 0 and out_of_range(pq):
                return None
            if not (pq > 0.0 and math.isfinite(pq)):
                info = BREAKDOWN_MATRIX
                message = (f"breakdown in iteration {iteration + 1}: p.Ap = {pq:.3e} <= 0 "
                           f"(or not finite), so A is not positive definite "
                           f"(info = {BREAKDOWN_MATRIX})")
                break
            alpha = rz / pq
            alphas.append(alpha)
            if dinv is not None:
                rr, rz_new = total(*_k.cg_step_jacobi(alpha, po, q, dinv, x, r, z))
            elif fuse:
                rr_local = _k.cg_step(alpha, po, q, x, r)
                rr, rz_new = total(rr_local, precondition())
            else:
                rr = total(_k.cg_step(alpha, po, q, x, r))
            iteration += 1
            if callback is not None:
                callback(x)
            rnorm = math.sqrt(rr)
            restart = False
            if rnorm <= tol:
                product.residual(x, b, r)
                rr = total(_k.dot(r, r))
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
            if identity:
                rz_new = rr
            elif restart or (dinv is None and not fuse):
                rz_new = total(precondition())
            if not (rz_new > 0.0 and math.isfinite(rz_new)):
                info, message = _breakdown_preconditioner(rz_new, iteration)
                break
            if restart:
                po[:] = z
                lanczos = False
            else:
                beta = rz_new / rz
                betas.append(beta)
                _k.xpby(z, beta, po)
            rz = rz_new

    if restarts and info != 0:
        message += (f" (the recursive residual met the tolerance {restarts} times but the "
                    f"true residual did not)")
    coefficients = (np.array(alphas), np.array(betas)) if lanczos else None
    return CGResult(x, info, iteration, np.array(history), tol, message, restarts, coefficients)
