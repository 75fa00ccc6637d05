"""Where the values of a never-stored refined mesh live: the coarse topology the patch
kernels read, the levels' vector sizes, and the conversions to and from the numbering of
``mesh.refine()`` repeated ``k`` times.

See :mod:`hatkernels._jit.patches` for the vector layout (cell insides, then coarse edge
insides, then coarse vertices).  All arrays here are of the coarse mesh's size; no fine
index array and no fine coordinate is ever stored.
"""

from __future__ import annotations

import numpy as np

from hatkernels._jit import patch_points as _pp
from hatkernels._jit import patches as _p
from hatkernels.checks import integer_option, into_vectors
from hatkernels.distributed.finenumbers import fine_numbering
from hatkernels.errors import InputError

__all__ = ["PatchLayout", "RefinedMeshOnDemand"]

class PatchLayout:
    """The coarse triangle mesh ``coarse`` seen as patches refined ``k`` times.

    Parameters
    ----------
    coarse : Mesh
        A triangle mesh (2-D).
    k : int
        Refinements (``n = 2**k`` fine edges per coarse edge).
    held_sides : ndarray (s, 2), optional
        Coarse sides (pairs of point indices) whose fine points are held
        (Dirichlet); their end points are held too.

    Attributes
    ----------
    topo : tuple of int64 arrays
        What the kernels read (see :mod:`hatkernels._jit.patches`).
    held_e, held_v : bool arrays
        Held coarse edges and vertices.
    """

    def __init__(self, coarse, k, held_sides=None):
        k = integer_option(k, "k (refinements)", minimum=0)
        if coarse.dim != 2:
            raise InputError("the patch path takes triangle meshes (2-D); tetrahedra use the "
                             "stored refinement")
        self.coarse, self.k = coarse, int(k)
        tri = coarse.triangles.astype(np.int64)
        m = tri.shape[0]
        edges, tri_edges = coarse._edge_topology()
        # local edges: 0 = A->B (opposite C), 1 = A->C (opposite B), 2 = B->C (opposite A)
        cell_edge = np.ascontiguousarray(tri_edges[:, [2, 1, 0]], dtype=np.int64)
        # edges numbered by first use in the cells: a cell's edges (their values, their
        # lookups) sit near its neighbours', so a pass over the cells reads them in order
        flat = cell_edge.reshape(-1)
        first_use = np.full(len(edges), flat.size, dtype=np.int64)
        np.minimum.at(first_use, flat, np.arange(flat.size))
        renumber = np.empty(len(edges), dtype=np.int64)
        renumber[np.argsort(first_use, kind="stable")] = np.arange(len(edges))
        cell_edge = np.ascontiguousarray(renumber[cell_edge])
        edge_v = np.empty((len(edges), 2), dtype=np.int64)
        edge_v[renumber] = edges
        start = tri[:, [0, 0, 1]]
        cell_flip = (start != edge_v[cell_edge, 0]).astype(np.int64)
        n_edges = edge_v.shape[0]
        flat_e = cell_edge.reshape(-1)
        order = np.lexsort((np.repeat(np.arange(m), 3), flat_e))
        edge_cells = np.full((n_edges, 2), -1, dtype=np.int64)
        edge_le = np.full((n_edges, 2), -1, dtype=np.int64)
        counts = np.bincount(flat_e, minlength=n_edges)
        first = np.zeros(n_edges + 1, dtype=np.int64)
        np.cumsum(counts, out=first[1:])
        rank = np.arange(order.size) - first[flat_e[order]]
        edge_cells[flat_e[order], rank] = order // 3
        edge_le[flat_e[order], rank] = order % 3
        flat_v = tri.reshape(-1)
        vorder = np.lexsort((np.repeat(np.arange(m), 3), flat_v))
        vptr = np.zeros(coarse.n_points + 1, dtype=np.int64)
        np.cumsum(np.bincount(flat_v, minlength=coarse.n_points), out=vptr[1:])
        self.topo = (tri, cell_edge, cell_flip, edge_v, edge_cells, edge_le, vptr,
                     np.ascontiguousarray(vorder // 3), np.ascontiguousarray(vorder % 3))
        self.n_cells, self.n_edges, self.n_vertices = m, n_edges, coarse.n_points
        self._shared = None
        self.held_e = np.zeros(n_edges, dtype=bool)
        self.held_v = np.zeros(coarse.n_points, dtype=bool)
        if held_sides is not None and len(held_sides):
            self.held_e[self.edge_index(held_sides, "held side")] = True
            self.held_v[np.asarray(held_sides, dtype=np.int64).reshape(-1)] = True

    def edge_index(self, sides, what="side"):
        """The coarse edge number of each side ``(a, b)`` (points in either order)."""
        sides = np.sort(np.asarray(sides, dtype=np.int64).reshape(-1, 2), axis=1)
        n_points = self.coarse.n_points
        keys = np.sort(self.topo[3], axis=1) @ np.array([n_points, 1])
        by_key = np.argsort(keys)
        want = sides @ np.array([n_points, 1])
        pos = np.minimum(np.searchsorted(keys[by_key], want), len(keys) - 1)
        bad = keys[by_key][pos] != want
        if bad.any():
            s = sides[np.flatnonzero(bad)[0]]
            raise InputError(f"{what} ({s[0]}, {s[1]}) is not an edge of the coarse mesh")
        return by_key[pos]

    def edge_points(self, x, level=None):
        """The view of ``x`` (on ``level``, default the finest) at the points inside the
        coarse edges: (n_edges, 2**level - 1), each row in its edge's own direction."""
        level = self.k if level is None else level
        n = 2**level
        inside = self.n_cells * ((n - 1) * (n - 2) // 2)
        return x[inside:inside + self.n_edges * (n - 1)].reshape(self.n_edges, n - 1)

    def vertex_points(self, x):
        """The view of ``x`` at the coarse vertices (the last ``n_vertices`` entries)."""
        return x[x.shape[0] - self.n_vertices:]

    def _checked(self, method, level, inputs=None, outputs=None):
        """``(level, inputs)``: ``level`` (default the finest) and the vectors of ``method``
        checked by ``hatkernels.checks.into_vectors``: of ``level``'s size, inputs read
        only (copied unless they are writable C-contiguous float64), outputs
        written in place (writable, C-contiguous, float64 or float32: the multigrid's
        single-precision levels; sharing no memory with an input)."""
        level = self.k if level is None else integer_option(level, "level", minimum=0)
        return level, into_vectors(f"PatchLayout.{method}", self.size(level), inputs, outputs,
                                   single=True,
                                   size=f"level {level} of this layout has {{:,}} points")

    def zero_held(self, x, level=None, others=False):
        """``x = 0`` at the held points of ``level`` (default the finest), in place; with
        ``others``, at every point but the held ones.  Returns ``x``."""
        level, _ = self._checked("zero_held", level, outputs={"x": x})
        held_e, held_v = (~self.held_e, ~self.held_v) if others else (self.held_e, self.held_v)
        _p.held_points(x, x, 2**level, self.topo, held_e, held_v, _p.ZERO)
        return x

    def copy_held(self, src, dst, level=None):
        """``dst = src`` at the held points of ``level`` (default the finest); returns
        ``dst`` (``src`` read only, ``dst`` a separate array: see ``_checked``)."""
        level, (src,) = self._checked("copy_held", level, {"src": src}, {"dst": dst})
        _p.held_points(src, dst, 2**level, self.topo, self.held_e, self.held_v, _p.COPY)
        return dst

    def size(self, level):
        """Values on ``level`` (``n = 2**level``): every fine point once."""
        n = 2**level
        return (self.n_cells * ((n - 1) * (n - 2) // 2) + self.n_edges * (n - 1)
                + self.n_vertices)

    def buffers(self, level):
        """The per-cell buffers of shared rows for ``level``: views into one pair of arrays
        sized for the finest level, shared by every level and operator of this layout (no
        two kernels run at once, and none uses two levels' buffers)."""
        if self._shared is None:
            n = 2**self.k
            self._shared = (np.empty(self.n_cells * 3 * (n - 1)), np.empty((self.n_cells, 3)))
        flat, pv = self._shared
        width = 2**level - 1
        return flat[: self.n_cells * 3 * width].reshape(self.n_cells, 3, width), pv

    # -- the numbering of mesh.refine() repeated k times ---------------------------------

    def refined_mesh(self, level=None):
        """``coarse.refine()`` repeated ``level`` times (default the finest), built and
        stored: what the patch path saves, for a caller who wants the mesh after all."""
        level = self.k if level is None else integer_option(level, "level", minimum=0)
        mesh = self.coarse
        for _ in range(level):
            mesh = mesh.refine()
        return mesh

    def _numbering(self, level):
        """What :func:`hatkernels._jit.patch_points.to_numbered` needs for ``level``."""
        n = 2**level
        numbering = fine_numbering(self.coarse, level)
        lam, masks, before = numbering.patterns[False][:3]
        pos = lam[:, 2] * (n + 1) - (lam[:, 2] * (lam[:, 2] - 1)) // 2 + lam[:, 1]
        return (np.ascontiguousarray(pos, dtype=np.int64),
                np.ascontiguousarray(masks, dtype=np.int64),
                np.ascontiguousarray(before, dtype=np.int64),
                np.ascontiguousarray(numbering.owns), numbering.offset)

    def to_refined(self, x, level=None, out=None):
        """``x`` (this layout, on ``level``, default the finest) in the numbering of
        ``coarse.refine()`` repeated ``level`` times (a few ns per point: each coarse cell
        writes the points it owns)."""
        level, (x,) = self._checked("to_refined", level, {"x": x},
                                    None if out is None else {"out": out})
        if out is None:
            out = np.empty(self.size(level))
        _pp.to_numbered(x, 2**level, self.topo, *self._numbering(level), out, False)
        return out

    def from_refined(self, u, level=None):
        """The inverse of :meth:`to_refined`."""
        level, (u,) = self._checked("from_refined", level, {"u": u})
        x = np.empty(self.size(level))
        _pp.to_numbered(x, 2**level, self.topo, *self._numbering(level), u, True)
        return x

    def patch(self, x, cell, level=None):
        """``(lam, values)``: the values of ``x`` on coarse ``cell``'s lattice, with their
        integer barycentric coordinates (rows summing to ``2**level``, on the cell's
        points 0, 1, 2): the solution per patch when the whole array would not fit."""
        level, (x,) = self._checked("patch", level, {"x": x})
        n = 2**level
        if not 0 <= int(cell) < self.n_cells:
            raise InputError(f"cell {cell} is not a coarse cell (0..{self.n_cells - 1})")
        lam = np.array([(n - i - j, i, j) for j in range(n + 1) for i in range(n + 1 - j)],
                       dtype=np.int64)
        loc = np.empty((1, (n + 1) * (n + 2) // 2))
        _pp.gather_patches(x, np.array([int(cell)], dtype=np.int64), n, self.topo, loc)
        return lam, loc[0]


class RefinedMeshOnDemand:
    """For results made on patches: ``mesh``, the refined mesh of ``self.layout``, built
    on first use (it costs what the patch path saves) and kept; it may be set.  Refused
    (InputError) before anything is built when the refined meshes would not fit in the
    memory available; ``layout.refined_mesh()`` builds them unchecked."""

    _mesh = None

    @property
    def mesh(self):
        if self._mesh is None:
            from hatkernels.memory import check_refine_memory

            lay = self.layout
            check_refine_memory(
                lay.coarse, lay.k,
                "the solution is in .values (the patch layout, every fine point once) and "
                "per coarse cell in .patch(cell); .layout.refined_mesh() builds the meshes "
                "unchecked")
            self._mesh = lay.refined_mesh()
        return self._mesh

    @mesh.setter
    def mesh(self, value):
        self._mesh = value

