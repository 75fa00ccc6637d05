"""Time stepping: ``capacity du/dt - div(kappa grad u) + c u = f(t)`` from ``u0`` at t = 0.

The boundary conditions are those of :func:`hatkernels.solve_poisson`; the
source, the held values and the boundary loads may change in time
(:func:`in_time`).  P1 in space; in time the theta scheme, backward Euler
(``theta = 1``, first order, L-stable) or Crank-Nicolson (``theta = 1/2``,
second order, A-stable but not L-stable: its amplification ``(1 - z/2) / (1 +
z/2)`` tends to -1 as ``z = dt lambda`` grows, so the rough parts of
non-smooth data, a jump between ``u0`` and the held values for instance,
survive as oscillations that flip sign every step).

Damping: Rannacher's start-up.  The first Crank-Nicolson steps are replaced
by backward Euler steps of half the size (``startup`` of them, 4 by default:
the first two steps).  R. Rannacher, *Finite element solution of diffusion
problems with irregular data*, Numer. Math. 43 (1984) 309-327; M. Luskin and
R. Rannacher, *On the smoothing property of the Crank-Nicolson scheme*,
Applicable Anal. 14 (1982), which shows that four backward Euler steps
restore the second order for data that are only square-integrable (both
verified); the half-size steps follow M. Giles and R. Carter, *Convergence
analysis of Crank-Nicolson and Rannacher time-marching*, J. Comput. Finance
9 (2006) (value from memory).  A backward Euler step of ``dt / 2`` has the
matrix ``M + (dt / 2) K`` of a Crank-Nicolson step of ``dt``, so the start-up
costs no second matrix or preconditioner.

Cost.  ``M + theta dt K`` (on the free unknowns) is assembled, and its
preconditioner built, once per step size (:mod:`hatkernels.transient_steps`);
each step is one product with ``K`` for the right-hand side and a CG solve
for the change of u, started from the change's projection onto the last changes
that needed iterations (:class:`~hatkernels.transient_steps.StartSpace`; the
first steps of a system: the last changes extrapolated), typically none to two
iterations.  Memory: the matrices and the preconditioner, a few vectors, the
last changes (eight vectors per system), and the fields at the output times only
(``len(times) x n_points``); probes record every step at O(number of probes).

CAUTION: results are engineering estimates and must be checked by a qualified
person against local codes and licensed practice.
"""

from __future__ import annotations

import dataclasses
import math
import time
import warnings

import numba
import numpy as np

from hatkernels import _cg
from hatkernels._jit import sparse as _k
from hatkernels.errors import ConvergenceError, InputError
from hatkernels.krylov import _check_scalars
from hatkernels.locality import renumber_option
from hatkernels.memory import check_transient_memory
from hatkernels.perf import peak_rss_bytes
from hatkernels.poisson import refined
from hatkernels.precond import DEFAULT, PreconditionerContext, capabilities
from hatkernels.transient_data import (
    Clock,
    TimeData,
    TransientProblem,
    bind,
    in_time,
    initial_values,
)
from hatkernels.transient_patches import (
    PatchTransientSolution,
    march_on_patches,
    transient_patch_reason,
)
from hatkernels.transient_probes import locate
from hatkernels.transient_results import EnergyBalance, TransientSolution, TransientStats
from hatkernels.transient_steps import (
    SCHEMES,
    Blocks,
    System,
    _ratio,
    _schedule,
    _start,
    context_of,
    march_options,
    measure_product,
)

__all__ = ["SCHEMES", "EnergyBalance", "TransientSolution", "TransientStats", "in_time",
           "solve_transient"]

#: Systems (matrix and preconditioner, one per step size) kept at a time: the scheme's own,
#: and room for an odd output interval; older ones are rebuilt if needed again.
KEEP_SYSTEMS = 2

def solve_transient(mesh, u0, times, *, dt, capacity=1.0, scheme="crank-nicolson",
                    startup=4, lumped=False, f=0.0, refine=0, dirichlet=0.0,
                    dirichlet_on=None, coefficient=None, reaction=None, neumann=None,
                    robin=None, probes=None, preconditioner=None, rtol=1e-6, atol=0.0,
                    maxiter=None, check=False, quadrature=2, monitor=None, memory_check=True,
                    renumber=None, **preconditioner_options):
    """Solve ``capacity du/dt - div(kappa grad u) + c u = f(t)`` and return u at ``times``.

    Parameters
    ----------
    mesh : Mesh
    u0 : number, (n_points,) array or callable ``u0(x, y[, z])``
        The field at t = 0 (per point of the mesh solved on, after ``refine``).
    times : sequence of float
        Output times, strictly increasing, ``>= 0`` (0 gives ``u0`` back).
    dt : float
        The largest step; each output interval is cut into equal steps of at most ``dt``
        (intervals that are multiples of ``dt`` share one system matrix).
    capacity : number, array, callable or {region: value}
        ``rho c_p``, positive (the error names the first bad cell or point).
    scheme : {"crank-nicolson", "backward-euler"}
    startup : int
        Crank-Nicolson only: the first ``startup / 2`` steps are done as ``startup``
        backward Euler steps of half the size (Rannacher's start-up; even, >= 0;
        0 for none).
    lumped : bool
        Lump the capacity mass to its row sums (no spurious under- or overshoot for
        very short steps; first order in space for the mass term).
    f, dirichlet, dirichlet_on, coefficient, reaction, neumann, robin, refine, quadrature
        As in :func:`hatkernels.solve_poisson` (but ``f`` defaults to 0); ``f``, the
        ``dirichlet`` values, the ``neumann`` flux and the ``robin`` load ``s`` may be
        :func:`in_time` data, ``g(x, y, t)``.  A body that nothing holds (insulated)
        is allowed: the capacity makes the problem well posed.
    probes : (n_probes, d) array, optional
        Points inside the mesh at which u is recorded after every step.
    preconditioner : str or None
        A name from :data:`hatkernels.precond.PRECONDITIONERS`, built once per step size
        on ``M + theta dt K`` with the context the steady solve passes.  None (the
        default): with ``refine >= 1`` and data the never-stored refinement takes
        (:func:`hatkernels.transient_patches.transient_patch_reason`), the march runs
        there (:func:`~hatkernels.transient_patches.march_on_patches`: the patch
        multigrid, no assembled matrix, no fine mesh; the result a
        :class:`~hatkernels.transient_patches.PatchTransientSolution`); else
        :data:`hatkernels.precond.DEFAULT`.
    rtol, atol, maxiter : CG's stopping rule for each step's change ``d`` of u:
        ``norm(rhs - A d) <= max(rtol * norm(rhs), atol)``.  The errors of the
        steps add up to at most about ``rtol`` times the total change of u (the
        residual weighs an error in the rough modes more than in the smooth ones);
        the default keeps them well below Crank-Nicolson's own error per step.
    check : bool
        Raise ConvergenceError at the first step that does not converge (default:
        finish, then warn once).
    monitor : callable, optional
        ``monitor(step, steps, t, iterations)`` after every step: the steps done, of
        how many, the time reached and that step's CG iterations (a progress report).
    memory_check : bool
        Refuse, before assembling anything, a march whose estimated peak
        (``hatkernels.memory.transient_bytes``: the measured per-point figures
        and 8 bytes per point per output time) does not fit in the available memory.
    renumber : bool, optional
        As in :func:`hatkernels.solve_poisson`: the free unknowns in Z order when
        their numbering has no locality (None), never (False) or always (True),
        with a preconditioner that needs no mesh; ``.u`` is in the mesh's
        numbering either way, the time in ``stats.timings["renumber"]``.
    **preconditioner_options
        Passed to the preconditioner.

    Returns
    -------
    TransientSolution
        ``.times``, ``.u`` (len(times), n_points), ``.stats``, probes, ``.energy()``.

    Raises
    ------
    InputError
        Bad data, naming what and where: ``dt <= 0``, times not increasing or
        negative, ``u0`` of the wrong length or not finite, capacity not positive
        (at cell k), a probe outside the mesh, time-dependent data where only
        constant data are allowed, and everything :func:`hatkernels.solve_poisson`
        refuses.

    Examples
    --------
    >>> import numpy as np, hatkernels
    >>> from hatkernels.transient import solve_transient
    >>> m = hatkernels.mesh.rectangle(16, 16)
    >>> sine = lambda x, y: np.sin(np.pi * x) * np.sin(np.pi * y)
    >>> sol = solve_transient(m, sine, [0.0, 0.05], dt=0.005)
    >>> # the peak decays like exp(-2 pi^2 t): 0.373 at t = 0.05
    >>> round(float(sol.u[1].max()), 2), round(float(np.exp(-2 * np.pi**2 * 0.05)), 2)
    (0.37, 0.37)
    """
    t_start = time.perf_counter()
    if preconditioner is None:
        if transient_patch_reason(mesh, refine, u0=u0, probes=probes, capacity=capacity, f=f,
                                  dirichlet=dirichlet, dirichlet_on=dirichlet_on,
                                  coefficient=coefficient, reaction=reaction, neumann=neumann,
                                  robin=robin, options=preconditioner_options) is None:
            march = march_on_patches(
                mesh, u0, times, dt=dt, refine=refine, capacity=capacity, scheme=scheme,
                startup=startup, lumped=lumped, f=f, dirichlet=dirichlet,
                dirichlet_on=dirichlet_on, coefficient=coefficient, neumann=neumann,
                rtol=rtol, atol=atol, maxiter=maxiter, check=check, quadrature=quadrature,
                monitor=monitor, memory_check=memory_check)
            problem_args = dict(f=f, capacity=capacity, dirichlet=dirichlet,
                                dirichlet_on=dirichlet_on, coefficient=coefficient,
                                neumann=neumann, quadrature=quadrature)
            return PatchTransientSolution(march, problem_args)
        preconditioner = DEFAULT
    mesh = refined(mesh, refine, memory_check)
    dt, times, theta, startup = march_options(dt, times, scheme, startup, lumped)
    if not isinstance(preconditioner, str):
        raise InputError(f"preconditioner must be a name (built once per step size), got "
                         f"{type(preconditioner).__name__}")
    renumber_option(renumber)
    if capabilities(preconditioner).needs_mesh:  # (an unknown name is refused here)
        renumber = False  # its levels are the mesh's: the rows must stay the mesh's
    schedule = _schedule(times, dt, theta, startup)
    if memory_check:
        check_transient_memory(mesh, preconditioner, len(times))
    clock = Clock(0.0)
    fb, gb, hb, rb, timed = bind(clock, mesh.dim, f=f, dirichlet=dirichlet, neumann=neumann,
                                 robin=robin, coefficient=coefficient, reaction=reaction,
                                 capacity=capacity)
    problem = TransientProblem(mesh, fb, capacity=capacity, dirichlet=gb,
                               dirichlet_on=dirichlet_on, coefficient=coefficient,
                               reaction=reaction, neumann=hb, robin=rb, quadrature=quadrature)
    u0 = initial_values(u0, mesh)
    located = None if probes is None else locate(mesh, probes)
    data = TimeData(problem, clock, timed, gb)
    t = time.perf_counter()
    blocks = Blocks(problem, lumped, renumber)
    if blocks.unknowns == 0:
        raise InputError(f"every one of the {problem.mesh.n_points} points is held by a "
                         "Dirichlet condition (or in no cell): there is nothing to march; "
                         "the field at each time is the held values")
    timings = {"assemble": time.perf_counter() - t - blocks.renumber_seconds, "setup": 0.0}
    if blocks.renumbered:
        timings["renumber"] = blocks.renumber_seconds
    rtol, atol, maxiter = _check_scalars(rtol, atol, maxiter, max(blocks.unknowns, 1), None)
    if monitor is not None and not callable(monitor):
        raise InputError(f"monitor must be callable, got {type(monitor).__name__}")
    run = _Run(problem, blocks, data, theta, preconditioner, preconditioner_options,
               timings)
    run.monitor = monitor
    out = run.march(u0, times, schedule, located, rtol, atol, maxiter, check)
    timings["steps"] = float(run.step_seconds.sum())
    timings["data"] = data.seconds
    timings["total"] = time.perf_counter() - t_start
    failed = int(run.failed)
    label = scheme if theta == 1.0 or not startup else \
        f"{scheme} with {startup} backward-euler half steps (Rannacher start-up)"
    stats = TransientStats(
        steps=len(schedule), iterations=run.iterations,
        smoother_iterations=run.smoother_iterations, step_seconds=run.step_seconds,
        product_seconds=run.product_seconds, converged=failed == 0, failed_steps=failed,
        timings=timings, unknowns=blocks.unknowns, nnz=run.nnz,
        stored_bytes=blocks.stored_bytes + sum(s.stored_bytes for s in run.systems.values()),
        preconditioner=run.description, systems=run.built, scheme=label,
        rtol=rtol, peak_rss_bytes=peak_rss_bytes(), threads=numba.get_num_threads(),
        message=run.message or f"{len(schedule)} steps converged")
    if failed and not check:
        warnings.warn(f"solve_transient: {failed} of {len(schedule)} steps did not converge; "
                      f"the first: {run.message}", RuntimeWarning, stacklevel=2)
    return TransientSolution(times, out, stats, mesh, problem,
                             probe_points=None if located is None else located.points,
                             probe_times=run.probe_times, probe_values=run.probe_values,
                             _energy=run.energy(times))


class _Run:
    """The state of one time march: systems by step size, u, the heat accounts."""

    def __init__(self, problem, blocks, data, theta, preconditioner, options, timings):
        self.problem, self.blocks, self.data, self.theta = problem, blocks, data, theta
        self.preconditioner, self.options, self.timings = preconditioner, options, timings
        self.context = context_of(problem)
        self.systems = {}  # by tau, least recently used first
        self.built = 0
        self._unit = None
        self.product_seconds = math.nan
        self.nnz = 0
        self.description = ""
        self.failed = 0
        self.message = ""
        self.monitor = None

    def system(self, tau, dt):
        """The system of ``tau`` (built, with its preconditioner, on first use); the most
        recently used :data:`KEEP_SYSTEMS` are kept."""
        key = float(f"{tau:.12g}")  # equal steps cut from an interval differ in the last bits
        s = self.systems.pop(key, None)
        if s is None:
            start = time.perf_counter()
            s = System(self.blocks, tau, dt)
            built = time.perf_counter() - start
            if self._unit is None:  # the work unit, before a preconditioner's threads run
                self._unit = s.A
                self.product_seconds = measure_product(s.A)
            start = time.perf_counter()
            # a renumbered system's rows are not the mesh's: no context (as solve_poisson)
            context = (PreconditionerContext() if self.blocks.renumbered else
                       dataclasses.replace(self.context, mass=self.blocks.mass(tau)))
            s.precondition(self.preconditioner, context, self.options)
            self.timings["setup"] += built + time.perf_counter() - start
            if not self.built:
                self.nnz, self.description = int(s.A.nnz), s.description
            self.built += 1
            if len(self.systems) >= KEEP_SYSTEMS:
                self.systems.pop(next(iter(self.systems)))  # the least recently used
        self.systems[key] = s  # last: the most recently used
        return s

    def march(self, u0, times, schedule, probes, rtol, atol, maxiter, check):
        blocks, data = self.blocks, self.data
        free, held = blocks.free, blocks.held
        n_steps = len(schedule)
        out = np.zeros((len(times), u0.size))
        unused = np.ones(u0.size, dtype=bool)
        unused[free] = unused[held] = False
        out[:, unused] = u0[unused]  # points in no cell keep u0
        x = np.ascontiguousarray(u0[free])
        uD = u0[held].copy()
        self.iterations = np.zeros(n_steps, dtype=np.int64)
        self.smoother_iterations = np.zeros(n_steps, dtype=np.int64)
        self.step_seconds = np.zeros(n_steps)
        self.probe_times = np.array([0.0] + [s[1] for s in schedule])
        pick = None
        if probes is not None:
            pick = _ProbeGather(probes, free, held, u0)
            self.probe_values = np.empty((n_steps + 1, probes.points.shape[0]))
            self.probe_values[0] = probes.values(u0)
        else:
            self.probe_values = None
        n_out = len(times)
        self.accounts = {k: np.zeros(n_out) for k in
                         ("sources", "flux_in", "held_out", "convection_out", "absorbed")}
        self.stored_at = np.zeros(n_out + 1)
        self.stored_at[0] = blocks.stored(x, uD)
        if times[0] == 0.0:
            out[0] = u0
            self.stored_at[1] = self.stored_at[0]
        b_old, tot_old = data.load(0.0)
        rhs = np.empty(free.size)
        c_dt = None
        last = (None, None)
        prev, h_prev, moved = None, None, True
        prev2, h_prev2 = None, None  # the change before: a quadratic start (_start)
        x0_buf = np.empty(free.size)
        work = _cg.Workspace()  # CG's vectors, kept from step to step
        kept = (np.empty(free.size), np.empty(free.size))  # the last two changes
        interval = 0 if times[0] > 0 else 1
        for i, (t0, t1, theta, k) in enumerate(schedule):
            h = t1 - t0
            # the system of tau = theta h; its right-hand side is scaled for the scheme's
            # own step tau / theta_scheme (a half step of the start-up: 1/2)
            system = self.system(theta * h, theta * h / self.theta)
            start = time.perf_counter()
            g_new = data.held(t1)
            dD = g_new - uD
            b_new, tot_new = data.load(t1)
            if c_dt is None or moved or not data.steady_load or last != (system, theta):
                if b_new is b_old:
                    c = b_new[free]
                else:
                    c = theta * b_new[free] + (1.0 - theta) * b_old[free]
                coupling = blocks.coupling(uD)
                if coupling is not None:
                    c[coupling[0]] -= coupling[1]
                c_dt = system.dt * c
                last = (system, theta)
            system.rhs(x, c_dt, _ratio(h, system.dt), dD, rhs)
            x0 = system.space.guess(rhs, x0_buf)
            projected = x0 is not None
            if x0 is None:
                x0 = _start(prev, h_prev, prev2, h_prev2, h, x0_buf)
            result, self.smoother_iterations[i], self.iterations[i] = system.solve(
                rhs, x0, rtol, atol, maxiter, work, projected)
            d = result.x  # the workspace's: copied below where kept
            system.remember(rhs, result)
            if result.info != 0:
                self.failed += 1
                text = f"step {i + 1} (t = {t0:.6g} to {t1:.6g}): {result.message}"
                self.message = self.message or text
                if check:
                    raise ConvergenceError(f"solve_transient: {text}")
            self._account(interval, x, d, uD, dD, h, theta, b_old, b_new, tot_old, tot_new)
            _k.xpby(d, 1.0, x)  # x += d
            moved = bool(np.any(dD))
            uD = g_new
            b_old, tot_old = b_new, tot_new
            prev2, h_prev2 = prev, h_prev
            prev, h_prev = kept[i % 2], h
            prev[:] = d
            if pick is not None:
                self.probe_values[i + 1] = pick.values(x, uD)
            self.step_seconds[i] = time.perf_counter() - start
            if k >= 0:
                start = time.perf_counter()
                row = out[k]
                row[free] = x
                row[held] = uD
                self.stored_at[k + 1] = blocks.stored(x, uD)
                interval = k + 1
                self.timings["output"] = self.timings.get("output", 0.0) + \
                    time.perf_counter() - start
            if self.monitor is not None:
                self.monitor(i + 1, n_steps, t1, int(result.iterations))
        self.timings.setdefault("output", 0.0)
        if not self.systems:  # no step at all (times == [0])
            self.description = "none (no step)"
        else:  # measured again: a product slowed by another process must not set the unit
            self.product_seconds = min(self.product_seconds, measure_product(self._unit))
        return out

    def _account(self, k, x, d, uD, dD, h, theta, b_old, b_new, tot_old, tot_new):
        held_out, robin_ru, reaction = self.blocks.heat(x, d, uD, dD, h, theta, b_old, b_new)

        def mix(key):
            return h * (theta * tot_new[key] + (1.0 - theta) * tot_old[key])

        a = self.accounts
        a["sources"][k] += mix("f")
        a["flux_in"][k] += mix("neumann")
        a["held_out"][k] += held_out
        a["convection_out"][k] += robin_ru - mix("robin")
        a["absorbed"][k] += reaction

    def energy(self, times):
        starts = np.concatenate([[0.0], times[:-1]])
        return EnergyBalance(start=starts, end=times.copy(),
                             stored=np.diff(self.stored_at), **self.accounts)


class _ProbeGather:
    """The probes' values from the free values ``x`` and the held values ``uD``."""

    def __init__(self, probes, free, held, u0):
        v = probes.vertices
        self.weights = probes.weights
        self.in_free = np.isin(v, free)
        self.in_held = np.isin(v, held)
        order = np.argsort(free, kind="stable")  # free may be renumbered: not sorted
        self.pos_free = order[np.searchsorted(free[order], v).clip(max=max(free.size - 1, 0))] \
            if free.size else np.zeros_like(v)
        self.pos_held = np.searchsorted(held, v).clip(max=max(held.size - 1, 0))
        self.fixed = np.where(self.in_free | self.in_held, 0.0, u0[v])

    def values(self, x, uD):
        u = self.fixed.copy()
        if x.size:
            u = np.where(self.in_free, x[self.pos_free], u)
        if uD.size:
            u = np.where(self.in_held, uD[self.pos_held], u)
        return (u * self.weights).sum(axis=1)
