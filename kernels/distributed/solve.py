"""The one-call distributed solve: :func:`hatkernels.poisson.solve_poisson` over MPI ranks.

The mesh may have triangles or tetrahedra.  Every rank is given the whole
mesh and the same data (the replicated input path: simple, and it keeps the
call identical to the serial one, but each rank holds the whole mesh, so
memory per rank does not shrink as ranks are added; see docs/distributed.md
for the scalable alternative).  Each rank

1. partitions the mesh (deterministically: all ranks compute the same split),
2. extracts its subdomain (owned points, the cells touching them, one
   layer of ghosts) and assembles its owned rows there,
3. reduces the Dirichlet points and lifts their values, locally,
4. runs the distributed CG with a block-Jacobi (optionally two-level)
   preconditioner, and
5. gathers the nodal solution where asked.

Errors in the local phases are agreed on before any rank goes on, so a bad
value met by one rank raises on all of them instead of leaving the others
waiting in a collective call.
"""

from __future__ import annotations

import dataclasses
import time

import numba
import numpy as np

from hatkernels._jit import threads as _threads
from hatkernels.discretise import LinearSystem
from hatkernels.distributed.assembly import assemble_local, local_boundary_data, reduce_local
from hatkernels.distributed.cg import cg
from hatkernels.distributed.halo import CommStats
from hatkernels.distributed.launch import as_comm, default_threads, mpi
from hatkernels.distributed.matrix import DistributedMatrix
from hatkernels.distributed.outcome import (
    GATHER,
    DistributedPoissonSolution,
    Distribution,
    _per,
    _together,
)
from hatkernels.distributed.partition import METHODS, Partition, partition
from hatkernels.distributed.precond import COARSE_SPACES, make_distributed_preconditioner
from hatkernels.distributed.refined_solve import NotRefinable, solve_partitioned
from hatkernels.distributed.subdomain import local_coefficient, subdomain
from hatkernels.errors import InputError
from hatkernels.memory import check_solve_memory
from hatkernels.mesh.core import Mesh
from hatkernels.perf import peak_rss_bytes
from hatkernels.poisson import refined
from hatkernels.precond import capabilities
from hatkernels.problem import PoissonProblem
from hatkernels.solver import report_convergence
from hatkernels.stats import SolveStats

__all__ = ["Distribution", "DistributedPoissonSolution", "solve_poisson", "GATHER"]

def _same_input_everywhere(comm, mesh, parts):
    mine = (mesh.n_points, mesh.n_cells, mesh.dim, float(mesh.points.sum()),
            int(mesh.cells.sum(dtype=np.int64)))
    seen = comm.allgather(mine)
    for r, other in enumerate(seen):
        if other != mine:
            raise InputError(f"rank {r} was given another mesh ({other[0]} points, {other[1]} "
                             f"cells in {other[2]}-D) than rank {comm.Get_rank()} ({mine[0]}, "
                             f"{mine[1]} in {mine[2]}-D): the distributed solve needs the same "
                             f"mesh on every rank")
    if parts.owner.shape != (mesh.n_points,) or parts.mesh is not mesh:
        raise InputError("the partition was made for another mesh")


def _local_boundary(sub, problem):
    """This rank's part of the problem's flux and Robin sides, with their data."""
    n = problem.mesh.n_points
    neumann = robin = None
    if problem.flux is not None:
        neumann = local_boundary_data(sub, n, problem.flux.sides, problem.flux.flux,
                                      name="boundary load", sign="any")
    if problem.robin is not None:
        rb = problem.robin
        le, lr = local_boundary_data(sub, n, rb.sides, rb.r, name="boundary coefficient",
                                     sign="nonnegative")
        _, ls = local_boundary_data(sub, n, rb.sides, rb.s, name="boundary load", sign="any")
        robin = (le, lr, ls)
    return neumann, robin


def _check_options(mesh, preconditioner, coarse, gather, matrix_free, variant, parts, monitor):
    if not isinstance(mesh, Mesh):
        raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
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
    **preconditioner_options,
):
    """Solve ``-div(kappa grad u) + c u = f`` over the ranks of ``comm`` (collective).

    Takes the arguments of :func:`hatkernels.poisson.solve_poisson` (the same
    meaning; every rank passes the same mesh and data) and returns the same
    kind of result.  With one rank the result equals the serial one.

    Parameters
    ----------
    mesh, f, refine, dirichlet, dirichlet_on, coefficient, reaction, neumann, robin
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
    quadrature : int
    matrix_free, variant, zero_mean
        Not available distributed (an error if set).
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

    Raises
    ------
    InputError
        As the serial solve, on every rank; also when ranks were given
        different meshes.
    ConvergenceError
        With ``check=True``, on every rank.
    """
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
        preconditioner = "amg"
    mesh = refined(mesh, refine)  # every rank refines the whole mesh (the replicated path)
    _check_options(mesh, preconditioner, coarse, gather, matrix_free, variant, partition,
                   monitor)
    if zero_mean is not False:
        raise InputError("zero_mean=True (a pure Neumann part) is not available in the "
                         "distributed solve yet; solve it serially, or hold a point")
    comm = as_comm(comm)
    n_threads, ranks_on_node, how = default_threads(comm, threads)
    if memory_check:
        _together(comm, "the memory check", check_solve_memory, mesh, preconditioner,
                  share=ranks_on_node / comm.Get_size())
    dcomm = comm.Dup()  # the solver's messages never meet the caller's
    try:
        with _threads(n_threads):
            sol = _solve(mesh, f, dcomm, dirichlet, dirichlet_on, coefficient, reaction,
                         neumann, robin, preconditioner, rtol, atol, maxiter, quadrature,
                         progress, monitor, coarse, partition, gather, preconditioner_options)
    finally:
        dcomm.Free()
    sol.stats.distribution.threads_per_rank = {"threads": n_threads,
                                               "ranks_on_node": ranks_on_node, "chosen_by": how}
    sol.stats.distribution.why = why
    report_convergence(sol.stats, check)
    return sol


def _solve(mesh, f, comm, dirichlet, dirichlet_on, coefficient, reaction, neumann, robin,
           preconditioner, rtol, atol, maxiter, quadrature, progress, monitor, coarse, parts,
           gather, options):
    rank, size = comm.Get_rank(), comm.Get_size()
    note = progress or (lambda phase: None)
    stats = CommStats()
    t0 = time.perf_counter()
    timings = {}

    note("boundary")
    t1 = time.perf_counter()
    # the same checked problem as the serial solve; every rank parses the same data
    problem = PoissonProblem(mesh, f, dirichlet=dirichlet, dirichlet_on=dirichlet_on,
                             coefficient=coefficient, reaction=reaction, neumann=neumann,
                             robin=robin, quadrature=quadrature)
    fixed, values = problem.dirichlet.points, problem.dirichlet.values
    timings["boundary"] = time.perf_counter() - t1

    t1 = time.perf_counter()
    if isinstance(parts, Partition):
        if parts.parts != size:
            raise InputError(f"the partition has {parts.parts} parts but the communicator "
                             f"has {size} ranks")
        split = parts
    else:
        split = partition(mesh, size, method=parts or "rcb")
    _same_input_everywhere(comm, mesh, split)
    quality = split.quality()
    sub = subdomain(split, rank)
    timings["partition"] = time.perf_counter() - t1

    note("assemble")
    t2 = time.perf_counter()

    def local_system():
        nb, rb = _local_boundary(sub, problem)
        c = problem.reaction
        A, b, _ = assemble_local(
            sub, kappa=local_coefficient(problem.coefficient, sub),
            f=local_coefficient(problem.source, sub),
            reaction=None if c is None else local_coefficient(c, sub), neumann=nb, robin=rb,
            quadrature=quadrature)
        loc = sub.local_numbers(fixed, mesh.n_points)
        here = loc >= 0
        return A, b, loc[here], values[here]

    A_L, b_L, fixed_local, values_local = _together(comm, "assembly", local_system)
    local = _together(comm, "Dirichlet reduction", reduce_local, sub, A_L, b_L, fixed_local,
                      values_local)
    del A_L, b_L
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
    u_owned = system.expand(result.x)

    t5 = time.perf_counter()
    u = _gather(comm, split, u_owned, gather)
    timings["gather"] = time.perf_counter() - t5
    timings["total"] = time.perf_counter() - t0

    mine = {
        "rank": rank,
        "owned_points": int(sub.n_owned),
        "owned_unknowns": int(n_of),
        "cells": int(len(sub.cells)),
        "ghost_points": int(sub.n_ghosts),
        "ghost_unknowns": int(local.pattern.n_ghosts),
        "neighbours": sub.neighbours.tolist(),
        "nnz": int(matrix.nnz),
        "operator_bytes": int(matrix.nbytes),
        "halo_bytes_per_product": int(8 * local.pattern.send_counts.sum()),
        "halo_messages_per_product": int((local.pattern.send_counts > 0).sum()),
        "communication": _solve_part(stats, setup_stats).as_dict(),
        "setup_communication_seconds": setup_stats.seconds,
        "timings": timings,
        "peak_rss_bytes": peak_rss_bytes(),
    }
    if mesh.dim == 2:
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
        partition={"method": split.method, "weight": split.weight, **quality.as_dict()},
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
        dirichlet_points=int(fixed.size),
        ranks=size,
        distribution=distribution,
    )
    return DistributedPoissonSolution(u=u, stats=stats_out, mesh=mesh, problem=problem,
                                      u_owned=u_owned,
                                      owned=sub.owned.copy(), rank=rank, size=size)


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


def _gather(comm, split, u_owned, gather):
    if gather is False:
        return None
    MPI = mpi()
    counts = split.counts().astype(np.int64)
    displs = np.concatenate([[0], np.cumsum(counts)[:-1]])
    order = split.order()
    n = split.mesh.n_points
    if gather is True:
        buf = np.empty(n)
        comm.Allgatherv([u_owned, MPI.DOUBLE], [buf, (counts, displs), MPI.DOUBLE])
    else:
        buf = np.empty(n) if comm.Get_rank() == 0 else None
        comm.Gatherv([u_owned, MPI.DOUBLE],
                     [buf, (counts, displs), MPI.DOUBLE] if buf is not None else None, root=0)
        if buf is None:
            return None
    u = np.empty(n)
    u[order] = buf
    return u
