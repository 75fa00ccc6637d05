"""What a solve did and cost: one dataclass for the serial and the distributed paths."""

from __future__ import annotations

import dataclasses
import math

import numpy as np

__all__ = ["SolveStats"]


@dataclasses.dataclass
class SolveStats:
    """Figures of one solve.

    Attributes
    ----------
    iterations : int
        CG iterations.
    converged : bool
        True when ``norm(b - A x) <= max(rtol * norm(b), atol)`` was verified
        on the true residual.
    residuals : ndarray, shape (iterations + 1,)
        Residual norms, the initial one first.
    timings : dict
        Seconds per phase, in the order they ran (``setup`` and ``solve``
        always; the drivers add ``boundary``, ``assemble``, ``partition``,
        ``gather`` and ``total``).  Over MPI, each is the largest rank's.
    unknowns : int
        Free unknowns (all ranks together).
    preconditioner : str
        What the preconditioner is and what it cost, in words.
    stored_bytes : int
        Bytes the system operator stores (matrix, or the matrix-free
        operator's arrays), all ranks together.
    peak_rss_bytes : int
        The process's high-water mark of resident memory (over MPI, the
        largest rank's).
    threads : int
        numba threads (per rank over MPI).
    info : int
        The CG code: 0 converged, >0 iterations without converging, <0 breakdown.
    message : str
        What happened, in words.
    tolerance : float
        ``max(rtol * norm(b), atol)``.
    condition_estimate : float
        Estimate of the preconditioned operator's condition number from the
        CG coefficients (NaN where not computed).
    nnz : int
        Stored matrix entries (0 when matrix-free).
    matrix_free : bool
    dirichlet_points : int
    ranks : int
        MPI ranks (1 for a serial solve).
    distribution : object or None
        Per-rank figures of a distributed solve
        (:class:`hatkernels.distributed.solve.Distribution`), None when serial.
    """

    iterations: int
    converged: bool
    residuals: np.ndarray
    timings: dict
    unknowns: int
    preconditioner: str
    stored_bytes: int = 0
    peak_rss_bytes: int = 0
    threads: int = 1
    info: int = 0
    message: str = ""
    tolerance: float = math.nan
    condition_estimate: float = math.nan
    nnz: int = 0
    matrix_free: bool = False
    dirichlet_points: int = 0
    ranks: int = 1
    distribution: object = None

    @property
    def reduction(self):
        """Final residual over the initial one."""
        r = self.residuals
        return float(r[-1] / r[0]) if len(r) and r[0] > 0 else 0.0

    def __repr__(self):
        return (f"SolveStats({self.unknowns} unknowns, {self.iterations} iterations, "
                f"converged={self.converged}, residual reduction {self.reduction:.2e})")
