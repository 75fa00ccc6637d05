"""Fused passes of the patch multigrid: one stencil product and the vector updates around it
in one sweep over the patches (:mod:`hatkernels._jit.patches` for the layout).

Jacobi-scaled Chebyshev smoothing on a level costs, done step by step, a product
(read ``x``, write ``y``) and vector updates that read and write four or five
vectors; with a stencil so cheap, the vectors are the cost.  Each pass here
reads one vector's patch, applies the stencil in cache and updates the point
at once:

- ``ZERO`` (first step from a zero guess): ``d0 = c D^-1 b``, ``r = b - A d0``,
  ``d = c1 d0 + c2 D^-1 r``, ``x = d0 + d``;
- ``START`` (first step from a guess): ``r = b - A x``, ``d = c D^-1 r``,
  ``x += d``;
- ``STEP``: ``r -= A d``, ``d = c1 d + c2 D^-1 r``, ``x += d``;
- ``RESIDUAL``: ``r = b - A x``;

with ``last`` set, ``r`` and ``d`` are not written (the smoother needs only
``x`` after its last step).  The same operations in the same order as
:class:`hatkernels.precond.chebyshev.ChebyshevSmoother` on the stored
operator.  The inverse diagonal is not stored per point: it is one number per
coarse cell inside its patch, one per coarse edge and one per coarse vertex
(the 2-D stencils do not change with the level).  Held points stay 0.

Each cell's gather reads its three coarse edges, apart from the stream of inside
points; each cell asks for the edges of the cell one chunk on ahead of their use
(:func:`hatkernels._jit.patches.prefetch_edges`).  The sweeps were 2 to 8 % faster
at ``n = 32`` and 64 in one comparison and within the machine's noise in another
(docs/patches.md, "The floor corrected; row 1 in place").
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit
from hatkernels._jit.patches import (
    CHUNK,
    MASKED,
    _gather,
    _ioff,
    _local_apply,
    _off,
    _scatter,
    _stencil,
    prefetch_edges,
)

ZERO, START, STEP, RESIDUAL = 0, 1, 2, 3


@jit(inline="always")
def _update(mode, last, k, q, di, d0, b, x, r, d, c, c1, c2):
    """One point's update (``k`` its index, ``q`` its row of the product, ``di`` its
    inverse diagonal, ``d0`` the ZERO pass's first direction there)."""
    if mode == ZERO:
        ri = b[k] - q
        dn = c1 * d0 + c2 * di * ri
        x[k] = d0 + dn
        if not last:
            r[k] = ri
            d[k] = dn
    elif mode == START:
        ri = b[k] - q
        dn = c * di * ri
        x[k] += dn
        if not last:
            r[k] = ri
            d[k] = dn
    elif mode == STEP:
        ri = r[k] - q
        dn = c1 * d[k] + c2 * di * ri
        x[k] += dn
        if not last:
            r[k] = ri
            d[k] = dn
    else:
        r[k] = b[k] - q


@jit(parallel=True)
def sweep(mode, last, n, K, dinv_c, dinv_e, dinv_v, topo, held_e, held_v, pe, pv,
          b, x, r, d, c, c1, c2):
    """One fused pass on a level with ``n`` subdivisions (see the module notes)."""
    tri, cell_edge, edge_v, edge_cells, edge_le, vptr, vcell, vlv = (
        topo[0], topo[1], topo[3], topo[4], topo[5], topo[6], topo[7], topo[8])
    m = tri.shape[0]
    size = (n + 1) * (n + 2) // 2
    inside = (n - 1) * (n - 2) // 2
    base_e = m * inside  # where the edges' points start
    for ch in prange((m + CHUNK - 1) // CHUNK):  # scratch once per chunk
        loc = np.empty(size)
        out = np.empty(size)
        for cell in range(ch * CHUNK, min(m, (ch + 1) * CHUNK)):
            cn = cell + CHUNK
            if cn < m:  # the edges the next chunk's cell gathers, fetched meanwhile
                if mode == ZERO:
                    prefetch_edges(b, cn, n, base_e, cell_edge)
                elif mode == STEP:
                    prefetch_edges(d, cn, n, base_e, cell_edge)
                else:
                    prefetch_edges(x, cn, n, base_e, cell_edge)
            # (three calls, not one on a chosen array: the arrays may differ in precision)
            if mode == ZERO:
                _gather(b, cell, loc, n, topo, held_e, held_v, MASKED)
            elif mode == STEP:
                _gather(d, cell, loc, n, topo, held_e, held_v, MASKED)
            else:
                _gather(x, cell, loc, n, topo, held_e, held_v, MASKED)
            if mode == ZERO:  # the first direction, c D^-1 b, on the whole patch
                di = dinv_c[cell]
                cdi = c * di
                for j in range(1, n - 1):
                    o = uint64(_off(0, j, n) + 1)
                    for q in range(uint64(0), uint64(n - j - 1)):
                        loc[o + q] = cdi * loc[o + q]
                for le in range(3):
                    de = c * dinv_e[cell_edge[cell, le]]
                    for t in range(1, n):
                        if le == 0:
                            p = _off(t, 0, n)
                        elif le == 1:
                            p = _off(0, t, n)
                        else:
                            p = _off(n - t, t, n)
                        loc[p] = de * loc[p]
                loc[0] = c * dinv_v[tri[cell, 0]] * loc[0]
                loc[_off(n, 0, n)] = c * dinv_v[tri[cell, 1]] * loc[_off(n, 0, n)]
                loc[_off(0, n, n)] = c * dinv_v[tri[cell, 2]] * loc[_off(0, n, n)]
            kc = K[cell]  # one view per cell (each view's count is an atomic operation)
            _local_apply(loc, out, n, kc, 0)  # the side rows only
            sd = 2.0 * (kc[0, 0] + kc[1, 1] + kc[2, 2])
            sh, sv, sg = 2.0 * kc[0, 1], 2.0 * kc[0, 2], 2.0 * kc[1, 2]
            di = dinv_c[cell]
            start = cell * inside
            for j in range(1, n - 1):
                row = uint64(start + _ioff(j, n))
                o = uint64(_off(0, j, n) + 1)
                ob, oa = uint64(_off(0, j - 1, n) + 1), uint64(_off(0, j + 1, n))
                width = uint64(n - j - 1)
                # the inside rows' products made where they are used (no pass through out)
                # one loop per case, no branch inside: they vectorise
                if mode == RESIDUAL:
                    for q in range(uint64(0), width):
                        r[row + q] = b[row + q] - _stencil(loc, o + q, ob + q, oa + q, sd, sh, sv, sg)
                elif mode == STEP and last:
                    for q in range(uint64(0), width):
                        x[row + q] += c1 * d[row + q] + c2 * di * (r[row + q] - _stencil(loc, o + q, ob + q, oa + q, sd, sh, sv, sg))
                elif mode == STEP:
                    for q in range(uint64(0), width):
                        ri = r[row + q] - _stencil(loc, o + q, ob + q, oa + q, sd, sh, sv, sg)
                        dn = c1 * d[row + q] + c2 * di * ri
                        r[row + q] = ri
                        d[row + q] = dn
                        x[row + q] += dn
                elif mode == ZERO and last:
                    for q in range(uint64(0), width):
                        x[row + q] = loc[o + q] + (c1 * loc[o + q]
                                                   + c2 * di * (b[row + q] - _stencil(loc, o + q, ob + q, oa + q, sd, sh, sv, sg)))
                elif mode == ZERO:
                    for q in range(uint64(0), width):
                        ri = b[row + q] - _stencil(loc, o + q, ob + q, oa + q, sd, sh, sv, sg)
                        dn = c1 * loc[o + q] + c2 * di * ri
                        r[row + q] = ri
                        d[row + q] = dn
                        x[row + q] = loc[o + q] + dn
                elif last:  # START
                    for q in range(uint64(0), width):
                        x[row + q] += c * di * (b[row + q] - _stencil(loc, o + q, ob + q, oa + q, sd, sh, sv, sg))
                else:
                    for q in range(uint64(0), width):
                        ri = b[row + q] - _stencil(loc, o + q, ob + q, oa + q, sd, sh, sv, sg)
                        dn = c * di * ri
                        r[row + q] = ri
                        d[row + q] = dn
                        x[row + q] += dn
            _scatter(out, cell, x, pe, pv, n, topo, False)
    n_edges = edge_v.shape[0]
    base_v = base_e + n_edges * (n - 1)
    for e in prange(n_edges):
        c0, l0, cc, l1 = edge_cells[e, 0], edge_le[e, 0], edge_cells[e, 1], edge_le[e, 1]
        first = base_e + e * (n - 1)
        di = dinv_e[e]
        for s in range(n - 1):
            k = first + s
            if held_e[e]:
                x[k] = 0.0
                if not last:
                    r[k] = 0.0
                    d[k] = 0.0
                continue
            q = pe[c0, l0, s]
            if cc >= 0:
                q += pe[cc, l1, s]
            d0 = c * di * b[k] if mode == ZERO else 0.0
            _update(mode, last, k, q, di, d0, b, x, r, d, c, c1, c2)
    for v in prange(vptr.shape[0] - 1):
        k = base_v + v
        if held_v[v] or vptr[v] == vptr[v + 1]:
            x[k] = 0.0
            if not last:
                r[k] = 0.0
                d[k] = 0.0
            continue
        q = 0.0
        for s in range(vptr[v], vptr[v + 1]):
            q += pv[vcell[s], vlv[s]]
        di = dinv_v[v]
        d0 = c * di * b[k] if mode == ZERO else 0.0
        _update(mode, last, k, q, di, d0, b, x, r, d, c, c1, c2)


@jit(parallel=True)
def scaled_copy(n, dinv_c, dinv_e, dinv_v, topo, held_e, held_v, c, b, x):
    """``x = c D^-1 b`` on a level (the one-step smoother from a zero guess); 0 where held."""
    tri, edge_v, vptr = topo[0], topo[3], topo[6]
    m = tri.shape[0]
    inside = (n - 1) * (n - 2) // 2
    for cell in prange(m):
        di = c * dinv_c[cell]
        for k in range(cell * inside, (cell + 1) * inside):
            x[k] = di * b[k]
    base_e = m * inside
    for e in prange(edge_v.shape[0]):
        de = 0.0 if held_e[e] else c * dinv_e[e]
        for k in range(base_e + e * (n - 1), base_e + (e + 1) * (n - 1)):
            x[k] = de * b[k]
    base_v = base_e + edge_v.shape[0] * (n - 1)
    for v in prange(vptr.shape[0] - 1):
        dv = 0.0 if held_v[v] or vptr[v] == vptr[v + 1] else c * dinv_v[v]
        x[base_v + v] = dv * b[base_v + v]
