"""Figures of solutions, residual histories and convergence studies (matplotlib, Agg).

Figures are drawn on matplotlib's Agg canvas directly (``Figure`` plus
``FigureCanvasAgg``), without pyplot: no display is needed and the
caller's pyplot backend is left alone.  Every figure is written atomically
and has a fixed size in pixels (``size`` times ``dpi``), so the same call
gives the same image dimensions on every machine.  matplotlib is the
optional ``plot`` extra; :func:`available` says whether it is installed.
"""

from __future__ import annotations

import textwrap

import numpy as np

from hatkernels.errors import InputError
from hatkernels.io import atomic_file

__all__ = [
    "DPI",
    "SIZE",
    "available",
    "convergence_figure",
    "plane_section",
    "probes_figure",
    "region_outlines",
    "residuals_figure",
    "section_figure",
    "solution_figure",
]

#: Default figure size in inches and resolution: 800 x 560 pixels.
SIZE = (8.0, 5.6)
DPI = 100


def available():
    """True when matplotlib can be imported."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return False
    return True


def _figure(size, dpi):
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        raise InputError("figures need matplotlib; install the plot extra "
                         "(pip install 'hatkernels[plot]')") from None
    fig = Figure(figsize=size, dpi=dpi)
    FigureCanvasAgg(fig)
    return fig


def _save(fig, path, dpi):
    with atomic_file(path, suffix=".png") as tmp:
        fig.savefig(tmp, format="png", dpi=dpi)
    return path


def _finite(values, name):
    v = np.asarray(values, dtype=np.float64)
    bad = ~np.isfinite(v)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise InputError(f"{name}[{k}] = {float(v[k])!r} is not finite; nothing to plot")
    return v


def region_outlines(mesh):
    """The edges of a triangle mesh that separate two regions or lie on the boundary.

    Returns segments of shape (k, 2, 2) (end points, mesh coordinates) for a
    mesh with region tags (:attr:`hatkernels.Mesh.regions`); none (shape
    (0, 2, 2)) for a mesh without.

    >>> from hatkernels.mesh import rectangle
    >>> m = rectangle(2, 1).with_tags(regions=[1, 1, 2, 2])
    >>> sorted(tuple(map(tuple, s)) for s in region_outlines(m).tolist()
    ...        if s[0][0] == s[1][0] == 0.5)   # the interface x = 1/2
    [((0.5, 0.0), (0.5, 1.0))]
    >>> len(region_outlines(m)), len(region_outlines(rectangle(2, 1)))
    (7, 0)
    """
    if mesh.regions is None:
        return np.empty((0, 2, 2))
    edges = mesh.edges()
    around = mesh.triangle_edges().ravel()
    region = np.repeat(mesh.regions.astype(np.int64), 3)
    low = np.full(len(edges), np.iinfo(np.int64).max)
    high = np.full(len(edges), np.iinfo(np.int64).min)
    np.minimum.at(low, around, region)
    np.maximum.at(high, around, region)
    keep = (low != high) | (np.bincount(around, minlength=len(edges)) == 1)
    return mesh.points[edges[keep]]


def solution_figure(mesh, u, path, *, title="", label="u", length_scale=1.0, length_unit="",
                    outlines=(), levels=24, size=SIZE, dpi=DPI):
    """Filled contours of nodal values ``u`` on ``mesh``, with a colour bar; write a PNG.

    Parameters
    ----------
    mesh : Mesh
    u : ndarray, shape (n_points,)
    path : str
        The PNG to write (atomically).
    label : str
        Colour-bar label, e.g. ``"temperature (degC)"``.
    length_scale, length_unit
        Coordinates are multiplied by ``length_scale`` and the axes labelled
        in ``length_unit`` (1e3 and "mm" for a mesh in metres).
    outlines : sequence of (name, (x0, x1, y0, y1))
        Rectangles to outline and name (in mesh coordinates).

    A mesh with region tags gets the edges between regions, and its boundary,
    drawn as thin dark lines (:func:`region_outlines`).
    """
    u = _finite(u, "u")
    if u.shape != (mesh.n_points,):
        raise InputError(f"u has shape {u.shape}; expected ({mesh.n_points},)")
    fig = _figure(size, dpi)  # without matplotlib: the InputError with the install hint
    from matplotlib.patches import Rectangle
    from matplotlib.ticker import MaxNLocator
    from matplotlib.tri import Triangulation

    ax = fig.add_subplot()
    s = float(length_scale)
    used = np.unique(mesh.triangles)  # points in no triangle carry no value
    tri = Triangulation(mesh.points[:, 0] * s, mesh.points[:, 1] * s, mesh.triangles)
    lo, hi = float(u[used].min()), float(u[used].max())
    if hi - lo <= 1e-12 * max(1.0, abs(hi)):
        lo, hi = lo - 0.5, hi + 0.5  # a constant field still gets a colour bar
    filled = ax.tricontourf(tri, u, levels=np.linspace(lo, hi, levels + 1), cmap="inferno")
    ax.tricontour(tri, u, levels=np.linspace(lo, hi, levels // 3 + 1), colors="white",
                  linewidths=0.3, alpha=0.5)
    if mesh.n_triangles <= 2500:  # small meshes: show the triangles
        ax.triplot(tri, color="0.6", linewidth=0.2)
    segments = region_outlines(mesh)
    if len(segments):
        from matplotlib.collections import LineCollection

        ax.add_collection(LineCollection(segments * s, colors="0.1", linewidths=0.6))
    for name, (x0, x1, y0, y1) in outlines:
        ax.add_patch(Rectangle((x0 * s, y0 * s), (x1 - x0) * s, (y1 - y0) * s, fill=False,
                               edgecolor="cyan", linewidth=1.0, linestyle="--"))
        ax.annotate(name, ((x0 + x1) / 2 * s, y1 * s), xytext=(0, 3),
                    textcoords="offset points", ha="center", va="bottom", color="cyan",
                    fontsize=8)
    imax = used[np.argmax(u[used])]
    ax.plot(mesh.points[imax, 0] * s, mesh.points[imax, 1] * s, marker="+", color="cyan",
            markersize=8)
    ax.set_aspect("equal")
    unit = f" ({length_unit})" if length_unit else ""
    ax.set_xlabel(f"x{unit}")
    ax.set_ylabel(f"y{unit}")
    if title:
        ax.set_title(textwrap.fill(title, 70), fontsize=10)
    bar = fig.colorbar(filled, ax=ax, label=label, shrink=0.9)
    ticks = MaxNLocator(8).tick_values(lo, hi)
    bar.set_ticks(ticks[(ticks >= lo) & (ticks <= hi)])
    fig.tight_layout()
    return _save(fig, path, dpi)


def plane_section(mesh, u, axis, value):
    """The P1 field ``u`` of a tetrahedral mesh on the plane ``x[axis] = value``, exactly.

    Each tetrahedron the plane cuts gives a triangle or a quadrilateral (two
    triangles) whose corners lie on its edges; ``u`` is interpolated linearly
    along those edges, so the section of a P1 field is itself P1 on the
    returned triangles.  A point of the mesh on the plane counts as above it,
    so a face lying in the plane is taken once (from the cell below it; on
    the mesh's lowest face, where no cell lies below, from the cell above)
    and corners that coincide are merged.

    Returns
    -------
    coords : ndarray, shape (k, 2)
        The corners in the plane's two other coordinates, in axis order.
    triangles : ndarray, shape (t, 3)
        Triangles of positive area (zero-area pieces, from cells that touch
        the plane in an edge or a point only, are dropped).
    values : ndarray, shape (k,)

    Raises
    ------
    InputError
        ``u`` does not have one finite value per point, or the plane misses
        the mesh.

    >>> from hatkernels.mesh import cuboid
    >>> m = cuboid(2, 2, 2)
    >>> xy, tri, v = plane_section(m, m.points[:, 0] + m.points[:, 2], 2, 0.3)
    >>> bool(np.allclose(v, xy[:, 0] + 0.3)), xy.min(axis=0).tolist(), xy.max(axis=0).tolist()
    (True, [0.0, 0.0], [1.0, 1.0])
    """
    u = _finite(u, "u")
    if mesh.dim != 3 or u.shape != (mesh.n_points,):
        raise InputError(f"plane_section needs a tetrahedral mesh and one value per point; got a "
                         f"{mesh.dim}-D mesh and u of shape {u.shape}")
    x = mesh.points
    cells = mesh.cells
    for below in (x[:, axis] < value, x[:, axis] <= value):  # the second: the lowest face
        n_below = below[cells].sum(axis=1)
        crossing = (n_below > 0) & (n_below < 4)
        if crossing.any():
            break
    else:
        raise InputError(f"the plane x[{axis}] = {value!r} does not cut the mesh")
    cut = cells[crossing].astype(np.int64)
    nb = n_below[crossing]
    cut = np.take_along_axis(cut, np.argsort(~below[cut], axis=1, kind="stable"), axis=1)
    # corners as (below point, above point) edges, in cyclic order round the piece
    pieces = []
    for count, edges in ((1, [(0, 1), (0, 2), (0, 3)]), (3, [(0, 3), (1, 3), (2, 3)]),
                         (2, [(0, 2), (0, 3), (1, 3), (1, 2)])):
        c = cut[nb == count]
        corners = np.stack([np.stack([c[:, a], c[:, b]], axis=1) for a, b in edges], axis=1)
        tri = [(0, 1, 2)] if count != 2 else [(0, 1, 2), (0, 2, 3)]
        pieces += [corners[:, list(t)] for t in tri]
    ends = np.concatenate(pieces).reshape(-1, 2)  # (3 t, 2): below and above point of a corner
    p, q = ends[:, 0], ends[:, 1]
    t = (value - x[p, axis]) / (x[q, axis] - x[p, axis])
    key = p * len(x) + q
    key[t == 1.0] = q[t == 1.0] * (len(x) + 1)  # a corner on a point of the mesh: that point
    key[t == 0.0] = p[t == 0.0] * (len(x) + 1)
    keys, first, corner = np.unique(key, return_index=True, return_inverse=True)
    p, q, t = p[first], q[first], t[first]
    other = [a for a in range(3) if a != axis]
    coords = x[p][:, other] + t[:, None] * (x[q][:, other] - x[p][:, other])
    values = u[p] + t * (u[q] - u[p])
    triangles = corner.reshape(-1, 3)
    e1 = coords[triangles[:, 1]] - coords[triangles[:, 0]]
    e2 = coords[triangles[:, 2]] - coords[triangles[:, 0]]
    area = np.abs(e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0])
    scale = float(np.ptp(coords, axis=0).prod()) or 1.0
    return coords, triangles[area > 1e-12 * scale], values


def section_figure(mesh, u, path, *, title="", label="u", length_scale=1.0, length_unit="",
                   boxes=(), levels=24, size=SIZE, dpi=DPI):
    """Two plane sections of a tetrahedral mesh's field through its largest value; write a PNG.

    Above: the horizontal plane ``z = z_max`` seen from above (x, y); below:
    the vertical plane ``y = y_max`` seen from the side (x, z); one colour
    scale.  ``boxes``: sequence of (name, (x0, x1, y0, y1, z0, z1)) outlined
    where each plane cuts them (in mesh coordinates).  Sections as in
    :func:`plane_section`.
    """
    u = _finite(u, "u")
    if u.shape != (mesh.n_points,):
        raise InputError(f"u has shape {u.shape}; expected ({mesh.n_points},)")
    fig = _figure(size, dpi)
    from matplotlib.patches import Rectangle
    from matplotlib.ticker import MaxNLocator
    from matplotlib.tri import Triangulation

    used = np.unique(mesh.cells)
    imax = used[np.argmax(u[used])]
    lo, hi = float(u[used].min()), float(u[used].max())
    if hi - lo <= 1e-12 * max(1.0, abs(hi)):
        lo, hi = lo - 0.5, hi + 0.5
    s = float(length_scale)
    spans = np.ptp(mesh.points, axis=0)
    grid = fig.add_gridspec(2, 1, height_ratios=[spans[1], max(spans[2], spans[1] / 6)],
                            hspace=0.55)
    unit = f" ({length_unit})" if length_unit else ""
    filled = None
    for row, axis in enumerate((2, 1)):
        ax = fig.add_subplot(grid[row])
        at = float(mesh.points[imax, axis])
        xy, tri, v = plane_section(mesh, u, axis, at)
        tri = Triangulation(xy[:, 0] * s, xy[:, 1] * s, tri)
        filled = ax.tricontourf(tri, v, levels=np.linspace(lo, hi, levels + 1), cmap="inferno")
        a, b = [k for k in range(3) if k != axis]
        for name, bounds in boxes:
            lo_ax, hi_ax = bounds[2 * axis], bounds[2 * axis + 1]
            if not lo_ax <= at <= hi_ax:
                continue
            x0, x1, y0, y1 = bounds[2 * a], bounds[2 * a + 1], bounds[2 * b], bounds[2 * b + 1]
            ax.add_patch(Rectangle((x0 * s, y0 * s), (x1 - x0) * s, (y1 - y0) * s, fill=False,
                                   edgecolor="cyan", linewidth=1.0, linestyle="--"))
            if axis == 2:
                ax.annotate(name, ((x0 + x1) / 2 * s, y1 * s), xytext=(0, 3), fontsize=8,
                            textcoords="offset points", ha="center", va="bottom", color="cyan")
        ax.plot(mesh.points[imax, a] * s, mesh.points[imax, b] * s, marker="+", color="cyan",
                markersize=8)
        ax.set_aspect("equal")
        ax.set_xlabel(f"{'xyz'[a]}{unit}")
        ax.set_ylabel(f"{'xyz'[b]}{unit}")
        ax.set_title(f"section {'xyz'[axis]} = {at * s:.4g}"
                     f"{' ' + length_unit if length_unit else ''}", fontsize=9)
    if title:
        fig.suptitle(title, fontsize=10)
    bar = fig.colorbar(filled, ax=fig.axes, label=label, shrink=0.9)
    ticks = MaxNLocator(8).tick_values(lo, hi)
    bar.set_ticks(ticks[(ticks >= lo) & (ticks <= hi)])
    return _save(fig, path, dpi)


def residuals_figure(residuals, path, *, rtol=None, title="", size=SIZE, dpi=DPI,
                     reference=None):
    """Semilog plot of a residual history (initial first), relative to ``reference``,
    the norm of b (default: the initial residual, which is that norm when CG starts
    from zero)."""
    r = _finite(residuals, "residuals")
    if r.ndim != 1 or r.size == 0:
        raise InputError(f"residuals must be a non-empty 1-D history, got shape {r.shape}")
    fig = _figure(size, dpi)
    ax = fig.add_subplot()
    ref = r[0] if reference is None or not reference > 0 else float(reference)
    rel = r / ref if ref > 0 else r
    ax.semilogy(np.arange(r.size), np.maximum(rel, np.finfo(float).tiny), marker="o",
                markersize=3, linewidth=1.0, label="||b - A x_k|| / ||b||")
    if rtol:
        ax.axhline(rtol, color="0.4", linestyle="--", linewidth=0.8, label=f"rtol = {rtol:g}")
    ax.set_xlabel("iteration k")
    ax.set_ylabel("relative residual")
    ax.grid(True, which="both", linewidth=0.3)
    ax.legend()
    if title:
        ax.set_title(title, fontsize=10)
    fig.tight_layout()
    return _save(fig, path, dpi)


def convergence_figure(h, errors, path, *, title="", size=SIZE, dpi=DPI):
    """Log-log plot of errors against the mesh size ``h``, with reference slopes 1 and 2.

    ``errors`` maps a name (``"L2"``, ``"H1"``) to one error per ``h``; the
    reference lines pass through the coarsest error of the first and last
    series.
    """
    h = _finite(h, "h")
    if h.ndim != 1 or h.size < 2:
        raise InputError(f"h needs at least two mesh sizes, got shape {h.shape}")
    fig = _figure(size, dpi)
    ax = fig.add_subplot()
    markers = "os^v"
    for k, (name, e) in enumerate(errors.items()):
        e = _finite(e, f"errors[{name!r}]")
        if e.shape != h.shape:
            raise InputError(f"errors[{name!r}] has shape {e.shape}; expected {h.shape}")
        ax.loglog(h, e, marker=markers[k % len(markers)], linewidth=1.2, label=f"{name} error")
    series = list(errors.values())
    for slope, anchor, style in ((2, series[0], ":"), (1, series[-1], "--")):
        anchor = np.asarray(anchor, dtype=float)
        ref = anchor[0] * (h / h[0]) ** slope * 1.6
        ax.loglog(h, ref, color="0.4", linestyle=style, linewidth=0.9,
                  label=f"slope {slope} (reference)")
    ax.set_xlabel("mesh size h (longest edge)")
    ax.set_ylabel("error")
    ax.grid(True, which="both", linewidth=0.3)
    ax.legend()
    if title:
        ax.set_title(title, fontsize=10)
    fig.tight_layout()
    return _save(fig, path, dpi)


def probes_figure(times, values, names, path, *, title="", label="u", time_unit="s",
                  size=SIZE, dpi=DPI):
    """Values at probes over time: one line per probe.

    ``times`` (n,), ``values`` (n, n_probes), ``names`` one per probe (the legend);
    ``label`` names the quantity on the vertical axis.
    """
    t = _finite(times, "times")
    v = _finite(values, "values")
    if t.ndim != 1 or t.size == 0 or v.ndim != 2 or v.shape[0] != t.size:
        raise InputError(f"values must have one row per time, shape ({t.size}, n_probes), "
                         f"got {v.shape}")
    if len(names) != v.shape[1]:
        raise InputError(f"{len(names)} names for {v.shape[1]} probes")
    fig = _figure(size, dpi)
    ax = fig.add_subplot()
    for k, name in enumerate(names):
        ax.plot(t, v[:, k], linewidth=1.2, label=str(name))
    ax.set_xlabel(f"time ({time_unit})" if time_unit else "time")
    ax.set_ylabel(label)
    ax.grid(True, linewidth=0.3)
    if len(names):
        ax.legend()
    if title:
        ax.set_title(title, fontsize=10)
    fig.tight_layout()
    return _save(fig, path, dpi)
