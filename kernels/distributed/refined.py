"""The distributed solve of a problem on a mesh refined k times, with the fine mesh never
built whole, preconditioned by geometric multigrid across the ranks.

Every rank holds the coarse mesh (small).  Its cells are split among the ranks
(:func:`~hatkernels.distributed.finenumbers.partition_coarse_cells`); on every
level ``j = 1 .. k`` a rank builds its :class:`LevelPart`: the fine points it
owns (those whose owner cell, the lowest coarse cell containing them, is one
of its cells), the fine cells of its own coarse cells and every fine cell
touching an owned point, and the ghost points they bring, all numbered as the
serial ``mesh.refine()`` repeated ``j`` times numbers them
(:mod:`~hatkernels.distributed.finenumbers`).  Ghost lists are agreed on once
by an all-to-all of the global numbers each rank needs from each other.

The multigrid cycle is the serial ``gmg`` cycle (:mod:`hatkernels.precond.gmg`)
with the products, smoothers and transfers on owned entries:

- a level's operator is the owned rows of its stiffness matrix with identity
  rows and zero columns at the held points (as the serial matrix-free
  operator), applied after a halo exchange: by default the serial matrix-free
  product on the rank's local mesh (:mod:`~hatkernels.distributed.levelrows`;
  ``matrix_free=False`` assembles the rows instead);
- the smoother is the same Chebyshev polynomial in ``D^-1 A`` on the same
  interval (Gershgorin's bound, a global maximum);
- prolongation fills each owned fine point from its two parents (the ends of
  the coarse edge it halves; one parent twice for a coarse point), which are
  local on the coarser level (they lie in the point's owner cell), after a
  halo exchange there; restriction is its transpose: each rank adds its owned
  fine residuals into its coarser local vector, ghosts included, and sends
  the ghost sums to their owners;
- the coarsest level is the coarse mesh itself, replicated: its right-hand
  side is summed over the ranks (one ``Allreduce`` of the coarse size) and
  every rank solves it with the same factorisation.

So the preconditioner is, up to round-off, the serial one, and CG needs the
serial number of iterations on any number of ranks.  Memory per rank is its
share of the fine levels plus the coarse mesh.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels._jit import sparse as _k
from hatkernels.assembly import assemble_stiffness
from hatkernels.distributed.finenumbers import (
    fine_numbering,
    lattice_order,
    lattice_parents,
)
from hatkernels.distributed.halo import Halo, HaloPattern
from hatkernels.distributed.launch import mpi
from hatkernels.distributed.levelrows import (
    agree_bounds,
    check_variant,
    describe_kinds,
    level_operator,
)
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh, index_dtype
from hatkernels.mesh.tags import MeshTags
from hatkernels.precond.chebyshev import ChebyshevSmoother
from hatkernels.precond.direct import SparseDirect

__all__ = ["LevelPart", "build_level", "DistributedMultigrid"]

#: Message tag of the restriction's ghost sums.
REVERSE_TAG = 73


def _children(dim):
    return 4 if dim == 2 else 8


class _GlobalToLocal:
    """Local numbers of global point numbers (every asked-for number must be local)."""

    def __init__(self, points):
        self.order = np.argsort(points, kind="stable")
        self.sorted = points[self.order]

    def __call__(self, numbers, what):
        numbers = np.asarray(numbers, dtype=np.int64)
        pos = np.searchsorted(self.sorted, numbers)
        pos = np.minimum(pos, len(self.sorted) - 1)
        if numbers.size and (self.sorted[pos] != numbers).any():
            raise RuntimeError(f"{what}: a point is not on this rank")  # cannot happen
        return self.order[pos]


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
        """Integer barycentric coordinates (n_local, dim + 1) of each local point in its
        ``where_cell`` (scale ``2**level``)."""
        fn = self.numbering
        out = np.empty((self.n_local, fn.dim + 1), dtype=np.int64)
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


def build_level(coarse, level, cell_owner, part, comm, numbering=None):
    """This rank's :class:`LevelPart` of ``coarse`` refined ``level >= 1`` times (collective)."""
    fn = numbering or fine_numbering(coarse, level)
    per = _children(coarse.dim) ** level
    mine = np.flatnonzero(cell_owner == part)
    near = np.zeros(coarse.n_points, dtype=bool)
    near[coarse.cells[mine].ravel()] = True
    cand = np.flatnonzero(near[coarse.cells].any(axis=1))
    num = fn.numbers(cand)
    ids, fine = fn.fine_cells(cand, num)
    owned_pt = cell_owner[fn.point_owner_cells(fine)] == part
    keep = owned_pt.any(axis=1) | (cell_owner[ids // per] == part)
    ids, fine = ids[keep], fine[keep]
    present, inverse = np.unique(fine, return_inverse=True)
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
    lcells = local_of[inverse.reshape(fine.shape)].astype(index_dtype(len(points)))
    # where each local point sits: its first appearance in the candidates' lattices
    flat = num.ravel()
    pos = np.searchsorted(present, flat)
    hit = (pos < len(present)) & (present[np.minimum(pos, len(present) - 1)] == flat)
    loc = local_of[pos[hit]]
    rows, cols = np.divmod(np.flatnonzero(hit), num.shape[1])
    first = np.unique(loc, return_index=True)[1]
    where_cell = np.empty(len(points), dtype=np.int64)
    where_index = np.empty(len(points), dtype=np.int64)
    where_cell[loc[first]] = cand[rows[first]]
    where_index[loc[first]] = cols[first]
    coords = fn.coordinates(cand).reshape(-1, coarse.dim)
    xyz = np.empty((len(points), coarse.dim))
    xyz[loc[first]] = coords[np.flatnonzero(hit)[first]]
    lmesh = Mesh._trusted(xyz, lcells)
    tags = coarse.tags
    if tags is not None and tags.regions is not None:
        lmesh._tags = MeshTags(tags.regions[ids // per], np.empty((0, coarse.dim), np.int64),
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
    v = np.where(lam > 0, coarse.cells[cells].astype(np.int64), -1)
    return np.sort(v, axis=1)[:, ::-1]


def _side_entities(coarse, sides):
    """Keys of every entity (points, edges, the side itself) of the given coarse sides."""
    import itertools

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
    all_sides = np.concatenate([s[on[s].all(axis=1)] for s in
                                (np.delete(cells, j, axis=1) for j in range(dim + 1))])
    all_sides = all_sides.astype(np.int64)
    u = np.sort(sup[all_sides].reshape(len(all_sides), dim * (dim + 1)), axis=1)[:, ::-1]
    new = np.ones(u.shape, dtype=bool)
    new[:, 1:] = u[:, 1:] != u[:, :-1]
    new &= u >= 0
    ok = new.sum(axis=1) == dim
    span = np.sort(np.where(new, u, -1), axis=1)[:, ::-1][:, : dim + 1]
    hit = ok & np.isin(_entity_keys(span, coarse.n_points), want)
    return all_sides[hit]


# -- the levels' operators and transfers ---------------------------------------------------


class _Level:
    """One refined level on one rank: operator (:mod:`~hatkernels.distributed.levelrows`),
    smoother (made once the ranks agree on its bound), work vectors, transfer."""

    def __init__(self, part, operator, fixed, transfer, finest=False):
        self.part = part
        self.operator = operator
        self.fixed_owned = np.flatnonzero(fixed[: part.n_owned])
        n = part.n_owned
        self.work = np.zeros(part.n_local)
        self.r, self.d, self.q = np.empty(n), np.empty(n), np.empty(n)
        # the finest level's solution is the caller's output
        self.x, self.b = None if finest else np.empty(n), np.empty(n)
        self.smoother = None
        self.transfer = transfer

    def make_smoother(self, degree, lower):
        self.smoother = ChebyshevSmoother(self.product, self.residual,
                                          self.operator.inverse_diagonal, degree,
                                          bound=self.operator.bound, estimate=False, lower=lower)

    def product(self, x, out):
        self.work[: self.part.n_owned] = x
        self.operator.matvec_into(self.work, out)

    def residual(self, x, b, out):
        self.product(x, out)
        _k.xpby(b, -1.0, out)

    def smooth(self, x, b, zero_guess):
        self.smoother.smooth(x, b, zero_guess, self.r, self.d, self.q)

    @property
    def nbytes(self):
        held = (self.work, self.r, self.d, self.q, self.x, self.b, *self.transfer)
        return int(self.operator.nbytes + sum(v.nbytes for v in held if v is not None))


def _parents(coarse, part, coarser, cell_owner, rank):
    """Local numbers on the coarser level of the two parents of each owned point of
    ``part`` (``coarser`` None: the coarse mesh's own numbers)."""
    fn = part.numbering
    dim, level = coarse.dim, part.level
    mine = np.flatnonzero(cell_owner == rank)
    num = fn.numbers(mine)
    owner = fn.point_owner_cells(num)
    sel_r, sel_i = np.nonzero(owner == mine[:, None])  # each owned point, once
    fine_local = _GlobalToLocal(part.points)(num[sel_r, sel_i], "prolongation")
    pa = np.empty(len(sel_r), dtype=np.int64)
    pb = np.empty(len(sel_r), dtype=np.int64)
    cells = mine[sel_r]
    if coarser is None:
        down = None
    else:
        down = coarser.numbering.numbers(mine)
        to_local = _GlobalToLocal(coarser.points)
    for flag in fn.patterns:
        rows = np.flatnonzero(fn.swapped[cells] == flag)
        par = lattice_parents(dim, level, flag)[sel_i[rows]]
        if down is None:  # the coarse mesh: lattice points of one level are its vertices
            lam, _ = lattice_order(dim, 0, flag)
            vert = np.argmax(lam, axis=1)  # lattice index -> local vertex
            pa[rows] = coarse.cells[cells[rows], vert[par[:, 0]]]
            pb[rows] = coarse.cells[cells[rows], vert[par[:, 1]]]
        else:
            pa[rows] = to_local(down[sel_r[rows], par[:, 0]], "prolongation")
            pb[rows] = to_local(down[sel_r[rows], par[:, 1]], "prolongation")
    dt = index_dtype(max(part.n_local, coarse.n_points if coarser is None else coarser.n_local))
    return fine_local.astype(dt), pa.astype(dt), pb.astype(dt)


class _ReverseAdd:
    """Send a local vector's ghost entries to their owners, which add them to theirs."""

    def __init__(self, pattern, comm, stats):
        self.pattern, self.comm, self.stats = pattern, comm, stats
        self._MPI = mpi()
        self._bufs = [np.empty(len(s)) for s in pattern.send]

    def add(self, x):
        MPI, pat, comm = self._MPI, self.pattern, self.comm
        n = pat.n_owned
        requests = []
        for k, q in enumerate(pat.neighbours):
            if len(self._bufs[k]):
                requests.append(comm.Irecv([self._bufs[k], MPI.DOUBLE], source=int(q),
                                           tag=REVERSE_TAG))
        for k, q in enumerate(pat.neighbours):
            lo, hi = n + pat.recv_offsets[k], n + pat.recv_offsets[k + 1]
            if hi > lo:
                requests.append(comm.Isend([x[lo:hi], MPI.DOUBLE], dest=int(q),
                                           tag=REVERSE_TAG))
        MPI.Request.Waitall(requests)
        for k in range(len(pat.neighbours)):
            if len(self._bufs[k]):
                x[pat.send[k]] += self._bufs[k]
        self.stats.halo_messages += len(requests) // 2
        self.stats.halo_bytes_sent += int(8 * (len(x) - n))


class DistributedMultigrid:
    """The serial ``gmg`` cycle across ranks (see the module notes); ``apply_into(r, z)`` on
    owned entries of the finest level, collective.  ``matrix_free``: the levels' operators
    matrix-free (``variant``: which) or assembled rows; ``fine_operator``: the CG's operator
    (of :mod:`~hatkernels.distributed.levelrows`), which the finest level then shares."""

    communicates = True
    is_identity = False
    inverse_diagonal = None

    def __init__(self, coarse, parts, cell_owner, coefficients, fixed, coarse_fixed, comm,
                 stats, *, cycle=None, degree=2, lower=1.0 / 6.0, quadrature=2,
                 matrix_free=True, variant=None, fine_operator=None):
        rank = comm.Get_rank()
        self.comm, self.stats = comm, stats
        self.cycle = cycle or ("V" if coarse.dim == 2 else "F")
        check_variant(variant)
        # the transfers first: their temporaries then meet fewer stored vectors
        transfers = [_parents(coarse, p, parts[j - 1] if j > 0 else None, cell_owner, rank)
                     for j, p in enumerate(parts)]
        ops = [
            fine_operator if j == len(parts) - 1 and fine_operator is not None else
            level_operator(p, c, f, Halo(p.pattern, comm, stats), quadrature=quadrature,
                           matrix_free=matrix_free, variant=variant)
            for j, (p, c, f) in enumerate(zip(parts, coefficients[1:], fixed, strict=True))
        ]
        self.shared = fine_operator  # the CG's operator, held by the finest level too
        agree_bounds(ops, comm)
        self.levels = [_Level(p, op, f, t, finest=j == len(parts) - 1)
                       for j, (p, op, f, t) in enumerate(zip(parts, ops, fixed, transfers,
                                                             strict=True))]
        del transfers
        for j, lv in enumerate(self.levels):
            lv.make_smoother(degree, lower)
            if j > 0:
                lv.reverse = _ReverseAdd(parts[j - 1].pattern, comm, stats)
        self.coarse = coarse
        A = assemble_stiffness(coarse, coefficients[0], quadrature=quadrature)
        free = np.flatnonzero(~coarse_fixed)
        if free.size == 0:
            raise InputError("gmg: every point of the coarse mesh is held")
        self._free = free
        self._coarse_A = A[free][:, free].tocsr()
        self._coarse_solver = SparseDirect(self._coarse_A)
        self._coarse_fixed = np.flatnonzero(coarse_fixed)
        self._cx = np.zeros(coarse.n_points)
        self._cb = np.zeros(coarse.n_points)
        self._MPI = mpi()
        self.shape = (parts[-1].n_owned, parts[-1].n_owned)
        n_levels = len(parts) + 1
        self.description = (f"distributed gmg: {n_levels} levels, {self.cycle}-cycle, "
                            f"Chebyshev degree {degree}, coarsest ({coarse.n_points} points) "
                            f"replicated and factorised on every rank, "
                            f"{describe_kinds(comm.allgather([op.kind for op in ops]))}")

    def describe(self):
        return self.description

    @property
    def nbytes(self):
        """Bytes of the levels, without the finest operator when it is the CG's own."""
        shared = 0 if self.shared is None else self.shared.nbytes
        return int(sum(lv.nbytes for lv in self.levels) - shared)

    def apply_into(self, r, z):
        fine = self.levels[-1]
        b = fine.b
        b[:] = r
        b[fine.fixed_owned] = 0.0
        self._cycle(len(self.levels), z, b, True, self.cycle)
        z[fine.fixed_owned] = r[fine.fixed_owned]

    def _coarse_solve(self, x, b, zero_guess):
        free = self._free
        if zero_guess:
            x[:] = 0.0
            x[free] = self._coarse_solver.matvec(b[free])
        else:
            x[free] += self._coarse_solver.matvec(b[free] - self._coarse_A @ x[free])

    def _cycle(self, level, x, b, zero_guess, kind):
        if level == 0:
            self._coarse_solve(x, b, zero_guess)
            return
        lv = self.levels[level - 1]
        lv.smooth(x, b, zero_guess)
        lv.residual(x, b, lv.r)
        fine_local, pa, pb = lv.transfer
        half = 0.5 * lv.r[fine_local]
        if level == 1:
            xc, bc = self._cx, self._cb
            bc[:] = np.bincount(pa, half, len(bc)) + np.bincount(pb, half, len(bc))
            MPI = self._MPI
            self.comm.Allreduce(MPI.IN_PLACE, [bc, MPI.DOUBLE], op=MPI.SUM)
            self.stats.coarse_applications += 1
            self.stats.coarse_bytes += bc.nbytes
            bc[self._coarse_fixed] = 0.0
        else:
            c = self.levels[level - 2]
            xc, bc = c.x, c.b
            acc = c.work
            acc[:] = np.bincount(pa, half, len(acc)) + np.bincount(pb, half, len(acc))
            lv.reverse.add(acc)
            bc[:] = acc[: c.part.n_owned]
            bc[c.fixed_owned] = 0.0
        if kind == "V":
            self._cycle(level - 1, xc, bc, True, "V")
        elif kind == "W":
            self._cycle(level - 1, xc, bc, True, "W")
            self._cycle(level - 1, xc, bc, False, "W")
        else:
            self._cycle(level - 1, xc, bc, True, "V")
            self._cycle(level - 1, xc, bc, False, "F")
            self._cycle(level - 1, xc, bc, False, "V")
        if level == 1:
            full = xc
        else:
            full = c.work
            full[: c.part.n_owned] = xc
            c.operator.halo.exchange(full)
        x[fine_local] += 0.5 * (full[pa] + full[pb])
        x[lv.fixed_owned] = 0.0
        lv.smooth(x, b, False)
