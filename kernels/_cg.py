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
    communication.  :data:`LOCAL` is the serial one: no communication, the
    values unchanged.  ``fuse_rz`` true (the MPI reducer) applies the
    preconditioner before the convergence test so that ``r . r`` and
    ``r . z`` share one reduction (one wasted application in the last
    iteration, one reduction saved in every other); false (serial) applies it
    after the test, so that the last iteration applies nothing.

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
           "BREAKDOWN_MATRIX", "BREAKDOWN_PRECONDITIONER"]

#: ``info`` when ``p . A p <= 0``: the matrix is not positive definite.
BREAKDOWN_MATRIX = -1
#: ``info`` when ``r . z <= 0`` with ``r != 0``: the preconditioner is not positive definite.
BREAKDOWN_PRECONDITIONER = -2


class _LocalReductions:
    """Reductions of a solve on one process: the local sums are the global ones."""

    fuse_rz = False

    def sum(self, *values):
        return values[0] if len(values) == 1 else values


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


def run(product, b, x0, M, reductions, *, rtol, atol, maxiter, callback=None, monitor=None):
    """Preconditioned CG on checked input; returns a :class:`CGResult`.

    ``b`` and ``x0`` (or None) are float64 contiguous arrays of the owned
    length ``n``; ``x0`` is copied, never modified.  ``rtol``, ``atol`` and
    ``maxiter`` are checked numbers.  It does not warn: the caller reports a
    breakdown (``info < 0``) from the message.  Collective when
    ``reductions`` communicate.
    """
    n = b.shape[0]
    total = reductions.sum  # the global sum of local parts (one communication per call)
    bnorm = math.sqrt(total(_k.dot(b, b)))
    if bnorm == 0.0:
        # scipy's convention: the zero right-hand side has the zero solution.
        return CGResult(np.zeros(n), 0, 0, np.zeros(1), atol, "zero right-hand side")
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
