"""The patch product ``y = A x`` with its ring fused: what CG calls once per iteration
(:mod:`hatkernels._jit.patches` for the layout and the notation).

:func:`hatkernels._jit.patches.apply` makes the product in four passes per coarse
cell after the middle of the inside rows: it copies the ring next to the sides into a
local patch, makes the inside rows next to the sides from it, then the cell's part of
the side rows, then copies those into the shared buffers.  At ``n = 64`` that ring
work cost as much as the middle rows (about 1.4 us per cell each on one core of the
benchmark machine), and the product ran at 2.4-3 times its bandwidth floor.

:func:`product` makes the same sums with one pass over each cell's inside rows.  A
chunk's sides (corners included) are first copied into short vectors, three per cell;
then each cell's inside rows are written whole, in the order they lie in ``y``, in
explicit vectors (:func:`hatkernels._jit.simd.stencil_row`: no run-time overlap
checks, no scalar remainders; each row's end lanes read the sides), while the next
chunk's coarse edges are prefetched.  The cells' parts of the side rows and corner
rows (side A-B, the slanted sides A-C and B-C, the points next to the lattice's
corners) follow for the whole chunk, from the cache.  Row 1 written in its place, the
side rows of a chunk taken together and the sides read ahead made the product 11-13 %
faster at ``n = 64`` (docs/patches.md, "The floor corrected; row 1 in place"); the
rows in explicit vectors 7 to 15 % more (docs/patches.md, "Rows in explicit
vectors").  Indices are unsigned (no negative-index checks), the per-cell helpers are
inlined and the per-cell data are indexed in flat buffers with offsets: numba passes
an array to a helper that is not inlined, and makes a view, with an atomic reference
count.  Every sum is the one :func:`hatkernels._jit.patches._stencil` or
:func:`hatkernels._jit.patches._local_apply` makes, term for term in the same order,
so the product is the same bits as ``apply``'s; the tests check that on meshes with
flipped and held edges.
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit
from hatkernels._jit.patches import (
    CHUNK,
    COPY,
    _sum_shared,
    held_points,
    prefetch_edges,
)
from hatkernels._jit.simd import stencil_row

# the smallest level the fused ring takes (rows 1, 2 and the two top rows distinct);
# coarser levels use hatkernels._jit.patches.apply
SMALLEST = 8


@jit(inline="always")
def _copy_side(x, s, so, first, flip, zero, n):
    """``s[so + t]``, ``t = 1..n-1``: the points of a coarse edge whose values start at
    ``x[first]``, in the side's direction (``flip``: against the edge's), or 0."""
    one, un, so = uint64(1), uint64(n), uint64(so)
    if zero:
        for t in range(one, un):
            s[so + t] = 0.0
    elif flip:
        top = uint64(first) + un - one  # point t is x[first + n - 1 - t]
        for t in range(one, un):
            s[so + t] = x[top - t]
    else:
        f = uint64(first) - one
        for t in range(one, un):
            s[so + t] = x[f + t]


@jit(inline="always")
def _sides(x, c, s, o, n, topo, held_e, held_v, masked):
    """The lattice's sides with their corners, from ``s[o]`` on, each ``n + 1`` long:
    ``s0[t] = (t, 0)``, ``s1[t] = (0, t)``, ``s2[t] = (n - t, t)`` for ``t = 0..n``
    (``s0`` at ``o``, ``s1`` after it, then ``s2``); held points read as 0 when
    ``masked``."""
    tri, cell_edge, cell_flip, edge_v = topo[0], topo[1], topo[2], topo[3]
    m = tri.shape[0]
    base_e = m * ((n - 1) * (n - 2) // 2)
    base_v = base_e + edge_v.shape[0] * (n - 1)
    b0, b1, b2 = o, o + n + 1, o + 2 * (n + 1)
    e0, e1, e2 = cell_edge[c, 0], cell_edge[c, 1], cell_edge[c, 2]
    _copy_side(x, s, b0, base_e + e0 * (n - 1), cell_flip[c, 0], masked and held_e[e0], n)
    _copy_side(x, s, b1, base_e + e1 * (n - 1), cell_flip[c, 1], masked and held_e[e1], n)
    _copy_side(x, s, b2, base_e + e2 * (n - 1), cell_flip[c, 2], masked and held_e[e2], n)
    a, b, cc = tri[c, 0], tri[c, 1], tri[c, 2]
    va = 0.0 if masked and held_v[a] else x[base_v + a]
    vb = 0.0 if masked and held_v[b] else x[base_v + b]
    vc = 0.0 if masked and held_v[cc] else x[base_v + cc]
    s[b0], s[b0 + n] = va, vb
    s[b1], s[b1 + n] = va, vc
    s[b2], s[b2 + n] = vb, vc


@jit(inline="always")
def _ab_row(s, a0, x, r1, i, tr, ab, ac2, bc2):
    """Side A-B's point ``i`` (side A-B from ``s[a0]`` on): this cell's part of its row."""
    one = uint64(1)
    return (tr * s[a0 + i] + ab * (s[a0 + i - one] + s[a0 + i + one]) + ac2 * x[r1 + i - one]
            + bc2 * x[r1 + i - one - one])


@jit(inline="always")
def _rows(x, y, s, o, n, K, c, start):
    """The cell's inside rows, in the order of ``y``, in explicit vectors
    (:func:`hatkernels._jit.simd.stencil_row`): row 1 reads side A-B below it, and each
    row's first and last point read sides A-C and B-C (``s1``, ``s2`` of :func:`_sides`,
    from ``s[o]`` on)."""
    d = 2.0 * (K[c, 0, 0] + K[c, 1, 1] + K[c, 2, 2])
    h, v, g = 2.0 * K[c, 0, 1], 2.0 * K[c, 0, 2], 2.0 * K[c, 1, 2]
    b1, b2 = o + n + 1, o + 2 * (n + 1)
    # row j starts at rj and has n - 1 - j points; side A-B's point i is s[o + i]
    r1 = start
    stencil_row(x, s, y, r1, o + 1, r1 + n - 2, n - 2, d, h, v, g, s[b1 + 1], s[b1 + 2],
                s[b2 + 1], s[b2 + 2])
    below, rj = r1, r1 + n - 2
    for j in range(2, n - 1):
        w = n - 1 - j
        stencil_row(x, x, y, rj, below, rj + w, w, d, h, v, g, s[b1 + j], s[b1 + j + 1],
                    s[b2 + j], s[b2 + j + 1])
        below, rj = rj, rj + w


@jit(inline="always")
def _ring(x, c, s, o, n, K, start, flat, pv, cell_flip):
    """This cell's part of the side rows (into ``flat``, the buffer ``pe`` flat) and of the
    corner rows (into ``pv``), from the sides that :func:`_sides` left from ``s[o]`` on
    and the inside points next to them; ``K`` and ``cell_flip`` indexed here (no views
    per cell: their reference counts cost more than the work at ``n = 8``)."""
    tr = K[c, 0, 0] + K[c, 1, 1] + K[c, 2, 2]
    ab, ac, bc = K[c, 0, 1], K[c, 0, 2], K[c, 1, 2]
    ab2, ac2, bc2 = 2.0 * ab, 2.0 * ac, 2.0 * bc
    f0, f1, f2 = cell_flip[c, 0], cell_flip[c, 1], cell_flip[c, 2]
    one, two = uint64(1), uint64(2)
    r1 = uint64(start)  # row 1
    # the sides s0, s1, s2 start at s[a0], s[a1], s[a2] (unsigned, in the loops) and at
    # s[b0], s[b1], s[b2] (signed, in the points written one by one)
    b0, b1, b2 = o, o + n + 1, o + 2 * (n + 1)
    a0, a1, a2 = uint64(b0), uint64(b1), uint64(b2)
    # side A-B into this cell's buffer, in the edge's order (flat, unsigned: vectorises)
    un, e0 = uint64(n), uint64(3 * c * (n - 1))
    if f0:  # point i at n - 1 - i
        for i in range(two, un - one):
            flat[e0 + un - one - i] = _ab_row(s, a0, x, r1, i, tr, ab, ac2, bc2)
    else:
        for i in range(two, un - one):
            flat[e0 + i - one] = _ab_row(s, a0, x, r1, i, tr, ab, ac2, bc2)
    # up the slanted sides: row j starts at rj, the rows below and above at rb and ra
    # (unsigned indices throughout: no negative-index checks)
    e1, e2 = e0 + un - one, e0 + un - one + un - one  # sides A-C and B-C
    rb, rj = r1, r1 + un - two
    for j in range(two, un - one):
        w = un - one - j  # row j's width
        ra = rj + w
        flat[e1 + (un - one - j if f1 else j - one)] = (
            tr * s[a1 + j] + ab2 * x[rj] + ac * (s[a1 + j + one] + s[a1 + j - one]) + bc2 * x[rb])
        flat[e2 + (un - one - j if f2 else j - one)] = (
            tr * s[a2 + j] + ab2 * x[rj + w - one] + ac2 * x[rb + w]
            + bc * (s[a2 + j + one] + s[a2 + j - one]))
        rb, rj = rj, ra
    rb = int(rb)
    # the sides' points next to the lattice's corners, whose neighbours differ, one by one
    p, q = start + n - 3, rb  # the inside points (n - 2, 1) and (1, n - 2)
    # the sides' end points: side l of cell c starts at flat[p0 + l ps]
    p0, ps = 3 * c * (n - 1), n - 1
    lo, hi = n - 2 if f0 else 0, 0 if f0 else n - 2
    flat[p0 + lo] = tr * s[b0 + 1] + ab * (s[b0] + s[b0 + 2]) + ac2 * x[start] + bc2 * s[b1 + 1]
    flat[p0 + hi] = (tr * s[b0 + n - 1] + ab * (s[b0 + n - 2] + s[b0 + n]) + ac2 * s[b2 + 1]
                     + bc2 * x[p])
    lo, hi = n - 2 if f1 else 0, 0 if f1 else n - 2
    flat[p0 + ps + lo] = (tr * s[b1 + 1] + ab2 * x[start] + ac * (s[b1 + 2] + s[b1])
                         + bc2 * s[b0 + 1])
    flat[p0 + ps + hi] = (tr * s[b1 + n - 1] + ab2 * s[b2 + n - 1]
                         + ac * (s[b1 + n] + s[b1 + n - 2]) + bc2 * x[q])
    lo, hi = n - 2 if f2 else 0, 0 if f2 else n - 2
    flat[p0 + 2 * ps + lo] = (tr * s[b2 + 1] + ab2 * x[p] + ac2 * s[b0 + n - 1]
                             + bc * (s[b2 + 2] + s[b2]))
    flat[p0 + 2 * ps + hi] = (tr * s[b2 + n - 1] + ab2 * s[b1 + n - 1] + ac2 * x[q]
                             + bc * (s[b2 + n] + s[b2 + n - 2]))
    pv[c, 0] = K[c, 0, 0] * s[b0] + ab * s[b0 + 1] + ac * s[b1 + 1]
    pv[c, 1] = ab * s[b0 + n - 1] + K[c, 1, 1] * s[b0 + n] + bc * s[b2 + 1]
    pv[c, 2] = ac * s[b1 + n - 1] + bc * s[b2 + n - 1] + K[c, 2, 2] * s[b1 + n]


@jit(parallel=True)
def product(x, y, n, K, topo, held_e, held_v, masked, pe, pv):
    """``y = A x`` on a level with ``n >= SMALLEST`` subdivisions: the same bits as
    ``patches.apply(..., what=0)`` (``masked``: held rows and columns taken out)."""
    tri, cell_edge, cell_flip = topo[0], topo[1], topo[2]
    m = tri.shape[0]
    inside = (n - 1) * (n - 2) // 2
    base_e = m * inside
    flat = pe.reshape(-1)  # the cells' parts of the side rows, flat (no views per cell)
    for ch in prange((m + CHUNK - 1) // CHUNK):  # scratch once per chunk
        # the chunk's sides, three per cell, each n + 1 long (one flat buffer: no views,
        # whose reference counts cost more than the work at n = 8)
        sides = np.empty(3 * CHUNK * (n + 1))
        lo, hi = ch * CHUNK, min(m, (ch + 1) * CHUNK)
        for c in range(lo, hi):
            _sides(x, c, sides, 3 * (c - lo) * (n + 1), n, topo, held_e, held_v, masked)
        # each cell's row 1 and the middle of its other inside rows, in the order of y (x
        # and y streamed in once, y written without a gap per cell); meanwhile the next
        # chunk's sides are fetched (the same cell of the next chunk: its three edges)
        for c in range(lo, hi):
            if c + CHUNK < m:
                prefetch_edges(x, c + CHUNK, n, base_e, cell_edge)
            _rows(x, y, sides, 3 * (c - lo) * (n + 1), n, K, c, c * inside)
        # then, from the cache, the chunk's rings
        for c in range(lo, hi):
            _ring(x, c, sides, 3 * (c - lo) * (n + 1), n, K, c * inside, flat, pv, cell_flip)
    _sum_shared(y, pe, pv, n, topo)
    if masked:  # identity rows: y = x there
        held_points(x, y, n, topo, held_e, held_v, COPY)
