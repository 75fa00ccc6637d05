"""Region tags on cells and tags on boundary sides: checked once, carried through refinement
and reordering.

A mesh read from a mesher's file usually says which material each cell is made
of (its *region*, an integer per cell) and which part of the boundary each side
belongs to (a *boundary tag* per side: edges in 2-D, faces in 3-D), with
optional names for both.  :class:`MeshTags` holds them; a :class:`~hatkernels.Mesh`
carries one (``mesh.tags``, None when it has none) and the solvers take tags
or names wherever they take cells or sides.

The tags are stored as given: ``regions`` (n_cells,) int32, and the tagged sides
as rows of point indices (oriented as the mesh's own boundary sides, so the
domain is on the left of an edge and an outward normal comes from a face) with
one int32 tag each.  A boundary side may be untagged; an interior side cannot be
tagged (a mesh file's interface lines are dropped when it is read).  Names are
two maps from name to tag, one for regions and one for sides.
"""

from __future__ import annotations

import collections.abc
import dataclasses
import numbers
import types

import numpy as np

from hatkernels.errors import InputError, MeshError
from hatkernels.mesh.tetrahedra import smallest_first

__all__ = ["MeshTags", "check_tags", "label_cells", "label_sides", "refined_tags",
           "reordered_tags", "restricted_tags"]

_INT32 = np.iinfo(np.int32)


def _readonly(a):
    a.setflags(write=False)
    return a


@dataclasses.dataclass(frozen=True, eq=False)
class MeshTags:
    """The tags of one mesh (see the module's notes); build it with :func:`check_tags`.

    Attributes
    ----------
    regions : ndarray (n_cells,) int32, or None
        The region tag of each cell.
    sides : ndarray (k, 2) or (k, 3)
        The tagged boundary sides, oriented as the mesh's boundary sides, in the
        mesh's point dtype.
    side_tags : ndarray (k,) int32
        The tag of each row of ``sides``.
    region_names, side_names : mapping name -> tag (read-only)
    """

    regions: np.ndarray | None
    sides: np.ndarray
    side_tags: np.ndarray
    region_names: types.MappingProxyType
    side_names: types.MappingProxyType

    def __repr__(self):
        r = "no regions" if self.regions is None else f"{len(self.region_tags())} regions"
        return (f"MeshTags({r}, {len(self.boundary_tags())} boundary tags on "
                f"{len(self.sides)} sides)")

    def region_tags(self):
        """The distinct region tags, sorted (empty when the cells are untagged)."""
        return np.empty(0, np.int32) if self.regions is None else np.unique(self.regions)

    def boundary_tags(self):
        """The distinct boundary tags, sorted."""
        return np.unique(self.side_tags)

    def region_label(self, tag):
        """``"name (tag)"`` when the region has a name, else ``"tag"``: for messages and tables."""
        return _label(self.region_names, tag)

    def side_label(self, tag):
        """As :meth:`region_label`, for a boundary tag."""
        return _label(self.side_names, tag)

    def region_tag(self, key, what="region"):
        """The region tag that ``key`` names: an integer tag, its name, or the tag as a string."""
        return _resolve(key, self.region_names, self.region_tags(), what, "region")

    def side_tag(self, key, what="boundary tag"):
        """The boundary tag that ``key`` names (as :meth:`region_tag`)."""
        return _resolve(key, self.side_names, self.boundary_tags(), what, "boundary")

    def side_tag_list(self, keys, what="boundary tag"):
        """The tags named by a key or a list (or tuple) of keys, in order, without repeats."""
        if isinstance(keys, (str, numbers.Integral)) and not isinstance(keys, bool):
            keys = [keys]
        out = []
        for key in keys:
            t = self.side_tag(key, what)
            if t not in out:
                out.append(t)
        return out

    def sides_of(self, tags):
        """Rows of :attr:`sides` whose tag is among ``tags`` (resolved integers), in row order."""
        return self.sides[np.isin(self.side_tags, np.asarray(tags, dtype=np.int32))]

    def cells_of(self, tag):
        """Cell numbers of region ``tag`` (a resolved integer), sorted."""
        if self.regions is None:
            raise InputError("the mesh has no region tags")
        return np.flatnonzero(self.regions == tag)


def _label(names, tag):
    for name, t in names.items():
        if t == tag:
            return f"{name} ({tag})"
    return str(int(tag))


def _resolve(key, names, tags, what, kind):
    """The integer tag named by ``key``; InputError naming the key and the mesh's tags."""
    tag = None
    if isinstance(key, (numbers.Integral, np.integer)) and not isinstance(key, bool):
        tag = int(key)
    elif isinstance(key, str):
        if key in names:
            tag = int(names[key])
        else:
            try:  # the tag written as text; anything else is an unknown name
                tag = int(key)
            except ValueError:
                tag = None
    else:
        raise InputError(f"{what} {key!r}: a tag is an integer or a name, not a "
                         f"{type(key).__name__}")
    if tag is None or tag not in set(tags.tolist()):
        known = [str(t) for t in tags.tolist()]
        named = [f"{n} ({t})" for n, t in names.items() if t in set(tags.tolist())]
        have = ", ".join(named + [k for k in known if k not in {str(t) for t in names.values()}])
        raise InputError(f"{what} {key!r}: the mesh has no {kind} tag {key!r} "
                         f"(it has: {have or 'no such tags'})")
    return tag


def _array(values, what):
    """``np.asarray(values)``, with a MeshError for what numpy cannot make an array of
    (ragged lists, say)."""
    try:
        return np.asarray(values)
    except (ValueError, TypeError) as exc:
        raise MeshError(f"{what} cannot be read as an array: {exc}") from None


def _tag_array(values, n, what, item):
    a = _array(values, what)
    if a.ndim != 1 or len(a) != n:
        raise MeshError(f"{what} must hold one integer per {item} ({n},), got shape {a.shape}")
    if a.size and a.dtype.kind == "f":
        bad = ~np.isfinite(a) | (a != np.round(a))
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise MeshError(f"{what} of {item} {k} is {a[k].item()!r}, not an integer")
    elif a.size and a.dtype.kind not in "iub":
        raise MeshError(f"{what} must be integers, got dtype {a.dtype}")
    if a.size:
        out = (a < _INT32.min) | (a > _INT32.max)
        if out.any():
            k = int(np.flatnonzero(out)[0])
            raise MeshError(f"{what} of {item} {k} is {a[k].item()!r}, outside the int32 range")
    return a.astype(np.int32)


def _names(names, what):
    if names is None:
        return types.MappingProxyType({})
    if not isinstance(names, collections.abc.Mapping):
        raise MeshError(f"{what} must be a dict of name -> integer tag, got "
                        f"{type(names).__name__}")
    out = {}
    for name, tag in names.items():
        if not isinstance(name, str) or not name:
            raise MeshError(f"{what}: a name must be a non-empty string, got {name!r}")
        if isinstance(tag, bool) or not isinstance(tag, (numbers.Integral, np.integer)):
            raise MeshError(f"{what}[{name!r}] must be an integer tag, got {tag!r}")
        out[name] = int(tag)
    return types.MappingProxyType(out)


def _sorted_rows(a):
    """Rows of an integer array with their entries sorted, as int64."""
    return np.sort(np.asarray(a, dtype=np.int64), axis=1)


def _row_positions(known, want):
    """For each row of ``want``, its row in ``known`` (both (k, w) with sorted entries), or -1."""
    both = np.concatenate([known, want])
    _, first, inverse = np.unique(both, axis=0, return_index=True, return_inverse=True)
    inverse = inverse.reshape(-1)
    pos = first[inverse[len(known):]]
    pos[pos >= len(known)] = -1
    return pos


def boundary_rows(mesh, sides):
    """Which rows of ``sides`` (integer (k, 2) or (k, 3), any point order) are boundary sides."""
    s = np.asarray(sides)
    if s.ndim != 2 or s.shape[1] != mesh.dim or not len(s):
        return np.zeros(len(s) if s.ndim else 0, dtype=bool)
    inside = ((s >= 0) & (s < mesh.n_points)).all(axis=1)
    b = mesh.boundary_edges() if mesh.dim == 2 else mesh.boundary_faces()
    found = np.zeros(len(s), dtype=bool)
    found[inside] = _row_positions(_sorted_rows(b), _sorted_rows(s[inside])) >= 0
    return found


def check_tags(mesh, regions=None, sides=None, side_tags=None, region_names=None,
               side_names=None):
    """Checked :class:`MeshTags` for ``mesh``: MeshError naming the cell, side or tag at fault.

    ``regions`` is one integer per cell; ``sides`` a (k, 2) array of edges (2-D) or
    (k, 3) of faces (3-D) that must be boundary sides of the mesh, in any order of
    their points, with ``side_tags`` one integer each.  A side listed twice with the
    same tag counts once; with two different tags it is refused.
    """
    dim = mesh.dim
    word = "edge" if dim == 2 else "face"
    reg = None
    if regions is not None:
        reg = _readonly(_tag_array(regions, mesh.n_cells, "regions",
                                   "triangle" if dim == 2 else "tetrahedron"))
    boundary = mesh.boundary_edges() if dim == 2 else mesh.boundary_faces()
    if sides is None:
        if side_tags is not None and _array(side_tags, "side_tags").size:
            raise MeshError("side_tags given without sides")
        s = np.empty((0, dim), dtype=boundary.dtype)
        t = np.empty(0, np.int32)
    else:
        s = _array(sides, "sides")
        if s.ndim != 2 or s.shape[1] != dim or (s.size and s.dtype.kind not in "iu"):
            raise MeshError(f"sides must be an integer array of {word}s, shape (k, {dim}), "
                            f"got {s.dtype} {s.shape}")
        if side_tags is None:
            raise MeshError("sides given without side_tags")
        t = _tag_array(side_tags, len(s), "side_tags", word)
        bad = (s < 0) | (s >= mesh.n_points)
        if bad.any():
            k = int(np.flatnonzero(bad.any(axis=1))[0])
            raise MeshError(f"tagged {word} {k} {s[k].tolist()} refers to a point outside "
                            f"0..{mesh.n_points - 1}")
        pos = _row_positions(_sorted_rows(boundary), _sorted_rows(s))
        if (pos < 0).any():
            k = int(np.flatnonzero(pos < 0)[0])
            raise MeshError(f"tagged {word} {k} {s[k].tolist()} (tag {int(t[k])}) is not a "
                            f"boundary {word} of the mesh")
        order = np.lexsort((t, pos))
        pos, t = pos[order], t[order]
        clash = (pos[1:] == pos[:-1]) & (t[1:] != t[:-1])
        if clash.any():
            k = int(np.flatnonzero(clash)[0])
            raise MeshError(f"boundary {word} {boundary[pos[k]].tolist()} is tagged twice, "
                            f"{int(t[k])} and {int(t[k + 1])}; a side takes one tag")
        keep = np.ones(len(pos), dtype=bool)
        keep[1:] = pos[1:] != pos[:-1]
        s = boundary[pos[keep]]
        t = t[keep]
    return MeshTags(reg, _readonly(np.ascontiguousarray(s)), _readonly(t),
                    _names(region_names, "region_names"), _names(side_names, "side_names"))


def _centres(points, rows):
    return points[rows].mean(axis=1)


def _by_predicate(centres, labels, what):
    """Tags from ``{name: (tag, test)}`` given as ``{name: test}``: first test that holds."""
    if not isinstance(labels, dict) or not labels:
        raise InputError(f"{what} must be a non-empty dict of name -> test(x, y[, z])")
    out = np.full(len(centres), -1, dtype=np.int64)
    names = {}
    for k, (name, test) in enumerate(labels.items(), start=1):
        if not callable(test):
            raise InputError(f"{what}[{name!r}] must be a callable test(x, y[, z]) -> bool")
        try:
            hit = np.asarray(test(*centres.T), dtype=bool)
        except Exception as exc:
            raise InputError(f"{what}[{name!r}] raised {type(exc).__name__}: {exc}") from exc
        if hit.ndim and hit.shape != (len(centres),):
            raise InputError(f"{what}[{name!r}] returned shape {hit.shape} for {len(centres)} "
                             f"centres; it must return one value per centre (or one for all)")
        hit = np.broadcast_to(hit, (len(centres),))
        out[(out < 0) & hit] = k
        names[name] = k
    return out, names


def label_cells(mesh, labels):
    """A copy of ``mesh`` whose cells are tagged by tests on their centroids.

    ``labels`` maps a region name to a test ``f(x, y)`` (``f(x, y, z)`` in 3-D)
    returning booleans; regions get tags 1, 2, ... in the dict's order, and a
    cell takes the first region whose test holds at its centroid.  A cell that
    no test claims is an InputError naming it.  Boundary tags are kept.

    >>> from hatkernels.mesh import rectangle
    >>> m = label_cells(rectangle(4, 1), {"left": lambda x, y: x < 0.5,
    ...                                  "right": lambda x, y: x >= 0.5})
    >>> m.tags.region_names["right"], m.regions.tolist()
    (2, [1, 1, 1, 1, 2, 2, 2, 2])
    """
    tags, names = _by_predicate(_centres(mesh.points, mesh.cells), labels, "labels")
    if (tags < 0).any():
        k = int(np.flatnonzero(tags < 0)[0])
        c = _centres(mesh.points, mesh.cells[k:k + 1])[0]
        raise InputError(f"cell {k} (centroid {c.tolist()}) is in none of the regions "
                         f"{list(names)}")
    old = mesh.tags
    return mesh.with_tags(
        regions=tags,
        sides=None if old is None else old.sides,
        side_tags=None if old is None else old.side_tags,
        region_names=names,
        side_names=None if old is None else dict(old.side_names))


def label_sides(mesh, labels):
    """A copy of ``mesh`` whose boundary sides are tagged by tests on their midpoints.

    ``labels`` maps a boundary tag name to a test on the side's centre (the
    midpoint of an edge, the centroid of a face); tags are 1, 2, ... in the
    dict's order, and a side takes the first test that holds.  Sides no test
    claims stay untagged (zero flux unless a condition names them otherwise).
    Region tags are kept.

    >>> from hatkernels.mesh import rectangle
    >>> m = label_sides(rectangle(2, 2), {"left": lambda x, y: x == 0})
    >>> m.tags.sides_of([1]).tolist()
    [[3, 0], [6, 3]]
    """
    b = mesh.boundary_edges() if mesh.dim == 2 else mesh.boundary_faces()
    tags, names = _by_predicate(_centres(mesh.points, b), labels, "labels")
    keep = tags > 0
    old = mesh.tags
    return mesh.with_tags(
        regions=None if old is None else old.regions,
        sides=b[keep], side_tags=tags[keep],
        region_names=None if old is None else dict(old.region_names),
        side_names=names)


def refined_tags(tags, fine):
    """The tags of ``fine = coarse.refine()`` from the coarse mesh's ``tags``.

    Children inherit their parent's region (``4t..4t+3`` or ``8t..8t+7``); a tagged
    edge ``(a, b)`` becomes ``(a, ab)`` and ``(ab, b)``, a tagged face its four
    children (Bey's split of the face), all with the parent's orientation and tag.
    """
    r = fine.refinement
    coarse = r.coarse
    regions = None if tags.regions is None else np.repeat(tags.regions, 4 if fine.dim == 2
                                                          else 8)
    edges = r.edge_points
    n = np.int64(coarse.n_points)
    key = edges[:, 0].astype(np.int64) * n + edges[:, 1]

    def mid(u, v):
        lo, hi = np.minimum(u, v).astype(np.int64), np.maximum(u, v)
        return r.midpoints[np.searchsorted(key, lo * n + hi)]

    s, cp = tags.sides, r.coarse_points
    if fine.dim == 2:
        a, b = s[:, 0], s[:, 1]
        m = mid(a, b)
        a, b = cp[a], cp[b]
        sides = np.concatenate([np.column_stack([a, m]), np.column_stack([m, b])])
        side_tags = np.tile(tags.side_tags, 2)
    else:
        a, b, c = s[:, 0], s[:, 1], s[:, 2]
        ab, bc, ca = mid(a, b), mid(b, c), mid(c, a)
        a, b, c = cp[a], cp[b], cp[c]
        sides = np.concatenate([np.column_stack([a, ab, ca]), np.column_stack([ab, b, bc]),
                                np.column_stack([ca, bc, c]), np.column_stack([ab, bc, ca])])
        sides = smallest_first(sides)
        side_tags = np.tile(tags.side_tags, 4)
    dt = fine.cells.dtype
    return MeshTags(
        None if regions is None else _readonly(regions),
        _readonly(np.ascontiguousarray(sides, dtype=dt)), _readonly(side_tags),
        tags.region_names, tags.side_names)


def restricted_tags(tags, local_mesh, cells, local_of_point):
    """The tags of a piece of a mesh: ``cells`` are the piece's global cell numbers,
    ``local_of_point`` maps global points to the piece's (-1 where absent).

    Regions follow the cells; a tagged side is kept when it is a boundary side of the
    piece (its cell is in the piece), in the piece's point numbers.
    """
    regions = None if tags.regions is None else _readonly(tags.regions[cells])
    loc = local_of_point[tags.sides]
    inside = (loc >= 0).all(axis=1)
    loc, t = loc[inside], tags.side_tags[inside]
    if len(loc):
        b = local_mesh.boundary_edges() if local_mesh.dim == 2 else local_mesh.boundary_faces()
        found = _row_positions(_sorted_rows(b), _sorted_rows(loc)) >= 0
        loc, t = loc[found], t[found]
    return MeshTags(regions, _readonly(loc.astype(local_mesh.cells.dtype)), _readonly(t),
                    tags.region_names, tags.side_names)


def reordered_tags(tags, point_inverse, cell_order, dtype):
    """The tags after renumbering: new point ``point_inverse[p]`` for old ``p``; new cell
    ``k`` is old cell ``cell_order[k]``."""
    return MeshTags(
        None if tags.regions is None else _readonly(tags.regions[cell_order]),
        _readonly(point_inverse[tags.sides].astype(dtype)), tags.side_tags,
        tags.region_names, tags.side_names)
