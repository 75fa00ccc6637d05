"""``hatkernels solve --until T``: the transient mode, heat-up from a uniform temperature.

The built-in plate (default), ``--scenario block``, ``--mesh FILE`` and problem
files with a ``[time]`` table (or with ``--until``) are marched in time by
:func:`hatkernels.transient.solve_transient`::

    rho c dT/dt - div(k grad T) = q,      T = T0 everywhere at t = 0,

with the steady mode's sources and boundary conditions, constant from t = 0
on: the plate's components (the block's heat sources) switch on at t = 0 and
the body heats up from the coolant temperature.  This module holds the
options (:func:`add_options`, :func:`check`), turns the options or the file
into one :class:`Case`, and runs it; :mod:`hatkernels.cli.transient_report`
writes the files and the report.  One process only: under ``mpiexec`` with
more than one rank the mode is refused.
"""

from __future__ import annotations

import dataclasses
import inspect
import math
import os
import re
import textwrap
import time
import warnings

import numpy as np

from hatkernels import io as kio
from hatkernels.block import BLOCK
from hatkernels.cli.common import command_line, threads
from hatkernels.cli.options import UsageError, number
from hatkernels.cli.problem import (
    REFINE_HINT,
    build_mesh,
    make_problem,
    needs_refinement,
    read_mesh_option,
    refined,
)
from hatkernels.cli.progress import ITERATION_REPORT_SECONDS, CompileNotice
from hatkernels.cli.summary import file_record
from hatkernels.cli.transient_report import report, summary_record, write_files
from hatkernels.coefficients import per_cell
from hatkernels.distributed.launch import ranks_from_environment
from hatkernels.errors import ConvergenceError, InputError
from hatkernels.mesh import cuboid, rectangle
from hatkernels.problemfile import TimeSettings
from hatkernels.scenarios import PLATE
from hatkernels.transient import SCHEMES, solve_transient
from hatkernels.transient_probes import locate

__all__ = ["Case", "StepReport", "add_options", "check", "run", "run_file"]

#: Steps up to ``--until`` when ``--step`` is not given.
DEFAULT_STEPS = 100
#: Output times after t = 0 when neither ``--outputs`` nor the file says.
DEFAULT_OUTPUTS = 10
#: The schemes, the default first.
SCHEME_NAMES = ("crank-nicolson", *(s for s in SCHEMES if s != "crank-nicolson"))
#: Each step's CG tolerance when neither ``--rtol`` nor the file says: the library's default.
STEP_RTOL = inspect.signature(solve_transient).parameters["rtol"].default
#: The options of the transient mode besides ``--until``: (dest, flag).
TIME_OPTIONS = (("step", "--step"), ("outputs", "--outputs"), ("scheme", "--scheme"),
                ("initial", "--initial"), ("capacity", "--capacity"), ("probe", "--probe"))


def _point(text):
    """``X,Y`` or ``X,Y,Z`` as a tuple of finite numbers (an argparse type)."""
    import argparse

    parts = text.split(",")
    try:
        values = tuple(float(p) for p in parts)
    except ValueError:
        values = ()
    if len(values) not in (2, 3) or not all(math.isfinite(v) for v in values):
        raise argparse.ArgumentTypeError(f"expected a point X,Y or X,Y,Z (finite numbers), got "
                                         f"{text!r}")
    return values


def add_options(parser):
    """The transient mode's options, in a group of their own."""
    g = parser.add_argument_group("transient mode (heat-up in time; one process)", textwrap.fill(
        "--until T marches rho c dT/dt - div(k grad T) = q from T0 everywhere at t = 0 (the "
        "sources switch on at t = 0) and writes series.pvd with one .vtu per output time, "
        "probes.csv, probes.png, solution.npz (the end time) and summary.json; a problem "
        "file with a [time] table does the same without --until, and these options override "
        "its values.", 79))
    number(parser, "--until", float, group=g, positive=True, metavar="T",
           help="march up to T seconds (transient mode)")
    number(parser, "--step", float, group=g, positive=True, metavar="DT",
           help=f"the largest time step, s (default T/{DEFAULT_STEPS}); each output interval "
                f"is cut into equal steps of at most DT")
    number(parser, "--outputs", int, group=g, minimum=1, metavar="N",
           help=f"N evenly spaced output times up to T, besides t = 0 (default "
                f"{DEFAULT_OUTPUTS})")
    g.add_argument("--scheme", choices=SCHEME_NAMES,
                   help="time stepping (default crank-nicolson, started with backward Euler "
                        "half steps: Rannacher's start-up)")
    number(parser, "--initial", float, group=g, metavar="T0",
           help="initial temperature everywhere, degC (default: the coolant temperature of "
                "the plate or the block, the held value G with --mesh; a problem file's "
                "[time] initial)")
    number(parser, "--capacity", float, group=g, positive=True, metavar="C",
           help="volumetric heat capacity rho c, J/(m^3 K) (default: the plate's aluminium "
                "2702 x 903, the block's copper 8933 x 385; 1 with --mesh; a problem file's "
                "density x specific_heat per region)")
    g.add_argument("--probe", action="append", type=_point, metavar="X,Y[,Z]",
                   help="record the temperature at this point after every step (repeatable; "
                        "mm on the plate and the block, the mesh file's units with --mesh, "
                        "a problem file's length_unit; default: the components' or heat "
                        "sources' centres, a problem file's [time.probes])")


def check(args, prog):
    """The transient options that do not go together; UsageError naming the option."""
    given = [flag for dest, flag in TIME_OPTIONS if getattr(args, dest) is not None]
    if args.until is None:
        if given and args.problem_file is None:
            raise UsageError(f"{given[0]} applies to the transient mode only: give --until T "
                             f"(seconds) (see '{prog} --help')")
        return
    if ranks_from_environment() > 1:
        raise UsageError(f"the transient mode (--until) runs in one process; run it without "
                         f"mpiexec (see '{prog} --help')")


@dataclasses.dataclass
class Case:
    """One transient problem, ready to march: what the scenario or the file says, with the
    command line's overrides applied.

    ``settings`` holds the schedule and the probes (points in mesh coordinates);
    ``arguments`` the problem's keyword arguments of :func:`solve_transient`;
    ``capacity`` ``rho c`` (a number or one value per cell); coordinates are shown
    times ``length_scale`` in ``length_unit``; energies times ``energy_scale`` (a
    plate's thickness) are in ``energy_unit``; ``cell`` holds cell arrays for the
    files; ``record`` the problem for summary.json.
    """

    title: str
    statement: list
    mesh: object
    description: str
    arguments: dict
    capacity: object
    settings: TimeSettings
    length_scale: float = 1.0
    length_unit: str = ""
    quantity: str = "u"
    unit: str = ""
    energy_scale: float = 1.0
    energy_unit: str = ""
    cell: dict = dataclasses.field(default_factory=dict)
    record: dict = dataclasses.field(default_factory=dict)
    outlines: tuple = ()
    power: float | None = None


def _probe_names(points, length_unit):
    unit = f" {length_unit}" if length_unit else ""
    return ["(" + ", ".join(f"{v:g}" for v in p) + f"){unit}" for p in points]


def _given_probes(args, scale, unit, dim):
    """The ``--probe`` points as ``((name, point in mesh coordinates), ...)``."""
    for p in args.probe:
        if len(p) != dim:
            raise UsageError(f"--probe {','.join(f'{v:g}' for v in p)}: {len(p)} coordinates "
                             f"on a {dim}-D mesh; give {'X,Y' if dim == 2 else 'X,Y,Z'}")
    names = _probe_names(args.probe, unit)
    return tuple((n, tuple(v / scale for v in p)) for n, p in zip(names, args.probe,
                                                                  strict=True))


def _transient_words(line):
    """A steady statement line with the transient equation in place of the steady one."""
    line = re.sub(r"steady (in-plane )?conduction -div\(k grad T\) = q",
                  r"\1conduction rho c dT/dt - div(k grad T) = q", line)
    return line.replace("-div(k grad u) = Q", "C du/dt - div(k grad u) = Q")


def scenario_case(args, progress, arrays):
    """The plate, the block or a ``--mesh`` problem as a :class:`Case`."""
    mesh, description = build_mesh(args, progress, arrays)
    problem = make_problem(args, mesh, description)
    if problem.cooling is None:
        arguments = {"dirichlet": problem.dirichlet, "dirichlet_on": "boundary"}
        coolant = problem.dirichlet
    else:
        c = problem.cooling
        arguments = {"robin": (c.sides, c.film, c.film * c.coolant)}
        coolant = c.coolant
    for key, value in (("f", problem.source), ("coefficient", problem.conductivity)):
        arguments[key] = value if np.ndim(value) == 0 else per_cell(value)
    scale, unit = problem.length_scale, problem.length_unit
    if args.probe is not None:
        probes = _given_probes(args, scale, unit, mesh.dim)
    else:  # the components' or heat sources' centres
        probes = tuple((c.name, tuple(c.center) if hasattr(c, "center") else
                        tuple(0.5 * (c.bounds[2 * k] + c.bounds[2 * k + 1]) for k in range(3)))
                       for c in problem.components)
    initial = coolant if args.initial is None else args.initial
    settings = TimeSettings(
        end=args.until, step=args.until / DEFAULT_STEPS if args.step is None else args.step,
        initial=initial, outputs=args.outputs or DEFAULT_OUTPUTS,
        scheme=args.scheme or SCHEME_NAMES[0], probes=probes)
    statement = [_transient_words(s) for s in problem.statement]
    word = "temperature" if problem.unit else "value"
    u = f" {problem.unit}" if problem.unit else ""
    origin = ("given by --initial" if args.initial is not None else
              "the coolant temperature" if problem.unit else "the held value G")
    on = "; the sources switch on at t = 0" if np.any(problem.source_array()) else ""
    statement.append(f"initial {word} {initial:g}{u} everywhere at t = 0 ({origin}){on}")
    if args.capacity is not None:
        capacity, origin = args.capacity, "given by --capacity"
    elif problem.capacity is not None:
        material = ("pure copper", BLOCK) if mesh.dim == 3 else ("pure aluminium", PLATE)
        capacity = problem.capacity
        origin = (f"{material[0]} at 300 K, {material[1].density:g} kg/m^3 x "
                  f"{material[1].specific_heat:g} J/(kg K); Incropera and DeWitt, "
                  f"Fundamentals of Heat and Mass Transfer, table A.1; values from memory")
    else:
        capacity, origin = 1.0, "default; units those of the mesh file"
    cu = " J/(m^3 K)" if problem.unit else ""
    statement.append(f"heat capacity rho c = {capacity:.6g}{cu} ({origin})")
    record = {"name": problem.name, "statement": statement,
              "conductivity": float(problem.conductivity),
              "source": ("per cell, from the components" if np.ndim(problem.source)
                         else float(problem.source)),
              "dirichlet_value": problem.dirichlet, "thickness": problem.thickness,
              "capacity": capacity, "capacity_origin": origin,
              "components": [{"name": c.name, "power": c.power} for c in problem.components]}
    if problem.cooling is not None:
        c = problem.cooling
        record["cooling"] = {"where": c.where, "film": c.film, "coolant": c.coolant}
    plate = problem.thickness is not None
    return Case(
        title=statement[0], statement=statement[1:], mesh=mesh, description=description,
        arguments=arguments, capacity=capacity, settings=settings, length_scale=scale,
        length_unit=unit, quantity=problem.quantity, unit=problem.unit,
        energy_scale=problem.thickness or 1.0,
        energy_unit="J" if problem.unit else "",
        cell={"source": problem.source_array()}, record=record,
        outlines=tuple((c.name, c.bounds) for c in problem.components) if plate else (),
        power=problem.total_power() if problem.unit else None)


def file_settings(args, pf):
    """The file's ``[time]`` table with the command line's overrides, or None for a steady
    run; UsageError for options that need a time table the file lacks."""
    t = pf.time
    if t is None:
        if args.until is None:
            given = [flag for dest, flag in TIME_OPTIONS if getattr(args, dest) is not None]
            if given:
                raise UsageError(f"{given[0]} applies to the transient mode only: the problem "
                                 f"file has no [time] table; give --until T (seconds)")
            return None
        if args.initial is None:
            raise UsageError(f"--until on a problem file without a [time] table needs "
                             f"--initial T0 (degC), the temperature everywhere at t = 0 "
                             f"({pf.path})")
        t = TimeSettings(end=args.until, step=args.until / DEFAULT_STEPS, initial=args.initial,
                         outputs=DEFAULT_OUTPUTS)
    changes = {k: getattr(args, a) for k, a in (("end", "until"), ("step", "step"),
                                                ("initial", "initial"), ("outputs", "outputs"),
                                                ("scheme", "scheme"))
               if getattr(args, a) is not None}
    if isinstance(t.outputs, tuple) and "outputs" not in changes and "end" in changes:
        late = [v for v in t.outputs if v > changes["end"]]
        if late:
            raise UsageError(f"--until {changes['end']:g} comes before the file's output time "
                             f"{late[0]:g} s ([time] outputs); give --outputs N as well")
    if args.probe is not None:
        changes["probes"] = _given_probes(args, 1.0 / pf.scale, pf.length_unit, pf.mesh.dim)
    return dataclasses.replace(t, **changes)


def file_case(args, pf, settings, progress):
    """A problem file as a :class:`Case` (``settings``: from :func:`file_settings`)."""
    mesh = refined(pf.mesh, args.refine, progress, getattr(args, "memory_check", True))
    if args.capacity is None:
        capacity = pf.capacity_per_cell(mesh)  # InputError naming a material without rho, c
    else:
        capacity = np.full(mesh.n_cells, float(args.capacity))
    equation = "transient conduction rho c dT/dt - div(k grad T) = q"
    record = file_record(pf, mesh, args.refine, equation)
    for m, entry in zip(pf.materials, record["materials"], strict=True):
        entry.update(density=m.density, specific_heat=m.specific_heat, capacity=m.capacity)
    if args.capacity is not None:
        record["capacity"] = float(args.capacity)
    statement = list(record["statement"])
    statement.append(f"initial temperature {settings.initial:g} degC everywhere at t = 0; the "
                     f"sources and the boundary conditions act from t = 0 on")
    statement.append("heat capacity rho c = " + (
        f"{args.capacity:g} J/(m^3 K) in every region (given by --capacity)"
        if args.capacity is not None else
        ", ".join(f"{m.capacity:.6g} J/(m^3 K) ({m.name})" for m in pf.materials)
        + " (density x specific_heat of each material)"))
    if args.problem is None:  # a packaged file: say where it is, to start one's own from it
        statement.append(f"to start a problem of your own, copy {os.path.basename(pf.path)} "
                         f"and {os.path.basename(pf.mesh_path)} from "
                         f"{os.path.dirname(pf.path)}")
    record["statement"] = statement
    arguments = pf.solve_arguments()
    if "dirichlet" not in arguments:  # no held tag: hold nothing (not the whole boundary)
        arguments["dirichlet_on"] = np.empty(0, np.int64)
    flow = "J/m" if mesh.dim == 2 else "J"  # 2-D: per metre of thickness
    times = f", refined {args.refine} time{'s' if args.refine != 1 else ''}" if args.refine else ""
    return Case(
        title=pf.title, statement=statement, mesh=mesh,
        description=f"{pf.mesh_path} (lengths in {pf.length_unit}, scaled to metres){times}",
        arguments=arguments, capacity=per_cell(capacity), settings=settings,
        length_scale=1.0 / pf.scale, length_unit=pf.length_unit, quantity="temperature",
        unit="degC", energy_unit=flow,
        cell={"region": mesh.regions, "source": pf.source_per_cell(mesh), "capacity": capacity},
        record=record)


class StepReport:
    """A progress line every tenth of the steps, or after a second without one."""

    def __init__(self, progress, every=None):
        self.progress = progress
        self.every = ITERATION_REPORT_SECONDS if every is None else every
        self.last = time.perf_counter()

    def __call__(self, step, steps, t, iterations):
        now = time.perf_counter()
        if step == steps or step % max(1, steps // 10) == 0 or now - self.last >= self.every:
            self.last = now
            self.progress.phase(f"march: step {step} of {steps}, t = {t:.6g} s, "
                                f"{iterations} CG iterations")


def _warm_up(args, dim, refine, rtol):
    """A two-step march on a tiny mesh with data of every kind the real one has, so that the
    kernels compile (or load) before the phases are timed."""
    grid = rectangle(4, 4) if dim == 2 else cuboid(2, 2, 2)
    sides = grid.boundary_edges() if dim == 2 else grid.boundary_faces()
    right = sides[(grid.points[sides, 0] == 1.0).all(axis=1)]
    ones = per_cell(np.ones(grid.n_cells))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            solve_transient(grid, 0.0, [0.0, 0.2], dt=0.1, refine=1 if refine else 0, f=ones,
                            coefficient=ones, capacity=ones,
                            dirichlet=1.0, dirichlet_on=[0], robin=(right, 1.0, 1.0),
                            probes=[[0.5] * dim], preconditioner=args.preconditioner,
                            rtol=rtol, check=True)
    except (InputError, ConvergenceError):
        pass  # the real problem reports its own errors


def _rtol(args, pf=None):
    """Each step's tolerance: ``--rtol``, else the file's ``[solver] rtol``, else the library's
    default for a step."""
    if "rtol" in args.given or (pf is not None and pf.solver["rtol"] is not None):
        return args.rtol
    return STEP_RTOL


def _march(args, case, progress, rtol):
    s = case.settings
    times = np.concatenate([[0.0], s.output_times()])
    points = np.array([p for _, p in s.probes]) if s.probes else None
    if points is not None:  # outside the mesh: say it in the units the user gave
        for _, p in s.probes:
            try:
                locate(case.mesh, np.array([p]))
            except InputError:
                shown = [v * case.length_scale for v in p]
                unit = f" {case.length_unit}" if case.length_unit else ""
                raise InputError(f"--probe {','.join(f'{v:g}' for v in shown)}: the point "
                                 f"({', '.join(f'{v:g}' for v in shown)}){unit} is outside "
                                 f"the mesh (in no cell)") from None
    progress.phase(f"march: {s.scheme} up to t = {s.end:g} s, steps of at most {s.step:g} s")
    try:
        return solve_transient(
            case.mesh, s.initial, times, dt=s.step, capacity=case.capacity, scheme=s.scheme,
            probes=points, preconditioner=args.preconditioner, rtol=rtol, maxiter=args.maxiter,
            check=True, monitor=StepReport(progress),
            memory_check=getattr(args, "memory_check", True), **case.arguments), times
    except InputError as exc:
        if case.mesh.refinement is None and needs_refinement(args):
            raise InputError(f"{exc}{REFINE_HINT}") from exc
        raise


def _execute(args, progress, make_case, dim, pf=None):
    """Make the case inside the output directory, march, write, report."""
    command = command_line(args)
    rtol = _rtol(args, pf)
    timings = {}
    with kio.output_directory(args.out, force=args.force) as tmp, threads(args.threads):
        progress.phase("kernels: loading compiled kernels (or compiling them)")
        with CompileNotice(progress) as notice:
            _warm_up(args, dim, args.refine, rtol)
        t0 = time.perf_counter()
        case = make_case()
        timings["mesh"] = time.perf_counter() - t0
        sol, times = _march(args, case, progress, rtol)
        summary = summary_record(args, case, sol, timings, notice.seconds, command, rtol)
        progress.phase(f"write: series.pvd, probes.csv and summary.json into {args.out}")
        write_files(tmp, case, sol, summary, progress)
    progress.phase("done")
    progress.close()
    print(report(case, summary, args.out))
    return 0


def run(args, progress):
    """``hatkernels solve --until T`` on the plate, the block or a ``--mesh`` file."""
    arrays, dim = read_mesh_option(args, progress)
    if dim is None:
        dim = 3 if args.scenario == "block" else 2
    return _execute(args, progress, lambda: scenario_case(args, progress, arrays), dim)


def run_file(args, progress, pf, settings):
    """A problem file's transient run (``settings``: :func:`file_settings`; ``args`` already
    settled against the file)."""
    return _execute(args, progress, lambda: file_case(args, pf, settings, progress),
                    pf.mesh.dim, pf)
