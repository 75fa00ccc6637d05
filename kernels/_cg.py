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
    communication; ``maximum(value)`` the global maximum of one float (only
    when the system must be rescaled, see Scale).  :data:`LOCAL` is the serial
    one: no communication, the values unchanged.  ``fuse_rz`` true (the MPI
    reducer) applies the preconditioner before the convergence test so that
    ``r . r`` and ``r . z`` share one reduction (one wasted application in the
    last iteration, one reduction saved in every other); false (serial)
    applies it after the test, so that the last iteration applies nothing.

Scale.  ``r . r``, ``r . z`` and ``p . A p`` overflow or underflow when b or
the operators are far from 1 (a mesh in units of 1e100 gives a load near
1e200, whose square is inf).  So when the first ``b . b``, ``r . r``, ``r . z``
or ``p . A p`` leaves ``[2**-SAFE_EXPONENT, 2**SAFE_EXPONENT]`` (room for a
residual reduction of 2**-300 and sums of 1e12 terms), before anything is
updated, the solve starts again as ``2**j A x' = 2**k b`` with ``2**m M``:
``k`` brings ``b - A x0`` near 1, ``j`` and ``m`` the Rayleigh quotients of A
and M, measured on normalised vectors.  Powers of two scale every operation
exactly, so the iterates have the bits they would have with an unbounded
exponent; ``x = 2**(j - k) x'``.  A solution beyond float64's normal range is
refused (InputError).  Problems inside the range run as before, bit for bit.

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

from hatkernels._cgparts import Workspace, as_preconditioner
from hatkernels._cgstop import (
    BREAKDOWN_MATRIX,
    BREAKDOWN_PRECONDITIONER,
    Stagnation,
    breakdown_matrix,
    breakdown_preconditioner,
)
from hatkernels._jit import sparse as _k
from hatkernels.errors import InputError

__all__ = ["run", "CGResult", "LOCAL", "Workspace", "as_preconditioner", "condition_estimate",
           "BREAKDOWN_MATRIX", "BREAKDOWN_PRECONDITIONER", "SAFE_EXPONENT"]

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
    residual : ndarray or None
        ``b - A x`` as last computed from ``x`` (the true residual) when the
        solve converged, else None.  With a workspace (``hatkernels._cgparts``),
        ``x`` and this are its vectors: copy what is kept before the next solve.
    """

    x: np.ndarray
    info: int
    iterations: int
    residuals: np.ndarray
    tolerance: float
    message: str
    restarts: int = 0
    coefficients: tuple | None = None
    residual: np.ndarray | None = None

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


def _exponent(value):
    return math.frexp(value)[1]  # value = f 2**e with 0.5 <= |f| < 1


def _max_abs(v, reductions):
    """Global ``max |v|`` (0 for no entries)."""
    return reductions.maximum(float(np.max(np.abs(v))) if v.shape[0] else 0.0)


def _scaled(v, k):
    """``v * 2**k`` exactly (inf where it overflows); a float for a float."""
    with np.errstate(over="ignore", under="ignore"):
        return np.ldexp(v, k) if isinstance(v, np.ndarray) else float(np.ldexp(v, k))


class _ScaledProduct:
    """Products with ``2**j A``: exact, so the iteration keeps A's bits at another scale."""

    def __init__(self, product, j):
        self.product, self.j, self.n_local = product, j, product.n_local

    def matvec_dot(self, p, q):
        d = self.product.matvec_dot(p, q)
        np.ldexp(q, self.j, out=q)
        return _scaled(d, self.j)

    def residual(self, x, b, out):
        self.product.residual(x, _scaled(b, -self.j), out)
        np.ldexp(out, self.j, out=out)


class _ScaledPreconditioner:
    """``2**m M`` (its inverse diagonal scaled once, or each application scaled)."""

    def __init__(self, M, m):
        self.M, self.m = M, m
        dinv = getattr(M, "inverse_diagonal", None)
        if dinv is not None:
            self.inverse_diagonal = _scaled(dinv, m)

    def apply_into(self, r, z):
        self.M.apply_into(r, z)
        np.ldexp(z, self.m, out=z)


def _scales(product, b, bmax, x0, M, reductions):
    """Powers of two ``(k, j, m)`` for b, A and M that bring the largest entry of
    ``2**k (b - A x0)`` near 1 and the Rayleigh quotients of ``2**j A`` and ``2**m M``
    near 1 (measured on normalised vectors, so nothing overflows); 0 for a scale that
    cannot be measured or is near 1 already."""
    n = b.shape[0]
    k = -_exponent(bmax)
    r = _scaled(b, k)
    if x0 is not None:
        product.residual(_scaled(x0, k), r.copy(), r)
    rmax = _max_abs(r, reductions)
    if not math.isfinite(rmax):
        raise InputError("the initial residual b - A x0 overflows float64: x0 is too large "
                         "for this operator")
    if rmax == 0.0:
        return k, 0, 0
    er = _exponent(rmax)
    k -= max(min(er, 500), -500)  # r near 1, b at most 2**500
    rn = _scaled(r, -er)
    w = rn.copy()
    if M is not None and getattr(M, "is_identity", False) is not True:
        M.apply_into(rn, w)
    wmax = _max_abs(w, reductions)
    if not (math.isfinite(wmax) and wmax > 0.0):
        return k, 0, 0
    ew = _exponent(wmax)
    w = _scaled(w, -ew)
    p = np.zeros(product.n_local)
    p[:n] = w
    rr, rw, ww, wAw = reductions.sum(_k.dot(rn, rn), _k.dot(rn, w), _k.dot(w, w),
                                     product.matvec_dot(p, np.empty(n)))

    def power(ratio, offset):
        if not (ratio > 0.0 and math.isfinite(ratio)):
            return 0
        e = -round(math.log2(ratio) + offset)
        return e if abs(e) > 64 else 0

    return k, power(wAw / ww, 0), power(rw / rr, ew)


def run(product, b, x0, M, reductions, *, rtol, atol, maxiter, callback=None, monitor=None,
        work=None):
    """Preconditioned CG on checked input; returns a :class:`CGResult`.

    ``b`` and ``x0`` (or None) are float64 contiguous arrays of the owned
    length ``n``; ``x0`` is copied, never modified.  ``rtol``, ``atol`` and
    ``maxiter`` checked numbers (``rtol``, ``atol`` may be inf).  ``work`` (a
    :class:`~hatkernels._cgparts.Workspace`, optional) lends the solve its vectors, kept for the next.  It does not
    warn: the caller reports a breakdown (``info < 0``) from the message.
    InputError for a solution beyond float64 (see Scale).  Collective when
    ``reductions`` communicate.
    """
    options = dict(rtol=rtol, maxiter=maxiter, callback=callback, monitor=monitor, work=work)
    bb = reductions.sum(_k.dot(b, b))
    if _LOW <= bb <= _HIGH:
        result = _iterate(product, b, x0, M, reductions, bb, atol=atol, **options)
        if result is not None:
            return result
    bmax = _max_abs(b, reductions)
    if bmax == 0.0:
        # scipy's convention: the zero right-hand side has the zero solution.
        return CGResult(np.zeros(b.shape[0]), 0, 0, np.zeros(1), atol, "zero right-hand side",
                        residual=np.zeros(b.shape[0]))
    # The solve of 2**j A x' = 2**k b with 2**m M: x = 2**(j - k) x', r = 2**-k r'.
    k, j, m = _scales(product, b, bmax, x0, M, reductions)
    bs = _scaled(b, k)
    xs = None if x0 is None else _scaled(x0, k - j)
    if not (np.isfinite(bs).all() and (xs is None or np.isfinite(xs).all())):
        raise InputError(f"b or x0 scaled by 2**{k} (to bring b - A x0 into range) overflows: "
                         f"x0 solves the system to more digits than float64 can scale")
    if j:
        product = _ScaledProduct(product, j)
    if m and M is not None:
        M = _ScaledPreconditioner(M, m)
    if callback is not None:
        options["callback"] = lambda x: callback(_scaled(x, j - k))
    if monitor is not None:
        options["monitor"] = lambda it, rnorm: monitor(it, _scaled(rnorm, -k))
    result = _iterate(product, bs, xs, M, reductions, reductions.sum(_k.dot(bs, bs)),
                      atol=_scaled(atol, k), check_scale=False, **options)
    xmax = _max_abs(result.x, reductions)
    if xmax > 0.0:
        e = _exponent(xmax) + j - k  # exponent of the largest entry of the solution
        if e > 1024 or e < -1021:
            where = "beyond float64's largest" if e > 0 else "below float64's smallest normal"
            raise InputError(
                f"the solution's largest entry, about 2**{e} (1e{e * math.log10(2):.0f}), is "
                f"{where} number; rescale the problem's units")
    result.x = _scaled(result.x, j - k)
    result.residual = None if result.residual is None else _scaled(result.residual, -k)
    result.residuals = _scaled(result.residuals, -k)
    result.tolerance = _scaled(result.tolerance, -k)
    result.message += f" (solved as 2**{j} A x = 2**{k} b to keep its norms in float64's range)"
    return result


def _assign(dst, src):
    """``dst[:] = src``, by the parallel kernel when both are contiguous float64 vectors."""
    if (src.dtype == np.float64 and dst.dtype == np.float64 and src.shape == dst.shape
            and src.flags.c_contiguous and dst.flags.c_contiguous):
        _k.copy(src, dst)
    else:
        dst[:] = src


def fresh_copy(src):
    """A new copy of the float64 vector ``src`` whose pages both threads first touch
    (``ndarray.copy`` touches them from one)."""
    out = np.empty_like(src)
    _assign(out, src)
    return out


def _iterate(product, b, x0, M, reductions, bb, *, rtol, atol, maxiter, callback, monitor,
             work=None, check_scale=True):
    """The CG iteration of :func:`run` with ``bb = b . b`` given (nonzero).

    With ``check_scale``, returns None, before updating anything, when the first
    ``r . r``, ``r . z`` or ``p . A p`` is outside the comfortable range (or over-
    or underflows): :func:`run` then rescales the system.
    """
    n = b.shape[0]
    total = reductions.sum  # the global sum of local parts (one communication per call)
    bnorm = math.sqrt(bb)
    tol = max(atol, rtol * bnorm)

    def vector(name, size=n):  # the workspace's (kept between solves) or a new one
        return np.empty(size) if work is None else work.get(name, size)

    x, r = vector("x"), vector("r")
    if x0 is None:
        # the fresh vectors first touched by both threads: the system backs their pages
        # about 1.7 times faster than after numpy's serial fill and copy
        _k.fill(x, 0.0)
        _assign(r, b)
    else:
        x[:] = x0
        product.residual(x, b, r)

    # Two shortcuts spare the call of M per iteration: the identity is not applied at
    # all, and a diagonal is applied inside the fused vector update.
    identity = M is None or getattr(M, "is_identity", False) is True
    dinv = None if identity else getattr(M, "inverse_diagonal", None)
    fuse = reductions.fuse_rz and not identity
    z = r if identity else vector("z")

    def precondition():
        """``z = M r``; return this process's part of ``r . z``."""
        if dinv is not None:
            _k.jacobi_apply(dinv, r, z)
        else:
            M.apply_into(r, z)
        return _k.dot(r, z)

    def out_of_range(value):
        # a negative or NaN value is a breakdown, reported as such below
        return check_scale and (value == 0.0 or value > 0.0) and not _LOW <= value <= _HIGH

    if fuse:
        rr, rz = total(_k.dot(r, r), precondition())
    else:
        rr = total(_k.dot(r, r))
    history = [math.sqrt(rr)]
    if history[0] <= tol:
        return CGResult(x, 0, 0, np.array(history), tol, "initial guess meets the tolerance",
                        residual=r)
    if identity:
        rz = rr
    elif not fuse:
        rz = total(precondition())
    if out_of_range(rr) or out_of_range(rz):
        return None

    iteration = 0
    restarts = 0
    stall = Stagnation()
    info = maxiter
    message = f"not converged after {maxiter} iterations"
    alphas, betas = [], []
    lanczos = True
    if not (rz > 0.0 and math.isfinite(rz)):
        info, message = breakdown_preconditioner(rz, 0)
    else:
        p = vector("p", product.n_local)  # on a rank, room for the ghosts after the owned ones
        p[n:] = 0.0
        po = p if p.shape[0] == n else p[:n]
        _assign(po, z)
        # q = A p is read only by the step that follows it, and z = M r only by the
        # direction update before the next product: one vector holds both in turn
        q = vector("q") if identity else z
        while iteration < maxiter:
            pq = total(product.matvec_dot(p, q))
            if iteration == 0 and out_of_range(pq):
                return None
            if not (pq > 0.0 and math.isfinite(pq)):
                info, message = breakdown_matrix(pq, iteration + 1)
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
            restart = stalled = False
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
                stalled = stall.update(rnorm)
            history.append(rnorm)
            if monitor is not None:
                monitor(iteration, rnorm)
            if stalled:
                info, message = iteration, stall.message(iteration, tol, bnorm)
                break
            if iteration == maxiter:
                break
            if identity:
                rz_new = rr
            elif restart or (dinv is None and not fuse):
                rz_new = total(precondition())
            if not (rz_new > 0.0 and math.isfinite(rz_new)):
                info, message = breakdown_preconditioner(rz_new, iteration)
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
    return CGResult(x, info, iteration, np.array(history), tol, message, restarts, coefficients,
                    residual=r if info == 0 else None)
