"""One call from a sparse SPD system to a checked solution.

:func:`solve` builds a preconditioner (by name, with an optional context, or
takes one), runs preconditioned conjugate gradients
(:func:`hatkernels.krylov.cg_with_history`) and returns a :class:`SolveResult`
whose :class:`~hatkernels.stats.SolveStats` hold the residual history, the
setup and solve times and what the preconditioner cost.  It never returns a
wrong answer silently: ``converged`` is True only when the true residual met
the tolerance; otherwise it warns, or raises
:class:`~hatkernels.errors.ConvergenceError` with ``check=True``.

(The module is ``solver`` so that the function :func:`hatkernels.solve` does
not hide it.)
"""

import math
import time
import warnings
from dataclasses import dataclass

import numba
import numpy as np
from scipy.sparse.linalg import LinearOperator

from hatkernels._jit.sparse import all_finite, dot
from hatkernels.errors import ConvergenceError, InputError
from hatkernels.krylov import cg_with_history
from hatkernels.perf import peak_rss_bytes
from hatkernels.precond import make_preconditioner
from hatkernels.sparse import as_vector
from hatkernels.stats import SolveStats

__all__ = ["solve", "SolveResult", "report_convergence", "stored_bytes", "STARTS"]


@dataclass
class SolveResult:
    """What :func:`solve` found: the solution ``x`` (shape (n,); the last
    iterate when not converged) and its :class:`~hatkernels.stats.SolveStats`.

    ``converged``, ``iterations``, ``residuals`` and ``info`` read the stats.
    """

    x: np.ndarray
    stats: SolveStats

    @property
    def converged(self):
        return self.stats.converged

    @property
    def iterations(self):
        return self.stats.iterations

    @property
    def residuals(self):
        return self.stats.residuals

    @property
    def info(self):
        return self.stats.info


def stored_bytes(A):
    """Bytes held by a system operator: a sparse matrix's arrays, or an operator's ``nbytes``."""
    if hasattr(A, "indptr"):
        return int(A.data.nbytes + A.indices.nbytes + A.indptr.nbytes)
    return int(getattr(A, "nbytes", 0))


#: What ``start`` may name: the first iterate of CG when no ``x0`` is given.
STARTS = ("zero", "nested")


def solve(A, b, *, preconditioner="amg", rtol=1e-8, atol=0.0, maxiter=None, x0=None,
          start=None, check=False, monitor=None, context=None, **preconditioner_options):
    """Solve the symmetric positive definite system ``A x = b``.

    Parameters
    ----------
    A : sparse matrix or LinearOperator, shape (n, n)
        A LinearOperator works with preconditioners that need no assembled
        matrix (``"none"``, ``"gmg"``) or a preconditioner instance.
    b : ndarray, shape (n,)
    preconditioner : str or LinearOperator
        A name from :data:`hatkernels.precond.PRECONDITIONERS`, or an operator
        approximating ``A^{-1}`` (symmetric positive definite).
    rtol, atol, maxiter, x0
        As in :func:`hatkernels.krylov.cg` (``maxiter`` defaults to ``10 n``).
        ``rtol=None``: no CG iteration at all, the ``"nested"`` start alone
        (full multigrid: discretisation accuracy on smooth problems for
        about one cycle's work and a third, with no residual tolerance
        asked; ``converged`` is then True and ``message`` says so).
    start : {"zero", "nested"}, optional
        The first iterate when ``x0`` is None: zero, or full multigrid
        (nested iteration from the coarsest level up, ``cycles`` cycles per
        level: the preconditioner's ``full_cycle_into``, which ``gmg`` and the
        AMG preconditioners have), after which CG goes on to ``rtol``.
        Default ``"nested"`` with ``rtol=None`` or a preconditioner whose
        ``default_start`` is ``"nested"`` (``amg-native``, the default ``amg``:
        the same tolerance in fewer iterations, docs/solvers.md), else ``"zero"``.
    check : bool
        Raise :class:`ConvergenceError` instead of warning when not converged.
    monitor : callable, optional
        ``monitor(iteration, residual_norm)`` after every CG iteration.
    context : PreconditionerContext, optional
        What the system came from (mesh, coefficient, held points), for
        preconditioners that use more than the matrix; see
        :class:`hatkernels.precond.PreconditionerContext`.
    **preconditioner_options
        Passed to :func:`hatkernels.precond.make_preconditioner`.

    Returns
    -------
    SolveResult

    Examples
    --------
    >>> import numpy as np
    >>> from pyamg.gallery import poisson
    >>> from hatkernels import solve
    >>> A = poisson((20, 20), format="csr")
    >>> result = solve(A, np.ones(400), preconditioner="ic0")
    >>> result.converged, bool(result.residuals[-1] <= 1e-8 * result.residuals[0])
    (True, True)
    """
    if isinstance(preconditioner, LinearOperator):
        if preconditioner_options or context is not None:
            names = ", ".join(sorted(preconditioner_options) + ["context"] * (context is not None))
            raise InputError(f"preconditioner options ({names}) given with a preconditioner "
                             f"instance; options only apply to a named preconditioner")
        M = preconditioner
        setup = 0.0
        description = getattr(M, "description", None) or repr(M)
    elif isinstance(preconditioner, str):
        clock = time.perf_counter()
        M = make_preconditioner(A, preconditioner, context=context, **preconditioner_options)
        setup = time.perf_counter() - clock
        description = M.description
    else:
        raise InputError(f"preconditioner must be a name or a LinearOperator, "
                         f"got {type(preconditioner).__name__}")

    x0, first, start = _first_iterate(A, b, x0, start, rtol, M, description)
    started = x0 is not None
    clock = time.perf_counter()
    outcome = cg_with_history(A, b, x0, rtol=np.inf if rtol is None else rtol, atol=atol,
                              maxiter=maxiter, M=M, warn=False, monitor=monitor)
    elapsed = time.perf_counter() - clock
    if rtol is None:
        outcome.message = ("the nested start alone (rtol=None): full multigrid, no residual "
                           "tolerance asked")

    stats = SolveStats(
        iterations=outcome.iterations,
        converged=outcome.converged,
        residuals=outcome.residuals,
        timings={"setup": setup, "solve": elapsed, **first},
        unknowns=int(A.shape[0]),
        preconditioner=description,
        stored_bytes=stored_bytes(A),
        peak_rss_bytes=peak_rss_bytes(),
        threads=numba.get_num_threads(),
        info=outcome.info,
        message=outcome.message,
        tolerance=outcome.tolerance,
        condition_estimate=outcome.condition_estimate,
        rhs_norm=_norm(b) if started else float(outcome.residuals[0]),
        nnz=int(A.nnz) if hasattr(A, "nnz") else 0,
        matrix_free=not hasattr(A, "indptr"),
    )
    report_convergence(stats, check, stacklevel=3)
    return SolveResult(x=outcome.x, stats=stats)


def _norm(b):
    v = as_vector(b, np.shape(b)[0], "b")
    return math.sqrt(dot(v, v))


def _first_iterate(A, b, x0, start, rtol, M, description):
    """``(x0, timings, start)``: the first iterate CG is given, ``{"start": seconds}`` when
    it was computed by full multigrid, and the start's name."""
    if start is None:
        nested = rtol is None or getattr(M, "default_start", "zero") == "nested"
        start = "nested" if nested and x0 is None else "zero"
    if start not in STARTS:
        raise InputError(f"start must be one of {STARTS}, got {start!r}")
    if start == "zero":
        if rtol is None:
            raise InputError("rtol=None asks for the nested start alone, but start='zero'")
        return x0, {}, start
    if x0 is not None:
        raise InputError("x0 and start='nested' both give the first iterate; give one")
    nested = getattr(M, "full_cycle_into", None)
    if nested is None:
        raise InputError(f"start='nested' (and rtol=None) need a multigrid preconditioner "
                         f"with nested levels (gmg, the amg ones); {description} has none")
    clock = time.perf_counter()
    b = as_vector(b, A.shape[0], "b")
    x = np.empty(A.shape[0])
    nested(b, x)
    seconds = {"start": time.perf_counter() - clock}
    if rtol is not None and not all_finite(x):
        # full multigrid overflowed (a solution near float64's largest number): CG starts
        # from zero instead, where it rescales the system or says why it cannot
        return None, seconds, "zero"
    return x, seconds, start


def report_convergence(stats, check, stacklevel=2):
    """Warn (or raise ConvergenceError with ``check``) when ``stats`` says not converged."""
    if stats.converged:
        return
    text = (f"solve: not converged: {stats.message}; residual {stats.residuals[-1]:.3e} "
            f"against the tolerance {stats.tolerance:.3e} (preconditioner {stats.preconditioner})")
    if check:
        raise ConvergenceError(text)
    warnings.warn(text, RuntimeWarning, stacklevel=stacklevel + 1)
