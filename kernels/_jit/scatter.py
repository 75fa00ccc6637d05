"""The csr numeric phase element by element: triangles in pairs, by coloured blocks.

Each block of consecutive triangles (:mod:`hatkernels.mesh.colouring`) is
split once into *pairs*, two triangles of the block that share an edge, and
*singles*, the rest (:func:`pair_cells`, :func:`fill_pairs`).  A pair is
stored as its four points ``(a, u, v, q)``: the triangles are ``(a, u, v)``
and ``(q, v, u)``, rotations of the mesh's own (counterclockwise) triangles,
and ``(u, v)`` is the shared edge.  The scatter adds a pair's 18 element
entries into 14 matrix entries: the shared edge's two entries and the
diagonals of ``u`` and ``v`` get both triangles' terms, summed in registers
first.  Against two triangles apart that is 4 read-modify-writes, 2 point
loads and 2 index loads fewer; measured 10 to 13 % faster at 2e6 and 8e6
triangles with a scalar coefficient, 19 % with a tensor (docs/assembly.md).

Every entry's position is its row's diagonal plus a small offset (int16,
checked by the caller).  Blocks of one colour share no point, so no row:
race-free, and every entry receives its terms in the order colour, block,
pairs then singles, whatever the thread count.  Entry ``(i, j)`` and
``(j, i)`` receive the same sums in the same order: the matrix is symmetric
to the last bit.  ``first`` (:func:`scatter_first`) says which terms start
their entries, so no entry is read before it is written and ``data`` needs
no zeroing pass.

Element stiffness, with ``e_k`` the edge opposite local vertex ``k`` and
``d`` twice the area: ``K_kl = kappa (e_k . e_l) / (2 d)``; for a tensor
coefficient the dot product uses ``R^T K R`` (see :mod:`hatkernels._jit.assembly`).
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit
from hatkernels._jit.assembly import _ip, _rotated

# triangles further apart than this in a block are not tried as a pair
PAIR_WINDOW = 8


@jit(inline="always")
def _corner(pflat, i):
    """Coordinates of point ``i`` from the points as one flat array.

    The literal 2 lets the compiler use a shift; with ``points[i, 0]`` it
    multiplies by the row stride, measured 3-5 % of the scatter.
    """
    return pflat[i * uint64(2)], pflat[i * uint64(2) + uint64(1)]


@jit(inline="always")
def _values(e00, e01, e10, e11, e20, e21, kappa, ks, tensor, ts, t, scalar):
    """Off-diagonal ``(o0, o1, o2)`` (the pair opposite each vertex) and diagonal
    ``(d0, d1, d2)`` entries of triangle ``t`` with edges ``e_k = (ek0, ek1)``."""
    d = e10 * e21 - e20 * e11
    if scalar:
        # the identity tensor without its products by 0; zero row sums (the edges add up
        # to zero): K_kk = -(K_kl + K_km)
        w = kappa[t * uint64(ks)] / (2.0 * d)
        o0 = w * (e10 * e20 + e11 * e21)
        o1 = w * (e20 * e00 + e21 * e01)
        o2 = w * (e00 * e10 + e01 * e11)
        return o0, o1, o2, -(o1 + o2), -(o0 + o2), -(o0 + o1)
    w = 1.0 / (2.0 * d)
    k00, k01, k11 = _rotated(tensor, t * uint64(ts))
    return (w * _ip(e10, e11, e20, e21, k00, k01, k11),
            w * _ip(e20, e21, e00, e01, k00, k01, k11),
            w * _ip(e00, e01, e10, e11, k00, k01, k11),
            w * _ip(e00, e01, e00, e01, k00, k01, k11),
            w * _ip(e10, e11, e10, e11, k00, k01, k11),
            w * _ip(e20, e21, e20, e21, k00, k01, k11))


@jit(inline="always")
def _put(data, p, v, first):
    """``data[p] = v`` for the entry's first term, else ``data[p] += v`` (no zeroing pass)."""
    p = uint64(p)
    data[p] = v if first else data[p] + v


@jit(inline="always")
def _pair(pflat, quads, cells, kappa, ks, tensor, ts, scalar, diag, slots, first, data, k):
    """Add pair ``k``'s entries (see the module's docstring for the layout)."""
    ia = uint64(quads[k, uint64(0)])
    iu = uint64(quads[k, uint64(1)])
    iv = uint64(quads[k, uint64(2)])
    iq = uint64(quads[k, uint64(3)])
    xa, ya = _corner(pflat, ia)
    xu, yu = _corner(pflat, iu)
    xv, yv = _corner(pflat, iv)
    xq, yq = _corner(pflat, iq)
    # (a, u, v): edges v - u, a - v, u - a
    o0, o1, o2, d0, d1, d2 = _values(xv - xu, yv - yu, xa - xv, ya - yv, xu - xa, yu - ya,
                                     kappa, ks, tensor, ts, uint64(cells[k, uint64(0)]),
                                     scalar)
    # (q, v, u): edges u - v, q - u, v - q
    r0, r1, r2, c0, c1, c2 = _values(xu - xv, yu - yv, xq - xu, yq - yu, xv - xq, yv - yq,
                                     kappa, ks, tensor, ts, uint64(cells[k, uint64(1)]),
                                     scalar)
    pa, pu, pv, pq = diag[ia], diag[iu], diag[iv], diag[iq]
    f = first[k]
    shared = o0 + r0
    _put(data, pa, d0, f & 1)
    _put(data, pu, d1 + c2, f & 2)
    _put(data, pv, d2 + c1, f & 4)
    _put(data, pq, c0, f & 8)
    _put(data, pa + slots[k, uint64(0)], o2, f & 16)  # (a, u)
    _put(data, pu + slots[k, uint64(3)], o2, f & 16)  # (u, a)
    _put(data, pa + slots[k, uint64(1)], o1, f & 32)  # (a, v)
    _put(data, pv + slots[k, uint64(4)], o1, f & 32)  # (v, a)
    _put(data, pu + slots[k, uint64(2)], shared, f & 64)  # (u, v)
    _put(data, pv + slots[k, uint64(5)], shared, f & 64)  # (v, u)
    _put(data, pq + slots[k, uint64(6)], r2, f & 128)  # (q, v)
    _put(data, pv + slots[k, uint64(8)], r2, f & 128)  # (v, q)
    _put(data, pq + slots[k, uint64(7)], r1, f & 256)  # (q, u)
    _put(data, pu + slots[k, uint64(9)], r1, f & 256)  # (u, q)


@jit(inline="always")
def _single(pflat, triangles, singles, kappa, ks, tensor, ts, scalar, diag, slots, first,
            data, k):
    """Add single ``k``'s nine entries: slots ``(0, 1)`` are row ``0``'s entries
    ``(0, 1)`` and ``(0, 2)``, then rows 1 and 2 likewise (local vertices)."""
    t = uint64(singles[k])
    i0 = uint64(triangles[t, uint64(0)])
    i1 = uint64(triangles[t, uint64(1)])
    i2 = uint64(triangles[t, uint64(2)])
    x0, y0 = _corner(pflat, i0)
    x1, y1 = _corner(pflat, i1)
    x2, y2 = _corner(pflat, i2)
    o0, o1, o2, d0, d1, d2 = _values(x2 - x1, y2 - y1, x0 - x2, y0 - y2, x1 - x0, y1 - y0,
                                     kappa, ks, tensor, ts, t, scalar)
    p0, p1, p2 = diag[i0], diag[i1], diag[i2]
    f = first[k]
    _put(data, p0, d0, f & 1)
    _put(data, p1, d1, f & 2)
    _put(data, p2, d2, f & 4)
    # row a: (a, a+1) is the pair opposite a+2, (a, a+2) the one opposite a+1
    _put(data, p0 + slots[k, uint64(0)], o2, f & 8)
    _put(data, p0 + slots[k, uint64(1)], o1, f & 16)
    _put(data, p1 + slots[k, uint64(2)], o0, f & 32)
    _put(data, p1 + slots[k, uint64(3)], o2, f & 8)
    _put(data, p2 + slots[k, uint64(4)], o1, f & 16)
    _put(data, p2 + slots[k, uint64(5)], o0, f & 32)


# One kernel per kind of coefficient (the flag is a constant inside each), as for the
# matrix-free products: one kernel with the branch per triangle took 54.6 ms against
# 46.5 for the pair (8e6 triangles, before the later changes).


@jit(inline="always")
def _block(pflat, triangles, kappa, ks, tensor, ts, scalar, diag, pair_ptr, quads, cells,
           pair_slots, pair_first, single_ptr, singles, single_slots, single_first, data, b):
    """Block ``b``: its pairs ``pair_ptr[b]:pair_ptr[b + 1]``, then its singles."""
    for k in range(pair_ptr[b], pair_ptr[b + 1]):
        _pair(pflat, quads, cells, kappa, ks, tensor, ts, scalar, diag, pair_slots,
              pair_first, data, uint64(k))
    for k in range(single_ptr[b], single_ptr[b + 1]):
        _single(pflat, triangles, singles, kappa, ks, tensor, ts, scalar, diag, single_slots,
                single_first, data, uint64(k))


@jit(parallel=True)
def scatter_scalar(points, triangles, kappa, ks, tensor, ts, diag, pair_ptr, quads, cells,
                   pair_slots, pair_first, single_ptr, singles, single_slots, single_first,
                   colour_ptr, blocks, data):
    """Stiffness into CSR ``data``, block by block (:func:`_block`), the blocks of a colour
    side by side (see the module's docstring)."""
    pflat = points.reshape(points.size)
    for c in range(colour_ptr.size - 1):
        for kk in prange(colour_ptr[c], colour_ptr[c + 1]):
            _block(pflat, triangles, kappa, ks, tensor, ts, True, diag, pair_ptr, quads, cells,
                   pair_slots, pair_first, single_ptr, singles, single_slots, single_first,
                   data, blocks[kk])


@jit(parallel=True)
def scatter_tensor(points, triangles, kappa, ks, tensor, ts, diag, pair_ptr, quads, cells,
                   pair_slots, pair_first, single_ptr, singles, single_slots, single_first,
                   colour_ptr, blocks, data):
    """As :func:`scatter_scalar` for a tensor coefficient."""
    pflat = points.reshape(points.size)
    for c in range(colour_ptr.size - 1):
        for kk in prange(colour_ptr[c], colour_ptr[c + 1]):
            _block(pflat, triangles, kappa, ks, tensor, ts, False, diag, pair_ptr, quads,
                   cells, pair_slots, pair_first, single_ptr, singles, single_slots,
                   single_first, data, blocks[kk])


@jit(inline="always")
def _opposite(triangles, t, s):
    """Local vertex of ``t`` off the edge ``t`` shares with ``s`` in the opposite direction
    (as two counterclockwise neighbours do), or -1 when they share no such edge."""
    for r in range(3):
        u = triangles[t, (r + 1) % 3]
        v = triangles[t, (r + 2) % 3]
        for j in range(3):
            if triangles[s, j] == v and triangles[s, (j + 1) % 3] == u:
                return r
    return -1


@jit(parallel=True)
def pair_cells(triangles, block_size, window):
    """Each triangle's partner in its block (-1: single), greedily in the block's order:
    a triangle not yet paired takes the first free one of the next ``window`` that
    shares an edge with it.  Also each block's counts of pairs and of singles."""
    m = triangles.shape[0]
    n_blocks = (m + block_size - 1) // block_size
    partner = np.full(m, -1, dtype=np.int64)
    n_pairs = np.zeros(n_blocks, dtype=np.int64)
    n_singles = np.zeros(n_blocks, dtype=np.int64)
    for b in prange(n_blocks):
        lo = b * block_size
        hi = min(m, lo + block_size)
        pairs = 0
        for t in range(lo, hi):
            if partner[t] >= 0:
                continue
            for s in range(t + 1, min(hi, t + 1 + window)):
                if partner[s] < 0 and _opposite(triangles, t, s) >= 0:
                    partner[t] = s
                    partner[s] = t
                    pairs += 1
                    break
        n_pairs[b] = pairs
        n_singles[b] = hi - lo - 2 * pairs
    return partner, n_pairs, n_singles


@jit(parallel=True)
def fill_pairs(triangles, slots, partner, block_size, pair_ptr, single_ptr, quads, cells,
               pair_slots, singles, single_slots):
    """Fill the pairs and singles of each block (offsets ``pair_ptr``, ``single_ptr``).

    ``slots[t]`` are triangle ``t``'s offsets from its rows' diagonals, in the
    order of :func:`_single`; a pair's ten are those of its triangles rotated to
    ``(a, u, v)`` and ``(q, v, u)``: ``(a, u), (a, v), (u, v), (u, a), (v, a),
    (v, u)`` from the first, ``(q, v), (q, u), (v, q), (u, q)`` from the second.
    """
    m = triangles.shape[0]
    for b in prange(pair_ptr.size - 1):
        kp = pair_ptr[b]
        ks = single_ptr[b]
        for t in range(b * block_size, min(m, (b + 1) * block_size)):
            s = partner[t]
            if s < 0:
                singles[ks] = t
                for j in range(6):
                    single_slots[ks, j] = slots[t, j]
                ks += 1
            elif s > t:
                r1 = _opposite(triangles, t, s)
                r2 = _opposite(triangles, s, t)
                quads[kp, 0] = triangles[t, r1]
                quads[kp, 1] = triangles[t, (r1 + 1) % 3]
                quads[kp, 2] = triangles[t, (r1 + 2) % 3]
                quads[kp, 3] = triangles[s, r2]
                cells[kp, 0] = t
                cells[kp, 1] = s
                # local vertex l of the rotated triangle is (r + l) % 3 of the stored one
                a1, u1, v1 = 2 * r1, 2 * ((r1 + 1) % 3), 2 * ((r1 + 2) % 3)
                q2, v2, u2 = 2 * r2, 2 * ((r2 + 1) % 3), 2 * ((r2 + 2) % 3)
                pair_slots[kp, 0] = slots[t, a1]
                pair_slots[kp, 1] = slots[t, a1 + 1]
                pair_slots[kp, 2] = slots[t, u1]
                pair_slots[kp, 3] = slots[t, u1 + 1]
                pair_slots[kp, 4] = slots[t, v1]
                pair_slots[kp, 5] = slots[t, v1 + 1]
                pair_slots[kp, 6] = slots[s, q2]
                pair_slots[kp, 7] = slots[s, q2 + 1]
                pair_slots[kp, 8] = slots[s, v2 + 1]
                pair_slots[kp, 9] = slots[s, u2]
                kp += 1


@jit(inline="always")
def _mark(seen, p, bit):
    if seen[p]:
        return 0
    seen[p] = 1
    return bit


@jit(parallel=True)
def scatter_first(triangles, diag, pair_ptr, quads, pair_slots, single_ptr, singles,
                  single_slots, colour_ptr, blocks, nnz):
    """Which entries each pair and each single reaches first, in the scatter's order.

    A pair's bits: 1, 2, 4, 8 the diagonals of ``a, u, v, q``; 16, 32, 64,
    128, 256 the pairs of entries ``(a, u), (a, v), (u, v), (q, v), (q, u)``.
    A single's: 1, 2, 4 its diagonals, 8, 16, 32 its edges ``(0, 1), (0, 2),
    (1, 2)``.  Each bit covers both entries of a pair: the same terms reach
    them in the same order.  Every entry of the pattern belongs to some
    triangle, so the scatter writes each entry's first term and adds the
    others.
    """
    seen = np.zeros(nnz, dtype=np.uint8)
    pair_first = np.zeros(quads.shape[0], dtype=np.uint16)
    single_first = np.zeros(singles.size, dtype=np.uint8)
    for c in range(colour_ptr.size - 1):
        for kk in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[kk]
            for k in range(pair_ptr[b], pair_ptr[b + 1]):
                pa, pu = diag[quads[k, 0]], diag[quads[k, 1]]
                pv, pq = diag[quads[k, 2]], diag[quads[k, 3]]
                f = _mark(seen, pa, 1) | _mark(seen, pu, 2) | _mark(seen, pv, 4)
                f |= _mark(seen, pq, 8) | _mark(seen, pa + pair_slots[k, 0], 16)
                f |= _mark(seen, pa + pair_slots[k, 1], 32)
                f |= _mark(seen, pu + pair_slots[k, 2], 64)
                f |= _mark(seen, pq + pair_slots[k, 6], 128)
                f |= _mark(seen, pq + pair_slots[k, 7], 256)
                pair_first[k] = f
                seen[pu + pair_slots[k, 3]] = 1  # the other entry of each pair
                seen[pv + pair_slots[k, 4]] = 1
                seen[pv + pair_slots[k, 5]] = 1
                seen[pv + pair_slots[k, 8]] = 1
                seen[pu + pair_slots[k, 9]] = 1
            for k in range(single_ptr[b], single_ptr[b + 1]):
                t = singles[k]
                p0, p1, p2 = diag[triangles[t, 0]], diag[triangles[t, 1]], diag[triangles[t, 2]]
                f = _mark(seen, p0, 1) | _mark(seen, p1, 2) | _mark(seen, p2, 4)
                f |= _mark(seen, p0 + single_slots[k, 0], 8)
                f |= _mark(seen, p0 + single_slots[k, 1], 16)
                f |= _mark(seen, p1 + single_slots[k, 2], 32)
                seen[p1 + single_slots[k, 3]] = 1
                seen[p2 + single_slots[k, 4]] = 1
                seen[p2 + single_slots[k, 5]] = 1
                single_first[k] = f
    return pair_first, single_first
