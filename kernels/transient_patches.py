"""Time stepping on a never-stored refined mesh: the theta scheme of
:func:`hatkernels.transient.solve_transient` on the patches of :mod:`hatkernels.patches`.

A coarse triangle mesh refined ``k`` times is kept as the coarse mesh and vectors
(docs/patches.md).  In 2-D the P1 mass matrix of a triangle depends on its area
alone, and every fine triangle of a patch has the coarse cell's area over
``4**k``: so ``M + tau K`` is one 7-point stencil per coarse cell, like ``K``
(:func:`hatkernels.patches.multigrid.element_mass`), and each level of the
multigrid carries its own rediscretised ``M / tau + K`` (for nested P1 spaces the
Galerkin product).  A step is the one of :mod:`hatkernels.transient_steps`: for
the change ``d`` of u,

    (M + tau K) d = h (b - K u^n)    (held rows: d = 0; a change of the held values
                                      in the first step lifted as in the stored path)

with ``tau = theta h``, CG with the patch multigrid started from the projection
of ``d`` onto the last changes (:class:`~hatkernels.transient_steps.StartSpace`).

The path takes data constant in time: a coefficient and a capacity that are numbers or
``{region: number}``, a source that is a number, a callable ``f(x, y)`` or
``{region: number or callable}``, held values and fluxes that are numbers or
``{tag: number}`` on whole coarse sides, and ``u0`` as a number, a callable ``u0(x, y)``
or one value per point of the refined mesh.  Time-dependent data, reactions,
convection and probes take :func:`~hatkernels.transient.solve_transient` on the
stored refinement.  The heat balance is the stored path's: the heat out through the
held points from the held rows of the discrete equations, with the weights
``M 1_D`` and ``K 1_D`` (two products, once) and two dot products per step.

CAUTION: results are engineering estimates and must be checked by a qualified
person against local codes and licensed practice.
"""

from __future__ import annotations

import dataclasses
import time
import warnings

import numba
import numpy as np

from hatkernels import _cg
from hatkernels._jit import patch_points as _pp
from hatkernels._jit import patches as _p
from hatkernels._jit import sparse as _k
from hatkernels.coefficients import parse_coefficient
from hatkernels.errors import ConvergenceError, InputError
from hatkernels.krylov import _check_scalars, _operator
from hatkernels.patches.layout import PatchLayout, RefinedMeshOnDemand
from hatkernels.patches.load import callable_load
from hatkernels.patches.multigrid import (
    FinestSmoother,
    PatchMultigrid,
    PatchOperator,
    element_mass,
    element_stiffness,
)
from hatkernels.patches.solution import per_coarse_cell
from hatkernels.patches.solve import (
    _add_flux,
    _flux,
    _held,
    _is_number,
    _lifting,
    _numbers_by_key,
    patch_path_reason,
)
from hatkernels.perf import peak_rss_bytes
from hatkernels.problem import PoissonProblem
from hatkernels.transient_data import InTime, initial_array
from hatkernels.transient_results import EnergyBalance, TransientSolution, TransientStats
from hatkernels.transient_steps import (
    SMOOTHER_ITERATIONS,
    START_SPACE,
    StartSpace,
    _schedule,
    _start,
    march_options,
    smoother_first,
)

__all__ = ["PatchMarch", "PatchTransientSolution", "march_on_patches",
           "transient_patch_reason"]

#: Coarse cells per block when ``u0`` is evaluated at the fine points.
_BLOCK_CELLS = 256

#: Bytes per fine point of a march beyond the outputs (8 bytes per point each): u, the
#: load, the right-hand side and the guess, CG's five vectors, the start space's eight,
#: the last two changes, the multigrid's work vectors and coarser levels.  Measured 173 to
#: 207 at the peak (bench/transient.py --patches, docs/patches.md), with a margin.
BYTES_PER_POINT = 224


@dataclasses.dataclass
class PatchMarch:
    """What :func:`march_on_patches` computed.

    Attributes
    ----------
    times : ndarray
    values : ndarray, shape (len(times), n_fine)
        u at the output times in the patch layout (every fine point once).
    layout : PatchLayout
    stats : TransientStats
    balance : EnergyBalance
        Heat per output interval (as :meth:`TransientSolution.energy
        <hatkernels.TransientSolution.energy>`).
        ``product_seconds`` is NaN (no assembled matrix defines a work unit here;
        ``bench/transient.py --patches`` times one on the stored refinement).
    """

    times: np.ndarray
    values: np.ndarray
    layout: PatchLayout
    stats: TransientStats
    balance: EnergyBalance = None

    def energy(self):
        """The :class:`~hatkernels.transient.EnergyBalance` per output interval."""
        return self.balance

    @property
    def u(self):
        """u at the output times in the numbering of ``coarse.refine()`` repeated ``k``
        times, made on use (one more array of the size of :attr:`values`)."""
        out = np.empty_like(self.values)
        for v, row in zip(self.values, out, strict=True):
            self.layout.to_refined(v, out=row)
        return out

    def patch(self, cell, i=-1):
        """``(lam, values)`` of coarse ``cell`` at output ``i`` (see
        :meth:`PatchLayout.patch`)."""
        return self.layout.patch(self.values[i], cell)


def _timed(v):
    return any(isinstance(x, InTime) for x in (v.values() if isinstance(v, dict) else [v]))


def transient_patch_reason(mesh, refine, *, u0=0.0, probes=None, capacity=1.0, f=0.0,
                           dirichlet=0.0, dirichlet_on=None, coefficient=None, reaction=None,
                           neumann=None, robin=None, options=None):
    """None when :func:`~hatkernels.solve_transient` with ``refine`` and no preconditioner
    named marches on the never-stored refinement (:func:`march_on_patches`), else why
    not (one sentence)."""
    if getattr(mesh, "dim", None) == 3:
        return "time steps on patches take triangle meshes (tetrahedra: the stored path)"
    for name, v in (("u0", u0), ("f", f), ("dirichlet", dirichlet), ("neumann", neumann),
                    ("capacity", capacity), ("coefficient", coefficient)):
        if _timed(v):
            return f"{name} changes in time"
    if probes is not None:
        return "probes are read on the stored mesh"
    reason = patch_path_reason(mesh, refine, f=f, dirichlet=dirichlet, dirichlet_on=dirichlet_on,
                               coefficient=coefficient, reaction=reaction, neumann=neumann,
                               robin=robin, options=options)
    if reason is not None:
        return reason
    if not (_is_number(capacity) or _numbers_by_key(capacity)):
        return "capacity is not a number or {region: number}"
    return None


class PatchTransientSolution(RefinedMeshOnDemand, TransientSolution):
    """A :class:`~hatkernels.TransientSolution` marched on the never-stored refinement:
    ``u`` in the numbering of ``mesh.refine()`` repeated ``k`` times, the heat balance,
    ``stats`` (``product_seconds`` NaN: no assembled matrix defines a work unit), and
    ``mesh`` and ``problem`` built on first use (they cost what the path saves)."""

    def __init__(self, march, problem_args):
        self._args = problem_args
        self._mesh = self._problem = None
        self.layout = march.layout
        u = march.values  # renumbered in place, one row at a time: no second array
        for i in range(u.shape[0]):
            u[i] = march.layout.to_refined(u[i])
        march.values = None
        super().__init__(march.times, u, march.stats, None, None, _energy=march.balance)

    @property
    def problem(self):
        if self._problem is None:
            from hatkernels.transient_data import TransientProblem

            args = dict(self._args)
            f = args.pop("f")
            self._problem = TransientProblem(self.mesh, f, **args)
        return self._problem

    @problem.setter
    def problem(self, value):
        self._problem = value

    def __repr__(self):
        return (f"TransientSolution({len(self.times)} times up to {self.times[-1]:.6g}, "
                f"{self.stats.unknowns} points, {self.stats.steps} steps, on patches)")


def _refuse_timed(**data):
    for name, v in data.items():
        items = v.values() if isinstance(v, dict) else [v]
        if any(isinstance(x, InTime) for x in items):
            raise InputError(f"{name}: the patch path takes data constant in time; "
                             f"in_time data take solve_transient on the stored refinement")


def fine_values(layout, fn, what="u0"):
    """``fn(x, y)`` at every fine point of ``layout``'s finest level, in its layout:
    each block of coarse cells evaluates its lattices (points on shared sides are
    written by every cell holding them, with the same value up to the rounding of
    their coordinates; the last cell wins)."""
    k, coarse = layout.k, layout.coarse
    n = 2**k
    size = layout.size(k)
    index = np.arange(size, dtype=np.float64)  # exact below 2**53
    lam = np.array([(n - i - j, i, j) for j in range(n + 1) for i in range(n + 1 - j)],
                   dtype=np.float64) / n
    corners = coarse.points[coarse.triangles]  # (m, 3, 2)
    out = np.empty(size)
    for lo in range(0, layout.n_cells, _BLOCK_CELLS):
        cells = np.arange(lo, min(layout.n_cells, lo + _BLOCK_CELLS), dtype=np.int64)
        where = np.empty((cells.size, lam.shape[0]))
        _pp.gather_patches(index, cells, n, layout.topo, where)
        xy = np.einsum("pr,crd->dcp", lam, corners[cells])
        try:
            v = np.asarray(fn(xy[0], xy[1]), dtype=np.float64)
        except Exception as exc:
            raise InputError(f"{what}(x, y) raised {type(exc).__name__}: {exc}") from exc
        if v.ndim and v.shape != where.shape:
            raise InputError(f"{what}(x, y) returned shape {v.shape} for points of shape "
                             f"{where.shape} (coarse cells {int(cells[0])} to "
                             f"{int(cells[-1])}); it must return one value per point")
        v = np.broadcast_to(v, where.shape)
        bad = ~np.isfinite(v)
        if bad.any():
            c, p = np.argwhere(bad)[0]
            raise InputError(f"{what}(x, y) is {float(v[c, p])!r} at ({xy[0, c, p]:.6g}, "
                             f"{xy[1, c, p]:.6g}) in coarse cell {int(cells[c])}; it must be "
                             f"finite")
        out[where.astype(np.int64).ravel()] = v.ravel()
    return out


def _initial(layout, u0):
    size = layout.size(layout.k)
    if callable(u0):
        return fine_values(layout, u0)
    v = initial_array(u0, size, "of the refined mesh")
    bad = np.flatnonzero(~np.isfinite(v))
    if bad.size:
        raise InputError(f"u0 is {float(v[bad[0]])!r} at point {int(bad[0])} of the refined "
                         f"mesh; it must be finite")
    return layout.from_refined(np.asarray(v, dtype=np.float64))


def _check_memory(size, n_outputs):
    from hatkernels.memory import available_bytes

    need = size * (BYTES_PER_POINT + 8 * n_outputs)
    have = available_bytes()
    if have is not None and need > have:
        raise InputError(
            f"not enough memory: march_on_patches on {size:,} fine points with {n_outputs} "
            f"output times needs about {need / 2**30:.1f} GiB ({BYTES_PER_POINT} bytes per "
            f"point and 8 per output time), but {have / 2**30:.1f} GiB are available; refine "
            f"less, ask for fewer output times, or pass memory_check=False to try anyway")


class _System:
    """``M + tau K`` on the finest level (held rows out), its multigrid and start space."""

    def __init__(self, layout, kappa, capacity, stiffness, tau, lumped, degree):
        k = layout.k
        E = tau * stiffness + element_mass(layout.coarse, capacity, k, lumped)
        self.A = PatchOperator(layout, E, k)
        self.A_full = PatchOperator(layout, E, k, masked=False)
        # the multigrid of M / tau + K, the same operator up to the factor tau
        self.P = PatchMultigrid(layout, kappa, degree=degree, sigma=capacity / tau,
                                lumped=lumped)
        self.product, n = _operator(self.A)
        self.M = _cg.as_preconditioner(self.P, n)
        self.space = StartSpace(n, START_SPACE)
        self.S = FinestSmoother(self.P)

    def matvec(self, v, out):
        self.A.matvec_into(v, out)


def march_on_patches(coarse, u0, times, *, dt, refine, capacity=1.0,
                     scheme="crank-nicolson", startup=4, lumped=False, f=0.0, dirichlet=0.0,
                     dirichlet_on=None, coefficient=None, neumann=None, rtol=1e-6, atol=0.0,
                     maxiter=None, check=False, quadrature=2, monitor=None, degree=2,
                     memory_check=True):
    """March ``capacity du/dt - div(kappa grad u) = f`` on ``coarse`` refined ``refine``
    times without storing the refined mesh; u at ``times``.

    The arguments are those of :func:`hatkernels.transient.solve_transient` (the
    data this path takes: see the module notes); ``degree`` is the multigrid's
    Chebyshev degree.  Returns a :class:`PatchMarch`.  Memory per fine point: about
    26 vectors (the outputs, u, the load, CG's five, the start space's eight, the two
    last changes, the multigrid's work) plus 8 bytes per output time;
    ``memory_check`` refuses, before allocating, a march whose estimate
    (``BYTES_PER_POINT`` bytes per point) does not fit in the memory available.
    """
    t_start = time.perf_counter()
    _refuse_timed(f=f, dirichlet=dirichlet, neumann=neumann, capacity=capacity,
                  coefficient=coefficient, u0=u0)
    reason = transient_patch_reason(coarse, refine, f=f, dirichlet=dirichlet,
                                    dirichlet_on=dirichlet_on, coefficient=coefficient,
                                    neumann=neumann)
    if reason is not None:
        raise InputError(f"march_on_patches cannot take this problem: {reason}")
    dt, times, theta, startup = march_options(dt, times, scheme, startup, lumped)
    if monitor is not None and not callable(monitor):
        raise InputError(f"monitor must be callable, got {type(monitor).__name__}")
    schedule = _schedule(times, dt, theta, startup)
    problem = PoissonProblem(coarse, f, dirichlet=dirichlet, dirichlet_on=dirichlet_on,
                             coefficient=coefficient, neumann=neumann, quadrature=quadrature)
    m, k = coarse.n_triangles, int(refine)
    n = 2**k
    kappa = per_coarse_cell(problem.coefficient, m, "coefficient")
    cap = per_coarse_cell(parse_coefficient(capacity, coarse, name="capacity", sign="positive"), m,
                    "capacity")
    sides, side_values = _held(coarse, problem, dirichlet)
    layout = PatchLayout(coarse, k, held_sides=sides)
    size = layout.size(k)
    if memory_check:
        _check_memory(size, len(times))
    rtol, atol, maxiter = _check_scalars(rtol, atol, maxiter, size, None)
    x = _initial(layout, u0)

    t = time.perf_counter()
    b = np.zeros(size)
    if problem.source.kind == "callable":
        callable_load(layout, problem.source, quadrature, b)
    else:
        source = per_coarse_cell(problem.source, m, "f")
        if np.any(source):
            corner = coarse.points[coarse.triangles]
            d1, d2 = corner[:, 1] - corner[:, 0], corner[:, 2] - corner[:, 0]
            area = 0.5 * np.abs(d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0])
            pe, pv = layout.buffers(k)
            _p.load(source * area / (3.0 * n * n), b, n, layout.topo, pe, pv)
    source_total = float(b.sum())  # every point's load: the heat the source puts in
    flux = _flux(layout, problem, neumann)
    if flux is not None:
        _add_flux(layout, flux, b)
    flux_total = float(b.sum()) - source_total
    stiffness = element_stiffness(coarse, kappa)
    K = PatchOperator(layout, stiffness, k, masked=False)
    # the held values: u0 there is replaced over the first step, as the stored path does
    g = _lifting(layout, sides, side_values, problem)
    lift = layout.copy_held(x, np.zeros(size))  # u0 at the held points, 0 elsewhere
    if g is not None:
        lift = g - lift
    else:
        np.negative(lift, out=lift)
    lift = lift if np.any(lift) else None
    # the heat balance: stored 1^T M u = (M 1) . u; out through the held rows:
    # -(1_D^T M d + h (1_D^T K (u + theta d) - 1_D^T b)) per step
    mass = PatchOperator(layout, element_mass(coarse, cap, k, lumped), k, masked=False)
    held_ones = layout.copy_held(np.ones(size), np.zeros(size))
    w_stored = mass @ np.ones(size)
    w_mass, w_stiff = mass @ held_ones, K @ held_ones
    # both weights are 0 but at the held points and their neighbours: the balance's dots
    # run over those alone (a few points per held coarse side), not over every point
    near = np.flatnonzero((w_mass != 0.0) | (w_stiff != 0.0))
    w_mass, w_stiff = w_mass[near], w_stiff[near]
    b_held = float(_k.dot(held_ones, b))
    del held_ones
    timings = {"assemble": time.perf_counter() - t, "setup": 0.0}

    systems, built = {}, 0
    n_steps = len(schedule)
    iterations = np.zeros(n_steps, dtype=np.int64)
    smoothed = np.zeros(n_steps, dtype=np.int64)
    step_seconds = np.zeros(n_steps)
    values = np.empty((len(times), size))
    n_out = len(times)
    accounts = {key: np.zeros(n_out) for key in ("sources", "flux_in", "held_out")}
    stored_at = np.zeros(n_out + 1)
    stored_at[0] = _k.dot(w_stored, x)
    interval = 0
    if times[0] == 0.0:
        values[0] = x
        stored_at[1] = stored_at[0]
        interval = 1
    rhs, x0_buf = np.empty(size), np.empty(size)
    work = _cg.Workspace()  # CG's vectors, kept from step to step
    kept = (np.empty(size), np.empty(size))  # the last two changes
    prev = prev2 = h_prev = h_prev2 = None
    failed, message, description, stored = 0, "", "", 0
    for i, (t0, t1, th, out) in enumerate(schedule):
        h = t1 - t0
        tau = th * h
        key = float(f"{tau:.12g}")
        s = systems.pop(key, None)
        if s is None:
            t = time.perf_counter()
            s = _System(layout, kappa, cap, stiffness, tau, lumped, degree)
            timings["setup"] += time.perf_counter() - t
            built += 1
            description = s.P.description
            if len(systems) >= 2:
                systems.pop(next(iter(systems)))  # the least recently used
        systems[key] = s
        stored = max(stored, sum(kept_system.P.memory_bytes + kept_system.space.nbytes
                                 for kept_system in systems.values()))
        start = time.perf_counter()
        K.matvec_into(x, rhs)  # rhs = h (b - K u)
        _k.xpby(b, -1.0, rhs)
        rhs *= h
        if lift is not None:
            rhs -= s.A_full @ lift
        layout.zero_held(rhs)
        x0, result = s.space.guess(rhs, x0_buf), None
        if x0 is None:
            x0 = _start(prev, h_prev, prev2, h_prev2, h, x0_buf)
        elif SMOOTHER_ITERATIONS:  # what a projected start misses, the smoother removes
            result, x0, smoothed[i] = smoother_first(s.product, s.S, rhs, x0, rtol, atol,
                                                     maxiter, work)
        if result is None:
            result = _cg.run(s.product, rhs, x0, s.M, _cg.LOCAL, rtol=rtol, atol=atol,
                             maxiter=maxiter - int(smoothed[i]), work=work)
            iterations[i] = result.iterations
        d = result.x  # the workspace's: copied below where kept
        if result.info != 0:
            failed += 1
            text = f"step {i + 1} (t = {t0:.6g} to {t1:.6g}): {result.message}"
            message = message or text
            if check:
                raise ConvergenceError(f"march_on_patches: {text}")
        if result.iterations:  # A d = rhs - r: no product
            s.space.add(d, s.matvec, rhs, result.residual)
        d_near = d[near]
        md, kd = _k.dot(w_mass, d_near), _k.dot(w_stiff, d_near)  # the change's held rows
        x += d
        if lift is not None:  # the held values' change in the first step
            lift_near = lift[near]
            md, kd = md + _k.dot(w_mass, lift_near), kd + _k.dot(w_stiff, lift_near)
            x += lift
            lift = None
        ku = _k.dot(w_stiff, x[near]) - (1.0 - th) * kd  # 1_D^T K (u + theta d), u the old
        accounts["held_out"][interval] -= md + h * (ku - b_held)
        accounts["sources"][interval] += h * source_total
        accounts["flux_in"][interval] += h * flux_total
        prev2, h_prev2, prev, h_prev = prev, h_prev, kept[i % 2], h
        prev[:] = d
        step_seconds[i] = time.perf_counter() - start
        if out >= 0:
            values[out] = x
            stored_at[out + 1] = _k.dot(w_stored, x)
            interval = out + 1
        if monitor is not None:
            monitor(i + 1, n_steps, t1, int(result.iterations))
    timings["steps"] = float(step_seconds.sum())
    timings["total"] = time.perf_counter() - t_start
    label = scheme if theta == 1.0 or not startup else \
        f"{scheme} with {startup} backward-euler half steps (Rannacher start-up)"
    stats = TransientStats(
        steps=n_steps, iterations=iterations, smoother_iterations=smoothed,
        step_seconds=step_seconds,
        product_seconds=float("nan"), converged=failed == 0, failed_steps=failed,
        timings=timings, unknowns=size, nnz=0, stored_bytes=int(stored),
        preconditioner=description or "none (no step)", systems=built, scheme=label,
        rtol=rtol, peak_rss_bytes=peak_rss_bytes(), threads=numba.get_num_threads(),
        message=message or f"{n_steps} steps converged")
    if failed and not check:
        warnings.warn(f"march_on_patches: {failed} of {n_steps} steps did not converge; the "
                      f"first: {message}", RuntimeWarning, stacklevel=2)
    starts = np.concatenate([[0.0], times[:-1]])
    zeros = np.zeros(n_out)
    balance = EnergyBalance(start=starts, end=times.copy(), stored=np.diff(stored_at),
                            convection_out=zeros, absorbed=zeros.copy(), **accounts)
    return PatchMarch(times, values, layout, stats, balance)
