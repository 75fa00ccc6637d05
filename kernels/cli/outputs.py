"""The files of ``hatkernels solve``: solution.npz, summary.json, figures, solution.vtu."""

from __future__ import annotations

import os

from hatkernels import io as kio
from hatkernels import plot
from hatkernels.cli.common import not_installed

__all__ = ["write_solve_outputs"]

#: What summary.json repeats in the metadata of solution.npz.
NPZ_METADATA = ("generator", "created", "command", "caution", "units", "problem", "solution")


def write_solve_outputs(directory, problem, u, summary, progress, rtol):
    """Write a solve's files into ``directory`` (a temporary one, renamed whole by the caller).

    Figures need matplotlib and solution.vtu needs meshio; without them those
    files are skipped and the summary says so.  Adds ``files`` and
    ``skipped`` to ``summary`` before writing it.
    """
    files = ["solution.npz", "summary.json"]
    skipped = []
    meta = {k: summary[k] for k in NPZ_METADATA}
    cell = {"source": problem.source_array()}
    point = {problem.quantity: u}
    kio.write_solution(os.path.join(directory, "solution.npz"), problem.mesh,
                       {"u": u}, meta, cell_data=cell)
    if plot.available():
        label = problem.quantity + (f" ({problem.unit})" if problem.unit else "")
        title = (f"{problem.name}: {problem.quantity}, max {summary['solution']['max']:.4g}"
                 f"{' ' + problem.unit if problem.unit else ''}")
        progress.phase("write: solution.png")
        picture = {"title": title, "label": label, "length_scale": problem.length_scale,
                   "length_unit": problem.length_unit}
        path = os.path.join(directory, "solution.png")
        if problem.mesh.dim == 2:
            plot.solution_figure(problem.mesh, u, path, **picture,
                                 outlines=[(c.name, c.bounds) for c in problem.components])
        else:  # two plane sections through the hottest point
            plot.section_figure(problem.mesh, u, path, **picture,
                                boxes=[(c.name, c.bounds) for c in problem.components])
        method = summary["solver"]["preconditioner"].split(":")[0]
        plot.residuals_figure(summary["solver"]["residuals"],
                              os.path.join(directory, "residuals.png"), rtol=rtol,
                              title=f"conjugate gradients, {method}")
        files += ["solution.png", "residuals.png"]
    else:
        skipped.append(not_installed("solution.png and residuals.png", "matplotlib"))
    if kio.meshio_available():
        progress.phase("write: solution.vtu")
        kio.write_vtu(os.path.join(directory, "solution.vtu"), problem.mesh, point, cell)
        files.append("solution.vtu")
    else:
        skipped.append(not_installed("solution.vtu", "meshio"))
    summary["files"] = files
    summary["skipped"] = skipped
    kio.write_json(os.path.join(directory, "summary.json"), summary)
    return files, skipped
