"""The results of ``hatkernels modes``: summary.json's record, the files and the printed report.

:func:`summary` is the one place that reads the eigenmodes' stats; the files
and the report read the record it makes.
"""

from __future__ import annotations

import json
import math
import os

import numpy as np

from hatkernels import io as kio
from hatkernels import plot
from hatkernels._text import format_seconds
from hatkernels.cli.common import PROG, base_record, not_installed, versions
from hatkernels.cli.modes_figure import modes_figure
from hatkernels.cli.outputs import write_summary, write_vtu_or_skip
from hatkernels.cli.summary import CELLS, _mesh_record
from hatkernels.perf import peak_rss_bytes

__all__ = ["CAUTION", "MEANING", "summary", "write", "report", "decay_times"]

CAUTION = (
    "CAUTION: these decay rates and times are engineering estimates from a simplified model "
    "(linear conduction, constant properties, idealised boundary conditions). They must be "
    "checked by a qualified person against local codes and licensed practice before any "
    "design, safety or purchasing decision."
)
#: What a decay time means, said once in the report and the record.
MEANING = ("a temperature disturbance shaped like mode j decays as exp(-t / tau_j), "
           "tau_j = 1 / lambda_j: after tau_j it is 1/e (37 %) of its start, after 3 tau_j "
           "5 %; a general disturbance is a sum of modes, and after a while the slowest "
           "(mode 1) is what is left")
#: What modes.npz repeats of the record in its metadata.
NPZ_METADATA = ("generator", "created", "command", "caution", "units", "problem", "modes")
#: The library's phases copied into the record.
PHASES = ("assemble", "setup", "solve", "products", "preconditioner", "total")


def decay_times(values, zero_modes):
    """``1 / lambda`` of each mode; ``inf`` for a zero mode (the steady mode: no decay)."""
    values = np.asarray(values, dtype=np.float64)
    out = np.full(values.shape, np.inf)
    decays = ~np.asarray(zero_modes, dtype=bool)
    out[decays] = 1.0 / values[decays]
    return out


def _finite_or_none(x):
    x = float(x)
    return x if math.isfinite(x) else None


def summary(args, modal, modes, timings, command):
    """The record of one run, as written to summary.json (``timings``: the command's own
    phases, ``mesh`` and ``kernels``)."""
    st = modes.stats
    mesh = modal.mesh
    tau = decay_times(modes.values, modes.zero_modes)
    out = base_record(command)
    out["caution"] = CAUTION
    out["problem"] = modal.record
    out["units"] = dict(modal.units)
    out["mesh"] = _mesh_record(mesh, modal.description)
    out["meaning"] = MEANING
    out["modes"] = [
        {"mode": j + 1, "eigenvalue": float(modes.values[j]),
         "decay_time": _finite_or_none(tau[j]), "zero_mode": bool(modes.zero_modes[j]),
         "estimated_error": _finite_or_none(st.errors[j])}
        for j in range(len(modes.values))]
    out["eigenvalues"] = [float(v) for v in modes.values]
    out["decay_times"] = [_finite_or_none(t) for t in tau]
    out["zero_modes"] = int(modes.zero_modes.sum())
    unused = mesh.unused_points().size
    out["solver"] = {
        "method": st.method, "requested_method": args.method, "unknowns": st.unknowns,
        "held_points": int(mesh.n_points - unused - st.unknowns), "rtol": args.rtol,
        "maxiter": args.maxiter, "preconditioner": st.preconditioner,
        "requested_preconditioner": args.preconditioner, "block": st.block,
        "iterations": st.iterations, "levels": [list(map(int, lv)) for lv in st.levels],
        "converged": bool(st.converged), "products": dict(st.products),
        "shift": st.shift, "product_seconds": _finite_or_none(st.product_seconds),
        "work_units": _finite_or_none(st.work_units), "threads": st.threads,
    }
    t = dict(timings)
    for key in PHASES:
        if key in st.timings:
            t["library_" + key if key == "total" else key] = st.timings[key]
    out["timings_s"] = t
    out["peak_rss_bytes"] = max(st.peak_rss_bytes, peak_rss_bytes())
    out["versions"] = versions()
    return out


def _value(v, unit):
    return f"{v:.6g} {unit}" if unit else f"{v:.6g}"


def _titles(s):
    units = s["units"]
    short = units["eigenvalue"] == "1/s"
    out = []
    for m in s["modes"]:
        if m["zero_mode"]:
            out.append(f"mode {m['mode']}: lambda = 0 (steady mode)")
        elif short:
            out.append(f"mode {m['mode']}: lambda = {m['eigenvalue']:.4g} 1/s, "
                       f"tau = {m['decay_time']:.4g} s")
        else:
            out.append(f"mode {m['mode']}: lambda = {m['eigenvalue']:.5g}, "
                       f"tau = {m['decay_time']:.4g}")
    return out


def write(directory, modal, modes, record, pictures, progress, out):
    """Write modes.npz, modes.png (the first ``pictures`` modes of a 2-D mesh), modes.vtu
    and summary.json into ``directory`` (a temporary one, renamed whole by the caller into
    ``out``); adds ``files`` and ``skipped`` to ``record`` before writing it."""
    mesh = modal.mesh
    V = np.asarray(modes.vectors)
    files, skipped = ["modes.npz", "summary.json"], []
    progress.phase(f"write: modes.npz and summary.json into {out}")
    meta = json.dumps({k: record[k] for k in NPZ_METADATA}, allow_nan=False)
    cells = {2: "triangles", 3: "tetrahedra"}[mesh.dim]
    with kio.atomic_file(os.path.join(directory, "modes.npz")) as tmp, open(tmp, "wb") as f:
        np.savez_compressed(f, points=mesh.points, **{cells: mesh.cells},
                            values=np.asarray(modes.values),
                            decay_times=decay_times(modes.values, modes.zero_modes),
                            zero_modes=np.asarray(modes.zero_modes),
                            vectors=np.ascontiguousarray(V.T), metadata=np.array(meta))
    if pictures == 0:
        pass
    elif mesh.dim != 2:
        skipped.append("modes.png (pictures are drawn for 2-D meshes only; modes.vtu and "
                       "modes.npz hold the 3-D modes)")
    elif plot.available():
        progress.phase(f"write: modes.png ({pictures} modes)")
        modes_figure(mesh, V[:, :pictures], _titles(record)[:pictures],
                     os.path.join(directory, "modes.png"),
                     suptitle=f"{modal.name}: slowest thermal modes (colours: sign and "
                              f"relative size; mass-normalised)",
                     length_scale=modal.length_scale, length_unit=modal.length_unit)
        files.append("modes.png")
    else:
        skipped.append(not_installed("modes.png", "matplotlib"))
    write_vtu_or_skip(directory, "modes.vtu", mesh,
                      {f"mode_{j + 1}": V[:, j] for j in range(V.shape[1])}, None, files,
                      skipped, progress)
    return write_summary(directory, record, files, skipped)


def _table(s):
    """The modes as rows: number, lambda, decay time (right-aligned)."""
    si = s["units"]["eigenvalue"] == "1/s"
    head = ["mode", "lambda (1/s)" if si else "lambda", "decay time (s)" if si else "decay time"]
    rows = [[str(m["mode"]), "0 (steady)" if m["zero_mode"] else f"{m['eigenvalue']:.6g}",
             "none (no decay)" if m["zero_mode"] else f"{m['decay_time']:.6g}"]
            for m in s["modes"]]
    width = [max(len(r[k]) for r in [head] + rows) for k in range(3)]
    return ["  ".join(c.rjust(w) for c, w in zip(r, width, strict=True)) for r in [head] + rows]


def _first_note(s):
    """What the slowest decaying mode means for this problem, in one line."""
    decaying = [m for m in s["modes"] if not m["zero_mode"]]
    if not decaying:
        return None
    m = decaying[0]
    tau = m["decay_time"]
    lead = ("apart from the steady (uniform) mode, " if s["zero_modes"] else "")
    return (f"{lead}the slowest disturbance (mode {m['mode']}) falls to 1/e of its size in "
            f"{tau:.3g} s and to 5 % in {3 * tau:.3g} s; the listed faster modes are gone "
            f"sooner")


def report(modal, s, out):
    """The printed report: the problem, the run, the table of modes, the caution."""
    solver, t = s["solver"], s["timings_s"]
    dim = s["mesh"]["dimension"]
    cells = CELLS[dim]
    lines = [f"{PROG} modes: {modal.statement[0]}"]
    lines += [f"  {text}" for text in modal.statement[1:]]
    lines.append(f"{'mesh':<16}{s['mesh']['description']}: {s['mesh']['points']:,} points, "
                 f"{s['mesh'][cells]:,} {cells}")
    held = (f" (plus {solver['held_points']:,} held points)" if solver["held_points"]
            else " (no point held)")
    lines.append(f"{'unknowns':<16}{solver['unknowns']:,}{held}")
    method = solver["method"]
    if method == "lobpcg":
        method += (f", {solver['iterations']} iterations on this mesh (block of "
                   f"{solver['block']}), {solver['preconditioner']}")
    lines.append(f"{'eigensolver':<16}{method}")
    order = ("mesh", "kernels", "assemble", "setup", "solve")
    wu = solver["work_units"]
    lines.append(f"{'times':<16}"
                 + ", ".join(f"{k} {format_seconds(t[k])}" for k in order if t.get(k))
                 + (f"; {wu:,.0f} work units (products with the stiffness matrix)"
                    if wu is not None else ""))
    table = _table(s)
    lines += [f"{'modes' if k == 0 else '':<16}{row}" for k, row in enumerate(table)]
    if s["zero_modes"]:
        lines.append(f"{'':<16}lambda = 0: the steady mode (nothing holds or cools that part "
                     f"of the body: its mean temperature does not decay)")
    lines.append(f"{'decay time':<16}{s['meaning']}")
    note = _first_note(s) if modal.note else None
    if note:
        lines.append(f"{'':<16}{note}")
    lines.append(f"{'peak memory':<16}{s['peak_rss_bytes'] / 1e9:.2f} GB (process high-water "
                 f"mark)")
    lines.append(f"{'output':<16}{out}: {', '.join(s['files'])}")
    lines += [f"{'':<16}not written: {text}" for text in s["skipped"]]
    lines.append("")
    lines.append(s["caution"])
    return "\n".join(lines)
