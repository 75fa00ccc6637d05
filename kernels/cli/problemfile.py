"""``hatkernels solve PROBLEM.toml`` (or a packaged problem file, ``--scenario NAME``): the
file read and checked before anything compiles, solved, balanced by region and boundary tag,
and written.

The file is read by :func:`hatkernels.problemfile.read_problem`; the command
line's ``--refine``, ``--preconditioner``, ``--rtol``, ``--maxiter`` and
``--out`` override what the file says, and defaults fill what neither says.
The results by region and by boundary tag, and the balance of heat that
ties them together, come from :func:`hatkernels.results.balance`.  A file with
a ``[time]`` table (or ``--until``) runs the transient mode
(:mod:`hatkernels.cli.transient`).
"""

from __future__ import annotations

import os
import time
import warnings

from hatkernels import io as kio
from hatkernels import problemfile, results
from hatkernels.cli import transient
from hatkernels.cli.common import command_line, threads
from hatkernels.cli.outputs import identity, write_outputs
from hatkernels.cli.problem import needs_refinement, refined
from hatkernels.cli.progress import CompileNotice, IterationReport
from hatkernels.cli.summary import file_report, file_summary
from hatkernels.distributed.launch import ranks_from_environment
from hatkernels.errors import ConvergenceError, InputError
from hatkernels.mesh import cuboid, rectangle
from hatkernels.mesh.tags import label_cells, label_sides
from hatkernels.poisson import solve_poisson

__all__ = ["run", "settle", "PHASE_TEXT"]

#: The progress line for each phase the library announces.
PHASE_TEXT = {
    "assemble": "assemble: stiffness matrix and load vector",
    "boundary": "boundary: checks and boundary conditions by tag",
    "solve": "solve: preconditioner setup and conjugate gradients",
}
#: Added to the library's refusal of a preconditioner that needs a mesh made by refinement.
REFINE_HINT = "; --refine K (or refine = K in the problem file) builds the mesh by refinement"


def settle(args, pf):
    """Fill ``args``' solve settings: the command line's where given, else the file's, else
    the command's defaults (``args.defaults``)."""
    if args.refine is None:
        args.refine = pf.refine or 0
    for key in ("preconditioner", "rtol", "maxiter"):
        if getattr(args, key) is None:
            mine = pf.solver[key]
            setattr(args, key, mine if mine is not None else args.defaults.get(key))
    if args.out is None:
        args.out = pf.output if pf.output is not None else args.defaults["out"]
    args.before = identity(args.out)  # main() could not know it before the file was read


def _warm_up(args, pf):
    """Solve the same kind of problem on a tiny mesh, so that the kernels compile (or load)
    before the phases are timed: two regions, a held, a flux and a convection tag, refined once
    when the file's mesh is refined, and the balance."""
    dim = pf.mesh.dim
    grid = rectangle(4, 4) if dim == 2 else cuboid(2, 2, 2)
    grid = label_cells(grid, {"a": lambda x, *rest: x < 0.5, "b": lambda x, *rest: x >= 0.5})
    grid = label_sides(grid, {"held": lambda x, *rest: x == 0, "film": lambda x, *rest: x == 1,
                              "flux": lambda x, y, *rest: y == 0})
    k = pf.materials[0].conductivity
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            sol = solve_poisson(grid, {1: 1.0, 2: 0.0}, refine=1 if args.refine else 0,
                                coefficient={1: k, 2: k}, dirichlet={"held": 0.0},
                                neumann={"flux": 1.0}, robin={"film": (1.0, 1.0)},
                                preconditioner=args.preconditioner, rtol=args.rtol, check=True,
                                memory_check=False)
            results.balance(sol)
    except (InputError, ConvergenceError):
        pass  # the real problem reports its own errors


def _solve(args, pf, mesh, progress):
    """The library's solve of the file's problem; a refusal for want of refinement says what
    to type."""
    try:
        return solve_poisson(
            mesh, **pf.solve_arguments(), preconditioner=args.preconditioner, rtol=args.rtol,
            maxiter=args.maxiter, check=True, memory_check=args.memory_check,
            progress=lambda phase: progress.phase(PHASE_TEXT.get(phase, phase)),
            monitor=IterationReport(progress))
    except InputError as exc:
        if mesh.refinement is None and needs_refinement(args):
            raise InputError(f"{exc}{REFINE_HINT}") from exc
        raise


def run(args, progress):
    """Solve the problem file ``args.problem_file``; return the exit code."""
    if ranks_from_environment() > 1:
        raise InputError("a problem file is solved in one process; run it without mpiexec")
    progress.phase(f"problem: reading {args.problem_file}")
    pf = problemfile.read_problem(args.problem_file)  # a bad file fails before any compiling
    settle(args, pf)
    settings = transient.file_settings(args, pf)
    if settings is not None:  # a [time] table, or --until: the transient mode
        return transient.run_file(args, progress, pf, settings)
    command = command_line(args)
    timings = {}
    with kio.output_directory(args.out, force=args.force) as tmp, threads(args.threads):
        progress.phase("kernels: loading compiled kernels (or compiling them)")
        with CompileNotice(progress) as notice:
            _warm_up(args, pf)
        t0 = time.perf_counter()
        mesh = refined(pf.mesh, args.refine, progress, getattr(args, "memory_check", True))
        timings["mesh"] = time.perf_counter() - t0
        sol = _solve(args, pf, mesh, progress)
        progress.phase("check: heat balance by region and boundary tag")
        t0 = time.perf_counter()
        balance = results.balance(sol)
        timings["check"] = time.perf_counter() - t0
        summary = file_summary(args, pf, sol, balance, timings, notice.seconds, command)
        progress.phase(f"write: solution.npz and summary.json into {args.out}")
        write_outputs(tmp, mesh, sol.u, summary, progress, args.rtol,
                      cell={"region": mesh.regions, "source": pf.source_per_cell(mesh)},
                      name=pf.title, quantity="temperature", unit="degC",
                      length_scale=1.0 / pf.scale, length_unit=pf.length_unit)
    progress.phase("done")
    progress.close()
    extra = []
    if args.problem is None:  # a packaged file: say where it is, to start one's own from it
        folder = os.path.dirname(pf.path)
        extra.append(f"to start a problem of your own, copy {os.path.basename(pf.path)} and "
                     f"{os.path.basename(pf.mesh_path)} from {folder}")
    print(file_report(pf, summary, args.out, extra))
    return 0
