"""Preconditioners for the distributed CG: block Jacobi, and an additive two-level method.

Block Jacobi (:class:`BlockJacobi`)
    Each rank applies a preconditioner from the serial registry
    (:func:`hatkernels.make_preconditioner`: ``amg`` by default, ``ic0``,
    ``jacobi``, ``direct``, ...) to its owned block ``A_oo`` (the principal
    submatrix of its owned unknowns; SPD because A is).  No communication.
    ``M = diag(M_1, ..., M_P)`` is SPD when each block is.  It ignores the
    coupling between subdomains, so information crosses one subdomain per
    iteration: for a fixed mesh the condition number grows like
    ``1 / (H h)`` (subdomain size H, mesh size h) and CG iterations like
    ``P^(1/4)`` at fixed size, ``P^(1/2)`` at fixed size per rank.

Additive two-level (:class:`TwoLevel`, ``coarse="constants"``)
    ``M = M_block + R^T A_c^{-1} R`` with one coarse unknown per subdomain,
    the constant 1 on its owned unknowns (a partition of unity; R. A.
    Nicolaides, Deflation of conjugate gradients with applications to
    boundary value problems, SIAM J. Numer. Anal. 24, 1987) and the Galerkin
    matrix ``A_c = R A R^T``.  Each rank computes its row of ``A_c`` from its
    owned rows (sums of entries grouped by the owner of the column); the rows
    are gathered on rank 0, which factorises ``A_c`` once.  Per application:
    each rank's residual sum goes to rank 0 (``Gather``, one double per
    rank), rank 0 solves, each rank gets its coefficient back (``Scatter``).
    SPD: a sum of an SPD and a symmetric positive semidefinite operator.
    The coarse space carries the global, low-frequency part of the error
    that block Jacobi cannot, and the condition number is bounded by
    ``C (1 + H/h)`` independently of the number of subdomains (A. Toselli
    and O. Widlund, Domain Decomposition Methods, Springer 2005, chapter 3;
    value from memory for the form of the bound): iterations stay bounded
    when ranks are added at fixed points per rank.

Both are algebraic (they see rows and the owner of each column, never
coordinates), so they serve triangles and tetrahedra alike.  What needs the
geometry or the refinement history of the mesh (``gmg``) is refused by name,
with the names that can be used instead.
"""

from __future__ import annotations

import time

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from hatkernels._cg import as_preconditioner
from hatkernels._jit import sparse as _k
from hatkernels.distributed.launch import mpi
from hatkernels.errors import InputError
from hatkernels.precond import PRECONDITIONERS, capabilities, make_preconditioner

__all__ = ["COARSE_SPACES", "BlockJacobi", "TwoLevel", "coarse_row", "galerkin_coarse",
           "make_distributed_preconditioner"]

#: Values of ``coarse``: no coarse space, or one constant per subdomain.
COARSE_SPACES = (None, "constants")

class BlockJacobi:
    """``z = M_q r`` on each rank's owned block: a serial preconditioner, no communication.

    An object of the preconditioner protocol of :mod:`hatkernels.krylov`:
    ``apply_into(r, z)`` on this rank's owned entries, ``is_identity`` and
    ``inverse_diagonal`` when the serial preconditioner is the identity or a
    diagonal (:func:`hatkernels.precond.capabilities`), ``description``,
    ``describe()`` and ``nbytes`` (this rank's block).
    """

    communicates = False

    def __init__(self, A_oo, name="amg", **options):
        can = capabilities(name)  # also refuses an unknown name, with the valid ones
        if can.needs_mesh:
            usable = [n for n in PRECONDITIONERS if not capabilities(n).needs_mesh]
            raise InputError(f"preconditioner {name!r} is not available in the distributed "
                             f"solve: it needs the mesh (its refinement history), which a "
                             f"subdomain's block of rows does not have; use one of {usable}")
        self.name = name
        self.n = A_oo.shape[0]
        self.local = None
        self._op = None
        # The shortcuts CG takes follow from what the preconditioner is, never from one
        # rank's block, so that every rank makes the same calls (and the same reductions).
        self.is_identity = can.is_identity
        self.inverse_diagonal = np.empty(0) if can.is_diagonal else None
        if self.n == 0:  # a rank whose owned points are all prescribed
            self.description = f"{name} on an empty block"
            return
        M = make_preconditioner(A_oo, name, **options)
        self.local = M
        self.description = M.description
        if self.is_identity and getattr(M, "is_identity", False) is not True:
            raise RuntimeError(f"the {name!r} preconditioner says it is the identity but is not")
        if self.inverse_diagonal is not None:
            dinv = getattr(M, "inverse_diagonal", None)
            if not (isinstance(dinv, np.ndarray) and dinv.shape == (self.n,)):
                raise RuntimeError(f"the {name!r} preconditioner says it is a diagonal but "
                                   f"has no inverse diagonal")
            self.inverse_diagonal = np.ascontiguousarray(dinv, dtype=np.float64)
        elif not self.is_identity:
            self._op = as_preconditioner(M, self.n)

    def describe(self):
        return self.description

    @property
    def nbytes(self):
        """Bytes held by this rank's block preconditioner."""
        M = self.local
        if M is None:
            return 0
        return int(getattr(M, "nbytes", None) or getattr(M, "memory_bytes", 0))

    def apply_into(self, r, z):
        """``z = M_q r`` on this rank's owned entries (``r`` not modified)."""
        if self.n == 0:
            return
        if self.is_identity:
            z[:] = r
        elif self.inverse_diagonal is not None:
            _k.jacobi_apply(self.inverse_diagonal, r, z)
        else:
            self._op.apply_into(r, z)

def coarse_row(A_oo, A_og, ghost_owner, rank):
    """This rank's row of ``A_c = R A R^T`` for the one-constant-per-subdomain space.

    ``A_c[rank, q]`` is the sum of the owned rows' entries in the columns
    owned by ``q``: all of ``A_oo`` for ``q = rank``, the entries of ``A_og``
    grouped by ``ghost_owner`` (the owner of each ghost column) for the
    neighbours.  Returns ``(columns, values)``, columns ascending, zeros dropped.
    """
    og = A_og.data[: A_og.indptr[-1]]
    cols = np.asarray(ghost_owner, dtype=np.int64)[A_og.indices[: A_og.indptr[-1]]]
    q, inverse = np.unique(np.append(cols, rank), return_inverse=True)
    # (bincount of nothing returns integers: say float64)
    vals = np.bincount(inverse[:-1], weights=og, minlength=len(q)).astype(np.float64)
    vals[np.searchsorted(q, rank)] += float(A_oo.data[: A_oo.indptr[-1]].sum())
    keep = vals != 0
    return q[keep], vals[keep]


def galerkin_coarse(rows, cols, vals, parts):
    """``A_c`` (``parts x parts``, CSC) from the gathered rows, symmetrised; empty rows get 1.

    ``rows, cols, vals`` are the entries of all ranks' rows.  ``A_c[p, q]``
    and ``A_c[q, p]`` are sums of the same matrix entries computed on
    different ranks in different orders: their mean makes ``A_c`` exactly
    symmetric.  A subdomain with no unknowns has a zero basis function; its
    diagonal is set to 1 (and its coefficient to 0 after each solve).
    Returns ``(A_c, empty)`` with ``empty`` a boolean mask of those subdomains.
    """
    Ac = sp.csr_matrix((vals, (rows, cols)), shape=(parts, parts))
    Ac = ((Ac + Ac.T) * 0.5).tocsr()
    empty = ~(Ac.diagonal() > 0)
    if empty.any():
        Ac = Ac + sp.diags(empty.astype(np.float64))
    return sp.csc_matrix(Ac), empty


class TwoLevel:
    """Additive two-level preconditioner: block Jacobi plus a coarse solve on rank 0.

    An object of the preconditioner protocol of :mod:`hatkernels.krylov`
    (``apply_into(r, z)`` on this rank's owned entries, ``description``,
    ``describe()``, ``nbytes``).  Collective: every application calls
    ``Gather`` and ``Scatter`` on ``comm``.  ``stats`` (a CommStats)
    accumulates the coarse communication.
    """

    communicates = True

    def __init__(self, block, matrix, comm, stats):
        self.block = block
        self.comm = comm
        self.stats = stats
        self.rank = comm.Get_rank()
        self.parts = comm.Get_size()
        self.n = block.n
        MPI = self._MPI = mpi()
        pattern = matrix.halo.pattern
        ghost_owner = np.repeat(pattern.neighbours, pattern.recv_counts)
        cols, vals = coarse_row(matrix.A_oo, matrix.A_og, ghost_owner, self.rank)
        t0 = time.perf_counter()
        count = np.array([len(cols)], dtype=np.int64)
        counts = np.empty(self.parts, dtype=np.int64) if self.rank == 0 else None
        comm.Gather([count, MPI.INT64_T], [counts, MPI.INT64_T] if self.rank == 0 else None,
                    root=0)
        root = self.rank == 0
        all_cols = np.empty(int(counts.sum()) if root else 0, dtype=np.int64)
        all_vals = np.empty(len(all_cols))
        spec = (counts, np.concatenate([[0], np.cumsum(counts)[:-1]])) if root else None
        comm.Gatherv([cols.astype(np.int64), MPI.INT64_T],
                     [all_cols, spec, MPI.INT64_T] if root else None, root=0)
        comm.Gatherv([vals, MPI.DOUBLE], [all_vals, spec, MPI.DOUBLE] if root else None, root=0)
        self.stats.coarse_seconds += time.perf_counter() - t0
        self.stats.coarse_bytes += count.nbytes + 16 * len(cols)
        self._lu = None
        self._empty = None
        coarse_bytes = 0
        nnz = np.zeros(1, dtype=np.int64)
        if root:
            rows = np.repeat(np.arange(self.parts), counts)
            Ac, self._empty = galerkin_coarse(rows, all_cols, all_vals, self.parts)
            nnz[0] = Ac.nnz
            # symmetric ordering and no pivoting: A_c is SPD, so this LU is a Cholesky
            self._lu = spla.splu(Ac, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                                 options={"SymmetricMode": True})
            self.coarse_matrix = Ac
            coarse_bytes = sum(a.nbytes for F in (Ac, self._lu.L, self._lu.U)
                               for a in (F.data, F.indices, F.indptr))
        comm.Bcast([nnz, MPI.INT64_T], root=0)
        self.coarse_nnz = int(nnz[0])
        self._send = np.empty(1)
        self._coef = np.empty(1)
        self._all = np.empty(self.parts) if root else None
        # the factor (L and U counted as CSC arrays) and A_c live on rank 0 only
        self._coarse_bytes = coarse_bytes + self._send.nbytes + self._coef.nbytes + (
            self._all.nbytes if root else 0)
        self.description = (f"additive two-level: block Jacobi over {self.parts} ranks "
                            f"(rank 0's block: {block.description}) + "
                            f"coarse space of {self.parts} subdomain constants, Galerkin "
                            f"matrix {self.parts}x{self.parts} with {self.coarse_nnz} "
                            f"entries, factorised on rank 0")

    def describe(self):
        return self.description

    @property
    def nbytes(self):
        """Bytes held on this rank: its block, and on rank 0 the coarse matrix and factor."""
        return self.block.nbytes + self._coarse_bytes

    def apply_into(self, r, z):
        """``z = M_q r + (coarse correction)`` on this rank's owned entries (collective)."""
        self.block.apply_into(r, z)
        MPI = self._MPI
        t0 = time.perf_counter()
        self._send[0] = r.sum() if self.n else 0.0
        recv = [self._all, MPI.DOUBLE] if self.rank == 0 else None
        self.comm.Gather([self._send, MPI.DOUBLE], recv, root=0)
        if self.rank == 0:
            self._all[:] = self._lu.solve(self._all)
            self._all[self._empty] = 0.0
        self.comm.Scatter(recv, [self._coef, MPI.DOUBLE], root=0)
        s = self.stats
        s.coarse_seconds += time.perf_counter() - t0
        s.coarse_applications += 1
        s.coarse_bytes += 2 * self._send.nbytes
        if self.n:
            z += self._coef[0]

def make_distributed_preconditioner(matrix, name, coarse, comm, stats, **options):
    """The block preconditioner for ``matrix`` (a DistributedMatrix), with the coarse space."""
    if coarse not in COARSE_SPACES:
        raise InputError(f"coarse must be None or 'constants', got {coarse!r}")
    if not isinstance(name, str):
        raise InputError(f"the distributed solve takes a preconditioner name (one of the "
                         f"serial registry's, applied per rank), got {type(name).__name__}")
    block = BlockJacobi(matrix.A_oo, name, **options)
    if coarse is None:
        return block
    return TwoLevel(block, matrix, comm, stats)
