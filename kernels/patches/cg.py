"""Preconditioned CG in four vectors, for the patch path's largest solves.

:func:`hatkernels.solve` keeps ``b``, ``x``, ``r``, ``z``, ``p`` and ``q``: six
vectors, 48 bytes per point, the most of a solve whose operator and
preconditioner store almost nothing else.  Here the right-hand side is not
kept (the caller can make it again: ``remake_b(out)``), and ``z = M r`` goes
into the buffer of ``q = A p``, which is no longer needed by then: ``x``,
``r``, ``p`` and ``w``.  The recurrence is CG's (M. R. Hestenes and E. Stiefel,
Methods of conjugate gradients for solving linear systems, J. Res. NBS 49,
1952); convergence is checked, as in :mod:`hatkernels.krylov`, on the true
residual once the recursive one meets the tolerance.  The vector updates and
dot products are the library's fixed-order kernels, so the bits do not depend
on the thread count.
"""

from __future__ import annotations

import math

import numpy as np

from hatkernels._cg import condition_estimate, fresh_copy
from hatkernels._cgstop import Stagnation, breakdown_matrix, breakdown_preconditioner
from hatkernels._jit import sparse as _k
from hatkernels.krylov import _check_scalars

__all__ = ["LeanResult", "lean_cg"]


class LeanResult:
    """``x``, ``info`` (0 converged, >0 not converged, <0 breakdown), ``iterations``,
    ``residuals``, ``tolerance``, ``message``, ``condition_estimate``."""

    def __init__(self, x, info, iterations, residuals, tolerance, message, estimate):
        self.x, self.info, self.iterations = x, info, iterations
        self.residuals, self.tolerance, self.message = np.array(residuals), tolerance, message
        self.condition_estimate = estimate

    @property
    def converged(self):
        return self.info == 0


def lean_cg(A, M, r, remake_b, *, rtol, atol=0.0, maxiter=None, nested=False, monitor=None):
    """Solve ``A x = b`` from ``x = 0`` (or from ``M``'s full multigrid with ``nested``).

    ``r`` holds ``b`` on entry and is used as the residual (overwritten);
    ``remake_b(out)`` writes ``b`` into ``out`` again for the final check.
    ``rtol=None`` with ``nested``: the nested start alone.  Returns a
    :class:`LeanResult` whose ``x`` is a new vector.
    """
    n = r.shape[0]
    if rtol is None:
        _, atol, maxiter = _check_scalars(0.0, atol, maxiter, n, None)
    else:
        rtol, atol, maxiter = _check_scalars(rtol, atol, maxiter, n, None)
    bnorm = math.sqrt(_k.dot(r, r))
    tol = max(atol, (0.0 if rtol is None else rtol) * bnorm)
    x = np.zeros(n)
    w = np.empty(n)
    if nested:
        M.full_cycle_into(r, x)
        A.matvec_into(x, w)
        r -= w
    rnorm = math.sqrt(_k.dot(r, r))
    history = [rnorm]
    if rtol is None:
        return LeanResult(x, 0, 0, history, tol, "the nested start alone (rtol=None): full "
                          "multigrid, no residual tolerance asked", math.nan)
    if bnorm == 0.0 or rnorm <= tol:
        return LeanResult(x, 0, 0, history, tol, "initial guess meets the tolerance", math.nan)
    M.apply_into(r, w)
    rz = _k.dot(r, w)
    p = fresh_copy(w)
    alphas, betas = [], []
    info, message = maxiter, f"not converged after {maxiter} iterations"
    iteration = 0
    stall = Stagnation()
    while iteration < maxiter:
        A.matvec_into(p, w)
        pw = _k.dot(p, w)
        if not (pw > 0.0 and math.isfinite(pw)):
            info, message = breakdown_matrix(pw, iteration + 1)
            break
        alpha = rz / pw
        alphas.append(alpha)
        rnorm = math.sqrt(_k.cg_step(alpha, p, w, x, r))
        iteration += 1
        if rnorm <= tol:  # the true residual decides: b made again into w, A x into p
            remake_b(w)
            A.matvec_into(x, p)
            w -= p
            rnorm = math.sqrt(_k.dot(w, w))
            history.append(rnorm)
            if monitor is not None:
                monitor(iteration, rnorm)
            if rnorm <= tol:
                info, message = 0, f"converged in {iteration} iterations"
                break
            if stall.update(rnorm):
                info, message = iteration, stall.message(iteration, tol, bnorm)
                break
            r[:] = w  # go on from the true residual, with a fresh direction
            M.apply_into(r, w)
            rz = _k.dot(r, w)
            p[:] = w
            continue
        history.append(rnorm)
        if monitor is not None:
            monitor(iteration, rnorm)
        M.apply_into(r, w)  # z, in q's buffer
        rz_new = _k.dot(r, w)
        if not (rz_new > 0.0 and math.isfinite(rz_new)):
            info, message = breakdown_preconditioner(rz_new, iteration)
            break
        beta = rz_new / rz
        betas.append(beta)
        _k.xpby(w, beta, p)
        rz = rz_new
    return LeanResult(x, info, iteration, history, tol, message,
                      condition_estimate(alphas, betas))
