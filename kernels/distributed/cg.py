"""Conjugate gradients over ranks, with scipy's stopping rule on the global residual.

The iteration is :func:`hatkernels.krylov.cg_with_history` with every dot
product made global by an ``Allreduce``: converged when ``norm(b - A x) <=
max(rtol * norm(b), atol)`` for the whole (unpreconditioned) residual; when
the recurrence says so, the true residual is computed once (one more
product) and the iteration restarts from it if round-off has made the
recurrence drift.  ``info`` has the serial meaning (0, ``maxiter``, -1, -2).

Per iteration: one product (one halo exchange), one preconditioner
application (no communication for block Jacobi; a ``Gather`` and a
``Scatter`` for the two-level method) and two ``Allreduce`` calls, of one
double (``p . A p``) and of two (``r . r`` and ``r . z`` together: the
preconditioner is applied before the convergence test, which costs one
wasted application in the last iteration and saves one reduction in every
other).  Every rank takes the same decisions, since they depend on reduced
values only.

With one rank the vector operations and products are the serial solver's
kernels in the same order, so the iterates have the same bits.
"""

from __future__ import annotations

import dataclasses
import math
import time
import warnings

import numpy as np
from scipy.linalg import eigvalsh_tridiagonal

from hatkernels._jit import sparse as _k
from hatkernels.distributed.launch import mpi
from hatkernels.errors import InputError
from hatkernels.krylov import (
    BREAKDOWN_MATRIX,
    CGResult,
    _breakdown_preconditioner,
    _check_scalars,
)
from hatkernels.sparse import as_vector

__all__ = ["cg", "condition_estimate", "DistributedCGResult", "Reducer"]


@dataclasses.dataclass
class DistributedCGResult(CGResult):
    """A :class:`~hatkernels.krylov.CGResult` (``x`` this rank's entries) with a condition estimate.

    ``condition_estimate``: see :func:`condition_estimate` (NaN after a restart).
    """

    condition_estimate: float = float("nan")


class Reducer:
    """Global sums by ``Allreduce`` into a preallocated buffer, timed into ``stats``."""

    def __init__(self, comm, stats):
        self.comm = comm
        self.stats = stats
        self._MPI = mpi()
        self._buf = np.empty(4)

    def sum(self, *values):
        """Global sums of one or a few floats (one ``Allreduce``)."""
        k = len(values)
        buf = self._buf[:k]
        buf[:] = values
        t0 = time.perf_counter()
        self.comm.Allreduce(self._MPI.IN_PLACE, [buf, self._MPI.DOUBLE], op=self._MPI.SUM)
        s = self.stats
        s.reduction_seconds += time.perf_counter() - t0
        s.reductions += 1
        s.reduction_bytes += buf.nbytes
        return float(buf[0]) if k == 1 else tuple(float(v) for v in buf)


def cg(A, b, x0=None, *, rtol=1e-5, atol=0.0, maxiter=None, M=None, callback=None,
       warn=True, monitor=None):
    """Preconditioned CG on a :class:`~hatkernels.distributed.matrix.DistributedMatrix`.

    Collective over ``A.comm``.  ``b``, ``x0`` and the returned ``x`` are
    this rank's owned entries.  ``M`` is a distributed preconditioner
    (``apply(r, z)`` returning the local ``r . z``) or None.  ``maxiter``
    defaults to 10 times the global number of unknowns.  ``callback(x)`` is
    called on every rank with its owned entries; ``monitor(iteration,
    residual_norm)`` after every iteration with the global residual norm, on
    every rank (as :func:`hatkernels.krylov.cg_with_history`).  Returns a
    :class:`~hatkernels.krylov.CGResult` (the same on every rank but ``x``).

    It runs on numba's current thread count; :func:`~hatkernels.distributed.solve_poisson`
    sets one that does not oversubscribe the node, a direct caller should too
    (``with hatkernels.threads(n):``).
    """
    n = A.n_owned
    red = Reducer(A.comm, A.stats)
    try:  # checked on every rank, then agreed on, so that no rank waits for a failed one
        b = as_vector(b, n, "b")
        if x0 is not None:
            x0 = as_vector(x0, n, "x0")
        failure = None
    except InputError as exc:
        failure = exc
    n_global, failed = red.sum(float(n), 0.0 if failure is None else 1.0)
    if failed:
        raise failure or InputError("cg: b or x0 is invalid on another rank")
    rtol, atol, maxiter = _check_scalars(rtol, atol, maxiter, max(int(n_global), 1), callback)
    bnorm = math.sqrt(red.sum(_k.dot(b, b)))
    if bnorm == 0.0:
        return DistributedCGResult(np.zeros(n), 0, 0, np.zeros(1), atol, "zero right-hand side")
    tol = max(atol, rtol * bnorm)

    p = np.zeros(A.n_local)  # search direction, with room for its ghosts
    work = np.zeros(A.n_local)
    q = np.empty(n)
    r = np.empty(n)
    if x0 is None:
        x = np.zeros(n)
        r[:] = b
    else:
        x = x0.copy()
        A.residual(x, b, r, work)

    # Shortcuts as in the serial CG (no application for the identity, Jacobi fused into
    # the update); a preconditioner offers them by its kind, the same on every rank.
    identity = M is None or getattr(M, "identity", False) is True
    dinv = None if identity else getattr(M, "dinv", None)
    z = r if identity else np.empty(n)

    def precondition():
        return M.apply(r, z)

    rr_local = _k.dot(r, r)
    if identity:
        rr = red.sum(rr_local)
        rz = rr
    else:
        rr, rz = red.sum(rr_local, precondition())
    history = [math.sqrt(rr)]
    if history[0] <= tol:
        return DistributedCGResult(x, 0, 0, np.array(history), tol,
                                   "initial guess meets the tolerance")

    iteration = 0
    restarts = 0
    alphas, betas = [], []
    lanczos_ok = True
    info = maxiter
    message = f"not converged after {maxiter} iterations"
    fused_jacobi = dinv is not None
    if not (rz > 0.0 and math.isfinite(rz)):
        info, message = _breakdown_preconditioner(rz, 0)
    else:
        po = p[:n]
        po[:] = z
        while iteration < maxiter:
            pq = red.sum(A.matvec_dot(p, q))
            if not (pq > 0.0 and math.isfinite(pq)):
                info = BREAKDOWN_MATRIX
                message = (f"breakdown in iteration {iteration + 1}: p.Ap = {pq:.3e} <= 0 "
                           f"(or not finite), so A is not positive definite "
                           f"(info = {BREAKDOWN_MATRIX})")
                break
            alpha = rz / pq
            alphas.append(alpha)
            if fused_jacobi:
                rr_local, rz_local = _k.cg_step_jacobi(alpha, po, q, dinv, x, r, z)
                rr, rz_new = red.sum(rr_local, rz_local)
            elif identity:
                rr = rz_new = red.sum(_k.cg_step(alpha, po, q, x, r))
            else:
                rr_local = _k.cg_step(alpha, po, q, x, r)
                rr, rz_new = red.sum(rr_local, precondition())
            iteration += 1
            if callback is not None:
                callback(x)
            rnorm = math.sqrt(rr)
            restart = False
            if rnorm <= tol:
                A.residual(x, b, r, work)
                rr = red.sum(_k.dot(r, r))
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
            if restart:
                rz_new = rr if identity else red.sum(precondition())
            if not (rz_new > 0.0 and math.isfinite(rz_new)):
                info, message = _breakdown_preconditioner(rz_new, iteration)
                break
            if restart:
                po[:] = z
                lanczos_ok = False
            else:
                betas.append(rz_new / rz)
                _k.xpby(z, rz_new / rz, po)
            rz = rz_new

    if restarts and info != 0:
        message += (f" (the recursive residual met the tolerance {restarts} times but the "
                    f"true residual did not)")
    if info < 0 and warn:
        warnings.warn(f"cg: {message}", RuntimeWarning, stacklevel=2)
    kappa = condition_estimate(alphas, betas) if lanczos_ok else float("nan")
    return DistributedCGResult(x, info, iteration, np.array(history), tol, message, restarts,
                               kappa)


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
    a = np.asarray(alphas[:k])
    b = np.asarray(betas[: k - 1])
    diag = 1.0 / a
    diag[1:] += b / a[:-1]
    off = np.sqrt(b) / a[:-1]
    ev = eigvalsh_tridiagonal(diag, off)
    return float(ev[-1] / ev[0]) if ev[0] > 0 else float("inf")
