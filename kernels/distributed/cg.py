"""Conjugate gradients over ranks, with scipy's stopping rule on the global residual.

The iteration is the serial solver's loop (:func:`hatkernels._cg.run`, the
one :func:`hatkernels.krylov.cg_with_history` runs) with :class:`Reducer` as
its reductions, so every dot product is global: converged when ``norm(b - A
x) <= max(rtol * norm(b), atol)`` for the whole (unpreconditioned) residual;
when the recurrence says so, the true residual is computed once (one more
product) and the iteration restarts from it if round-off has made the
recurrence drift.  ``info`` has the serial meaning (0, ``maxiter``, -1, -2).

Per iteration: one product (one halo exchange), one preconditioner
application (no communication for block Jacobi; a ``Gather`` and a
``Scatter`` for the two-level method) and two ``Allreduce`` calls, of one
double (``p . A p``) and of two (``r . r`` and ``r . z`` together: the
reducer asks the loop, by ``fuse_rz``, to apply the preconditioner before
the convergence test, which costs one wasted application in the last
iteration and saves one reduction in every other).  Every rank takes the
same decisions, since they depend on reduced values only.

With one rank the vector operations and products are the serial solver's
kernels in the same order, so the iterates have the same bits.
"""

from __future__ import annotations

import time
import warnings

import numpy as np

from hatkernels._cg import CGResult, condition_estimate, run
from hatkernels.distributed.launch import mpi
from hatkernels.errors import InputError
from hatkernels.krylov import _check_scalars
from hatkernels.sparse import as_vector

__all__ = ["cg", "condition_estimate", "DistributedCGResult", "Reducer"]

#: The result of :func:`cg`: the serial :class:`~hatkernels.krylov.CGResult` (``x`` this
#: rank's entries), whose ``condition_estimate`` comes from the loop's coefficients.
DistributedCGResult = CGResult


class Reducer:
    """Global sums (and a maximum) by ``Allreduce`` into a preallocated buffer, timed
    into ``stats``.

    The reductions of the CG loop (:mod:`hatkernels._cg`); ``fuse_rz``: see there.
    """

    fuse_rz = True

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

    def maximum(self, value):
        """Global maximum of one float (one ``Allreduce``); the CG loop asks for it only
        when it must rescale a system whose norms would leave float64's range."""
        buf = self._buf[:1]
        buf[0] = value
        t0 = time.perf_counter()
        self.comm.Allreduce(self._MPI.IN_PLACE, [buf, self._MPI.DOUBLE], op=self._MPI.MAX)
        s = self.stats
        s.reduction_seconds += time.perf_counter() - t0
        s.reductions += 1
        s.reduction_bytes += buf.nbytes
        return float(buf[0])


def _check_preconditioner(M):
    if M is None or getattr(M, "is_identity", False) is True:
        return
    if getattr(M, "inverse_diagonal", None) is None and not callable(
            getattr(M, "apply_into", None)):
        raise InputError(f"M must be None or a distributed preconditioner with apply_into(r, z) "
                         f"(hatkernels.distributed.precond), got {type(M).__name__}")


def cg(A, b, x0=None, *, rtol=1e-5, atol=0.0, maxiter=None, M=None, callback=None,
       warn=True, monitor=None):
    """Preconditioned CG on a :class:`~hatkernels.distributed.matrix.DistributedMatrix`.

    Collective over ``A.comm``.  ``b``, ``x0`` and the returned ``x`` are
    this rank's owned entries.  ``M`` is a distributed preconditioner of the
    protocol of :mod:`hatkernels.krylov` (``apply_into(r, z)`` on this rank's
    entries, optionally ``inverse_diagonal`` and ``is_identity``, the same
    kind on every rank) or None.  ``maxiter`` defaults to 10 times the global
    number of unknowns.  ``callback(x)`` is called on every rank with its
    owned entries; ``monitor(iteration, residual_norm)`` after every
    iteration with the global residual norm, on every rank (as
    :func:`hatkernels.krylov.cg_with_history`).  Returns a
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
    _check_preconditioner(M)
    result = run(A, b, x0, M, red, rtol=rtol, atol=atol, maxiter=maxiter, callback=callback,
                 monitor=monitor)
    if result.info < 0 and warn:
        warnings.warn(f"cg: {result.message}", RuntimeWarning, stacklevel=2)
    return result
