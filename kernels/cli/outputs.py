"""The files of ``hatkernels solve``: solution.npz, summary.json, figures, solution.vtu."""

from __future__ import annotations

import os

from hatkernels import io as kio
from hatkernels import plot
from hatkernels.cli.common import not_installed

__all__ = ["identity", "write_outputs", "write_solve_outputs", "write_summary", "write_vtu_or_skip"]

#: What summary.json repeats in the metadata of solution.npz.
NPZ_METADATA = ("generator", "created", "command", "caution", "units", "problem", "solution")


def identity(path):
    """What tells whether ``path`` was replaced meanwhile: its inode and time, or None."""
    try:
        st = os.lstat(path)
    except (OSError, TypeError):
        return None
    return st.st_ino, st.st_mtime_ns


def write_solve_outputs(directory, problem, u, summary, progress, rtol):
    """Write a scenario's files into ``directory`` (see :func:`write_outputs`)."""
    return write_outputs(
        directory, problem.mesh, u, summary, progress, rtol,
        cell={"source": problem.source_array()}, name=problem.name, quantity=problem.quantity,
        unit=problem.unit, length_scale=problem.length_scale, length_unit=problem.length_unit,
        outlines=[(c.name, c.bounds) for c in problem.components])


def write_outputs(directory, mesh, u, summary, progress, rtol, *, cell, name, quantity, unit,
                  length_scale, length_unit, outlines=()):
    """Write a solve's files into ``directory`` (a temporary one, renamed whole by the caller).

    ``u`` goes into the files as ``quantity`` (``u`` in solution.npz), ``cell``
    holds arrays of one value per cell; the picture names ``name`` and shows
    ``outlines`` (boxes in mesh coordinates; a mesh's regions are outlined by
    the picture itself).  Figures need matplotlib and solution.vtu needs
    meshio; without them those files are skipped and the summary says so.
    Adds ``files`` and ``skipped`` to ``summary`` before writing it.
    """
    files = ["solution.npz", "summary.json"]
    skipped = []
    meta = {k: summary[k] for k in NPZ_METADATA}
    point = {quantity: u}
    kio.write_solution(os.path.join(directory, "solution.npz"), mesh,
                       {"u": u}, meta, cell_data=cell)
    if plot.available():
        label = quantity + (f" ({unit})" if unit else "")
        title = (f"{name}: {quantity}, max {summary['solution']['max']:.4g}"
                 f"{' ' + unit if unit else ''}")
        progress.phase("write: solution.png")
        picture = {"title": title, "label": label, "length_scale": length_scale,
                   "length_unit": length_unit}
        path = os.path.join(directory, "solution.png")
        if mesh.dim == 2:
            plot.solution_figure(mesh, u, path, **picture, outlines=outlines)
        else:  # two plane sections through the hottest point
            plot.section_figure(mesh, u, path, **picture, boxes=outlines)
        method = summary["solver"]["preconditioner"].split(":")[0]
        plot.residuals_figure(summary["solver"]["residuals"],
                              os.path.join(directory, "residuals.png"), rtol=rtol,
                              reference=summary["solver"].get("rhs_norm"),
                              title=f"conjugate gradients, {method}")
        files += ["solution.png", "residuals.png"]
    else:
        skipped.append(not_installed("solution.png and residuals.png", "matplotlib"))
    write_vtu_or_skip(directory, "solution.vtu", mesh, point, cell, files, skipped, progress)
    return write_summary(directory, summary, files, skipped)


def write_vtu_or_skip(directory, name, mesh, point, cell, files, skipped, progress):
    """``name`` (VTU, through meshio) into ``directory`` and onto ``files``; without meshio,
    why not onto ``skipped``."""
    if kio.meshio_available():
        progress.phase(f"write: {name}")
        kio.write_vtu(os.path.join(directory, name), mesh, point, cell)
        files.append(name)
    else:
        skipped.append(not_installed(name, "meshio"))


def write_summary(directory, summary, files, skipped):
    """``summary`` with the lists of the files written and skipped, as ``summary.json`` in
    ``directory``; returns ``(files, skipped)``."""
    summary["files"] = files
    summary["skipped"] = skipped
    kio.write_json(os.path.join(directory, "summary.json"), summary)
    return files, skipped
