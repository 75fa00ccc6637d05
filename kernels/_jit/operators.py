"""Matrix-free stiffness products by coloured blocks of elements.

Elements (triangles, or edges) are cut into blocks of consecutive elements;
blocks are coloured so that two blocks of one colour share no point.  A
product runs colour by colour; within a colour, blocks run in parallel and
each block adds its elements' contributions into ``y`` in element order.
Every ``y[i]`` therefore receives its terms in an order fixed by the mesh
(colour, then block, then element), whatever the thread count, and no two
threads ever write the same entry.

With a mesh numbered for locality (our generators, refinement, or a
Hilbert reordering) consecutive elements are neighbours, so a block's
points sit close together in memory and there are few colours (3 to 6).
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit
from hatkernels._jit.assembly import _geometry, _ip, _rotated

#: At most this many colours (one bit each in a uint64 mask per point).
MAX_COLOURS = 64


@jit(inline="always")
def _take_colour(used, colour, b):
    """Give block ``b`` the lowest colour not in the mask ``used``; return its bit.

    With all :data:`MAX_COLOURS` taken, every block's colour becomes ``-1``
    and the bit returned is 0.
    """
    c = 0
    while c < MAX_COLOURS and (used >> np.uint64(c)) & np.uint64(1):
        c += 1
    if c == MAX_COLOURS:
        colour[:] = -1
        return np.uint64(0)
    colour[b] = c
    return np.uint64(1) << np.uint64(c)


@jit()
def colour_blocks(elements, n_points, block_size):
    """Greedy colouring of blocks of ``block_size`` consecutive elements.

    ``elements`` is (n_elements, k) point indices.  Each point keeps a bit
    mask of the colours of the blocks that touched it; a block takes the
    lowest colour none of its points has seen.  Returns ``colour`` per block,
    or all ``-1`` when more than :data:`MAX_COLOURS` colours would be needed.
    """
    m = elements.shape[0]
    k = elements.shape[1]
    n_blocks = (m + block_size - 1) // block_size
    seen = np.zeros(n_points, dtype=np.uint64)
    colour = np.empty(n_blocks, dtype=np.int64)
    for b in range(n_blocks):
        used = np.uint64(0)
        for t in range(b * block_size, min(m, (b + 1) * block_size)):
            for a in range(k):
                used |= seen[elements[t, a]]
        bit = _take_colour(used, colour, b)
        if bit == 0:
            return colour
        for t in range(b * block_size, min(m, (b + 1) * block_size)):
            for a in range(k):
                seen[elements[t, a]] |= bit
    return colour


@jit(parallel=True)
def _zero(y):
    for i in prange(y.size):
        y[i] = 0.0


@jit(parallel=True)
def masked_copy(x, fixed, out):
    """``out = x`` with ``out[fixed] = 0``."""
    for i in prange(x.size):
        out[i] = x[i]
    for k in prange(fixed.size):
        out[fixed[k]] = 0.0


@jit(parallel=True)
def identity_rows(fixed, x, y):
    """``y[fixed] = x[fixed]``."""
    for k in prange(fixed.size):
        y[fixed[k]] = x[fixed[k]]


@jit(parallel=True)
def residual_rows(fixed, x, b, y):
    """``y[fixed] = b[fixed] - x[fixed]``: the identity rows of a residual."""
    for k in prange(fixed.size):
        y[fixed[k]] = b[fixed[k]] - x[fixed[k]]


@jit(inline="always")
def _add_triangle(y, i0, i1, i2, o0, o1, o2, x0, x1, x2):
    """``y += K_T x`` for a zero-row-sum element matrix given by its off-diagonals.

    ``(K x)_a = sum over b != a of K_ab (x_b - x_a)``; ``o_c`` is the entry
    of the pair opposite vertex ``c``.
    """
    y[i0] += o2 * (x1 - x0) + o1 * (x2 - x0)
    y[i1] += o2 * (x0 - x1) + o0 * (x2 - x1)
    y[i2] += o1 * (x0 - x2) + o0 * (x1 - x2)


@jit(inline="always")
def _offdiagonals_scalar(points, triangles, t, kappa, ks, tensor, ts):
    """Off-diagonal stiffness entries of triangle ``t`` (pairs opposite vertices 0, 1, 2)."""
    e00, e01, e10, e11, e20, e21, d, i0, i1, i2 = _geometry(points, triangles, t)
    w = kappa[uint64(t * ks)] / (2.0 * d)
    o0 = w * (e10 * e20 + e11 * e21)
    o1 = w * (e20 * e00 + e21 * e01)
    o2 = w * (e00 * e10 + e01 * e11)
    return o0, o1, o2, i0, i1, i2


@jit(inline="always")
def _offdiagonals_tensor(points, triangles, t, kappa, ks, tensor, ts):
    """As :func:`_offdiagonals_scalar` with a 2x2 tensor coefficient."""
    e00, e01, e10, e11, e20, e21, d, i0, i1, i2 = _geometry(points, triangles, t)
    w = 1.0 / (2.0 * d)
    k00, k01, k11 = _rotated(tensor, t * ts)
    o0 = w * _ip(e10, e11, e20, e21, k00, k01, k11)
    o1 = w * _ip(e20, e21, e00, e01, k00, k01, k11)
    o2 = w * _ip(e00, e01, e10, e11, k00, k01, k11)
    return o0, o1, o2, i0, i1, i2


@jit(inline="always")
def _offdiagonals(points, triangles, t, kappa, ks, tensor, ts):
    """Either kind of coefficient, chosen per triangle (for the setup kernels)."""
    if tensor.shape[0] == 0:
        return _offdiagonals_scalar(points, triangles, t, kappa, ks, tensor, ts)
    return _offdiagonals_tensor(points, triangles, t, kappa, ks, tensor, ts)


# The products have one kernel per kind of coefficient: a per-triangle branch
# was measured 20 % slower.  They are written out at module level, not made by
# a factory: numba's disk cache keys functions by name, and factory-made
# functions of one name overwrote each other's entries, so they were
# compiled again in every process.


@jit(parallel=True)
def product_scalar(points, triangles, kappa, ks, tensor, ts, block_size, colour_ptr, blocks, x, y):
    """``y = A x`` for a scalar coefficient, recomputing the geometry of every triangle."""
    m = triangles.shape[0]
    _zero(y)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            for t in range(b * block_size, min(m, (b + 1) * block_size)):
                o0, o1, o2, i0, i1, i2 = _offdiagonals_scalar(
                    points, triangles, t, kappa, ks, tensor, ts
                )
                _add_triangle(y, i0, i1, i2, o0, o1, o2, x[i0], x[i1], x[i2])


@jit(parallel=True)
def product_tensor(points, triangles, kappa, ks, tensor, ts, block_size, colour_ptr, blocks, x, y):
    """As :func:`product_scalar` for a tensor coefficient."""
    m = triangles.shape[0]
    _zero(y)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            for t in range(b * block_size, min(m, (b + 1) * block_size)):
                o0, o1, o2, i0, i1, i2 = _offdiagonals_tensor(
                    points, triangles, t, kappa, ks, tensor, ts
                )
                _add_triangle(y, i0, i1, i2, o0, o1, o2, x[i0], x[i1], x[i2])


@jit()
def product_serial(points, triangles, kappa, ks, tensor, ts, x, y):
    """The plain version: one loop over triangles, no colouring (also the fallback)."""
    y[:] = 0.0
    for t in range(triangles.shape[0]):
        o0, o1, o2, i0, i1, i2 = _offdiagonals(points, triangles, t, kappa, ks, tensor, ts)
        _add_triangle(y, i0, i1, i2, o0, o1, o2, x[i0], x[i1], x[i2])


@jit(parallel=True)
def diagonal(points, triangles, kappa, ks, tensor, ts, block_size, colour_ptr, blocks, y):
    """The diagonal into ``y``: zero row sums make ``K_aa`` minus its row's off-diagonals."""
    m = triangles.shape[0]
    _zero(y)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            for t in range(b * block_size, min(m, (b + 1) * block_size)):
                o0, o1, o2, i0, i1, i2 = _offdiagonals(points, triangles, t, kappa, ks, tensor, ts)
                y[i0] -= o1 + o2
                y[i1] -= o0 + o2
                y[i2] -= o0 + o1


@jit(parallel=True)
def diagonal_and_offsum(points, triangles, kappa, ks, tensor, ts, block_size, colour_ptr, blocks,
                        diag, off):
    """The diagonal into ``diag`` and the row sums of ``|A_ij|``, ``j != i``, into ``off``.

    One pass for Gershgorin's bound and the smoother's diagonal.
    """
    m = triangles.shape[0]
    _zero(diag)
    _zero(off)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            for t in range(b * block_size, min(m, (b + 1) * block_size)):
                o0, o1, o2, i0, i1, i2 = _offdiagonals(points, triangles, t, kappa, ks, tensor, ts)
                diag[i0] -= o1 + o2
                diag[i1] -= o0 + o2
                diag[i2] -= o0 + o1
                off[i0] += abs(o1) + abs(o2)
                off[i1] += abs(o0) + abs(o2)
                off[i2] += abs(o0) + abs(o1)


@jit(parallel=True)
def offdiagonal_values(points, triangles, kappa, ks, tensor, ts, out):
    """The three off-diagonal entries of each triangle into ``out`` (M, 3)."""
    for t in prange(triangles.shape[0]):
        o0, o1, o2, _, _, _ = _offdiagonals(points, triangles, t, kappa, ks, tensor, ts)
        out[t, 0] = o0
        out[t, 1] = o1
        out[t, 2] = o2


@jit(parallel=True)
def edge_weights(points, triangles, kappa, ks, tensor, ts, block_size, colour_ptr, blocks,
                 triangle_edges, w):
    """``w[e]``: the sum over edge ``e``'s triangles of their entry for its two points."""
    m = triangles.shape[0]
    _zero(w)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            for t in range(b * block_size, min(m, (b + 1) * block_size)):
                o0, o1, o2, _, _, _ = _offdiagonals(points, triangles, t, kappa, ks, tensor, ts)
                w[triangle_edges[t, 0]] += o0
                w[triangle_edges[t, 1]] += o1
                w[triangle_edges[t, 2]] += o2


@jit()
def remove_fixed_columns(points, triangles, kappa, ks, tensor, ts, near, is_fixed, x, y):
    """``y -= A[:, fixed] x[fixed]``, over the triangles ``near`` the fixed points only.

    With it a product with identity rows and columns at the fixed points is
    the plain product, this boundary correction (serial, in a fixed order)
    and a copy of the fixed entries: no masked copy of ``x`` is needed.
    """
    for k in range(near.size):
        t = near[k]
        o0, o1, o2, i0, i1, i2 = _offdiagonals(points, triangles, t, kappa, ks, tensor, ts)
        a0 = x[i0] if is_fixed[i0] else 0.0
        a1 = x[i1] if is_fixed[i1] else 0.0
        a2 = x[i2] if is_fixed[i2] else 0.0
        _add_triangle(y, i0, i1, i2, -o0, -o1, -o2, a0, a1, a2)


@jit(parallel=True)
def apply_factors(triangles, ovals, block_size, colour_ptr, blocks, x, y):
    """``y = A x`` from stored off-diagonal element values ``ovals`` (M, 3)."""
    m = triangles.shape[0]
    _zero(y)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            for tt in range(b * block_size, min(m, (b + 1) * block_size)):
                t = uint64(tt)
                i0 = uint64(triangles[t, uint64(0)])
                i1 = uint64(triangles[t, uint64(1)])
                i2 = uint64(triangles[t, uint64(2)])
                _add_triangle(
                    y,
                    i0,
                    i1,
                    i2,
                    ovals[t, uint64(0)],
                    ovals[t, uint64(1)],
                    ovals[t, uint64(2)],
                    x[i0],
                    x[i1],
                    x[i2],
                )


@jit(parallel=True)
def apply_edges(starts, ends, weights, rows_per_block, colour_ptr, blocks, x, y):
    """``y = A x`` from one weight per edge: ``(A x)_i = sum_j a_ij (x_j - x_i)``.

    The edges ``(i, ends[e])`` with ``i < ends[e]`` are stored by their first
    point: row ``i``'s are ``starts[i]:starts[i+1]`` (the upper triangle of the
    matrix's pattern, without the diagonal).  A block is a run of
    ``rows_per_block`` rows (see :func:`colour_row_blocks`); each row's own
    terms are summed in a register.
    """
    n = starts.size - 1
    _zero(y)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            for ii in range(b * rows_per_block, min(n, (b + 1) * rows_per_block)):
                i = uint64(ii)
                e0 = uint64(starts[i])
                e1 = uint64(starts[i + uint64(1)])
                if e0 == e1:
                    continue  # a row with no edge: not one of this block's points
                xi = x[i]
                acc = 0.0
                for e in range(e0, e1):
                    j = uint64(ends[e])
                    d = weights[e] * (x[j] - xi)
                    acc += d
                    y[j] -= d
                y[i] += acc


@jit()
def colour_row_blocks(starts, ends, n_points, rows_per_block):
    """Greedy colouring of blocks of ``rows_per_block`` consecutive rows of an edge list.

    A block's points are its rows that have edges and those edges' ends; as
    :func:`colour_blocks` otherwise.
    """
    n = starts.size - 1
    n_blocks = (n + rows_per_block - 1) // rows_per_block
    seen = np.zeros(n_points, dtype=np.uint64)
    colour = np.empty(n_blocks, dtype=np.int64)
    for b in range(n_blocks):
        r0 = b * rows_per_block
        r1 = min(n, (b + 1) * rows_per_block)
        used = np.uint64(0)
        for i in range(r0, r1):
            if starts[i] < starts[i + 1]:
                used |= seen[i]
        for e in range(starts[r0], starts[r1]):
            used |= seen[ends[e]]
        bit = _take_colour(used, colour, b)
        if bit == 0:
            return colour
        for i in range(r0, r1):
            if starts[i] < starts[i + 1]:
                seen[i] |= bit
        for e in range(starts[r0], starts[r1]):
            seen[ends[e]] |= bit
    return colour

