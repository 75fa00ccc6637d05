"""``mpiexec -n P hatkernels solve --refine K``: the partitioned path of the command.

The plate and a ``--mesh`` file refined ``--refine K`` times are refinements,
so the command solves them the way the library does by default
(:func:`hatkernels.distributed.solve_poisson` with ``refine=K``): every rank
holds the coarse mesh (the plate's 8 mm grid, or the file, read on every
rank), refines only its own part of it, and the multigrid runs across the
ranks with the serial iteration counts.  No rank builds the fine mesh or
gathers the solution, so the outputs are what each rank has: the solution
as VTU pieces plus their index ``solution/solution.pvtu`` (written by every
rank), and ``summary.json`` and ``residuals.png`` (rank 0).  The figures of
the report (largest and smallest temperature, mean, power in and out) are
reduced over the ranks.

The plate's heat sources are given per triangle, with the value of each
component chosen so that its power is exact on the mesh; when the
footprints' edges lie on the fine mesh's lines (``--refine 4`` and more),
that is the component's nominal value on the triangles under it, which the
partitioned path takes as a function of position.  Otherwise, and for the
block (cooled through part of its boundary, no held side), for a
``--preconditioner`` that needs no refinement history, and without ``--refine``, the
command keeps the path of :mod:`hatkernels.cli.solve_mpi` and says why.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os

import numpy as np

from hatkernels import io as kio
from hatkernels import plot, scenarios
from hatkernels._text import format_seconds
from hatkernels.cli.common import base_record, not_installed, versions
from hatkernels.cli.outputs import write_summary
from hatkernels.cli.summary import CELLS, _run_record, problem_record, solve_report
from hatkernels.distributed import solve_poisson, write_pvtu
from hatkernels.distributed.launch import mpi
from hatkernels.errors import InputError
from hatkernels.mesh.generators import rectangle
from hatkernels.perf import peak_rss_bytes
from hatkernels.precond import capabilities
from hatkernels.scenarios import CAUTION, COARSE_CELLS, PLATE

__all__ = ["Plan", "plan", "plate_source", "report", "solve", "summary_record", "write"]

#: Per-rank figures of a partitioned solve kept in the record.
RANK_FIGURES = ("rank", "owned_points", "cells", "ghost_points", "neighbours", "coarse_cells",
                "levels_points", "operator_bytes", "multigrid_bytes", "halo_bytes_per_product",
                "communication", "timings", "peak_rss_bytes")


@dataclasses.dataclass
class Plan:
    """A problem the partitioned path can take: the coarse mesh, the refinements, the data."""

    coarse: object
    refine: int
    problem: object  # the scenario's Problem on the coarse mesh: statement, units, components
    source: object  # a number, or a function of position
    description: str


def _aligned(components, coarse_size, k):
    """True when every footprint edge lies on a line of the fine grid (cells of
    ``coarse_size / 2**k``), so that a triangle is under a footprint exactly when its
    quadrature points are."""
    for comp in components:
        x0, x1, y0, y1 = comp.bounds
        for value, h in ((x0, coarse_size[0]), (x1, coarse_size[0]), (y0, coarse_size[1]),
                         (y1, coarse_size[1])):
            steps = value / (h / 2**k)
            if abs(steps - round(steps)) > 1e-9 * max(1.0, abs(steps)):
                return False
    return True


def plate_source(components, thickness):
    """The components' nominal source ``P / (footprint area * thickness)`` as a function of
    position (0 outside the footprints; footprints open, as for the per-triangle source)."""
    def q(x, y):
        out = np.zeros(np.broadcast(x, y).shape)
        for comp in components:
            x0, x1, y0, y1 = comp.bounds
            inside = (x > x0) & (x < x1) & (y > y0) & (y < y1)
            out[inside] += comp.power / (comp.width * comp.height * thickness)
        return out

    return q


def plan(args, arrays):
    """``(Plan, "")`` when the command's problem can take the partitioned path, else
    ``(None, why)`` (``why`` empty when the question does not arise: no ``--refine``)."""
    k = args.refine or 0
    if k == 0:
        return None, ""
    if args.scenario == "block":
        return None, ("the block is cooled through its bottom face with the rest insulated; "
                      "multigrid across ranks needs held values on whole boundary sides")
    given = getattr(args, "given", ())
    if "preconditioner" in given and not capabilities(args.preconditioner).needs_mesh:
        return None, f"--preconditioner {args.preconditioner} keeps the replicated path"
    times = f"refined {k} time{'s' if k != 1 else ''}"
    if args.mesh is not None:
        coarse = kio.mesh_from_arrays(*arrays, args.mesh)
        description = f"from {args.mesh}, {times}"
        problem = scenarios.mesh_problem(coarse, source=args.source,
                                         conductivity=args.conductivity,
                                         dirichlet=args.dirichlet, name=args.mesh,
                                         mesh_description=description)
        return Plan(coarse, k, problem, problem.source, description), ""
    nx, ny = PLATE.cells(COARSE_CELLS)
    size = (PLATE.length / nx, PLATE.width / ny)
    if args.source is None and not _aligned(PLATE.components, size, k):
        return None, (f"the components' edges do not lie on the lines of the mesh refined "
                      f"{k} times (they do from --refine 4)")
    coarse = rectangle(nx, ny, bounds=PLATE.bounds)
    description = f"rectangle {nx} x {ny} cells of 8 mm {times}"
    # the scenario's statement and units, from a mesh fine enough for its per-cell source
    problem = scenarios.heat_spreader(
        rectangle(4 * nx, 4 * ny, bounds=PLATE.bounds), source=args.source,
        conductivity=args.conductivity, coolant=args.dirichlet, mesh_description=description)
    source = (problem.source if args.source is not None
              else plate_source(PLATE.components, PLATE.thickness))
    problem = dataclasses.replace(problem, mesh=coarse,
                                  source=problem.source if args.source is not None else None)
    return Plan(coarse, k, problem, source, description), ""


def solve(p, args, comm, progress=None, monitor=None, gather=False):
    """The partitioned solve of plan ``p`` (collective)."""
    given = getattr(args, "given", ())
    return solve_poisson(
        p.coarse, p.source, refine=p.refine, comm=comm, coefficient=p.problem.conductivity,
        dirichlet=p.problem.dirichlet, dirichlet_on="boundary",
        preconditioner=args.preconditioner if "preconditioner" in given else None,
        rtol=args.rtol,
        maxiter=args.maxiter, check=True, progress=progress, monitor=monitor, gather=gather,
        threads=args.threads)


def _field(comm, sol, quantity):
    """Largest and smallest value (where, on how many points) and the mean, over the ranks."""
    MPI = mpi()
    mesh, point_data, _ = sol.piece
    u = point_data["u"]
    size = mesh.measures()
    integral = sum(float(size @ u[mesh.cells[:, j]]) for j in range(mesh.cells.shape[1]))
    sums = np.array([integral / mesh.cells.shape[1], float(size.sum())])
    comm.Allreduce(MPI.IN_PLACE, [sums, MPI.DOUBLE], op=MPI.SUM)
    out = {"quantity": quantity}
    for which, pick in (("max", np.argmax), ("min", np.argmin)):
        k = int(pick(u))
        best = comm.allgather((float(u[k]), mesh.points[k].tolist()))
        values = [b[0] for b in best]
        r = int(np.argmax(values) if which == "max" else np.argmin(values))
        v = values[r]
        ties = int(np.count_nonzero(np.abs(sol.u_owned - v) <= 1e-12 * max(1.0, abs(v))))
        out[which] = v
        out[f"{which}_at"] = best[r][1]
        out[f"{which}_points"] = int(comm.allreduce(ties))
    out["mean"] = float(sums[0] / sums[1])
    return out


def _powers(comm, sol, p):
    """Power in, heat out through the held edges and their imbalance (from the solve's
    balance of the whole body), and each component's power, reduced over the ranks."""
    t = p.problem.thickness or 1.0
    flows = sol.flows
    power_in, heat_out = flows["sources"] * t, flows["outflow_held"] * t
    imbalance = power_in - heat_out
    out = {"power_in": power_in, "heat_out": heat_out, "imbalance": imbalance,
           "relative_imbalance": abs(imbalance) / max(abs(power_in), 1e-300)}
    if p.problem.components:
        mesh, _, _ = sol.piece
        centres = mesh.points[mesh.cells].mean(axis=1)
        q = p.source(*centres.T)
        size = mesh.measures()
        mine = [float((q * size)[c.inside(centres)].sum()) * t for c in p.problem.components]
        total = comm.allreduce(np.array(mine))
        out["components"] = {c.name: float(v) for c, v in zip(p.problem.components, total,
                                                                strict=True)}
    return out


def summary_record(args, p, sol, comm, timings, kernels_seconds, command, peak):
    """summary.json's record of a partitioned solve (collective: the figures are reduced)."""
    problem = p.problem
    dim = p.coarse.dim
    summary = base_record(command)
    summary["caution"] = CAUTION
    summary["problem"] = problem_record(problem, dim)
    summary["units"] = {
        "length": "m" if problem.power_unit else "mesh units",
        "solution": problem.unit or "solution units",
        "power": problem.power_unit or ("source x area" if dim == 2 else "source x volume"),
    }
    cells = comm.allreduce(int(sol.piece[0].n_cells))
    summary["mesh"] = {"description": p.description, "dimension": dim,
                       "points": int(sol.stats.unknowns + sol.stats.dirichlet_points),
                       CELLS[dim]: int(cells),
                       "h": p.coarse.h() / 2**p.refine}
    summary.update(_run_record(args, sol, timings, kernels_seconds))
    summary["solution"] = _field(comm, sol, problem.quantity)
    summary["power"] = _powers(comm, sol, p)
    summary["peak_rss_bytes"] = max(peak or 0, peak_rss_bytes())
    summary["versions"] = versions()
    d = sol.stats.distribution
    summary["distributed"] = {
        "path": "partitioned", "ranks": sol.stats.ranks, "refine": p.refine,
        "coarse_mesh": {"points": p.coarse.n_points, CELLS[dim]: p.coarse.n_cells},
        "threads_per_rank": d.threads_per_rank, "partition": d.partition,
        "communication": d.communication,
        "balance": [{k: b[k] for k in RANK_FIGURES if k in b} for b in d.balance],
    }
    return summary


def write(args, out, summary, sol, comm, progress):
    """The output directory, whole or not at all: every rank's piece of the solution, then
    rank 0's summary.json and residuals.png (collective)."""
    rank = comm.Get_rank()
    files, skipped = [], []
    with contextlib.ExitStack() as stack:
        tmp = failure = None
        if rank == 0:
            try:
                tmp = stack.enter_context(kio.output_directory(out, force=args.force))
            except InputError as exc:
                failure = str(exc)
        tmp, failure = comm.bcast((tmp, failure), root=0)
        if failure is not None:
            raise InputError(failure)
        if kio.meshio_available():
            progress.phase("write: solution/ (a VTU piece from every rank and solution.pvtu)")
            write_pvtu(os.path.join(tmp, "solution"), sol, comm=comm)
            files += ["solution/solution.pvtu"] + [f"solution/piece-{r:04d}.vtu"
                                                   for r in range(comm.Get_size())]
        else:
            skipped.append(not_installed("solution/ (the VTU pieces)", "meshio"))
        if rank != 0:
            return files
        skipped.append("solution.npz, solution.png and solution.vtu: the partitioned path "
                       "never gathers the whole field on one rank (open "
                       "solution/solution.pvtu in a VTK-based viewer)")
        if plot.available():
            method = summary["solver"]["preconditioner"].split(":")[0]
            plot.residuals_figure(summary["solver"]["residuals"],
                                  os.path.join(tmp, "residuals.png"), rtol=args.rtol,
                                  reference=summary["solver"].get("rhs_norm"),
                                  title=f"conjugate gradients, {method}")
            files.append("residuals.png")
        else:
            skipped.append(not_installed("residuals.png", "matplotlib"))
        files.insert(0, "summary.json")
        write_summary(tmp, summary, files, skipped)
    return files


def report(p, summary, out):
    """The printed report (rank 0)."""
    d = summary["distributed"]
    tp = d["threads_per_rank"]
    cells = CELLS[summary["mesh"]["dimension"]]
    extra = [f"{'ranks':<16}{d['ranks']} MPI ranks, {tp['threads']} numba thread"
             f"{'s' if tp['threads'] != 1 else ''} each ({tp['chosen_by']}); each refined its "
             f"part of the coarse mesh ({d['coarse_mesh'][cells]:,} {cells}) {d['refine']} "
             f"times, multigrid on every level across the ranks"]
    for b in d["balance"]:
        c = b["communication"]
        extra.append(
            f"{'rank ' + str(b['rank']):<16}{b['owned_points']:,} points, {b['cells']:,} "
            f"{cells} ({b['coarse_cells']:,} coarse), {b['ghost_points']:,} ghosts from "
            f"{len(b['neighbours'])} neighbour{'s' if len(b['neighbours']) != 1 else ''}; "
            f"peak {b['peak_rss_bytes'] / 1e9:.2f} GB; communication "
            f"{format_seconds(c['seconds'])} of a {format_seconds(b['timings']['solve'])} solve")
    com = d["communication"]
    extra.append(f"{'per iteration':<16}halo {com['halo_bytes_per_product'] / 1e3:.1f} kB per "
                 f"product (all ranks), {com['halo_exchanges_per_iteration']:.3g} exchanges and "
                 f"{com['reductions_per_iteration']:.2g} reductions (busiest rank)")
    extra.append(f"{'':<16}(communication seconds include waiting for slower ranks; with more "
                 f"ranks than cores they measure the oversubscription, not the network)")
    return solve_report(p.problem, summary, out, extra=extra)


