"""Loads given per fine triangle, added into a level's vector patch by patch
(:mod:`hatkernels._jit.patches` for the layout): the patch path's load of a callable
source, evaluated on the fly a block of coarse cells at a time."""

import numpy as np
from numba import prange

from hatkernels._jit import jit
from hatkernels._jit.patches import CHUNK, _scatter, _sum_shared


@jit(parallel=True)
def add_triangle_loads(values, corners, cells, n, topo, out, pe, pv, total):
    """Patch loads of coarse ``cells`` from their fine triangles' loads.

    ``values[q, t, r]``: the load fine triangle ``t`` of cell ``cells[q]`` gives its
    corner ``r``; ``corners[t, r]``: that corner's place in the packed patch.  The
    cells' inside rows go to ``out``, their parts of shared rows to ``pe``/``pv``; with
    ``total`` the shared rows of ``out`` are then summed (call it so on the last block).
    """
    size = (n + 1) * (n + 2) // 2
    count = cells.shape[0]
    for ch in prange((count + CHUNK - 1) // CHUNK):
        loc = np.empty(size)
        for q in range(ch * CHUNK, min(count, (ch + 1) * CHUNK)):
            loc[:] = 0.0
            for t in range(corners.shape[0]):
                for r in range(3):
                    loc[corners[t, r]] += values[q, t, r]
            _scatter(loc, cells[q], out, pe, pv, n, topo)
    if total:
        _sum_shared(out, pe, pv, n, topo)
