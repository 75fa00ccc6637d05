"""``mpiexec -n P hatkernels solve ...``: the command's scenario, solved over the ranks.

:func:`hatkernels.cli.solve.run` calls :func:`run` when the launcher's
environment says there is more than one rank
(:func:`~hatkernels.distributed.launch.ranks_from_environment`, read before
mpi4py is imported).  Three paths, as in the library:

- partitioned: with ``--refine K`` the plate and a ``--mesh`` file are
  refinements (:mod:`hatkernels.cli.solve_parts`); each rank refines its
  part of the coarse mesh, the multigrid runs across the ranks, and each
  rank writes its piece of the solution;
- scattered: a ``--mesh`` file without ``--refine`` is read on rank 0 only,
  which sends each rank its part;
- replicated: the rest (the plate without ``--refine`` or with plate
  components whose edges are not on the refined mesh's lines, the block, a
  ``--preconditioner`` that needs no refinement history; the report says
  why) builds the same mesh and problem on every rank.

The last two solve with the two-level preconditioner, and only rank 0 checks
the power balance, prints, and writes the output directory; the other ranks
stay silent.

Errors: bad usage or input is detected identically on every rank; each
raises it and :func:`hatkernels.cli.main` reports it once, on rank 0, with
its exit code.  Preconditioners the distributed solve cannot use are refused
by the library, in its own words.  An unexpected error on one rank, which
could leave the others waiting in a collective call, aborts the job
(``MPI_Abort``) after printing the error.
"""

from __future__ import annotations

import dataclasses
import sys
import time
import traceback
import warnings

from hatkernels import io as kio
from hatkernels import scenarios
from hatkernels.cli import solve_parts
from hatkernels.cli.common import PROG, command_line
from hatkernels.cli.outputs import write_solve_outputs
from hatkernels.cli.problem import build_mesh, make_problem, tiny_problem
from hatkernels.cli.progress import CompileNotice, IterationReport, Progress
from hatkernels.cli.summary import (
    distributed_figures,
    distributed_report,
    solve_report,
    solve_summary,
)
from hatkernels.distributed import solve_poisson
from hatkernels.distributed.launch import MPIUnavailable, ranks_from_environment, world
from hatkernels.distributed.scatter import on_root
from hatkernels.errors import ConvergenceError, InputError
from hatkernels.perf import peak_rss_bytes

__all__ = ["run", "COMMAND_COARSE"]

#: The coarse space the command uses: the two-level method, whose iteration
#: count does not grow with the number of ranks the way block Jacobi's does.
COMMAND_COARSE = "constants"

#: The progress line for each phase the distributed solve announces.
PHASE_TEXT = {
    "boundary": "boundary: checks, boundary conditions and partition",
    "assemble": "assemble: owned rows on each rank's subdomain",
    "solve": "solve: preconditioner setup and distributed conjugate gradients",
}


#: The progress line for each phase of the partitioned path.
PARTS_TEXT = {
    "boundary": "boundary: checks on the coarse mesh",
    "assemble": "assemble: owned rows of the fine level on each rank",
    "solve": "solve: multigrid setup on every level and distributed conjugate gradients",
}


def _world(expected):
    try:
        comm = world()
    except MPIUnavailable as exc:
        raise InputError(f"started by mpiexec with {expected} ranks, but {exc}") from None
    if comm.Get_size() != expected:
        raise InputError(
            f"the launcher started {expected} ranks but MPI sees {comm.Get_size()}: this "
            f"mpiexec is not the one of the MPI that mpi4py uses; run the mpiexec of that MPI "
            f"(with the mpich wheel: the mpiexec next to this python)")
    return comm


def _on_root(comm, fn, *args, **kwargs):
    """``fn`` on rank 0 only; its result, or its InputError, on every rank."""
    value = failure = None
    if comm.Get_rank() == 0:
        try:
            value = fn(*args, **kwargs)
        except InputError as exc:
            failure = str(exc)
    value, failure = comm.bcast((value, failure), root=0)
    if failure is not None:
        raise InputError(failure)
    return value


def run(args, progress):
    """Run ``hatkernels solve`` over MPI; return the exit code (see :mod:`hatkernels.cli`)."""
    expected = ranks_from_environment()
    comm = _world(expected)
    rank = comm.Get_rank()
    if rank != 0:
        progress = Progress(quiet=True)
    try:
        solved = _collective(args, progress, comm)
    except (InputError, ConvergenceError):
        raise  # the same on every rank: reported once by hatkernels.cli.main
    except Exception as exc:
        sys.stderr.write(f"{PROG}: error: internal error on rank {rank} of "
                         f"{comm.Get_size()}: {type(exc).__name__}: {exc}\n")
        if getattr(args, "debug", False):
            traceback.print_exc()
        sys.stderr.flush()
        comm.Abort(1)
        raise
    if solved[0] == "partitioned":
        if rank == 0:
            print(solved[1])
        return 0
    if rank != 0:
        return 0
    return _report(args, progress, *solved)


def _solve(problem, args, comm, progress, gather="root", monitor=None):
    return scenarios.solve_problem(
        problem, preconditioner=args.preconditioner, rtol=args.rtol, maxiter=args.maxiter,
        progress=progress, monitor=monitor, solver=solve_poisson, comm=comm,
        memory_check=getattr(args, "memory_check", True),
        coarse=COMMAND_COARSE, gather=gather, threads=args.threads)


def _warm_up(args, comm):
    """A tiny distributed solve of the same kind, so that kernels compile (or load) first."""
    problem = tiny_problem(args, refinements=2 if args.mesh is not None else 1)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            _solve(problem, args, comm, None, gather=False)
    except (InputError, ConvergenceError):
        pass  # the real problem reports its own errors


def _collective(args, progress, comm):
    """The part every rank runs: checks, mesh, problem, solve (rank 0 gets the solution)."""
    out = _on_root(comm, kio.check_output_directory, args.out, force=args.force)
    command = f"mpiexec -n {comm.Get_size()} " + command_line(args)
    timings = {}
    arrays = None
    scattered = args.mesh is not None and not args.refine
    if scattered:  # rank 0 reads the file and sends each rank its part
        progress.phase(f"mesh: reading {args.mesh} (on rank 0, which sends each rank its part)")
        arrays = on_root(comm, "reading the mesh", kio.read_mesh_arrays, args.mesh)
    elif args.mesh is not None:  # a coarse mesh to refine: every rank reads it
        progress.phase(f"mesh: reading {args.mesh} (on every rank)")
        arrays = kio.read_mesh_arrays(args.mesh)
    progress.phase(f"kernels: loading compiled kernels (or compiling them) on "
                   f"{comm.Get_size()} ranks")
    chosen, why = solve_parts.plan(args, arrays)
    if chosen is not None:
        return "partitioned", _partitioned(args, progress, comm, chosen, out, command)
    if why:
        progress.phase(f"path: every rank holds the whole refined mesh ({why})")
    with CompileNotice(progress) as notice:
        _warm_up(args, comm)
    t0 = time.perf_counter()
    if scattered:  # the mesh exists on rank 0 only
        built = on_root(comm, "the mesh checks", build_mesh, args, progress, arrays)
        mesh, description = built if built is not None else (None, f"from {args.mesh}")
    else:
        mesh, description = build_mesh(args, progress, arrays)
    problem = make_problem(args, mesh, description)
    timings["mesh"] = time.perf_counter() - t0
    sol = _solve(problem, args, comm, lambda phase: progress.phase(PHASE_TEXT.get(phase, phase)),
                 monitor=IterationReport(progress))
    peak = max(comm.allgather(peak_rss_bytes()))  # the largest rank's, for the report
    return out, problem, sol, timings, notice.seconds, command, peak, why


def _partitioned(args, progress, comm, p, out, command):
    """The partitioned path (:mod:`hatkernels.cli.solve_parts`); rank 0 gets the report."""
    with CompileNotice(progress) as notice:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                solve_parts.solve(dataclasses.replace(p, refine=1), args, comm)
        except (InputError, ConvergenceError):
            pass  # the real problem reports its own errors
    progress.phase(f"mesh: each rank refines its part of the coarse mesh {p.refine} times")
    sol = solve_parts.solve(p, args, comm,
                            progress=lambda phase: progress.phase(PARTS_TEXT.get(phase, phase)),
                            monitor=IterationReport(progress))
    progress.phase("check: power balance and extremes, reduced over the ranks")
    t0 = time.perf_counter()
    summary = solve_parts.summary_record(args, p, sol, comm, {}, notice.seconds,
                                         command, None)
    summary["timings_s"]["check"] = time.perf_counter() - t0
    solve_parts.write(args, out, summary, sol, comm, progress)
    progress.phase("done")
    progress.close()
    return solve_parts.report(p, summary, args.out) if comm.Get_rank() == 0 else None


def _report(args, progress, out, problem, sol, timings, kernels_seconds, command, peak, why):
    """Rank 0: power balance, summary, output files, the printed report."""
    progress.phase("check: power balance " + ("from the boundary reactions" if problem.cooling
                                               is None else "through the cooled sides")
                   + " (rank 0)")
    t0 = time.perf_counter()
    balance = scenarios.power_balance(problem, sol.u)
    timings["check"] = time.perf_counter() - t0
    summary = solve_summary(args, problem, sol, balance, timings, kernels_seconds, command,
                            peak_bytes=peak)
    summary["distributed"] = distributed_figures(sol, COMMAND_COARSE)
    summary["distributed"]["path"] = sol.stats.distribution.path
    if why:
        summary["distributed"]["why"] = why
    progress.phase(f"write: solution.npz and summary.json into {args.out} (rank 0)")
    with kio.output_directory(out, force=args.force) as tmp:
        write_solve_outputs(tmp, problem, sol.u, summary, progress, args.rtol)
    progress.phase("done")
    progress.close()
    print(solve_report(problem, summary, args.out,
                       extra=distributed_report(summary["distributed"])))
    return 0
