"""One call from a sparse SPD system to a checked solution.

:func:`solve` builds a preconditioner (by name, or takes one), runs
preconditioned conjugate gradients (:func:`hatkernels.krylov.cg_with_history`)
and returns a :class:`SolveResult` with the solution, the residual history
and the setup and solve times.  It never returns a wrong answer silently:
``converged`` is True only when the true residual met the tolerance; otherwise
it warns, or raises :class:`~hatkernels.errors.ConvergenceError` with ``check=True``.
"""

import time
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.sparse.linalg import LinearOperator

from hatkernels.errors import ConvergenceError, InputError
from hatkernels.krylov import cg_with_history
from hatkernels.precond import make_preconditioner

__all__ = ["solve", "SolveResult"]


@dataclass
class SolveResult:
    """What :func:`solve` found.

    Attributes
    ----------
    x : ndarray, shape (n,)
        The solution (the last iterate when not converged).
    converged : bool
        True when ``norm(b - A x) <= max(rtol * norm(b), atol)`` was verified.
    iterations : int
        CG iterations.
    residuals : ndarray, shape (iterations + 1,)
        Residual norms, initial one first.
    timings : dict
        ``{"setup": seconds, "solve": seconds}``; setup is 0 for a given operator.
    preconditioner : str
        Description of the preconditioner (what it is and what it cost).
    info : int
        The CG code: 0 converged, >0 iterations without converging, <0 breakdown
        (see :mod:`hatkernels.krylov`).
    """

    x: np.ndarray
    converged: bool
    iterations: int
    residuals: np.ndarray
    timings: dict = field(default_factory=dict)
    preconditioner: str = ""
    info: int = 0


def solve(A, b, *, preconditioner="amg", rtol=1e-8, atol=0.0, maxiter=None, x0=None,
          check=False, monitor=None, **preconditioner_options):
    """Solve the symmetric positive definite system ``A x = b``.

    Parameters
    ----------
    A : sparse matrix or LinearOperator, shape (n, n)
        A LinearOperator works with ``preconditioner="none"`` or a
        preconditioner instance; the named ones need the matrix.
    b : ndarray, shape (n,)
    preconditioner : str or LinearOperator
        A name from :data:`hatkernels.precond.PRECONDITIONERS`, or an operator
        approximating ``A^{-1}`` (symmetric positive definite).
    rtol, atol, maxiter, x0
        As in :func:`hatkernels.krylov.cg` (``maxiter`` defaults to ``10 n``).
    check : bool
        Raise :class:`ConvergenceError` instead of warning when not converged.
    monitor : callable, optional
        ``monitor(iteration, residual_norm)`` after every CG iteration.
    **preconditioner_options
        Passed to :func:`hatkernels.precond.make_preconditioner`.

    Returns
    -------
    SolveResult

    Examples
    --------
    >>> import numpy as np
    >>> from pyamg.gallery import poisson
    >>> from hatkernels.solve import solve
    >>> A = poisson((20, 20), format="csr")
    >>> result = solve(A, np.ones(400), preconditioner="ic0")
    >>> result.converged, bool(result.residuals[-1] <= 1e-8 * result.residuals[0])
    (True, True)
    """
    if isinstance(preconditioner, LinearOperator):
        if preconditioner_options:
            names = ", ".join(sorted(preconditioner_options))
            raise InputError(f"preconditioner options ({names}) given with a preconditioner "
                             f"instance; options only apply to a named preconditioner")
        M = preconditioner
        setup = 0.0
        description = getattr(M, "description", None) or repr(M)
    elif isinstance(preconditioner, str):
        start = time.perf_counter()
        M = make_preconditioner(A, preconditioner, **preconditioner_options)
        setup = time.perf_counter() - start
        description = M.description
    else:
        raise InputError(f"preconditioner must be a name or a LinearOperator, "
                         f"got {type(preconditioner).__name__}")

    start = time.perf_counter()
    outcome = cg_with_history(A, b, x0, rtol=rtol, atol=atol, maxiter=maxiter, M=M, warn=False,
                              monitor=monitor)
    elapsed = time.perf_counter() - start

    result = SolveResult(
        x=outcome.x,
        converged=outcome.converged,
        iterations=outcome.iterations,
        residuals=outcome.residuals,
        timings={"setup": setup, "solve": elapsed},
        preconditioner=description,
        info=outcome.info,
    )
    if not result.converged:
        final = outcome.residuals[-1]
        text = (f"solve: not converged: {outcome.message}; residual {final:.3e} against the "
                f"tolerance {outcome.tolerance:.3e} (preconditioner {description})")
        if check:
            raise ConvergenceError(text)
        warnings.warn(text, RuntimeWarning, stacklevel=2)
    return result
