"""The mesh of triangles or tetrahedra: validation once, then immutable arrays and
cached topology.  The checks live in :mod:`hatkernels.mesh.triangles` and
:mod:`hatkernels.mesh.tetrahedra`; the constructor picks them by the points' shape."""

from __future__ import annotations

import warnings

import numpy as np

from hatkernels._jit import geometry as _jit_geometry
from hatkernels._jit import topology as _topo
from hatkernels._sets import index_union
from hatkernels.errors import InputError, MeshWarning
from hatkernels.geometry import DEGENERATE_VOLUME_TOL
from hatkernels.mesh import tetrahedra as _tet
from hatkernels.mesh.components import point_components
from hatkernels.mesh.core_index import index_dtype
from hatkernels.mesh.pattern import csr_pattern
from hatkernels.mesh.quality import quality as _quality
from hatkernels.mesh.quality3d import tetrahedron_quality
from hatkernels.mesh.refine import refine as _refine
from hatkernels.mesh.refinement import Refinement
from hatkernels.mesh.reorder import reorder as _reorder
from hatkernels.mesh.tags import check_tags
from hatkernels.mesh.triangles import (
    CELL_WORDS,
    DEGENERATE_TOL,
    check_cells,
    check_edge_sharing,
    check_points,
    longest_edge_sq,
    reoriented_triangles,
    scaled_areas,
)

# Refinement and index_dtype are re-exported: they were first defined here.
__all__ = ["Mesh", "Refinement", "index_dtype", "DEGENERATE_TOL"]

#: The derived arrays a mesh may hold in its cache, by name (see :meth:`Mesh.cached`).
CACHEABLE = frozenset(
    {"areas", "boundary_edges", "boundary_points", "edges", "incidence", "triangle_edges",
     "unused", "volumes", "faces", "cell_faces", "boundary_faces"}
)


def _readonly(a):
    a.setflags(write=False)
    return a



class Mesh:
    """A conforming mesh of triangles in the plane or of tetrahedra in space.

    Parameters
    ----------
    points : array_like, shape (n_points, 2) or (n_points, 3)
        Coordinates; any real dtype, stored as float64.  Their shape picks
        the cells: triangles for points in the plane, tetrahedra in space.
    cells : array_like, shape (n_cells, 3) or (n_cells, 4)
        Point indices of each triangle or tetrahedron; any integer dtype,
        stored as int32 (int64 when there are more than 2**31 - 1 points).
    degenerate_tol : float, optional
        Triangles: relative area (``|2 area| / longest side**2``) below which
        a triangle is degenerate, :data:`DEGENERATE_TOL` by default.
        Tetrahedra: ``6 |V| / longest edge**3`` below which a tetrahedron is,
        :data:`hatkernels.geometry.DEGENERATE_VOLUME_TOL` by default (the
        measure :func:`hatkernels.element_gradients` judges by).

    Raises
    ------
    MeshError
        With the index of the first offending cell or point: wrong shape or
        dtype, non-finite coordinates, indices out of range, a repeated
        vertex, a (near) zero area or volume (collinear or coplanar points),
        duplicate or overlapping cells, an edge shared by more than two
        triangles or a face shared by more than two tetrahedra.

    Warns
    -----
    MeshWarning
        When clockwise triangles or negatively oriented tetrahedra were
        reoriented (in the mesh's own copy, never in the caller's array) or
        some points belong to no cell.  Such points give empty matrix rows;
        :func:`hatkernels.apply_dirichlet` leaves them out of the system.

    Notes
    -----
    The inputs are copied; the mesh's arrays are read-only, so topology
    (edges, faces, boundary) is computed once and cached.  Stored cells are
    positively oriented: triangles counterclockwise, tetrahedra with
    ``det(x1 - x0, x2 - x0, x3 - x0) > 0``.  The edge list and the boundary
    edges are for triangles only so far (an InputError on tetrahedra, which
    have faces); ``.triangles`` of a 3-D mesh and ``.tetrahedra`` of a 2-D
    one are InputErrors too, ``.cells`` serves both.

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
    >>> t = hatkernels.Mesh([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], [[0, 1, 2, 3]])
    >>> t, t.dim, t.measures() * 6
    (Mesh(4 points, 1 tetrahedra), 3, array([1.]))
    """

    def __init__(self, points, cells, *, degenerate_tol=None):
        p = check_points(points)
        dim = p.shape[1]
        t = check_cells(cells, p.shape[0], dim)
        if dim == 2:
            tol = DEGENERATE_TOL if degenerate_tol is None else degenerate_tol
            t = reoriented_triangles(p, t, tol, stacklevel=2)
        else:
            tol = DEGENERATE_VOLUME_TOL if degenerate_tol is None else degenerate_tol
            t = _tet.reoriented(p, t, tol, stacklevel=2)
        self._init(p, t)
        if dim == 2:
            self._check_edges()
        else:
            _tet.check_faces(t)
        used = np.bincount(t.ravel(), minlength=p.shape[0]) > 0
        if not used.all():
            unused = np.flatnonzero(~used)
            self._cache["unused"] = _readonly(unused.astype(t.dtype))
            warnings.warn(
                f"{unused.size} of {p.shape[0]} points belong to no {CELL_WORDS[dim][1]} "
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
        # tetrahedra a generator stored with their last two points swapped (for a
        # positive orientation) against the point order refinement should start
        # from; None: start from the stored order (see hatkernels.mesh.refine3d)
        self._stored_swapped = None
        self._tags = None  # a hatkernels.mesh.tags.MeshTags, or None

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
        check_edge_sharing(self)

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
        """The cells of a 2-D mesh (an alias of :attr:`cells`); an InputError in 3-D."""
        self._need(2, "triangles", "use .cells or .tetrahedra")
        return self._triangles

    @property
    def tetrahedra(self):
        """The cells of a 3-D mesh (an alias of :attr:`cells`); an InputError in 2-D."""
        self._need(3, "tetrahedra", "use .cells or .triangles")
        return self._triangles

    @property
    def dim(self):
        """The space dimension: 2 (points in the plane, triangles) or 3 (tetrahedra)."""
        return self._points.shape[1]

    def _need(self, dim, name, hint=None):
        """Refuse ``name`` on a mesh of the other dimension, with an InputError."""
        if self.dim != dim:
            raise InputError(
                f"Mesh.{name} is not available for "
                f"{CELL_WORDS[self.dim][0]}{' yet' if hint is None else ''}"
                + (f": {hint}" if hint else ""))

    @property
    def n_cells(self):
        return self._triangles.shape[0]

    @property
    def n_points(self):
        return self._points.shape[0]

    @property
    def n_triangles(self):
        self._need(2, "n_triangles", "use .n_cells")
        return self._triangles.shape[0]

    @property
    def tags(self):
        """The region and boundary tags (:class:`hatkernels.mesh.tags.MeshTags`), or None."""
        return self._tags

    @property
    def regions(self):
        """The region tag of each cell, (n_cells,) int32 read-only, or None when untagged."""
        return None if self._tags is None else self._tags.regions

    def with_tags(self, regions=None, sides=None, side_tags=None, region_names=None,
                  side_names=None):
        """A mesh with the same points and cells (shared, not copied) carrying these tags.

        ``regions``: one integer per cell; ``sides``: boundary sides ((k, 2) edges or
        (k, 3) faces, points in any order) with ``side_tags`` one integer each;
        ``region_names`` and ``side_names``: dicts of name -> tag.  The tags replace
        any this mesh has (this mesh is not changed).  Raises MeshError naming the
        cell, side or tag at fault (see :func:`hatkernels.mesh.tags.check_tags`).

        >>> from hatkernels.mesh import rectangle
        >>> m = rectangle(2, 1).with_tags(regions=[1, 1, 2, 2], region_names={"steel": 2})
        >>> m.tags.region_label(2), m.tags.region_tag("steel")
        ('steel (2)', 2)
        """
        new = type(self).__new__(type(self))
        new.__dict__.update(self.__dict__)
        new._cache = dict(self._cache)
        new._tags = check_tags(self, regions, sides, side_tags, region_names, side_names)
        return new

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
        return f"Mesh({self.n_points} points, {self.n_cells} {CELL_WORDS[self.dim][0]}{extra})"

    def unused_points(self):
        """Points that belong to no cell, sorted."""
        if "unused" not in self._cache:
            used = np.bincount(self._triangles.ravel(), minlength=self.n_points) > 0
            self._cache["unused"] = _readonly(np.flatnonzero(~used).astype(self._triangles.dtype))
        return self._cache["unused"]

    def measures(self):
        """Measure of each cell (area in 2-D, volume in 3-D), shape (n_cells,), positive."""
        return self.areas() if self.dim == 2 else self.volumes()

    def volumes(self):
        """Volume of each tetrahedron, shape (n_tetrahedra,), float64, positive."""
        self._need(3, "volumes()", "use measures() or areas()")
        if "volumes" not in self._cache:
            v = _tet.six_volumes(self._points, self._triangles)
            v /= 6.0
            self._cache["volumes"] = _readonly(v)
        return self._cache["volumes"]

    def areas(self):
        """Area of each triangle, shape (n_triangles,)."""
        self._need(2, "areas()", "use measures() or volumes()")
        if "areas" not in self._cache:
            a = np.empty(self.n_triangles)
            _jit_geometry.double_areas(self._points, self._triangles, a)
            if not (np.abs(a) >= np.finfo(np.float64).tiny).all():  # refined below float64's range
                scaled_areas(self._points, self._triangles, DEGENERATE_TOL)
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
        self._need(2, "edges()")
        if "edges" not in self._cache or "triangle_edges" not in self._cache:
            tri = self._triangles_for_topology()
            ptr, codes = self._incidence()
            outgoing = np.bincount(self.boundary_edges()[:, 0], minlength=self.n_points)
            indptr, indices, diag = csr_pattern(tri, ptr, codes, outgoing=outgoing)
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
        self._need(2, "triangle_edges()")
        return self._edge_topology()[1]

    def boundary_edges(self):
        """Edges that belong to one triangle only, shape (n_boundary_edges, 2).

        Each is oriented as in its triangle, so the domain lies on its left
        (outer boundaries run counterclockwise, holes clockwise); sorted by
        first point, then second.
        """
        self._need(2, "boundary_edges()", "use boundary_faces()")
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
            sides = self.boundary_edges() if self.dim == 2 else self.boundary_faces()
            points = index_union(self.n_points, sides.ravel())
            self._cache["boundary_points"] = _readonly(points.astype(self._triangles.dtype))
        return self._cache["boundary_points"]

    def boundary_length(self):
        """Total length of the boundary edges."""
        self._need(2, "boundary_length()")
        b = self.boundary_edges()
        return float(np.linalg.norm(self._points[b[:, 1]] - self._points[b[:, 0]], axis=1).sum())

    def h(self):
        """Longest edge length in the mesh (the mesh size)."""
        longest = longest_edge_sq if self.dim == 2 else _tet.longest_edge_sq
        return float(np.sqrt(longest(self._points, self._triangles).max()))

    # -- faces of tetrahedra -------------------------------------------------------

    def _face_topology(self):
        self._need(3, "faces()", "triangles have edges: use edges()")
        if "faces" not in self._cache:
            faces, cell_faces, boundary = _tet.face_topology(self._triangles)
            self._cache["faces"] = _readonly(faces)
            self._cache["cell_faces"] = _readonly(cell_faces)
            self._cache["boundary_faces"] = _readonly(boundary)
        return self._cache["faces"], self._cache["cell_faces"], self._cache["boundary_faces"]

    def faces(self):
        """Unique faces of the tetrahedra ``(i, j, k)`` with ``i < j < k``, sorted,
        shape (n_faces, 3)."""
        return self._face_topology()[0]

    def cell_faces(self):
        """Number (row of :meth:`faces`) of the face opposite each local vertex,
        shape (n_tetrahedra, 4)."""
        return self._face_topology()[1]

    def boundary_faces(self):
        """Faces that belong to one tetrahedron only, shape (n_boundary_faces, 3).

        Each is oriented outward: seen from outside the mesh its points run
        counterclockwise (the right-hand normal ``(x1 - x0) x (x2 - x0)`` points
        out), starting from its smallest point.  Rows come in the order of their
        sorted point triples.  A refined mesh has them from its coarse mesh's
        (:meth:`refine`), without the fine mesh's faces.
        """
        if "boundary_faces" in self._cache:
            self._need(3, "boundary_faces()", "use boundary_edges()")
            return self._cache["boundary_faces"]
        return self._face_topology()[2]

    # -- the cache -----------------------------------------------------------------

    def cached(self):
        """Names of the derived arrays the mesh holds now, a frozenset (see :data:`CACHEABLE`).

        >>> from hatkernels.mesh import rectangle
        >>> m = rectangle(2, 2)
        >>> _ = m.edges()
        >>> sorted(m.cached())
        ['boundary_edges', 'edges', 'incidence', 'triangle_edges']
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
        """Uniform refinement: each cell split by its edge midpoints, a triangle into four,
        a tetrahedron into eight (J. Bey's rule, shapes bounded over any number of levels).

        The result is nested: it has this mesh's points and one more at the
        middle of each edge; :attr:`refinement` holds this mesh and the maps
        from coarse points and edges to fine points (see :class:`Refinement`).
        The children of cell ``t`` are cells ``4t .. 4t+3`` (triangles) or
        ``8t .. 8t+7`` (tetrahedra).
        """
        return _refine(self)

    def reorder(self, method="rcm"):
        """Renumber points and cells for locality; see :func:`hatkernels.mesh.reorder`."""
        return _reorder(self, method)

    def quality(self):
        """Shape measures: angles, areas and aspect ratios of triangles
        (:class:`hatkernels.mesh.MeshQuality`); dihedral angles, volumes and radius
        ratios of tetrahedra (:class:`hatkernels.mesh.TetrahedronQuality`)."""
        return _quality(self) if self.dim == 2 else tetrahedron_quality(self)

    def components(self):
        """``(count, labels)``: connected parts and each point's part (-1: in no cell);
        see :func:`hatkernels.mesh.components.point_components`."""
        return point_components(self)
