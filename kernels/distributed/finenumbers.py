"""The numbers the serial ``mesh.refine()`` repeated k times gives the fine points, found
from the coarse mesh alone, for any set of coarse cells.

Uniform refinement keeps the children of coarse cell ``t`` together: after k
refinements they are fine cells ``t * c**k .. (t + 1) * c**k - 1`` (``c`` = 4
children per triangle, 8 per tetrahedron), in the order that refining the
cell *alone* k times gives them, and fine points are numbered by their first
appearance in the fine cells.  So a fine point first appears among the children
of the lowest-numbered coarse cell that contains it (its *owner cell*), and its
number is

    offset[owner] + (its rank among the owner's own points, in first-appearance order)

where ``offset`` is the running count of points owned by the coarse cells before
it.  A fine point of cell ``t`` is a lattice point: integer barycentric
coordinates ``lam`` (summing to ``2**k``) on the cell's vertices, the same
lattice for every cell; the first-appearance order on it is that of one
reference cell refined k times (two orders for tetrahedra, for cells stored
with their last two points swapped against Bey's order, see
:mod:`hatkernels.mesh.refine3d`).  The point's place in the coarse mesh (a
vertex, edge, face or the inside of a cell) is the set of vertices where
``lam > 0``; its owner cell is the lowest cell containing them all.

Everything here costs the coarse mesh plus the asked-for cells' fine points;
no rank ever builds the fine global mesh.  :func:`fine_numbers` is checked
against the serial refinement entry by entry in the tests.
"""

from __future__ import annotations

import functools
import itertools

import numpy as np

from hatkernels.checks import integer_option
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh, index_dtype
from hatkernels.mesh.refine3d import _swapped

__all__ = ["FineNumbering", "fine_numbering", "lattice_order", "lattice_parents",
           "partition_coarse_cells", "refined_subdomain"]


@functools.lru_cache(maxsize=16)
def _reference(dim, k, swapped):
    """One cell with corners at 0 and ``2**k`` times the unit vectors, refined ``k`` times
    (stored swapped against Bey's order when ``swapped``, in 3-D)."""
    corners = np.vstack([np.zeros(dim), 2**k * np.eye(dim)])
    ref = Mesh._trusted(corners, np.arange(dim + 1)[None, :])
    if dim == 3:
        ref._stored_swapped = np.array([bool(swapped)])
    for _ in range(k):
        ref = ref.refine()
    return ref


@functools.lru_cache(maxsize=16)
def lattice_order(dim, k, swapped=False):
    """``(lam, cells)``: the lattice points of one cell refined ``k`` times in
    first-appearance order, as integer barycentric coordinates (n, dim + 1), and the
    fine cells in those point numbers (c**k, dim + 1), read-only."""
    n = 2**k
    ref = _reference(dim, k, swapped)
    x = np.rint(ref.points).astype(np.int64)
    lam = np.column_stack([n - x.sum(axis=1), x])
    for a in (lam, ref.cells):
        a.setflags(write=False)
    return lam, ref.cells


@functools.lru_cache(maxsize=16)
def lattice_parents(dim, k, swapped=False):
    """For each lattice point of one cell refined ``k >= 1`` times (the order of
    :func:`lattice_order`), the two points of the cell refined ``k - 1`` times whose
    mean it is, as indices into that order: ``(n, 2)``, both the same for a point
    that is already a point one level down.  Read from the refinement itself, so a
    point in the middle of Bey's octahedron gets the ends of the diagonal that is
    really an edge."""
    ref = _reference(dim, k, swapped)
    r = ref.refinement
    out = np.empty((ref.n_points, 2), dtype=np.int64)
    out[r.coarse_points] = np.arange(r.coarse.n_points)[:, None]
    out[r.midpoints] = r.edge_points
    out.setflags(write=False)
    return out


def _owner_cells(cells):
    """``owner[t, mask]``: the lowest cell containing the vertices of cell ``t`` picked by
    ``mask`` (column 0 unused), shape (n_cells, 2**(dim+1))."""
    m, width = cells.shape
    owner = np.zeros((m, 2**width), dtype=np.int64)
    ids = np.arange(m, dtype=np.int64)
    for size in range(1, width + 1):
        combos = list(itertools.combinations(range(width), size))
        masks = [sum(1 << j for j in combo) for combo in combos]
        if size == width:
            owner[:, masks[0]] = ids
            continue
        # every entity of this size (vertex, edge, face) as the sorted points of it, from
        # all the cells' vertex combinations together: an entity sits at different local
        # positions in different cells
        key = np.concatenate([np.sort(cells[:, list(c)].astype(np.int64), axis=1)
                              for c in combos])
        _, inverse = np.unique(key, axis=0, return_inverse=True)
        inverse = inverse.reshape(-1)
        low = np.full(inverse.max() + 1, m, dtype=np.int64)
        np.minimum.at(low, inverse, np.tile(ids, len(combos)))
        for j, mask in enumerate(masks):
            owner[:, mask] = low[inverse[j * m:(j + 1) * m]]
    return owner


class FineNumbering:
    """The serial fine numbering of ``coarse`` refined ``k`` times (see the module notes).

    Attributes
    ----------
    coarse : Mesh
    k : int
    n_fine : int
        Number of fine points (as ``coarse.refine()`` k times has).
    offset : ndarray (n_cells + 1,)
        First fine number of the points each coarse cell owns.
    """

    def __init__(self, coarse, k):
        self.coarse, self.k, self.dim = coarse, k, coarse.dim
        cells = coarse.cells.astype(np.int64)
        self.owner = _owner_cells(cells)
        self.swapped = (_swapped(coarse) if self.dim == 3
                        else np.zeros(coarse.n_cells, dtype=bool))
        self.patterns = {}
        for flag in (False, True):
            if self.dim == 2 and flag:
                continue
            lam, _ = lattice_order(self.dim, k, flag)
            masks = ((lam > 0) << np.arange(self.dim + 1)).sum(axis=1)
            before = np.zeros((len(lam) + 1, 2 ** (self.dim + 1)), dtype=np.int64)
            before[np.arange(1, len(lam) + 1), masks] = 1
            before = np.cumsum(before, axis=0)[:-1]  # [i, mask]: points before i with mask
            key = _lattice_key(lam, 2**k)
            order = np.argsort(key)
            self.patterns[flag] = (lam, masks, before, key[order], order)
        owns = self.owner == np.arange(coarse.n_cells)[:, None]
        owns[:, 0] = False
        per_mask = np.bincount(self.patterns[False][1], minlength=2 ** (self.dim + 1))
        counts = owns.astype(np.int64) @ per_mask
        self.owns = owns
        self.offset = np.zeros(coarse.n_cells + 1, dtype=np.int64)
        np.cumsum(counts, out=self.offset[1:])
        self.n_fine = int(self.offset[-1])

    def point_owner_cells(self, numbers):
        """The owner coarse cell of each fine point number (the cell whose range holds it)."""
        return np.searchsorted(self.offset, np.asarray(numbers, dtype=np.int64), side="right") - 1

    def fine_cells(self, cells, num=None):
        """``(ids, cells)``: the serial numbers of the fine cells of coarse ``cells`` (each
        coarse cell's ``c**k`` children, in order) and their points' fine numbers
        (``num``: :meth:`numbers` of ``cells``, when the caller has it already)."""
        cells = np.asarray(cells, dtype=np.int64)
        num = self.numbers(cells) if num is None else num
        per = (4 if self.dim == 2 else 8) ** self.k
        out = np.empty((len(cells), per, self.dim + 1), dtype=np.int64)
        for flag in self.patterns:
            rows = np.flatnonzero(self.swapped[cells] == flag)
            _, pc = lattice_order(self.dim, self.k, flag)
            out[rows] = num[rows][:, pc.reshape(-1)].reshape(len(rows), per, self.dim + 1)
        ids = (cells[:, None] * per + np.arange(per)[None, :]).reshape(-1)
        return ids, out.reshape(-1, self.dim + 1)

    def coordinates(self, cells):
        """Coordinates (len(cells), n_lattice, dim) of coarse ``cells``' lattice points, in
        the order of :meth:`numbers`."""
        cells = np.asarray(cells, dtype=np.int64)
        x = self.coarse.points[self.coarse.cells[cells]]  # (m, d+1, d)
        out = np.empty((len(cells), len(self.patterns[False][0]), self.dim))
        for flag, (lam, *_rest) in self.patterns.items():
            rows = np.flatnonzero(self.swapped[cells] == flag)
            out[rows] = np.einsum("ij,mjd->mid", lam / 2.0**self.k, x[rows])
        return out

    def numbers(self, cells):
        """Fine numbers of the lattice points of coarse ``cells``: (len(cells), n_lattice),
        row ``j`` in the first-appearance order of cell ``cells[j]``'s own pattern."""
        cells = np.asarray(cells, dtype=np.int64)
        out = np.empty((len(cells), len(self.patterns[False][0])), dtype=np.int64)
        for flag, (lam, masks, *_unused) in self.patterns.items():
            rows = np.flatnonzero(self.swapped[cells] == flag)
            if not rows.size:
                continue
            t = cells[rows]
            owner = self.owner[t][:, masks]  # (r, n_lattice)
            out[rows] = self._numbers_in(t, owner, lam, flag)
        return out

    def _numbers_in(self, t, owner, lam, flag):
        """Numbers for cells ``t`` (one pattern) whose points' owner cells are ``owner``.

        Most points are owned by the cell itself (its inside, and the sides it is the
        lowest cell of): their place in the owner's pattern is their own.  Only the
        others are mapped to their owner's vertex order, point by point.
        """
        result = np.empty(owner.shape, dtype=np.int64)
        before_t = self.patterns[flag][2]
        own = owner == t[:, None]
        r, i = np.nonzero(own)
        result[r, i] = self.offset[t[r]] + self._rank(before_t, i, t[r])
        r, i = np.nonzero(~own)
        if not r.size:
            return result
        o = owner[r, i]
        # the point's coordinates in the owner's vertex order
        verts = self.coarse.cells
        vt = verts[t[r]]
        vo = verts[o]
        lam_t = lam[i]
        lam_o = np.zeros_like(lam_t)
        for j in range(lam.shape[1]):  # vertex j of the cell is vertex q of the owner
            for q in range(lam.shape[1]):
                hit = vt[:, j] == vo[:, q]
                lam_o[hit, q] = lam_t[hit, j]
        del vt, vo, lam_t
        o_flag = self.swapped[o]
        number = np.empty(len(o), dtype=np.int64)
        for f, (_, _, before, keys, order) in self.patterns.items():
            sel = np.flatnonzero(o_flag == f)
            want = _lattice_key(lam_o[sel], 2**self.k)
            pos = np.searchsorted(keys, want)
            if (pos >= len(keys)).any() or (keys[np.minimum(pos, len(keys) - 1)] != want).any():
                raise RuntimeError("fine_numbering: a lattice point is missing from its "
                                   "owner's pattern")  # cannot happen on a conforming mesh
            number[sel] = self.offset[o[sel]] + self._rank(before, order[pos], o[sel])
        result[r, i] = number
        return result

    def _rank(self, before, place, cells):
        """The owned points of ``cells`` that come before ``place`` in their pattern."""
        rank = np.zeros(len(place), dtype=np.int64)
        for m in range(1, before.shape[1]):  # one subset of the cell's points at a time
            rank += before[place, m] * self.owns[cells, m]
        return rank


def _lattice_key(lam, n):
    """One int64 per barycentric row (each entry 0..n)."""
    base = np.int64(n + 1)
    key = np.zeros(len(lam), dtype=np.int64)
    for j in range(lam.shape[1]):
        key = key * base + lam[:, j]
    return key


def fine_numbering(coarse, k):
    """The :class:`FineNumbering` of ``coarse`` refined ``k`` times (k >= 0)."""
    if k < 0:
        raise InputError(f"refine must be >= 0, got {k}")
    return FineNumbering(coarse, k)


def partition_coarse_cells(coarse, parts, k, *, numbering=None):
    """Owner part of each coarse cell: recursive coordinate bisection of the cells'
    centroids, weighted by the fine points each cell owns after ``k`` refinements, so that
    every part owns about as many fine points.  Every part gets at least one cell."""
    from types import SimpleNamespace

    from hatkernels.distributed.partition import _rcb

    parts = integer_option(parts, "parts", minimum=1)
    if parts > coarse.n_cells:
        raise InputError(f"cannot split {coarse.n_cells} coarse cells into {parts} parts: "
                         f"every part needs a cell (refine the coarse mesh first)")
    fn = numbering or fine_numbering(coarse, k)
    centroids = coarse.points[coarse.cells].mean(axis=1)
    w = np.diff(fn.offset).astype(np.float64)
    return _rcb(SimpleNamespace(points=centroids, n_points=coarse.n_cells), parts, w)


def refined_subdomain(coarse, k, cell_owner, part, *, numbering=None):
    """One part's :class:`~hatkernels.distributed.Subdomain` of ``coarse`` refined ``k``
    times, built from the coarse mesh and the part's own cells only.

    A fine point belongs to the part that owns its owner cell (the lowest coarse cell
    containing it); the local mesh is every fine cell with an owned point, in ascending
    serial number, and the numbers are those of the serial refinement, so the
    subdomain is the one :func:`~hatkernels.distributed.subdomain` cuts from the
    serially refined mesh with that ownership, array for array.  Costs the coarse
    mesh plus the fine cells of the part's coarse cells and of their neighbours.
    """
    from hatkernels.distributed.subdomain import Subdomain, _send_lists

    fn = numbering or fine_numbering(coarse, k)
    cell_owner = np.asarray(cell_owner, dtype=np.int64)
    if cell_owner.shape != (coarse.n_cells,):
        raise InputError(f"cell_owner must hold one part per coarse cell ({coarse.n_cells},), "
                         f"got shape {cell_owner.shape}")
    parts = int(cell_owner.max()) + 1
    part = integer_option(part, "part", minimum=0, maximum=parts - 1)
    mine = np.flatnonzero(cell_owner == part)
    # every coarse cell sharing a point with mine: the fine cells around my points
    near = np.zeros(coarse.n_points, dtype=bool)
    near[coarse.cells[mine].ravel()] = True
    cand = np.flatnonzero(near[coarse.cells].any(axis=1))
    ids, fine = fn.fine_cells(cand)
    owner_cell = fn.point_owner_cells(fine)
    owned_pt = cell_owner[owner_cell] == part
    keep = owned_pt.any(axis=1)
    ids, fine, owner_cell = ids[keep], fine[keep], owner_cell[keep]
    present, inverse = np.unique(fine, return_inverse=True)
    inverse = inverse.reshape(fine.shape)
    p_owner = cell_owner[fn.point_owner_cells(present)]
    is_owned = p_owner == part
    owned = present[is_owned]
    ghosts = present[~is_owned]
    g_owner = p_owner[~is_owned]
    order = np.argsort(g_owner, kind="stable")
    ghosts, g_owner = ghosts[order], g_owner[order]
    points = np.concatenate([owned, ghosts])
    local_of = np.empty(len(present), dtype=np.int64)  # position in present -> local number
    local_of[np.flatnonzero(is_owned)] = np.arange(len(owned))
    local_of[np.flatnonzero(~is_owned)[order]] = len(owned) + np.arange(len(ghosts))
    dt = index_dtype(len(points))
    lcells = local_of[inverse].astype(dt)
    # coordinates: from each coarse cell's lattice, first occurrence per point
    coords = np.empty((len(points), coarse.dim))
    num = fn.numbers(cand)
    xyz = fn.coordinates(cand)
    where = np.searchsorted(present, num.ravel())
    inside = (where < len(present)) & (present[np.minimum(where, len(present) - 1)]
                                       == num.ravel())
    coords[local_of[where[inside]]] = xyz.reshape(-1, coarse.dim)[inside]
    lmesh = Mesh._trusted(coords, lcells)
    ghost_owner = g_owner.astype(np.int32)
    neighbours = np.unique(ghost_owner)
    recv_offsets = np.searchsorted(ghost_owner, np.append(neighbours, parts))
    send = _send_lists(lmesh.cells, len(owned), ghost_owner, neighbours, len(points))
    for a in (points, ids, ghost_owner, neighbours, recv_offsets, *send):
        a.setflags(write=False)
    return Subdomain(part=part, parts=parts, points=points, n_owned=len(owned), cells=ids,
                     mesh=lmesh, ghost_owner=ghost_owner, neighbours=neighbours,
                     recv_offsets=recv_offsets, send=send)
