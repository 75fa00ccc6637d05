"""Kernels of the dof assembler: any number ``k`` of degrees of freedom per cell.

The same scheme as the three-vertex plan of :mod:`hatkernels._jit.topology`
and :mod:`hatkernels._jit.assembly`, with ``k`` a run-time value.  The
*incidence* of dof ``i`` lists the codes ``k * t + a`` of the cells ``t``
that hold ``i`` at local position ``a``, in increasing ``t``; the pattern of
row ``i`` is the union of those cells' dofs; the slot plan gives, for each
incidence ``e`` and each local position ``b``, the position in the CSR data
of entry ``(i, cells[t, b])``.

Parallel loops run over dofs (rows) and each iteration writes only its own
row, so there are no races, and every entry is summed in cell order whatever
the thread count.  The wrapper validates everything first: these kernels
trust their indices (they read them as unsigned integers, which spares
numba's checks for negative wraparound in the hot loops).
"""

from numba import prange, uint64

from hatkernels._jit import jit

# Rows with at most this many distinct columns are sorted by insertion (a few
# shifts per column, faster than a sort call on the short rows of low-order
# cells); longer rows by a sort call, O(L log L) instead of O(L^2).
_INSERT_MAX = 64


@jit()
def incidence(cells, ptr, codes):
    """Counting sort of the codes ``k * t + a`` by dof, into ``ptr`` (n+1,) and ``codes`` (M*k,).

    The codes of dof ``i`` end up in ``codes[ptr[i]:ptr[i + 1]]`` in
    increasing cell order.  Serial: one pass to count, one to place.
    """
    m, k = cells.shape
    n = ptr.size - 1
    ptr[:] = 0
    for t in range(m):
        for a in range(k):
            ptr[cells[t, a] + 1] += 1
    for i in range(n):
        ptr[i + 1] += ptr[i]
    fill = ptr[:-1].copy()
    for t in range(m):
        for a in range(k):
            i = cells[t, a]
            codes[fill[i]] = k * t + a
            fill[i] += 1


@jit()
def first_repeat(cells):
    """The first cell that lists a dof twice, or -1 (serial: it stops at the first)."""
    m, k = cells.shape
    for t in range(m):
        for a in range(1, k):
            for b in range(a):
                if cells[t, a] == cells[t, b]:
                    return t
    return -1


@jit(inline="always")
def _bounds(n, nchunks, c):
    return (n * c) // nchunks, (n * (c + 1)) // nchunks


@jit(inline="always")
def _distinct(cells, ptr, codes, i, stamp, out, start, write):
    """The number of distinct dofs of row ``i`` (itself and the dofs of its cells); with
    ``write`` they also go into ``out[start:]``, unsorted, ``i`` first.  ``stamp`` marks
    the dofs already taken with ``i`` (its entries from other rows are never ``i``)."""
    k = cells.shape[1]
    if write:
        out[uint64(start)] = i
    stamp[uint64(i)] = i
    c = 1
    for e in range(ptr[i], ptr[i + 1]):
        q = uint64(codes[uint64(e)])
        t = q // uint64(k)
        for b in range(k):
            j = cells[t, uint64(b)]
            if stamp[uint64(j)] != i:
                stamp[uint64(j)] = i
                if write:
                    out[uint64(start + c)] = j
                c += 1
    return c


@jit(parallel=True)
def pattern_counts(cells, ptr, codes, counts, stamps):
    """``counts[i]`` = the number of distinct columns of row ``i`` (itself and the dofs of
    its cells; 0 for a dof in no cell).  ``stamps`` (one row of ``n`` per chunk, -1
    everywhere) marks the dofs a row has taken: no scratch copy of the row, no sort."""
    n = ptr.size - 1
    nchunks = stamps.shape[0]
    for c in prange(nchunks):
        lo, hi = _bounds(n, nchunks, c)
        stamp = stamps[c]
        for i in range(lo, hi):
            counts[i] = 0 if ptr[i] == ptr[i + 1] else _distinct(cells, ptr, codes, i, stamp,
                                                                   counts, 0, False)


@jit(parallel=True)
def pattern_rows(cells, ptr, codes, indptr, indices, slots, stamps, places):
    """Each row's sorted distinct columns straight into CSR ``indices`` (``indptr`` from
    :func:`pattern_counts`), and the slot plan: ``slots[k t + a, b]`` (shape (M*k, k), in
    cell order) is the position in ``indices`` of entry ``(cells[t, a], cells[t, b])``,
    looked up in ``places`` (one row of ``n`` per chunk: each column's position in the
    row just built).  Each row ``i`` writes only its own entries and the slots of its
    own incidences.  Short rows are sorted by insertion, longer ones by a sort call."""
    k = cells.shape[1]
    n = ptr.size - 1
    nchunks = stamps.shape[0]
    for c in prange(nchunks):
        lo, hi = _bounds(n, nchunks, c)
        stamp = stamps[c]
        place = places[c]
        for i in range(lo, hi):
            start = indptr[i]
            if ptr[i] == ptr[i + 1]:
                continue
            count = _distinct(cells, ptr, codes, i, stamp, indices, start, True)
            if count <= _INSERT_MAX:
                for r in range(start + 1, start + count):
                    v = indices[uint64(r)]
                    w = r - 1
                    while w >= start and indices[uint64(w)] > v:
                        indices[uint64(w + 1)] = indices[uint64(w)]
                        w -= 1
                    indices[uint64(w + 1)] = v
            else:
                indices[start:start + count].sort()
            for r in range(start, start + count):
                place[uint64(indices[uint64(r)])] = r
            for e in range(ptr[i], ptr[i + 1]):
                q = uint64(codes[uint64(e)])
                t = q // uint64(k)
                for b in range(k):
                    slots[q, uint64(b)] = place[uint64(cells[t, uint64(b)])]


@jit(parallel=True)
def gather_matrix(indptr, ptr, codes, slots, element_matrices, data):
    """Fill CSR ``data`` from element matrices (M, k, k), one row per iteration (the plain
    version of :func:`scatter_matrix`, and the path for tables needing > 64 colours).

    Row ``i`` walks its incidences in cell order and adds row ``a`` of each
    cell's matrix into its slots: every entry gets its terms in increasing
    cell order, so the bits do not depend on the thread count; and for
    symmetric element matrices ``(i, j)`` gets the same terms in the same
    order as ``(j, i)``, so the result is symmetric to the last bit.
    """
    k = uint64(element_matrices.shape[1])
    n = indptr.size - 1
    for i in prange(n):
        for s in range(indptr[i], indptr[i + 1]):
            data[uint64(s)] = 0.0
        for e in range(ptr[i], ptr[i + 1]):
            u = uint64(e)
            q = uint64(codes[u])
            t = q // k
            a = q - k * t
            for b in range(k):
                data[uint64(slots[q, b])] += element_matrices[t, a, b]


@jit(parallel=True)
def scatter_matrix(slots, element_matrices, block_size, colour_ptr, blocks, data):
    """Fill CSR ``data`` from element matrices (M, k, k) by coloured blocks of cells.

    Blocks of ``block_size`` consecutive cells run in parallel within a
    colour (two blocks of one colour share no dof, so no two threads write
    one entry), colour after colour; each block adds its cells' matrices in
    cell order.  Every entry gets its terms in an order fixed by the table
    (colour, block, cell), whatever the thread count; ``(i, j)`` and
    ``(j, i)`` get theirs from the same cells in the same order, so
    symmetric element matrices give a matrix symmetric to the last bit.
    Reads the element matrices and the slots once, in order.
    """
    m = uint64(element_matrices.shape[0])
    k = uint64(element_matrices.shape[1])
    bs = uint64(block_size)
    for s in prange(data.size):
        data[s] = 0.0
    for c in range(colour_ptr.size - 1):
        for j in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = uint64(blocks[j])
            stop = min(m, (b + uint64(1)) * bs)
            for t in range(b * bs, stop):
                for a in range(k):
                    r = t * k + a
                    for q in range(k):
                        data[uint64(slots[r, q])] += element_matrices[t, a, q]


@jit(parallel=True)
def gather_vector(ptr, codes, element_vectors, out):
    """``out[i]`` = the sum of the element vectors' entries at dof ``i``, in cell order."""
    k = uint64(element_vectors.shape[1])
    n = ptr.size - 1
    for i in prange(n):
        s = 0.0
        for e in range(ptr[i], ptr[i + 1]):
            q = uint64(codes[uint64(e)])
            t = q // k
            s += element_vectors[t, q - k * t]
        out[i] = s
