"""Checks of triangle meshes (and of the point and cell arrays of any mesh).

Split from :mod:`hatkernels.mesh.core`, which uses them once per new mesh;
:mod:`hatkernels.mesh.tetrahedra` holds the checks of tetrahedra.
"""

import warnings

import numpy as np

from hatkernels._jit import topology as _topo
from hatkernels.errors import MeshError, MeshWarning
from hatkernels.mesh.core_index import index_dtype

__all__ = ["DEGENERATE_TOL", "CELL_WORDS", "check_points", "check_cells", "signed_double_areas",
           "longest_edge_sq", "scaled_areas", "reoriented_triangles"]

#: A triangle is degenerate when twice its area is at most this fraction of
#: its longest edge squared (that ratio is about the smallest altitude over
#: the longest edge).  Round-off in the area of a flat triangle with
#: coordinates of order one is near 1e-16, so 1e-12 flags collinear points
#: while accepting anisotropic triangles up to aspect ratios near 1e12.
DEGENERATE_TOL = 1e-12

def check_points(points):
    """``points`` as a new C-contiguous float64 array of shape (n, 2) or (n, 3), all finite."""
    try:
        p = np.asarray(points)
    except Exception as exc:  # ragged lists and the like
        raise MeshError(f"points cannot be read as an array: {exc}") from None
    if p.ndim != 2 or p.shape[1] not in (2, 3):
        raise MeshError(f"points must have shape (n_points, 2), got shape {p.shape} "
                        f"(or (n_points, 3) for tetrahedra)")
    if p.shape[0] == 0:
        raise MeshError("points is empty")
    if p.dtype.kind not in "fiu" or p.dtype == np.float16:
        raise MeshError(
            f"points must be a real floating-point array (float64), got dtype {p.dtype}"
        )
    p = np.array(p, dtype=np.float64, order="C", copy=True)
    finite = np.isfinite(p).all(axis=1)
    if not finite.all():
        bad = np.flatnonzero(~finite)
        xyz = ", ".join(repr(float(v)) for v in p[bad[0]])
        raise MeshError(
            f"point {bad[0]} has a non-finite coordinate ({xyz})"
            + (f"; {bad.size} points in all" if bad.size > 1 else "")
        )
    return p


#: The words for the cells of each dimension: (plural, singular).
CELL_WORDS = {2: ("triangles", "triangle"), 3: ("tetrahedra", "tetrahedron")}


def check_cells(cells, n_points, dim=2):
    """``cells`` as a new int32 (int64 beyond) array of shape (m, dim + 1): indices in
    range, no repeated vertex; the errors name the first offending cell."""
    words, word = CELL_WORDS[dim]
    k = dim + 1
    try:
        t = np.asarray(cells)
    except Exception as exc:
        raise MeshError(f"{words} cannot be read as an array: {exc}") from None
    if t.ndim != 2 or t.shape[1] != k:
        raise MeshError(f"{words} must have shape (n_{words}, {k}), got shape {t.shape}"
                        + (" (points in space make tetrahedra)" if dim == 3 else ""))
    if t.shape[0] == 0:
        raise MeshError(f"{words} is empty")
    if t.dtype.kind not in "iu":
        raise MeshError(
            f"{words} must be an integer array of point indices, got dtype {t.dtype}"
        )
    lo = t.min(axis=1)
    if lo.min() < 0:
        c = int(np.flatnonzero(lo < 0)[0])
        raise MeshError(f"{word} {c} has a negative point index {t[c].tolist()}")
    hi = t.max(axis=1)
    if hi.max() >= n_points:
        c = int(np.flatnonzero(hi >= n_points)[0])
        raise MeshError(
            f"{word} {c} refers to point {int(hi[c])}, but there are only {n_points} "
            f"points (valid indices 0..{n_points - 1})"
        )
    t = np.array(t, dtype=index_dtype(n_points), order="C", copy=True)
    s = np.sort(t, axis=1)
    same = (s[:, 1:] == s[:, :-1]).any(axis=1)
    if same.any():
        bad = np.flatnonzero(same)
        raise MeshError(
            f"{word} {bad[0]} repeats a vertex {t[bad[0]].tolist()}"
            + (f"; {bad.size} {words} in all" if bad.size > 1 else "")
        )
    return t


def signed_double_areas(points, triangles):
    """Twice the signed area of each triangle (positive when counterclockwise)."""
    p0 = points[triangles[:, 0]]
    d1 = points[triangles[:, 1]] - p0
    d2 = points[triangles[:, 2]] - p0
    return d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0]


def longest_edge_sq(points, triangles):
    p0, p1, p2 = (points[triangles[:, k]] for k in range(3))
    return np.maximum(
        np.maximum(((p1 - p0) ** 2).sum(axis=1), ((p2 - p1) ** 2).sum(axis=1)),
        ((p0 - p2) ** 2).sum(axis=1),
    )


def scaled_areas(points, triangles, degenerate_tol):
    """Twice the signed areas and ``|2 area| / longest side**2``; coordinates whose areas
    float64 cannot represent are refused first, not called flat.  For triangles of size
    ``h`` twice the area is near ``h**2`` and the squared hat gradients near ``h**-2``:
    beyond about 1e154 and 1e-154 they overflow or underflow (into subnormals, with fewer
    bits, down to zero, so that a flat triangle cannot be told from a thin one)."""
    tiny = np.finfo(np.float64).tiny
    p0, p1, p2 = (points[triangles[:, k]] for k in range(3))
    with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
        d2a = signed_double_areas(points, triangles)
        e2 = longest_edge_sq(points, triangles)
        rel = np.abs(d2a) / e2
        span = np.maximum(np.abs(p1 - p0).max(axis=1), np.abs(p2 - p0).max(axis=1))
        grad_sq = (e2 / np.abs(d2a)) / np.abs(d2a)
    large = ~np.isfinite(d2a) | ~np.isfinite(e2)
    thin = rel > degenerate_tol
    blind = span < np.sqrt(tiny / max(degenerate_tol, np.finfo(np.float64).eps))
    small = ~large & (span > 0) & (((np.abs(d2a) < tiny) & (thin | blind))
                                   | (thin & ~np.isfinite(grad_sq)))
    for bad, word, hint in ((large, "large", "down"), (small, "small", "up")):
        if bad.any():
            idx = np.flatnonzero(bad)
            k = int(idx[0])
            raise MeshError(
                f"triangle {k} (points {', '.join(map(str, triangles[k].tolist()))}): coordinates"
                f" too {word} to represent areas in float64 (side extent {float(span[k]):.3g}, "
                f"twice the area {float(d2a[k]):.3g}; usable from about 1e-307 to 1e307); scale "
                f"the coordinates {hint} (another unit of length)"
                + (f"; {idx.size} triangles in all" if idx.size > 1 else ""))
    return d2a, rel


def reoriented_triangles(p, t, degenerate_tol, stacklevel):
    """Refuse flat triangles, make clockwise ones counterclockwise in ``t`` (a copy the
    caller owns), warning at ``stacklevel`` (of the caller)."""
    d2a, rel = scaled_areas(p, t, degenerate_tol)
    flat = np.flatnonzero(~(rel > degenerate_tol))
    if flat.size:
        k = int(flat[0])
        i, j, l = t[k].tolist()
        kind = "zero area" if d2a[k] == 0 else f"near-zero area (relative {rel[k]:.1e})"
        same = [(u, v) for u, v in ((i, j), (j, l), (i, l)) if (p[u] == p[v]).all()]
        why = (f"points {same[0][0]} and {same[0][1]} coincide at {tuple(p[same[0][0]].tolist())}"
               if same else f"points {i}, {j}, {l} are collinear")
        raise MeshError(f"triangle {k} has {kind} ({why})"
                        + (f"; {flat.size} triangles in all" if flat.size > 1 else ""))
    clockwise = d2a < 0
    n_cw = int(clockwise.sum())
    if n_cw:
        t[clockwise, 1], t[clockwise, 2] = t[clockwise, 2], t[clockwise, 1].copy()
        warnings.warn(
            f"{n_cw} of {t.shape[0]} triangles were clockwise and have been reoriented "
            f"(first: triangle {int(np.flatnonzero(clockwise)[0])})",
            MeshWarning,
            stacklevel=stacklevel + 1,
        )
    return t


def check_edge_sharing(mesh):
    """MeshError naming two triangles that duplicate or overlap each other, if any."""
    ptr, codes = mesh._incidence()
    first, second = _topo.directed_edge_check(mesh._triangles_for_topology(), ptr, codes)
    hit = np.flatnonzero(first >= 0)
    if hit.size == 0:
        return
    i = int(hit[0])
    t1, t2 = int(first[i]), int(second[i])
    tri = mesh.cells
    if set(tri[t1].tolist()) == set(tri[t2].tolist()):
        raise MeshError(
            f"triangles {t1} and {t2} are duplicates (points {sorted(tri[t1].tolist())})"
        )
    row = tri[t1].tolist()
    j = row[(row.index(i) + 1) % 3]
    raise MeshError(
        f"triangles {t1} and {t2} both lie on the left of edge ({i} -> {j}): they overlap, "
        f"or the edge is shared by more than two triangles"
    )
