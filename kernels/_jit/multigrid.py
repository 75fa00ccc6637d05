"""Transfers between nested P1 meshes: linear interpolation and its transpose.

A fine mesh from uniform refinement keeps the coarse points (same numbers)
and adds the midpoint of coarse edge ``e`` as point ``n_coarse + e``.
Interpolation copies coarse values and averages the two ends of each edge;
restriction is its transpose, gathered per coarse point in a fixed order.
"""

from numba import prange, uint64

from kernels._jit import jit


@jit(parallel=True)
def prolong_add(edge_points, xc, xf):
    """``xf += P xc``: coarse points copied, each midpoint the mean of its edge's ends."""
    nc = xc.size
    for i in prange(nc):
        xf[i] += xc[i]
    for e in prange(edge_points.shape[0]):
        u = uint64(e)
        xf[uint64(nc) + u] += 0.5 * (
            xc[uint64(edge_points[u, uint64(0)])] + xc[uint64(edge_points[u, uint64(1)])]
        )


@jit(parallel=True)
def restrict(first_low, by_high_ptr, by_high, rf, rc):
    """``rc = P^T rf``.

    The edges of coarse point ``i`` are those where it is the lower end
    (``first_low[i]:first_low[i+1]``, edges being sorted) and those listed in
    ``by_high[by_high_ptr[i]:by_high_ptr[i+1]]``.
    """
    nc = rc.size
    for i in prange(nc):
        s = rf[i]
        for e in range(first_low[i], first_low[i + 1]):
            s += 0.5 * rf[uint64(nc + e)]
        for k in range(by_high_ptr[i], by_high_ptr[i + 1]):
            s += 0.5 * rf[uint64(nc + by_high[k])]
        rc[i] = s


@jit(parallel=True)
def zero_at(fixed, x):
    """``x[fixed] = 0``."""
    for k in prange(fixed.size):
        x[fixed[k]] = 0.0
