"""Element geometry: measures and gradients of the P1 (barycentric) basis functions,
on triangles (points (N, 2), cells (M, 3)) and on tetrahedra (points (N, 3), cells (M, 4))."""

import numpy as np

from hatkernels._jit import geometry as _jit_geometry
from hatkernels.errors import InputError, MeshError

__all__ = ["element_gradients", "DEGENERATE_VOLUME_TOL"]

#: A tetrahedron is degenerate when six times its volume is at most this
#: fraction of its longest edge cubed (``6 |V| / L**3``: 0.71 for the regular
#: tetrahedron, about the smallest height over ``L`` times the thinness of a
#: face).  The same value as the triangle mesh's ``DEGENERATE_TOL`` and for the
#: same reason: the round-off in ``6 |V|`` of four coplanar points with
#: coordinates of order ``L`` is a few 1e-16 ``L**3``, so 1e-12 flags coplanar
#: points with a margin of four digits while accepting tetrahedra flat up to
#: aspect ratios near 1e12.
DEGENERATE_VOLUME_TOL = 1e-12

_SHAPES = {2: 3, 3: 4}  # point dimension -> vertices per cell


def _arrays(points, cells):
    try:
        p = np.asarray(points)
        t = np.asarray(cells)
    except Exception as exc:  # ragged lists and the like
        raise InputError(f"points and cells cannot be read as arrays: {exc}") from None
    if p.ndim != 2 or p.shape[1] not in _SHAPES or p.dtype.kind != "f":
        raise InputError(
            f"points must be a float array of shape (n, 2) or (n, 3), got {p.dtype} {p.shape}"
        )
    k = _SHAPES[p.shape[1]]
    word = "triangles" if k == 3 else "tetrahedra"
    if t.ndim != 2 or t.shape[1] != k or t.dtype.kind not in "iu":
        raise InputError(
            f"{word} must be an integer array of shape (m, {k}) for points of shape "
            f"(n, {p.shape[1]}), got {t.dtype} {t.shape}"
        )
    if t.size and (t.min() < 0 or t.max() >= len(p)):
        bad = int(np.flatnonzero((t < 0).any(axis=1) | (t >= len(p)).any(axis=1))[0])
        raise InputError(
            f"{word[:-1] if k == 3 else 'tetrahedron'} {bad} refers to a point outside "
            f"0..{len(p) - 1}: {t[bad].tolist()}"
        )
    return np.ascontiguousarray(p, dtype=np.float64), np.ascontiguousarray(t)


def _check_areas(areas, p, t):
    """Refuse what would give infinite or NaN gradients, naming the triangle.

    Checked on the result (one pass over ``areas``) rather than before the
    kernel: a zero or non-finite area is exactly what spoils the gradients,
    and the kernel itself is harmless on any float input.
    """
    tiny = np.finfo(np.float64).tiny  # below it areas are subnormal: digits already lost
    if np.isfinite(areas).all() and (np.abs(areas) >= tiny).all():
        return
    bad = ~np.isfinite(areas) | (np.abs(areas) < tiny)
    k = int(np.flatnonzero(bad)[0])
    tri = t[k].tolist()
    more = f"; {int(bad.sum())} triangles in all" if bad.sum() > 1 else ""
    nonfinite = [i for i in tri if not np.isfinite(p[i]).all()]
    if nonfinite:
        i = nonfinite[0]
        raise MeshError(
            f"triangle {k} has point {i} with a non-finite coordinate "
            f"({float(p[i, 0])!r}, {float(p[i, 1])!r}){more}"
        )
    if not np.isfinite(areas[k]):
        raise MeshError(f"triangle {k} (points {tri}) has an area that overflows{more}")
    if areas[k] != 0:
        raise MeshError(
            f"triangle {k} (points {tri}): coordinates too small to represent areas in "
            f"float64 (area {float(areas[k]):.3g}); scale the coordinates up{more}")
    raise MeshError(
        f"triangle {k} has zero area (points {tri[0]}, {tri[1]}, {tri[2]} are collinear){more}"
    )


def _check_volumes(volumes, grads, longest, p, t):
    """Refuse tetrahedra whose volume or gradients cannot be trusted, naming the first.

    Judged on the kernel's results (one vectorised pass): ``6 |V| / L**3`` against
    :data:`DEGENERATE_VOLUME_TOL`, and the representability of ``L**3``, of the
    volume and of the gradients in float64 (edges beyond about 1e-102 .. 1e102
    cannot be judged: ``L**3`` underflows or overflows).
    """
    tiny = np.finfo(np.float64).tiny
    with np.errstate(all="ignore"):
        cube = longest * np.sqrt(longest)
        rel = 6.0 * volumes / cube
        ok = (
            np.isfinite(cube) & (cube >= tiny) & (rel > DEGENERATE_VOLUME_TOL)
            & (volumes >= tiny) & np.isfinite(volumes) & np.isfinite(grads).all(axis=(1, 2))
        )
    if ok.all():
        return
    bad = np.flatnonzero(~ok)
    k = int(bad[0])
    cell = t[k].tolist()
    names = ", ".join(map(str, cell))
    more = f"; {bad.size} tetrahedra in all" if bad.size > 1 else ""
    nonfinite = [i for i in cell if not np.isfinite(p[i]).all()]
    if nonfinite:
        i = nonfinite[0]
        xyz = ", ".join(repr(float(v)) for v in p[i])
        raise MeshError(f"tetrahedron {k} has point {i} with a non-finite coordinate ({xyz}){more}")
    if len(set(cell)) < 4:
        raise MeshError(f"tetrahedron {k} repeats a vertex {cell}: zero volume{more}")
    if longest[k] == 0:
        raise MeshError(f"tetrahedron {k} has zero volume (points {names} coincide){more}")
    scale = (
        f"tetrahedron {k} (points {names}): coordinates too {{}} to represent volumes and "
        f"gradients in float64 (longest edge {float(np.sqrt(longest[k])):.3g}, volume "
        f"{float(volumes[k]):.3g}; edges usable from about 1e-100 to 1e100); scale the "
        f"coordinates {{}} (another unit of length){more}"
    )
    if not (np.isfinite(cube[k]) and np.isfinite(volumes[k])):
        raise MeshError(scale.format("large", "down"))
    if cube[k] < tiny:
        raise MeshError(scale.format("small", "up"))
    if volumes[k] == 0:
        raise MeshError(f"tetrahedron {k} has zero volume (points {names} are coplanar){more}")
    if not rel[k] > DEGENERATE_VOLUME_TOL:
        raise MeshError(
            f"tetrahedron {k} has near-zero volume (points {names} are nearly coplanar: "
            f"6 |V| / (longest edge)**3 = {float(rel[k]):.3g}, at most DEGENERATE_VOLUME_TOL"
            f" = {DEGENERATE_VOLUME_TOL:g}){more}"
        )
    raise MeshError(scale.format("small", "up"))


def _tetrahedra_plain(p, t):
    """The kernel's formulas vectorised, operation for operation (same bits)."""
    x0, x1, x2, x3 = (p[t[:, k]] for k in range(4))
    a, b, c = x1 - x0, x2 - x0, x3 - x0
    ax, ay, az = a.T
    bx, by, bz = b.T
    cx, cy, cz = c.T
    g = np.empty((len(t), 4, 3))
    g[:, 1] = np.column_stack([by * cz - bz * cy, bz * cx - bx * cz, bx * cy - by * cx])
    g[:, 2] = np.column_stack([cy * az - cz * ay, cz * ax - cx * az, cx * ay - cy * ax])
    g[:, 3] = np.column_stack([ay * bz - az * by, az * bx - ax * bz, ax * by - ay * bx])
    det = ax * g[:, 1, 0] + ay * g[:, 1, 1] + az * g[:, 1, 2]
    volumes = np.abs(det) / 6.0
    g[:, 1:] /= det[:, None, None]
    g[:, 0] = -((g[:, 1] + g[:, 2]) + g[:, 3])

    def sq(u, v, w):
        return u * u + v * v + w * w

    longest = sq(ax, ay, az)
    for e in (
        sq(bx, by, bz), sq(cx, cy, cz), sq(bx - ax, by - ay, bz - az),
        sq(cx - ax, cy - ay, cz - az), sq(cx - bx, cy - by, cz - bz),
    ):
        longest = np.maximum(longest, e)
    return volumes, g, longest


def element_gradients(points, cells, *, plain=False):
    """Measures and gradients of the barycentric coordinates of each cell.

    Triangles in the plane or tetrahedra in space, told apart by the shape of
    ``points``.

    Parameters
    ----------
    points : array_like, shape (n_points, 2) or (n_points, 3)
        Float coordinates.
    cells : array_like, shape (n_cells, 3) or (n_cells, 4)
        Point indices: triangles for 2-D points, tetrahedra for 3-D points.
        Triangles are taken counterclockwise (as stored by
        :class:`hatkernels.Mesh`); for clockwise ones the area comes out
        negative.  Tetrahedra may have either orientation: the volume returned
        is the absolute one, and the gradients are the same either way (the
        barycentric coordinates do not depend on the order of the vertices
        beyond which coordinate belongs to which vertex).
    plain : bool
        Use the vectorised NumPy version instead of the numba kernel (they
        agree to round-off for triangles and to the bit for tetrahedra; the
        kernel avoids the temporaries).

    Returns
    -------
    measures : ndarray, shape (n_cells,)
        Areas of the triangles or (positive) volumes of the tetrahedra.
    gradients : ndarray, shape (n_cells, 3, 2) or (n_cells, 4, 3)
        ``gradients[t, a]`` is the (constant) gradient of the hat function of
        vertex ``a`` on cell ``t``; they sum to zero over ``a``.

    Raises
    ------
    InputError
        Wrong shapes or dtypes, a point index out of range (naming the cell).
    MeshError
        Naming the cell and its points: a triangle with zero area; a
        tetrahedron with a repeated vertex, zero or near-zero volume
        (``6 |V| / L**3 <= DEGENERATE_VOLUME_TOL``, ``L`` its longest edge) or
        coordinates too large or too small for float64 to represent its
        volume and gradients; a cell with a non-finite coordinate.
        (:class:`hatkernels.Mesh` refuses near-zero areas too; this check of
        triangles on raw arrays refuses exact zeros.)

    Examples
    --------
    >>> from hatkernels import element_gradients
    >>> area, g = element_gradients([[0., 0.], [1., 0.], [0., 1.]], [[0, 1, 2]])
    >>> area
    array([0.5])
    >>> g[0]
    array([[-1., -1.],
           [ 1.,  0.],
           [ 0.,  1.]])
    >>> vol, g = element_gradients(
    ...     [[0., 0., 0.], [1., 0., 0.], [0., 1., 0.], [0., 0., 1.]], [[0, 1, 2, 3]])
    >>> vol * 6
    array([1.])
    >>> g[0]
    array([[-1., -1., -1.],
           [ 1.,  0.,  0.],
           [ 0.,  1.,  0.],
           [ 0.,  0.,  1.]])
    """
    p, t = _arrays(points, cells)
    if p.shape[1] == 3:
        if plain:
            with np.errstate(all="ignore"):  # judged just below, on the results
                volumes, grads, longest = _tetrahedra_plain(p, t)
        else:
            volumes, grads, longest = _jit_geometry.tetrahedron_gradients(p, t)
        _check_volumes(volumes, grads, longest, p, t)
        return volumes, grads
    if not plain:
        areas, grads = _jit_geometry.element_gradients(p, t)
        _check_areas(areas, p, t)
        return areas, grads
    x = p[t]  # (M, 3, 2)
    e = np.roll(x, 1, axis=1) - np.roll(x, -1, axis=1)  # e[:, a] = x[a-1] - x[a+1]
    d = (x[:, 1, 0] - x[:, 0, 0]) * (x[:, 2, 1] - x[:, 0, 1]) - (x[:, 2, 0] - x[:, 0, 0]) * (
        x[:, 1, 1] - x[:, 0, 1]
    )
    areas = 0.5 * d
    _check_areas(areas, p, t)  # before dividing by d
    grads = np.empty_like(e)
    # the opposite edge x[a+2] - x[a+1] turned a quarter counterclockwise: (ex, ey) -> (-ey, ex)
    grads[..., 0] = -e[..., 1] / d[:, None]
    grads[..., 1] = e[..., 0] / d[:, None]
    return areas, grads
