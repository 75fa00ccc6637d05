"""The ``hatkernels`` command: solve, verify, bench and info, built on the library.

Exit codes: 0 success; 2 bad usage or bad input (unknown option, missing or
invalid mesh file, a NaN, an output directory that exists without
``--force``); 1 when a solve does not converge (or ``verify`` does not see
the expected rates), and for internal errors.  Errors are one line on
stderr, ``hatkernels: error: ...``; ``--debug`` adds the traceback.
Progress goes to stderr (``--quiet`` silences it); results to stdout.
"""

from __future__ import annotations

import argparse
import datetime
import importlib
import importlib.metadata
import json
import math
import os
import pkgutil
import platform
import shlex
import sys
import textwrap
import threading
import time
import traceback
import warnings

import numpy as np

from hatkernels import io as kio
from hatkernels.errors import ConvergenceError, InputError

__all__ = ["main", "build_parser"]

PROG = "hatkernels"
#: Seconds the first compiled call may take before it is announced as compiling.
SLOW_FIRST_CALL = 2.0
#: Preconditioners that need a mesh made by refinement (geometric multigrid).
NEEDS_REFINEMENT = ("gmg",)
#: Cold compile of the kernels a solve uses, measured on the development machine (2 cores).
COMPILE_ESTIMATE = 15
#: At most one progress line per this many seconds during the CG iterations.
ITERATION_REPORT_SECONDS = 1.0

SCENARIO_HELP = """\
The built-in scenario (invented demonstration data): a heat-spreader plate
120 mm x 80 mm, 2 mm thick, aluminium, conductivity 237 W/(m K) (pure
aluminium at 300 K; Incropera and DeWitt, Fundamentals of Heat and Mass
Transfer, table A.1; value from memory), under a 20 mm x 20 mm processor
dissipating 15 W centred at (40 mm, 45 mm) and a 15 mm x 10 mm voltage
regulator dissipating 5 W centred at (90 mm, 25 mm); all four edges held at
the coolant temperature 25 degC. Steady in-plane conduction
-div(k grad T) = q, q = P / (footprint area x thickness) in W/m^3, SI units.
The source is set per triangle and rescaled per component so that the
integrated power is exactly 15 W and 5 W on any mesh. The default mesh has
960 x 640 cells (0.125 mm, 1,228,800 triangles), which line up with the
footprints.

With --mesh FILE the problem is -div(k grad u) = Q on that mesh with u = G on
its whole boundary (constants --conductivity, --source, --dirichlet; default
1, 1, 0; units those of the file).

CAUTION: results are engineering estimates and must be checked by a
qualified person against local codes and licensed practice."""


class UsageError(Exception):
    """Bad command-line usage (exit 2)."""


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        raise UsageError(f"{message} (see '{self.prog} --help')")


# -- progress on stderr -------------------------------------------------------------


class Progress:
    """Phase lines on stderr, with the time since the command started.

    On a terminal the current line shows a running clock (rewritten with a
    carriage return); elsewhere each phase is one plain line.  ``quiet``
    silences phases and notes, never warnings.
    """

    def __init__(self, quiet=False, stream=None):
        self.quiet = quiet
        self.stream = stream if stream is not None else sys.stderr
        try:
            self.tty = self.stream.isatty()
        except (AttributeError, ValueError):
            self.tty = False
        self.t0 = time.perf_counter()
        self._lock = threading.Lock()
        self._line = None
        self._started = 0.0
        self._stop = None

    def _stamp(self):
        return f"[{time.perf_counter() - self.t0:7.1f} s]"

    def _write(self, text):
        try:
            self.stream.write(text)
            self.stream.flush()
        except (OSError, ValueError):
            pass

    def _end_line(self):
        """Finish the live terminal line, if any (lock held)."""
        if self._line is not None and self.tty:
            elapsed = time.perf_counter() - self._started
            self._write(f"\r{self._line}  {elapsed:.1f} s\x1b[K\n")
        self._line = None

    def _tick(self, stop):
        while not stop.wait(0.25):
            with self._lock:
                if self._line is None or stop.is_set():
                    return
                elapsed = time.perf_counter() - self._started
                self._write(f"\r{self._line}  {elapsed:.1f} s\x1b[K")

    def phase(self, text):
        if self.quiet:
            return
        with self._lock:
            self._end_line()
            if self._stop is not None:
                self._stop.set()
                self._stop = None
            line = f"{self._stamp()} {text}"
            if self.tty:
                self._line = line
                self._started = time.perf_counter()
                self._write(line)
                self._stop = threading.Event()
                threading.Thread(target=self._tick, args=(self._stop,), daemon=True).start()
            else:
                self._write(line + "\n")

    def note(self, text, *, always=False):
        if self.quiet and not always:
            return
        with self._lock:
            if self._line is not None and self.tty:
                self._write("\r\x1b[K")
            self._write(f"{PROG}: {text}\n")
            if self._line is not None and self.tty:
                self._write(self._line)

    def warning(self, message, category=None, filename=None, lineno=None, file=None, line=None):
        """A ``warnings.showwarning`` replacement: one line, always shown."""
        text = " ".join(str(message).split())
        self.note(f"warning: {text}", always=True)

    def close(self):
        with self._lock:
            self._end_line()
            if self._stop is not None:
                self._stop.set()
                self._stop = None


# -- compiled kernels -------------------------------------------------------------


def _dispatchers():
    """The numba dispatchers of the library's kernel modules (imported, not compiled)."""
    import numba.core.registry

    import hatkernels._jit as jit

    found = []
    for info in pkgutil.iter_modules(jit.__path__):
        module = importlib.import_module(f"hatkernels._jit.{info.name}")
        for obj in vars(module).values():
            if isinstance(obj, numba.core.registry.CPUDispatcher) and obj not in found:
                found.append(obj)
    return found


def kernel_cache_state():
    """How many of the library's kernels have a fresh on-disk cache entry.

    Returns ``{"cached": k, "total": n, "path": dir}``, or None when this
    numba's cache cannot be inspected (the check reads numba's cache index,
    which is not a public API; callers fall back to timing the first call).
    """
    try:
        found = _dispatchers()
        cached = sum(1 for d in found if d._cache._cache_file._load_index())
        path = found[0]._cache.cache_path if found else None
        return {"cached": cached, "total": len(found), "path": path}
    except Exception:  # any change in numba's internals: say "unknown"
        return None


class CompileNotice:
    """Around the first call into the compiled kernels: say once if it compiles.

    When no kernel is cached at all the notice is printed at once; otherwise
    (some cached, or the cache cannot be inspected) it is printed if the call
    is still running after :data:`SLOW_FIRST_CALL` seconds.
    """

    def __init__(self, progress, estimate=COMPILE_ESTIMATE):
        self.progress = progress
        self.estimate = estimate
        self.said = False
        self.seconds = None
        self._timer = None

    def _say(self):
        from hatkernels._jit import caching_enabled

        where = ("cached for next time" if caching_enabled()
                 else "not cached: no writable cache directory, set NUMBA_CACHE_DIR")
        self.progress.note(f"compiling kernels, about {self.estimate} s, {where}")
        self.said = True

    def __enter__(self):
        self._t0 = time.perf_counter()
        state = kernel_cache_state()
        if state is not None and state["total"] and state["cached"] == 0:
            self._say()
        else:
            self._timer = threading.Timer(SLOW_FIRST_CALL, self._say)
            self._timer.daemon = True
            self._timer.start()
        return self

    def __exit__(self, *exc):
        if self._timer is not None:
            self._timer.cancel()
        self.seconds = time.perf_counter() - self._t0
        if self.said and exc[0] is None:
            self.progress.note(f"kernels ready after {self.seconds:.1f} s")
        return False


class _NoThreads:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


def _threads(n):
    if n is None:
        return _NoThreads()
    import numba

    from hatkernels._jit import threads

    top = numba.config.NUMBA_NUM_THREADS
    if not 1 <= n <= top:
        raise InputError(f"--threads {n}: numba has {top} threads here (1..{top}); set "
                         f"NUMBA_NUM_THREADS before starting to allow more")
    return threads(n)


# -- argument types ---------------------------------------------------------------


def _finite_float(text):
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not math.isfinite(v):
        raise argparse.ArgumentTypeError(f"must be a finite number, got {text!r}")
    return v


def _positive_float(text):
    v = _finite_float(text)
    if not v > 0:
        raise argparse.ArgumentTypeError(f"must be positive, got {text!r}")
    return v


def _int_at_least(minimum):
    def parse(text):
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"not an integer: {text!r}") from None
        if v < minimum:
            raise argparse.ArgumentTypeError(f"must be at least {minimum}, got {v}")
        return v

    parse.__name__ = "integer"
    return parse


def _preconditioner_names():
    from hatkernels.precond import PRECONDITIONERS

    return tuple(PRECONDITIONERS)


# -- formatting helpers ---------------------------------------------------------


def _one_line(text):
    return " ".join(str(text).split())


def _versions():
    out = {"python": platform.python_version()}
    for dist in ("numpy", "scipy", "numba", "pyamg", "matplotlib", "meshio"):
        try:  # the installed distribution's version, without importing it
            out[dist] = importlib.metadata.version(dist)
        except importlib.metadata.PackageNotFoundError:
            out[dist] = None
    import hatkernels

    out["hatkernels"] = hatkernels.__version__
    return out


def _base_record(command):
    import hatkernels

    return {
        "generator": f"{PROG} {hatkernels.__version__}",
        "created": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
        "command": command,
    }


def _fmt_seconds(t):
    if t < 0.1:
        return f"{t * 1e3:.1f} ms"
    return f"{t:.2f} s" if t < 100 else f"{t:.0f} s"


def _where(problem, point):
    s, unit = problem.length_scale, problem.length_unit
    x, y = (float(c) * s for c in point)
    sep = f" {unit}" if unit else ""
    return f"({x:.4g}{sep}, {y:.4g}{sep})"


def _extreme(u, used, which):
    values = u[used]
    k = int(np.argmax(values) if which == "max" else np.argmin(values))
    v = float(values[k])
    ties = int(np.count_nonzero(np.abs(values - v) <= 1e-12 * max(1.0, abs(v))))
    return v, int(used[k]), ties


# -- solve ------------------------------------------------------------------------


class IterationReport:
    """CG iterations with the current residual, at most one line every ``every`` seconds.

    ``every`` defaults to :data:`ITERATION_REPORT_SECONDS`, read when the report is made.
    """

    def __init__(self, progress, every=None):
        self.progress = progress
        self.every = ITERATION_REPORT_SECONDS if every is None else every
        self.last = time.perf_counter()

    def __call__(self, iteration, residual):
        now = time.perf_counter()
        if now - self.last >= self.every:
            self.last = now
            self.progress.phase(f"solve: iteration {iteration}, residual {residual:.3e}")


PHASE_TEXT = {
    "assemble": "assemble: stiffness matrix and load vector",
    "boundary": "boundary: Dirichlet conditions",
    "solve": "solve: preconditioner setup and conjugate gradients",
}


def _build_mesh(args, progress, arrays=None):
    from hatkernels.mesh import rectangle
    from hatkernels.scenarios import COARSE_CELLS, DEFAULT_CELLS, PLATE

    if args.mesh is not None:
        progress.phase(f"mesh: checking {args.mesh}")
        mesh = kio.mesh_from_arrays(*arrays, args.mesh)
        description = f"from {args.mesh}"
    elif args.refine is not None:
        nx, ny = PLATE.cells(COARSE_CELLS)
        progress.phase(f"mesh: rectangle {nx} x {ny} cells")
        mesh = rectangle(nx, ny, bounds=PLATE.bounds)
        description = (f"rectangle {nx} x {ny} cells of 8 mm refined {args.refine} "
                       f"time{'s' if args.refine != 1 else ''}")
    else:
        nx, ny = PLATE.cells(DEFAULT_CELLS if args.cells is None else args.cells)
        progress.phase(f"mesh: rectangle {nx} x {ny} cells")
        mesh = rectangle(nx, ny, bounds=PLATE.bounds)
        description = (f"rectangle {nx} x {ny} cells of {PLATE.length / nx * 1e3:.4g} mm x "
                       f"{PLATE.width / ny * 1e3:.4g} mm")
    if args.refine and args.mesh is not None:
        description += f", refined {args.refine} time{'s' if args.refine != 1 else ''}"
    for k in range(args.refine or 0):
        progress.phase(f"mesh: refinement {k + 1} of {args.refine} "
                       f"({4 * mesh.n_triangles:,} triangles)")
        mesh = mesh.refine()
    return mesh, description


def _problem(args, mesh, description):
    from hatkernels import scenarios

    if args.mesh is not None:
        return scenarios.mesh_problem(mesh, source=args.source, conductivity=args.conductivity,
                                      dirichlet=args.dirichlet, name=args.mesh,
                                      mesh_description=description)
    return scenarios.heat_spreader(mesh, source=args.source, conductivity=args.conductivity,
                                   coolant=args.dirichlet, mesh_description=description)


def _warm_up(args):
    """Run the same kind of problem on a tiny mesh, so that kernels compile (or load) here.

    It goes through the same steps as the real run (mesh checks for a file,
    refinement, assembly, solve, power balance), so that the phase times of
    the real problem do not include compilation.
    """
    from hatkernels import scenarios
    from hatkernels.mesh import Mesh, rectangle
    from hatkernels.scenarios import COARSE_CELLS, PLATE

    if args.mesh is not None:
        grid = rectangle(4, 4)
        tiny = Mesh(grid.points, grid.triangles)  # the checks a mesh file goes through
    else:
        tiny = rectangle(*PLATE.cells(COARSE_CELLS), bounds=PLATE.bounds)
    tiny = tiny.refine()  # fine enough for the footprints; compiles the refinement kernels
    if args.mesh is not None:
        problem = scenarios.mesh_problem(tiny, source=args.source, conductivity=args.conductivity)
    else:
        problem = scenarios.heat_spreader(tiny, source=args.source, conductivity=args.conductivity)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            sol = scenarios.solve_problem(problem, preconditioner=args.preconditioner,
                                          rtol=args.rtol)
            scenarios.power_balance(problem, sol.u)
    except (InputError, ConvergenceError):
        pass  # the real problem reports its own errors


def _solve_summary(args, problem, sol, balance, timings, kernels_seconds, command):
    mesh, u, st = problem.mesh, sol.u, sol.stats
    used = np.unique(mesh.triangles)
    vmax, imax, nmax = _extreme(u, used, "max")
    vmin, imin, nmin = _extreme(u, used, "min")
    res = np.asarray(st["residuals"], dtype=float)
    summary = _base_record(command)
    summary["caution"] = _caution()
    summary["problem"] = {
        "name": problem.name,
        "statement": problem.statement,
        "conductivity": float(problem.conductivity),
        "source": (float(problem.source) if np.ndim(problem.source) == 0
                   else "per triangle, from the components"),
        "dirichlet_value": problem.dirichlet,
        "thickness": problem.thickness,
        "components": [
            {"name": c.name, "width": c.width, "height": c.height, "center": list(c.center),
             "power": c.power} for c in problem.components
        ],
    }
    summary["units"] = {
        "length": "m" if problem.thickness else "mesh units",
        "solution": problem.unit or "solution units",
        "power": problem.power_unit or "source x area",
    }
    summary["mesh"] = {
        "description": problem.mesh_description,
        "points": mesh.n_points,
        "triangles": mesh.n_triangles,
        "h": mesh.h(),
    }
    summary["unknowns"] = st["unknowns"]
    summary["dirichlet_points"] = st["dirichlet_points"]
    summary["nnz"] = st["nnz"]
    summary["matrix_free"] = bool(st.get("matrix_free", False))
    summary["operator_bytes"] = st.get("operator_bytes")
    summary["solver"] = {
        "preconditioner": st["preconditioner"],
        "requested": args.preconditioner,
        "rtol": args.rtol,
        "maxiter": args.maxiter,
        "converged": bool(sol.converged),
        "iterations": int(st["iterations"]),
        "initial_residual": float(res[0]),
        "final_residual": float(res[-1]),
        "relative_residual": float(res[-1] / res[0]) if res[0] > 0 else 0.0,
        "residuals": res.tolist(),
        "threads": st["threads"],
    }
    t = dict(timings)
    t["kernels"] = kernels_seconds
    for key in ("assemble", "boundary", "setup", "solve"):
        t[key] = st["timings"][key]
    t["library_total"] = st["timings"]["total"]
    summary["timings_s"] = t
    summary["solution"] = {
        "quantity": problem.quantity,
        "max": vmax, "max_at": mesh.points[imax].tolist(), "max_point": imax, "max_points": nmax,
        "min": vmin, "min_at": mesh.points[imin].tolist(), "min_point": imin, "min_points": nmin,
    }
    power = dict(balance)
    if problem.components:
        power["components"] = problem.component_powers()
    summary["power"] = power
    summary["peak_rss_bytes"] = st["peak_rss_bytes"]
    summary["versions"] = _versions()
    return summary


def _caution():
    from hatkernels.scenarios import CAUTION

    return CAUTION


def _write_solve_outputs(directory, problem, sol, summary, progress, args):
    from hatkernels import plot

    files = ["solution.npz", "summary.json"]
    skipped = []
    meta = {k: summary[k] for k in ("generator", "created", "command", "caution", "units")}
    meta["problem"] = summary["problem"]
    meta["solution"] = summary["solution"]
    cell = {"source": problem.source_array()}
    point = {problem.quantity: sol.u}
    kio.write_solution(os.path.join(directory, "solution.npz"), problem.mesh,
                       {"u": sol.u}, meta, cell_data=cell)
    if plot.available():
        label = problem.quantity + (f" ({problem.unit})" if problem.unit else "")
        title = (f"{problem.name}: {problem.quantity}, max {summary['solution']['max']:.4g}"
                 f"{' ' + problem.unit if problem.unit else ''}")
        progress.phase("write: solution.png")
        plot.solution_figure(problem.mesh, sol.u, os.path.join(directory, "solution.png"),
                             title=title, label=label, length_scale=problem.length_scale,
                             length_unit=problem.length_unit,
                             outlines=[(c.name, c.bounds) for c in problem.components])
        plot.residuals_figure(summary["solver"]["residuals"],
                              os.path.join(directory, "residuals.png"), rtol=args.rtol,
                              title=f"conjugate gradients, {summary['solver']['preconditioner'].split(':')[0]}")
        files += ["solution.png", "residuals.png"]
    else:
        skipped.append("solution.png and residuals.png (matplotlib is not installed: "
                       "pip install 'hatkernels[plot]')")
    if kio.meshio_available():
        progress.phase("write: solution.vtu")
        kio.write_vtu(os.path.join(directory, "solution.vtu"), problem.mesh, point, cell)
        files.append("solution.vtu")
    else:
        skipped.append("solution.vtu (meshio is not installed: pip install 'hatkernels[io]')")
    summary["files"] = files
    summary["skipped"] = skipped
    kio.write_json(os.path.join(directory, "summary.json"), summary)
    return files, skipped


def _solve_report(problem, summary, out):
    s = summary
    sol, solver, t, pw = s["solution"], s["solver"], s["timings_s"], s["power"]
    unit = f" {problem.unit}" if problem.unit else ""
    pu = f" {problem.power_unit}" if problem.power_unit else ""
    lines = [f"{PROG} solve: {problem.statement[0]}"]
    lines += [f"  {text}" for text in problem.statement[1:]]
    lines.append(f"{'mesh':<16}{s['mesh']['description']}: {s['mesh']['points']:,} points, "
                 f"{s['mesh']['triangles']:,} triangles")
    if s.get("matrix_free"):
        stored = f"matrix-free operator ({s['operator_bytes'] / 1e6:.1f} MB)"
    else:
        stored = f"{s['nnz']:,} matrix entries"
    lines.append(f"{'unknowns':<16}{s['unknowns']:,} (plus {s['dirichlet_points']:,} Dirichlet "
                 f"points), {stored}")
    lines.append(f"{'preconditioner':<16}{solver['preconditioner']}")
    lines.append(f"{'threads':<16}{solver['threads']} (numba)")
    order = ("mesh", "kernels", "assemble", "boundary", "setup", "solve", "check")
    lines.append(f"{'times':<16}" + ", ".join(f"{k} {_fmt_seconds(t[k])}" for k in order if k in t))
    lines.append(f"{'iterations':<16}{solver['iterations']}, final residual "
                 f"{solver['final_residual']:.3e} = {solver['relative_residual']:.2e} x initial "
                 f"(rtol {solver['rtol']:g}), converged")
    mesh = problem.mesh
    lines.append(f"{problem.quantity:<16}max {sol['max']:.6g}{unit} at "
                 f"{_where(problem, mesh.points[sol['max_point']])}"
                 + (f" ({sol['max_points']} points)" if sol["max_points"] > 1 else ""))
    min_where = (f"on {sol['min_points']:,} points, first at " if sol["min_points"] > 1 else "at ")
    lines.append(f"{'':<16}min {sol['min']:.6g}{unit} {min_where}"
                 f"{_where(problem, mesh.points[sol['min_point']])}")
    parts = ""
    if pw.get("components"):
        parts = " (" + ", ".join(f"{n} {v:.6g}{pu}" for n, v in pw["components"].items()) + ")"
    what_in = "power in" if problem.thickness else "source total"
    lines.append(f"{what_in:<16}{pw['power_in']:.6g}{pu}{parts}")
    lines.append(f"{'':<16}{pw['heat_out']:.6g}{pu} leaves through the Dirichlet boundary "
                 f"(imbalance {pw['imbalance']:.2e}{pu}, relative {pw['relative_imbalance']:.1e})")
    lines.append(f"{'peak memory':<16}{s['peak_rss_bytes'] / 1e9:.2f} GB (process high-water mark)")
    lines.append(f"{'output':<16}{out}: {', '.join(s['files'])}")
    for text in s["skipped"]:
        lines.append(f"{'':<16}not written: {text}")
    lines.append("")
    lines.append(s["caution"])
    return "\n".join(lines)


def cmd_solve(args, progress):
    # -- MPI hook (hatkernels.distributed): under mpiexec with several ranks, solve distributed;
    # -- the launcher's environment is read without importing mpi4py. ------------------------
    from hatkernels.distributed.launch import ranks_from_environment

    if ranks_from_environment() > 1:
        from hatkernels.distributed.command import solve_command

        return solve_command(args, progress)
    # -- end of MPI hook -----------------------------------------------------------------------
    from hatkernels import scenarios

    if args.cells is not None and args.refine is not None:
        raise UsageError("--cells and --refine both set the mesh size; give one "
                         "(see 'hatkernels solve --help')")
    out = kio.check_output_directory(args.out, force=args.force)
    command = shlex.join([PROG, "solve"] + args.argv)
    timings = {}
    with _threads(args.threads):
        arrays = None
        if args.mesh is not None:  # a missing or unreadable file fails before any compiling
            progress.phase(f"mesh: reading {args.mesh}")
            arrays = kio.read_mesh_arrays(args.mesh)
        progress.phase("kernels: loading compiled kernels (or compiling them)")
        with CompileNotice(progress) as notice:
            _warm_up(args)
        t0 = time.perf_counter()
        mesh, description = _build_mesh(args, progress, arrays)
        if args.preconditioner in NEEDS_REFINEMENT and mesh.refinement is None:
            raise UsageError(f"--preconditioner {args.preconditioner} needs a mesh made by "
                             f"refinement: add --refine K (--refine 6 gives the default size)")
        problem = _problem(args, mesh, description)
        timings["mesh"] = time.perf_counter() - t0
        sol = scenarios.solve_problem(
            problem, preconditioner=args.preconditioner, rtol=args.rtol, maxiter=args.maxiter,
            progress=lambda phase: progress.phase(PHASE_TEXT.get(phase, phase)),
            monitor=IterationReport(progress),
        )
        progress.phase("check: power balance from the boundary reactions")
        t0 = time.perf_counter()
        balance = scenarios.power_balance(problem, sol.u)
        timings["check"] = time.perf_counter() - t0
        summary = _solve_summary(args, problem, sol, balance, timings, notice.seconds, command)
        progress.phase(f"write: solution.npz and summary.json into {args.out}")
        with kio.output_directory(out, force=args.force) as tmp:
            _write_solve_outputs(tmp, problem, sol, summary, progress, args)
    progress.phase("done")
    progress.close()
    print(_solve_report(problem, summary, args.out))
    return 0


# -- verify ---------------------------------------------------------------------


def _manufactured():
    pi = math.pi

    def exact(x, y):
        return np.sin(pi * x) * np.sin(pi * y)

    def grad(x, y):
        return (pi * np.cos(pi * x) * np.sin(pi * y), pi * np.sin(pi * x) * np.cos(pi * y))

    def source(x, y):
        return 2 * pi * pi * np.sin(pi * x) * np.sin(pi * y)

    return exact, grad, source


#: Observed rates within this distance of 2 (L2) and 1 (H1) on the finest level pass.
RATE_TOLERANCE = 0.2


def cmd_verify(args, progress):
    from hatkernels import plot
    from hatkernels.mesh import rectangle
    from hatkernels.norms import convergence_study
    from hatkernels.poisson import solve_poisson

    out = kio.check_output_directory(args.out, force=args.force)
    command = shlex.join([PROG, "verify"] + args.argv)
    exact, grad, source = _manufactured()
    notice = CompileNotice(progress)
    level = [0]
    solve_seconds = []

    def solver(mesh):
        level[0] += 1
        progress.phase(f"level {level[0]} of {args.levels}: {mesh.n_triangles:,} triangles")
        t0 = time.perf_counter()
        if level[0] == 1:
            with notice:
                sol = solve_poisson(mesh, source, dirichlet=0.0, preconditioner=args.preconditioner,
                                    rtol=args.rtol, check=True)
        else:
            sol = solve_poisson(mesh, source, dirichlet=0.0, preconditioner=args.preconditioner,
                                rtol=args.rtol, check=True)
        solve_seconds.append(time.perf_counter() - t0)
        return sol.u

    with _threads(args.threads):
        study = convergence_study(rectangle(args.start), solver, exact, grad, levels=args.levels)
    l2, h1 = float(study.rates["L2"][-1]), float(study.rates["H1"][-1])
    passed = abs(l2 - 2) <= RATE_TOLERANCE and abs(h1 - 1) <= RATE_TOLERANCE
    record = _base_record(command)
    record.update({
        "problem": "-lap u = 2 pi^2 sin(pi x) sin(pi y) on the unit square, u = 0 on the "
                   "boundary; exact u = sin(pi x) sin(pi y)",
        "meshes": f"rectangle({args.start}) and {args.levels - 1} uniform refinements",
        "preconditioner": args.preconditioner,
        "rtol": args.rtol,
        "h": study.h.tolist(),
        "n_points": study.n_points.tolist(),
        "errors": {k: v.tolist() for k, v in study.errors.items()},
        "rates": {k: v.tolist() for k, v in study.rates.items()},
        "expected_rates": {"L2": 2, "H1": 1},
        "rate_tolerance": RATE_TOLERANCE,
        "passed": passed,
        "solve_seconds": solve_seconds,
        "versions": _versions(),
    })
    files = ["verify.json"]
    progress.phase(f"write: {args.out}")
    with kio.output_directory(out, force=args.force) as tmp:
        if plot.available():
            plot.convergence_figure(study.h, study.errors, os.path.join(tmp, "convergence.png"),
                                    title="P1 on the unit square, u = sin(pi x) sin(pi y)")
            files.append("convergence.png")
        record["files"] = files
        kio.write_json(os.path.join(tmp, "verify.json"), record)
    progress.phase("done")
    progress.close()
    print(f"{PROG} verify: manufactured solution u = sin(pi x) sin(pi y) on the unit square, "
          f"-lap u = 2 pi^2 u, u = 0 on the boundary")
    times = args.levels - 1
    print(f"meshes: rectangle({args.start}) refined {times} time{'s' if times != 1 else ''}; "
          f"preconditioner {args.preconditioner}, rtol {args.rtol:g}")
    print()
    print(study.table())
    print()
    print(f"observed rates on the finest level: L2 {l2:.3f} (expected 2), H1 {h1:.3f} "
          f"(expected 1)")
    print("expected rates for linear elements and a smooth solution: P. G. Ciarlet, "
          "The Finite Element Method for Elliptic Problems, 1978")
    if not plot.available():
        print("not written: convergence.png (matplotlib is not installed: "
              "pip install 'hatkernels[plot]')")
    print(f"output: {args.out}: {', '.join(files)}")
    if not passed:
        _error(f"verification failed: the observed rates L2 {l2:.3f} and H1 {h1:.3f} are not "
               f"within {RATE_TOLERANCE} of 2 and 1 (too coarse a start, or a defect)")
        return 1
    print(f"verification passed (rates within {RATE_TOLERANCE} of the expected)")
    return 0


# -- bench ----------------------------------------------------------------------


def _best(fn, repeat, setup=None):
    best = math.inf
    result = None
    for _ in range(repeat):
        arg = setup() if setup is not None else None
        t0 = time.perf_counter()
        result = fn(arg) if setup is not None else fn()
        best = min(best, time.perf_counter() - t0)
    return best, result


def _bench_system(mesh):
    """``-lap u = 1``, ``u = 0`` on the boundary, reduced to the free points."""
    from hatkernels.assembly import assemble_load, assemble_stiffness
    from hatkernels.boundary import apply_dirichlet

    return apply_dirichlet(assemble_stiffness(mesh), assemble_load(mesh, 1.0),
                           mesh.boundary_points())


def _bench_options(name, mesh):
    if name in NEEDS_REFINEMENT and mesh.refinement is not None:
        return {"mesh": mesh, "dirichlet": mesh.boundary_points()}
    return {}


def cmd_bench(args, progress):
    from hatkernels.assembly import StiffnessAssembler, assemble_stiffness
    from hatkernels.mesh import rectangle
    from hatkernels.perf import memory_bandwidth
    from hatkernels.solve import solve

    names = args.preconditioners or [n for n in _preconditioner_names() if n != "amg"]
    known = _preconditioner_names()
    for n in names:
        if n not in known:
            raise UsageError(f"unknown preconditioner {n!r}; choose from {', '.join(known)}")
    if args.json is not None:
        parent = os.path.dirname(os.path.abspath(args.json))
        if not os.path.isdir(parent):
            raise InputError(f"cannot write {args.json}: directory {parent} does not exist")
    results = {"assembly": [], "solve": []}
    with _threads(args.threads):
        progress.phase("kernels: compiling or loading on a tiny mesh")
        with CompileNotice(progress) as notice:
            tiny = rectangle(4, 4).refine()
            StiffnessAssembler(tiny).assemble()
            assemble_stiffness(tiny, strategy="triplets")
            small = _bench_system(tiny)
            for n in names:
                try:
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore")
                        solve(small.A, small.b, preconditioner=n, rtol=args.rtol,
                              **_bench_options(n, tiny))
                except InputError:
                    pass
        progress.phase(f"mesh: rectangle {args.cells} x {args.cells} cells")
        mesh = rectangle(args.cells, args.cells)
        n, m = mesh.n_points, mesh.n_triangles
        progress.phase("assembly: triplets")
        t_trip, A = _best(lambda: assemble_stiffness(mesh, strategy="triplets"), args.repeat)
        nnz = A.nnz
        progress.phase("assembly: csr first call")
        t_first, _ = _best(assemble_stiffness, args.repeat,
                           setup=lambda: rectangle(args.cells, args.cells))
        progress.phase("assembly: csr numeric")
        assembler = StiffnessAssembler(mesh)
        t_num, _ = _best(assembler.assemble, args.repeat)
        progress.phase(f"bandwidth: NumPy copy of {args.bandwidth_mb} MiB")
        bw = memory_bandwidth(mbytes=args.bandwidth_mb, repeats=max(3, args.repeat))
        index = A.indices.dtype.itemsize
        floor_first = m * 3 * index + 16 * n + (8 + index) * nnz + index * n
        floor_numeric = m * 3 * index + 16 * n + 8 * nnz
        for label, t, floor in (("triplets", t_trip, floor_first),
                                ("csr first call", t_first, floor_first),
                                ("csr numeric", t_num, floor_numeric)):
            results["assembly"].append({
                "strategy": label, "seconds": t, "speedup_vs_triplets": t_trip / t,
                "floor_bytes": floor, "floor_seconds": floor / (bw["copy"] * 1e9),
            })
        system = _bench_system(mesh)
        # Geometric multigrid needs the refinement history: it solves on the same
        # triangulation built by refinement (the same system with its points numbered
        # differently), when --cells is divisible by 2.
        coarse, times = args.cells, 0
        while coarse % 2 == 0 and coarse // 2 >= 4:
            coarse, times = coarse // 2, times + 1
        refined = None
        if times and any(n in NEEDS_REFINEMENT for n in names):
            refined = rectangle(coarse, coarse)
            for _ in range(times):
                refined = refined.refine()
            refined_system = _bench_system(refined)
        for name in names:
            smesh, ssystem = (refined, refined_system) if (
                name in NEEDS_REFINEMENT and refined is not None) else (mesh, system)
            progress.phase(f"solve: {name}")
            row = {"preconditioner": name}
            if name in NEEDS_REFINEMENT and refined is None:
                row["skipped"] = ("needs a mesh built by refinement: choose an even --cells "
                                  "of at least 8")
                results["solve"].append(row)
                continue
            try:
                best = None
                for _ in range(args.repeat):
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore")
                        r = solve(ssystem.A, ssystem.b, preconditioner=name, rtol=args.rtol,
                                  **_bench_options(name, smesh))
                    total = r.timings["setup"] + r.timings["solve"]
                    if best is None or total < best[0]:
                        best = (total, r)
                total, r = best
                row.update({"setup_seconds": r.timings["setup"], "solve_seconds": r.timings["solve"],
                            "total_seconds": total, "iterations": r.iterations,
                            "converged": bool(r.converged), "description": r.preconditioner})
            except InputError as exc:
                row["skipped"] = _one_line(exc)
            results["solve"].append(row)
    ran = [r for r in results["solve"] if "total_seconds" in r]
    fastest = min((r["total_seconds"] for r in ran), default=None)
    for r in ran:
        r["vs_fastest"] = r["total_seconds"] / fastest
    progress.phase("done")
    progress.close()

    import numba

    print(f"{PROG} bench: this machine, {numba.get_num_threads()} numba threads, "
          f"best of {args.repeat}")
    print(f"memory bandwidth (NumPy, {args.bandwidth_mb} MiB arrays): copy {bw['copy']:.1f} GB/s, "
          f"triad {bw['triad']:.1f} GB/s")
    print(f"kernels: compile or cache load {notice.seconds:.2f} s (not in the times below)")
    print()
    print(f"stiffness assembly, unit square {args.cells} x {args.cells} cells: {m:,} triangles, "
          f"{n:,} points, {nnz:,} entries")
    print(f"{'strategy':<16}{'time':>11}{'vs triplets':>13}{'floor':>11}{'x floor':>9}")
    for r in results["assembly"]:
        print(f"{r['strategy']:<16}{r['seconds'] * 1e3:>8.2f} ms{r['speedup_vs_triplets']:>12.2f}x"
              f"{r['floor_seconds'] * 1e3:>8.2f} ms{r['seconds'] / r['floor_seconds']:>8.1f}x")
    print("vs triplets: times faster than the triplets baseline (NumPy element matrices, "
          "scipy COO to CSR)")
    print("floor: the bytes that must move (read the mesh, write the matrix) at the measured "
          "copy bandwidth; x floor: time over floor")
    print()
    print(f"solve of -lap u = 1, u = 0 on the boundary, same mesh: {system.A.shape[0]:,} "
          f"unknowns, rtol {args.rtol:g}")
    print(f"{'preconditioner':<16}{'setup':>11}{'solve':>11}{'total':>11}{'iterations':>12}"
          f"{'vs fastest':>12}")
    for r in results["solve"]:
        if "skipped" in r:
            print(f"{r['preconditioner']:<16}  skipped: {r['skipped']}")
            continue
        flag = "" if r["converged"] else "  (not converged)"
        print(f"{r['preconditioner']:<16}{r['setup_seconds'] * 1e3:>8.1f} ms"
              f"{r['solve_seconds'] * 1e3:>8.1f} ms{r['total_seconds'] * 1e3:>8.1f} ms"
              f"{r['iterations']:>12d}{r['vs_fastest']:>11.2f}x{flag}")
    if refined is not None:
        print(f"{', '.join(n for n in names if n in NEEDS_REFINEMENT)}: on the same "
              f"triangulation built as rectangle({coarse}) refined {times} "
              f"time{'s' if times != 1 else ''} (its points numbered differently)")
    print("vs fastest: total (setup + solve) over the fastest total; setup is paid once per "
          "matrix, solve once per right-hand side")
    if args.json is not None:
        record = _base_record(shlex.join([PROG, "bench"] + args.argv))
        record.update({"cells": args.cells, "triangles": m, "points": n, "nnz": nnz,
                       "repeat": args.repeat, "bandwidth_GBs": bw, "threads": numba.get_num_threads(),
                       "kernels_seconds": notice.seconds, "versions": _versions(), **results})
        kio.write_json(args.json, record)
        print(f"\nwrote {args.json}")
    return 0


# -- info -----------------------------------------------------------------------


def _threading_layer():
    import numba

    try:
        return numba.threading_layer()
    except ValueError:
        pass
    try:  # start numba's thread pool without compiling anything
        from numba.np.ufunc import parallel

        parallel._launch_threads()
        return numba.threading_layer()
    except Exception as exc:
        return f"unknown ({_one_line(exc)})"


def _cache_info():
    import numba

    from hatkernels._jit import caching_enabled

    state = kernel_cache_state()
    path = state["path"] if state else (numba.config.CACHE_DIR or None)
    if path:
        probe = path
        while not os.path.exists(probe) and os.path.dirname(probe) != probe:
            probe = os.path.dirname(probe)
        writable = os.access(probe, os.W_OK)
    else:
        writable = None
    return {
        "path": path,
        "writable": writable,
        "NUMBA_CACHE_DIR": os.environ.get("NUMBA_CACHE_DIR"),
        "kernels_cached": state["cached"] if state else None,
        "kernels_total": state["total"] if state else None,
        "caching_enabled": caching_enabled(),
    }


def cmd_info(args, progress):
    import numba

    versions = _versions()
    cache = _cache_info()
    info = {
        "versions": versions,
        "python_executable": sys.executable,
        "platform": platform.platform(),
        "cpu_count": os.cpu_count(),
        "numba_threads": numba.get_num_threads(),
        "numba_max_threads": numba.config.NUMBA_NUM_THREADS,
        "threading_layer": _threading_layer(),
        "numba_cache": cache,
    }
    if args.json:
        print(json.dumps(info, indent=2))
        return 0
    extra = {"matplotlib": "plot", "meshio": "io"}
    print(f"{PROG} {versions['hatkernels']}")
    print(f"{'python':<18}{versions['python']} ({sys.executable})")
    for name in ("numpy", "scipy", "numba", "pyamg", "matplotlib", "meshio"):
        v = versions[name]
        if v is None:
            v = f"not installed (optional: pip install 'hatkernels[{extra[name]}]')"
        print(f"{name:<18}{v}")
    print(f"{'platform':<18}{info['platform']}, {info['cpu_count']} CPUs")
    print(f"{'numba threads':<18}{info['numba_threads']} of {info['numba_max_threads']} "
          f"(set NUMBA_NUM_THREADS or --threads), threading layer {info['threading_layer']}")
    if cache["path"]:
        state = "writable" if cache["writable"] else "NOT writable (kernels recompile every run)"
        counts = (f", {cache['kernels_cached']} of {cache['kernels_total']} kernels cached"
                  if cache["kernels_total"] is not None else "")
        print(f"{'numba cache':<18}{cache['path']} ({state}{counts})")
    else:
        print(f"{'numba cache':<18}unknown location")
    return 0


# -- the parser -------------------------------------------------------------------


def build_parser():
    """The argument parser of the ``hatkernels`` command."""
    common = _Parser(add_help=False)
    common.add_argument("--quiet", action="store_true", help="no progress on stderr")
    common.add_argument("--debug", action="store_true",
                        help="show tracebacks and library warnings in full")
    common.add_argument("--threads", type=_int_at_least(1), metavar="N",
                        help="numba threads (default: all, NUMBA_NUM_THREADS)")
    names = _preconditioner_names()

    parser = _Parser(
        prog=PROG,
        description="Fast, verified linear (P1) finite elements on triangle meshes: solve the "
                    "built-in heat-spreader scenario or a mesh file, verify convergence, "
                    "benchmark this machine, show versions.",
        epilog="Run 'hatkernels COMMAND --help' for each command. Exit codes: 0 success, "
               "2 bad usage or input, 1 a solve that does not converge.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser(
        "solve", parents=[common], formatter_class=argparse.RawDescriptionHelpFormatter,
        help="solve the built-in heat-spreader scenario (or a mesh file) and write results",
        description=textwrap.fill(
            "Solve steady conduction on the built-in heat-spreader plate (default: 1,228,800 "
            "triangles) or on a mesh file; print a summary and write solution.npz, "
            "summary.json, solution.png, residuals.png and solution.vtu (with meshio) into "
            "--out.", 79),
        epilog=SCENARIO_HELP,
    )
    size = p.add_mutually_exclusive_group()
    size.add_argument("--cells", type=_int_at_least(1), metavar="NX",
                      help="cells along the 120 mm side (the 80 mm side is scaled); "
                           "default 960 (0.125 mm cells)")
    p.add_argument("--refine", type=_int_at_least(0), metavar="K",
                   help="refine a coarse mesh K times (the plate: 15 x 10 cells of 8 mm; "
                        "with --mesh: the file's mesh); K=6 gives the default size")
    size.add_argument("--mesh", metavar="FILE",
                      help="solve on this mesh instead: .npz with arrays points and triangles, "
                           "or any format meshio reads (io extra); Dirichlet on the whole "
                           "boundary, constant source")
    p.add_argument("--source", type=_finite_float, metavar="Q",
                   help="constant source instead of the components (W/m^3 on the plate; "
                        "default 1 with --mesh)")
    p.add_argument("--conductivity", type=_positive_float, metavar="K",
                   help="constant conductivity (W/(m K) on the plate, default 237; default 1 "
                        "with --mesh)")
    p.add_argument("--dirichlet", type=_finite_float, metavar="G",
                   help="value held on the boundary (coolant temperature in degC on the "
                        "plate, default 25; default 0 with --mesh)")
    p.add_argument("--preconditioner", choices=names, default="amg",
                   help="preconditioner for conjugate gradients (default: amg)")
    p.add_argument("--rtol", type=_positive_float, default=1e-10,
                   help="relative residual tolerance (default 1e-10)")
    p.add_argument("--maxiter", type=_int_at_least(1), metavar="N",
                   help="at most N iterations (default 10 x unknowns); not converging exits 1")
    p.add_argument("--out", default="hatkernels-out", metavar="DIR",
                   help="output directory, written whole or not at all (default hatkernels-out)")
    p.add_argument("--force", action="store_true",
                   help="replace an existing output directory written by hatkernels")
    p.set_defaults(func=cmd_solve)

    v = sub.add_parser(
        "verify", parents=[common],
        help="convergence study against a manufactured solution",
        description="Solve -lap u = 2 pi^2 sin(pi x) sin(pi y) on the unit square (u = 0 on the "
                    "boundary, exact u = sin(pi x) sin(pi y)) on successive uniform "
                    "refinements; print h, L2 and H1 errors and observed rates (expected 2 "
                    "and 1 for linear elements: Ciarlet, The Finite Element Method for "
                    "Elliptic Problems, 1978); write convergence.png and verify.json.",
        epilog="Exits 1 when the finest rates are not within 0.2 of 2 and 1.",
    )
    v.add_argument("--levels", type=_int_at_least(2), default=6,
                   help="number of meshes (default 6)")
    v.add_argument("--start", type=_int_at_least(2), default=8, metavar="N",
                   help="cells per side of the coarsest mesh (default 8)")
    v.add_argument("--preconditioner", choices=names, default="amg")
    v.add_argument("--rtol", type=_positive_float, default=1e-10)
    v.add_argument("--out", default="hatkernels-verify", metavar="DIR",
                   help="output directory (default hatkernels-verify)")
    v.add_argument("--force", action="store_true",
                   help="replace an existing output directory written by hatkernels")
    v.set_defaults(func=cmd_verify)

    b = sub.add_parser(
        "bench", parents=[common],
        help="compare assembly strategies and preconditioners on this machine",
        description="Assemble the stiffness matrix of the unit square with --cells cells per "
                    "side by each strategy (triplets, csr first call, csr numeric) and solve "
                    "-lap u = 1 with each preconditioner; print times, ratios and the "
                    "measured memory bandwidth. Speeds are for this machine and run only.",
    )
    b.add_argument("--cells", type=_int_at_least(2), default=300, metavar="N",
                   help="cells per side of the unit square (default 300: 180,000 triangles)")
    b.add_argument("--repeat", type=_int_at_least(1), default=3, help="best of R (default 3)")
    b.add_argument("--preconditioners", type=lambda s: [x for x in s.split(",") if x],
                   metavar="A,B,...",
                   help=f"comma-separated names (default: all of {', '.join(names)} but amg, "
                        f"which is an alias)")
    b.add_argument("--rtol", type=_positive_float, default=1e-8)
    b.add_argument("--bandwidth-mb", type=_int_at_least(1), default=512, metavar="MB",
                   help="array size for the bandwidth measurement (default 512 MiB)")
    b.add_argument("--json", metavar="FILE", help="also write the results as JSON")
    b.set_defaults(func=cmd_bench)

    i = sub.add_parser(
        "info", parents=[common], help="versions, threads and the numba cache",
        description="Print the versions of Python and the libraries, the numba thread count "
                    "and threading layer, and where compiled kernels are cached.",
    )
    i.add_argument("--json", action="store_true", help="print JSON")
    i.set_defaults(func=cmd_info)
    return parser


# -- entry point ------------------------------------------------------------------


def _error(text):
    sys.stderr.write(f"{PROG}: error: {_one_line(text)}\n")
    sys.stderr.flush()


def main(argv=None):
    """Run the command; return the exit code."""
    argv = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except UsageError as exc:
        _error(exc)
        return 2
    if args.command is None:
        _error("choose a command: solve, verify, bench or info (see 'hatkernels --help')")
        return 2
    args.argv = argv[argv.index(args.command) + 1:] if args.command in argv else []
    progress = Progress(quiet=args.quiet)

    def fail(code, text):
        progress.close()
        if args.debug:
            traceback.print_exc()
        _error(text)
        return code

    with warnings.catch_warnings():
        if not args.debug:
            warnings.showwarning = progress.warning
        try:
            return args.func(args, progress)
        except UsageError as exc:
            return fail(2, exc)
        except ConvergenceError as exc:
            text = str(exc).removeprefix("solve: ").removeprefix("not converged: ")
            return fail(1, f"the solve did not converge: {text}; try a larger --maxiter, a "
                           f"looser --rtol or another --preconditioner")
        except InputError as exc:
            return fail(2, exc)
        except KeyboardInterrupt:
            return fail(130, "interrupted; no output written")
        except MemoryError:
            return fail(1, "out of memory; try a smaller mesh (--cells)")
        except OSError as exc:
            return fail(1, f"{exc.strerror or exc}"
                           + (f": {exc.filename}" if getattr(exc, "filename", None) else ""))
        except Exception as exc:
            return fail(1, f"internal error: {type(exc).__name__}: {exc}"
                           + ("" if args.debug else " (run with --debug for the traceback)"))
        finally:
            progress.close()


if __name__ == "__main__":
    sys.exit(main())
