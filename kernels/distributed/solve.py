"""The one-call distributed solve: :func:`hatkernels.poisson.solve_poisson` over MPI ranks.

The mesh may have triangles or tetrahedra.  Two input paths, chosen by what
the ranks pass as ``mesh``:

replicated
    every rank is given the whole mesh and the same data (simple, and the call
    is the serial one, but each rank holds the whole mesh, so memory per rank
    does not shrink as ranks are added);
scattered
    the mesh on rank 0 only, None on the others: rank 0 parses the problem,
    partitions it and sends each rank its part (its assembled local rows and
    its halo plan, :mod:`hatkernels.distributed.scatter`), so no other rank
    ever holds the whole mesh.

Then each rank, on either path,

1. reduces the Dirichlet points and lifts their values, locally,
2. runs the distributed CG with a block-Jacobi (optionally two-level)
   preconditioner, and
3. gathers the nodal solution where asked.

On the replicated path each rank partitions the mesh (deterministically: all
ranks compute the same split) and cuts its own part.  Errors in the local
phases are agreed on before any rank goes on, so a bad value met by one rank
(or by rank 0 for all of them) raises on all of them instead of leaving the
others waiting in a collective call.
"""

from __future__ import annotations

import dataclasses
import time

import numba
import numpy as np

from hatkernels._jit import threads as _threads
from hatkernels.discretise import LinearSystem
from hatkernels.distributed.assembly import reduce_local
from hatkernels.distributed.cg import cg
from hatkernels.distributed.halo import CommStats
from hatkernels.distributed.launch import as_comm, default_threads
from hatkernels.distributed.matrix import DistributedMatrix
from hatkernels.distributed.outcome import (
    GATHER,
    DistributedPoissonSolution,
    Distribution,
    _per,
    _together,
    gather_in_order,
)
from hatkernels.distributed.partition import METHODS, Partition, partition
from hatkernels.distributed.precond import COARSE_SPACES, make_distributed_preconditioner
from hatkernels.distributed.refined_solve import NotRefinable, solve_partitioned
from hatkernels.distributed.scatter import (
    input_mode,
    input_status,
    on_root,
    part_of,
    recv_part,
    scatter_parts,
    settle,
)
from hatkernels.distributed.scatter import local_boundary as _local_boundary  # noqa: F401
from hatkernels.errors import InputError
from hatkernels.memory import check_refine_memory, check_solve_memory
from hatkernels.mesh.core import Mesh
from hatkernels.perf import peak_rss_bytes
from hatkernels.poisson import refined
from hatkernels.precond import DEFAULT as DEFAULT_PRECONDITIONER
from hatkernels.precond import capabilities
from hatkernels.problem import PoissonProblem
from hatkernels.solver import report_convergence
from hatkernels.stats import SolveStats

__all__ = ["Distribution", "DistributedPoissonSolution", "solve_poisson", "GATHER"]


def _split(mesh, size, parts):
    if isinstance(parts, Partition):
        if parts.parts != size:
            raise InputError(f"the partition has {parts.parts} parts but the communicator "
                             f"has {size} ranks")
        if parts.owner.shape != (mesh.n_points,) or parts.mesh is not mesh:
            raise InputError("the partition was made for another mesh")
        return parts
    return partition(mesh, size, method=parts or "rcb")


def _summary(problem, split):
    """What every rank must know of the whole problem (sent from rank 0 when scattered)."""
    return {"n_points": int(problem.mesh.n_points), "dim": int(problem.mesh.dim),
            "n_fixed": int(problem.dirichlet.points.size),
            "counts": split.counts().astype(np.int64),
            "partition": {"method": split.method, "weight": split.weight,
                          **split.quality().as_dict()}}


def _check_options(preconditioner, coarse, gather, matrix_free, variant, parts, monitor):
    if matrix_free:
        raise InputError("matrix_free=True is not available in the distributed solve; each "
                         "rank assembles its rows (leave matrix_free unset)")
    if variant is not None:
        raise InputError("variant applies to matrix-free solves, which the distributed solve "
                         "does not do")
    if not isinstance(preconditioner, str):
        raise InputError(f"the distributed solve takes a preconditioner name, applied on each "
                         f"rank's block; got {type(preconditioner).__name__}")
    if coarse not in COARSE_SPACES:
        raise InputError(f"coarse must be one of {COARSE_SPACES}, got {coarse!r}")
    if gather not in GATHER or isinstance(gather, int) and not isinstance(gather, bool):
        raise InputError(f"gather must be True (every rank), 'root' (rank 0) or False, "
                         f"got {gather!r}")
    if monitor is not None and not callable(monitor):
        raise InputError(f"monitor must be callable or None, got {type(monitor).__name__}")
    if not (parts is None or isinstance(parts, Partition) or parts in METHODS):
        raise InputError(f"partition must be None, one of {METHODS} or a Partition, "
                         f"got {parts!r}")



def solve_poisson(
    mesh,
    f=1.0,
    *,
    refine=0,
    comm=None,
    dirichlet=0.0,
    dirichlet_on=None,
    coefficient=None,
    reaction=None,
    neumann=None,
    robin=None,
    preconditioner=None,
    rtol=1e-10,
    atol=0.0,
    maxiter=None,
    start=None,
    check=False,
    quadrature=2,
    matrix_free=None,
    variant=None,
    progress=None,
    monitor=None,
    zero_mean=False,
    memory_check=True,
    coarse=None,
    partition=None,
    gather=True,
    threads=None,
    renumber=None,
    **preconditioner_options,
):
    """Solve ``-div(kappa grad u) + c u = f`` over the ranks of ``comm`` (collective).

    Takes the arguments of :func:`hatkernels.poisson.solve_poisson` (the same
    meaning) and returns the same kind of result.  With one rank the result
    equals the serial one (with ``renumber=False``: a serial solve renumbers a
    system whose numbering has no locality, the distributed one does not).  Every rank makes the same call, with the mesh
    either on every rank (replicated input) or on rank 0 only (scattered
    input, below).

    Parameters
    ----------
    mesh : Mesh or None
        The same mesh on every rank (replicated input), or the mesh on rank 0
        and None on every other rank (scattered input: rank 0 parses the data,
        partitions and sends each rank only its part, so no other rank holds
        the whole mesh; see :mod:`hatkernels.distributed.scatter`).  Then the
        problem's data (``f``, ``dirichlet``, ``dirichlet_on``,
        ``coefficient``, ``reaction``, ``neumann``, ``robin``, ``quadrature``,
        ``partition``) are taken from rank 0's call and the other ranks' are
        ignored; callables need not be picklable, as only rank 0 evaluates
        them.  ``refine`` must be 0 there (refining needs the mesh on every
        rank).  Any other mix of meshes and None is an InputError on every
        rank, naming the ranks.
    f, refine, dirichlet, dirichlet_on, coefficient, reaction, neumann, robin
        As in :func:`hatkernels.poisson.solve_poisson`.
    comm : mpi4py intracommunicator, optional
        Default ``MPI.COMM_WORLD``.
    preconditioner : str, optional
        With ``refine=k > 0``, None (the default) or ``"gmg"`` take the
        partitioned path: each rank refines only its part of the coarse mesh
        and the multigrid runs across ranks on every level, with the serial
        iteration counts (:mod:`hatkernels.distributed.refined_solve`).  When
        the problem cannot take it (data given per point or side of the
        coarse mesh, held values on single points, ``coarse``, ``partition``),
        None falls back to the replicated path with ``"amg"`` and says why in
        ``stats.distribution.why``; ``"gmg"`` raises instead.  Otherwise a
        name from :data:`hatkernels.PRECONDITIONERS` (default ``"amg"``) is
        applied by each rank to its owned block (block Jacobi, or the
        two-level method with ``coarse``) on the replicated path.
        ``**preconditioner_options`` go to it.
    rtol, atol, maxiter, check
        As in the serial solve; the stopping rule is on the global residual.
    start : None or "zero"
        CG starts from zero; the serial solve's full-multigrid start
        (``start="nested"``, ``rtol=None``) is not distributed yet and is
        refused (InputError, on every rank).
    quadrature : int
    matrix_free, variant
        On the partitioned path: the level operators are matrix-free by
        default (``matrix_free=False`` assembles them; ``variant`` names the
        matrix-free variant).  On the other paths each rank assembles its rows:
        an error if set.
    zero_mean
        Not available distributed (an error if set).
    renumber : None or False
        Each rank's rows stay in the mesh's order (``True``, the serial solve's
        Z order, is not available distributed yet: an error on every rank).
    memory_check : bool
        As serial; each rank's share of the points is checked against what
        its node has available (ranks on one node share it: checked roughly).
    progress : callable, optional
        ``progress(phase)`` on every rank.
    monitor : callable, optional
        ``monitor(iteration, residual_norm)`` after every CG iteration, on
        every rank, with the global residual norm (the same on every rank).
    coarse : None or "constants"
        None: block Jacobi.  ``"constants"``: the additive two-level
        preconditioner with one constant per subdomain (iterations bounded
        as ranks are added; see :mod:`hatkernels.distributed.precond`).
    partition : None, "rcb", "hilbert" or Partition
        How to split the points; default ``"rcb"`` (see
        :func:`hatkernels.distributed.partition`).
    gather : True, "root" or False
        The full nodal solution ``u`` on every rank (``True``, the
        default), on rank 0 only (``"root"``; ``u`` is None elsewhere), or
        nowhere (``False``).  ``u_owned`` and ``owned`` are always set.
    threads : int, optional
        numba threads per rank; default from the cores and the ranks on this
        node (see :func:`hatkernels.distributed.launch.default_threads`).

    Returns
    -------
    DistributedPoissonSolution
        With scattered input, ``mesh`` and ``problem`` are the whole mesh and
        problem on rank 0 and None on the other ranks;
        ``stats.distribution.path`` says which path ran.

    Raises
    ------
    InputError
        As the serial solve, on every rank; also when ranks were given
        different meshes, a mesh on some ranks and None on others (other than
        rank 0 alone), or different solver options (``refine``,
        ``preconditioner``, ``coarse``, ``gather``, ``rtol``, ``atol``,
        ``maxiter``).
    ConvergenceError
        With ``check=True``, on every rank.
    """
    if rtol is None or start not in (None, "zero"):
        raise InputError(f"start={start!r}, rtol={rtol!r}: the full-multigrid start is serial "
                         f"only (hatkernels.solve_poisson); the distributed solve starts CG "
                         f"from zero and needs a tolerance")
    if renumber not in (None, False):
        raise InputError(f"renumber={renumber!r}: renumbering the system is serial only "
                         f"(hatkernels.solve_poisson); each rank's rows stay in the mesh's "
                         f"order (mesh.reorder('hilbert') renumbers the mesh itself)")
    agreed = {"refine": refine, "preconditioner": preconditioner, "coarse": coarse,
              "gather": gather, "rtol": rtol, "atol": atol, "maxiter": maxiter}
    seen = None
    if refine:  # refining needs the mesh everywhere: every rank learns of a None first
        seen = as_comm(comm).allgather(input_status(mesh, agreed))
        input_mode(seen)
    why = ""
    if refine and (preconditioner is None or isinstance(preconditioner, str)
                   and capabilities(preconditioner).needs_mesh):
        try:  # multigrid on the refinements, each rank refining its part
            return solve_partitioned(
                mesh, f, refine, comm, dirichlet, dirichlet_on, coefficient, reaction, neumann,
                robin, rtol, atol, maxiter, check, quadrature, matrix_free, variant, monitor,
                zero_mean, partition, gather, threads, preconditioner_options, coarse=coarse,
                progress=progress)
        except NotRefinable as exc:
            if preconditioner is not None:
                raise
            why = str(exc)
    if preconditioner is None:
        preconditioner = DEFAULT_PRECONDITIONER
    if isinstance(mesh, Mesh):  # every rank refines the whole mesh (the replicated path)
        if memory_check and refine:  # the mesh is on every rank here (refine needs it)
            comm = as_comm(comm)
            _together(comm, "the memory check", check_refine_memory, mesh, refine,
                      "with the default preconditioner each rank refines its part only, "
                      "where the data allow; or refine fewer times, start fewer ranks per "
                      "node, or pass memory_check=False to try anyway",
                      default_threads(comm)[1])
        mesh = refined(mesh, refine)
    _check_options(preconditioner, coarse, gather, matrix_free, variant,
                   None if mesh is None else partition, monitor)
    if zero_mean is not False:
        raise InputError("zero_mean=True (a pure Neumann part) is not available in the "
                         "distributed solve yet; solve it serially, or hold a point")
    comm = as_comm(comm)
    if seen is None:
        seen = comm.allgather(input_status(mesh, agreed))
    scattered = input_mode(seen) == "scattered"
    n_threads, ranks_on_node, how = default_threads(comm, threads)
    if memory_check:  # scattered: rank 0, holding the mesh, checks for all
        (on_root if scattered else _together)(
            comm, "the memory check", check_solve_memory, mesh, preconditioner,
            share=ranks_on_node / comm.Get_size())
    dcomm = comm.Dup()  # the solver's messages never meet the caller's
    try:
        with _threads(n_threads):
            sol = _solve(mesh, f, dcomm, dirichlet, dirichlet_on, coefficient, reaction,
                         neumann, robin, preconditioner, rtol, atol, maxiter, quadrature,
                         progress, monitor, coarse, partition, gather, preconditioner_options,
                         scattered)
    finally:
        dcomm.Free()
    sol.stats.distribution.threads_per_rank = {"threads": n_threads,
                                               "ranks_on_node": ranks_on_node, "chosen_by": how}
    sol.stats.distribution.why = why
    report_convergence(sol.stats, check)
    return sol


def _solve(mesh, f, comm, dirichlet, dirichlet_on, coefficient, reaction, neumann, robin,
           preconditioner, rtol, atol, maxiter, quadrature, progress, monitor, coarse, parts,
           gather, options, scattered):
    rank, size = comm.Get_rank(), comm.Get_size()
    run = on_root if scattered else _together  # scattered: only rank 0 has the data
    note = progress or (lambda phase: None)
    stats = CommStats()
    t0 = time.perf_counter()
    timings = {}

    note("boundary")
    t1 = time.perf_counter()
    # the same checked problem as the serial solve, parsed by every rank that has the data
    problem = run(comm, "reading the problem", PoissonProblem, mesh, f, dirichlet=dirichlet,
                  dirichlet_on=dirichlet_on, coefficient=coefficient, reaction=reaction,
                  neumann=neumann, robin=robin, quadrature=quadrature)
    timings["boundary"] = time.perf_counter() - t1

    t1 = time.perf_counter()
    split = run(comm, "partitioning", _split, mesh, size, parts)
    # the same mesh on every rank (replicated) was checked by input_mode
    info = comm.bcast(_summary(problem, split) if rank == 0 else None, root=0) if scattered \
        else _summary(problem, split)
    timings["partition"] = time.perf_counter() - t1

    note("assemble")
    t2 = time.perf_counter()
    if not scattered:
        part = _together(comm, "assembly", part_of, problem, split, rank)
    else:  # rank 0 cuts and sends every part, then its own
        own, failure = (scatter_parts(comm, problem, split) if rank == 0
                        else (recv_part(comm), None))
        part = settle(comm, "assembly", own, failure)
        del own
    local = _together(comm, "Dirichlet reduction", reduce_local, part, part.A, part.b,
                      part.fixed, part.values)
    part = part.reduced()
    matrix = DistributedMatrix(local.A, local.pattern, comm, stats)
    n_of = local.n_unknowns
    # this rank's share of the problem's linear system, in the serial solve's type
    system = LinearSystem(matrix, local.b, problem, False, None, n_of, int(matrix.nbytes),
                          int(matrix.nnz), timings, local)
    arrived = matrix.halo.exchange_indices(local.free_points[:n_of])
    _together(comm, "the halo check", _check_halo, arrived, local.free_points[n_of:])
    timings["assemble"] = time.perf_counter() - t2

    note("solve")
    t3 = time.perf_counter()
    M = _together(comm, "preconditioner setup", make_distributed_preconditioner, matrix,
                  preconditioner, coarse, comm, stats, **options)
    timings["setup"] = time.perf_counter() - t3
    setup_stats = dataclasses.replace(stats)
    t4 = time.perf_counter()
    result = cg(system.A, system.b, rtol=rtol, atol=atol, maxiter=maxiter, M=M, warn=False,
                monitor=monitor)
    timings["solve"] = time.perf_counter() - t4
    u_owned = local.expand(result.x)  # no floating parts here (zero_mean is refused)

    t5 = time.perf_counter()
    u = gather_in_order(comm, info["counts"], None if split is None else split.order(),
                info["n_points"], u_owned, gather, scattered)
    timings["gather"] = time.perf_counter() - t5
    timings["total"] = time.perf_counter() - t0

    mine = {
        "rank": rank,
        "owned_points": int(part.n_owned),
        "owned_unknowns": int(n_of),
        "cells": int(part.n_cells),
        "ghost_points": int(part.n_ghosts),
        "ghost_unknowns": int(local.pattern.n_ghosts),
        "neighbours": part.neighbours.tolist(),
        "nnz": int(matrix.nnz),
        "operator_bytes": int(matrix.nbytes),
        "halo_bytes_per_product": int(8 * local.pattern.send_counts.sum()),
        "halo_messages_per_product": int((local.pattern.send_counts > 0).sum()),
        "communication": _solve_part(stats, setup_stats).as_dict(),
        "setup_communication_seconds": setup_stats.seconds,
        "timings": timings,
        "peak_rss_bytes": peak_rss_bytes(),
    }
    if info["dim"] == 2:
        mine["triangles"] = mine["cells"]  # the older name of the figure, on triangle meshes
    balance = comm.allgather(mine)
    worst = {k: max(b["timings"][k] for b in balance) for k in timings}
    unknowns = sum(b["owned_unknowns"] for b in balance)
    nnz = sum(b["nnz"] for b in balance)
    op_bytes = sum(b["operator_bytes"] for b in balance)
    description = M.description
    if size > 1 and coarse is None:
        description = f"block Jacobi over {size} ranks, rank 0's block: {description}"
    description = comm.bcast(description, root=0)
    iters = max(result.iterations, 1)
    halo_total = sum(b["halo_bytes_per_product"] for b in balance)
    distribution = Distribution(
        partition=info["partition"],
        balance=balance,
        communication={
            "halo_bytes_per_product": halo_total,
            "halo_messages_per_product": sum(b["halo_messages_per_product"] for b in balance),
            "halo_exchanges_per_iteration": _per(balance, "halo_exchanges", iters),
            "reductions_per_iteration": _per(balance, "reductions", iters),
            "reduction_bytes_per_iteration": _per(balance, "reduction_bytes", iters),
            "coarse_bytes_per_application": 16 * size if coarse else 0,
            "seconds_max": max(b["communication"]["seconds"] for b in balance),
            "seconds_per_iteration_max": max(b["communication"]["seconds"] for b in balance)
            / iters,
        },
        path="scattered" if scattered else "replicated",
    )
    stats_out = SolveStats(
        iterations=result.iterations,
        converged=result.converged,
        residuals=result.residuals,
        timings=worst,
        unknowns=unknowns,
        preconditioner=description,
        stored_bytes=op_bytes,
        peak_rss_bytes=max(b["peak_rss_bytes"] for b in balance),
        threads=numba.get_num_threads(),
        info=result.info,
        message=result.message,
        tolerance=result.tolerance,
        condition_estimate=result.condition_estimate,
        nnz=nnz,
        dirichlet_points=info["n_fixed"],
        ranks=size,
        distribution=distribution,
    )
    return DistributedPoissonSolution(u=u, stats=stats_out, mesh=mesh, problem=problem,
                                      u_owned=u_owned,
                                      owned=part.owned.copy(), rank=rank, size=size)


def _check_halo(arrived, expected):
    if not np.array_equal(arrived, expected):
        k = int(np.flatnonzero(arrived != expected)[0])
        raise RuntimeError(f"halo plan mismatch: ghost unknown {k} should be point "
                           f"{int(expected[k])} but its owner sends point {int(arrived[k])}")


def _solve_part(total, setup):
    """Counters of the solve phase only (total minus what setup had)."""
    out = CommStats()
    for field in dataclasses.fields(CommStats):
        setattr(out, field.name, getattr(total, field.name) - getattr(setup, field.name))
    return out
