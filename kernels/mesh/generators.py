"""Mesh generators: rectangles, an L-shaped domain, a disk, and Delaunay of given points
(in the plane or, through :mod:`hatkernels.mesh.generators3d`, in space)."""

import warnings

import numpy as np
from scipy.spatial import Delaunay

from hatkernels.checks import integer_option, real_option
from hatkernels.errors import InputError, MeshWarning
from hatkernels.geometry import DEGENERATE_VOLUME_TOL
from hatkernels.mesh.core import Mesh
from hatkernels.mesh.core_index import index_dtype
from hatkernels.mesh.generators3d import tetrahedralise
from hatkernels.mesh.triangles import DEGENERATE_TOL, signed_double_areas
from hatkernels.mesh.triangles import check_points as _check_points

__all__ = ["rectangle", "l_shape", "disk", "triangulate", "SPLITS"]

#: How :func:`rectangle` cuts each grid cell: along the rising diagonal (lower
#: left to upper right), the falling one (lower right to upper left), the two
#: in a checkerboard, or into four triangles around a centre point.
SPLITS = ("rising", "falling", "checkerboard", "quartered")


def _bounds(bounds):
    try:
        x0, x1, y0, y1 = (float(b) for b in bounds)
    except (TypeError, ValueError):
        raise InputError(f"bounds must be four numbers (x0, x1, y0, y1), got {bounds!r}") from None
    if not all(np.isfinite([x0, x1, y0, y1])) or not (x0 < x1 and y0 < y1):
        raise InputError(f"bounds must satisfy x0 < x1 and y0 < y1 (finite), got {bounds!r}")
    return x0, x1, y0, y1


def _grid_triangles(nx, ny, split, dt):
    """Triangles of an (nx, ny) cell grid whose points are numbered row by row."""
    j, i = np.divmod(np.arange(nx * ny, dtype=np.int64), nx)
    a = j * (nx + 1) + i  # lower left
    b = a + 1  # lower right
    c = a + nx + 2  # upper right
    d = a + nx + 1  # upper left
    if split == "quartered":
        e = (nx + 1) * (ny + 1) + np.arange(nx * ny, dtype=np.int64)  # cell centres
        tri = np.stack([a, b, e, b, c, e, c, d, e, d, a, e], axis=1).reshape(-1, 3)
        return tri.astype(dt)
    rising = np.stack([a, b, c, a, c, d], axis=1)  # cut from lower left to upper right
    falling = np.stack([a, b, d, b, c, d], axis=1)  # cut from lower right to upper left
    if split == "rising":
        tri = rising
    elif split == "falling":
        tri = falling
    else:
        tri = np.where(((i + j) % 2 == 0)[:, None], rising, falling)
    return tri.reshape(-1, 3).astype(dt)


def rectangle(nx, ny=None, *, bounds=(0.0, 1.0, 0.0, 1.0), split="rising"):
    """Structured mesh of a rectangle with ``nx`` by ``ny`` cells.

    Points are numbered row by row (x fastest): point ``j * (nx + 1) + i`` sits
    at column ``i``, row ``j``.  Each cell is split into two triangles by a
    diagonal, or into four by its centre.

    Parameters
    ----------
    nx, ny : int
        Cells along x and y (``ny`` defaults to ``nx``).
    bounds : (x0, x1, y0, y1)
    split : {"rising", "falling", "checkerboard", "quartered"}
        How each cell is cut: ``"rising"``, along the diagonal from lower
        left to upper right; ``"falling"``, from lower right to upper left;
        ``"checkerboard"``, rising and falling alternately; ``"quartered"``,
        into four triangles around a point at the cell centre (numbered
        after the grid points).

    Examples
    --------
    >>> from hatkernels.mesh import rectangle
    >>> rectangle(2, 1)
    Mesh(6 points, 4 triangles)
    >>> rectangle(2, 1, split="quartered")
    Mesh(8 points, 8 triangles)
    """
    nx = integer_option(nx, "nx", minimum=1)
    ny = nx if ny is None else integer_option(ny, "ny", minimum=1)
    x0, x1, y0, y1 = _bounds(bounds)
    if split not in SPLITS:
        raise InputError(f"unknown split {split!r}; choose one of {SPLITS}")
    x = np.linspace(x0, x1, nx + 1)
    y = np.linspace(y0, y1, ny + 1)
    X, Y = np.meshgrid(x, y)
    points = np.column_stack([X.ravel(), Y.ravel()])
    if split == "quartered":
        cx = 0.5 * (x[:-1] + x[1:])
        cy = 0.5 * (y[:-1] + y[1:])
        CX, CY = np.meshgrid(cx, cy)
        points = np.vstack([points, np.column_stack([CX.ravel(), CY.ravel()])])
    tri = _grid_triangles(nx, ny, split, index_dtype(len(points)))
    return Mesh._trusted(points, tri)


def l_shape(n, *, split="rising"):
    """The L-shaped domain (-1, 1)^2 without the quadrant [0, 1] x [-1, 0].

    ``n`` cells per unit length, so ``3 n^2`` squares and ``6 n^2``
    triangles (twice that with ``split="quartered"``).  Its re-entrant corner at the
    origin makes solutions singular there (``r^(2/3)``).

    >>> from hatkernels.mesh import l_shape
    >>> m = l_shape(2)
    >>> m.n_triangles, float(m.areas().sum())
    (24, 3.0)
    """
    n = integer_option(n, "n", minimum=1)
    full = rectangle(2 * n, 2 * n, bounds=(-1.0, 1.0, -1.0, 1.0), split=split)
    cent = full.points[full.triangles].mean(axis=1)
    keep = ~((cent[:, 0] > 0) & (cent[:, 1] < 0))
    tri = full.triangles[keep]
    used = np.zeros(full.n_points, dtype=bool)
    used[tri.ravel()] = True
    new = np.cumsum(used) - 1
    points = full.points[used]
    return Mesh._trusted(points, new[tri].astype(index_dtype(len(points))))


def disk(n, *, radius=1.0, center=(0.0, 0.0)):
    """Disk of ``n`` concentric rings; the outer ring's points lie on the circle.

    Ring ``k`` (``k = 1..n``) has ``6k`` equally spaced points at radius
    ``radius * k / n``; neighbouring rings are joined in six sectors, giving
    ``3n(n+1) + 1`` points and ``6 n^2`` triangles with angles near 60 degrees.
    The mesh covers the inscribed polygon, whose area approaches
    ``pi r^2`` as ``1 - O(n^-2)``.

    >>> from hatkernels.mesh import disk
    >>> m = disk(3)
    >>> m.n_points, m.n_triangles
    (37, 54)
    """
    n = integer_option(n, "n", minimum=1)
    radius = real_option(radius, "radius", positive=True)
    try:
        cx, cy = (real_option(c, "center") for c in center)
    except (TypeError, ValueError):
        raise InputError(f"center must be a pair of finite numbers, got {center!r}") from None
    pts = [np.array([[cx, cy]])]
    tris = []
    for k in range(1, n + 1):
        theta = 2 * np.pi * np.arange(6 * k) / (6 * k)
        r = radius * k / n
        pts.append(np.column_stack([cx + r * np.cos(theta), cy + r * np.sin(theta)]))
        off_out = 1 + 3 * k * (k - 1)
        off_in = 1 + 3 * (k - 1) * (k - 2) if k > 1 else 0
        n_in = 6 * (k - 1)
        for s in range(6):
            m = np.arange(k + 1)
            out = off_out + (s * k + m) % (6 * k)
            if k == 1:
                inner = np.zeros(k, dtype=np.int64)
            else:
                inner = off_in + (s * (k - 1) + np.arange(k)) % n_in
            up = np.column_stack([out[:-1], out[1:], inner])
            tris.append(up)
            if k > 1:
                tris.append(np.column_stack([inner[:-1], out[1:-1], inner[1:]]))
    points = np.vstack(pts)
    return Mesh._trusted(points, np.vstack(tris).astype(index_dtype(len(points))))


def triangulate(points, *, inside=None, degenerate_tol=None):
    """Delaunay triangulation of given points (scipy.spatial.Delaunay), validated:
    triangles in the plane, tetrahedra in space.

    Parameters
    ----------
    points : array_like, shape (n_points, 2) or (n_points, 3)
    inside : callable, optional
        ``inside(x, y) -> bool array`` (``inside(x, y, z)`` in space),
        evaluated at cell centroids; the cells where it is False are dropped
        (to cut holes or re-entrant corners out of the convex hull).
    degenerate_tol : float, optional
        Flat triangles that Qhull creates on collinear hull points (relative
        area below this, :data:`DEGENERATE_TOL` by default) are dropped with a
        :class:`MeshWarning`: they cover no area, so the domain does not
        change.  In space, tetrahedra with ``6 |V| / L**3`` below it
        (``DEGENERATE_VOLUME_TOL`` by default; Qhull makes them on cospherical
        points, a grid say) are dropped with a warning when they lie on the
        hull, and refused with a :class:`MeshError` when dropping them would
        leave the mesh non-conforming (a flat tetrahedron inside the hull); see
        :func:`hatkernels.mesh.generators3d.tetrahedralise`.

    The result goes through every check of :class:`Mesh`; points that end up
    in no triangle (duplicates, or outside ``inside``) are reported.

    >>> import numpy as np
    >>> from hatkernels.mesh import triangulate
    >>> m = triangulate([[0, 0], [1, 0], [0, 1], [1, 1], [0.5, 0.4]])
    >>> m.n_triangles
    4
    """
    p = _check_points(points)
    if p.shape[1] == 3:
        tol = DEGENERATE_VOLUME_TOL if degenerate_tol is None else degenerate_tol
        cells = tetrahedralise(p, tol)
        if inside is not None:
            c = p[cells].mean(axis=1)
            keep = np.asarray(inside(c[:, 0], c[:, 1], c[:, 2]), dtype=bool)
            if keep.shape != (len(cells),):
                raise InputError(
                    f"inside(x, y, z) returned shape {keep.shape} for {len(cells)} centroids")
            cells = cells[keep]
        return Mesh(p, cells, degenerate_tol=tol)
    degenerate_tol = DEGENERATE_TOL if degenerate_tol is None else degenerate_tol
    if len(p) < 3:
        raise InputError(f"need at least 3 points to triangulate, got {len(p)}")
    try:
        tri = Delaunay(p).simplices
    except Exception as exc:  # Qhull errors for all-collinear input and the like
        raise InputError(
            f"the points cannot be triangulated: {str(exc).splitlines()[0]}"
        ) from None
    d2a = signed_double_areas(p, tri)
    p0, p1, p2 = (p[tri[:, k]] for k in range(3))
    longest = np.maximum.reduce(
        [((p1 - p0) ** 2).sum(1), ((p2 - p1) ** 2).sum(1), ((p0 - p2) ** 2).sum(1)]
    )
    flat = ~(np.abs(d2a) > degenerate_tol * longest)
    if flat.any():
        warnings.warn(
            f"dropped {int(flat.sum())} flat triangles that Delaunay made on collinear points",
            MeshWarning,
            stacklevel=2,
        )
        tri, d2a = tri[~flat], d2a[~flat]
    cw = d2a < 0
    tri = tri.copy()
    tri[cw, 1], tri[cw, 2] = tri[cw, 2], tri[cw, 1].copy()
    if inside is not None:
        c = p[tri].mean(axis=1)
        keep = np.asarray(inside(c[:, 0], c[:, 1]), dtype=bool)
        if keep.shape != (len(tri),):
            raise InputError(f"inside(x, y) returned shape {keep.shape} for {len(tri)} centroids")
        tri = tri[keep]
    return Mesh(p, tri, degenerate_tol=degenerate_tol)
