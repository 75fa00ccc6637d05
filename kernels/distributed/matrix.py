"""The distributed matrix: each rank's owned rows, split at the owned/ghost column boundary.

``A_rows = [A_oo | A_og]``: ``A_oo`` couples owned unknowns with owned
unknowns (the block the local preconditioner approximates), ``A_og`` owned
unknowns with ghosts.  A product ``q = A p`` is

1. start the halo exchange of ``p`` (post receives and sends),
2. ``q = A_oo p_owned`` while the messages travel,
3. finish the exchange,
4. ``q += A_og p_ghost``.

Both products are the project's parallel CSR kernels
(:mod:`hatkernels._jit.sparse`); the vectors hold owned entries first and
ghosts after, so no copies are made.  With no ghosts (one rank) the fused
product-and-dot kernel is used, exactly as in the serial CG.

:class:`DistributedMatrix` is a product of the CG loop (:mod:`hatkernels._cg`):
``matvec_dot(p, q)``, ``residual(x, b, out)`` and ``n_local``.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from hatkernels._jit import sparse as _k
from hatkernels.distributed.halo import Halo

__all__ = ["DistributedMatrix", "split_columns"]


def _arrays(C):
    itype = np.result_type(C.indptr.dtype, C.indices.dtype)
    return (np.ascontiguousarray(C.indptr, dtype=itype),
            np.ascontiguousarray(C.indices, dtype=itype),
            np.ascontiguousarray(C.data, dtype=np.float64))


def split_columns(A_rows, n_owned):
    """``(A_oo, A_og)`` of CSR rows with sorted columns: columns below ``n_owned`` and the rest.

    ``A_og``'s columns are shifted by ``n_owned`` (they number the ghosts).
    """
    C = sp.csr_matrix(A_rows)
    n_rows, n_cols = C.shape
    idx = C.indices[: C.indptr[-1]]
    rows = np.repeat(np.arange(n_rows), np.diff(C.indptr))
    inner = idx < n_owned
    counts_in = np.bincount(rows[inner], minlength=n_rows)
    dt = C.indptr.dtype
    ptr_in = np.zeros(n_rows + 1, dtype=dt)
    np.cumsum(counts_in, out=ptr_in[1:])
    ptr_out = np.zeros(n_rows + 1, dtype=dt)
    np.cumsum(np.diff(C.indptr) - counts_in, out=ptr_out[1:])
    A_oo = sp.csr_matrix((C.data[: C.indptr[-1]][inner], idx[inner].astype(dt), ptr_in),
                         shape=(n_rows, n_owned))
    A_og = sp.csr_matrix((C.data[: C.indptr[-1]][~inner], (idx[~inner] - n_owned).astype(dt),
                          ptr_out), shape=(n_rows, n_cols - n_owned))
    for M in (A_oo, A_og):
        M.has_sorted_indices = True
        M.has_canonical_format = True
    return A_oo, A_og


class DistributedMatrix:
    """Products with the global matrix from each rank's owned rows (collective calls).

    Parameters
    ----------
    A_rows : scipy CSR, shape (n_owned, n_owned + n_ghosts)
        Owned rows, sorted columns, owned columns first.
    pattern : HaloPattern
    comm : mpi4py communicator
    stats : CommStats, optional

    Vectors passed as ``p`` (the input of a product) have ``n_local =
    n_owned + n_ghosts`` entries; their ghost entries are overwritten by the
    exchange.  Outputs have ``n_owned`` entries.
    """

    def __init__(self, A_rows, pattern, comm, stats=None):
        if A_rows.shape != (pattern.n_owned, pattern.n_owned + pattern.n_ghosts):
            raise ValueError(f"rows of shape {A_rows.shape} do not match the halo "
                             f"({pattern.n_owned} owned, {pattern.n_ghosts} ghosts)")
        self.comm = comm
        self.halo = Halo(pattern, comm, stats)
        self.stats = self.halo.stats
        self.n_owned = pattern.n_owned
        self.n_local = pattern.n_owned + pattern.n_ghosts
        self.A_oo, self.A_og = split_columns(A_rows, pattern.n_owned)
        self._oo = _arrays(self.A_oo)
        self._og = _arrays(self.A_og) if pattern.n_ghosts else None
        self.nnz = int(A_rows.nnz)
        self._work = None  # a local vector for residual(), made on its first call

    @property
    def nbytes(self):
        return sum(a.nbytes for a in self._oo) + (sum(a.nbytes for a in self._og)
                                                  if self._og else 0)

    def matvec_into(self, p, out):
        """``out = A p`` (``p`` local, its ghosts refreshed here)."""
        n = self.n_owned
        self.halo.start(p)
        _k.spmv(*self._oo, p[:n], out)
        self.halo.finish()
        if self._og is not None:
            _k.spmv_add(*self._og, p[n:], out)

    def matvec_dot(self, p, out):
        """``out = A p``; return this rank's part of ``p . A p``."""
        n = self.n_owned
        if self._og is None and not self.halo.pattern.neighbours.size:
            return _k.spmv_dot(*self._oo, p[:n], out)
        self.matvec_into(p, out)
        return _k.dot(p[:n], out)

    def residual(self, x, b, out, work=None):
        """``out = b - A x`` for owned ``x``.

        ``work`` is a local vector (``n_local`` entries, ghosts filled here);
        by default one the matrix keeps for the purpose.
        """
        if work is None:
            if self._work is None:
                self._work = np.zeros(self.n_local)
            work = self._work
        work[: self.n_owned] = x
        self.matvec_into(work, out)
        _k.xpby(b, -1.0, out)
