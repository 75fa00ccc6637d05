"""Matrix-free products on uniformly refined triangle meshes from the coarsest mesh's
element matrices (the ``inherited`` variant, :mod:`hatkernels.operators.variants`).

Refinement by edge midpoints (:mod:`hatkernels.mesh.refine`) makes the four children of
cell ``p`` cells ``4p .. 4p+3``: ``(v0, m2, m1)``, ``(m2, v1, m0)``, ``(m1, m0, v2)`` and
``(m0, m1, m2)``, with ``mc`` the midpoint opposite ``vc``, each similar to the parent
with its vertices in the same order.  Fine triangle ``t`` therefore has the element
matrix of its coarsest ancestor ``t >> shift`` times its own coefficient.  The product
takes the four children of a parent together: six points read and written instead of
twelve, and their terms summed in registers.
"""

from numba import prange, uint64

from hatkernels._jit import jit
from hatkernels._jit.operators import _add_triangle, _zero


@jit(inline="always")
def _inherited(base, shift, kappa, ks, t):
    """Off-diagonals of fine triangle ``t``: its coarsest ancestor's, times its coefficient."""
    a = uint64(t) >> uint64(shift)
    w = kappa[uint64(t * ks)]
    return w * base[a, uint64(0)], w * base[a, uint64(1)], w * base[a, uint64(2)]


@jit(parallel=True)
def apply_inherited(triangles, base, shift, kappa, ks, block_size, colour_ptr, blocks, x, b, y):
    """``y = A x`` (``b`` empty), or ``y = b - A x``, on a uniformly refined mesh from its
    coarsest mesh's off-diagonals.

    Fine triangle ``t`` descends from coarsest triangle ``t >> shift`` and is
    similar to it with its vertices in the same order, so its element matrix
    is the ancestor's (with unit coefficient, ``base``) times its own
    coefficient ``kappa[t * ks]``: nothing is read per triangle but its points.
    The residual form starts from ``b`` and subtracts: one pass less than a
    product and a subtraction.
    """
    m = triangles.shape[0]
    sign = 1.0
    if b.size == 0:
        _zero(y)
    else:
        sign = -1.0
        for i in prange(y.size):
            y[i] = b[i]
    for c in range(colour_ptr.size - 1):
        for k in prange(colour_ptr[c], colour_ptr[c + 1]):
            blk = blocks[k]
            # blocks hold whole families (block_size a multiple of 4, checked by the caller)
            for p in range(blk * block_size // 4, min(m, (blk + 1) * block_size) // 4):
                _family(triangles, base, shift, kappa, ks, uint64(4 * p), sign, x, y)


@jit(inline="always")
def _terms(w, o0, o1, o2, x0, x1, x2):
    """``K_T x`` on one triangle: its three rows, for off-diagonals ``w o``."""
    o0, o1, o2 = w * o0, w * o1, w * o2
    return (o2 * (x1 - x0) + o1 * (x2 - x0),
            o2 * (x0 - x1) + o0 * (x2 - x1),
            o1 * (x0 - x2) + o0 * (x1 - x2))


@jit(inline="always")
def _family(triangles, base, shift, kappa, ks, t, sign, x, y):
    """``y += sign K x`` over the four children ``t .. t+3`` of one parent."""
    v0 = uint64(triangles[t, uint64(0)])
    m2 = uint64(triangles[t, uint64(1)])
    m1 = uint64(triangles[t, uint64(2)])
    v1 = uint64(triangles[t + uint64(1), uint64(1)])
    m0 = uint64(triangles[t + uint64(1), uint64(2)])
    v2 = uint64(triangles[t + uint64(2), uint64(2)])
    a = t >> uint64(shift)
    o0 = sign * base[a, uint64(0)]
    o1 = sign * base[a, uint64(1)]
    o2 = sign * base[a, uint64(2)]
    s = uint64(ks)
    xv0, xv1, xv2, xm0, xm1, xm2 = x[v0], x[v1], x[v2], x[m0], x[m1], x[m2]
    a0, a1, a2 = _terms(kappa[t * s], o0, o1, o2, xv0, xm2, xm1)
    b0, b1, b2 = _terms(kappa[(t + uint64(1)) * s], o0, o1, o2, xm2, xv1, xm0)
    c0, c1, c2 = _terms(kappa[(t + uint64(2)) * s], o0, o1, o2, xm1, xm0, xv2)
    d0, d1, d2 = _terms(kappa[(t + uint64(3)) * s], o0, o1, o2, xm0, xm1, xm2)
    y[v0] += a0
    y[v1] += b1
    y[v2] += c2
    y[m0] += b2 + c1 + d0
    y[m1] += a2 + c0 + d1
    y[m2] += a1 + b0 + d2


@jit()
def remove_fixed_columns_inherited(triangles, base, shift, kappa, ks, near, is_fixed, x, y,
                                   sign):
    """:func:`remove_fixed_columns` with the inherited element matrices: ``y -= sign
    A[:, fixed] x[fixed]`` (``sign`` -1 after the residual form of :func:`apply_inherited`)."""
    for k in range(near.size):
        t = near[k]
        i0, i1, i2 = triangles[t, 0], triangles[t, 1], triangles[t, 2]
        o0, o1, o2 = _inherited(base, shift, kappa, ks, t)
        a0 = x[i0] if is_fixed[i0] else 0.0
        a1 = x[i1] if is_fixed[i1] else 0.0
        a2 = x[i2] if is_fixed[i2] else 0.0
        _add_triangle(y, i0, i1, i2, -sign * o0, -sign * o1, -sign * o2, a0, a1, a2)
