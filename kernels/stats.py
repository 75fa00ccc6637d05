"""What a solve did and cost: one dataclass for the serial and the distributed paths, and
what :func:`hatkernels.solve_poisson` returns (:class:`PoissonSolution`, here so that every
path that solves a Poisson problem can return one)."""

from __future__ import annotations

import dataclasses
import math
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from hatkernels.mesh.core import Mesh

__all__ = ["PoissonSolution", "SolveStats"]


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
        always; the drivers add ``refine`` (with ``refine=k``), ``boundary``,
        ``assemble``, ``partition``, ``gather`` and ``total``).  Over MPI, each
        is the largest rank's.
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
    rhs_norm : float
        ``norm(b)``, the reference of ``rtol`` (``residuals[0]`` is the first
        iterate's residual: ``norm(b)`` only when CG starts from zero); NaN where
        not recorded.
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
    rhs_norm: float = math.nan
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


@dataclasses.dataclass
class PoissonSolution:
    """What :func:`solve_poisson` found.

    Attributes
    ----------
    u : ndarray, shape (n_points,)
        Values at the points (points in no cell get 0).
    stats : SolveStats
        Iterations, residuals, times per phase (``boundary``, ``assemble``,
        ``setup``, ``solve``, ``total``), unknowns, what is stored, the
        preconditioner, threads and peak memory.
    mesh : Mesh
    problem : PoissonProblem or None
        The checked problem (data, conditions and their tags), for results by
        region and boundary tag (:mod:`hatkernels.results`).
    """

    u: np.ndarray
    stats: SolveStats
    mesh: Mesh
    problem: object = dataclasses.field(default=None, repr=False)

    @property
    def converged(self):
        return self.stats.converged

    def __repr__(self):
        s = self.stats
        return (f"{type(self).__name__}({s.unknowns} unknowns, {s.iterations} iterations, "
                f"converged={s.converged}, {s.timings['total']:.3g} s)")
