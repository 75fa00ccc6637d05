"""Reduction of a CSR system to its free rows and columns, with lifting."""

import numpy as np
from numba import prange

from hatkernels._jit import jit


@jit(parallel=True)
def reduced_counts(indptr, indices, newindex, free):
    """Entries of each free row that fall in free columns."""
    counts = np.zeros(free.size, dtype=indptr.dtype)
    for r in prange(free.size):
        i = free[r]
        c = 0
        for s in range(indptr[i], indptr[i + 1]):
            if newindex[indices[s]] >= 0:
                c += 1
        counts[r] = c
    return counts


@jit(parallel=True)
def reduced_counts_symmetric(indptr, indices, fixed, free, lost, counts):
    """:func:`reduced_counts` for a structurally symmetric pattern, from the fixed rows
    alone: row ``i`` holds column ``d`` exactly when row ``d`` holds ``i``, so walking
    the fixed rows counts each row's fixed columns (into ``lost``, zeros, one per
    point), and every other row is read only for its length."""
    for d in fixed:
        for s in range(indptr[d], indptr[d + 1]):
            lost[indices[s]] += 1
    for r in prange(free.size):
        i = free[r]
        counts[r] = indptr[i + 1] - indptr[i] - lost[i]


@jit(parallel=True)
def reduced_fill(indptr, indices, data, newindex, free, g, b, rindptr, rindices, rdata, rb):
    """Copy the free-free block and form ``rb = b_free - A_free,fixed g_fixed`` row by row.

    ``g`` is a full-length vector holding the prescribed values at fixed
    points (its other entries are not read).  Column order is kept, so sorted
    rows stay sorted.
    """
    for r in prange(free.size):
        i = free[r]
        acc = b[i]
        pos = rindptr[r]
        for s in range(indptr[i], indptr[i + 1]):
            j = indices[s]
            k = newindex[j]
            if k >= 0:
                rindices[pos] = k
                rdata[pos] = data[s]
                pos += 1
            else:
                acc -= data[s] * g[j]
        rb[r] = acc


@jit(parallel=True)
def row_summary(indptr, indices, data, diag, empty):
    """Per row ``i``: ``diag[i]`` = the sum of its entries in column ``i``, and
    ``empty[i]`` = 1 when it has no entry or only zeros (one pass, no temporaries)."""
    for i in prange(indptr.shape[0] - 1):
        d = 0.0
        nonzero = False
        for s in range(indptr[i], indptr[i + 1]):
            v = data[s]
            if v != 0.0:
                nonzero = True
            if indices[s] == i:
                d += v
        diag[i] = d
        empty[i] = 0 if nonzero else 1


@jit()
def compact_in_place(indptr, indices, data, newindex, free, g, b, rindptr, rb):
    """:func:`reduced_fill` written over the matrix's own ``indices`` and ``data``.

    The free-free entries move to the front, in the same order; ``rindptr``
    and ``rb`` are filled as there.  In one pass in row order every entry is
    written at or before the place it is read from, so nothing is overwritten
    before it is read.  Returns the number of entries kept.
    """
    pos = 0
    rindptr[0] = 0
    for r in range(free.size):
        i = free[r]
        acc = b[i]
        for s in range(indptr[i], indptr[i + 1]):
            j = indices[s]
            k = newindex[j]
            if k >= 0:
                indices[pos] = k
                data[pos] = data[s]
                pos += 1
            else:
                acc -= data[s] * g[j]
        rb[r] = acc
        rindptr[r + 1] = pos
    return pos
