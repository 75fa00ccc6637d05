"""``distributed.solve_poisson(mesh, f, refine=k, preconditioner="gmg")``: the solve on the
mesh refined k times with partitioned refinement and distributed multigrid
(:mod:`hatkernels.distributed.refined`); no rank builds the fine mesh.

The data are parsed and checked once on the coarse mesh (a
:class:`~hatkernels.problem.PoissonProblem`, so the errors are the serial
ones); on the fine levels they are used as given: numbers and callables as
they are, values per region (per coarse cell) inherited by the fine cells,
held values on the fine points of the held coarse sides, fluxes and
convection on the fine sides of their coarse sides.  Data that live on the
fine mesh's own points, cells or sides (arrays) cannot be given this way.
"""

from __future__ import annotations

import time
import types

import numba
import numpy as np

from hatkernels._jit import threads as _threads
from hatkernels.assembly import assemble_load, assemble_stiffness
from hatkernels.assembly.boundary_terms import side_load, side_mass
from hatkernels.coefficients import Coefficient, Field, Pieces
from hatkernels.distributed.cg import cg
from hatkernels.distributed.finenumbers import fine_numbering, partition_coarse_cells
from hatkernels.distributed.halo import CommStats, Halo
from hatkernels.distributed.launch import as_comm, default_threads, mpi
from hatkernels.distributed.levelparts import build_level, fine_sides_on, points_on
from hatkernels.distributed.levelrows import (
    MatrixFreeRows,
    _masked_rows,
    check_variant,
    level_operator,
)
from hatkernels.distributed.matrix import DistributedMatrix
from hatkernels.distributed.outcome import (
    GATHER,
    DistributedPoissonSolution,
    Distribution,
    _per,
    _together,
    gather_by_ids,
)
from hatkernels.distributed.refined import DistributedMultigrid
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh
from hatkernels.perf import peak_rss_bytes
from hatkernels.problem import PoissonProblem
from hatkernels.solver import report_convergence
from hatkernels.stats import SolveStats

__all__ = ["NotRefinable", "solve_partitioned", "solve_refined"]


class NotRefinable(InputError):
    """The problem cannot take the partitioned path: its data name the coarse mesh's points,
    cells or sides (arrays), which the fine levels do not have, or it asks for options of
    the replicated path.  With the default preconditioner the distributed solve then takes
    the replicated path; with ``preconditioner="gmg"`` the error is raised."""


def _on_level(coef, part, per, check_only=False):
    """A coarse-mesh Coefficient on a level's local mesh (cells inherit their parent's)."""
    if coef is None:
        return None
    kind, value = coef.kind, coef.value
    if isinstance(value, Pieces):  # by region, some region's value a callable
        if any(q.kind == "point" for q in value.parts):
            raise NotRefinable(f"{coef.name}: a region's values per coarse point cannot be "
                               f"used with refine=k on the partitioned path")
        if check_only:
            return None
        parent = part.cells // per
        pieces = Pieces(value.parts, value.index[parent], parent, part.mesh.points,
                        part.mesh.cells)
        return Coefficient(kind, pieces, coef.name, coef.sign)
    if kind in ("constant", "callable") or (kind == "tensor" and np.ndim(value) == 2):
        return coef
    if kind in ("cell", "tensor"):
        if check_only:
            return None
        return Coefficient(kind, value[part.cells // per], coef.name, coef.sign)
    raise NotRefinable(f"{coef.name} is given per point of the coarse mesh; with refine=k on "
                       f"the partitioned path give numbers, callables or values per region")


def _names_fine_items(value, dim):
    """True for data given per point or cell: as in the serial solve such arrays would name
    the refined mesh's points or cells, which the partitioned path never builds."""
    if isinstance(value, dict):
        return any(_names_fine_items(v, dim) for v in value.values())
    if isinstance(value, Field):
        return True
    if isinstance(value, Coefficient):
        return value.kind in ("point", "cell") or (value.kind == "tensor"
                                                   and np.ndim(value.value) != 2)
    if isinstance(value, (np.ndarray, list, tuple)):
        return np.shape(value) != (dim, dim)  # a constant tensor is allowed
    return False


def _refuse_arrays(dirichlet, dirichlet_on, neumann, robin, data=(), dim=2):
    """Arrays of points or sides name the coarse mesh, not the fine one: refused."""
    for name, value in data:
        if _names_fine_items(value, dim):
            raise NotRefinable(f"{name} is given per point or cell; with refine=k such arrays "
                               f"belong to the refined mesh, which the partitioned path never "
                               f"builds: give numbers, callables or {{region: value}}")

    def is_array(v):
        return isinstance(v, np.ndarray) or isinstance(v, list) and v and not all(
            isinstance(k, str) for k in v)

    if dirichlet_on is not None and not isinstance(dirichlet_on, str) and is_array(dirichlet_on):
        raise NotRefinable("dirichlet_on: with refine=k the distributed solve takes "
                           "'boundary' or boundary tags, not point indices")
    if isinstance(dirichlet, (np.ndarray, list)):
        raise NotRefinable("dirichlet: with refine=k give a number, a callable or "
                           "{tag: value}")
    for name, v in (("neumann", neumann), ("robin", robin)):
        if isinstance(v, tuple) and len(v) == (2 if name == "neumann" else 3) and is_array(v[0]):
            raise NotRefinable(f"{name}: with refine=k name boundary tags, not sides")


def _check_refinable(problem):
    """Refuse, before any fine level is built, data the fine levels cannot take."""
    for coef in (problem.coefficient, problem.source, problem.reaction):
        if coef is not None:
            _on_level(coef, None, None, check_only=True)
    for p in problem.pieces:
        if p.kind == "held":
            continue
        for c in p.data:
            if c.kind not in ("constant", "callable"):
                raise NotRefinable(f"{c.name}: with refine=k give a number or a callable")


def _held_values(dirichlet, coarse, part, held, held_pieces):
    """Held values at the local points of a level (0 where not held)."""
    g = np.zeros(part.n_local)
    x = part.mesh.points.T

    def value(v, where):
        if callable(v):
            out = np.asarray(v(*x[:, where]), dtype=np.float64)
            return np.broadcast_to(out, (where.size,)) if out.ndim == 0 else out
        return float(v)

    if isinstance(dirichlet, dict):
        done = np.zeros(part.n_local, dtype=bool)
        for key, v in dirichlet.items():  # the first listed tag gives the value where tags meet
            t = coarse.tags.side_tag(key)
            sides = np.concatenate([p.sides for p in held_pieces if p.tag == t])
            where = np.flatnonzero(points_on(part, coarse, sides) & ~done)
            g[where] = value(v, where)
            done[where] = True
    else:
        where = np.flatnonzero(held)
        g[where] = value(dirichlet, where)
    if not np.isfinite(g).all():
        k = int(np.flatnonzero(~np.isfinite(g))[0])
        raise InputError(f"dirichlet is {g[k]!r} at fine point {int(part.points[k])}")
    return g


def solve_refined(coarse, f, k, comm, *, dirichlet, dirichlet_on, coefficient, reaction,
                  neumann, robin, rtol, atol, maxiter, quadrature, monitor, gather,
                  options, progress=None):
    """See the module notes; returns ``(u, u_owned, owned, stats, problem, balance, piece)``."""
    note = progress or (lambda phase: None)
    note("boundary")
    t0 = time.perf_counter()
    timings = {}
    rank, size = comm.Get_rank(), comm.Get_size()
    _refuse_arrays(dirichlet, dirichlet_on, neumann, robin, data=(
        ("f", f), ("coefficient", coefficient), ("reaction", reaction)), dim=coarse.dim)
    problem = PoissonProblem(coarse, f, dirichlet=dirichlet, dirichlet_on=dirichlet_on,
                             coefficient=coefficient, reaction=reaction, neumann=neumann,
                             robin=robin, quadrature=quadrature)
    pieces = problem.pieces
    held_pieces = [p for p in pieces if p.kind == "held"]
    if held_pieces:
        held_sides = np.concatenate([p.sides for p in held_pieces])
    elif problem.dirichlet.whole_boundary:
        held_sides = (coarse.boundary_edges() if coarse.dim == 2
                      else coarse.boundary_faces()).astype(np.int64)
    else:
        raise NotRefinable("gmg with refine=k needs held values on whole boundary sides "
                           "(dirichlet_on='boundary' or boundary tags)")
    _check_refinable(problem)
    timings["boundary"] = time.perf_counter() - t0

    t1 = time.perf_counter()
    numberings = [fine_numbering(coarse, j) for j in range(1, k + 1)]
    cell_owner = partition_coarse_cells(coarse, size, k, numbering=numberings[-1])
    parts = [build_level(coarse, j + 1, cell_owner, rank, comm, numbering=numberings[j])
             for j in range(k)]
    timings["partition"] = time.perf_counter() - t1

    note("assemble")
    t2 = time.perf_counter()
    per = [(4 if coarse.dim == 2 else 8) ** (j + 1) for j in range(k)]
    fixed = [points_on(p, coarse, held_sides) for p in parts]
    coarse_fixed = np.zeros(coarse.n_points, dtype=bool)
    coarse_fixed[np.unique(held_sides)] = True
    fine, pf = parts[-1], per[-1]
    mesh = fine.mesh
    kappa = _on_level(problem.coefficient, fine, pf)
    n = fine.n_owned
    stats = CommStats()
    matrix_free = options.get("matrix_free", True)
    # with the stiffness alone, the CG's operator is the finest level's (never assembled)
    shared = matrix_free and problem.reaction is None and all(
        p.kind != "convection" for p in pieces)
    weights = {}  # column sums over the owned rows, for the flows (see _flows)
    if shared:
        op = level_operator(fine, kappa, fixed[-1], Halo(fine.pattern, comm, stats),
                            quadrature=quadrature, variant=options.get("variant"))
        A = None
    else:
        A = assemble_stiffness(mesh, kappa, quadrature=quadrature)
    if problem.reaction is not None:
        from hatkernels.assembly import StiffnessAssembler

        C = StiffnessAssembler(mesh).assemble_mass(_on_level(problem.reaction, fine, pf),
                                                   quadrature=quadrature)
        weights["absorbed"] = _column_sums(C, n)
        A = A + C
        del C
    b = np.zeros(mesh.n_points)
    loads = dict.fromkeys(("source", "flux", "convection"), 0.0)
    boundary = fine_sides_on(fine, coarse, (coarse.boundary_edges() if coarse.dim == 2
                                             else coarse.boundary_faces()).astype(np.int64))
    for p in pieces:
        if p.kind == "held":
            continue
        if p.tag is None:  # a plain value: every fine boundary side that is not held
            held_here = np.flatnonzero(fixed[-1])
            is_held = np.zeros(mesh.n_points, dtype=bool)
            is_held[held_here] = True
            sides = boundary[~is_held[boundary].all(axis=1)]
        else:
            sides = fine_sides_on(fine, coarse, p.sides)
        if p.kind == "flux":
            bp = side_load(mesh, p.data[0], sides, quadrature)
            loads["flux"] += float(bp[:n].sum())
        else:
            R = side_mass(mesh, p.data[0], sides, quadrature)
            weights["convection"] = weights.get("convection", 0.0) + _column_sums(R, n)
            A = A + R
            bp = side_load(mesh, p.data[1], sides, quadrature)
            loads["convection"] += float(bp[:n].sum())
        b += bp
    bp = _source_load(problem.source, fine, pf, quadrature)
    loads["source"] = float(bp[:n].sum())
    b += bp
    del bp
    g = _held_values(dirichlet, coarse, fine, fixed[-1], held_pieces)
    held_owned = np.flatnonzero(fixed[-1][:n])
    free_owned = np.flatnonzero(~fixed[-1][:n])
    if shared:  # the column sums after the solve (see _stiffness_sums)
        rhs = b[:n] - op.unmasked_product(g)[:n]
    else:
        rhs = b[:n] - A[:n] @ g
        weights["held"] = _column_sums(A, n, held_owned)
        weights["free"] = _column_sums(A, n, free_owned)
    rhs[held_owned] = g[held_owned]
    loads["held"] = float(b[held_owned].sum())
    loads["free"] = float(b[free_owned].sum())
    del b, g
    if not shared:
        rows, _, _ = _masked_rows(A, n, fixed[-1])
        del A
        op = DistributedMatrix(rows, fine.pattern, comm, stats)
        del rows
    timings["assemble"] = time.perf_counter() - t2

    note("solve")
    t3 = time.perf_counter()
    coefs = [problem.coefficient] + [_on_level(problem.coefficient, p, q)
                                     for p, q in zip(parts, per, strict=True)]
    M = DistributedMultigrid(coarse, parts, cell_owner, coefs, fixed, coarse_fixed, comm, stats,
                             quadrature=quadrature, fine_operator=op if shared else None,
                             **options)
    timings["setup"] = time.perf_counter() - t3
    t4 = time.perf_counter()
    result = cg(op, rhs, rtol=rtol, atol=atol, maxiter=maxiter, M=M, warn=False,
                monitor=monitor)
    timings["solve"] = time.perf_counter() - t4
    m_bytes, m_text = M.nbytes, M.description
    u_owned = result.x
    u_local = np.zeros(fine.n_local)
    u_local[:n] = u_owned
    op.halo.exchange(u_local)
    del M  # its memory is free again for the column sums
    if shared:
        weights.update(_stiffness_sums(op, fine.n_local, held_owned=held_owned,
                                       free_owned=free_owned))
    flows = _flows(comm, weights, loads, u_local)
    piece = _piece(fine, u_local, cell_owner, rank, pf, coarse)
    t5 = time.perf_counter()
    u = gather_by_ids(comm, fine.points[:n], u_owned, numberings[-1].n_fine, gather)
    timings["gather"] = time.perf_counter() - t5
    timings["total"] = time.perf_counter() - t0
    mine = {
        "rank": rank, "owned_points": int(n), "cells": int(len(fine.cells)),
        "ghost_points": int(fine.n_local - n), "neighbours": fine.pattern.neighbours.tolist(),
        "coarse_cells": int((cell_owner == rank).sum()),
        "levels_points": [int(p.n_local) for p in parts],
        "operator_bytes": int(op.nbytes), "multigrid_bytes": m_bytes,
        "halo_bytes_per_product": int(8 * fine.pattern.send_counts.sum()),
        "communication": stats.as_dict(), "timings": timings,
        "peak_rss_bytes": peak_rss_bytes(),
    }
    balance = comm.allgather(mine)
    stats_out = SolveStats(
        iterations=result.iterations, converged=result.converged, residuals=result.residuals,
        timings={key: max(bb["timings"][key] for bb in balance) for key in timings},
        unknowns=int(numberings[-1].n_fine) - int(comm.allreduce(len(held_owned))),
        preconditioner=m_text,
        stored_bytes=sum(bb["operator_bytes"] for bb in balance),
        peak_rss_bytes=max(bb["peak_rss_bytes"] for bb in balance),
        threads=numba.get_num_threads(), info=result.info, message=result.message,
        tolerance=result.tolerance, condition_estimate=result.condition_estimate,
        nnz=int(comm.allreduce(op.nnz)), dirichlet_points=int(comm.allreduce(len(held_owned))),
        ranks=size, matrix_free=isinstance(op, MatrixFreeRows),
    )
    return u, u_owned, fine.points[:n].copy(), stats_out, problem, balance, piece, flows


def _source_load(source, fine, per, quadrature, block=2**15):
    """The source's load on the local mesh, assembled by blocks of ``block`` cells: the
    quadrature's temporaries (tens of bytes per cell and point of the rule) stay small."""
    b = np.zeros(fine.n_local)
    for c0 in range(0, len(fine.cells), block):
        cells = slice(c0, c0 + block)
        sub = types.SimpleNamespace(cells=fine.cells[cells],
                                    mesh=Mesh._trusted(fine.mesh.points, fine.mesh.cells[cells]))
        b += assemble_load(sub.mesh, _on_level(source, sub, per), quadrature=quadrature)
    return b


def _stiffness_sums(op, n_local, **rows):
    """Column sums of the local stiffness matrix over each set of owned rows (keyed
    ``held_owned`` -> ``"held"``): ``K`` is symmetric, so they are the unmasked products
    ``K 1_S``, whose ghost entries are exact too (every cell at an owned point is local)."""
    sums = {}
    for key, which in rows.items():
        ones = np.zeros(n_local)
        ones[which] = 1.0
        sums[key.split("_")[0]] = op.unmasked_product(ones)
    return sums


def _column_sums(A, n, rows=None):
    """``sum_i A[i, j]`` over the owned rows ``i`` (all of them, or ``rows``): a local vector."""
    sub = A[:n] if rows is None else A[rows]
    return np.asarray(sub.sum(axis=0)).ravel()


def _flows(comm, weights, loads, u):
    """The balance of the whole body from every rank's owned rows (collective).

    With the full local matrix ``A = K + C + R`` and load ``b`` (before the
    held values are imposed), the residual ``A u - b`` summed over the held
    owned rows is the flow in through the held sides; over the free rows it is
    what the solver left.  Each sum is ``w . u - sum(b)`` with ``w`` the column
    sums of the rows concerned, kept from assembly instead of the rows.
    """
    MPI = mpi()

    def dot(key):
        w = weights.get(key)
        return 0.0 if w is None else float(w @ u)

    mine = np.array([loads["source"], dot("absorbed"), loads["held"] - dot("held"),
                     0.0 - loads["flux"], dot("convection") - loads["convection"],
                     loads["free"] - dot("free")])
    comm.Allreduce(MPI.IN_PLACE, [mine, MPI.DOUBLE], op=MPI.SUM)
    names = ("sources", "absorbed", "outflow_held", "outflow_flux", "outflow_convection",
             "imbalance")
    return dict(zip(names, (float(v) for v in mine), strict=True))


def _piece(fine, u, cell_owner, rank, per, coarse):
    """This rank's own fine cells (those of its coarse cells: each fine cell on one rank)
    with their points, u there (``u`` local, ghosts filled) and their regions."""
    own = (cell_owner == rank)[fine.cells // per]
    # the points of the own cells in local order, renumbered (np.unique's result, by a
    # mask rather than a sort: a fraction of the memory)
    is_used = np.zeros(fine.n_local, dtype=bool)
    if own.all():
        cells = fine.mesh.cells
    else:
        cells = fine.mesh.cells[own]
    is_used[cells] = True
    used = np.flatnonzero(is_used)
    if used.size == fine.n_local:  # one rank: the local mesh's arrays, not copied
        mesh = Mesh._trusted(fine.mesh.points, cells)
    else:  # cells is a copy already: renumbered in place, a block at a time
        new = np.cumsum(is_used, dtype=cells.dtype) - 1
        for c0 in range(0, len(cells), 2**16):
            cells[c0: c0 + 2**16] = new[cells[c0: c0 + 2**16]]
        mesh = Mesh._trusted(fine.mesh.points[used], cells)
    del is_used
    cell_data = {}
    if coarse.regions is not None:
        cell_data["region"] = coarse.regions[fine.cells[own] // per].astype(np.int32)
    return mesh, {"u": u[used]}, cell_data


def solve_partitioned(mesh, f, refine, comm, dirichlet, dirichlet_on, coefficient, reaction,
                      neumann, robin, rtol, atol, maxiter, check, quadrature, matrix_free,
                      variant, monitor, zero_mean, parts, gather, threads, options,
                      coarse=None, progress=None):
    """The partitioned path of :func:`hatkernels.distributed.solve_poisson` (refine=k, gmg)."""
    if not isinstance(mesh, Mesh):
        raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
    asked = [name for name, v in (("zero_mean", zero_mean is not False),
                                  ("partition", parts), ("coarse", coarse)) if v]
    if asked:
        raise NotRefinable(f"refine=k with gmg takes no {', '.join(asked)} (those belong to "
                           f"the replicated path; the coarse cells are split by RCB)")
    # the levels' operators: matrix-free unless matrix_free=False (assembled rows)
    if matrix_free is False and variant is not None:
        raise InputError(f"variant={variant!r} names a matrix-free product, but "
                         f"matrix_free=False asks for assembled levels")
    options = dict(options, matrix_free=matrix_free is not False,
                   variant=check_variant(variant))
    if gather not in GATHER:
        raise InputError(f"gather must be one of {GATHER}, got {gather!r}")
    comm = as_comm(comm)
    n_threads, ranks_on_node, how = default_threads(comm, threads)
    dcomm = comm.Dup()
    try:
        with _threads(n_threads):
            u, u_owned, owned, stats, problem, balance, piece, flows = _together(
                dcomm, "the partitioned solve", solve_refined, mesh, f, refine, dcomm,
                dirichlet=dirichlet, dirichlet_on=dirichlet_on, coefficient=coefficient,
                reaction=reaction, neumann=neumann, robin=robin, rtol=rtol, atol=atol,
                maxiter=maxiter, quadrature=quadrature, monitor=monitor, gather=gather,
                options=options, progress=progress)
    finally:
        dcomm.Free()
    iters = max(stats.iterations, 1)
    stats.distribution = Distribution(
        partition={"method": "rcb of coarse cells", "weight": "fine points owned"},
        path="partitioned",
        balance=balance,
        communication={
            "halo_bytes_per_product": sum(b["halo_bytes_per_product"] for b in balance),
            "halo_exchanges_per_iteration": _per(balance, "halo_exchanges", iters),
            "reductions_per_iteration": _per(balance, "reductions", iters),
            "coarse_bytes_per_application": 8 * mesh.n_points,
            "seconds_max": max(b["communication"]["seconds"] for b in balance),
        },
        threads_per_rank={"threads": n_threads, "ranks_on_node": ranks_on_node,
                          "chosen_by": how},
    )
    report_convergence(stats, check)
    return DistributedPoissonSolution(u=u, stats=stats, mesh=mesh, problem=problem,
                                      u_owned=u_owned, owned=owned,
                                      rank=comm.Get_rank(), size=comm.Get_size(), piece=piece,
                                      flows=flows)
