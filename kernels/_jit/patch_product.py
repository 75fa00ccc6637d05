"""The patch product ``y = A x`` with its ring fused: what CG calls once per iteration
(:mod:`hatkernels._jit.patches` for the layout and the notation).

:func:`hatkernels._jit.patches.apply` makes the product in four passes per coarse
cell after the middle of the inside rows: it copies the ring next to the sides into a
local patch, makes the inside rows next to the sides from it, then the cell's part of
the side rows, then copies those into the shared buffers.  At ``n = 64`` that ring
work cost as much as the middle rows (about 1.4 us per cell each on one core of the
benchmark machine), and the product ran at 2.4-3 times its bandwidth floor.

:func:`product` makes the same sums in one pass per cell: the three sides (corners
included) are copied into three short vectors, then one loop along the first row
(row 1 and side A-B) and one loop up the two slanted sides (the first and last inside
point of each row, sides A-C and B-C) read the inside points straight from ``x`` and
write ``y`` and the shared buffers; the dozen points next to the lattice's corners,
whose neighbours differ, are written out one by one.  Indices are unsigned (no
negative-index checks) and the per-cell helpers are inlined (numba then passes no
array references, whose counts are atomic operations).  Every sum is the one
:func:`hatkernels._jit.patches._stencil` or :func:`hatkernels._jit.patches._local_apply`
makes, term for term in the same order, so the product is the same bits as
``apply``'s; the tests check that on meshes with flipped and held edges.
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit
from hatkernels._jit.patches import (
    CHUNK,
    COPY,
    _inside_rows,
    _sum_shared,
    held_points,
)

# the smallest level the fused ring takes (rows 1, 2 and the two top rows distinct);
# coarser levels use hatkernels._jit.patches.apply
SMALLEST = 8


@jit(inline="always")
def _copy_side(x, s, first, flip, zero, n):
    """``s[t]``, ``t = 1..n-1``: the points of a coarse edge whose values start at
    ``x[first]``, in the side's direction (``flip``: against the edge's), or 0."""
    one, un = uint64(1), uint64(n)
    if zero:
        for t in range(one, un):
            s[t] = 0.0
    elif flip:
        top = uint64(first) + un - one  # point t is x[first + n - 1 - t]
        for t in range(one, un):
            s[t] = x[top - t]
    else:
        f = uint64(first) - one
        for t in range(one, un):
            s[t] = x[f + t]


@jit(inline="always")
def _sides(x, c, s0, s1, s2, n, topo, held_e, held_v, masked):
    """The lattice's sides with their corners: ``s0[t] = (t, 0)``, ``s1[t] = (0, t)``,
    ``s2[t] = (n - t, t)`` for ``t = 0..n``; held points read as 0 when ``masked``."""
    tri, cell_edge, cell_flip, edge_v = topo[0], topo[1], topo[2], topo[3]
    m = tri.shape[0]
    base_e = m * ((n - 1) * (n - 2) // 2)
    base_v = base_e + edge_v.shape[0] * (n - 1)
    e0, e1, e2 = cell_edge[c, 0], cell_edge[c, 1], cell_edge[c, 2]
    _copy_side(x, s0, base_e + e0 * (n - 1), cell_flip[c, 0], masked and held_e[e0], n)
    _copy_side(x, s1, base_e + e1 * (n - 1), cell_flip[c, 1], masked and held_e[e1], n)
    _copy_side(x, s2, base_e + e2 * (n - 1), cell_flip[c, 2], masked and held_e[e2], n)
    a, b, cc = tri[c, 0], tri[c, 1], tri[c, 2]
    va = 0.0 if masked and held_v[a] else x[base_v + a]
    vb = 0.0 if masked and held_v[b] else x[base_v + b]
    vc = 0.0 if masked and held_v[cc] else x[base_v + cc]
    s0[0], s0[n] = va, vb
    s1[0], s1[n] = va, vc
    s2[0], s2[n] = vb, vc


@jit(inline="always")
def _ab_row(s0, x, r1, i, tr, ab, ac2, bc2):
    """Side A-B's point ``i``: this cell's part of its row."""
    one = uint64(1)
    return (tr * s0[i] + ab * (s0[i - one] + s0[i + one]) + ac2 * x[r1 + i - one]
            + bc2 * x[r1 + i - one - one])


@jit(inline="always")
def _ring(x, y, c, s0, s1, s2, n, K, start, pe, pv, flip):
    """The inside rows next to the sides, this cell's part of the side rows (into ``pe``)
    and of the corner rows (into ``pv``), from the sides in ``s0``, ``s1``, ``s2``."""
    d = 2.0 * (K[0, 0] + K[1, 1] + K[2, 2])
    h, v, g = 2.0 * K[0, 1], 2.0 * K[0, 2], 2.0 * K[1, 2]
    tr = K[0, 0] + K[1, 1] + K[2, 2]
    ab, ac, bc = K[0, 1], K[0, 2], K[1, 2]
    ab2, ac2, bc2 = 2.0 * ab, 2.0 * ac, 2.0 * bc
    f0, f1, f2 = flip[0], flip[1], flip[2]
    # row 1 (i = 2..n-3) and side A-B (i = 2..n-2): rows 1 and 2 start at r1 and r2
    # (unsigned indices: the loop vectorises)
    one, two = uint64(1), uint64(2)
    r1, r2 = uint64(start), uint64(start + n - 2)
    for i in range(two, uint64(n - 2)):
        y[r1 + i - one] = (d * x[r1 + i - one] + h * (x[r1 + i - two] + x[r1 + i])
                           + v * (s0[i] + x[r2 + i - one]) + g * (s0[i + one] + x[r2 + i - two]))
    # side A-B into this cell's buffer, in the edge's order (flat, unsigned: vectorises)
    flat, un, e0 = pe.reshape(-1), uint64(n), uint64(3 * c * (n - 1))
    if f0:  # point i at n - 1 - i
        for i in range(two, un - one):
            flat[e0 + un - one - i] = _ab_row(s0, x, r1, i, tr, ab, ac2, bc2)
    else:
        for i in range(two, un - one):
            flat[e0 + i - one] = _ab_row(s0, x, r1, i, tr, ab, ac2, bc2)
    # up the slanted sides: row j starts at rj, the rows below and above at rb and ra
    # (unsigned indices throughout: no negative-index checks)
    pe1, pe2 = pe[c, 1], pe[c, 2]
    st, top = uint64(start), uint64(n - 3)
    rb, rj = st, st + un - two
    for j in range(two, un - one):
        w = un - one - j  # row j's width
        ra = rj + w
        if j <= top:  # its first and last inside points (rows of width 2 or more)
            y[rj] = (d * x[rj] + h * (s1[j] + x[rj + one]) + v * (x[rb] + x[ra])
                     + g * (x[rb + one] + s1[j + one]))
            y[rj + w - one] = (d * x[rj + w - one] + h * (x[rj + w - two] + s2[j])
                               + v * (x[rb + w - one] + s2[j + one])
                               + g * (x[rb + w] + x[ra + w - two]))
        pe1[un - one - j if f1 else j - one] = (
            tr * s1[j] + ab2 * x[rj] + ac * (s1[j + one] + s1[j - one]) + bc2 * x[rb])
        pe2[un - one - j if f2 else j - one] = (
            tr * s2[j] + ab2 * x[rj + w - one] + ac2 * x[rb + w] + bc * (s2[j + one] + s2[j - one]))
        rb, rj = rj, ra
    rb = int(rb)
    # the points whose neighbours the lattice's corners change, one by one: row 1's ends,
    # the top row's one point, the sides' end points, the corners
    p, q = start + n - 3, rb  # the points (n - 2, 1) and (1, n - 2)
    y[start] = (d * x[start] + h * (s1[1] + x[start + 1]) + v * (s0[1] + x[start + n - 2])
                + g * (s0[2] + s1[2]))
    y[p] = (d * x[p] + h * (x[p - 1] + s2[1]) + v * (s0[n - 2] + s2[2])
            + g * (s0[n - 1] + x[start + 2 * n - 6]))
    y[q] = (d * x[q] + h * (s1[n - 2] + s2[n - 2]) + v * (x[q - 2] + s2[n - 1])
            + g * (x[q - 1] + s1[n - 1]))
    lo, hi = n - 2 if f0 else 0, 0 if f0 else n - 2
    pe[c, 0, lo] = tr * s0[1] + ab * (s0[0] + s0[2]) + ac2 * x[start] + bc2 * s1[1]
    pe[c, 0, hi] = tr * s0[n - 1] + ab * (s0[n - 2] + s0[n]) + ac2 * s2[1] + bc2 * x[p]
    lo, hi = n - 2 if f1 else 0, 0 if f1 else n - 2
    pe[c, 1, lo] = tr * s1[1] + ab2 * x[start] + ac * (s1[2] + s1[0]) + bc2 * s0[1]
    pe[c, 1, hi] = tr * s1[n - 1] + ab2 * s2[n - 1] + ac * (s1[n] + s1[n - 2]) + bc2 * x[q]
    lo, hi = n - 2 if f2 else 0, 0 if f2 else n - 2
    pe[c, 2, lo] = tr * s2[1] + ab2 * x[p] + ac2 * s0[n - 1] + bc * (s2[2] + s2[0])
    pe[c, 2, hi] = tr * s2[n - 1] + ab2 * s1[n - 1] + ac2 * x[q] + bc * (s2[n] + s2[n - 2])
    pv[c, 0] = K[0, 0] * s0[0] + ab * s0[1] + ac * s1[1]
    pv[c, 1] = ab * s0[n - 1] + K[1, 1] * s0[n] + bc * s2[1]
    pv[c, 2] = ac * s1[n - 1] + bc * s2[n - 1] + K[2, 2] * s1[n]


@jit(parallel=True)
def product(x, y, n, K, topo, held_e, held_v, masked, pe, pv):
    """``y = A x`` on a level with ``n >= SMALLEST`` subdivisions: the same bits as
    ``patches.apply(..., what=0)`` (``masked``: held rows and columns taken out)."""
    tri, cell_flip = topo[0], topo[2]
    m = tri.shape[0]
    inside = (n - 1) * (n - 2) // 2
    for ch in prange((m + CHUNK - 1) // CHUNK):  # scratch once per chunk
        s0, s1, s2 = np.empty(n + 1), np.empty(n + 1), np.empty(n + 1)
        for c in range(ch * CHUNK, min(m, (ch + 1) * CHUNK)):
            start = c * inside
            # the middle of the inside rows straight from x (streamed in once); then, from
            # the cache, the ring
            _inside_rows(x, s0, y, n, K[c], start, True)
            _sides(x, c, s0, s1, s2, n, topo, held_e, held_v, masked)
            _ring(x, y, c, s0, s1, s2, n, K[c], start, pe, pv, cell_flip[c])
    _sum_shared(y, pe, pv, n, topo)
    if masked:  # identity rows: y = x there
        held_points(x, y, n, topo, held_e, held_v, COPY)
