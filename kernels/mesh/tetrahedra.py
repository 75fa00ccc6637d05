"""Tetrahedral meshes: the checks of a new mesh and its face topology.

Faces are found by their *keys*, the sorted point triples: sorting the
``4 n_cells`` keys brings the faces a conforming mesh shares into pairs.
Orientation tells overlap from neighbourhood without geometry: each face is
listed as its cell sees it from outside (:data:`OUTWARD`), and two cells on
opposite sides of a shared face list it with opposite orientations, so with
opposite parities of the permutation that sorts it.  Two cells listing it
with the same parity lie on the same side: they overlap.  (Like the edge
check of triangles this finds overlaps through a shared face; cells that
cross without sharing a face are not looked for.)

Everything is vectorised NumPy on arrays of shape (4 n_cells, 3) or less;
the signed volumes come from the kernel the geometry layer uses
(:func:`hatkernels._jit.geometry.six_signed_volumes`).
"""

import warnings

import numpy as np

from hatkernels._jit import geometry as _jit_geometry
from hatkernels.errors import MeshError, MeshWarning

__all__ = ["OUTWARD", "reoriented", "check_faces", "face_topology", "six_volumes",
           "longest_edge_sq"]

#: Local vertices of the face opposite vertex 0, 1, 2, 3, in the order that
#: makes its right-hand normal point out of a positively oriented cell (one
#: with ``det(x1 - x0, x2 - x0, x3 - x0) > 0``).
OUTWARD = np.array([[1, 2, 3], [0, 3, 2], [0, 1, 3], [0, 2, 1]])

_PAIRS = ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))


def six_volumes(points, cells):
    """Six times the signed volume of each tetrahedron, shape (n_cells,)."""
    out = np.empty(cells.shape[0])
    _jit_geometry.six_signed_volumes(points, cells, out)
    return out


def longest_edge_sq(points, cells):
    """The squared length of the longest of the six edges of each tetrahedron."""
    x = [points[cells[:, k]] for k in range(4)]
    return np.maximum.reduce([((x[a] - x[b]) ** 2).sum(axis=1) for a, b in _PAIRS])


def _scale_error(k, cell, longest, det, word, hint, count):
    names = ", ".join(map(str, cell))
    return MeshError(
        f"tetrahedron {k} (points {names}): coordinates too {word} to represent volumes in "
        f"float64 (longest edge {float(np.sqrt(longest)):.3g}, six times the volume "
        f"{float(det):.3g}; edges usable from about 1e-100 to 1e100); scale the coordinates "
        f"{hint} (another unit of length)" + (f"; {count} tetrahedra in all" if count > 1 else ""))


def reoriented(points, cells, degenerate_tol, stacklevel):
    """Refuse flat tetrahedra, reorient negative ones in ``cells`` (a copy the caller owns).

    ``6 |V| / L**3`` (``L`` the longest edge) at most ``degenerate_tol`` is a
    (near) zero volume: the measure and tolerance of
    :func:`hatkernels.element_gradients`.  Edges whose cube float64 cannot
    hold are refused as a matter of scale before they could be called flat.
    """
    det = six_volumes(points, cells)
    e2 = longest_edge_sq(points, cells)
    tiny = np.finfo(np.float64).tiny
    with np.errstate(all="ignore"):
        cube = e2 * np.sqrt(e2)
        rel = np.abs(det) / cube
    for bad, word, hint in ((~np.isfinite(cube) | ~np.isfinite(det), "large", "down"),
                            (((cube < tiny) & (e2 > 0)) | ((det != 0) & (np.abs(det) < tiny)), "small", "up")):
        if bad.any():
            idx = np.flatnonzero(bad)
            k = int(idx[0])
            raise _scale_error(k, cells[k].tolist(), e2[k], det[k], word, hint, idx.size)
    flat = np.flatnonzero(~(rel > degenerate_tol))
    if flat.size:
        k = int(flat[0])
        cell = cells[k].tolist()
        x = points[cells[k]]
        same = [(cell[a], cell[b]) for a, b in _PAIRS if (x[a] == x[b]).all()]
        if same:
            i, j = same[0]
            why = f"points {i} and {j} coincide at {tuple(points[i].tolist())}"
        else:
            why = f"points {', '.join(map(str, cell))} are coplanar"
        kind = ("zero volume" if det[k] == 0 else
                f"near-zero volume (6 |V| / (longest edge)**3 = {float(rel[k]):.1e}, at most "
                f"{degenerate_tol:g}; nearly coplanar)")
        raise MeshError(f"tetrahedron {k} has {kind} ({why})"
                        + (f"; {flat.size} tetrahedra in all" if flat.size > 1 else ""))
    negative = det < 0
    n_neg = int(negative.sum())
    if n_neg:
        cells[negative, 2], cells[negative, 3] = cells[negative, 3], cells[negative, 2].copy()
        warnings.warn(
            f"{n_neg} of {cells.shape[0]} tetrahedra were negatively oriented and have been "
            f"reoriented (first: tetrahedron {int(np.flatnonzero(negative)[0])})",
            MeshWarning,
            stacklevel=stacklevel + 1,
        )
    return cells


def _faces(cells):
    """Outward faces (4 n_cells, 3) in cell order (face ``4 c + a`` is opposite vertex
    ``a`` of cell ``c``), their sorted keys, the order that sorts the keys, and
    ``same`` (4 n_cells - 1,): whether sorted key ``i`` equals key ``i + 1``."""
    outward = cells[:, OUTWARD].reshape(-1, 3)
    keys = np.sort(outward, axis=1)
    n = int(cells.max()) + 1
    if n < 2**21:  # n**3 fits in int64: one argsort of packed keys, 1-D comparisons
        packed = (keys[:, 0].astype(np.int64) * n + keys[:, 1]) * n + keys[:, 2]
        order = np.argsort(packed, kind="stable")
        sorted_packed = packed[order]
        same = sorted_packed[1:] == sorted_packed[:-1]
    else:
        order = np.lexsort((keys[:, 2], keys[:, 1], keys[:, 0]))
        k = keys[order]
        same = (k[1:] == k[:-1]).all(axis=1)
    return outward, keys, order, same


def _parity(triples):
    """Parity (0 or 1) of the permutation that sorts each row of a (n, 3) array."""
    a, b, c = triples[:, 0], triples[:, 1], triples[:, 2]
    return ((a > b).astype(np.int8) + (a > c) + (b > c)) % 2


def smallest_first(triples):
    """Each row rotated (orientation kept) so that its smallest point comes first: a copy."""
    t = np.asarray(triples)
    shift = np.argmin(t, axis=1)
    cols = (shift[:, None] + np.arange(3)[None, :]) % 3
    return np.take_along_axis(t, cols, axis=1)


def face_topology(cells):
    """``(faces, cell_faces, boundary)`` of a valid mesh.

    faces : (n_faces, 3), the sorted keys, sorted; cell_faces : (n_cells, 4),
    the face opposite each local vertex; boundary : (n_boundary_faces, 3), the
    faces of one cell, outward, smallest point first, in the order of their keys.
    """
    outward, keys, order, same = _faces(cells)
    new = np.empty(len(order), dtype=bool)
    new[0] = True
    new[1:] = ~same
    number = np.cumsum(new) - 1
    dt = cells.dtype
    cell_faces = np.empty(len(order), dtype=dt)
    cell_faces[order] = number
    starts = np.flatnonzero(new)
    faces = keys[order[starts]].astype(dt)
    count = np.diff(np.append(starts, len(order)))
    boundary = smallest_first(outward[order[starts[count == 1]]].astype(dt))
    return faces, cell_faces.reshape(-1, 4), boundary


def check_faces(cells):
    """Refuse duplicate cells, faces shared by three cells or more and two cells on
    the same side of a shared face, naming the cells and the face."""
    outward, keys, order, same = _faces(cells)
    triple = np.flatnonzero(same[1:] & same[:-1])
    pair = np.flatnonzero(same)
    parity = _parity(outward[order[pair]])
    clash = pair[parity == _parity(outward[order[pair + 1]])]
    if triple.size == 0 and clash.size == 0:
        return
    cell_of = order // 4
    # duplicates first: the same four points share all four faces (each a clash)
    cs = np.sort(cells, axis=1)
    corder = np.lexsort(cs.T[::-1])
    dup = np.flatnonzero((cs[corder[1:]] == cs[corder[:-1]]).all(axis=1))
    if dup.size:
        a, b = sorted((int(corder[dup[0]]), int(corder[dup[0] + 1])))
        raise MeshError(f"tetrahedra {a} and {b} are duplicates (points {cs[a].tolist()})")
    if triple.size:
        i = int(triple[0])
        j = i + 2
        while j + 1 < len(order) and same[j]:
            j += 1
        who = sorted(int(c) for c in cell_of[i:j + 1])
        key = keys[order[i]].tolist()
        raise MeshError(
            f"face ({', '.join(map(str, key))}) is shared by {len(who)} tetrahedra "
            f"({', '.join(map(str, who))}); a face belongs to at most two")
    i = int(clash[0])
    a, b = sorted((int(cell_of[i]), int(cell_of[i + 1])))
    key = keys[order[i]].tolist()
    raise MeshError(
        f"tetrahedra {a} and {b} lie on the same side of their shared face "
        f"({', '.join(map(str, key))}): they overlap")
