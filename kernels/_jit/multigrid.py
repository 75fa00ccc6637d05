"""Transfers between nested P1 meshes: linear interpolation and its transpose.

A fine mesh from uniform refinement has coarse point ``i`` as fine point
``coarse_points[i]`` and the midpoint of coarse edge ``e`` (between
``edge_points[e]``) as fine point ``midpoints[e]``.  Interpolation copies
coarse values and averages the two ends of each edge; restriction is its
transpose, gathered per coarse point in a fixed order.
"""

from numba import prange, uint64

from hatkernels._jit import jit


@jit(parallel=True)
def prolong_add(coarse_points, edge_points, midpoints, xc, xf):
    """``xf += P xc``: coarse points copied, each midpoint the mean of its edge's ends."""
    for i in prange(xc.size):
        xf[uint64(coarse_points[i])] += xc[i]
    for e in prange(edge_points.shape[0]):
        u = uint64(e)
        xf[uint64(midpoints[u])] += 0.5 * (
            xc[uint64(edge_points[u, uint64(0)])] + xc[uint64(edge_points[u, uint64(1)])]
        )


@jit(parallel=True)
def restrict(coarse_points, midpoints, first_low, by_high_ptr, by_high, rf, rc):
    """``rc = P^T rf``.

    The edges of coarse point ``i`` are those where it is the lower end
    (``first_low[i]:first_low[i+1]``, edges being sorted) and those listed in
    ``by_high[by_high_ptr[i]:by_high_ptr[i+1]]``.
    """
    for i in prange(rc.size):
        s = rf[uint64(coarse_points[i])]
        for e in range(first_low[i], first_low[i + 1]):
            s += 0.5 * rf[uint64(midpoints[e])]
        for k in range(by_high_ptr[i], by_high_ptr[i + 1]):
            s += 0.5 * rf[uint64(midpoints[by_high[k]])]
        rc[i] = s


@jit(parallel=True)
def zero_at(fixed, x):
    """``x[fixed] = 0``."""
    for k in prange(fixed.size):
        x[fixed[k]] = 0.0


@jit(parallel=True)
def add_diagonal(m, x, out, sign):
    """``out += sign * m * x`` entry by entry (a lumped mass term of a level's operator)."""
    for i in prange(x.shape[0]):
        out[i] += sign * (m[i] * x[i])
