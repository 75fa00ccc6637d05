"""The results of the transient mode (``hatkernels solve --until T``): summary.json's record,
the files (series.pvd and its .vtu files, probes.csv, probes.png, solution.npz) and the printed
report.

:func:`summary_record` is the only place that reads the march's figures
(:class:`hatkernels.transient.TransientStats`, the energy balance); the report
and the files read the record it makes.
"""

from __future__ import annotations

import csv
import os

import numpy as np

from hatkernels import io as kio
from hatkernels import plot
from hatkernels._text import format_seconds
from hatkernels.cli.common import PROG, base_record, not_installed, versions
from hatkernels.cli.outputs import write_summary
from hatkernels.perf import peak_rss_bytes
from hatkernels.transient_files import COLLECTION, _collection

__all__ = ["CAUTION", "ENERGY_KEYS", "report", "summary_record", "write_files"]

#: What the outputs of the transient mode say of themselves.
CAUTION = (
    "CAUTION: these results are engineering estimates from a simplified model (transient "
    "conduction, constant properties, idealised boundary conditions). They must be checked by a "
    "qualified person against local codes and licensed practice before any design, safety or "
    "purchasing decision."
)
#: The heat accounts of each output interval, as the library names them.
ENERGY_KEYS = ("stored", "sources", "flux_in", "held_out", "convection_out", "absorbed",
               "heat_in", "heat_out", "imbalance")
#: What a short energy unit means.
UNIT_WORDS = {"J/m": "J/m: joules per metre of thickness, the depth out of the plane",
              "": "the mesh file's units, capacity x u x volume"}
#: The words for a mesh's cells, by dimension.
CELLS = {2: "triangles", 3: "tetrahedra"}
#: Phases of the library's march, in the order the report gives them.
PHASES = ("assemble", "setup", "steps", "output")


def _finite(x):
    x = float(x)
    return x if np.isfinite(x) else None


def _mean(mesh, u):
    """The mean of the P1 field ``u``: its exact integral over the total measure."""
    size = mesh.measures()
    total = sum(float(size @ u[mesh.cells[:, j]]) for j in range(mesh.cells.shape[1]))
    return total / mesh.cells.shape[1] / float(size.sum())


def _field(mesh, used, u, scale):
    """Largest value (and where, in shown units), smallest and mean of ``u``."""
    k = used[int(np.argmax(u[used]))]
    return {"max": float(u[k]), "max_at": (mesh.points[k] * scale).tolist(),
            "min": float(u[used].min()), "mean": _mean(mesh, u)}


def _energy(sol, scale):
    """The heat accounts per output interval of positive length, scaled to ``scale`` (a
    plate's thickness), and their sums."""
    eb = sol.energy()
    intervals = []
    for k in range(len(eb.end)):
        if eb.end[k] <= eb.start[k]:
            continue  # t = 0 to t = 0: nothing moves
        row = {"start": float(eb.start[k]), "end": float(eb.end[k])}
        for key in ENERGY_KEYS:
            row[key] = float(getattr(eb, key)[k]) * scale
        size = max(abs(row["stored"]), abs(row["heat_in"]), abs(row["heat_out"]))
        row["relative"] = abs(row["imbalance"]) / size if size > 0 else 0.0
        intervals.append(row)
    total = {key: float(sum(r[key] for r in intervals)) for key in ENERGY_KEYS}
    size = max(abs(total["stored"]), abs(total["heat_in"]), abs(total["heat_out"]))
    total["relative"] = abs(total["imbalance"]) / size if size > 0 else 0.0
    return {"intervals": intervals, "total": total}


def summary_record(args, case, sol, timings, kernels_seconds, command, rtol):
    """The record of one march, as written to summary.json.

    ``timings``: the command's own phases (``mesh``); ``kernels_seconds``: the
    warm-up that compiled or loaded the kernels; ``rtol``: each step's tolerance.
    """
    st, mesh, s = sol.stats, sol.mesh, case.settings
    out = base_record(command)
    out["caution"] = CAUTION
    out["mode"] = "transient"
    out["problem"] = case.record
    out["units"] = {"time": "s", "length": "m" if case.unit else "mesh units",
                    "shown_length": case.length_unit or "mesh units",
                    "solution": case.unit or "solution units",
                    "capacity": "J/(m^3 K)" if case.unit else "mesh-file units",
                    "energy": case.energy_unit or "mesh-file units"}
    out["mesh"] = {"description": case.description, "dimension": mesh.dim,
                   "points": mesh.n_points, CELLS[mesh.dim]: mesh.n_cells, "h": mesh.h()}
    out["schedule"] = {"start": 0.0, "end": s.end, "step": s.step, "initial": s.initial,
                       "scheme": s.scheme, "method": st.scheme,
                       "output_times": [float(t) for t in sol.times], "steps": st.steps,
                       "step_sizes_built": st.systems}
    out["solver"] = {"preconditioner": st.preconditioner, "requested": args.preconditioner,
                     "rtol": rtol, "maxiter": args.maxiter, "converged": bool(st.converged),
                     "unknowns": st.unknowns, "nnz": st.nnz, "stored_bytes": st.stored_bytes,
                     "threads": st.threads}
    it, wu = st.iterations, st.work_units
    out["steps"] = {
        "iterations": it.tolist(), "iterations_min": int(it.min()),
        "iterations_mean": float(it.mean()), "iterations_max": int(it.max()),
        "smoother_iterations": ([] if st.smoother_iterations is None
                                else st.smoother_iterations.tolist()),
        "smoother_iterations_mean": (0.0 if st.smoother_iterations is None
                                     else float(st.smoother_iterations.mean())),
        "work_units": [_finite(w) for w in wu], "work_units_min": _finite(wu.min()),
        "work_units_median": _finite(np.median(wu)), "work_units_mean": _finite(wu.mean()),
        "work_units_max": _finite(wu.max()),
        "step_seconds_median": float(np.median(st.step_seconds)),
        "product_seconds": _finite(st.product_seconds)}
    names = [n for n, _ in s.probes]
    out["probes"] = [{"name": n, "at": [v * case.length_scale for v in p], "point": list(p)}
                     for n, p in s.probes]
    used = np.ones(mesh.n_points, dtype=bool)
    used[mesh.unused_points()] = False
    used = np.flatnonzero(used)
    rows = []
    for k, t in enumerate(sol.times):
        row = {"time": float(t), **_field(mesh, used, sol.u[k], case.length_scale)}
        if names:
            at = int(np.flatnonzero(sol.probe_times == t)[0])  # a step ends at each output
            row["probes"] = dict(zip(names, sol.probe_values[at].tolist(), strict=True))
        rows.append(row)
    out["outputs"] = rows
    out["energy"] = {"unit": out["units"]["energy"], **_energy(sol, case.energy_scale)}
    if case.power is not None:
        out["energy"]["power_in_W"] = case.power
    t = dict(timings)
    t["kernels"] = kernels_seconds
    for key in (*PHASES, "data", "total"):
        t[key] = st.timings.get(key, 0.0)
    out["timings_s"] = t
    out["peak_rss_bytes"] = max(st.peak_rss_bytes, peak_rss_bytes())
    out["versions"] = versions()
    return out


def _write_probes(path, sol, names, unit):
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["time (s)"] + [f"{n} ({unit})" if unit else n for n in names])
        for t, values in zip(sol.probe_times, sol.probe_values, strict=True):
            w.writerow([repr(float(t))] + [repr(float(v)) for v in values])


def write_files(directory, case, sol, summary, progress):
    """Write the march's files into ``directory`` (a temporary one, renamed whole by the
    caller); the .vtu files need meshio and probes.png matplotlib: without them those files
    are skipped and the summary says so.  Adds ``files`` and ``skipped`` to ``summary``
    before writing it last."""
    mesh = sol.mesh
    files, skipped = [], []
    name = case.quantity if case.quantity.isidentifier() else "u"
    meta = {k: summary[k] for k in ("generator", "created", "command", "caution", "units")}
    meta["time"] = float(sol.times[-1])
    kio.write_solution(os.path.join(directory, "solution.npz"), mesh, {"u": sol.u[-1]}, meta,
                       cell_data=case.cell)
    files.append("solution.npz")
    if kio.meshio_available():
        progress.phase(f"write: {len(sol.times)} .vtu files and {COLLECTION}")
        entries = []
        for k, t in enumerate(sol.times):
            file = f"{name}_{k:06d}.vtu"
            kio.write_vtu(os.path.join(directory, file), mesh, {name: sol.u[k]}, case.cell)
            entries.append((float(t), file))
        with open(os.path.join(directory, COLLECTION), "w", encoding="utf-8") as f:
            f.write(_collection(entries))
        files += [COLLECTION] + [e[1] for e in entries]
    else:
        skipped.append(not_installed(f"{COLLECTION} and the .vtu files", "meshio"))
    names = [n for n, _ in case.settings.probes]
    if names:
        _write_probes(os.path.join(directory, "probes.csv"), sol, names, case.unit)
        files.append("probes.csv")
        if plot.available():
            progress.phase("write: probes.png")
            label = case.quantity + (f" ({case.unit})" if case.unit else "")
            plot.probes_figure(sol.probe_times, sol.probe_values, names,
                               os.path.join(directory, "probes.png"), label=label,
                               title=f"{case.title}: {case.quantity} at the probes")
            files.append("probes.png")
        else:
            skipped.append(not_installed("probes.png", "matplotlib"))
    files.append("summary.json")
    return write_summary(directory, summary, files, skipped)


def _table(header, rows):
    """Rows under a header, the first column left-aligned and the others right-aligned."""
    width = [max(len(str(r[k])) for r in [header] + rows) for k in range(len(header))]
    return ["  ".join(str(c).ljust(w) if k == 0 else str(c).rjust(w)
                      for k, (c, w) in enumerate(zip(r, width, strict=True))).rstrip()
            for r in [header] + rows]


def _where(point, unit):
    return "(" + ", ".join(f"{v:.4g}" for v in point) + ")" + (f" {unit}" if unit else "")


def _block(label, lines):
    return [f"{label if k == 0 else '':<16}{line}" for k, line in enumerate(lines)]


def report(case, summary, out):
    """The printed report of a march."""
    s = summary
    sc, steps, solver, m = s["schedule"], s["steps"], s["solver"], s["mesh"]
    unit = f" {case.unit}" if case.unit else ""
    lines = [f"{PROG} solve (transient): {case.title}"]
    lines += [f"  {text}" for text in case.statement]
    cells = CELLS[m["dimension"]]
    lines.append(f"{'mesh':<16}{m['description']}: {m['points']:,} points, "
                 f"{m[cells]:,} {cells}")
    lines.append(f"{'unknowns':<16}{solver['unknowns']:,}, {solver['nnz']:,} entries of "
                 f"M + tau K")
    n_out = len(sc["output_times"]) - 1
    lines.append(f"{'time':<16}0 to {sc['end']:g} s in {sc['steps']:,} steps of at most "
                 f"{sc['step']:g} s, {n_out} output time{'s' if n_out != 1 else ''} after "
                 f"t = 0; {sc['method']}")
    lines.append(f"{'preconditioner':<16}{solver['preconditioner']} (built for "
                 f"{sc['step_sizes_built']} step size{'s' if sc['step_sizes_built'] != 1 else ''})")
    lines.append(f"{'threads':<16}{solver['threads']} (numba)")
    t = s["timings_s"]
    lines.append(f"{'times':<16}" + ", ".join(
        f"{k} {format_seconds(t[k])}" for k in ("mesh", "kernels", *PHASES) if k in t))
    lines.append(f"{'iterations':<16}per step min {steps['iterations_min']}, mean "
                 f"{steps['iterations_mean']:.1f}, max {steps['iterations_max']} (CG to rtol "
                 f"{solver['rtol']:g} per step; before them, mean "
                 f"{steps['smoother_iterations_mean']:.1f} with the smoother alone), "
                 f"{'all converged' if solver['converged'] else 'NOT all converged'}")
    if steps["product_seconds"] is not None:
        lines.append(f"{'cost per step':<16}median {steps['work_units_median']:.3g} WU (min "
                     f"{steps['work_units_min']:.3g}, max {steps['work_units_max']:.3g}), "
                     f"median {format_seconds(steps['step_seconds_median'])}; 1 WU = one "
                     f"product with M + tau K, {format_seconds(steps['product_seconds'])}")
    names = [p["name"] for p in s["probes"]]
    for p in s["probes"]:
        at = _where(p["at"], case.length_unit)
        lines.append(f"{'probe':<16}{p['name']}" + (f" at {at}" if at != p["name"] else ""))
    header = ["t (s)", f"max{unit}", "at", *(f"{n}{unit}" for n in names)]
    rows = [[f"{r['time']:g}", f"{r['max']:.6g}", _where(r["max_at"], case.length_unit),
             *(f"{r['probes'][n]:.6g}" for n in names)] for r in s["outputs"]]
    lines += _block(case.quantity, _table(header, rows))
    e = s["energy"]
    eu = f" {case.energy_unit}" if case.energy_unit else ""
    rows = [[f"{r['start']:g} to {r['end']:g}", f"{r['stored']:.6g}", f"{r['heat_in']:.6g}",
             f"{r['heat_out']:.6g}", f"{r['imbalance']:.2e}", f"{r['relative']:.1e}"]
            for r in e["intervals"]]
    note = (f"(all in {UNIT_WORDS.get(case.energy_unit, case.energy_unit)}; out: through "
            f"held and cooled boundaries)")
    lines += _block("heat", _table(["interval (s)", "stored", "in", "out", "imbalance",
                                    "relative"], rows) + [note])
    tot = e["total"]
    lines.append(f"{'balance':<16}from 0 to {sc['end']:g} s: stored {tot['stored']:.6g}{eu} "
                 f"+ heat out {tot['heat_out']:.6g}{eu} = heat in {tot['heat_in']:.6g}{eu} "
                 f"(imbalance {tot['imbalance']:.2e}{eu}, relative {tot['relative']:.1e})")
    if "power_in_W" in e:
        lines.append(f"{'':<16}heat in = power {e['power_in_W']:.6g} W x {sc['end']:g} s "
                     f"(the sources are on from t = 0)")
    lines.append(f"{'peak memory':<16}{s['peak_rss_bytes'] / 1e9:.2f} GB (process high-water "
                 f"mark)")
    vtu = [f for f in s["files"] if f.endswith(".vtu")]
    shown = [f for f in s["files"] if not f.endswith(".vtu")]
    if vtu:
        shown.insert(shown.index(COLLECTION) + 1, f"{len(vtu)} .vtu files ({vtu[0]} ...)")
    lines.append(f"{'output':<16}{out}: {', '.join(shown)}")
    lines += [f"{'':<16}not written: {text}" for text in s["skipped"]]
    lines.append("")
    lines.append(s["caution"])
    return "\n".join(lines)
