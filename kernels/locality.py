"""Renumbering an assembled system whose numbering has no locality.

A CSR product, and every AMG kernel, reads ``x`` at the columns of each row.
When the points of a mesh are numbered in an order unrelated to where they
lie (a mesh file written by a program that shuffles, a mesh assembled from
pieces), those reads miss the caches at almost every entry, and a whole
``solve_poisson`` takes twice as long or more (docs/solvers.md).
:func:`poorly_numbered` tells such a matrix from a well-numbered one from a
sample of its rows; :class:`Renumbering` puts the system in the order of a
space-filling curve through its points instead (Z order: each point's
coordinates cut into about one cell per point, their bits interleaved, sorted
by one counting sort) and gives the answer back in the caller's numbering.

The test: in a mesh of ``n`` points in ``d`` dimensions numbered with any
locality (by rows, by a front, along a curve) most entries ``(i, j)`` have
``|i - j|`` at most a few times ``n^((d-1)/d)`` (the points of a row of a
square grid, of a plane of a cube); in a random numbering most have
``|i - j|`` near ``n / 3``.  A matrix is poorly numbered when more than half
its entries lie farther than ``SPREAD * n^((d-1)/d)`` (and at least
``MIN_SPREAD``) from the diagonal, and it has at least ``MIN_ROWS`` rows:
below that ``x`` stays in the caches whatever the order.
"""

from __future__ import annotations

import time

import numpy as np
import scipy.sparse as sp

from hatkernels._jit import reorder as _jit_reorder
from hatkernels.errors import InputError

__all__ = ["poorly_numbered", "spread_limit", "renumber_option", "should_renumber",
           "Renumbering", "MIN_ROWS", "SPREAD", "MIN_SPREAD", "SAMPLE_ROWS"]

#: Systems with fewer rows are never renumbered (their vectors fit the caches).
MIN_ROWS = 1 << 16
#: The distance from the diagonal, in units of ``n^((d-1)/d)``, beyond which an entry
#: counts as far.
SPREAD = 8
#: ... and never less than this many rows.
MIN_SPREAD = 4096
#: Rows whose entries :func:`poorly_numbered` counts.
SAMPLE_ROWS = 1 << 16


def spread_limit(n, dim):
    """The distance ``|i - j|`` beyond which an entry counts as far (module text)."""
    return int(max(MIN_SPREAD, SPREAD * n ** ((dim - 1) / dim)))


def poorly_numbered(A, dim):
    """True when more than half the entries of CSR ``A`` are far from its diagonal
    (module text) and it has at least ``MIN_ROWS`` rows.

    The entries are counted in ``SAMPLE_ROWS`` rows evenly spread over the matrix (every
    row of a smaller one): a fraction near one half either way is rare, and a wrong
    answer there costs time, never accuracy.
    """
    n = A.shape[0]
    if n < MIN_ROWS or A.nnz == 0:
        return False
    step = max(1, n // SAMPLE_ROWS)
    far, seen = _jit_reorder.far_entries(A.indptr, A.indices, spread_limit(n, dim), step)
    return 2 * int(far) > int(seen)


def renumber_option(renumber):
    """``renumber`` checked: None (decide by :func:`poorly_numbered`), True or False."""
    if renumber not in (None, True, False):
        raise InputError(f"renumber must be None, True or False, got {renumber!r}")
    return renumber


def should_renumber(A, dim, renumber):
    """Whether to renumber CSR ``A``: never with ``renumber=False`` or no rows, always with
    True, and with None when :func:`poorly_numbered` says so."""
    if renumber is False or A.shape[0] == 0:
        return False
    return bool(renumber) or poorly_numbered(A, dim)


class Renumbering:
    """A system's unknowns in Z order (Morton's curve) through their points.

    Parameters
    ----------
    points : ndarray, shape (n, 2) or (n, 3)
        Where each unknown lies (row ``i`` of the system is ``points[i]``).

    Attributes
    ----------
    order : ndarray
        New to old: new unknown ``k`` is old unknown ``order[k]``.
    seconds : float
        The time taken to find the order and to permute the matrix.
    """

    def __init__(self, points):
        clock = time.perf_counter()
        points = np.ascontiguousarray(points, dtype=np.float64)
        if points.ndim != 2 or points.shape[1] not in (2, 3):
            raise InputError(f"Renumbering needs points of shape (n, 2) or (n, 3), "
                             f"got {points.shape}")
        bad = ~np.isfinite(points).all(axis=1)
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise InputError(f"point {k} has a non-finite coordinate {tuple(points[k])}")
        n, dim = points.shape
        # about one point per cell: the order inside a cell does not matter
        bits = max(1, int(np.log2(max(n, 2))) // dim)
        lo = points.min(axis=0)
        span = np.maximum(points.max(axis=0) - lo, np.finfo(float).tiny)
        keys = _jit_reorder.morton_keys(points, lo, (1 << bits) / span, bits)
        self.order = _jit_reorder.counting_order(keys, 1 << (dim * bits))
        self.inverse = np.empty_like(self.order)
        self.inverse[self.order] = np.arange(self.order.size)
        self.seconds = time.perf_counter() - clock

    def matrix(self, A):
        """``P A P^T`` (CSR, sorted rows) with new row ``k`` old row ``order[k]``; ``A`` is not
        modified."""
        n = self.order.size
        if not sp.issparse(A) or A.format != "csr" or A.shape != (n, n):
            raise InputError(f"Renumbering.matrix needs a CSR matrix of shape ({n}, {n}) "
                             f"(one row per point), got {type(A).__name__} "
                             f"{getattr(A, 'shape', '')}")
        clock = time.perf_counter()
        itype = A.indptr.dtype
        order = self.order.astype(itype, copy=False)
        inverse = self.inverse.astype(itype, copy=False)
        indptr = np.empty(A.shape[0] + 1, dtype=itype)
        indptr[0] = 0
        np.cumsum(np.diff(A.indptr)[order], out=indptr[1:])
        indices = np.empty(A.nnz, dtype=itype)
        data = np.empty(A.nnz)
        _jit_reorder.permute_symmetric(A.indptr, A.indices.astype(itype, copy=False), A.data,
                                       order, inverse, indptr, indices, data)
        B = sp.csr_matrix((data, indices, indptr), shape=A.shape, copy=False)
        B.has_sorted_indices = True
        self.seconds += time.perf_counter() - clock
        return B

    def vector(self, v):
        """``v`` in the new order."""
        return v[self.order]

    def back(self, x):
        """``x`` (new order) in the old order."""
        out = np.empty_like(x)
        out[self.order] = x
        return out
