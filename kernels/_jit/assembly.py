"""Numeric assembly kernels: element values and the row-owned gather into CSR data.

The CSR pattern and the slot plan come from :mod:`hatkernels._jit.topology`.
Each row is filled by one loop iteration that walks the incidences of its
point in triangle order, so the result is race-free and has the same bits
for any thread count; and entry ``(i, j)`` receives the same terms in the
same order as ``(j, i)``, so the matrix is symmetric to the last bit.

Element stiffness, with ``e_a`` the edge opposite local vertex ``a`` (from
vertex ``a+1`` to ``a+2``) and ``d`` twice the area::

    K_ab = kappa (e_a . e_b) / (2 d)

For a tensor coefficient the dot product uses ``R^T K R`` with ``R`` the
quarter turn, that is ``[[k11, -k01], [-k01, k00]]``.  The geometry is
written out once per triangle: helper calls per entry were measured four
times slower (the compiler cannot reuse loads across the stores between them).
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit
from hatkernels._jit.topology import row_position


@jit(inline="always")
def _geometry(points, triangles, t):
    """Edges opposite vertices 0, 1, 2, twice the area, and the vertices of triangle ``t``.

    Indices are used as unsigned integers: with signed ones numba checks every
    access for Python's negative wraparound, measured at a quarter of a
    matrix-free product's time.  Callers guarantee valid indices.
    """
    t = uint64(t)
    z = uint64(0)
    o = uint64(1)
    i0 = uint64(triangles[t, z])
    i1 = uint64(triangles[t, o])
    i2 = uint64(triangles[t, uint64(2)])
    x0 = points[i0, z]
    y0 = points[i0, o]
    x1 = points[i1, z]
    y1 = points[i1, o]
    x2 = points[i2, z]
    y2 = points[i2, o]
    d = (x1 - x0) * (y2 - y0) - (x2 - x0) * (y1 - y0)
    return x2 - x1, y2 - y1, x0 - x2, y0 - y2, x1 - x0, y1 - y0, d, i0, i1, i2


@jit(inline="always")
def _ip(u0, u1, v0, v1, k00, k01, k11):
    """``u^T K v`` written so that swapping ``u`` and ``v`` gives the same bits."""
    return k00 * (u0 * v0) + k11 * (u1 * v1) + k01 * (u0 * v1 + u1 * v0)


@jit(inline="always")
def _rotated(tensor, k):
    """``R^T K R`` entries (k00, k01, k11) of tensor ``k``."""
    return tensor[k, 1, 1], -tensor[k, 0, 1], tensor[k, 0, 0]


@jit(parallel=True)
def stiffness_values(points, triangles, kappa, ks, tensor, ts, dvals, ovals):
    """Element stiffness values into ``dvals`` / ``ovals`` (M, 3).

    ``dvals[t, a]`` is ``K_aa``; ``ovals[t, c]`` the entry of the pair
    opposite vertex ``c``.  ``kappa[t * ks]`` is the triangle's mean scalar
    coefficient (``ks`` is 0 for a constant); when ``tensor`` is not empty
    it replaces ``kappa``, tensor ``t * ts`` for triangle ``t``.
    """
    scalar = tensor.shape[0] == 0
    for t in prange(triangles.shape[0]):
        e00, e01, e10, e11, e20, e21, d, _, _, _ = _geometry(points, triangles, t)
        if scalar:
            w = kappa[t * ks] / (2.0 * d)
            k00, k01, k11 = 1.0, 0.0, 1.0
        else:
            w = 1.0 / (2.0 * d)
            k00, k01, k11 = _rotated(tensor, t * ts)
        dvals[t, 0] = w * _ip(e00, e01, e00, e01, k00, k01, k11)
        dvals[t, 1] = w * _ip(e10, e11, e10, e11, k00, k01, k11)
        dvals[t, 2] = w * _ip(e20, e21, e20, e21, k00, k01, k11)
        ovals[t, 0] = w * _ip(e10, e11, e20, e21, k00, k01, k11)
        ovals[t, 1] = w * _ip(e20, e21, e00, e01, k00, k01, k11)
        ovals[t, 2] = w * _ip(e00, e01, e10, e11, k00, k01, k11)


@jit(parallel=True)
def gather_values(indptr, diag, ptr, codes, slot_next, slot_prev, dvals, ovals, data):
    """Fill CSR ``data`` from element values (M, 3), one row per iteration.

    Around point ``i`` at local vertex ``a``: the diagonal gets ``dvals[t, a]``,
    entry ``(i, next)`` the pair opposite ``a+2`` and ``(i, prev)`` the pair
    opposite ``a+1``.  The diagonal is summed in a register, in the same order.
    """
    n = indptr.size - 1
    three = uint64(3)
    for i in prange(n):
        for s in range(indptr[i], indptr[i + 1]):
            data[uint64(s)] = 0.0
        dsum = 0.0
        for e in range(ptr[i], ptr[i + 1]):
            u = uint64(e)
            q = uint64(codes[u])
            t = q // three
            a = q - three * t
            b = a + uint64(1) if a < uint64(2) else uint64(0)
            c = b + uint64(1) if b < uint64(2) else uint64(0)
            dsum += dvals[t, a]
            data[uint64(slot_next[u])] += ovals[t, c]
            data[uint64(slot_prev[u])] += ovals[t, b]
        if ptr[i + 1] > ptr[i]:
            data[uint64(diag[i])] = dsum


@jit(inline="always")
def _row_entries(points, triangles, t, a, kappa, ks, tensor, ts, scalar):
    """Entries (a, a), (a, a+1), (a, a+2) of triangle ``t``'s stiffness matrix."""
    e00, e01, e10, e11, e20, e21, d, _, _, _ = _geometry(points, triangles, t)
    if scalar:
        w = kappa[uint64(t * ks)] / (2.0 * d)
        k00, k01, k11 = 1.0, 0.0, 1.0
    else:
        w = 1.0 / (2.0 * d)
        k00, k01, k11 = _rotated(tensor, t * ts)
    # the edges opposite a, its successor b and its predecessor c
    if a == 0:
        ua0, ua1, ub0, ub1, uc0, uc1 = e00, e01, e10, e11, e20, e21
    elif a == 1:
        ua0, ua1, ub0, ub1, uc0, uc1 = e10, e11, e20, e21, e00, e01
    else:
        ua0, ua1, ub0, ub1, uc0, uc1 = e20, e21, e00, e01, e10, e11
    return (
        w * _ip(ua0, ua1, ua0, ua1, k00, k01, k11),
        w * _ip(ua0, ua1, ub0, ub1, k00, k01, k11),
        w * _ip(ua0, ua1, uc0, uc1, k00, k01, k11),
    )


@jit(inline="always")
def _stiffness_row(points, triangles, kappa, ks, tensor, ts, scalar, indptr, indices, diag, ptr,
                   codes, i, out, shift):
    """Row ``i`` of the stiffness matrix into ``out[s - shift]`` for each place ``s`` of the
    row in ``indices`` (zeroed first); returns the diagonal entry, which it does not
    write (the caller puts it at ``diag[i] - shift``; a row with no triangle has none)."""
    three = uint64(3)
    one = uint64(1)
    two = uint64(2)
    start, end = indptr[i], indptr[i + 1]
    for s in range(start, end):
        out[uint64(s - shift)] = 0.0
    dsum = 0.0
    for e in range(ptr[i], ptr[i + 1]):
        q = uint64(codes[uint64(e)])
        t = q // three
        a = q - three * t
        b = a + one if a < two else uint64(0)
        c = b + one if b < two else uint64(0)
        kaa, kab, kac = _row_entries(points, triangles, t, a, kappa, ks, tensor, ts, scalar)
        dsum += kaa
        out[uint64(row_position(indices, start, end, triangles[t, b]) - shift)] += kab
        out[uint64(row_position(indices, start, end, triangles[t, c]) - shift)] += kac
    return dsum


@jit(parallel=True)
def gather_stiffness(points, triangles, kappa, ks, tensor, ts, indptr, indices, diag, ptr, codes,
                     data):
    """Stiffness straight into CSR ``data``, element geometry recomputed per incidence.

    No (M, 3) temporaries and no slot plan: each triangle's geometry is
    recomputed at each of its three vertices, and each entry's place found
    in its (short, sorted) row, trading flops for 48 bytes per triangle of
    element values and 24 of slots.  Gives the same bits as
    :func:`stiffness_values` + :func:`gather_values`.
    """
    n = indptr.size - 1
    scalar = tensor.shape[0] == 0
    for i in prange(n):
        dsum = _stiffness_row(points, triangles, kappa, ks, tensor, ts, scalar, indptr, indices,
                              diag, ptr, codes, i, data, 0)
        if ptr[i + 1] > ptr[i]:
            data[uint64(diag[i])] = dsum


@jit(parallel=True)
def gather_stiffness_reduced(points, triangles, kappa, ks, tensor, ts, indptr, indices, diag, ptr,
                             codes, newindex, free, g, b, rindptr, rindices, rdata, rb, nchunks):
    """:func:`gather_stiffness` of the free rows only, straight into the reduced system
    ``A_ff`` (``rindptr`` given, from the free columns of each free row) and
    ``rb = b_f - A_fd g_d``: what :func:`hatkernels._jit.dirichlet.reduced_fill` makes
    from the whole matrix, with the same bits, without the whole matrix.

    A row with no fixed column is formed in place; any other in a scratch row of its
    chunk, then its free columns copied (renumbered by ``newindex``) and its fixed ones
    lifted.  Returns -1, or a free row
    whose diagonal is not positive (whose reduction would be refused: the caller
    then takes the path that reports it).
    """
    scalar = tensor.shape[0] == 0
    nf = free.shape[0]
    bad = np.full(nchunks, -1, dtype=np.int64)
    for c in prange(nchunks):
        lo = (nf * c) // nchunks
        hi = (nf * (c + 1)) // nchunks
        width = 0
        for r in range(lo, hi):
            width = max(width, indptr[free[r] + 1] - indptr[free[r]])
        row = np.empty(width)
        for r in range(lo, hi):
            i = free[r]
            start = indptr[i]
            rstart = rindptr[r]
            if rindptr[r + 1] - rstart == indptr[i + 1] - start:
                # no fixed column (most rows): straight into place, nothing to lift
                dsum = _stiffness_row(points, triangles, kappa, ks, tensor, ts, scalar, indptr,
                                      indices, diag, ptr, codes, i, rdata, start - rstart)
                if not dsum > 0.0:
                    if bad[c] < 0:
                        bad[c] = i
                    continue
                rdata[uint64(diag[i] - start + rstart)] = dsum
                for s in range(start, indptr[i + 1]):
                    rindices[uint64(s - start + rstart)] = newindex[indices[s]]
                rb[r] = b[i]
                continue
            dsum = _stiffness_row(points, triangles, kappa, ks, tensor, ts, scalar, indptr,
                                  indices, diag, ptr, codes, i, row, start)
            if not dsum > 0.0:
                if bad[c] < 0:
                    bad[c] = i
                continue
            row[uint64(diag[i] - start)] = dsum
            acc = b[i]
            pos = rindptr[r]
            for s in range(start, indptr[i + 1]):
                j = indices[s]
                k = newindex[j]
                if k >= 0:
                    rindices[pos] = k
                    rdata[pos] = row[uint64(s - start)]
                    pos += 1
                else:
                    acc -= row[uint64(s - start)] * g[j]
            rb[r] = acc
    return bad.max()


@jit()
def load_per_triangle(points, triangles, value, vs, out):
    """``out_i = sum over triangles T of i of area(T) value_T / 3`` (serial, in triangle order).

    ``value[t * vs]`` is triangle ``t``'s value (``vs = 0``: one value for
    all).  The plain version is ``np.bincount`` of the element values; this
    one needs no (M,) temporaries.
    """
    out[:] = 0.0
    z = uint64(0)
    o = uint64(1)
    w = uint64(2)
    for tt in range(triangles.shape[0]):
        t = uint64(tt)
        i0 = uint64(triangles[t, z])
        i1 = uint64(triangles[t, o])
        i2 = uint64(triangles[t, w])
        d = (points[i1, z] - points[i0, z]) * (points[i2, o] - points[i0, o]) - (
            points[i2, z] - points[i0, z]
        ) * (points[i1, o] - points[i0, o])
        v = (0.5 * d) * (value[t * uint64(vs)] / 3.0)
        out[i0] += v
        out[i1] += v
        out[i2] += v


@jit(parallel=True)
def quadrature_coordinates(points, triangles, lam, start, x, y):
    """``x[t, q]``, ``y[t, q]``: quadrature point ``q`` (barycentric ``lam[q]``) of triangle
    ``start + t``, each coordinate summed over the vertices in order.

    The plain version is ``points[triangles, 0] @ lam.T``; numpy's product for
    so small an inner size costs about three times this, with its temporaries.
    """
    nq = lam.shape[0]
    for t in prange(x.shape[0]):
        k = uint64(start + t)
        i0 = uint64(triangles[k, 0])
        i1 = uint64(triangles[k, 1])
        i2 = uint64(triangles[k, 2])
        for q in range(nq):
            x[t, q] = lam[q, 0] * points[i0, 0] + lam[q, 1] * points[i1, 0] + lam[q, 2] * points[i2, 0]
            y[t, q] = lam[q, 0] * points[i0, 1] + lam[q, 1] * points[i1, 1] + lam[q, 2] * points[i2, 1]


@jit(parallel=True)
def weighted_sums(areas, values, w, table, out):
    """``out[t, a] = areas[t] * sum_q (values[t, q] w[q]) table[q, a]``, the sum in ``q`` order:
    element loads (``table`` the barycentric coordinates of the points) and mass entries
    from values at quadrature points.

    The plain version is ``areas[:, None] * ((values * w) @ table)``; numpy's product
    with an inner size of 3 to 7 measured 2 to 20 times this (bench/test_bench_linear.py,
    ``test_callable_load_sums``).
    """
    nq = values.shape[1]
    na = table.shape[1]
    for t in prange(values.shape[0]):
        for a in range(na):
            s = 0.0
            for q in range(nq):
                s += (values[t, q] * w[q]) * table[q, a]
            out[t, a] = areas[t] * s
