"""The triangle mesh: validation once, then immutable arrays and cached topology."""

from __future__ import annotations

import warnings

import numpy as np

from hatkernels._jit import geometry as _jit_geometry
from hatkernels._jit import topology as _topo
from hatkernels._sets import index_union
from hatkernels.errors import InputError, MeshError, MeshWarning
from hatkernels.mesh.components import point_components
from hatkernels.mesh.core_index import index_dtype
from hatkernels.mesh.pattern import csr_pattern
from hatkernels.mesh.quality import quality as _quality
from hatkernels.mesh.refine import refine as _refine
from hatkernels.mesh.refinement import Refinement
from hatkernels.mesh.reorder import reorder as _reorder

# Refinement and index_dtype are re-exported: they were first defined here.
__all__ = ["Mesh", "Refinement", "index_dtype", "DEGENERATE_TOL"]

#: A triangle is degenerate when twice its area is at most this fraction of
#: its longest edge squared (that ratio is about the smallest altitude over
#: the longest edge).  Round-off in the area of a flat triangle with
#: coordinates of order one is near 1e-16, so 1e-12 flags collinear points
#: while accepting anisotropic triangles up to aspect ratios near 1e12.
DEGENERATE_TOL = 1e-12

#: The derived arrays a mesh may hold in its cache, by name (see :meth:`Mesh.cached`).
CACHEABLE = frozenset(
    {"areas", "boundary_edges", "boundary_points", "edges", "incidence", "triangle_edges",
     "unused"}
)


def _readonly(a):
    a.setflags(write=False)
    return a


def _check_points(points):
    try:
        p = np.asarray(points)
    except Exception as exc:  # ragged lists and the like
        raise MeshError(f"points cannot be read as an array: {exc}") from None
    if p.ndim != 2 or p.shape[1] != 2:
        raise MeshError(f"points must have shape (n_points, 2), got shape {p.shape}")
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
        raise MeshError(
            f"point {bad[0]} has a non-finite coordinate ({float(p[bad[0], 0])!r}, {float(p[bad[0], 1])!r})"
            + (f"; {bad.size} points in all" if bad.size > 1 else "")
        )
    return p


def _check_triangles(triangles, n_points):
    try:
        t = np.asarray(triangles)
    except Exception as exc:
        raise MeshError(f"triangles cannot be read as an array: {exc}") from None
    if t.ndim != 2 or t.shape[1] != 3:
        raise MeshError(f"triangles must have shape (n_triangles, 3), got shape {t.shape}")
    if t.shape[0] == 0:
        raise MeshError("triangles is empty")
    if t.dtype.kind not in "iu":
        raise MeshError(
            f"triangles must be an integer array of point indices, got dtype {t.dtype}"
        )
    lo = t.min(axis=1)
    if lo.min() < 0:
        k = int(np.flatnonzero(lo < 0)[0])
        raise MeshError(f"triangle {k} has a negative point index {t[k].tolist()}")
    hi = t.max(axis=1)
    if hi.max() >= n_points:
        k = int(np.flatnonzero(hi >= n_points)[0])
        raise MeshError(
            f"triangle {k} refers to point {int(hi[k])}, but there are only {n_points} "
            f"points (valid indices 0..{n_points - 1})"
        )
    t = np.array(t, dtype=index_dtype(n_points), order="C", copy=True)
    same = (t[:, 0] == t[:, 1]) | (t[:, 1] == t[:, 2]) | (t[:, 0] == t[:, 2])
    if same.any():
        bad = np.flatnonzero(same)
        raise MeshError(
            f"triangle {bad[0]} repeats a vertex {t[bad[0]].tolist()}"
            + (f"; {bad.size} triangles in all" if bad.size > 1 else "")
        )
    return t


def signed_double_areas(points, triangles):
    """Twice the signed area of each triangle (positive when counterclockwise)."""
    p0 = points[triangles[:, 0]]
    d1 = points[triangles[:, 1]] - p0
    d2 = points[triangles[:, 2]] - p0
    return d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0]


def _longest_edge_sq(points, triangles):
    p0, p1, p2 = (points[triangles[:, k]] for k in range(3))
    return np.maximum(
        np.maximum(((p1 - p0) ** 2).sum(axis=1), ((p2 - p1) ** 2).sum(axis=1)),
        ((p0 - p2) ** 2).sum(axis=1),
    )


def _scaled_areas(points, triangles, degenerate_tol):
    """Twice the signed areas and ``|2 area| / longest side**2``; coordinates whose areas
    float64 cannot represent are refused first, not called flat.  For triangles of size
    ``h`` twice the area is near ``h**2`` and the squared hat gradients near ``h**-2``:
    beyond about 1e154 and 1e-154 they overflow or underflow (into subnormals, with fewer
    bits, down to zero, so that a flat triangle cannot be told from a thin one)."""
    tiny = np.finfo(np.float64).tiny
    p0, p1, p2 = (points[triangles[:, k]] for k in range(3))
    with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
        d2a = signed_double_areas(points, triangles)
        e2 = _longest_edge_sq(points, triangles)
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


class Mesh:
    """A conforming triangle mesh in the plane.

    Parameters
    ----------
    points : array_like, shape (n_points, 2)
        Coordinates; any real dtype, stored as float64.
    cells : array_like, shape (n_cells, 3)
        Point indices of each triangle; any integer dtype, stored as int32
        (int64 when there are more than 2**31 - 1 points).
    degenerate_tol : float
        Relative area below which a triangle counts as degenerate, see
        :data:`DEGENERATE_TOL`.

    Raises
    ------
    MeshError
        With the index of the first offending triangle or point: wrong shape
        or dtype, non-finite coordinates, indices out of range, a repeated
        vertex, a (near) zero area, duplicate or overlapping triangles, an
        edge shared by more than two triangles.

    Warns
    -----
    MeshWarning
        When clockwise triangles were reoriented (in the mesh's own copy,
        never in the caller's array) or some points belong to no triangle.
        Such points give empty matrix rows; :func:`hatkernels.apply_dirichlet`
        leaves them out of the system.

    Notes
    -----
    The inputs are copied; the mesh's arrays are read-only, so topology
    (edges, boundary) is computed once and cached.

    Examples
    --------
    >>> import hatkernels
    >>> m = hatkernels.Mesh([[0, 0], [1, 0], [0, 1], [1, 1]], [[0, 1, 3], [0, 3, 2]])
    >>> m
    Mesh(4 points, 2 triangles)
    >>> m.boundary_points()
    array([0, 1, 2, 3], dtype=int32)
    >>> m.edges().tolist()
    [[0, 1], [0, 2], [0, 3], [1, 3], [2, 3]]
    """

    def __init__(self, points, cells, *, degenerate_tol=DEGENERATE_TOL):
        p = _check_points(points)
        t = _check_triangles(cells, p.shape[0])
        d2a, rel = _scaled_areas(p, t, degenerate_tol)
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
                stacklevel=2,
            )
        self._init(p, t)
        self._check_edges()
        used = np.bincount(t.ravel(), minlength=p.shape[0]) > 0
        if not used.all():
            unused = np.flatnonzero(~used)
            self._cache["unused"] = _readonly(unused.astype(t.dtype))
            warnings.warn(
                f"{unused.size} of {p.shape[0]} points belong to no triangle "
                f"(first: point {unused[0]}); they get empty matrix rows",
                MeshWarning,
                stacklevel=2,
            )
        else:
            self._cache["unused"] = _readonly(np.empty(0, dtype=t.dtype))

    # -- construction -------------------------------------------------------

    def _init(self, points, triangles, refinement=None):
        self._points = _readonly(points)
        self._triangles = _readonly(triangles)
        self._refinement = refinement
        self._cache = {}

    @classmethod
    def _trusted(cls, points, triangles, *, refinement=None, **cache):
        """Build from arrays known to be valid (generators, refinement): no checks, no copies."""
        self = cls.__new__(cls)
        self._init(
            np.ascontiguousarray(points, dtype=np.float64),
            np.ascontiguousarray(triangles, dtype=index_dtype(len(points))),
            refinement,
        )
        for key, value in cache.items():
            self._cache[key] = _readonly(value)
        return self

    def _check_edges(self):
        ptr, codes = self._incidence()
        first, second = _topo.directed_edge_check(self._triangles_for_topology(), ptr, codes)
        hit = np.flatnonzero(first >= 0)
        if hit.size == 0:
            return
        i = int(hit[0])
        t1, t2 = int(first[i]), int(second[i])
        tri = self._triangles
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

    # -- arrays ---------------------------------------------------------------

    @property
    def points(self):
        """Coordinates, shape (n_points, 2), float64, read-only."""
        return self._points

    @property
    def cells(self):
        """Point indices of each cell, shape (n_cells, dim + 1), read-only.

        Triangles in 2-D, counterclockwise.
        """
        return self._triangles

    @property
    def triangles(self):
        """The cells of a 2-D mesh (an alias of :attr:`cells`)."""
        return self._triangles

    @property
    def dim(self):
        """The space dimension (2: points in the plane, cells are triangles)."""
        return self._points.shape[1]

    @property
    def n_cells(self):
        return self._triangles.shape[0]

    @property
    def n_points(self):
        return self._points.shape[0]

    @property
    def n_triangles(self):
        return self._triangles.shape[0]

    @property
    def refinement(self):
        """The :class:`Refinement` this mesh came from, or None for an unrefined mesh."""
        return self._refinement

    def levels(self):
        """The refinement history, coarsest first and this mesh last."""
        chain = [self]
        while chain[-1].refinement is not None:
            chain.append(chain[-1].refinement.coarse)
        return chain[::-1]

    def __repr__(self):
        extra = ""
        if self._refinement is not None:
            extra = f", {len(self.levels()) - 1} refinements"
        return f"Mesh({self.n_points} points, {self.n_triangles} triangles{extra})"

    def unused_points(self):
        """Points that belong to no triangle, sorted."""
        if "unused" not in self._cache:
            used = np.bincount(self._triangles.ravel(), minlength=self.n_points) > 0
            self._cache["unused"] = _readonly(np.flatnonzero(~used).astype(self._triangles.dtype))
        return self._cache["unused"]

    def measures(self):
        """Measure (area in 2-D) of each cell, shape (n_cells,)."""
        return self.areas()

    def areas(self):
        """Area of each triangle, shape (n_triangles,)."""
        if "areas" not in self._cache:
            a = np.empty(self.n_triangles)
            _jit_geometry.double_areas(self._points, self._triangles, a)
            if not (np.abs(a) >= np.finfo(np.float64).tiny).all():  # refined below float64's range
                _scaled_areas(self._points, self._triangles, DEGENERATE_TOL)
            a *= 0.5
            self._cache["areas"] = _readonly(a)
        return self._cache["areas"]

    # -- topology ---------------------------------------------------------------

    def _triangles_for_topology(self):
        """Triangles in a dtype wide enough for ``3 * n_triangles`` incidence codes."""
        dt = index_dtype(self.n_points, 3 * self.n_triangles + 3)
        return self._triangles if self._triangles.dtype == dt else self._triangles.astype(dt)

    def _incidence(self):
        if "incidence" not in self._cache:
            tri = self._triangles_for_topology()
            ptr = np.empty(self.n_points + 1, dtype=tri.dtype)
            codes = np.empty(3 * self.n_triangles, dtype=tri.dtype)
            _topo.incidence(tri, ptr, codes)
            self._cache["incidence"] = (_readonly(ptr), _readonly(codes))
        return self._cache["incidence"]

    def _edge_topology(self):
        if "edges" not in self._cache or "triangle_edges" not in self._cache:
            tri = self._triangles_for_topology()
            ptr, codes = self._incidence()
            indptr, indices, diag, _, _ = csr_pattern(tri, ptr, codes, with_slots=False)
            counts = np.diff(indptr)
            rows = np.repeat(np.arange(self.n_points, dtype=indptr.dtype), counts)
            keep = indices > rows
            upper = np.bincount(rows[keep], minlength=self.n_points)
            first_edge = np.zeros(self.n_points, dtype=indptr.dtype)
            np.cumsum(upper[:-1], out=first_edge[1:])
            edges = np.column_stack([rows[keep], indices[keep]]).astype(self._triangles.dtype)
            del rows, keep
            tri_edges = _topo.triangle_edges(tri, indptr, indices, diag, first_edge)
            self._cache["edges"] = _readonly(edges)
            self._cache["triangle_edges"] = _readonly(tri_edges)
        return self._cache["edges"], self._cache["triangle_edges"]

    def edges(self):
        """Unique edges ``(i, j)`` with ``i < j``, sorted, shape (n_edges, 2)."""
        return self._edge_topology()[0]

    def triangle_edges(self):
        """Number (row of :meth:`edges`) of the edge opposite each local vertex, shape (n_triangles, 3)."""
        return self._edge_topology()[1]

    def boundary_edges(self):
        """Edges that belong to one triangle only, shape (n_boundary_edges, 2).

        Each is oriented as in its triangle, so the domain lies on its left
        (outer boundaries run counterclockwise, holes clockwise); sorted by
        first point, then second.
        """
        if "boundary_edges" not in self._cache:
            tri = self._triangles_for_topology()
            ptr, codes = self._incidence()
            flags = _topo.boundary_flags(tri, ptr, codes)
            e = np.flatnonzero(flags)
            t, a = np.divmod(codes[e], 3)
            start = self._triangles[t, a]
            end = self._triangles[t, (a + 1) % 3]
            order = np.lexsort((end, start))
            self._cache["boundary_edges"] = _readonly(np.column_stack([start[order], end[order]]))
        return self._cache["boundary_edges"]

    def boundary_points(self):
        """Points on the boundary, sorted, shape (n_boundary_points,)."""
        if "boundary_points" not in self._cache:
            points = index_union(self.n_points, self.boundary_edges().ravel())
            self._cache["boundary_points"] = _readonly(points.astype(self._triangles.dtype))
        return self._cache["boundary_points"]

    def boundary_length(self):
        """Total length of the boundary edges."""
        b = self.boundary_edges()
        return float(np.linalg.norm(self._points[b[:, 1]] - self._points[b[:, 0]], axis=1).sum())

    def h(self):
        """Longest edge length in the mesh (the mesh size)."""
        return float(np.sqrt(_longest_edge_sq(self._points, self._triangles).max()))

    # -- the cache -----------------------------------------------------------------

    def cached(self):
        """Names of the derived arrays the mesh holds now, a frozenset (see :data:`CACHEABLE`).

        >>> from hatkernels.mesh import rectangle
        >>> m = rectangle(2, 2)
        >>> _ = m.edges()
        >>> sorted(m.cached())
        ['edges', 'incidence', 'triangle_edges']
        """
        return frozenset(self._cache)

    def forget(self, *names):
        """Drop derived arrays from the cache; they are computed again when next asked for.

        For a caller that needs a large piece of topology once and should not
        leave it behind (refinement, the matrix-free operator's edge list): at
        1e8 triangles the incidence and the triangle-to-edge map are
        gigabytes.  The points and cells never change, so nothing but memory
        and time is at stake.  Names not cached are ignored.

        Raises
        ------
        InputError
            For a name that is not one of :data:`CACHEABLE`.

        >>> from hatkernels.mesh import rectangle
        >>> m = rectangle(2, 2)
        >>> before = m.cached()
        >>> _ = m.edges()
        >>> m.forget(*(m.cached() - before))
        >>> m.cached() == before
        True
        """
        unknown = sorted(set(names) - CACHEABLE)
        if unknown:
            raise InputError(
                f"Mesh.forget: {unknown[0]!r} is not a cached array; choose from "
                f"{sorted(CACHEABLE)}"
            )
        for name in names:
            self._cache.pop(name, None)

    # -- derived meshes ----------------------------------------------------------

    def refine(self):
        """Uniform refinement: each triangle split into four by its edge midpoints.

        The result is nested: it has this mesh's points and one more at the
        middle of each edge; :attr:`refinement` holds this mesh and the maps
        from coarse points and edges to fine points (see :class:`Refinement`).
        The four children of triangle ``t`` are triangles ``4t .. 4t+3``;
        boundary topology is carried over without recomputation.
        """
        return _refine(self)

    def reorder(self, method="rcm"):
        """Renumber points and triangles for locality; see :func:`hatkernels.mesh.reorder`."""
        return _reorder(self, method)

    def quality(self):
        """Angles, areas and aspect ratios; see :class:`hatkernels.mesh.MeshQuality`."""
        return _quality(self)

    def components(self):
        """``(count, labels)``: connected parts and each point's part (-1: in no cell);
        see :func:`hatkernels.mesh.components.point_components`."""
        return point_components(self)
