"""Patch kernels on tetrahedra: the refined lattice of each coarse cell, never stored.

Bey's rule (J. Bey, "Tetrahedral grid refinement", Computing 55, 1995) refines a
tetrahedron ``(x0, x1, x2, x3)`` in his point order into the Kuhn (Freudenthal)
lattice of the affine map ``x = x0 + (p1 (x1 - x0) + p2 (x2 - x1) + p3 (x3 - x2)) / n``:
after ``k`` refinements (``n = 2**k``) the fine points of the cell are the integer
``p`` with ``n >= p1 >= p2 >= p3 >= 0`` and the fine cells are the six Kuhn types
``{c, c + e_s0, c + e_s0 + e_s1, c + (1, 1, 1)}`` (``s`` a permutation) inside that
simplex.  Every fine cell is an affine image of one reference shape under the
same map, so P1 stiffness on the lattice is one 15-point stencil per coarse cell
(the point and its neighbours ``p +- d``, ``d`` any nonzero 0/1 vector), scaled
by ``1 / n``.  A point on the cell's boundary sees only the fine cells inside:
its row there is a partial stencil that depends only on which barycentric
coordinates ``lam0 = n - p1, lam1 = p1 - p2, lam2 = p2 - p3, lam3 = p3`` are zero
(its *class*, a 4-bit mask ``Z``), so each cell keeps 15 classes of 15 weights.

**Layout** of a level (``n`` subdivisions), every fine point once: the points
inside each coarse cell (``C(n-1, 3)`` each, by ``p1``, then ``p2``, then ``p3``),
inside each coarse face (``C(n-1, 2)`` each, by the face's sorted points), inside
each coarse edge (``n - 1`` each, from its lower point), then the coarse vertices.
A point of cell ``c`` with barycentric coordinates ``lam`` has its place computed
from ``lam`` and the global numbers of ``c``'s points, so shared points need no
orientation table.

The grid transfers, the places of points, whole lattices in and out and the loads of
callable sources are :mod:`hatkernels._jit.patches3d_moves`.

**Products** gather a cell's lattice into a buffer that stays in cache, apply the
stencil to the inside points and the partial stencils to the boundary points,
whose parts go to per-cell buffers in the face's (edge's) own order; passes over
the faces, edges and vertices add the parts, lower cell first.  Every output is
written by one loop iteration in a fixed order: the same bits on any number of
threads.
"""

import numpy as np
from numba import prange
from numba import uint64 as U

from hatkernels._jit import jit

__all__ = ["DIRS", "SLOT_OFFSETS", "PERMS", "CELLS", "kuhn_types", "class_incidence",
           "lattice_size", "level_size", "face_tables", "product", "class_fill",
           "accumulate"]

#: The seven edge directions of the Kuhn lattice (every nonzero 0/1 vector).
DIRS = np.array([[1, 0, 0], [0, 1, 0], [0, 0, 1], [1, 1, 0], [1, 0, 1], [0, 1, 1], [1, 1, 1]],
                dtype=np.int64)
#: Slot 0 is the point, slots 1..7 ``p + DIRS``, slots 8..14 ``p - DIRS``.
SLOT_OFFSETS = np.concatenate([np.zeros((1, 3), dtype=np.int64), DIRS, -DIRS])
#: Coarse cells per parallel chunk: each chunk allocates its buffers once.
CELLS = 16
_O1 = np.ascontiguousarray(SLOT_OFFSETS[:, 0])
_O2 = np.ascontiguousarray(SLOT_OFFSETS[:, 1])
_O3 = np.ascontiguousarray(SLOT_OFFSETS[:, 2])
#: The orders of a face's three local points (others than the opposite one, increasing):
#: a cell's face ``v`` with order ``PERMS[i]`` lists them by increasing global number.
PERMS = np.array([[0, 1, 2], [0, 2, 1], [1, 0, 2], [1, 2, 0], [2, 0, 1], [2, 1, 0]],
                 dtype=np.int64)


def kuhn_types():
    """The six Kuhn types as (6, 4, 3) integer vertices in lattice coordinates."""
    out = np.zeros((6, 4, 3), dtype=np.int64)
    for t, s in enumerate(((0, 1, 2), (0, 2, 1), (1, 0, 2), (1, 2, 0), (2, 0, 1), (2, 1, 0))):
        out[t, 1, s[0]] = 1
        out[t, 2, s[0]] = out[t, 2, s[1]] = 1
        out[t, 3] = 1
    return out


def _inside(q, n):
    return n >= q[0] >= q[1] >= q[2] >= 0


def class_incidence():
    """For each class ``Z`` (0..14): the ``(type, a, b, slot)`` of the fine cells inside
    the coarse cell at a point of that class (the point is vertex ``a`` of a cell of
    ``type``, ``b`` its partner at ``slot``), as a list of (m, 4) int arrays; geometry-free."""
    types = kuhn_types()
    rep = 12
    slot_of = {tuple(o): s for s, o in enumerate(SLOT_OFFSETS.tolist())}
    out = []
    for z in range(15):
        nonzero = [v for v in range(4) if not z >> v & 1]
        lam = np.zeros(4, dtype=np.int64)
        lam[nonzero] = rep // len(nonzero)
        p = np.array([rep - lam[0], rep - lam[0] - lam[1], lam[3]])
        rows = []
        for t in range(6):
            for a in range(4):
                base = p - types[t, a]
                if all(_inside(base + types[t, b], rep) for b in range(4)):
                    for b in range(4):
                        rows.append((t, a, b, slot_of[tuple(types[t, b] - types[t, a])]))
        out.append(np.array(rows, dtype=np.int64).reshape(-1, 4))
    return out


@jit()
def lattice_size(n):
    """Points of one cell's whole lattice."""
    return (n + 1) * (n + 2) * (n + 3) // 6


@jit()
def _L(p1, p2, p3):
    """Place of lattice point ``p`` in a cell's whole lattice."""
    return p1 * (p1 + 1) * (p1 + 2) // 6 + p2 * (p2 + 1) // 2 + p3


@jit()
def _face_point(v, n, a, b):
    """Lattice place of point ``(a, b)`` (``2 <= a < n``, ``1 <= b < a``) inside the face
    opposite vertex ``v`` of a cell, in the cell's own order of its face points."""
    if v == 0:
        return _L(n, a, b)
    if v == 1:
        return _L(a, a, b)
    if v == 2:
        return _L(a, b, b)
    return _L(a, b, 0)


@jit()
def _sizes(n):
    inner = (n - 1) * (n - 2) * (n - 3) // 6
    face = (n - 1) * (n - 2) // 2
    return inner, face, n - 1


def level_size(n, m, n_faces, n_edges, n_vertices):
    """Values on a level with ``n`` subdivisions (Python integers: no overflow)."""
    n, m = int(n), int(m)
    inner, face = (n - 1) * (n - 2) * (n - 3) // 6, (n - 1) * (n - 2) // 2
    return m * inner + int(n_faces) * face + int(n_edges) * (n - 1) + int(n_vertices)


@jit()
def _p_of(lam0, lam1, lam2, n):
    p1 = n - lam0
    p2 = p1 - lam1
    return p1, p2, p2 - lam2


@jit()
def face_tables(n):
    """``(mapl, mapf)``, each (24, C(n-1, 2)): for a cell's face ``v`` whose points come in
    order ``PERMS[i]`` (row ``6 v + i``), the place in the cell's lattice and in the
    cell's own face order (:func:`_boundary_walk`) of the face's point ``j`` (the face's
    own order, by its sorted points)."""
    face = (n - 1) * (n - 2) // 2
    mapl = np.zeros((24, max(face, 1)), dtype=np.int64)
    mapf = np.zeros((24, max(face, 1)), dtype=np.int64)
    lam = np.zeros(4, dtype=np.int64)
    others = np.empty(3, dtype=np.int64)
    for v in range(4):
        k = 0
        for a in range(4):
            if a != v:
                others[k] = a
                k += 1
        for pi in range(6):
            l0, l1, l2 = others[PERMS[pi, 0]], others[PERMS[pi, 1]], others[PERMS[pi, 2]]
            for s in range(n - 2):
                for v2 in range(s + 1):
                    lam[v] = 0
                    lam[l0] = n - s - 2
                    lam[l1] = s - v2 + 1
                    lam[l2] = v2 + 1
                    p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], n)
                    i = s * (s + 1) // 2 + v2
                    mapl[6 * v + pi, i] = _L(p1, p2, p3)
                    if v == 0:
                        a, b = p2, p3
                    elif v == 1:
                        a, b = p1, p3
                    else:
                        a, b = p1, p2
                    mapf[6 * v + pi, i] = (a - 2) * (a - 1) // 2 + b - 1
    return mapl, mapf


@jit(inline="always")
def _edge_ends(V, EV, c, le, e):
    """``(i, j, la, lb)``: the local points of cell ``c``'s edge ``le`` (global edge ``e``),
    and the same two as its lower (``la``) and higher (``lb``) global point."""
    i, j = (0, 0, 0, 1, 1, 2)[le], (1, 2, 3, 2, 3, 3)[le]
    if V[c, i] == EV[e, 0]:
        return i, j, i, j
    return i, j, j, i


@jit(inline="always")
def _face_order(V, FV, c, v, f, lk):
    """``lk[k]``: the local point of cell ``c`` that is point ``k`` of face ``f`` (sorted)."""
    for k in range(3):
        for a in range(4):
            if a != v and V[c, a] == FV[f, k]:
                lk[k] = a


@jit(inline="always")
def _gather(x, c, n, topo, mapl, loc, masked, owned, lk, lam):
    """Cell ``c``'s whole lattice from the level vector ``x`` into ``loc`` (``mapl``: the
    level's :func:`face_tables`).

    ``masked``: held points read as 0.  ``owned``: points on a face, edge or vertex
    that ``c`` is not the first cell of read as 0 (each shared point counted once)."""
    V, CF, CE, FV, FC, EV = topo[0], topo[1], topo[2], topo[3], topo[4], topo[5]
    eptr, ecell, vptr, vcell = topo[6], topo[7], topo[8], topo[9]
    held_f, held_e, held_v = topo[10], topo[11], topo[12]
    m, nf, ne = V.shape[0], FV.shape[0], EV.shape[0]
    inner, face, edge = _sizes(n)
    fbase = m * inner
    ebase = fbase + nf * face
    vbase = ebase + ne * edge
    for p1 in range(3, n):
        for p2 in range(2, p1):
            src = c * inner + _L(p1 - 3, p2 - 2, 0)
            dst = _L(p1, p2, 1)
            for t in range(p2 - 1):
                loc[U(dst + t)] = x[U(src + t)]
    FP = topo[16]
    for v in range(4):
        f = CF[c, v]
        zero = (masked and held_f[f]) or (owned and FC[f, 0] != c)
        row = 6 * v + FP[c, v]
        src = fbase + f * face
        for i in range(face):
            loc[mapl[row, i]] = 0.0 if zero else x[src + i]
    for le in range(6):
        e = CE[c, le]
        i, j, la, lb = _edge_ends(V, EV, c, le, e)
        zero = (masked and held_e[e]) or (owned and ecell[eptr[e]] != c)
        for a in range(4):
            lam[a] = 0
        for t in range(1, n):
            lam[lb] = t
            lam[la] = n - t
            p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], n)
            loc[_L(p1, p2, p3)] = 0.0 if zero else x[ebase + e * edge + t - 1]
    for v in range(4):
        g = V[c, v]
        zero = (masked and held_v[g]) or (owned and vcell[vptr[g]] != c)
        for a in range(4):
            lam[a] = 0
        lam[v] = n
        p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], n)
        loc[_L(p1, p2, p3)] = 0.0 if zero else x[vbase + g]


@jit()
def _delta(p1, p2, s):
    """``L(p + offset of slot s) - L(p)``: the cubic place formula's differences."""
    d = _O3[s]
    o1, o2 = _O1[s], _O2[s]
    if o1 > 0:
        d += (p1 + 1) * (p1 + 2) // 2
    elif o1 < 0:
        d -= p1 * (p1 + 1) // 2
    if o2 > 0:
        d += p2 + 1
    elif o2 < 0:
        d -= p2
    return d


@jit(inline="always")
def _partial(loc, wc, z, slots, n_slots, kk, p1, p2, p3):
    """The partial stencil of class ``z`` at ``p`` (``wc[z, q]``: the cell's scaled weight
    of the class's ``q``-th slot; ``kk``: :func:`_delta_table`)."""
    base = _L(p1, p2, p3)
    acc = 0.0
    for q in range(n_slots[z]):
        s = slots[z, q]
        acc += wc[z, q] * loc[U(base + kk[p1, s] + _O2[s] * p2)]
    return acc


@jit()
def _delta_table(n):
    """``kk[p1, s]`` with ``L(p + offset of s) - L(p) = kk[p1, s] + o2 * p2``: the place
    formula's differences are linear in ``p2`` on a layer of fixed ``p1``."""
    kk = np.empty((n + 1, 15), dtype=np.int64)
    for p1 in range(n + 1):
        for s in range(15):
            kk[p1, s] = _delta(p1, 0, s)
    return kk


@jit(inline="always")
def _face_row(loc, out, row, a, t3, e_q, m_q, w, tri, lin):
    """``out[row + b]``, ``b = 1..a-1``: a row of a face's partial stencils (a face class's
    eleven slots, written out).  Point ``b`` is at ``t3 + tri * b (b + 1) / 2 + lin * b``
    in the lattice, its slot ``q`` at ``e_q[q] + m_q[q] * b`` from it (``m + 1 >= 0``)."""
    e0, e1, e2, e3 = U(t3 + e_q[0]), U(t3 + e_q[1]), U(t3 + e_q[2]), U(t3 + e_q[3])
    e4, e5, e6, e7 = U(t3 + e_q[4]), U(t3 + e_q[5]), U(t3 + e_q[6]), U(t3 + e_q[7])
    e8, e9, e10 = U(t3 + e_q[8]), U(t3 + e_q[9]), U(t3 + e_q[10])
    m0, m1, m2, m3 = U(m_q[0] + 1), U(m_q[1] + 1), U(m_q[2] + 1), U(m_q[3] + 1)
    m4, m5, m6, m7 = U(m_q[4] + 1), U(m_q[5] + 1), U(m_q[6] + 1), U(m_q[7] + 1)
    m8, m9, m10 = U(m_q[8] + 1), U(m_q[9] + 1), U(m_q[10] + 1)
    w0, w1, w2, w3, w4, w5 = w[0], w[1], w[2], w[3], w[4], w[5]
    w6, w7, w8, w9, w10 = w[6], w[7], w[8], w[9], w[10]
    r, ut, ul, one = U(row), U(tri), U(lin), U(1)
    for b in range(one, U(a)):
        t = ut * (b * (b + one) // U(2)) + ul * b - b
        # left to right from 0.0: the order of _partial's sum
        out[r + b] = (0.0 + w0 * loc[e0 + t + m0 * b] + w1 * loc[e1 + t + m1 * b]
                      + w2 * loc[e2 + t + m2 * b] + w3 * loc[e3 + t + m3 * b]
                      + w4 * loc[e4 + t + m4 * b] + w5 * loc[e5 + t + m5 * b]
                      + w6 * loc[e6 + t + m6 * b] + w7 * loc[e7 + t + m7 * b]
                      + w8 * loc[e8 + t + m8 * b] + w9 * loc[e9 + t + m9 * b]
                      + w10 * loc[e10 + t + m10 * b])


@jit(inline="always")
def _boundary_walk(c, n, topo, lk, lam, what, loc, wc, slots, n_slots, kk, bf, be, bv, C):
    """Each boundary point of cell ``c`` (faces, edges, vertices), with its place in the
    per-cell buffers ``bf[c, v, i]``, ``be[c, le, i]``, ``bv[c, v]``: ``what`` 0 writes the
    partial stencil's value on ``loc`` (weights ``wc``; the faces a row at a time,
    :func:`_face_row`), 2 the same point by point (:func:`_partial`: the plain
    reference), 1 the class value ``C[c, Z]``."""
    V, CE, EV = topo[0], topo[2], topo[5]
    e_q, m_q = np.empty(15, dtype=np.int64), np.empty(15, dtype=np.int64)
    for v in range(4):
        z = 1 << v
        if what == 1:
            for i in range((n - 1) * (n - 2) // 2):
                bf[c, v, i] = C[c, z]
            continue
        ns = n_slots[z]
        # face points in the cell's own order (a, b), n > a > b > 0: rows of fixed a
        for a in range(2, n):
            p1 = n if v == 0 else a
            row = (a - 2) * (a - 1) // 2 - 1
            if what == 2:
                for b in range(1, a):
                    p2, p3 = (a, b) if v <= 1 else ((b, b) if v == 2 else (b, 0))
                    bf[c, v, row + b] = _partial(loc, wc, z, slots, n_slots, kk, p1, p2, p3)
                continue
            for q in range(ns):
                sl = slots[z, q]
                e_q[q] = kk[p1, sl]
                m_q[q] = 0 if v <= 1 else _O2[sl]
                if v <= 1:  # p2 is fixed along the row
                    e_q[q] += _O2[sl] * a
            # constant arguments: the compiler makes three loops, the first of plain loads
            t3 = _face_point(v, n, a, 0)
            if v <= 1:
                _face_row(loc, bf[c, v], row, a, t3, e_q, m_q, wc[z], 0, 1)
            elif v == 2:
                _face_row(loc, bf[c, v], row, a, t3, e_q, m_q, wc[z], 1, 1)
            else:
                _face_row(loc, bf[c, v], row, a, t3, e_q, m_q, wc[z], 1, 0)
    for le in range(6):
        e = CE[c, le]
        i, j, la, lb = _edge_ends(V, EV, c, le, e)
        z = 15 ^ ((1 << i) | (1 << j))
        for a in range(4):
            lam[a] = 0
        for t in range(1, n):
            lam[lb] = t
            lam[la] = n - t
            if what != 1:
                p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], n)
                be[c, le, t - 1] = _partial(loc, wc, z, slots, n_slots, kk, p1, p2, p3)
            else:
                be[c, le, t - 1] = C[c, z]
    for v in range(4):
        z = 15 ^ (1 << v)
        if what != 1:
            for a in range(4):
                lam[a] = 0
            lam[v] = n
            p1, p2, p3 = _p_of(lam[0], lam[1], lam[2], n)
            bv[c, v] = _partial(loc, wc, z, slots, n_slots, kk, p1, p2, p3)
        else:
            bv[c, v] = C[c, z]


@jit(inline="always")
def _inside_rows(loc, y, start, n, w):
    """``y[start:]`` = the 15-point stencil ``w`` (slots in order) at the cell's inside
    points, row by row (``p1``, ``p2`` fixed): the offsets are constant along a row, so
    the row loop is one of plain loads (written out: the compiler vectorises it)."""
    w0, w1, w2, w3, w4, w5, w6, w7 = w[0], w[1], w[2], w[3], w[4], w[5], w[6], w[7]
    w8, w9, w10, w11, w12, w13, w14 = w[8], w[9], w[10], w[11], w[12], w[13], w[14]
    for p1 in range(3, n):
        # on a layer of fixed p1 the offsets are linear in p2 (slots 2, 4, 6, 7 step +1,
        # slots 9, 11, 13, 14 step -1)
        k1, k2, k3 = _delta(p1, 0, 1), _delta(p1, 0, 2), _delta(p1, 0, 3)
        k4, k5, k6 = _delta(p1, 0, 4), _delta(p1, 0, 5), _delta(p1, 0, 6)
        k7, k8, k9 = _delta(p1, 0, 7), _delta(p1, 0, 8), _delta(p1, 0, 9)
        k10, k11, k12 = _delta(p1, 0, 10), _delta(p1, 0, 11), _delta(p1, 0, 12)
        k13, k14 = _delta(p1, 0, 13), _delta(p1, 0, 14)
        for p2 in range(2, p1):
            base = _L(p1, p2, 0)
            d1, d2, d3, d4, d5 = k1, k2 + p2, k3, k4 + p2, k5
            d6, d7, d8, d9, d10 = k6 + p2, k7 + p2, k8, k9 - p2, k10
            d11, d12, d13, d14 = k11 - p2, k12, k13 - p2, k14 - p2
            out = start + _L(p1 - 3, p2 - 2, 0) - 1
            for p3 in range(1, p2):
                b = base + p3
                y[U(out + p3)] = ((w0 * loc[U(b)] + w1 * loc[U(b + d1)] + w2 * loc[U(b + d2)]
                                + w3 * loc[U(b + d3)] + w4 * loc[U(b + d4)])
                               + (w5 * loc[U(b + d5)] + w6 * loc[U(b + d6)] + w7 * loc[U(b + d7)]
                                  + w8 * loc[U(b + d8)] + w9 * loc[U(b + d9)])
                               + (w10 * loc[U(b + d10)] + w11 * loc[U(b + d11)] + w12 * loc[U(b + d12)]
                                  + w13 * loc[U(b + d13)] + w14 * loc[U(b + d14)]))


@jit(parallel=True)
def product(x, y, n, topo, W, scale, slots, n_slots, masked, bf, be, bv, mapl, mapf,
            plain=False):
    """``y = A x`` on a level: inside points by the stencil, the rest through the buffers
    (then :func:`accumulate`, called here).  ``W[c, Z, slot]`` the class weights at
    ``n = 1``, ``scale`` their factor on this level (``1 / n``); ``plain``: the faces'
    points one by one (the tests' reference for the rows, the same bits)."""
    V = topo[0]
    m = V.shape[0]
    inner = _sizes(n)[0]
    size = lattice_size(n)
    kk = _delta_table(n)
    for ch in prange((m + CELLS - 1) // CELLS):
        loc = np.empty(size)
        lk = np.empty(3, dtype=np.int64)
        lam = np.zeros(4, dtype=np.int64)
        wc = np.empty((15, 15))
        for c in range(ch * CELLS, min(m, (ch + 1) * CELLS)):
            _gather(x, c, n, topo, mapl, loc, masked, False, lk, lam)
            for z in range(15):
                for q in range(n_slots[z]):
                    wc[z, q] = W[c, z, slots[z, q]] * scale
            _inside_rows(loc, y, c * inner, n, wc[0])
            _boundary_walk(c, n, topo, lk, lam, 2 if plain else 0, loc, wc, slots, n_slots,
                           kk, bf, be, bv, W[:, :, 0])
    accumulate(y, n, topo, masked, bf, be, bv, mapl, mapf)


@jit(parallel=True)
def class_fill(C, inner_value, y, n, topo, masked, bf, be, bv, mapl, mapf):
    """``y`` at each point: the sum over the cells holding it of ``C[c, Z]`` (``Z`` the
    point's class in ``c``); inside points get ``inner_value[c]``.  Diagonals, row sums
    and loads of constant data are such sums."""
    V = topo[0]
    m = V.shape[0]
    inner = _sizes(n)[0]
    for ch in prange((m + CELLS - 1) // CELLS):
        lk = np.empty(3, dtype=np.int64)
        lam = np.zeros(4, dtype=np.int64)
        no_slots, no_count, no_kk = (np.zeros((1, 1), np.int64), np.zeros(1, np.int64),
                                     np.zeros((1, 1), np.int64))
        for c in range(ch * CELLS, min(m, (ch + 1) * CELLS)):
            for i in range(inner):
                y[c * inner + i] = inner_value[c]
            _boundary_walk(c, n, topo, lk, lam, 1, y, C, no_slots, no_count, no_kk, bf, be, bv, C)
    accumulate(y, n, topo, masked, bf, be, bv, mapl, mapf)


@jit(parallel=True)
def accumulate(y, n, topo, masked, bf, be, bv, mapl, mapf):
    """The faces', edges' and vertices' values of ``y``: their cells' parts added, lower
    cell first (held points 0 when ``masked``)."""
    V, FV, FC, FL = topo[0], topo[3], topo[4], topo[13]
    EV, eptr, ecell, ele = topo[5], topo[6], topo[7], topo[14]
    vptr, vcell, vlv = topo[8], topo[9], topo[15]
    held_f, held_e, held_v = topo[10], topo[11], topo[12]
    FP = topo[16]
    m, nf, ne, nv = V.shape[0], FV.shape[0], EV.shape[0], vptr.shape[0] - 1
    inner, face, edge = _sizes(n)
    fbase = m * inner
    ebase = fbase + nf * face
    vbase = ebase + ne * edge
    for f in prange(nf):
        c0, c1, l0, l1 = FC[f, 0], FC[f, 1], FL[f, 0], FL[f, 1]
        r0 = 6 * l0 + FP[c0, l0]
        r1 = 6 * l1 + FP[c1, l1] if c1 >= 0 else 0
        zero = masked and held_f[f]
        for i in range(face):
            if zero:
                y[fbase + f * face + i] = 0.0
                continue
            acc = bf[c0, l0, mapf[r0, i]]
            if c1 >= 0:
                acc += bf[c1, l1, mapf[r1, i]]
            y[fbase + f * face + i] = acc
    for e in prange(ne):
        for i in range(edge):
            acc = 0.0
            for q in range(eptr[e], eptr[e + 1]):
                acc += be[ecell[q], ele[q], i]
            y[ebase + e * edge + i] = 0.0 if (masked and held_e[e]) else acc
    for g in prange(nv):
        acc = 0.0
        for q in range(vptr[g], vptr[g + 1]):
            acc += bv[vcell[q], vlv[q]]
        y[vbase + g] = 0.0 if (masked and held_v[g]) else acc
