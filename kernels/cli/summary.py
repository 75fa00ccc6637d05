"""The results of ``hatkernels solve``: summary.json's record and the printed report.

:func:`solve_figures` and :func:`distributed_figures` are the only places in
the command that read a solve's stats; everything else reads the record
they feed.
"""

from __future__ import annotations

import math
import os

import numpy as np

from hatkernels._text import format_seconds
from hatkernels.cli.common import PROG, base_record, versions
from hatkernels.perf import peak_rss_bytes
from hatkernels.scenarios import CAUTION

__all__ = [
    "problem_record",
    "solve_figures",
    "distributed_figures",
    "solve_summary",
    "solve_report",
    "distributed_report",
    "file_record",
    "file_statement",
    "file_summary",
    "file_report",
]

#: Phases the library times, copied into the record under the same names.
LIBRARY_PHASES = ("assemble", "boundary", "setup", "solve")
#: ... and those it times only when they happen (a renumbered system: docs/solvers.md).
OPTIONAL_PHASES = ("renumber", "start")
#: The library's older name of a per-rank figure (on triangle meshes only), kept in the record.
OLDER_NAMES = ("triangles",)
#: Per-rank figures kept in the record of a distributed solve.
RANK_FIGURES = ("rank", "owned_points", "owned_unknowns", "cells", "ghost_points",
                "ghost_unknowns", "neighbours", "nnz", "halo_bytes_per_product",
                "halo_messages_per_product", "communication", "timings")


def solve_figures(sol):
    """What the command reports of a solve (serial or distributed), read from its SolveStats."""
    st = sol.stats
    return {
        "unknowns": st.unknowns,
        "dirichlet_points": st.dirichlet_points,
        "nnz": st.nnz,
        "matrix_free": bool(st.matrix_free),
        "operator_bytes": st.stored_bytes,
        "preconditioner": st.preconditioner,
        "converged": bool(st.converged),
        "iterations": int(st.iterations),
        "residuals": np.asarray(st.residuals, dtype=float),
        "rhs_norm": float(getattr(st, "rhs_norm", math.nan)),
        "threads": st.threads,
        "timings": {key: st.timings[key] for key in LIBRARY_PHASES + OPTIONAL_PHASES + ("total",)
                    if key in st.timings or key not in OPTIONAL_PHASES},
    }


def distributed_figures(sol, coarse):
    """The distributed part of a solve's stats, for summary.json (``coarse``: the coarse space)."""
    st = sol.stats
    d = st.distribution
    return {
        "ranks": st.ranks,
        "threads_per_rank": d.threads_per_rank,
        "coarse": coarse,
        "condition_estimate": st.condition_estimate,
        "partition": d.partition,
        "communication": d.communication,
        "balance": [{k: b[k] for k in RANK_FIGURES + OLDER_NAMES if k in b} for b in d.balance],
    }


#: The words for a mesh's cells, by dimension.
CELL = {2: "triangle", 3: "tetrahedron"}
CELLS = {2: "triangles", 3: "tetrahedra"}


def _component(c):
    """A plate's component or a block's heat source, for the record."""
    if hasattr(c, "center"):
        return {"name": c.name, "width": c.width, "height": c.height, "center": list(c.center),
                "power": c.power}
    return {"name": c.name, "bounds": list(c.bounds), "power": c.power}


def _mean(mesh, u):
    """The mean of the P1 field over the mesh: its integral (exact, each cell's measure times
    the mean of its points' values) over the total measure."""
    size = mesh.measures()
    cells = mesh.cells
    total = sum(float(size @ u[cells[:, j]]) for j in range(cells.shape[1]))  # column by column:
    return total / cells.shape[1] / float(size.sum())  # no (n_cells, d + 1) temporary


def _extreme(u, used, which):
    values = u[used]
    k = int(np.argmax(values) if which == "max" else np.argmin(values))
    v = float(values[k])
    ties = int(np.count_nonzero(np.abs(values - v) <= 1e-12 * max(1.0, abs(v))))
    return v, int(used[k]), ties


def _run_record(args, sol, timings, kernels_seconds):
    """What a record says of the solve itself: unknowns, matrix, solver, phase times."""
    figures = solve_figures(sol)
    res = figures["residuals"]
    # rtol's reference, norm(b); the first residual is that of CG's first iterate
    reference = figures["rhs_norm"] if math.isfinite(figures["rhs_norm"]) else float(res[0])
    out = {key: figures[key] for key in ("unknowns", "dirichlet_points", "nnz", "matrix_free",
                                         "operator_bytes")}
    out["solver"] = {
        "preconditioner": figures["preconditioner"],
        "requested": args.preconditioner,
        "rtol": args.rtol,
        "maxiter": args.maxiter,
        "converged": figures["converged"],
        "iterations": figures["iterations"],
        "initial_residual": float(res[0]),
        "final_residual": float(res[-1]),
        "rhs_norm": reference,
        "relative_residual": float(res[-1] / reference) if reference > 0 else 0.0,
        "residuals": res.tolist(),
        "threads": figures["threads"],
    }
    t = dict(timings)
    t["kernels"] = kernels_seconds
    for key in LIBRARY_PHASES + OPTIONAL_PHASES:
        if key in figures["timings"]:
            t[key] = figures["timings"][key]
    t["library_total"] = figures["timings"]["total"]
    out["timings_s"] = t
    return out


def _solution_record(mesh, u, quantity):
    """Largest and smallest value (where, on how many points) and the mean of ``u``."""
    used = np.ones(mesh.n_points, dtype=bool)
    used[mesh.unused_points()] = False  # points in no cell carry no value
    used = np.flatnonzero(used)
    vmax, imax, nmax = _extreme(u, used, "max")
    vmin, imin, nmin = _extreme(u, used, "min")
    return {
        "quantity": quantity,
        "max": vmax, "max_at": mesh.points[imax].tolist(), "max_point": imax, "max_points": nmax,
        "min": vmin, "min_at": mesh.points[imin].tolist(), "min_point": imin, "min_points": nmin,
        "mean": _mean(mesh, u),
    }


def solve_summary(args, problem, sol, balance, timings, kernels_seconds, command,
                  peak_bytes=None):
    """The record of one solve, as written to summary.json.

    ``timings``: the command's own phases (``mesh``, ``check``);
    ``kernels_seconds``: the warm-up that compiled or loaded the kernels;
    ``peak_bytes``: a peak memory measured elsewhere (a distributed run
    passes the largest rank's); the record holds the larger of it and this
    process's high-water mark now.
    """
    mesh = problem.mesh
    summary = base_record(command)
    summary["caution"] = CAUTION
    summary["problem"] = problem_record(problem, mesh.dim)
    if problem.cooling is not None:
        c = problem.cooling
        summary["problem"]["cooling"] = {"where": c.where, "film": c.film, "coolant": c.coolant,
                                         "sides": int(len(c.sides))}
    summary["units"] = {
        "length": "m" if problem.power_unit else "mesh units",
        "solution": problem.unit or "solution units",
        "power": problem.power_unit or ("source x area" if mesh.dim == 2 else "source x volume"),
    }
    summary["mesh"] = _mesh_record(mesh, problem.mesh_description)
    summary.update(_run_record(args, sol, timings, kernels_seconds))
    summary["solution"] = _solution_record(mesh, sol.u, problem.quantity)
    power = dict(balance)
    if problem.components:
        power["components"] = problem.component_powers()
    summary["power"] = power
    summary["peak_rss_bytes"] = max(peak_bytes or 0, peak_rss_bytes())
    summary["versions"] = versions()
    return summary


def problem_record(problem, dim):
    """A scenario's problem for the record: statement, conductivity, source, held value,
    thickness, components (a per-cell source is described, not listed)."""
    per_cell = problem.source is None or np.ndim(problem.source) != 0
    return {
        "name": problem.name,
        "statement": problem.statement,
        "conductivity": float(problem.conductivity),
        "source": (f"per {CELL[dim]}, from the {'components' if dim == 2 else 'heat sources'}"
                   if per_cell else float(problem.source)),
        "dirichlet_value": problem.dirichlet,
        "thickness": problem.thickness,
        "components": [_component(c) for c in problem.components],
    }


def _mesh_record(mesh, description):
    return {
        "description": description,
        "dimension": mesh.dim,
        "points": mesh.n_points,
        CELLS[mesh.dim]: mesh.n_cells,
        "h": mesh.h(),
    }


def _where(point, scale, unit):
    sep = f" {unit}" if unit else ""
    return "(" + ", ".join(f"{float(c) * scale:.4g}{sep}" for c in point) + ")"


def _run_lines(s):
    """The report's lines on the mesh, the unknowns, the solver and the times."""
    solver, t = s["solver"], s["timings_s"]
    cells = CELLS[s["mesh"]["dimension"]]
    lines = [f"{'mesh':<16}{s['mesh']['description']}: {s['mesh']['points']:,} points, "
             f"{s['mesh'][cells]:,} {cells}"]
    if s.get("matrix_free"):
        stored = f"matrix-free operator ({s['operator_bytes'] / 1e6:.1f} MB)"
    else:
        stored = f"{s['nnz']:,} matrix entries"
    held = (f" (plus {s['dirichlet_points']:,} Dirichlet points)" if s["dirichlet_points"]
            else " (no point held)")
    lines.append(f"{'unknowns':<16}{s['unknowns']:,}{held}, {stored}")
    lines.append(f"{'preconditioner':<16}{solver['preconditioner']}")
    lines.append(f"{'threads':<16}{solver['threads']} (numba)")
    order = ("mesh", "kernels", "assemble", "boundary", "renumber", "setup", "start", "solve",
             "check")
    lines.append(f"{'times':<16}"
                 + ", ".join(f"{k} {format_seconds(t[k])}" for k in order if k in t))
    lines.append(f"{'iterations':<16}{solver['iterations']}, final residual "
                 f"{solver['final_residual']:.3e} = {solver['relative_residual']:.2e} x |b| "
                 f"(rtol {solver['rtol']:g}), converged")
    return lines


def _field_lines(s, unit, scale, length_unit):
    """The report's lines on the largest, smallest and mean value of the solution."""
    sol = s["solution"]
    unit = f" {unit}" if unit else ""
    lines = [f"{sol['quantity']:<16}max {sol['max']:.6g}{unit} at "
             f"{_where(sol['max_at'], scale, length_unit)}"
             + (f" ({sol['max_points']} points)" if sol["max_points"] > 1 else "")]
    min_where = (f"on {sol['min_points']:,} points, first at " if sol["min_points"] > 1 else "at ")
    lines.append(f"{'':<16}min {sol['min']:.6g}{unit} {min_where}"
                 f"{_where(sol['min_at'], scale, length_unit)}")
    lines.append(f"{'':<16}mean {sol['mean']:.6g}{unit} (over the "
                 f"{'area' if s['mesh']['dimension'] == 2 else 'volume'})")
    return lines


def _closing_lines(s, out):
    lines = [f"{'peak memory':<16}{s['peak_rss_bytes'] / 1e9:.2f} GB (process high-water mark)",
             f"{'output':<16}{out}: {', '.join(s['files'])}"]
    lines += [f"{'':<16}not written: {text}" for text in s["skipped"]]
    return lines


def solve_report(problem, summary, out, extra=()):
    """The printed report of a solve; ``extra`` lines go before the closing caution."""
    s = summary
    pw = s["power"]
    pu = f" {problem.power_unit}" if problem.power_unit else ""
    lines = [f"{PROG} solve: {problem.statement[0]}"]
    lines += [f"  {text}" for text in problem.statement[1:]]
    lines += _run_lines(s)
    lines += _field_lines(s, problem.unit, problem.length_scale, problem.length_unit)
    parts = ""
    if pw.get("components"):
        parts = " (" + ", ".join(f"{n} {v:.6g}{pu}" for n, v in pw["components"].items()) + ")"
    what_in = "power in" if problem.power_unit else "source total"
    lines.append(f"{what_in:<16}{pw['power_in']:.6g}{pu}{parts}")
    if problem.cooling is None:
        where = "the Dirichlet boundary"
    else:
        c = problem.cooling
        where = f"{c.where} (h (T - {c.coolant:g}) integrated over it)"
    lines.append(f"{'':<16}{pw['heat_out']:.6g}{pu} leaves through {where} "
                 f"(imbalance {pw['imbalance']:.2e}{pu}, relative {pw['relative_imbalance']:.1e})")
    lines += _closing_lines(s, out)
    lines.extend(extra)
    lines.append("")
    lines.append(s["caution"])
    return "\n".join(lines)


#: The unit of a heat flow, by the mesh's dimension.
FLOW_UNIT = {2: "W/m", 3: "W"}


def file_summary(args, pf, sol, balance, timings, kernels_seconds, command):
    """The record of a problem file's solve (``pf``: a :class:`hatkernels.problemfile.ProblemFile`;
    ``balance``: :func:`hatkernels.results.balance` of ``sol``), as written to summary.json."""
    mesh = sol.mesh
    summary = base_record(command)
    summary["caution"] = CAUTION
    summary["problem"] = file_record(pf, mesh, args.refine)
    summary["units"] = {"length": "m", "solution": "degC", "temperature": "degC",
                        "conductivity": "W/(m K)", "source": "W/m^3", "heat_flux": "W/m^2",
                        "power": ("W per metre of thickness" if mesh.dim == 2 else "W")}
    times = f", refined {args.refine} time{'s' if args.refine != 1 else ''}" if args.refine else ""
    summary["mesh"] = _mesh_record(mesh, f"{os.path.basename(pf.mesh_path)} (lengths in "
                                         f"{pf.length_unit}, scaled to metres){times}")
    summary.update(_run_record(args, sol, timings, kernels_seconds))
    summary["solution"] = _solution_record(mesh, sol.u, "temperature")
    summary["balance"] = balance.as_dict()
    summary["peak_rss_bytes"] = peak_rss_bytes()
    summary["versions"] = versions()
    return summary


def file_record(pf, mesh, refine, equation=None):
    """A problem file's problem for the record (``mesh``: the mesh solved on; ``equation``:
    as :func:`file_statement`)."""
    tags = mesh.tags
    return {
        "title": pf.title,
        "file": os.path.abspath(pf.path),
        "mesh_file": pf.mesh_path,
        "length_unit": pf.length_unit,
        "refine": refine,
        "statement": file_statement(pf, mesh, equation),
        "materials": [{"name": m.name, "regions": [tags.region_label(t) for t in m.tags],
                       "conductivity": np.asarray(m.conductivity).tolist(), "source": m.source}
                      for m in pf.materials],
        "conditions": [{"name": c.name, "tags": [tags.side_label(t) for t in c.tags],
                        "condition": c.kind, "value": c.value, "ambient": c.ambient}
                       for c in pf.conditions],
        "insulated": [tags.side_label(t) for t in pf.insulated_tags()],
        "untagged_sides": _untagged_sides(mesh),
    }


def _untagged_sides(mesh):
    b = mesh.boundary_edges() if mesh.dim == 2 else mesh.boundary_faces()
    return int(len(b) - len(mesh.tags.sides))


def file_statement(pf, mesh, equation=None):
    """What the report says of a problem file before the figures (``equation``: the
    problem's equation in words, by default steady conduction)."""
    tags = mesh.tags
    lines = [f"problem file {os.path.abspath(pf.path)}",
             (equation or "steady conduction -div(k grad T) = q")
             + ", SI units, temperatures in degC; "
             + ("2-D: heat flows are in W per metre of thickness (the depth out of the plane)"
                if mesh.dim == 2 else "heat flows in W")]
    insulated = [tags.side_label(t) for t in pf.insulated_tags()]
    if insulated:
        lines.append(f"boundary tags not in the file are insulated (zero flux): "
                     f"{', '.join(insulated)}")
    n = _untagged_sides(mesh)
    if n:
        lines.append(f"{n:,} boundary {'edges' if mesh.dim == 2 else 'faces'} carry no tag: "
                     f"insulated (zero flux)")
    return lines


def _table(header, rows):
    """Rows of cells under a header, text left-aligned and numbers right-aligned."""
    width = [max(len(str(r[k])) for r in [header] + rows) for k in range(len(header))]
    out = []
    for r in [header] + rows:
        out.append("  ".join(str(c).ljust(w) if k < 2 else str(c).rjust(w)
                             for k, (c, w) in enumerate(zip(r, width, strict=True))).rstrip())
    return out


def file_report(pf, summary, out, extra=()):
    """The printed report of a problem file's solve: the run, the per-region and per-boundary
    tables and the balance; ``extra`` lines go after the statement."""
    s = summary
    b = s["balance"]
    mesh_dim = s["mesh"]["dimension"]
    flow = FLOW_UNIT[mesh_dim]
    lines = [f"{PROG} solve: {s['problem']['title']}"]
    lines += [f"  {text}" for text in s["problem"]["statement"]]
    lines += [f"  {text}" for text in extra]
    lines += _run_lines(s)
    lines += _field_lines(s, "degC", 1.0 / pf.scale, pf.length_unit)
    material = {t: m for m in pf.materials for t in m.tags}
    rows = []
    for r in b["regions"]:
        m = material.get(r["tag"])
        k = m.conductivity if m is not None else None
        rows.append([r["label"], m.name if m else "", "tensor" if np.ndim(k) else f"{k:g}",
                     f"{m.source:g}" if m else "", f"{r['u_min']:.6g}", f"{r['u_max']:.6g}",
                     f"{r['u_mean']:.6g}", f"{r['source']:.6g}"])
    table = _table(["region", "material", "k W/(m K)", "q W/m^3", "min degC", "max degC",
                    "mean degC", f"power {flow}"], rows)
    lines += [f"{'regions' if k == 0 else '':<16}{row}" for k, row in enumerate(table)]
    condition = {t: c.describe() for c in pf.conditions for t in c.tags}
    rows = [[e["label"], condition.get(e["tag"], e["condition"]), f"{e['u_min']:.6g}",
             f"{e['u_max']:.6g}", f"{e['u_mean']:.6g}", f"{e['outflow']:.6g}"]
            for e in b["boundary"]]
    table = _table(["boundary tag", "condition", "min degC", "max degC", "mean degC",
                    f"out {flow}"], rows)
    lines += [f"{'boundary' if k == 0 else '':<16}{row}" for k, row in enumerate(table)]
    lines.append(f"{'balance':<16}sources {b['sources']:.6g} {flow} = heat out "
                 f"{b['outflow']:.6g} {flow} + absorbed {b['absorbed']:.6g} {flow} "
                 f"(imbalance {b['imbalance']:.2e} {flow}, relative {b['relative']:.1e})")
    lines += _closing_lines(s, out)
    lines.append("")
    lines.append(s["caution"])
    return "\n".join(lines)


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
            f"unknowns), {b['cells']:,} {'triangles' if 'triangles' in b else 'tetrahedra'}, "
            f"{b['ghost_points']:,} ghosts from "
            f"{len(b['neighbours'])} neighbour{'s' if len(b['neighbours']) != 1 else ''}; "
            f"communication {format_seconds(c['seconds'])} of a "
            f"{format_seconds(b['timings']['solve'])} solve (halo "
            f"{format_seconds(c['halo_seconds'])}, reductions "
            f"{format_seconds(c['reduction_seconds'])}, coarse "
            f"{format_seconds(c['coarse_seconds'])})")
    lines.append(
        f"{'per iteration':<16}halo {com['halo_bytes_per_product'] / 1e3:.1f} kB in "
        f"{com['halo_messages_per_product']} messages (all ranks), "
        f"{com['reductions_per_iteration']:.2g} reductions of "
        f"{com['reduction_bytes_per_iteration']:.3g} bytes in all, coarse "
        f"{com['coarse_bytes_per_application']} bytes through rank 0; "
        f"condition estimate {d['condition_estimate']:.3g}")
    lines.append(f"{'':<16}(communication seconds include waiting for slower ranks; with more "
                 f"ranks than cores they measure the oversubscription, not the network)")
    return lines
