"""Stiffness assembly on tetrahedra without the (M, 4, 4) element matrices.

A tetrahedron's stiffness matrix is symmetric with rows summing to zero
(the gradients of the barycentric coordinates sum to zero): its six
off-diagonal entries, one per edge (``EDGE``), determine it, the diagonal
being minus the sum of its row's.  They are computed straight from the
coordinates (48 bytes per cell instead of 128 for the full matrices, and no
gradient array of 96), then gathered into the CSR data by the generic dof
plan of :mod:`hatkernels._jit.dofs` with ``k = 4``: row ``i`` walks its
incidences in cell order, so the bits do not depend on the thread count,
and ``(i, j)`` and ``(j, i)`` get the same edge value from each cell, so the
matrix is symmetric to the last bit.
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit
from hatkernels._jit.geometry import tetrahedron_normals

#: The edge of local vertices (a, b), a != b, in the order 01, 02, 03, 12, 13, 23 (-1 on the diagonal).
EDGE = np.array([[-1, 0, 1, 2], [0, -1, 3, 4], [1, 3, -1, 5], [2, 4, 5, -1]], dtype=np.int64)


@jit(inline="always")
def _normals(points, cells, t):
    """``det`` and the four face normals ``n_0 .. n_3`` of cell ``t`` (13 scalars), from
    :func:`hatkernels._jit.geometry.tetrahedron_normals`."""
    n1x, n1y, n1z, n2x, n2y, n2z, n3x, n3y, n3z, det, _, _, _, _ = tetrahedron_normals(
        points, cells, t)
    return (det, -(n1x + n2x + n3x), -(n1y + n2y + n3y), -(n1z + n2z + n3z),
            n1x, n1y, n1z, n2x, n2y, n2z, n3x, n3y, n3z)


@jit(inline="always")
def _dot(x0, y0, z0, x1, y1, z1):
    return x0 * x1 + y0 * y1 + z0 * z1


@jit(parallel=True)
def stiffness_edges(points, cells, kappa, ks, out):
    """``out[t]`` = the six off-diagonal stiffness entries of tetrahedron ``t`` (order of ``EDGE``).

    For a scalar coefficient:

    ``|T| kappa grad(phi_a) . grad(phi_b) = kappa (n_a . n_b) / (6 |det|)``;
    ``kappa[t * ks]`` is the cell's mean coefficient (``ks`` 0: one value).
    """
    m = cells.shape[0]
    for t in prange(m):
        det, ax, ay, az, bx, by, bz, cx, cy, cz, dx, dy, dz = _normals(points, cells, t)
        w = kappa[t * ks] / (6.0 * abs(det))
        out[t, 0] = w * _dot(ax, ay, az, bx, by, bz)
        out[t, 1] = w * _dot(ax, ay, az, cx, cy, cz)
        out[t, 2] = w * _dot(ax, ay, az, dx, dy, dz)
        out[t, 3] = w * _dot(bx, by, bz, cx, cy, cz)
        out[t, 4] = w * _dot(bx, by, bz, dx, dy, dz)
        out[t, 5] = w * _dot(cx, cy, cz, dx, dy, dz)


@jit(inline="always")
def _sym(K, x0, y0, z0, x1, y1, z1):
    """``(n0 . K n1 + n1 . K n0) / 2``: exactly symmetric in its two vectors."""
    s = (x0 * (K[0, 0] * x1 + K[0, 1] * y1 + K[0, 2] * z1)
         + y0 * (K[1, 0] * x1 + K[1, 1] * y1 + K[1, 2] * z1)
         + z0 * (K[2, 0] * x1 + K[2, 1] * y1 + K[2, 2] * z1))
    r = (x1 * (K[0, 0] * x0 + K[0, 1] * y0 + K[0, 2] * z0)
         + y1 * (K[1, 0] * x0 + K[1, 1] * y0 + K[1, 2] * z0)
         + z1 * (K[2, 0] * x0 + K[2, 1] * y0 + K[2, 2] * z0))
    return 0.5 * (s + r)


@jit(parallel=True)
def stiffness_edges_tensor(points, cells, tensor, ts, out):
    """The same for a 3x3 tensor per cell (``ts`` 1) or one for all cells (``ts`` 0).

    The rows of ``K_T`` still sum to zero.  Entry ``(a, b)`` is ``(n_a . K n_b + n_b . K n_a) / 2 / (6 |det|)``:
    exactly symmetric for any ``K``, equal to ``n_a . K n_b`` for a symmetric one.
    """
    m = cells.shape[0]
    for t in prange(m):
        det, ax, ay, az, bx, by, bz, cx, cy, cz, dx, dy, dz = _normals(points, cells, t)
        w = 1.0 / (6.0 * abs(det))
        K = tensor[t * ts]
        out[t, 0] = w * _sym(K, ax, ay, az, bx, by, bz)
        out[t, 1] = w * _sym(K, ax, ay, az, cx, cy, cz)
        out[t, 2] = w * _sym(K, ax, ay, az, dx, dy, dz)
        out[t, 3] = w * _sym(K, bx, by, bz, cx, cy, cz)
        out[t, 4] = w * _sym(K, bx, by, bz, dx, dy, dz)
        out[t, 5] = w * _sym(K, cx, cy, cz, dx, dy, dz)


@jit(parallel=True)
def gather_edges(indptr, ptr, codes, slots, values, data):
    """CSR ``data`` from the six edge values per tetrahedron (M, 6), one row per iteration.

    The plan is that of :func:`hatkernels._jit.dofs.gather_matrix` with ``k = 4``;
    the diagonal entry of each cell is minus the sum of its row's three.
    """
    n = indptr.size - 1
    for i in prange(n):
        for s in range(indptr[i], indptr[i + 1]):
            data[uint64(s)] = 0.0
        for e in range(ptr[i], ptr[i + 1]):
            u = uint64(e)
            q = uint64(codes[u])
            t = q // uint64(4)
            a = q - uint64(4) * t
            diag = 0.0
            for b in range(4):
                if b != a:
                    v = values[t, EDGE[a, b]]
                    data[uint64(slots[q, b])] += v
                    diag -= v
            data[uint64(slots[q, a])] += diag


@jit()
def load_per_tetrahedron(points, cells, value, vs, out):
    """``out_i = sum over tetrahedra T of i of |T| value_T / 4`` (serial, in cell order).

    ``value[t * vs]`` is cell ``t``'s value (``vs = 0``: one value for all).
    The plain version is ``np.bincount`` of the element values
    (:func:`hatkernels.assembly.elements.tetrahedron_load_values`); this one
    needs no (M,) or (M, 4) temporaries.
    """
    out[:] = 0.0
    for t in range(cells.shape[0]):
        det, _, _, _, _, _, _, _, _, _, _, _, _ = _normals(points, cells, t)
        v = (abs(det) / 6.0) * (value[t * vs] / 4.0)
        for a in range(4):
            out[cells[t, a]] += v


@jit(parallel=True)
def quadrature_coordinates(points, cells, lam, start, xq):
    """``xq[i, t, q]``: coordinate ``i`` of quadrature point ``q`` (barycentric ``lam[q]``)
    of tetrahedron ``start + t``, summed over the four vertices in order.

    The plain version is ``np.einsum("qa,mai->imq", lam, points[cells])``; it builds
    the (m, 4, 3) corners and measured 15 to 20 times this (bench/test_bench_3d.py,
    ``test_quadrature_points_3d``).  Written out for four vertices, as the 2-D kernel
    in :mod:`hatkernels._jit.assembly` is for three: one loop over the vertices made
    the 2-D points four times slower.
    """
    nq = lam.shape[0]
    for t in prange(xq.shape[1]):
        k = uint64(start + t)
        i0 = uint64(cells[k, 0])
        i1 = uint64(cells[k, 1])
        i2 = uint64(cells[k, 2])
        i3 = uint64(cells[k, 3])
        for q in range(nq):
            for i in range(3):
                xq[i, t, q] = (lam[q, 0] * points[i0, i] + lam[q, 1] * points[i1, i]
                               + lam[q, 2] * points[i2, i] + lam[q, 3] * points[i3, i])
