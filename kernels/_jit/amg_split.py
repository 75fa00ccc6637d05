"""Raw-array kernels of the classical AMG setup's C/F splitting: Ruge and Stueben's two
passes, and a first pass in point order (the default of ``amg-native``).

J. W. Ruge, K. Stueben, "Algebraic multigrid", in Multigrid Methods, SIAM
Frontiers in Applied Mathematics 3, 1987; K. Stueben, "A review of algebraic
multigrid", J. Comput. Appl. Math. 128, 2001.  The rest of the setup
(strength, interpolation, Galerkin product) is :mod:`hatkernels._jit.amg`.
The passes are serial on purpose: each decides one point after another, and the
result depends on that order (point order here), never on the thread count.
The transposes they need run in parallel, with the same result on any number of
threads.
"""

import numpy as np
from numba import prange

from hatkernels._jit import jit

__all__ = ["transpose_kept", "transpose_pattern", "strong_pattern", "split", "point_order_split",
           "second_pass",
           "F_POINT", "C_POINT"]

#: Splitting codes.
F_POINT = 0
C_POINT = 1


@jit()
def _part(n, parts, c):
    return (n * c) // parts, (n * (c + 1)) // parts


def transpose_kept(indptr, indices, data, kept, n_cols, parts):
    """CSR transpose ``(tptr, tind, tdata)`` of the entries with ``kept[k]`` set (every entry
    when ``kept`` is empty), with their values (none when ``data`` is empty).

    Each row of the result lists its columns in increasing order.  The rows are
    cut into ``parts`` blocks, counted and placed in parallel (each block in its
    own places, known from the counts of the blocks before it), so the result is
    the same for any ``parts``; the counts take ``parts`` integers per column.
    The arrays are NumPy's (large ones on huge pages where the system offers them:
    their first touch is several times cheaper than for arrays made inside a kernel).
    """
    place = np.zeros((parts, n_cols), dtype=indptr.dtype)
    tptr = np.empty(n_cols + 1, dtype=indptr.dtype)
    total = _transpose_count(indptr, indices, kept, place, tptr)
    tind = np.empty(total, dtype=indices.dtype)
    tdata = np.empty(total if data.shape[0] > 0 else 0, dtype=data.dtype)
    _transpose_fill(indptr, indices, data, kept, place, tind, tdata)
    return tptr, tind, tdata


@jit(parallel=True)
def _transpose_count(indptr, indices, kept, place, tptr):
    """Count each block's kept entries per column into ``place``, then turn the counts into
    first places, column by column and block by block; ``tptr`` the row starts.  Returns
    the number of kept entries."""
    n = indptr.shape[0] - 1
    parts, n_cols = place.shape
    every = kept.shape[0] == 0
    for c in prange(parts):
        lo, hi = _part(n, parts, c)
        for i in range(lo, hi):
            for k in range(indptr[i], indptr[i + 1]):
                if every or kept[k]:
                    place[c, indices[k]] += 1
    total = 0
    for j in range(n_cols):
        tptr[j] = total
        for c in range(parts):
            m = place[c, j]
            place[c, j] = total
            total += m
    tptr[n_cols] = total
    return total


@jit(parallel=True)
def _transpose_fill(indptr, indices, data, kept, place, tind, tdata):
    """Each block puts its kept entries at its own places (``place``, from
    :func:`_transpose_count`), in row order."""
    n = indptr.shape[0] - 1
    parts = place.shape[0]
    every = kept.shape[0] == 0
    with_data = data.shape[0] > 0
    for c in prange(parts):
        lo, hi = _part(n, parts, c)
        for i in range(lo, hi):
            for k in range(indptr[i], indptr[i + 1]):
                if every or kept[k]:
                    j = indices[k]
                    q = place[c, j]
                    tind[q] = i
                    if with_data:
                        tdata[q] = data[k]
                    place[c, j] = q + 1


def transpose_pattern(indptr, indices, strong, n, parts=2):
    """The transpose of the strong couplings: ``(tptr, tind)``, row ``j`` lists the ``i``
    with j in S_i, in increasing order (:func:`transpose_kept`)."""
    tptr, tind, _ = transpose_kept(indptr, indices, np.empty(0), strong, n, parts)
    return tptr, tind


@jit(parallel=True)
def strong_pattern(indptr, indices, strong):
    """The strong couplings as a CSR pattern ``(sptr, sind)``: row ``i`` lists S_i."""
    n = indptr.shape[0] - 1
    sptr = np.empty(n + 1, dtype=indptr.dtype)
    sptr[0] = 0
    for i in prange(n):
        c = 0
        for k in range(indptr[i], indptr[i + 1]):
            c += strong[k]
        sptr[i + 1] = c
    for i in range(n):
        sptr[i + 1] += sptr[i]
    sind = np.empty(sptr[n], dtype=indices.dtype)
    for i in prange(n):
        q = sptr[i]
        for k in range(indptr[i], indptr[i + 1]):
            if strong[k]:
                sind[q] = indices[k]
                q += 1
    return sptr, sind


@jit()
def split(indptr, indices, strong, tptr, tind):
    """First pass of the Ruge-Stueben C/F splitting; returns one int8 per point (1 = C, 0 = F).

    A point with no strong coupling of its own is F with nothing to
    interpolate from (the smoother alone treats it).  The unassigned point of
    largest measure becomes C; the points that strongly depend on it become
    F, and the points those new F points depend on gain measure; the points
    the new C point depends on lose measure.  Points wait in one doubly linked
    list per measure: a point whose measure rose joins its new list last, one
    whose measure fell joins first, and the first of the top list is taken
    next (the tie-breaking of PyAMG's splitting, which this reproduces on
    naturally numbered meshes).  The list operations are written out inline:
    as calls they cost twice the time.
    """
    n = indptr.shape[0] - 1
    UNSET = -1
    state = np.full(n, UNSET, dtype=np.int8)
    lam = np.zeros(n, dtype=np.int64)
    top = 0
    for i in range(n):
        lam[i] = tptr[i + 1] - tptr[i]
        if lam[i] > top:
            top = lam[i]
    head = np.full(2 * top + 2, -1, dtype=np.int64)  # a measure at most doubles
    tail = np.full(2 * top + 2, -1, dtype=np.int64)
    nxt = np.full(n, -1, dtype=np.int64)
    prv = np.full(n, -1, dtype=np.int64)
    for i in range(n):
        own = 0
        for k in range(indptr[i], indptr[i + 1]):
            own += strong[k]
        if own == 0:
            state[i] = F_POINT
            continue
        b = lam[i]  # join list b first
        h = head[b]
        nxt[i] = h
        if h >= 0:
            prv[h] = i
        else:
            tail[b] = i
        head[b] = i
    while top >= 0:
        i = head[top]
        if i < 0:
            top -= 1
            continue
        h = nxt[i]  # i leaves the top list, of which it is first
        head[top] = h
        if h >= 0:
            prv[h] = -1
        else:
            tail[top] = -1
        if top == 0:
            # no unassigned or F point depends on i: C only if it has no C point to interpolate from
            state[i] = C_POINT
            for k in range(indptr[i], indptr[i + 1]):
                if strong[k] and state[indices[k]] == C_POINT:
                    state[i] = F_POINT
                    break
            continue
        state[i] = C_POINT
        for t in range(tptr[i], tptr[i + 1]):
            j = tind[t]
            if state[j] != UNSET:
                continue
            b, p, q = lam[j], prv[j], nxt[j]  # j leaves its list
            if p >= 0:
                nxt[p] = q
            else:
                head[b] = q
            if q >= 0:
                prv[q] = p
            else:
                tail[b] = p
            state[j] = F_POINT
            for k in range(indptr[j], indptr[j + 1]):
                if not strong[k]:
                    continue
                m = indices[k]
                if state[m] != UNSET:
                    continue
                b, p, q = lam[m], prv[m], nxt[m]  # m leaves list b ...
                if p >= 0:
                    nxt[p] = q
                else:
                    head[b] = q
                if q >= 0:
                    prv[q] = p
                else:
                    tail[b] = p
                b += 1  # ... and joins list b + 1 last
                lam[m] = b
                t2 = tail[b]
                prv[m] = t2
                nxt[m] = -1
                if t2 >= 0:
                    nxt[t2] = m
                else:
                    head[b] = m
                tail[b] = m
                if b > top:
                    top = b
        for k in range(indptr[i], indptr[i + 1]):
            if not strong[k]:
                continue
            j = indices[k]
            if state[j] != UNSET or lam[j] == 0:
                continue
            b, p, q = lam[j], prv[j], nxt[j]  # j leaves list b ...
            if p >= 0:
                nxt[p] = q
            else:
                head[b] = q
            if q >= 0:
                prv[q] = p
            else:
                tail[b] = p
            b -= 1  # ... and joins list b - 1 first
            lam[j] = b
            h = head[b]
            nxt[j] = h
            prv[j] = -1
            if h >= 0:
                prv[h] = j
            else:
                tail[b] = j
            head[b] = j
    return state


@jit()
def point_order_split(indptr, indices, strong):
    """C/F splitting in point order; returns one int8 per point (1 = C, 0 = F).

    Each point still undecided when its turn comes becomes C, and every
    undecided point that strongly depends on it becomes F: a maximal set of C
    points, none strongly depending on an earlier one, chosen greedily in
    point order.  Written the other way round, which needs no transpose: at
    its turn a point is F if it strongly depends on an earlier C point, else
    C.  A point with no strong coupling either way is F with nothing to
    interpolate from (the smoother alone treats it).  Every other F point
    strongly depends on a C point, as after the first Ruge-Stueben pass
    (:func:`split`), but the measures that pass keeps up to date, and its
    cost, are left out.  On a mesh numbered with locality (the solvers
    renumber one that is not) the order makes the pattern regular; on a
    randomly numbered one it is a random greedy choice (docs/solvers.md gives
    the iterations either way).
    """
    n = indptr.shape[0] - 1
    depended = np.zeros(n, dtype=np.uint8)  # some point strongly depends on it
    for k in range(indptr[n]):
        if strong[k]:
            depended[indices[k]] = 1
    state = np.empty(n, dtype=np.int8)
    for i in range(n):
        own = False
        f_point = False
        for k in range(indptr[i], indptr[i + 1]):
            if strong[k]:
                own = True
                c = indices[k]
                if c < i and state[c] == C_POINT:
                    f_point = True
                    break
        if f_point or not (own or depended[i]):
            state[i] = F_POINT
        else:
            state[i] = C_POINT
    return state


@jit()
def second_pass(indptr, indices, strong, state):
    """The second pass of the C/F splitting, in place on ``state``, in point order.

    For each F point ``i`` with its strong C points ``C_i``: a strong F
    neighbour ``j`` none of whose strong couplings is in ``C_i`` would have its
    coupling lumped onto the diagonal by the interpolation.  The first such
    ``j`` joins ``C_i`` tentatively; if a second one is found, ``i`` becomes C
    instead, else the tentative ``j`` becomes C (K. Stueben, "A review of
    algebraic multigrid", 2001, the second pass of the classical coarsening).
    """
    n = indptr.shape[0] - 1
    mark = np.full(n, -1, dtype=np.int64)  # mark[c] == i: c is in C_i
    for i in range(n):
        if state[i] != F_POINT:
            continue
        for k in range(indptr[i], indptr[i + 1]):
            if strong[k] and state[indices[k]] == C_POINT:
                mark[indices[k]] = i
        tentative = -1
        for k in range(indptr[i], indptr[i + 1]):
            j = indices[k]
            if not strong[k] or state[j] != F_POINT or mark[j] == i:
                continue
            shared = False
            for k2 in range(indptr[j], indptr[j + 1]):
                if strong[k2] and mark[indices[k2]] == i:
                    shared = True
                    break
            if shared:
                continue
            if tentative >= 0:
                state[i] = C_POINT
                tentative = -1
                break
            tentative = j
            mark[j] = i
        if tentative >= 0:
            state[tentative] = C_POINT
