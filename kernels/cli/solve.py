"""``hatkernels solve``: the built-in scenario (or a mesh file), solved, checked and written.

A problem file (``hatkernels solve PROBLEM.toml``, or a packaged one chosen
by ``--scenario``) runs through :mod:`hatkernels.cli.problemfile`; ``--until T``
(the transient mode) through :mod:`hatkernels.cli.transient`.

Under ``mpiexec`` with more than one rank the same options run the
distributed solve (:mod:`hatkernels.cli.solve_mpi`); the launcher's
environment is read without importing mpi4py.
"""

from __future__ import annotations

import time
import warnings

from hatkernels import io as kio
from hatkernels import scenarios
from hatkernels.cli import problemfile, solve_mpi, transient
from hatkernels.cli.common import command_line, threads
from hatkernels.cli.outputs import write_solve_outputs
from hatkernels.cli.problem import (
    REFINE_HINT,
    build_mesh,
    make_problem,
    needs_refinement,
    read_mesh_option,
    tiny_problem,
)
from hatkernels.cli.progress import CompileNotice, IterationReport
from hatkernels.cli.summary import solve_report, solve_summary
from hatkernels.distributed.launch import ranks_from_environment
from hatkernels.errors import ConvergenceError, InputError

__all__ = ["run", "PHASE_TEXT"]

_needs_refinement = needs_refinement  # its older name here

#: The progress line for each phase the library announces.
PHASE_TEXT = {
    "assemble": "assemble: stiffness matrix and load vector",
    "boundary": "boundary: checks and boundary conditions",
    "solve": "solve: preconditioner setup and conjugate gradients",
}


def _warm_up(args, dim=2):
    """Run the same kind of problem on a tiny mesh, so that kernels compile (or load) here.

    It goes through the same steps as the real run (mesh checks for a file,
    refinement, assembly, solve, power balance), so that the phase times of
    the real problem do not include compilation.  ``dim``: that of a ``--mesh``
    file's points.
    """
    problem = tiny_problem(args, dim=dim)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            sol = scenarios.solve_problem(problem, preconditioner=args.preconditioner,
                                          rtol=args.rtol)
            scenarios.power_balance(problem, sol.u)
    except (InputError, ConvergenceError):
        pass  # the real problem reports its own errors


def _solve(args, problem, progress):
    """The library's solve of ``problem``; a refusal for want of refinement says what to type."""
    try:
        return scenarios.solve_problem(
            problem, preconditioner=args.preconditioner, rtol=args.rtol, maxiter=args.maxiter,
            memory_check=args.memory_check,
            progress=lambda phase: progress.phase(PHASE_TEXT.get(phase, phase)),
            monitor=IterationReport(progress),
        )
    except InputError as exc:
        if problem.mesh.refinement is None and needs_refinement(args):
            size = (" (--refine 6 gives the default size)"
                     if args.mesh is None and args.scenario != "block" else "")
            raise InputError(f"{exc}{REFINE_HINT}{size}") from exc
        raise


def run(args, progress):
    """Run ``hatkernels solve``; return the exit code."""
    if args.problem_file is not None:
        return problemfile.run(args, progress)
    if args.until is not None:
        return transient.run(args, progress)
    if ranks_from_environment() > 1:
        return solve_mpi.run(args, progress)
    command = command_line(args)
    timings = {}
    # The temporary output directory is made first: an output that cannot be
    # created fails before the solve, and every later failure removes it.
    with kio.output_directory(args.out, force=args.force) as tmp, threads(args.threads):
        arrays, dim = read_mesh_option(args, progress)
        progress.phase("kernels: loading compiled kernels (or compiling them)")
        with CompileNotice(progress) as notice:
            _warm_up(args, dim or 2)
        t0 = time.perf_counter()
        mesh, description = build_mesh(args, progress, arrays)
        problem = make_problem(args, mesh, description)
        timings["mesh"] = time.perf_counter() - t0
        sol = _solve(args, problem, progress)
        progress.phase("check: power balance " + ("from the boundary reactions"
                       if problem.cooling is None else "through the cooled sides"))
        t0 = time.perf_counter()
        balance = scenarios.power_balance(problem, sol.u)
        timings["check"] = time.perf_counter() - t0
        summary = solve_summary(args, problem, sol, balance, timings, notice.seconds, command)
        progress.phase(f"write: solution.npz and summary.json into {args.out}")
        write_solve_outputs(tmp, problem, sol.u, summary, progress, args.rtol)
    progress.phase("done")
    progress.close()
    print(solve_report(problem, summary, args.out))
    return 0
