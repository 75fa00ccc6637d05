"""The 3-D patch kernels that move values between lattices: interpolation and its
transpose between levels, the place of a point, whole cell lattices in and out, loads
given per fine cell (the layout and the products: :mod:`hatkernels._jit.patches3d`)."""

import numpy as np
from numba import prange

from hatkernels._jit import jit
from hatkernels._jit.patches3d import (
    _L,
    _O1,
    _O2,
    _O3,
    CELLS,
    _delta,
    _edge_ends,
    _face_order,
    _face_point,
    _gather,
    _p_of,
    _sizes,
    accumulate,
    lattice_size,
)

__all__ = ["prolong_add", "restrict", "places_of", "gather_cells", "add_cell_loads",
           "subtract_from", "piecewise_update", "set_blocks"]


@jit(inline="always")
def _interp(loc, p1, p2, p3):
    """The value at fine lattice point ``p`` (level ``2n``) interpolated from the
    coarse lattice ``loc`` (level ``n``): the mean of the ends of its coarse edge."""
    a1, a2, a3 = p1 // 2, p2 // 2, p3 // 2
    v = loc[_L(a1, a2, a3)]
    if p1 % 2 or p2 % 2 or p3 % 2:
        v = 0.5 * (v + loc[_L(a1 + p1 % 2, a2 + p2 % 2, a3 + p3 % 2)])
    return v


@jit(parallel=True)
def prolong_add(xc, xf, n, topo, masked, mapl):
    """``xf += P xc`` from the level with ``n`` subdivisions to the one with ``2 n``: each
    cell writes its inside points and the shared points it is the first cell of."""
    V, CF, CE, FV, FC, EV = topo[0], topo[1], topo[2], topo[3], topo[4], topo[5]
    eptr, ecell, vptr, vcell = topo[6], topo[7], topo[8], topo[9]
    held_f, held_e, held_v = topo[10], topo[11], topo[12]
    m, nf, ne = V.shape[0], FV.shape[0], EV.shape[0]
    N = 2 * n
    inner, face, edge = _sizes(N)
    fbase = m * inner
    ebase = fbase + nf * face
    vbase = ebase + ne * edge
    size = lattice_size(n)
    for ch in prange((m + CELLS - 1) // CELLS):
        loc = np.empty(size)
        lk = np.empty(3, dtype=np.int64)
        lam = np.zeros(4, dtype=np.int64)
        for c in range(ch * CELLS, min(m, (ch + 1) * CELLS)):
            _gather(xc, c, n, topo, mapl, loc, masked, False, lk, lam)
            for p1 in range(3, N):
                for p2 in range(2, p1):
                    out = c * inner + _L(p1 - 3, p2 - 2, 0) - 1
                    for p3 in range(1, p2):
                        xf[out + p3] += _interp(loc, p1, p2, p3)
            for v in range(4):
                f = CF[c, v]
                if FC[f, 0] != c or (masked and held_f[f]):
                    continue
                _face_order(V, FV, c, v, f, lk)
                lam[v] = 0
                for s in range(N - 2):
                    for v2 in range(s + 1):
                        lam[lk[0]] = N - s - 2
                        lam[lk[1]] = s - v2 + 1
                        lam[lk[2]] = v2 + 1
                        p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], N)
                        xf[fbase + f * face + s * (s + 1) // 2 + v2] += _interp(loc, p1, p2, p3)
            for le in range(6):
                e = CE[c, le]
                if ecell[eptr[e]] != c or (masked and held_e[e]):
                    continue
                i, j, la, lb = _edge_ends(V, EV, c, le, e)
                for a in range(4):
                    lam[a] = 0
                for t in range(1, N):
                    lam[lb] = t
                    lam[la] = N - t
                    p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], N)
                    xf[ebase + e * edge + t - 1] += _interp(loc, p1, p2, p3)
            for v in range(4):
                g = V[c, v]
                if vcell[vptr[g]] != c or (masked and held_v[g]):
                    continue
                for a in range(4):
                    lam[a] = 0
                lam[v] = N
                p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], N)
                xf[vbase + g] += _interp(loc, p1, p2, p3)


@jit(inline="always")
def _restricted(loc, N, a1, a2, a3):
    """``(P^T r)`` at coarse point ``a`` from the fine lattice ``loc`` (level ``N``)."""
    q1, q2, q3 = 2 * a1, 2 * a2, 2 * a3
    base = _L(q1, q2, q3)
    half = 0.0
    for s in range(1, 15):
        r1, r2, r3 = q1 + _O1[s], q2 + _O2[s], q3 + _O3[s]
        if N >= r1 and r1 >= r2 and r2 >= r3 and r3 >= 0:
            half += loc[base + _delta(q1, q2, s)]
    return loc[base] + 0.5 * half


@jit(parallel=True)
def restrict(rf, rc, n, topo, masked, fine_mapl, bf, be, bv, mapl, mapf):
    """``rc = P^T rf`` to the level with ``n`` subdivisions from the one with ``2 n``:
    each cell reads the fine points it owns (shared ones by their first cell) and
    adds up its coarse points' parts; the shared coarse points through the buffers."""
    V, CE, EV = topo[0], topo[2], topo[5]
    m = V.shape[0]
    N = 2 * n
    inner = _sizes(n)[0]
    size = lattice_size(N)
    for ch in prange((m + CELLS - 1) // CELLS):
        loc = np.empty(size)
        lk = np.empty(3, dtype=np.int64)
        lam = np.zeros(4, dtype=np.int64)
        for c in range(ch * CELLS, min(m, (ch + 1) * CELLS)):
            _gather(rf, c, N, topo, fine_mapl, loc, masked, True, lk, lam)
            for a1 in range(3, n):
                for a2 in range(2, a1):
                    out = c * inner + _L(a1 - 3, a2 - 2, 0) - 1
                    for a3 in range(1, a2):
                        rc[out + a3] = _restricted(loc, N, a1, a2, a3)
            for v in range(4):  # face points in the cell's own order (:func:`_boundary_walk`)
                for a in range(2, n):
                    for b in range(1, a):
                        if v == 0:
                            a1, a2, a3 = n, a, b
                        elif v == 1:
                            a1, a2, a3 = a, a, b
                        elif v == 2:
                            a1, a2, a3 = a, b, b
                        else:
                            a1, a2, a3 = a, b, 0
                        bf[c, v, (a - 2) * (a - 1) // 2 + b - 1] = _restricted(loc, N, a1, a2, a3)
            for le in range(6):
                e = CE[c, le]
                i, j, la, lb = _edge_ends(V, EV, c, le, e)
                for a in range(4):
                    lam[a] = 0
                for t in range(1, n):
                    lam[lb] = t
                    lam[la] = n - t
                    a1, a2, a3 = _p_of(lam[0], lam[1], lam[2], n)
                    be[c, le, t - 1] = _restricted(loc, N, a1, a2, a3)
            for v in range(4):
                for a in range(4):
                    lam[a] = 0
                lam[v] = n
                a1, a2, a3 = _p_of(lam[0], lam[1], lam[2], n)
                bv[c, v] = _restricted(loc, N, a1, a2, a3)
    accumulate(rc, n, topo, masked, bf, be, bv, mapl, mapf)


@jit(inline="always")
def _place(c, lam, n, topo, lk):
    """The place in a level's vector of the point of cell ``c`` with coordinates ``lam``."""
    V, CF, CE, FV, EV = topo[0], topo[1], topo[2], topo[3], topo[5]
    m, nf, ne = V.shape[0], FV.shape[0], EV.shape[0]
    inner, face, edge = _sizes(n)
    zeros = 0
    for a in range(4):
        zeros += lam[a] == 0
    p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], n)
    if zeros == 0:
        return c * inner + _L(p1 - 3, p2 - 2, p3 - 1)
    fbase = m * inner
    if zeros == 1:
        v = 0
        while lam[v] != 0:
            v += 1
        f = CF[c, v]
        _face_order(V, FV, c, v, f, lk)
        s = n - 2 - lam[lk[0]]
        v2 = lam[lk[2]] - 1
        return fbase + f * face + s * (s + 1) // 2 + v2
    ebase = fbase + nf * face
    if zeros == 2:
        for le in range(6):
            i, j = (0, 0, 0, 1, 1, 2)[le], (1, 2, 3, 2, 3, 3)[le]
            if lam[i] > 0 and lam[j] > 0:
                e = CE[c, le]
                hi = j if V[c, i] == EV[e, 0] else i
                return ebase + e * edge + lam[hi] - 1
    vbase = ebase + ne * edge
    v = 0
    while lam[v] == 0:
        v += 1
    return vbase + V[c, v]


@jit(parallel=True)
def places_of(cells, lams, n, topo, out):
    """``out[i]``: the place of the point of cell ``cells[i]`` with coordinates ``lams[i]``."""
    for i in prange(cells.shape[0]):
        lk = np.empty(3, dtype=np.int64)
        out[i] = _place(cells[i], lams[i], n, topo, lk)


@jit(parallel=True)
def gather_cells(x, cells, n, topo, mapl, out):
    """``out[q]``: the whole lattice of cell ``cells[q]`` (for output and tests)."""
    for q in prange(cells.shape[0]):
        lk = np.empty(3, dtype=np.int64)
        lam = np.zeros(4, dtype=np.int64)
        _gather(x, cells[q], n, topo, mapl, out[q], False, False, lk, lam)


@jit(inline="always")
def _scatter(loc, c, n, topo, out, bf, be, bv, lam):
    """Cell ``c``'s whole lattice ``loc`` out: its inside points into ``out``, its faces',
    edges' and vertices' points into the buffers (in :func:`_boundary_walk`'s order)."""
    V, CE, EV = topo[0], topo[2], topo[5]
    inner = _sizes(n)[0]
    for p1 in range(3, n):
        for p2 in range(2, p1):
            src = _L(p1, p2, 1)
            dst = c * inner + _L(p1 - 3, p2 - 2, 0)
            for t in range(p2 - 1):
                out[dst + t] = loc[src + t]
    for v in range(4):
        for a in range(2, n):
            for b in range(1, a):
                bf[c, v, (a - 2) * (a - 1) // 2 + b - 1] = loc[_face_point(v, n, a, b)]
    for le in range(6):
        e = CE[c, le]
        i, j, la, lb = _edge_ends(V, EV, c, le, e)
        for a in range(4):
            lam[a] = 0
        for t in range(1, n):
            lam[lb] = t
            lam[la] = n - t
            p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], n)
            be[c, le, t - 1] = loc[_L(p1, p2, p3)]
    for v in range(4):
        for a in range(4):
            lam[a] = 0
        lam[v] = n
        p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], n)
        bv[c, v] = loc[_L(p1, p2, p3)]


@jit(parallel=True)
def add_cell_loads(values, corners, cells, n, topo, out, bf, be, bv, mapl, mapf, total):
    """Loads given per fine cell, into a level's vector: ``values[q, t, r]`` is what fine
    cell ``t`` of coarse cell ``cells[q]`` gives its corner ``r``, ``corners[t, r]`` that
    corner's place in the cell's lattice.  Inside points go to ``out``, shared ones to the
    buffers; with ``total`` (the last block of cells) the shared points are summed."""
    size = lattice_size(n)
    count = cells.shape[0]
    for ch in prange((count + CELLS - 1) // CELLS):
        loc = np.empty(size)
        lam = np.zeros(4, dtype=np.int64)
        for q in range(ch * CELLS, min(count, (ch + 1) * CELLS)):
            loc[:] = 0.0
            for t in range(corners.shape[0]):
                for r in range(4):
                    loc[corners[t, r]] += values[q, t, r]
            _scatter(loc, cells[q], n, topo, out, bf, be, bv, lam)
    if total:
        accumulate(out, n, topo, False, bf, be, bv, mapl, mapf)


@jit(parallel=True)
def subtract_from(b, y):
    """``y = b - y`` (a residual from a product), in parallel."""
    for i in prange(y.shape[0]):
        y[i] = b[i] - y[i]


# modes of piecewise_update (the Chebyshev smoother's vector updates)
PW_ZERO, PW_START, PW_START_ZERO, PW_STEP, PW_LAST = 0, 1, 2, 3, 4


@jit()
def _block_range(k, lens, firsts, bases):
    """``(lo, hi)``: the points of block ``k`` (group ``g`` holds blocks ``firsts[g]`` to
    ``firsts[g+1] - 1``, each of ``lens[g]`` points, from index ``bases[g]``)."""
    g = 0
    while k >= firsts[g + 1]:
        g += 1
    lo = bases[g] + (k - firsts[g]) * lens[g]
    return lo, lo + lens[g]


@jit(parallel=True)
def piecewise_update(mode, values, lens, firsts, bases, c, c1, c2, b, q, r, d, x):
    """The Chebyshev smoother's vector updates with ``1 / diag(A)`` constant on blocks.

    Group ``g`` of a level's vector holds ``firsts[g+1] - firsts[g]`` blocks of
    ``lens[g]`` points from index ``bases[g]``; block ``k`` of all has the inverse
    diagonal ``values[k]``.  The updates and their bits are those of
    :mod:`hatkernels._jit.sparse`'s ``chebyshev_*`` kernels on the expanded vector:
    ``PW_ZERO`` ``x = c D^-1 b``; ``PW_START_ZERO`` ``r = b``, ``d = x = c D^-1 b``;
    ``PW_START`` ``d = c D^-1 r``, ``x += d``; ``PW_STEP`` ``r -= q``,
    ``d = c1 d + c2 D^-1 r``, ``x += d``; ``PW_LAST`` ``x += c1 d + c2 D^-1 (r - q)``.
    """
    for k in prange(values.shape[0]):
        lo, hi = _block_range(k, lens, firsts, bases)
        di = values[k]
        if mode == PW_ZERO:
            for i in range(lo, hi):
                x[i] = c * di * b[i]
        elif mode == PW_START_ZERO:
            for i in range(lo, hi):
                bi = b[i]
                r[i] = bi
                dn = c * di * bi
                d[i] = dn
                x[i] = dn
        elif mode == PW_START:
            for i in range(lo, hi):
                dn = c * di * r[i]
                d[i] = dn
                x[i] += dn
        elif mode == PW_STEP:
            for i in range(lo, hi):
                ri = r[i] - q[i]
                r[i] = ri
                dn = c1 * d[i] + c2 * di * ri
                d[i] = dn
                x[i] += dn
        else:
            for i in range(lo, hi):
                ri = r[i] - q[i]
                x[i] += c1 * d[i] + c2 * di * ri


@jit(parallel=True)
def set_blocks(flags, lens, firsts, bases, x, value):
    """``x = value`` on every block ``k`` with ``flags[k]`` (blocks as in
    :func:`piecewise_update`): the held points of a level are whole blocks (the insides of
    held faces and edges, held vertices)."""
    for k in prange(flags.shape[0]):
        if not flags[k]:
            continue
        lo, hi = _block_range(k, lens, firsts, bases)
        for i in range(lo, hi):
            x[i] = value
