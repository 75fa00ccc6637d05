"""modes.png: the first modes of a triangle mesh in a grid, each titled with its decay rate
and time (matplotlib, through :mod:`hatkernels.plot`'s canvas and atomic writer)."""

from __future__ import annotations

import math

import numpy as np

from hatkernels import plot

__all__ = ["modes_figure", "COLUMNS"]

#: Pictures per row.
COLUMNS = 3


def modes_figure(mesh, vectors, titles, path, *, suptitle="", length_scale=1.0,
                 length_unit=""):
    """Filled contours of each column of ``vectors`` (n_points, j) on ``mesh`` in a grid,
    the colours symmetric about 0 (a mode's sign is arbitrary), ``titles[j]`` above each;
    write the PNG at ``path`` atomically."""
    count = vectors.shape[1]
    cols = min(count, COLUMNS)
    rows = math.ceil(count / cols)
    x0, x1 = (float(f(mesh.points[:, 0])) for f in (np.min, np.max))
    y0, y1 = (float(f(mesh.points[:, 1])) for f in (np.min, np.max))
    aspect = (y1 - y0) / (x1 - x0) if x1 > x0 else 1.0
    width = 4.0
    height = min(4.0, max(1.2, width * aspect)) + 0.7
    fig = plot._figure((width * cols, height * rows + 0.5), plot.DPI)
    from matplotlib.tri import Triangulation

    s = float(length_scale)
    tri = Triangulation(mesh.points[:, 0] * s, mesh.points[:, 1] * s, mesh.triangles)
    unit = f" ({length_unit})" if length_unit else ""
    outlines = plot.region_outlines(mesh) * s
    for j in range(count):
        ax = fig.add_subplot(rows, cols, j + 1)
        v = vectors[:, j]
        top = float(np.max(np.abs(v)))
        top = top if top > 0 else 1.0
        ax.tricontourf(tri, v, levels=np.linspace(-top, top, 22), cmap="RdBu_r")
        if v.min() < 0 < v.max():  # the nodal lines
            ax.tricontour(tri, v, levels=[0.0], colors="0.2", linewidths=0.6)
        if len(outlines):
            from matplotlib.collections import LineCollection

            ax.add_collection(LineCollection(outlines, colors="0.1", linewidths=0.5))
        ax.set_aspect("equal")
        ax.set_title(titles[j], fontsize=9)
        ax.tick_params(labelsize=7)
        ax.set_xlabel(f"x{unit}", fontsize=8)
        if j % cols == 0:
            ax.set_ylabel(f"y{unit}", fontsize=8)
    if suptitle:
        fig.suptitle(suptitle, fontsize=10)
    fig.tight_layout()
    return plot._save(fig, path, plot.DPI)
