"""What :func:`hatkernels.transient.solve_transient` returns: the fields at the output
times, the figures of the march (:class:`TransientStats`) and the heat balance per output
interval (:class:`EnergyBalance`).

CAUTION: results are engineering estimates and must be checked by a qualified person
against local codes and licensed practice.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels.results import CAUTION

__all__ = ["EnergyBalance", "TransientSolution", "TransientStats"]


@dataclasses.dataclass
class TransientStats:
    """What :func:`solve_transient` did and cost.

    Attributes
    ----------
    steps : int
    iterations : ndarray, shape (steps,)
        CG iterations of each step with the whole preconditioner.
    smoother_iterations : ndarray, shape (steps,), or None
        CG iterations preconditioned by a Chebyshev smoother alone (the patch
        multigrid's finest level, or degree 2 on the assembled system), tried
        first on each step with a projected start
        (:data:`hatkernels.transient_steps.SMOOTHER_ITERATIONS` at most).
    step_seconds : ndarray, shape (steps,)
        Wall time of each step (right-hand side, time-dependent data, CG, update,
        heat balance, probes; not the setup of a new step size).
    product_seconds : float
        One product with the assembled system matrix ``M + tau K``, measured in
        this run (best of five): the work unit (WU).
    converged : bool
        Every step met its tolerance.
    failed_steps : int
    timings : dict
        Seconds per phase: ``assemble``, ``setup`` (system matrices and
        preconditioners), ``steps``, ``data`` (evaluating time-dependent data,
        inside ``steps``), ``output`` and ``total``.
    unknowns, nnz : int
        Free unknowns and the entries of the system matrix.
    stored_bytes : int
        The matrices and preconditioners held.
    preconditioner : str
    systems : int
        Systems built (one per step size; at most two are kept at a time, so a size
        needed again after two others is built again).
    scheme : str
    rtol : float
    peak_rss_bytes, threads : int
    message : str
        What happened, in words.
    """

    steps: int
    iterations: np.ndarray
    step_seconds: np.ndarray
    product_seconds: float
    converged: bool
    failed_steps: int
    timings: dict
    unknowns: int
    nnz: int
    stored_bytes: int
    preconditioner: str
    systems: int
    scheme: str
    rtol: float
    peak_rss_bytes: int = 0
    threads: int = 1
    message: str = ""
    smoother_iterations: np.ndarray = None

    @property
    def work_units(self):
        """Cost of each step in WU: ``step_seconds / product_seconds``, shape (steps,)."""
        return self.step_seconds / self.product_seconds

    def summary(self):
        """The figures as a dict of plain numbers and text (for JSON)."""
        it, wu = self.iterations, self.work_units

        def pick(a, f):
            return float(f(a)) if a.size else 0.0

        sm = np.zeros_like(it) if self.smoother_iterations is None else self.smoother_iterations
        return {"steps": self.steps, "scheme": self.scheme, "rtol": self.rtol,
                "iterations_mean": pick(it, np.mean), "iterations_max": int(pick(it, np.max)),
                "smoother_iterations_mean": pick(sm, np.mean),
                "step_seconds_median": pick(self.step_seconds, np.median),
                "work_units_median": pick(wu, np.median),
                "product_seconds": (self.product_seconds if np.isfinite(self.product_seconds)
                                    else None), "converged": self.converged,
                "failed_steps": self.failed_steps, "unknowns": self.unknowns, "nnz": self.nnz,
                "stored_bytes": self.stored_bytes, "preconditioner": self.preconditioner,
                "systems": self.systems, "timings": dict(self.timings),
                "peak_rss_bytes": self.peak_rss_bytes, "threads": self.threads}

    def __repr__(self):
        it, sm = self.iterations, self.smoother_iterations
        mean = float(it.mean()) if it.size else 0.0
        smoothed = float(sm.mean()) if sm is not None and sm.size else 0.0
        wu = float(np.median(self.work_units)) if it.size else 0.0
        return (f"TransientStats({self.steps} steps of {self.scheme}, {self.unknowns} "
                f"unknowns, {mean:.1f} iterations per step (and {smoothed:.1f} with the "
                f"smoother alone), median {wu:.1f} WU per step, converged={self.converged})")


@dataclasses.dataclass(frozen=True)
class EnergyBalance:
    """Heat moved over each output interval (the first from t = 0 to ``times[0]``).

    Units: with ``u`` in K, ``capacity`` in J/(m^3 K), ``kappa`` in W/(m K) and
    lengths in m, every figure is in J per metre of thickness on a 2-D mesh and in
    J on a 3-D one.  Outflows are positive when heat leaves the body.

    Attributes
    ----------
    start, end : ndarray, shape (n_times,)
    stored : ndarray
        Change of the stored heat ``int capacity u``.
    sources : ndarray
        ``int int f`` over the interval (the scheme's theta-weighted sum).
    flux_in : ndarray
        Heat in through imposed fluxes (``neumann``).
    held_out : ndarray
        Heat out through the held points, from the held rows of the discrete
        equations (conservative, as :func:`hatkernels.results.balance`).
    convection_out : ndarray
        Heat out through Robin sides: ``int (r u - s)``.
    absorbed : ndarray
        ``int c u`` of the reaction term.
    """

    start: np.ndarray
    end: np.ndarray
    stored: np.ndarray
    sources: np.ndarray
    flux_in: np.ndarray
    held_out: np.ndarray
    convection_out: np.ndarray
    absorbed: np.ndarray

    @property
    def heat_in(self):
        return self.sources + self.flux_in

    @property
    def heat_out(self):
        return self.held_out + self.convection_out + self.absorbed

    @property
    def imbalance(self):
        """``heat_in - heat_out - stored``: what the steps' solver residuals leave."""
        return self.heat_in - self.heat_out - self.stored

    @property
    def relative(self):
        """Largest ``|imbalance|`` over the largest heat figure (0 when nothing moves)."""
        scale = max(float(np.abs(a).max(initial=0.0)) for a in
                    (self.stored, self.heat_in, self.heat_out))
        return float(np.abs(self.imbalance).max(initial=0.0)) / scale if scale > 0 else 0.0


@dataclasses.dataclass
class TransientSolution:
    """What :func:`solve_transient` found.

    Attributes
    ----------
    times : ndarray, shape (n_times,)
    u : ndarray, shape (n_times, n_points)
        The field at each output time (at t = 0: ``u0``; points in no cell keep ``u0``).
    stats : TransientStats
    mesh : Mesh
    problem : TransientProblem
    probe_points : ndarray, shape (n_probes, d)
    probe_times : ndarray, shape (steps + 1,)
        0 and the end of every step.
    probe_values : ndarray, shape (steps + 1, n_probes)
        The field at the probes at each of ``probe_times``.
    caution : str
    """

    times: np.ndarray
    u: np.ndarray
    stats: TransientStats
    mesh: object
    problem: object = dataclasses.field(default=None, repr=False)
    probe_points: np.ndarray = None
    probe_times: np.ndarray = None
    probe_values: np.ndarray = None
    caution: str = CAUTION
    _energy: EnergyBalance = dataclasses.field(default=None, repr=False)

    def energy(self):
        """The :class:`EnergyBalance` per output interval: stored, in and out."""
        return self._energy

    @property
    def converged(self):
        return self.stats.converged

    def __repr__(self):
        return (f"TransientSolution({len(self.times)} times up to {self.times[-1]:.6g}, "
                f"{self.mesh.n_points} points, {self.stats.steps} steps)")
