"""Per-triangle geometry: areas and gradients of the barycentric coordinates."""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit


@jit(parallel=True)
def element_gradients(points, triangles):
    """Areas (M,) and barycentric gradients (M, 3, 2) of counterclockwise triangles.

    The gradient of the coordinate of vertex ``a`` is the edge opposite ``a``
    (from vertex ``a+1`` to ``a+2``) turned a quarter counterclockwise, over twice
    the area.
    """
    m = triangles.shape[0]
    areas = np.empty(m)
    grads = np.empty((m, 3, 2))
    for t in prange(m):
        x0 = points[triangles[t, 0], 0]
        y0 = points[triangles[t, 0], 1]
        x1 = points[triangles[t, 1], 0]
        y1 = points[triangles[t, 1], 1]
        x2 = points[triangles[t, 2], 0]
        y2 = points[triangles[t, 2], 1]
        d = (x1 - x0) * (y2 - y0) - (x2 - x0) * (y1 - y0)
        areas[t] = 0.5 * d
        grads[t, 0, 0] = (y1 - y2) / d
        grads[t, 0, 1] = (x2 - x1) / d
        grads[t, 1, 0] = (y2 - y0) / d
        grads[t, 1, 1] = (x0 - x2) / d
        grads[t, 2, 0] = (y0 - y1) / d
        grads[t, 2, 1] = (x1 - x0) / d
    return areas, grads


@jit(parallel=True)
def double_areas(points, triangles, out):
    """Twice the signed area of each triangle into ``out``."""
    for t in prange(triangles.shape[0]):
        i0 = triangles[t, 0]
        i1 = triangles[t, 1]
        i2 = triangles[t, 2]
        out[t] = (points[i1, 0] - points[i0, 0]) * (points[i2, 1] - points[i0, 1]) - (
            points[i2, 0] - points[i0, 0]
        ) * (points[i1, 1] - points[i0, 1])


@jit(parallel=True)
def tetrahedron_gradients(points, cells):
    """Volumes (M,), barycentric gradients (M, 4, 3) and longest squared edges (M,).

    With ``e_k = x_k - x_0`` and ``det = e_1 . (e_2 x e_3)`` (six times the signed
    volume), the gradient of the coordinate of vertex ``k`` (k = 1, 2, 3) is the
    cross product of the other two edges in cyclic order over ``det``, and that
    of vertex 0 minus their sum.  Dividing by the signed ``det`` gives the right
    gradients for either orientation; the volume is ``|det| / 6``.  The longest
    edge lets the caller judge near-zero volumes without a second pass.
    """
    m = cells.shape[0]
    volumes = np.empty(m)
    grads = np.empty((m, 4, 3))
    longest = np.empty(m)
    for t in prange(m):
        g1x, g1y, g1z, g2x, g2y, g2z, g3x, g3y, g3z, det, i0, i1, i2, i3 = (
            tetrahedron_normals(points, cells, t))
        ax = points[i1, 0] - points[i0, 0]
        ay = points[i1, 1] - points[i0, 1]
        az = points[i1, 2] - points[i0, 2]
        bx = points[i2, 0] - points[i0, 0]
        by = points[i2, 1] - points[i0, 1]
        bz = points[i2, 2] - points[i0, 2]
        cx = points[i3, 0] - points[i0, 0]
        cy = points[i3, 1] - points[i0, 1]
        cz = points[i3, 2] - points[i0, 2]
        volumes[t] = abs(det) / 6.0
        grads[t, 1, 0] = g1x / det
        grads[t, 1, 1] = g1y / det
        grads[t, 1, 2] = g1z / det
        grads[t, 2, 0] = g2x / det
        grads[t, 2, 1] = g2y / det
        grads[t, 2, 2] = g2z / det
        grads[t, 3, 0] = g3x / det
        grads[t, 3, 1] = g3y / det
        grads[t, 3, 2] = g3z / det
        for k in range(3):
            grads[t, 0, k] = -((grads[t, 1, k] + grads[t, 2, k]) + grads[t, 3, k])
        # the six edges: three from vertex 0, then b - a, c - a, c - b
        e = ax * ax + ay * ay + az * az
        e = max(e, bx * bx + by * by + bz * bz)
        e = max(e, cx * cx + cy * cy + cz * cz)
        e = max(e, (bx - ax) * (bx - ax) + (by - ay) * (by - ay) + (bz - az) * (bz - az))
        e = max(e, (cx - ax) * (cx - ax) + (cy - ay) * (cy - ay) + (cz - az) * (cz - az))
        e = max(e, (cx - bx) * (cx - bx) + (cy - by) * (cy - by) + (cz - bz) * (cz - bz))
        longest[t] = e
    return volumes, grads, longest


@jit(parallel=True)
def six_signed_volumes(points, cells, out):
    """Six times the signed volume of each tetrahedron into ``out``: positive when
    ``x1 - x0, x2 - x0, x3 - x0`` are right-handed.  The determinant is formed as in
    :func:`tetrahedron_gradients`, so ``abs(out) / 6`` are its volumes bit for bit."""
    for t in prange(cells.shape[0]):
        i0 = cells[t, 0]
        ax = points[cells[t, 1], 0] - points[i0, 0]
        ay = points[cells[t, 1], 1] - points[i0, 1]
        az = points[cells[t, 1], 2] - points[i0, 2]
        bx = points[cells[t, 2], 0] - points[i0, 0]
        by = points[cells[t, 2], 1] - points[i0, 1]
        bz = points[cells[t, 2], 2] - points[i0, 2]
        cx = points[cells[t, 3], 0] - points[i0, 0]
        cy = points[cells[t, 3], 1] - points[i0, 1]
        cz = points[cells[t, 3], 2] - points[i0, 2]
        out[t] = ax * (by * cz - bz * cy) + ay * (bz * cx - bx * cz) + az * (bx * cy - by * cx)


@jit(inline="always")
def tetrahedron_normals(points, cells, t):
    """``n1, n2, n3`` (9 values), ``det`` and the four points of cell ``t``.

    With ``e_k = x_k - x_0``: ``n_1 = e_2 x e_3``, ``n_2 = e_3 x e_1``, ``n_3 = e_1 x e_2``
    and ``det = e_1 . n_1`` (six times the signed volume); the gradient of barycentric
    coordinate ``k`` is ``n_k / det`` and ``n_0 = -(n_1 + n_2 + n_3)``.  Scalars, not
    an array: the matrix-free products and the csr stiffness inline it.
    """
    t = uint64(t)
    z, o, w = uint64(0), uint64(1), uint64(2)
    i0 = uint64(cells[t, z])
    i1 = uint64(cells[t, o])
    i2 = uint64(cells[t, w])
    i3 = uint64(cells[t, uint64(3)])
    px, py, pz = points[i0, z], points[i0, o], points[i0, w]
    ax, ay, az = points[i1, z] - px, points[i1, o] - py, points[i1, w] - pz
    bx, by, bz = points[i2, z] - px, points[i2, o] - py, points[i2, w] - pz
    cx, cy, cz = points[i3, z] - px, points[i3, o] - py, points[i3, w] - pz
    n1x, n1y, n1z = by * cz - bz * cy, bz * cx - bx * cz, bx * cy - by * cx
    n2x, n2y, n2z = cy * az - cz * ay, cz * ax - cx * az, cx * ay - cy * ax
    n3x, n3y, n3z = ay * bz - az * by, az * bx - ax * bz, ax * by - ay * bx
    det = ax * n1x + ay * n1y + az * n1z
    return n1x, n1y, n1z, n2x, n2y, n2z, n3x, n3y, n3z, det, i0, i1, i2, i3
