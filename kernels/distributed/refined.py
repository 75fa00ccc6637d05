"""The distributed solve of a problem on a mesh refined k times, with the fine mesh never
built whole, preconditioned by geometric multigrid across the ranks.

Every rank holds the coarse mesh and, on every level, its part
(:mod:`~hatkernels.distributed.levelparts`: the fine points it owns, the fine
cells touching them, the ghosts they bring, numbered as the serial refinement
numbers them).

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

import numpy as np

from hatkernels._jit import sparse as _k
from hatkernels.assembly import assemble_stiffness
from hatkernels.distributed.finenumbers import lattice_order, lattice_parents
from hatkernels.distributed.halo import Halo
from hatkernels.distributed.launch import mpi
from hatkernels.distributed.levelparts import LevelPart, build_level
from hatkernels.distributed.levelrows import (
    agree_bounds,
    check_variant,
    describe_kinds,
    level_operator,
)
from hatkernels.errors import InputError
from hatkernels.mesh.core import index_dtype
from hatkernels.precond.chebyshev import ChebyshevSmoother
from hatkernels.precond.direct import SparseDirect

__all__ = ["LevelPart", "build_level", "DistributedMultigrid"]

#: Message tag of the restriction's ghost sums.
REVERSE_TAG = 73


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
        # the products hold the vectors, not the level: no reference cycle, so a
        # multigrid's memory is freed as soon as it is dropped
        work, op, n = self.work, self.operator, self.part.n_owned

        def product(x, out):
            work[:n] = x
            op.matvec_into(work, out)

        def residual(x, b, out):
            product(x, out)
            _k.xpby(b, -1.0, out)

        self.product, self.residual = product, residual
        self.smoother = ChebyshevSmoother(product, residual, op.inverse_diagonal, degree,
                                          bound=op.bound, estimate=False, lower=lower)

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
