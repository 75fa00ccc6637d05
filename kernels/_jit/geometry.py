"""Per-triangle geometry: areas and gradients of the barycentric coordinates."""

import numpy as np
from numba import prange

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
