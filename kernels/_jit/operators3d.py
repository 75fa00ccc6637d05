"""Matrix-free stiffness products on tetrahedra by coloured blocks of cells.

The colouring is that of :mod:`hatkernels._jit.operators` (blocks of
consecutive cells, two blocks of one colour share no point), so every
``y[i]`` receives its terms in an order fixed by the mesh whatever the
thread count.

Geometry of cell ``t`` with points ``p0 .. p3``: the edges ``a = p1 - p0``,
``b = p2 - p0``, ``c = p3 - p0``, the normals ``n1 = b x c``, ``n2 = c x a``,
``n3 = a x b``, ``n0 = -(n1 + n2 + n3)`` and ``det = a . n1`` (six times the
volume).  The barycentric gradients are ``n_a / det``, so

    K_ab = |T| kappa grad(phi_a) . grad(phi_b) = kappa (n_a . n_b) / (6 |det|)

and ``(K_T u)_a = kappa / (6 |det|) n_a . G`` with ``G = (u1 - u0) n1 +
(u2 - u0) n2 + (u3 - u0) n3`` (``det`` times the gradient of ``u``); a tensor
coefficient puts ``K G`` in place of ``kappa G``.  The fast products use this
form: three cross products, one determinant, three dot products per cell.
The setup kernels and the plain product use the six off-diagonal entries
(pairs in the order 01, 02, 03, 12, 13, 23, that of
:data:`hatkernels.mesh.refine3d.EDGE_PAIRS`) and the zero row sums of the
element matrix, ``(K_T u)_a = sum over b != a of K_ab (u_b - u_a)``.

The fast geometry products work on a block in chunks of :data:`CHUNK` cells
in three passes: gather the coordinate differences and values into a small
local buffer, compute every cell's three contributions from the buffer (a
loop with no indirect access, which the compiler turns into vector
instructions), then add them into ``y`` in cell order.
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit
from hatkernels._jit.geometry import tetrahedron_normals as _normals
from hatkernels._jit.operators import _zero

#: Cells per pass of the fast products (buffers of 13 x CHUNK doubles stay in L1).
CHUNK = 128


@jit(inline="always")
def _kdot(ux, uy, uz, vx, vy, vz, tensor, k):
    """``u^T K v`` with tensor ``k``; swapping ``u`` and ``v`` gives the same bits."""
    d = tensor[k, 0, 0] * (ux * vx) + tensor[k, 1, 1] * (uy * vy) + tensor[k, 2, 2] * (uz * vz)
    return d + (tensor[k, 0, 1] * (ux * vy + uy * vx) + tensor[k, 0, 2] * (ux * vz + uz * vx)
                + tensor[k, 1, 2] * (uy * vz + uz * vy))


@jit(inline="always")
def _offdiagonals(points, cells, t, kappa, ks, tensor, ts):
    """The six off-diagonal entries of cell ``t`` (pairs 01, 02, 03, 12, 13, 23), its points."""
    n1x, n1y, n1z, n2x, n2y, n2z, n3x, n3y, n3z, det, i0, i1, i2, i3 = _normals(points, cells, t)
    n0x = -((n1x + n2x) + n3x)
    n0y = -((n1y + n2y) + n3y)
    n0z = -((n1z + n2z) + n3z)
    if tensor.shape[0] == 0:
        w = kappa[uint64(t * ks)] / (6.0 * abs(det))
        o01 = w * (n0x * n1x + n0y * n1y + n0z * n1z)
        o02 = w * (n0x * n2x + n0y * n2y + n0z * n2z)
        o03 = w * (n0x * n3x + n0y * n3y + n0z * n3z)
        o12 = w * (n1x * n2x + n1y * n2y + n1z * n2z)
        o13 = w * (n1x * n3x + n1y * n3y + n1z * n3z)
        o23 = w * (n2x * n3x + n2y * n3y + n2z * n3z)
    else:
        w = 1.0 / (6.0 * abs(det))
        k = uint64(t * ts)
        o01 = w * _kdot(n0x, n0y, n0z, n1x, n1y, n1z, tensor, k)
        o02 = w * _kdot(n0x, n0y, n0z, n2x, n2y, n2z, tensor, k)
        o03 = w * _kdot(n0x, n0y, n0z, n3x, n3y, n3z, tensor, k)
        o12 = w * _kdot(n1x, n1y, n1z, n2x, n2y, n2z, tensor, k)
        o13 = w * _kdot(n1x, n1y, n1z, n3x, n3y, n3z, tensor, k)
        o23 = w * _kdot(n2x, n2y, n2z, n3x, n3y, n3z, tensor, k)
    return o01, o02, o03, o12, o13, o23, i0, i1, i2, i3


@jit(inline="always")
def _add_tetrahedron(y, i0, i1, i2, i3, o01, o02, o03, o12, o13, o23, x0, x1, x2, x3):
    """``y += K_T x`` for a zero-row-sum element matrix given by its six off-diagonals."""
    y[i0] += (o01 * (x1 - x0) + o02 * (x2 - x0)) + o03 * (x3 - x0)
    y[i1] += (o01 * (x0 - x1) + o12 * (x2 - x1)) + o13 * (x3 - x1)
    y[i2] += (o02 * (x0 - x2) + o12 * (x1 - x2)) + o23 * (x3 - x2)
    y[i3] += (o03 * (x0 - x3) + o13 * (x1 - x3)) + o23 * (x2 - x3)


@jit(inline="always")
def _gather(points, cells, kappa, ks, x, s, n, g):
    """Rows 0-8 of ``g``: edges a, b, c of cells ``s .. s+n``; rows 9-11: ``x_k - x_0``;
    row 12: the scalar coefficient."""
    z, o, w = uint64(0), uint64(1), uint64(2)
    for j in range(n):
        t = uint64(s + j)
        i0 = uint64(cells[t, z])
        i1 = uint64(cells[t, o])
        i2 = uint64(cells[t, w])
        i3 = uint64(cells[t, uint64(3)])
        px, py, pz = points[i0, z], points[i0, o], points[i0, w]
        g[0, j] = points[i1, z] - px
        g[1, j] = points[i1, o] - py
        g[2, j] = points[i1, w] - pz
        g[3, j] = points[i2, z] - px
        g[4, j] = points[i2, o] - py
        g[5, j] = points[i2, w] - pz
        g[6, j] = points[i3, z] - px
        g[7, j] = points[i3, o] - py
        g[8, j] = points[i3, w] - pz
        x0 = x[i0]
        g[9, j] = x[i1] - x0
        g[10, j] = x[i2] - x0
        g[11, j] = x[i3] - x0
        g[12, j] = kappa[uint64(t * uint64(ks))]


@jit(inline="always")
def _chunk_normals(g, j):
    """The normals, ``det`` and ``G`` (``det`` times grad u) of buffered cell ``j``."""
    ax, ay, az = g[0, j], g[1, j], g[2, j]
    bx, by, bz = g[3, j], g[4, j], g[5, j]
    cx, cy, cz = g[6, j], g[7, j], g[8, j]
    d1, d2, d3 = g[9, j], g[10, j], g[11, j]
    n1x, n1y, n1z = by * cz - bz * cy, bz * cx - bx * cz, bx * cy - by * cx
    n2x, n2y, n2z = cy * az - cz * ay, cz * ax - cx * az, cx * ay - cy * ax
    n3x, n3y, n3z = ay * bz - az * by, az * bx - ax * bz, ax * by - ay * bx
    det = ax * n1x + ay * n1y + az * n1z
    gx = (d1 * n1x + d2 * n2x) + d3 * n3x
    gy = (d1 * n1y + d2 * n2y) + d3 * n3y
    gz = (d1 * n1z + d2 * n2z) + d3 * n3z
    return n1x, n1y, n1z, n2x, n2y, n2z, n3x, n3y, n3z, det, gx, gy, gz


@jit(inline="always")
def _scatter(cells, s, n, r, y):
    """Add the buffered contributions of cells ``s .. s+n`` into ``y``, in cell order."""
    for j in range(n):
        t = uint64(s + j)
        r1, r2, r3 = r[0, j], r[1, j], r[2, j]
        y[uint64(cells[t, uint64(1)])] += r1
        y[uint64(cells[t, uint64(2)])] += r2
        y[uint64(cells[t, uint64(3)])] += r3
        y[uint64(cells[t, uint64(0)])] -= (r1 + r2) + r3


# One kernel per kind of coefficient, written out at module level (see
# hatkernels._jit.operators: a per-cell branch is slower, and numba's disk
# cache keys functions by name).


@jit(parallel=True)
def product_scalar(points, cells, kappa, ks, tensor, ts, block_size, colour_ptr, blocks, x, y):
    """``y = K x`` for a scalar coefficient, recomputing every cell's geometry."""
    m = cells.shape[0]
    _zero(y)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            end = min(m, (b + 1) * block_size)
            g = np.empty((13, CHUNK))
            r = np.empty((3, CHUNK))
            for s in range(b * block_size, end, CHUNK):
                n = min(CHUNK, end - s)
                _gather(points, cells, kappa, ks, x, s, n, g)
                for j in range(n):
                    n1x, n1y, n1z, n2x, n2y, n2z, n3x, n3y, n3z, det, gx, gy, gz = (
                        _chunk_normals(g, j)
                    )
                    w = g[12, j] / (6.0 * abs(det))
                    r[0, j] = w * (n1x * gx + n1y * gy + n1z * gz)
                    r[1, j] = w * (n2x * gx + n2y * gy + n2z * gz)
                    r[2, j] = w * (n3x * gx + n3y * gy + n3z * gz)
                _scatter(cells, s, n, r, y)


@jit(parallel=True)
def product_tensor(points, cells, kappa, ks, tensor, ts, block_size, colour_ptr, blocks, x, y):
    """As :func:`product_scalar` for a 3x3 tensor coefficient: ``n_a . (K G)``."""
    m = cells.shape[0]
    _zero(y)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            end = min(m, (b + 1) * block_size)
            g = np.empty((13, CHUNK))
            r = np.empty((3, CHUNK))
            for s in range(b * block_size, end, CHUNK):
                n = min(CHUNK, end - s)
                _gather(points, cells, kappa, ks, x, s, n, g)
                for j in range(n):
                    n1x, n1y, n1z, n2x, n2y, n2z, n3x, n3y, n3z, det, gx, gy, gz = (
                        _chunk_normals(g, j)
                    )
                    q = uint64((s + j) * ts)
                    kx = tensor[q, 0, 0] * gx + tensor[q, 0, 1] * gy + tensor[q, 0, 2] * gz
                    ky = tensor[q, 1, 0] * gx + tensor[q, 1, 1] * gy + tensor[q, 1, 2] * gz
                    kz = tensor[q, 2, 0] * gx + tensor[q, 2, 1] * gy + tensor[q, 2, 2] * gz
                    w = 1.0 / (6.0 * abs(det))
                    r[0, j] = w * (n1x * kx + n1y * ky + n1z * kz)
                    r[1, j] = w * (n2x * kx + n2y * ky + n2z * kz)
                    r[2, j] = w * (n3x * kx + n3y * ky + n3z * kz)
                _scatter(cells, s, n, r, y)


@jit()
def product_serial(points, cells, kappa, ks, tensor, ts, x, y):
    """The plain version: one loop over cells, element matrices, no colouring."""
    y[:] = 0.0
    for t in range(cells.shape[0]):
        o01, o02, o03, o12, o13, o23, i0, i1, i2, i3 = _offdiagonals(
            points, cells, t, kappa, ks, tensor, ts
        )
        _add_tetrahedron(y, i0, i1, i2, i3, o01, o02, o03, o12, o13, o23,
                         x[i0], x[i1], x[i2], x[i3])


@jit(parallel=True)
def diagonal_and_offsum(points, cells, kappa, ks, tensor, ts, block_size, colour_ptr, blocks,
                        diag, off, with_off):
    """The diagonal into ``diag`` (zero row sums: minus the row's off-diagonals) and, when
    ``with_off``, the row sums of ``|K_ij|``, ``j != i``, into ``off``."""
    m = cells.shape[0]
    _zero(diag)
    if with_off:
        _zero(off)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            for t in range(b * block_size, min(m, (b + 1) * block_size)):
                o01, o02, o03, o12, o13, o23, i0, i1, i2, i3 = _offdiagonals(
                    points, cells, t, kappa, ks, tensor, ts
                )
                diag[i0] -= (o01 + o02) + o03
                diag[i1] -= (o01 + o12) + o13
                diag[i2] -= (o02 + o12) + o23
                diag[i3] -= (o03 + o13) + o23
                if with_off:
                    off[i0] += (abs(o01) + abs(o02)) + abs(o03)
                    off[i1] += (abs(o01) + abs(o12)) + abs(o13)
                    off[i2] += (abs(o02) + abs(o12)) + abs(o23)
                    off[i3] += (abs(o03) + abs(o13)) + abs(o23)


@jit(parallel=True)
def offdiagonal_values(points, cells, kappa, ks, tensor, ts, out):
    """The six off-diagonal entries of each cell into ``out`` (M, 6)."""
    for t in prange(cells.shape[0]):
        o01, o02, o03, o12, o13, o23, _, _, _, _ = _offdiagonals(
            points, cells, t, kappa, ks, tensor, ts
        )
        out[t, 0] = o01
        out[t, 1] = o02
        out[t, 2] = o03
        out[t, 3] = o12
        out[t, 4] = o13
        out[t, 5] = o23


@jit()
def remove_fixed_columns(points, cells, kappa, ks, tensor, ts, near, is_fixed, x, y):
    """``y -= K[:, fixed] x[fixed]``, over the cells ``near`` the fixed points only
    (serial, in a fixed order)."""
    for k in range(near.size):
        o01, o02, o03, o12, o13, o23, i0, i1, i2, i3 = _offdiagonals(
            points, cells, near[k], kappa, ks, tensor, ts
        )
        a0 = x[i0] if is_fixed[i0] else 0.0
        a1 = x[i1] if is_fixed[i1] else 0.0
        a2 = x[i2] if is_fixed[i2] else 0.0
        a3 = x[i3] if is_fixed[i3] else 0.0
        _add_tetrahedron(y, i0, i1, i2, i3, -o01, -o02, -o03, -o12, -o13, -o23, a0, a1, a2, a3)


@jit(parallel=True)
def apply_factors(cells, ovals, block_size, colour_ptr, blocks, x, y):
    """``y = K x`` from the stored six off-diagonal entries ``ovals`` (M, 6) of each cell."""
    m = cells.shape[0]
    _zero(y)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            for tt in range(b * block_size, min(m, (b + 1) * block_size)):
                t = uint64(tt)
                i0 = uint64(cells[t, uint64(0)])
                i1 = uint64(cells[t, uint64(1)])
                i2 = uint64(cells[t, uint64(2)])
                i3 = uint64(cells[t, uint64(3)])
                _add_tetrahedron(
                    y, i0, i1, i2, i3,
                    ovals[t, uint64(0)], ovals[t, uint64(1)], ovals[t, uint64(2)],
                    ovals[t, uint64(3)], ovals[t, uint64(4)], ovals[t, uint64(5)],
                    x[i0], x[i1], x[i2], x[i3],
                )


@jit(inline="always")
def _pair(cells, t, p):
    """Points ``(low, high)`` of pair ``p`` (01, 02, 03, 12, 13, 23) of cell ``t``."""
    a = 0 if p < 3 else (1 if p < 5 else 2)
    b = p + 1 if p < 3 else (p - 1 if p < 5 else 3)
    i, j = cells[t, a], cells[t, b]
    return (i, j) if i < j else (j, i)


@jit()
def edge_rows(cells, n_points, starts):
    """The unique edges of the cells by first point: ``ends`` returned, ``starts`` filled.

    Row ``i`` (edges ``(i, j)`` with ``i < j``) is ``ends[starts[i]:starts[i+1]]``,
    sorted: the edge list of :func:`hatkernels.mesh.refine3d.unique_edges` in
    its order.  Every pair of every cell is put in its low point's row, then each
    row is sorted and its repeats dropped (rows are short: a few tens of entries).
    """
    m = cells.shape[0]
    ptr = np.zeros(n_points + 1, dtype=np.int64)
    for t in range(m):
        for p in range(6):
            i, _ = _pair(cells, t, p)
            ptr[i + 1] += 1
    for i in range(n_points):
        ptr[i + 1] += ptr[i]
    buf = np.empty(ptr[n_points], dtype=cells.dtype)
    fill = ptr[:-1].copy()
    for t in range(m):
        for p in range(6):
            i, j = _pair(cells, t, p)
            buf[fill[i]] = j
            fill[i] += 1
    starts[0] = 0
    for i in range(n_points):
        row = buf[ptr[i]:ptr[i + 1]]
        for r in range(1, row.size):  # insertion sort: rows are short
            v = row[r]
            q = r
            while q > 0 and row[q - 1] > v:
                row[q] = row[q - 1]
                q -= 1
            row[q] = v
        k = 0
        for r in range(row.size):
            if r == 0 or row[r] != row[r - 1]:
                row[k] = row[r]
                k += 1
        fill[i] = k
        starts[i + 1] = starts[i] + k
    ends = np.empty(starts[n_points], dtype=cells.dtype)
    for i in range(n_points):
        ends[starts[i]:starts[i + 1]] = buf[ptr[i]:ptr[i] + fill[i]]
    return ends


@jit(parallel=True)
def edge_weights(points, cells, kappa, ks, tensor, ts, block_size, colour_ptr, blocks,
                 starts, ends, w):
    """``w[e]``: the sum over edge ``e``'s cells of their entry for its two points.

    Edge ``(i, j)``, ``i < j``, is found in row ``i`` of the edge list
    (:func:`edge_rows`); two blocks of one colour share no point, hence no edge.
    """
    m = cells.shape[0]
    _zero(w)
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            b = blocks[k]
            for t in range(b * block_size, min(m, (b + 1) * block_size)):
                o01, o02, o03, o12, o13, o23, _, _, _, _ = _offdiagonals(
                    points, cells, t, kappa, ks, tensor, ts
                )
                for p in range(6):
                    i, j = _pair(cells, t, p)
                    e = starts[i]
                    while ends[e] != j:
                        e += 1
                    w[e] += (o01, o02, o03, o12, o13, o23)[p]
