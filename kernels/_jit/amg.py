"""Raw-array kernels of the classical AMG setup: strength, C/F splitting, interpolation, Galerkin product.

The algorithm is Ruge and Stueben's (J. W. Ruge, K. Stueben, "Algebraic
multigrid", in Multigrid Methods, SIAM Frontiers in Applied Mathematics 3,
1987; K. Stueben, "A review of algebraic multigrid", J. Comput. Appl. Math.
128, 2001):

* ``strength``: entry ``a_ij`` (``j != i``) is a strong coupling when
  ``-a_ij >= theta * max_{k != i} (-a_ik) > 0``; stored as one byte per
  matrix entry, no second matrix;
* the C/F splitting: :mod:`hatkernels._jit.amg_split`;
* ``interpolation``: the classical (standard) interpolation: an F point
  interpolates from its strongly coupled C points; a strong F neighbour's
  coupling is distributed over those C points in proportion to its own
  negative couplings to them (lumped onto the diagonal when it has none);
  weak couplings are lumped onto the diagonal;
* ``galerkin``: the coarse matrix ``R A P`` (``R = P^T``) row by row, without
  forming ``A P``.

Every parallel kernel owns its output rows and sums each row in a fixed
order, so the hierarchy has the same bits on any number of threads.  As in
``hatkernels._jit.sparse``, the hot loops index with unsigned integers
(``U(k)``), which spares numba's test for negative indices (half the time of
the Galerkin product); every index they use is non-negative by construction.  Index
arrays of one matrix share a dtype (int32 or int64).  Nothing here validates
its arguments; ``hatkernels.precond.amg`` does.
"""

import numpy as np
from numba import prange
from numba import uint64 as U

from hatkernels._jit import jit
from hatkernels._jit.amg_split import C_POINT

__all__ = [
    "strength",
    "interpolation_counts",
    "interpolation",
    "transpose",
    "galerkin_counts",
    "galerkin",
    "drop_zeros",
    "diagonal_and_bound",
    "dense_cholesky",
    "cholesky_solve",
]


@jit()
def _bounds(n, nchunks, c):
    return (n * c) // nchunks, (n * (c + 1)) // nchunks


@jit(parallel=True)
def strength(indptr, indices, data, theta, strong):
    """``strong[k] = 1`` when entry ``k`` is a strong negative off-diagonal coupling, else 0."""
    n = indptr.shape[0] - 1
    for i in prange(n):
        top = 0.0
        for k in range(indptr[i], indptr[i + 1]):
            if indices[k] != i and -data[k] > top:
                top = -data[k]
        cut = theta * top
        for k in range(indptr[i], indptr[i + 1]):
            v = -data[k]
            strong[k] = 1 if (indices[k] != i and v > 0.0 and v >= cut) else 0


@jit(parallel=True)
def interpolation_counts(indptr, indices, strong, state, counts):
    """``counts[i + 1]``: the entries of row ``i`` of P (1 for a C point, its strong C couplings for an F point)."""
    n = indptr.shape[0] - 1
    for i in prange(n):
        if state[i] == C_POINT:
            counts[i + 1] = 1
        else:
            c = 0
            for k in range(indptr[i], indptr[i + 1]):
                if strong[k] and state[indices[k]] == C_POINT:
                    c += 1
            counts[i + 1] = c


@jit(parallel=True)
def interpolation(indptr, indices, data, strong, state, cidx, pptr, pind, pdata, nchunks):
    """Fill P (``pptr`` given): the classical interpolation weights of every F point."""
    n = indptr.shape[0] - 1
    for c in prange(nchunks):
        lo, hi = _bounds(n, nchunks, c)
        pos = np.full(n, -1, dtype=pind.dtype)
        for i in range(lo, hi):
            ui = U(i)
            start = pptr[ui]
            if state[ui] == C_POINT:
                pind[U(start)] = cidx[ui]
                pdata[U(start)] = 1.0
                continue
            first, last = indptr[ui], indptr[ui + U(1)]
            p = start
            for k in range(first, last):
                j = U(indices[U(k)])
                if strong[U(k)] and state[j] == C_POINT:
                    pos[j] = p
                    pind[U(p)] = cidx[j]
                    pdata[U(p)] = 0.0
                    p += 1
            if p == start:
                continue
            aii = 0.0
            diag = 0.0
            for k in range(first, last):
                j = U(indices[U(k)])
                a = data[U(k)]
                if j == ui:
                    aii += a
                    diag += a
                elif strong[U(k)] and state[j] == C_POINT:
                    pdata[U(pos[j])] += a
                elif strong[U(k)]:
                    # a strong F neighbour: spread a_ij over i's strong C points
                    # in proportion to j's negative couplings to them
                    denom = 0.0
                    for e in range(indptr[j], indptr[j + U(1)]):
                        if pos[U(indices[U(e)])] >= 0 and data[U(e)] < 0.0:
                            denom += data[U(e)]
                    if denom < 0.0:
                        for e in range(indptr[j], indptr[j + U(1)]):
                            q = pos[U(indices[U(e)])]
                            if q >= 0 and data[U(e)] < 0.0:
                                pdata[U(q)] += a * (data[U(e)] / denom)
                    else:
                        diag += a
                else:
                    diag += a
            if not diag > 0.0:  # lumping made the diagonal non-positive: use a_ii alone
                diag = aii
            for q in range(start, p):
                pdata[U(q)] = -pdata[U(q)] / diag
            for k in range(first, last):
                j = U(indices[U(k)])
                if strong[U(k)] and state[j] == C_POINT:
                    pos[j] = -1


@jit()
def transpose(indptr, indices, data, n_cols):
    """CSR transpose (serial counting sort); rows of the result list columns in increasing order."""
    n = indptr.shape[0] - 1
    tptr = np.zeros(n_cols + 1, dtype=indptr.dtype)
    for k in range(indptr[n]):
        tptr[indices[k] + 1] += 1
    for j in range(n_cols):
        tptr[j + 1] += tptr[j]
    tind = np.empty(tptr[n_cols], dtype=indices.dtype)
    tdata = np.empty(tptr[n_cols], dtype=data.dtype)
    fill = tptr[:n_cols].copy()
    for i in range(n):
        for k in range(indptr[i], indptr[i + 1]):
            j = indices[k]
            tind[fill[j]] = i
            tdata[fill[j]] = data[k]
            fill[j] += 1
    return tptr, tind, tdata


@jit(parallel=True)
def galerkin_counts(rptr, rind, aptr, aind, adata, pptr, pind, n_coarse, counts, nchunks):
    """``counts[I + 1]``: the entries of row ``I`` of ``R A P``."""
    for c in prange(nchunks):
        lo, hi = _bounds(n_coarse, nchunks, c)
        mark = np.full(n_coarse, -1, dtype=pind.dtype)
        for row in range(lo, hi):
            m = 0
            for t in range(rptr[U(row)], rptr[U(row) + U(1)]):
                i = U(rind[U(t)])
                for k in range(aptr[i], aptr[i + U(1)]):
                    if adata[U(k)] == 0.0:  # stored zeros of A add no entries
                        continue
                    j = U(aind[U(k)])
                    for s in range(pptr[j], pptr[j + U(1)]):
                        col = U(pind[U(s)])
                        if mark[col] != row:
                            mark[col] = row
                            m += 1
            counts[U(row) + U(1)] = m


@jit(parallel=True)
def galerkin(rptr, rind, rdata, aptr, aind, adata, pptr, pind, pdata, n_coarse,
             cptr, cind, cdata, nchunks):
    """Fill ``C = R A P`` (``cptr`` given); each row's sums in a fixed order."""
    for c in prange(nchunks):
        lo, hi = _bounds(n_coarse, nchunks, c)
        pos = np.full(n_coarse, -1, dtype=cind.dtype)
        for row in range(lo, hi):
            start = cptr[U(row)]
            q = start
            for t in range(rptr[U(row)], rptr[U(row) + U(1)]):
                i = U(rind[U(t)])
                r = rdata[U(t)]
                for k in range(aptr[i], aptr[i + U(1)]):
                    a = adata[U(k)]
                    if a == 0.0:
                        continue
                    j = U(aind[U(k)])
                    ra = r * a
                    for s in range(pptr[j], pptr[j + U(1)]):
                        col = U(pind[U(s)])
                        v = ra * pdata[U(s)]
                        p = pos[col]
                        if p < start:
                            pos[col] = q
                            cind[U(q)] = col
                            cdata[U(q)] = v
                            q += 1
                        else:
                            cdata[U(p)] += v


@jit()
def drop_zeros(indptr, indices, data):
    """Remove the off-diagonal entries that summed to exactly zero, in place; returns the new nnz.

    ``indptr`` is rewritten; the first ``nnz`` entries of ``indices`` and
    ``data`` hold the kept ones, each row's in its former order.
    """
    n = indptr.shape[0] - 1
    q = 0
    start = indptr[0]
    for i in range(n):
        end = indptr[i + 1]
        for k in range(start, end):
            if data[k] != 0.0 or indices[k] == i:
                indices[q] = indices[k]
                data[q] = data[k]
                q += 1
        start = end
        indptr[i + 1] = q
    return q


@jit(parallel=True)
def diagonal_and_bound(indptr, indices, data, dinv):
    """``dinv = 1 / diag(A)`` and the Gershgorin bound ``max_i sum_j |a_ij| / a_ii``.

    Returns ``(bound, row)`` where ``row`` is -1, or a row whose diagonal is
    not positive (then ``dinv`` is incomplete and the bound meaningless).
    """
    n = indptr.shape[0] - 1
    ratio = np.empty(n)
    for i in prange(n):
        d = 0.0
        s = 0.0
        for k in range(indptr[i], indptr[i + 1]):
            s += abs(data[k])
            if indices[k] == i:
                d += data[k]
        if d > 0.0:
            dinv[i] = 1.0 / d
            ratio[i] = s / d
        else:
            ratio[i] = -1.0
    bound = 0.0
    for i in range(n):
        if ratio[i] < 0.0:
            return 0.0, i
        if ratio[i] > bound:
            bound = ratio[i]
    return bound, -1


@jit()
def dense_cholesky(a):
    """Lower Cholesky factor of the symmetric matrix ``a`` (its lower triangle is read).

    Returns ``(L, row)``: ``row`` is -1, or the first row whose pivot is not
    above ``1e-10`` times its diagonal entry (the matrix is not positive
    definite, or singular up to rounding; ``L`` is then incomplete).
    Plain loops on purpose: BLAS would start its own threads, which then
    compete with the parallel kernels for the cores.
    """
    n = a.shape[0]
    L = np.zeros((n, n))
    for j in range(n):
        s = a[j, j]
        for k in range(j):
            s -= L[j, k] * L[j, k]
        if not s > 1e-10 * abs(a[j, j]):
            return L, j
        d = np.sqrt(s)
        L[j, j] = d
        for i in range(j + 1, n):
            t = a[i, j]
            for k in range(j):
                t -= L[i, k] * L[j, k]
            L[i, j] = t / d
    return L, -1


@jit()
def cholesky_solve(L, b, out):
    """``out = (L L^T)^-1 b`` by forward and back substitution."""
    n = L.shape[0]
    for i in range(n):
        t = b[i]
        for k in range(i):
            t -= L[i, k] * out[k]
        out[i] = t / L[i, i]
    for i in range(n - 1, -1, -1):
        t = out[i]
        for k in range(i + 1, n):
            t -= L[k, i] * out[k]
        out[i] = t / L[i, i]
