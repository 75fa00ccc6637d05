"""One rank's part of a refined level, built from the coarse mesh alone, and where the
boundary conditions hold on it.

Every rank holds the coarse mesh (small).  Its cells are split among the ranks
(:func:`~hatkernels.distributed.finenumbers.partition_coarse_cells`); on every
level ``j = 1 .. k`` a rank builds its :class:`LevelPart`: the fine points it
owns (those whose owner cell, the lowest coarse cell containing them, is one
of its cells), the fine cells of its own coarse cells and every fine cell
touching an owned point, and the ghost points they bring, all numbered as the
serial ``mesh.refine()`` repeated ``j`` times numbers them
(:mod:`~hatkernels.distributed.finenumbers`).  Ghost lists are agreed on once
by an all-to-all of the global numbers each rank needs from each other.

:func:`points_on` and :func:`fine_sides_on` find a level's points and sides on
given coarse sides (held values, fluxes, convection) from where each point
sits in the coarse mesh.
"""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np

from hatkernels.distributed.finenumbers import fine_numbering, lattice_order
from hatkernels.distributed.halo import HaloPattern
from hatkernels.mesh.core import Mesh, index_dtype
from hatkernels.mesh.tags import MeshTags

__all__ = ["LevelPart", "build_level", "points_on", "fine_sides_on"]


def _children(dim):
    return 4 if dim == 2 else 8


@dataclasses.dataclass(repr=False)
class LevelPart:
    """One rank's part of level ``level`` (the coarse mesh refined ``level`` times).

    ``points`` are global (serial) numbers, owned ones first (ascending), then
    the ghosts grouped by owning rank; ``cells`` the global numbers of the
    local cells (ascending); ``mesh`` the local mesh (regions from the coarse
    cells); ``where`` (coarse cell, lattice index) of each local point in one
    coarse cell containing it; ``pattern`` the halo.
    """

    level: int
    points: np.ndarray
    n_owned: int
    cells: np.ndarray
    mesh: Mesh
    where_cell: np.ndarray
    where_index: np.ndarray
    ghost_owner: np.ndarray
    pattern: HaloPattern
    numbering: object

    @property
    def n_local(self):
        return len(self.points)

    def lattice(self):
        """Integer barycentric coordinates (n_local, dim + 1), int32, of each local point in
        its ``where_cell`` (scale ``2**level``)."""
        fn = self.numbering
        out = np.empty((self.n_local, fn.dim + 1), dtype=np.int32)
        for flag in fn.patterns:
            rows = np.flatnonzero(fn.swapped[self.where_cell] == flag)
            lam, _ = lattice_order(fn.dim, self.level, flag)
            out[rows] = lam[self.where_index[rows]]
        return out


def _exchange_pattern(points, n_owned, ghost_owner, comm):
    """The :class:`HaloPattern` agreed with the other ranks: each rank tells each owner
    which of its points it needs (global numbers, in the order it stores them)."""
    size, rank = comm.Get_size(), comm.Get_rank()
    ghosts = points[n_owned:]
    want = [ghosts[ghost_owner == q] for q in range(size)]
    asked = comm.alltoall(want)
    owned = points[:n_owned]
    neighbours = sorted({q for q in range(size) if len(want[q])}
                        | {q for q in range(size) if len(asked[q])})
    neighbours = np.array([q for q in neighbours if q != rank], dtype=np.int64)
    dt = index_dtype(len(points))
    send = []
    for q in neighbours:
        ids = np.asarray(asked[q], dtype=np.int64)
        pos = np.searchsorted(owned, ids)
        if ids.size and ((pos >= n_owned) | (owned[np.minimum(pos, n_owned - 1)] != ids)).any():
            raise RuntimeError("halo: a rank asked for a point this rank does not own")
        send.append(pos.astype(dt))
    counts = np.array([len(want[q]) for q in neighbours], dtype=np.int64)
    offsets = np.zeros(len(neighbours) + 1, dtype=np.int64)
    np.cumsum(counts, out=offsets[1:])
    return HaloPattern(n_owned, len(ghosts), neighbours, offsets, tuple(send))


def _lattice_cells(fn, level, cand):
    """Each candidate cell's fine cells as indices into its lattice, by blocks of
    candidates: yields ``(rows, lattice)`` with ``lattice[r, c]`` the ``dim + 1`` lattice
    indices of child ``c`` of candidate ``rows[r]`` (blocks of about 65,536 fine cells,
    so no array of all fine cells' points is made)."""
    pcs = {flag: lattice_order(fn.dim, level, flag)[1] for flag in fn.patterns}
    stack = np.stack([pcs[False], pcs.get(True, pcs[False])])
    flags = fn.swapped[cand].astype(np.intp)
    step = max(1, 2**16 // len(stack[0]))
    for r0 in range(0, len(cand), step):
        rows = np.arange(r0, min(len(cand), r0 + step))
        yield rows, stack[flags[rows]]


def build_level(coarse, level, cell_owner, part, comm, numbering=None):
    """This rank's :class:`LevelPart` of ``coarse`` refined ``level >= 1`` times (collective).

    Works on the candidate coarse cells' lattices (their fine points, one entry per
    cell and lattice point) and on their fine cells by blocks (:func:`_lattice_cells`):
    no array of every fine cell's global point numbers is made.
    """
    fn = numbering or fine_numbering(coarse, level)
    dim = coarse.dim
    per = _children(dim) ** level
    mine = np.flatnonzero(cell_owner == part)
    near = np.zeros(coarse.n_points, dtype=bool)
    near[coarse.cells[mine].ravel()] = True
    cand = np.flatnonzero(near[coarse.cells].any(axis=1))
    num = fn.numbers(cand)  # (candidates, lattice points): global numbers
    owned_lat = cell_owner[fn.point_owner_cells(num)] == part
    own_cell = cell_owner[cand] == part
    # kept: the fine cells of my coarse cells and every fine cell with an owned point;
    # used: the lattice entries that are points of kept cells
    keep = np.empty((len(cand), per), dtype=bool)
    used = np.zeros(num.shape, dtype=bool)
    for rows, lat in _lattice_cells(fn, level, cand):
        k = owned_lat[rows[:, None, None], lat].any(axis=2) | own_cell[rows, None]
        keep[rows] = k
        r, c = np.nonzero(k)
        used[rows[r][:, None], lat[r, c]] = True
    del owned_lat
    present = np.unique(num[used])
    del used
    p_owner = cell_owner[fn.point_owner_cells(present)]
    is_owned = p_owner == part
    ghost_sel = np.flatnonzero(~is_owned)
    order = np.argsort(p_owner[ghost_sel], kind="stable")
    local_of = np.empty(len(present), dtype=np.int64)
    local_of[np.flatnonzero(is_owned)] = np.arange(int(is_owned.sum()))
    n_owned = int(is_owned.sum())
    local_of[ghost_sel[order]] = n_owned + np.arange(len(ghost_sel))
    points = np.empty(len(present), dtype=np.int64)
    points[local_of] = present
    ghost_owner = p_owner[ghost_sel[order]].astype(np.int32)
    del p_owner, is_owned, ghost_sel, order
    # the local number of every lattice entry that is a local point (-1 elsewhere)
    pos = np.minimum(np.searchsorted(present, num), len(present) - 1)
    hit = present[pos] == num
    dt = index_dtype(len(points))
    local = np.where(hit, local_of[pos], -1).astype(dt)
    del pos, local_of, present
    n_cells = int(np.count_nonzero(keep))
    ids = np.empty(n_cells, dtype=index_dtype(coarse.n_cells * per))
    lcells = np.empty((n_cells, dim + 1), dtype=dt)
    at = 0
    for rows, lat in _lattice_cells(fn, level, cand):
        r, c = np.nonzero(keep[rows])
        ids[at: at + len(r)] = cand[rows[r]] * per + c
        lcells[at: at + len(r)] = local[rows[r][:, None], lat[r, c]]
        at += len(r)
    del keep
    # where each local point sits: its first appearance in the candidates' lattices
    flat = np.flatnonzero(hit)
    loc = local.ravel()[flat]
    first = np.unique(loc, return_index=True)[1]
    flat = flat[first]
    loc = loc[first]
    rows, cols = np.divmod(flat, num.shape[1])
    where_cell = np.empty(len(points), dtype=index_dtype(coarse.n_cells))
    where_index = np.empty(len(points), dtype=index_dtype(num.shape[1]))
    where_cell[loc] = cand[rows]
    where_index[loc] = cols
    del num, local, hit, rows, cols
    xyz = np.empty((len(points), dim))
    xyz[loc] = fn.coordinates(cand).reshape(-1, dim)[flat]
    lmesh = Mesh._trusted(xyz, lcells)
    tags = coarse.tags
    if tags is not None and tags.regions is not None:
        lmesh._tags = MeshTags(tags.regions[ids // per], np.empty((0, dim), np.int64),
                               np.empty(0, np.int32), tags.region_names, tags.side_names)
    pattern = _exchange_pattern(points, n_owned, ghost_owner, comm)
    return LevelPart(level, points, n_owned, ids, lmesh, where_cell, where_index, ghost_owner,
                     pattern, fn)


# -- where the boundary conditions hold --------------------------------------------------


def _entity_keys(vertex_sets, n):
    """One int64 key per set of coarse points (rows of sorted points, -1 padded)."""
    key = np.zeros(len(vertex_sets), dtype=np.int64)
    for j in range(vertex_sets.shape[1]):
        key = key * (n + 1) + (vertex_sets[:, j] + 1)
    return key


def _support(coarse, cells, lam):
    """The sorted coarse points (padded with -1) where ``lam > 0``: the entity a lattice
    point lies on (a point, an edge, a face or a cell)."""
    v = np.where(lam > 0, coarse.cells[cells], -1)
    v.sort(axis=1)
    return v[:, ::-1]


def _side_entities(coarse, sides):
    """Keys of every entity (points, edges, the side itself) of the given coarse sides."""
    d = sides.shape[1]
    keys = []
    for size in range(1, d + 1):
        for combo in itertools.combinations(range(d), size):
            sub = np.sort(sides[:, list(combo)].astype(np.int64), axis=1)[:, ::-1]
            pad = np.full((len(sides), d + 1 - size), -1, dtype=np.int64)
            keys.append(_entity_keys(np.hstack([sub, pad]), coarse.n_points))
    return np.unique(np.concatenate(keys)) if keys else np.empty(0, np.int64)


def points_on(level, coarse, sides):
    """Local points of ``level`` lying on the given coarse sides (closed), a bool mask."""
    if len(sides) == 0:
        return np.zeros(level.n_local, dtype=bool)
    keys = _side_entities(coarse, sides)
    mine = _entity_keys(_support(coarse, level.where_cell, level.lattice()), coarse.n_points)
    return np.isin(mine, keys)


def fine_sides_on(level, coarse, sides):
    """Local fine sides (rows of local points) lying on the given coarse sides.

    A fine side lies on coarse side ``S`` when the coarse entities its points lie on
    together span exactly ``S``'s points.
    """
    dim = coarse.dim
    if len(sides) == 0:
        return np.empty((0, dim), dtype=np.int64)
    want = np.sort(sides.astype(np.int64), axis=1)[:, ::-1]
    want = _entity_keys(np.hstack([want, np.full((len(want), 1), -1)]), coarse.n_points)
    sup = _support(coarse, level.where_cell, level.lattice())
    on = np.isin(_entity_keys(sup, coarse.n_points), _side_entities(coarse, sides))
    cells = level.mesh.cells
    # only the sides whose points all lie on the given sides' closure are candidates
    on = on[cells]
    all_sides = []
    for j in range(dim + 1):
        others = [i for i in range(dim + 1) if i != j]
        all_sides.append(cells[on[:, others].all(axis=1)][:, others])
    all_sides = np.concatenate(all_sides).astype(np.int64)
    u = np.sort(sup[all_sides].reshape(len(all_sides), dim * (dim + 1)), axis=1)[:, ::-1]
    new = np.ones(u.shape, dtype=bool)
    new[:, 1:] = u[:, 1:] != u[:, :-1]
    new &= u >= 0
    ok = new.sum(axis=1) == dim
    span = np.sort(np.where(new, u, -1), axis=1)[:, ::-1][:, : dim + 1]
    hit = ok & np.isin(_entity_keys(span, coarse.n_points), want)
    return all_sides[hit]
