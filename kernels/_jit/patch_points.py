"""Whole patches in and out of a level's vector, and a check of the held points: for
conversions, output and tests (:mod:`hatkernels._jit.patches` for the layout)."""

import numpy as np
from numba import prange

from hatkernels._jit import jit
from hatkernels._jit.patches import PLAIN, _corner_pos, _edge_pos, _gather, _ioff, _off


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


@jit()
def scatter_patches(loc, cells, n, topo, x):
    """The flat vector's entries from packed patches (shared points written by every cell
    that holds them, with the same value: serial)."""
    tri, cell_edge, cell_flip, edge_v = topo[0], topo[1], topo[2], topo[3]
    m = tri.shape[0]
    inside = (n - 1) * (n - 2) // 2
    base_e = m * inside
    base_v = base_e + edge_v.shape[0] * (n - 1)
    for q in range(cells.shape[0]):
        c = cells[q]
        for j in range(1, n - 1):
            row = c * inside + _ioff(j, n)
            o = _off(0, j, n)
            for i in range(1, n - j):
                x[row + i - 1] = loc[q, o + i]
        for le in range(3):
            e = cell_edge[c, le]
            for t in range(1, n):
                s = n - t if cell_flip[c, le] else t
                x[base_e + e * (n - 1) + s - 1] = loc[q, _edge_pos(le, t, n)]
        for lv in range(3):
            x[base_v + tri[c, lv]] = loc[q, _corner_pos(lv, n)]
