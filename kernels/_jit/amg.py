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
  weak couplings are lumped onto the diagonal.  With ``extend``, a row with a
  strong F neighbour that has no strong coupling to the row's strong C points
  takes that neighbour's strong C points too, by the extended+i formula
  (De Sterck, Falgout, Nolting and Yang, Numer. Linear Algebra Appl. 15,
  2008), at most ``cap`` of them the largest;
* ``galerkin``: the coarse matrix ``R A P`` (``R = P^T``) row by row, without
  forming ``A P``, in one pass into per-chunk room (``gather_rows`` packs it).

Every parallel kernel owns its output rows and sums each row in a fixed
order, so the hierarchy has the same bits on any number of threads.  As in
``hatkernels._jit.sparse``, the hot loops index with unsigned integers
(``U(k)``), which spares numba's test for negative indices (half the time of
the Galerkin product); every index they use is non-negative by construction.  Index
arrays of one matrix share a dtype (int32 or int64).  Nothing here validates
its arguments; ``hatkernels.precond.amg`` does.
"""

import math

import numpy as np
from numba import prange
from numba import uint64 as U

from hatkernels._jit import jit
from hatkernels._jit.amg_split import C_POINT, transpose_kept

__all__ = [
    "strength",
    "interpolation",
    "transpose",
    "galerkin",
    "gather_rows",
    "drop_zeros",
    "diagonal_and_bound",
]


@jit()
def _bounds(n, nchunks, c):
    return (n * c) // nchunks, (n * (c + 1)) // nchunks


@jit(inline="always")
def _row_ratio(indptr, data, i, s, d):
    """``sum_j |a_ij| / a_ii`` given the sum ``s`` and ``d = a_ii > 0``; when the sum
    overflowed (entries near float64's largest number) it is summed again divided."""
    if not math.isinf(s):
        return s / d
    ratio = 0.0
    for k in range(indptr[i], indptr[i + 1]):
        ratio += abs(data[k]) / d
    return ratio


@jit(inline="always")
def _row_sums(indptr, indices, data, i):
    """Row ``i``'s diagonal, the sum of its entries' sizes and its largest negative
    off-diagonal coupling in size, in one walk in storage order."""
    top = 0.0
    d = 0.0
    s = 0.0
    for k in range(indptr[i], indptr[i + 1]):
        v = data[k]
        s += abs(v)
        if indices[k] == i:
            d += v
        elif -v > top:
            top = -v
    return d, s, top


@jit(inline="always")
def _diagonal_of_block(indptr, indices, data, dinv, lo, hi, theta, strong):
    """Rows ``lo:hi``: ``dinv`` and ``(largest sum_j |a_ij| / a_ii, first row whose
    diagonal is not positive, or the row count)``; with ``theta >= 0`` also their strong
    couplings into ``strong``."""
    n = indptr.shape[0] - 1
    most = 0.0
    first = n
    for i in range(lo, hi):
        d, s, top = _row_sums(indptr, indices, data, i)
        if theta >= 0.0:
            cut = theta * top
            for k in range(indptr[i], indptr[i + 1]):
                v = -data[k]
                strong[k] = 1 if (indices[k] != i and v > 0.0 and v >= cut) else 0
        if d > 0.0:
            dinv[i] = 1.0 / d
            ratio = _row_ratio(indptr, data, i, s, d)
            if ratio > most:
                most = ratio
        elif first == n:
            first = i
    return most, first


@jit(parallel=True)
def _diagonal_pass(indptr, indices, data, dinv, theta, strong):
    """:func:`_diagonal_of_block` over fixed blocks of rows (their maximum and first row
    do not depend on how the blocks are shared among threads): ``(bound, row)``."""
    n = indptr.shape[0] - 1
    nblocks = min(n, 256)
    tops = np.zeros(nblocks)
    firsts = np.full(nblocks, n, dtype=np.int64)
    for c in prange(nblocks):
        lo, hi = _bounds(n, nblocks, c)
        tops[c], firsts[c] = _diagonal_of_block(indptr, indices, data, dinv, lo, hi, theta,
                                                strong)
    row = firsts.min() if nblocks else n
    if row < n:
        return 0.0, row
    return (tops.max() if nblocks else 0.0), -1


def strength(indptr, indices, data, theta, strong, dinv):
    """``strong[k] = 1`` when entry ``k`` is a strong negative off-diagonal coupling, else 0;
    in the same pass what :func:`diagonal_and_bound` gives (``dinv = 1 / diag(A)``, and
    ``(bound, row)`` returned), with the same bits, so the smoother needs no pass of its own."""
    return _diagonal_pass(indptr, indices, data, dinv, float(theta), strong)


@jit(inline="always")
def _shares(indptr, indices, strong, pos, k, own):
    """Whether point ``k`` has a strong coupling to one of the F point's own strong C
    points (``pos`` below ``own``)."""
    for e in range(indptr[k], indptr[k + U(1)]):
        q = pos[U(indices[U(e)])]
        if strong[U(e)] and 0 <= q < own:
            return True
    return False


@jit(inline="always")
def _mark_row(indptr, indices, strong, state, pos, marked, ui, extend):
    """Give each interpolation point of F point ``ui`` its place ``pos`` (from 0; ``marked``
    lists the points by place); return ``(places, own)``: the first ``own`` are ``ui``'s
    strong C points, in matrix order; with ``extend`` the strong C points of every
    strong F neighbour that shares none of them follow, in the order met."""
    p = 0
    for k in range(indptr[ui], indptr[ui + U(1)]):
        j = U(indices[U(k)])
        if strong[U(k)] and state[j] == C_POINT:
            pos[j] = p
            marked[p] = j
            p += 1
    own = p
    if extend:
        for k in range(indptr[ui], indptr[ui + U(1)]):
            j = U(indices[U(k)])
            if strong[U(k)] and state[j] != C_POINT and not _shares(
                    indptr, indices, strong, pos, j, own):
                for e in range(indptr[j], indptr[j + U(1)]):
                    m = U(indices[U(e)])
                    if strong[U(e)] and state[m] == C_POINT and pos[m] < 0:
                        pos[m] = p
                        marked[p] = m
                        p += 1
    return p, own


@jit(inline="always")
def _unmark_row(pos, marked, places):
    """Undo :func:`_mark_row`."""
    for q in range(places):
        pos[U(marked[q])] = -1


@jit(parallel=True)
def interpolation(indptr, indices, data, strong, state, cidx, counts, starts, sind, sdata,
                  extend, cap, nchunks, marks):
    """P in one pass, as :func:`galerkin` writes ``R A P``: chunk ``c`` of the rows writes
    its rows one after another into ``sind``/``sdata`` from ``starts[c]`` and
    ``counts[i + 1]`` gets row ``i``'s length (:func:`gather_rows` packs them).  A row
    takes at most its matrix row's length plus ``cap`` entries, so room that size never
    runs out.

    A C point's row is its coarse index ``cidx``; an F point takes the classical
    interpolation weights; with ``extend``, a row with a strong F neighbour that shares
    none of its strong C points interpolates from theirs too, by the extended+i formula
    (:func:`_extended_row`), keeping its ``cap`` largest weights.  ``marks[c]``: chunk
    ``c``'s marks, -1 in the first ``n`` places (each row clears the ones it set)."""
    n = indptr.shape[0] - 1
    for c in prange(nchunks):
        lo, hi = _bounds(n, nchunks, c)
        pos = marks[c]  # places within one row of P (-1 everywhere, and left so)
        # a row's points, weights and columns by place (pages touched: few)
        marked = np.empty(n, dtype=np.int64)
        weights = np.empty(n)
        columns = np.empty(n, dtype=sind.dtype)
        start = starts[c]
        for i in range(lo, hi):
            ui = U(i)
            if state[ui] == C_POINT:
                sind[U(start)] = cidx[ui]
                sdata[U(start)] = 1.0
                counts[ui + U(1)] = 1
                start += 1
                continue
            first, last = indptr[ui], indptr[ui + U(1)]
            places, own = _mark_row(indptr, indices, strong, state, pos, marked, ui, extend)
            if places > own:
                _extended_row(indptr, indices, data, strong, state, pos, ui, places, weights)
                for q in range(places):
                    columns[q] = cidx[U(marked[q])]
                count = min(places, cap)
                _keep_largest(weights, columns, places, cap, sind, sdata, start, count)
                _unmark_row(pos, marked, places)
                counts[ui + U(1)] = count
                start += count
                continue
            counts[ui + U(1)] = own
            if own == 0:
                continue
            for q in range(own):  # the strong C points, in matrix order (as marked)
                sind[U(start + q)] = cidx[U(marked[q])]
                sdata[U(start + q)] = 0.0
            p = start + own
            aii = 0.0
            diag = 0.0
            for k in range(first, last):
                j = U(indices[U(k)])
                a = data[U(k)]
                if j == ui:
                    aii += a
                    diag += a
                elif strong[U(k)] and state[j] == C_POINT:
                    sdata[U(start + pos[j])] += a
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
                                sdata[U(start + q)] += a * (data[U(e)] / denom)
                    else:
                        diag += a
                else:
                    diag += a
            if not diag > 0.0:  # lumping made the diagonal non-positive: use a_ii alone
                diag = aii
            for q in range(start, p):
                sdata[U(q)] = -sdata[U(q)] / diag
            _unmark_row(pos, marked, own)
            start = p


@jit(inline="always")
def _extended_row(indptr, indices, data, strong, state, pos, ui, places, weights):
    """Row ``ui`` of P by the extended+i formula (H. De Sterck, R. D. Falgout, J. W.
    Nolting and U. M. Yang, "Distance-two interpolation for parallel algebraic
    multigrid", Numer. Linear Algebra Appl. 15, 2008) over the points ``pos`` marks,
    into ``weights`` by place (``places`` of them):

    ``w_ij = -(a_ij + sum_k a_ik a-_kj / d_k) / D``, ``d_k = sum_{l marked or i} a-_kl``,
    ``D = a_ii + sum (couplings to points neither marked nor strong F)
    + sum_k a_ik a-_ki / d_k``, over the strong F neighbours ``k``, with ``a-``
    the negative entries (a neighbour with ``d_k = 0`` is lumped onto ``D``)."""
    for q in range(places):
        weights[q] = 0.0
    aii = 0.0
    diag = 0.0
    for k in range(indptr[ui], indptr[ui + U(1)]):
        j = U(indices[U(k)])
        a = data[U(k)]
        if j == ui:
            aii += a
            diag += a
        elif pos[j] >= 0:
            weights[U(pos[j])] += a
        elif strong[U(k)] and state[j] != C_POINT:
            denom = 0.0
            for e in range(indptr[j], indptr[j + U(1)]):
                m = U(indices[U(e)])
                if data[U(e)] < 0.0 and (pos[m] >= 0 or m == ui):
                    denom += data[U(e)]
            if denom < 0.0:
                for e in range(indptr[j], indptr[j + U(1)]):
                    m = U(indices[U(e)])
                    if data[U(e)] < 0.0:
                        if pos[m] >= 0:
                            weights[U(pos[m])] += a * (data[U(e)] / denom)
                        elif m == ui:
                            diag += a * (data[U(e)] / denom)
            else:
                diag += a
        else:
            diag += a
    if not diag > 0.0:
        diag = aii
    for q in range(places):
        weights[q] = -weights[q] / diag


@jit(inline="always")
def _keep_largest(weights, columns, places, cap, pind, pdata, start, count):
    """The ``count`` (``min(places, cap)``) largest weights in size (the first place wins a
    tie), scaled to keep the row's sum, into P's row from ``start``, sorted by column."""
    total = 0.0
    for q in range(places):
        total += weights[q]
    kept = 0.0
    for r in range(count):  # selection: rows are short
        best = -1
        for q in range(places):
            if columns[q] >= 0 and (best < 0 or abs(weights[q]) > abs(weights[best])):
                best = q
        pind[U(start + r)] = columns[best]
        pdata[U(start + r)] = weights[best]
        kept += weights[best]
        columns[best] = -1
    scale = total / kept if count < places and kept != 0.0 else 1.0
    for r in range(count):
        pdata[U(start + r)] *= scale
    _sort_row(pind, pdata, start, start + count)


@jit(inline="always")
def _sort_row(pind, pdata, start, end):
    """Insertion sort of one short row of P by column."""
    for q in range(start + 1, end):
        col, val = pind[U(q)], pdata[U(q)]
        r = q - 1
        while r >= start and pind[U(r)] > col:
            pind[U(r + 1)] = pind[U(r)]
            pdata[U(r + 1)] = pdata[U(r)]
            r -= 1
        pind[U(r + 1)] = col
        pdata[U(r + 1)] = val


def transpose(indptr, indices, data, n_cols, parts=2):
    """CSR transpose; rows of the result list columns in increasing order
    (:func:`hatkernels._jit.amg_split.transpose_kept`, in parallel)."""
    return transpose_kept(indptr, indices, data, np.empty(0, dtype=np.uint8), n_cols, parts)


@jit(inline="always")
def _galerkin_row(row, q, limit, rptr, rind, rdata, aptr, aind, adata, pptr, pind, pdata,
                  pos, sind, sdata):
    """Row ``row`` of ``R A P`` into ``sind``/``sdata`` from place ``q``; returns the place
    after it, or -1 when it would pass ``limit``.  The sums run in a fixed order."""
    start = q
    for t in range(rptr[U(row)], rptr[U(row) + U(1)]):
        i = U(rind[U(t)])
        r = rdata[U(t)]
        for k in range(aptr[i], aptr[i + U(1)]):
            a = adata[U(k)]
            if a == 0.0:  # stored zeros of A add no entries
                continue
            j = U(aind[U(k)])
            ra = r * a
            for s in range(pptr[j], pptr[j + U(1)]):
                col = U(pind[U(s)])
                v = ra * pdata[U(s)]
                p = pos[col]
                if p < start:
                    if q == limit:
                        return -1
                    pos[col] = q
                    sind[U(q)] = col
                    sdata[U(q)] = v
                    q += 1
                else:
                    sdata[U(p)] += v
    return q


@jit(parallel=True)
def galerkin(rptr, rind, rdata, aptr, aind, adata, pptr, pind, pdata, n_coarse, counts,
             starts, sind, sdata, nchunks, marks):
    """``C = R A P`` in one pass: chunk ``c`` of the coarse rows (``_bounds``) writes its rows
    one after another into ``sind``/``sdata`` from ``starts[c]``, before ``starts[c + 1]``;
    ``counts[I + 1]`` gets row ``I``'s length (:func:`gather_rows` packs them).

    Returns ``(overflowed, zeros)``: how many chunks did not fit (then nothing is
    usable: call again with more room), and how many off-diagonal entries summed to
    exactly zero (:func:`drop_zeros` removes them).  No separate counting pass: that
    would walk the triple product twice.  ``marks[c]``: chunk ``c``'s marks, -1 in the
    first ``n_coarse`` places (left holding places of ``sind``).
    """
    over = np.zeros(nchunks, dtype=np.int64)
    zeros = np.zeros(nchunks, dtype=np.int64)
    for c in prange(nchunks):
        lo, hi = _bounds(n_coarse, nchunks, c)
        pos = marks[c]  # -1 in the first n_coarse places on entry
        q = starts[c]
        z = 0
        for row in range(lo, hi):
            end = _galerkin_row(row, q, starts[c + 1], rptr, rind, rdata, aptr, aind, adata,
                                pptr, pind, pdata, pos, sind, sdata)
            if end < 0:
                over[c] = 1
                break
            counts[U(row) + U(1)] = end - q
            for e in range(q, end):
                if sdata[U(e)] == 0.0 and sind[U(e)] != row:
                    z += 1
            q = end
        zeros[c] = z
    return over.sum(), zeros.sum()


@jit(parallel=True)
def gather_rows(starts, cptr, sind, sdata, cind, cdata, nchunks):
    """Pack the chunks :func:`galerkin` left in ``sind``/``sdata`` into ``cind``/``cdata``
    (``cptr``: the row starts, from its counts); returns how many values were not finite
    (products of finite numbers can overflow), counted on the way."""
    n_coarse = cptr.shape[0] - 1
    bad = np.zeros(nchunks, dtype=np.int64)
    for c in prange(nchunks):
        lo, hi = _bounds(n_coarse, nchunks, c)
        src, dst = starts[c], cptr[lo]
        count = 0
        for e in range(cptr[hi] - dst):
            v = sdata[U(src + e)]
            cind[U(dst + e)] = sind[U(src + e)]
            cdata[U(dst + e)] = v
            if not math.isfinite(v):
                count += 1
        bad[c] = count
    return bad.sum()


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


def diagonal_and_bound(indptr, indices, data, dinv):
    """``dinv = 1 / diag(A)`` and the Gershgorin bound ``max_i sum_j |a_ij| / a_ii``.

    Returns ``(bound, row)`` where ``row`` is -1, or the first row whose diagonal is
    not positive (then ``dinv`` is incomplete and the bound meaningless).
    """
    return _diagonal_pass(indptr, indices, data, dinv, -1.0, np.empty(0, dtype=np.uint8))
