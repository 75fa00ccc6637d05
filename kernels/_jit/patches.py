"""Stencil kernels on refined patches: the fine levels of a triangle mesh refined ``k``
times, never stored (:mod:`hatkernels.patches`).

A level with ``n = 2**l`` subdivisions per coarse edge keeps one value per fine
point in a flat vector: first the inside points of every coarse cell (cell by
cell, ``(n-1)(n-2)/2`` each), then the points inside every coarse edge (``n-1``
each, running from ``edge_v[e, 0]`` to ``edge_v[e, 1]``), then the coarse
vertices.  Inside coarse cell ``c`` (corners A, B, C = its points 0, 1, 2) a
fine point is a lattice point ``(i, j)``, ``i + j <= n``, at
``A + i/n (B - A) + j/n (C - A)``; the patch of a cell is its lattice with the
cell's boundary, ``(n+1)(n+2)/2`` points, packed row by row (``j`` rows).

Every fine triangle of a patch is the coarse triangle scaled by ``1/n``,
translated or turned by half a turn, so in 2-D it has the coarse cell's element
stiffness ``K`` (scale-free): the operator inside a patch is one 7-point
stencil per cell.  Points on coarse edges and vertices are shared: each cell
adds its part of their rows into a per-cell buffer (``pe``: edge points in the
edge's own direction; ``pv``: corners) and a pass over edges and one over
vertices add the parts in a fixed order, so every result is the same bits on any
number of threads.

``topo`` is the tuple ``(tri, cell_edge, cell_flip, edge_v, edge_cells, edge_le,
vptr, vcell, vlv)`` of int64 arrays built by :mod:`hatkernels.patches.layout`:
local edge 0 is A->B (points ``(t, 0)``), 1 is A->C (``(0, t)``), 2 is B->C
(``(n - t, t)``); ``cell_flip[c, le]`` is 1 when the edge's own direction runs
the other way; ``edge_cells``/``edge_le`` the (one or two) cells of each edge,
lower cell first (-1 for none); ``vptr``/``vcell``/``vlv`` the cells around each
vertex, ascending, with the vertex's local number in each.
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit
from hatkernels._jit.hints import prefetch

# gather modes
PLAIN, MASKED, OWNED = 0, 1, 2
# what held_points writes
ZERO, COPY, ONE = 0, 1, 2
# coarse cells per parallel chunk (one scratch allocation each; no effect on the bits)
CHUNK = 16


@jit()
def _off(i, j, n):
    return j * (n + 1) - (j * (j - 1)) // 2 + i


@jit()
def _ioff(j, n):
    """First inside index of row ``j >= 1`` within a cell's inside block."""
    return (j - 1) * (n - 1) - ((j - 1) * j) // 2


@jit()
def _edge_pos(le, t, n):
    if le == 0:
        return _off(t, 0, n)
    if le == 1:
        return _off(0, t, n)
    return _off(n - t, t, n)


@jit()
def _corner_pos(lv, n):
    if lv == 0:
        return 0
    if lv == 1:
        return _off(n, 0, n)
    return _off(0, n, n)


@jit(inline="always")
def _side(c, le, n, base_e, cell_edge, cell_flip, edge_cells, held_e, mode):
    """``(base, step, zero)``: point ``t`` (1..n-1) of side ``le`` of cell ``c`` is entry
    ``base + step t`` of a level's vector; ``zero``: the gather reads it as 0."""
    e = cell_edge[c, le]
    zero = (mode == MASKED and held_e[e]) or (mode == OWNED and edge_cells[e, 0] != c)
    first = base_e + e * (n - 1)
    if cell_flip[c, le]:
        return first + n - 1, -1, zero
    return first - 1, 1, zero


@jit(inline="always")
def prefetch_edges(v, c, n, base_e, cell_edge):
    """Ask for the values of cell ``c``'s three coarse edges in the level vector ``v``
    (``base_e``: where the edges' points start) ahead of their use: they lie apart from
    the stream of inside points (:func:`hatkernels._jit.hints.prefetch`)."""
    for le in range(3):
        first = uint64(base_e + cell_edge[c, le] * (n - 1))
        for t in range(uint64(0), uint64(n - 1), uint64(8)):
            prefetch(v, first + t)
        prefetch(v, first + uint64(n - 2))  # the edge's last line


@jit(inline="always")
def _gather(x, c, loc, n, topo, held_e, held_v, mode):
    """The patch of cell ``c`` from the flat vector ``x`` into ``loc``.

    ``mode`` MASKED: held points read as 0; OWNED: shared points the cell does
    not own (edges: owned by their lower cell; vertices: by their lowest cell)
    read as 0, so that summing over cells counts every point once.
    """
    tri, cell_edge, cell_flip, edge_v, edge_cells, edge_le, vptr, vcell, vlv = topo
    m = tri.shape[0]
    inside = (n - 1) * (n - 2) // 2
    base_e = m * inside
    base_v = base_e + edge_v.shape[0] * (n - 1)
    start = c * inside
    one = uint64(1)
    for j in range(1, n - 1):
        row = uint64(start + _ioff(j, n))
        o = uint64(_off(0, j, n))
        for i in range(uint64(0), uint64(n - j - 1)):
            loc[o + one + i] = x[row + i]
    # the three sides in one loop, positions kept incrementally (no division, no branch
    # on the side): point t of side le is x[base[le] + step[le] t], or 0 where it reads 0
    b0, s0, z0 = _side(c, 0, n, base_e, cell_edge, cell_flip, edge_cells, held_e, mode)
    b1, s1, z1 = _side(c, 1, n, base_e, cell_edge, cell_flip, edge_cells, held_e, mode)
    b2, s2, z2 = _side(c, 2, n, base_e, cell_edge, cell_flip, edge_cells, held_e, mode)
    p1 = n + 1  # _off(0, 1, n)
    for t in range(1, n):
        v0, v1, v2 = x[b0 + s0 * t], x[b1 + s1 * t], x[b2 + s2 * t]
        loc[t] = 0.0 if z0 else v0
        loc[p1] = 0.0 if z1 else v1
        loc[p1 + n - t] = 0.0 if z2 else v2
        p1 += n + 1 - t
    for lv in range(3):
        v = tri[c, lv]
        zero = (mode == MASKED and held_v[v]) or (mode == OWNED and vcell[vptr[v]] != c)
        loc[_corner_pos(lv, n)] = 0.0 if zero else x[base_v + v]


@jit(inline="always")
def _scatter(out, c, y, pe, pv, n, topo, inside_too=True):
    """Inside rows of ``out`` into ``y`` (unless ``inside_too`` is False); the cell's parts of
    shared rows into ``pe``, ``pv``."""
    cell_flip = topo[2]
    inside = (n - 1) * (n - 2) // 2
    start = c * inside
    one = uint64(1)
    for j in range(1, n - 1 if inside_too else 1):
        row = uint64(start + _ioff(j, n))
        o = uint64(_off(0, j, n))
        for i in range(uint64(0), uint64(n - j - 1)):
            y[row + i] = out[o + one + i]
    # pe[c, le, s - 1] for point t of side le, s = t or n - t (the edge's own direction)
    f0, f1, f2 = cell_flip[c, 0], cell_flip[c, 1], cell_flip[c, 2]
    p1 = n + 1  # _off(0, 1, n)
    for t in range(1, n):
        pe[c, 0, n - 1 - t if f0 else t - 1] = out[t]
        pe[c, 1, n - 1 - t if f1 else t - 1] = out[p1]
        pe[c, 2, n - 1 - t if f2 else t - 1] = out[p1 + n - t]
        p1 += n + 1 - t
    for lv in range(3):
        pv[c, lv] = out[_corner_pos(lv, n)]


@jit(parallel=True)
def _sum_shared(y, pe, pv, n, topo):
    """Shared rows of ``y``: the cells' parts added, lower cell first."""
    tri, edge_v, edge_cells, edge_le, vptr, vcell, vlv = (
        topo[0], topo[3], topo[4], topo[5], topo[6], topo[7], topo[8])
    m = tri.shape[0]
    inside = (n - 1) * (n - 2) // 2
    base_e = m * inside
    n_edges = edge_v.shape[0]
    base_v = base_e + n_edges * (n - 1)
    # pe flat with unsigned indices, the test on c1 out of the loop: the loops vectorise
    # (indexed pe[c, l, s] they ran at half a copy's speed)
    flat, w = pe.reshape(-1), uint64(n - 1)
    for e in prange(n_edges):
        c0, l0, c1, l1 = edge_cells[e, 0], edge_le[e, 0], edge_cells[e, 1], edge_le[e, 1]
        first, a = uint64(base_e + e * (n - 1)), uint64((3 * c0 + l0) * (n - 1))
        if c1 >= 0:
            b = uint64((3 * c1 + l1) * (n - 1))
            for s in range(uint64(0), w):
                y[first + s] = flat[a + s] + flat[b + s]
        else:
            for s in range(uint64(0), w):
                y[first + s] = flat[a + s]
    for v in prange(vptr.shape[0] - 1):
        acc = 0.0
        for q in range(vptr[v], vptr[v + 1]):
            acc += pv[vcell[q], vlv[q]]
        y[base_v + v] = acc


@jit()
def _role_sum(loc, n, i, j, K, what):
    """Row of lattice point ``(i, j)`` summed over the fine triangles of the patch that hold
    it: ``what`` 0 the product with ``loc``, 1 the diagonal, 2 the sum of absolute entries."""
    acc = 0.0
    for kind in range(6):
        # (role of (i, j), the triangle's A, B, C points) for the six triangles around it
        if kind == 0:  # A of up(i, j)
            a, b, r, up = i, j, 0, True
        elif kind == 1:  # B of up(i - 1, j)
            a, b, r, up = i - 1, j, 1, True
        elif kind == 2:  # C of up(i, j - 1)
            a, b, r, up = i, j - 1, 2, True
        elif kind == 3:  # A of down(i - 1, j - 1)
            a, b, r, up = i - 1, j - 1, 0, False
        elif kind == 4:  # B of down(i, j - 1)
            a, b, r, up = i, j - 1, 1, False
        else:  # C of down(i - 1, j)
            a, b, r, up = i - 1, j, 2, False
        if a < 0 or b < 0:
            continue
        if up:
            if a + b > n - 1:
                continue
            pa, pb, pc = _off(a, b, n), _off(a + 1, b, n), _off(a, b + 1, n)
        else:
            if a + b > n - 2:
                continue
            pa, pb, pc = _off(a + 1, b + 1, n), _off(a, b + 1, n), _off(a + 1, b, n)
        if what == 0:
            acc += K[r, 0] * loc[pa] + K[r, 1] * loc[pb] + K[r, 2] * loc[pc]
        elif what == 1:
            acc += K[r, r]
        else:
            acc += abs(K[r, 0]) + abs(K[r, 1]) + abs(K[r, 2])
    return acc


@jit(inline="always")
def _stencil(loc, c0, cb, ca, d, h, v, g):
    """The inside row at packed place ``c0`` (``cb``, ``ca``: the places of the row below
    and above, shifted as in :func:`_local_apply`)."""
    one = uint64(1)
    return (d * loc[c0] + h * (loc[c0 - one] + loc[c0 + one]) + v * (loc[cb] + loc[ca + one])
            + g * (loc[cb + one] + loc[ca]))


@jit()
def _inside_rows(x, loc, y, n, K, start, middle):
    """The inside rows of the product written to ``y``: with ``middle`` the points whose
    seven points are all inside, straight from ``x`` (no copy of the patch; the loop
    over a row vectorises), else the others from the patch in ``loc`` (as
    :func:`_gather` leaves it).  The same sums in the same order as :func:`_stencil`."""
    d = 2.0 * (K[0, 0] + K[1, 1] + K[2, 2])
    h, v, g = 2.0 * K[0, 1], 2.0 * K[0, 2], 2.0 * K[1, 2]
    one = uint64(1)
    for j in range(1, n - 1):
        row = uint64(start + _ioff(j, n))
        width = uint64(n - j - 1)
        whole = j == 1 or width < uint64(3)
        if middle:
            if whole:
                continue
            below = uint64(start + _ioff(j - 1, n))
            above = uint64(start + _ioff(j + 1, n))
            for q in range(one, width - one):
                y[row + q] = (d * x[row + q] + h * (x[row + q - one] + x[row + q + one])
                              + v * (x[below + q] + x[above + q])
                              + g * (x[below + q + one] + x[above + q - one]))
            continue
        o, ob, oa = uint64(_off(0, j, n) + 1), uint64(_off(0, j - 1, n) + 1), uint64(_off(0, j + 1, n))
        if whole:
            for q in range(uint64(0), width):
                y[row + q] = _stencil(loc, o + q, ob + q, oa + q, d, h, v, g)
            continue
        y[row] = _stencil(loc, o, ob, oa, d, h, v, g)
        last = width - one
        y[row + last] = _stencil(loc, o + last, ob + last, oa + last, d, h, v, g)


@jit(inline="always")
def _local_apply(loc, out, n, K, what):
    """``out`` = the rows the patch in ``loc`` gives: with ``what`` 1 or 2 (the diagonal,
    the absolute row sums) the inside rows whole and this cell's part of the side rows;
    with ``what`` 0 (the product) this cell's part of the side rows only; the inside
    rows of a product are made where they are used (:func:`_inside_rows`,
    :mod:`hatkernels._jit.patch_smooth`)."""
    if what != 0:
        for j in range(1, n - 1):
            o = _off(0, j, n)
            for i in range(1, n - j):
                out[o + i] = _role_sum(loc, n, i, j, K, what)
        for t in range(n + 1):  # the three sides, corners included
            out[_off(t, 0, n)] = _role_sum(loc, n, t, 0, K, what)
            out[_off(0, t, n)] = _role_sum(loc, n, 0, t, K, what)
            out[_off(n - t, t, n)] = _role_sum(loc, n, n - t, t, K, what)
        return
    # this cell's part of the side rows: the three fine triangles of the patch at a side
    # point (one in each role), summed in closed form; the tests check them against
    # _role_sum, which sums them triangle by triangle
    tr = K[0, 0] + K[1, 1] + K[2, 2]
    ab, ac, bc = K[0, 1], K[0, 2], K[1, 2]
    r1 = n + 1  # _off(0, 1, n)
    for i in range(1, n):  # side A-B: (i, 0)
        out[i] = (tr * loc[i] + ab * (loc[i - 1] + loc[i + 1])
                  + 2.0 * ac * loc[r1 + i] + 2.0 * bc * loc[r1 + i - 1])
    lo, o = 0, n + 1  # _off(0, j - 1, n), _off(0, j, n), kept incrementally
    for j in range(1, n):  # sides A-C: (0, j) and B-C: (n - j, j)
        hi = o + n + 1 - j
        out[o] = (tr * loc[o] + 2.0 * ab * loc[o + 1] + ac * (loc[hi] + loc[lo])
                  + 2.0 * bc * loc[lo + 1])
        i = n - j
        out[o + i] = (tr * loc[o + i] + 2.0 * ab * loc[o + i - 1] + 2.0 * ac * loc[lo + i]
                      + bc * (loc[hi + i - 1] + loc[lo + i + 1]))
        lo, o = o, hi
    b, c = _off(n, 0, n), _off(0, n, n)
    out[0] = K[0, 0] * loc[0] + ab * loc[1] + ac * loc[r1]
    out[b] = ab * loc[b - 1] + K[1, 1] * loc[b] + bc * loc[r1 + n - 1]
    out[c] = ac * loc[_off(0, n - 1, n)] + bc * loc[_off(1, n - 1, n)] + K[2, 2] * loc[c]


@jit(parallel=True)
def apply(x, y, n, K, topo, held_e, held_v, masked, pe, pv, what):
    """``y = A x`` on one level (``what`` 0), or the diagonal (1) or absolute row sums (2).

    From ``n = 8`` up, :class:`hatkernels.patches.PatchOperator` makes the product with
    :func:`hatkernels._jit.patch_product.product` (one pass per cell, the same bits);
    this buffered path is its plain reference in the tests and serves coarser levels.

    ``masked``: held rows and columns taken out (identity rows, held columns
    zero), as the system CG solves; otherwise the whole stiffness matrix.
    """
    tri = topo[0]
    m = tri.shape[0]
    size = (n + 1) * (n + 2) // 2
    mode = MASKED if masked else PLAIN
    for ch in prange((m + CHUNK - 1) // CHUNK):  # scratch once per chunk
        loc = np.empty(size)
        out = np.empty(size)
        for c in range(ch * CHUNK, min(m, (ch + 1) * CHUNK)):
            if what == 0:
                # the middle of the inside rows straight from x, then the patch from the
                # cache and the rows next to the sides and the side rows from it
                start = c * ((n - 1) * (n - 2) // 2)
                _inside_rows(x, loc, y, n, K[c], start, True)
                _gather(x, c, loc, n, topo, held_e, held_v, mode)
                _inside_rows(x, loc, y, n, K[c], start, False)
                _local_apply(loc, out, n, K[c], what)
                _scatter(out, c, y, pe, pv, n, topo, False)
            else:
                _gather(x, c, loc, n, topo, held_e, held_v, mode)
                _local_apply(loc, out, n, K[c], what)
                _scatter(out, c, y, pe, pv, n, topo)
    _sum_shared(y, pe, pv, n, topo)
    if masked:  # identity rows: y = x in the product, 1 on the diagonal or row sums
        held_points(x, y, n, topo, held_e, held_v, COPY if what == 0 else ONE)


@jit(parallel=True)
def load(per_cell, y, n, topo, pe, pv):
    """``y`` = the load of a source constant on each coarse cell, ``per_cell[c]`` = its
    value times the fine triangles' area over 3 (each triangle gives that to its corners)."""
    tri = topo[0]
    m = tri.shape[0]
    size = (n + 1) * (n + 2) // 2
    for ch in prange((m + CHUNK - 1) // CHUNK):  # scratch once per chunk
        out = np.empty(size)
        for c in range(ch * CHUNK, min(m, (ch + 1) * CHUNK)):
            w = per_cell[c]
            for j in range(n + 1):
                for i in range(n + 1 - j):
                    # triangles holding (i, j): 6 inside, 3 on a side, 1 at a corner
                    # (from the up and down triangles that exist around it)
                    count = 0
                    if i + j <= n - 1:
                        count += 1  # up(i, j)
                    if i >= 1 and i + j <= n:
                        count += 1  # up(i - 1, j)
                    if j >= 1 and i + j <= n:
                        count += 1  # up(i, j - 1)
                    if i >= 1 and j >= 1:
                        count += 1  # down(i - 1, j - 1)
                    if j >= 1 and i + j <= n - 1:
                        count += 1  # down(i, j - 1)
                    if i >= 1 and i + j <= n - 1:
                        count += 1  # down(i - 1, j)
                    out[_off(i, j, n)] = count * w
            _scatter(out, c, y, pe, pv, n, topo)
    _sum_shared(y, pe, pv, n, topo)


@jit(parallel=True)
def prolong_add(xc, x, n, topo):
    """``x += P xc``: ``xc`` on the level with ``n // 2`` subdivisions, ``x`` on ``n``;
    linear interpolation (each new point the mean of its coarse edge's ends)."""
    tri, edge_v = topo[0], topo[3]
    m = tri.shape[0]
    nc = n // 2
    size_c = (nc + 1) * (nc + 2) // 2
    inside = (n - 1) * (n - 2) // 2
    no = edge_v[:, 0] < 0
    for ch in prange((m + CHUNK - 1) // CHUNK):  # scratch once per chunk
        loc = np.empty(size_c)
        for c in range(ch * CHUNK, min(m, (ch + 1) * CHUNK)):
            _gather(xc, c, loc, nc, topo, no, no, PLAIN)
            start = c * inside
            for j in range(1, n - 1):
                row = start + _ioff(j, n)
                for i in range(1, n - j):
                    if i % 2 == 0 and j % 2 == 0:
                        val = loc[_off(i // 2, j // 2, nc)]
                    elif j % 2 == 0:
                        val = 0.5 * (loc[_off(i // 2, j // 2, nc)] + loc[_off(i // 2 + 1, j // 2, nc)])
                    elif i % 2 == 0:
                        val = 0.5 * (loc[_off(i // 2, j // 2, nc)] + loc[_off(i // 2, j // 2 + 1, nc)])
                    else:
                        val = 0.5 * (loc[_off(i // 2 + 1, j // 2, nc)]
                                     + loc[_off(i // 2, j // 2 + 1, nc)])
                    x[row + i - 1] += val
    n_edges = edge_v.shape[0]
    base_e, base_ec = m * inside, m * ((nc - 1) * (nc - 2) // 2)
    base_v, base_vc = base_e + n_edges * (n - 1), base_ec + n_edges * (nc - 1)
    for e in prange(n_edges):
        for s in range(1, n):
            lo, hi = s // 2, (s + 1) // 2  # coarse points along the edge (0, nc: the ends)
            a = xc[base_vc + edge_v[e, 0]] if lo == 0 else (
                xc[base_vc + edge_v[e, 1]] if lo == nc else xc[base_ec + e * (nc - 1) + lo - 1])
            if hi == lo:
                val = a
            else:
                b = xc[base_vc + edge_v[e, 1]] if hi == nc else xc[base_ec + e * (nc - 1) + hi - 1]
                val = 0.5 * (a + b)
            x[base_e + e * (n - 1) + s - 1] += val
    for v in prange(topo[6].shape[0] - 1):
        x[base_v + v] += xc[base_vc + v]


@jit(parallel=True)
def restrict(r, rc, n, topo, pe, pv):
    """``rc = P^T r``: ``r`` on the level with ``n`` subdivisions, ``rc`` on ``n // 2``;
    ``pe``, ``pv`` the coarse level's buffers."""
    tri, edge_v = topo[0], topo[3]
    m = tri.shape[0]
    nc = n // 2
    size, size_c = (n + 1) * (n + 2) // 2, (nc + 1) * (nc + 2) // 2
    no = edge_v[:, 0] < 0
    for ch in prange((m + CHUNK - 1) // CHUNK):  # scratch once per chunk
        loc = np.empty(size)
        out = np.empty(size_c)
        for c in range(ch * CHUNK, min(m, (ch + 1) * CHUNK)):
            _gather(r, c, loc, n, topo, no, no, OWNED)
            for b in range(nc + 1):
                for a in range(nc + 1 - b):
                    i, j = 2 * a, 2 * b
                    acc = 0.0
                    if i >= 1:
                        acc += loc[_off(i - 1, j, n)]
                    if i + j + 1 <= n:
                        acc += loc[_off(i + 1, j, n)] + loc[_off(i, j + 1, n)]
                    if j >= 1:
                        acc += loc[_off(i, j - 1, n)] + loc[_off(i + 1, j - 1, n)]
                    if i >= 1:
                        acc += loc[_off(i - 1, j + 1, n)]
                    out[_off(a, b, nc)] = loc[_off(i, j, n)] + 0.5 * acc
            _scatter(out, c, rc, pe, pv, nc, topo)
    _sum_shared(rc, pe, pv, nc, topo)


@jit(parallel=True)
def held_points(x, y, n, topo, held_e, held_v, op):
    """At the held points of a level: ``y = 0`` (``op`` ZERO), ``y = x`` (COPY) or
    ``y = 1`` (ONE)."""
    tri, edge_v = topo[0], topo[3]
    inside = (n - 1) * (n - 2) // 2
    base_e = tri.shape[0] * inside
    base_v = base_e + edge_v.shape[0] * (n - 1)
    for e in prange(edge_v.shape[0]):
        if held_e[e]:
            for k in range(base_e + e * (n - 1), base_e + (e + 1) * (n - 1)):
                y[k] = 0.0 if op == ZERO else (x[k] if op == COPY else 1.0)
    for v in prange(held_v.shape[0]):
        if held_v[v]:
            k = base_v + v
            y[k] = 0.0 if op == ZERO else (x[k] if op == COPY else 1.0)
