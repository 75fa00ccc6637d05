"""Whole patches in and out of a level's vector, and a check of the held points: for
conversions, output and tests (:mod:`hatkernels._jit.patches` for the layout)."""

import numpy as np
from numba import prange

from hatkernels._jit import jit
from hatkernels._jit.patches import CHUNK, PLAIN, _corner_pos, _edge_pos, _gather, _ioff, _off


@jit(parallel=True)
def held_max_abs(x, n, topo, held_e, held_v):
    """The largest ``|x|`` at the held points of a level (0.0 when none)."""
    tri, edge_v = topo[0], topo[3]
    inside = (n - 1) * (n - 2) // 2
    base_e = tri.shape[0] * inside
    base_v = base_e + edge_v.shape[0] * (n - 1)
    per_edge = np.zeros(edge_v.shape[0])
    for e in prange(edge_v.shape[0]):
        if held_e[e]:
            acc = 0.0
            for s in range(n - 1):
                acc = max(acc, abs(x[base_e + e * (n - 1) + s]))
            per_edge[e] = acc
    top = 0.0
    for e in range(edge_v.shape[0]):
        top = max(top, per_edge[e])
    for v in range(held_v.shape[0]):
        if held_v[v]:
            top = max(top, abs(x[base_v + v]))
    return top


@jit(parallel=True)
def gather_patches(x, cells, n, topo, out):
    """``out[q]`` = the packed patch of cell ``cells[q]`` (for output and tests)."""
    no = topo[3][:, 0] < 0
    for q in prange(cells.shape[0]):
        _gather(x, cells[q], out[q], n, topo, no, no, PLAIN)


@jit(parallel=True)
def to_numbered(x, n, topo, pos, masks, before, owns, offset, out, reverse):
    """Between a level's vector ``x`` and the numbering of ``Mesh.refine`` repeated
    (``out``): each coarse cell moves the points it owns (its inside, its sides and
    corners it is the lowest cell of), number ``offset[c] + sum_m before[i, m] owns[c, m]``
    for the point at place ``i`` of the first-appearance pattern (packed place ``pos[i]``,
    ``masks[i]`` the cell corners it lies on); ``reverse``: from ``out`` into ``x``."""
    tri = topo[0]
    m = tri.shape[0]
    size = (n + 1) * (n + 2) // 2
    no = topo[3][:, 0] < 0
    width = before.shape[1]
    for ch in prange((m + CHUNK - 1) // CHUNK):
        loc = np.empty(size)
        for c in range(ch * CHUNK, min(m, (ch + 1) * CHUNK)):
            if not reverse:
                _gather(x, c, loc, n, topo, no, no, PLAIN)
            for i in range(pos.shape[0]):
                if not owns[c, masks[i]]:
                    continue
                rank = 0
                for mm in range(1, width):
                    if owns[c, mm]:
                        rank += before[i, mm]
                if reverse:
                    loc[pos[i]] = out[offset[c] + rank]
                else:
                    out[offset[c] + rank] = loc[pos[i]]
            if reverse:
                _put_owned(loc, c, n, topo, owns, x)


@jit()
def _put_owned(loc, c, n, topo, owns, x):
    """The points cell ``c`` owns, from its packed patch into ``x`` (the inverse of
    :func:`_gather` for them); the others are written by their owners."""
    tri, cell_edge, cell_flip, edge_v = topo[0], topo[1], topo[2], topo[3]
    m = tri.shape[0]
    inside = (n - 1) * (n - 2) // 2
    base_e = m * inside
    base_v = base_e + edge_v.shape[0] * (n - 1)
    for j in range(1, n - 1):
        row = c * inside + _ioff(j, n)
        o = _off(0, j, n)
        for i in range(1, n - j):
            x[row + i - 1] = loc[o + i]
    # side le joins corners (0, 1), (0, 2), (1, 2): masks 3, 5, 6
    for le, mask in ((0, 3), (1, 5), (2, 6)):
        if owns[c, mask]:
            e = cell_edge[c, le]
            for t in range(1, n):
                s = n - t if cell_flip[c, le] else t
                x[base_e + e * (n - 1) + s - 1] = loc[_edge_pos(le, t, n)]
    for lv in range(3):
        if owns[c, 1 << lv]:
            x[base_v + tri[c, lv]] = loc[_corner_pos(lv, n)]
