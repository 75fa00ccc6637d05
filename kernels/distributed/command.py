"""``mpiexec -n P hatkernels solve ...``: the command's scenario, solved over the ranks.

:mod:`hatkernels.cli` calls :func:`solve_command` from ``cmd_solve`` when the
launcher's environment says there is more than one rank
(:func:`~hatkernels.distributed.launch.ranks_from_environment`, read before
mpi4py is imported).  Every rank builds the same mesh and problem (the
replicated input path), the solve is :func:`hatkernels.distributed.solve_poisson`
with the two-level preconditioner, and only rank 0 checks the power balance,
prints, and writes the output directory; the other ranks stay silent.

Errors: bad usage or input is detected identically on every rank (rank 0
reports it, all exit with its code); an unexpected error on one rank, which
could leave the others waiting in a collective call, aborts the job
(``MPI_Abort``) after printing the error.
"""

from __future__ import annotations

import shlex
import sys
import time
import traceback
import warnings

from hatkernels.distributed.launch import MPIUnavailable, ranks_from_environment, world
from hatkernels.errors import ConvergenceError, InputError

__all__ = ["solve_command", "COMMAND_COARSE"]

#: The coarse space the command uses: the two-level method, whose iteration
#: count does not grow with the number of ranks the way block Jacobi's does.
COMMAND_COARSE = "constants"


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


def solve_command(args, progress):
    """Run ``hatkernels solve`` over MPI; return the exit code (see :mod:`hatkernels.cli`)."""
    from hatkernels import cli

    expected = ranks_from_environment()
    comm = _world(expected)
    rank = comm.Get_rank()
    if rank != 0:
        progress = cli.Progress(quiet=True)
    try:
        solved = _collective(args, progress, comm)
    except (InputError, ConvergenceError) as exc:
        if rank == 0:
            raise  # reported by cli.main, with its exit code
        return 1 if isinstance(exc, ConvergenceError) else 2
    except Exception as exc:
        sys.stderr.write(f"{cli.PROG}: error: internal error on rank {rank} of "
                         f"{comm.Get_size()}: {type(exc).__name__}: {exc}\n")
        if getattr(args, "debug", False):
            traceback.print_exc()
        sys.stderr.flush()
        comm.Abort(1)
        raise
    if rank != 0:
        return 0
    return _report(args, progress, comm, *solved)


def _warm_up(args, comm):
    """A tiny distributed solve of the same kind, so that kernels compile (or load) first."""
    from hatkernels import scenarios
    from hatkernels.mesh import Mesh, rectangle
    from hatkernels.scenarios import COARSE_CELLS, PLATE

    if args.mesh is not None:
        grid = rectangle(4, 4)
        tiny = Mesh(grid.points, grid.triangles).refine().refine()
        problem = scenarios.mesh_problem(tiny, source=args.source, conductivity=args.conductivity)
    else:
        tiny = rectangle(*PLATE.cells(COARSE_CELLS), bounds=PLATE.bounds).refine()
        problem = scenarios.heat_spreader(tiny, source=args.source, conductivity=args.conductivity)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            _solve(problem, args, comm, None, gather=False)
    except (InputError, ConvergenceError):
        pass  # the real problem reports its own errors


def _solve(problem, args, comm, progress, gather="root", monitor=None):
    from hatkernels.distributed.solve import solve_poisson
    from hatkernels.scenarios import _coefficient

    return solve_poisson(
        problem.mesh,
        _coefficient(problem.source),
        comm=comm,
        dirichlet=problem.dirichlet,
        dirichlet_on="boundary",
        coefficient=_coefficient(problem.conductivity),
        preconditioner=args.preconditioner,
        rtol=args.rtol,
        maxiter=args.maxiter,
        check=True,
        progress=progress,
        monitor=monitor,
        coarse=COMMAND_COARSE,
        gather=gather,
        threads=args.threads,
    )


def _collective(args, progress, comm):
    """The part every rank runs: checks, mesh, problem, solve (rank 0 gets the solution)."""
    from hatkernels import cli
    from hatkernels import io as kio

    if args.cells is not None and args.refine is not None:
        # InputError, not cli.UsageError: under ``python -m hatkernels.cli`` that class
        # exists twice (__main__ and hatkernels.cli); both exit 2 with this message.
        raise InputError("--cells and --refine both set the mesh size; give one "
                         "(see 'hatkernels solve --help')")
    if args.preconditioner in cli.NEEDS_REFINEMENT:
        raise InputError(f"--preconditioner {args.preconditioner} is not available under "
                         f"mpiexec (a subdomain has no refinement history); use amg or ic0")
    out = _on_root(comm, kio.check_output_directory, args.out, force=args.force)
    command = f"mpiexec -n {comm.Get_size()} " + shlex.join([cli.PROG, "solve"] + args.argv)
    timings = {}
    arrays = None
    if args.mesh is not None:  # every rank reads the file: the replicated input path
        progress.phase(f"mesh: reading {args.mesh} (on every rank)")
        arrays = kio.read_mesh_arrays(args.mesh)
    progress.phase(f"kernels: loading compiled kernels (or compiling them) on "
                   f"{comm.Get_size()} ranks")
    with cli.CompileNotice(progress) as notice:
        _warm_up(args, comm)
    t0 = time.perf_counter()
    mesh, description = cli._build_mesh(args, progress, arrays)
    problem = cli._problem(args, mesh, description)
    timings["mesh"] = time.perf_counter() - t0
    phases = {"boundary": "boundary: Dirichlet conditions and partition",
              "assemble": "assemble: owned rows on each rank's subdomain",
              "solve": "solve: preconditioner setup and distributed conjugate gradients"}
    sol = _solve(problem, args, comm, lambda phase: progress.phase(phases.get(phase, phase)),
                 monitor=cli.IterationReport(progress))
    return out, problem, sol, timings, notice.seconds, command


def _report(args, progress, comm, out, problem, sol, timings, kernels_seconds, command):
    """Rank 0: power balance, summary, output files, the printed report."""
    from hatkernels import cli, scenarios
    from hatkernels import io as kio

    progress.phase("check: power balance from the boundary reactions (rank 0)")
    t0 = time.perf_counter()
    balance = scenarios.power_balance(problem, sol.u)
    timings["check"] = time.perf_counter() - t0
    summary = cli._solve_summary(args, problem, sol, balance, timings, kernels_seconds, command)
    summary["distributed"] = distributed_summary(sol)
    progress.phase(f"write: solution.npz and summary.json into {args.out} (rank 0)")
    with kio.output_directory(out, force=args.force) as tmp:
        cli._write_solve_outputs(tmp, problem, sol, summary, progress, args)
    progress.phase("done")
    progress.close()
    text = cli._solve_report(problem, summary, args.out)
    caution = summary["caution"]
    head = text[: -len(caution)].rstrip("\n") if text.endswith(caution) else text
    print(head)
    print(distributed_report(summary["distributed"]))
    print()
    print(caution)
    return 0


def distributed_summary(sol):
    """The distributed part of a solve's stats, for summary.json."""
    st = sol.stats
    keep = ("rank", "owned_points", "owned_unknowns", "triangles", "ghost_points",
            "ghost_unknowns", "neighbours", "nnz", "halo_bytes_per_product",
            "halo_messages_per_product", "communication", "timings")
    return {
        "ranks": st["ranks"],
        "threads_per_rank": st["threads_per_rank"],
        "coarse": COMMAND_COARSE,
        "condition_estimate": st["condition_estimate"],
        "partition": st["partition"],
        "communication": st["communication"],
        "balance": [{k: b[k] for k in keep} for b in st["balance"]],
    }


def _seconds(t):
    return f"{t * 1e3:.1f} ms" if t < 0.1 else f"{t:.2f} s"


def distributed_report(d):
    """Lines for the printed report: ranks, partition quality, per-rank balance and communication."""
    tp = d["threads_per_rank"]
    part = d["partition"]
    com = d["communication"]
    lines = [
        f"{'ranks':<16}{d['ranks']} MPI ranks, {tp['threads']} numba thread"
        f"{'s' if tp['threads'] != 1 else ''} each ({tp['chosen_by']}), two-level "
        f"preconditioner (coarse space: one constant per subdomain)",
        f"{'partition':<16}{part['method']}: imbalance {part['imbalance']:.2%} in owned points, "
        f"{part['entry_imbalance']:.2%} in stored entries; interface {part['interface_points']:,} "
        f"points, {part['cut_edges']:,} cut edges",
    ]
    for b in d["balance"]:
        c = b["communication"]
        lines.append(
            f"{'rank ' + str(b['rank']):<16}{b['owned_points']:,} points ({b['owned_unknowns']:,} "
            f"unknowns), {b['triangles']:,} triangles, {b['ghost_points']:,} ghosts from "
            f"{len(b['neighbours'])} neighbour{'s' if len(b['neighbours']) != 1 else ''}; "
            f"communication {_seconds(c['seconds'])} of a {_seconds(b['timings']['solve'])} "
            f"solve (halo {_seconds(c['halo_seconds'])}, reductions "
            f"{_seconds(c['reduction_seconds'])}, coarse {_seconds(c['coarse_seconds'])})")
    lines.append(
        f"{'per iteration':<16}halo {com['halo_bytes_per_product'] / 1e3:.1f} kB in "
        f"{com['halo_messages_per_product']} messages (all ranks), "
        f"{com['reductions_per_iteration']:.2g} reductions of "
        f"{com['reduction_bytes_per_iteration']:.3g} bytes in all, coarse "
        f"{com['coarse_bytes_per_application']} bytes through rank 0; "
        f"condition estimate {d['condition_estimate']:.3g}")
    lines.append(f"{'':<16}(communication seconds include waiting for slower ranks; with more "
                 f"ranks than cores they measure the oversubscription, not the network)")
    return "\n".join(lines)
