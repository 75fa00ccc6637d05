"""Mesh topology kernels: point-to-triangle incidence, the CSR pattern, edges.

Everything here is derived from the *incidence*: for each point ``i`` the list
of ``3 * t + a`` codes of the triangles ``t`` that have ``i`` as their local
vertex ``a``, in increasing ``t``.  In a counterclockwise triangle the
*successor* of local vertex ``a`` is ``(a + 1) % 3`` and its *predecessor*
``(a + 2) % 3``; the directed edge ``i -> successor`` has the triangle on its
left.

Parallel loops run over points and each iteration writes only the entries of
its own point, so there are no races and the result does not depend on the
thread count.
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit

# Rows are processed in blocks so that each block allocates its scratch
# buffer once instead of once per row.
_BLOCK = 4096


@jit()
def incidence(triangles, ptr, codes):
    """Counting sort of ``3 * t + a`` codes by point, into ``ptr`` and ``codes``.

    ``ptr`` has length ``n_points + 1`` and ``codes`` length ``3 * n_triangles``
    (both in the index dtype, wide enough for ``3 * n_triangles``); the codes
    of point ``i`` end up in ``codes[ptr[i]:ptr[i + 1]]``, in increasing
    triangle order.
    """
    m = triangles.shape[0]
    n_points = ptr.size - 1
    ptr[:] = 0
    for t in range(m):
        for a in range(3):
            ptr[triangles[t, a] + 1] += 1
    for i in range(n_points):
        ptr[i + 1] += ptr[i]
    fill = ptr[:-1].copy()
    for t in range(m):
        for a in range(3):
            i = triangles[t, a]
            codes[fill[i]] = 3 * t + a
            fill[i] += 1


@jit(inline="always")
def _others(codes, e):
    """Triangle of incidence ``e`` and the local numbers of its successor and predecessor.

    Unsigned arithmetic: numba then skips the negative-index checks (see
    kernels/_jit/sparse.py).
    """
    three = uint64(3)
    q = uint64(codes[uint64(e)])
    t = q // three
    a = q - three * t
    b = a + uint64(1) if a < uint64(2) else uint64(0)
    c = b + uint64(1) if b < uint64(2) else uint64(0)
    return t, b, c


@jit()
def _insert_sorted(buf, start, count, value, room=-1):
    """Insert ``value`` into the sorted ``buf[start:start+count]``; return the new count,
    or -1 (nothing written) when it is new and the row already holds ``room`` values."""
    pos = start + count
    while pos > start and buf[pos - 1] > value:
        pos -= 1
    if pos > start and buf[pos - 1] == value:
        return count
    if count == room:
        return -1
    for r in range(start + count, pos, -1):
        buf[r] = buf[r - 1]
    buf[pos] = value
    return count + 1


@jit(parallel=True)
def pattern_scratch(triangles, ptr, codes, scratch, counts):
    """Sorted distinct columns of each row, into a scratch array with room to spare.

    Row ``i`` (itself and the other two vertices of each of its ``k``
    triangles: at most ``2k + 1`` columns) goes to
    ``scratch[i + 2 ptr[i]:]``, a place known without counting first;
    ``counts[i]`` gets its length (0 for a point in no triangle).
    """
    n = ptr.size - 1
    for i in prange(n):
        if ptr[i] == ptr[i + 1]:
            counts[i] = 0
            continue
        start = i + 2 * ptr[i]
        scratch[start] = i
        c = 1
        for e in range(ptr[i], ptr[i + 1]):
            t, b, c2 = _others(codes, e)
            c = _insert_sorted(scratch, start, c, triangles[t, b])
            c = _insert_sorted(scratch, start, c, triangles[t, c2])
        counts[i] = c


@jit(parallel=True)
def pattern_direct(triangles, ptr, codes, indptr, indices, diag):
    """Each row's sorted distinct columns straight into CSR ``indices``, at ``indptr``
    made from predicted row lengths; the diagonal's position into ``diag``.

    A row takes the successors of its point first: distinct, as each directed edge is in
    one triangle at most (the mesh checks it).  Its predecessors are the same points in
    another order unless a boundary edge ends at the point; so they are inserted only
    when the row has room for more than the successors, or when their sum or their sum
    of squares differs from the successors' (whatever the predicted lengths, a point
    whose successors and predecessors differ in one or two points always shows it while
    the point numbers are below 2**31; the sums wrap beyond).
    Most rows thus need half the insertions.  Returns how many rows did not have their
    predicted length (never written past; the caller then builds the pattern with
    :func:`pattern_scratch`).
    """
    n = ptr.size - 1
    wrong = 0
    for i in prange(n):
        start = indptr[i]
        room = indptr[i + 1] - start
        if room == 0:
            diag[i] = -1
            wrong += ptr[i + 1] > ptr[i]
            continue
        indices[start] = i
        c = 1
        s1 = s2 = uint64(0)  # power sums of successors minus predecessors (mod 2**64)
        for e in range(ptr[i], ptr[i + 1]):
            t, b, c2 = _others(codes, e)
            j, p = uint64(triangles[t, b]), uint64(triangles[t, c2])
            s1 += j - p
            s2 += j * j - p * p
            if c > 0:
                c = _insert_sorted(indices, start, c, triangles[t, b], room)
        if c > 0 and (c < room or s1 != uint64(0) or s2 != uint64(0)):
            for e in range(ptr[i], ptr[i + 1]):
                t, b, c2 = _others(codes, e)
                c = _insert_sorted(indices, start, c, triangles[t, c2], room)
                if c < 0:
                    break
        if c != room:
            wrong += 1
            diag[i] = -1
            continue
        diag[i] = row_position(indices, start, start + c, i)
    return wrong


@jit()
def row_position(indices, lo, hi, value):
    """Position of ``value`` in the sorted ``indices[lo:hi]`` (it must be there)."""
    while hi - lo > 8:
        mid = (lo + hi) // 2
        if indices[mid] < value:
            lo = mid + 1
        else:
            hi = mid
    while indices[lo] != value:
        lo += 1
    return lo


@jit(parallel=True)
def pattern_fill(ptr, scratch, indptr, indices, diag):
    """Copy the rows from the scratch array into CSR ``indices``; the diagonal.

    ``diag[i]`` is the position of ``(i, i)`` in ``indices`` (-1 for a point
    in no triangle, whose row is empty).  Each row is written only by its own
    iteration.
    """
    n = ptr.size - 1
    for i in prange(n):
        if ptr[i] == ptr[i + 1]:
            diag[i] = -1
            continue
        start = indptr[i]
        end = indptr[i + 1]
        src = i + 2 * ptr[i]
        for k in range(end - start):
            indices[start + k] = scratch[src + k]
        diag[i] = row_position(indices, start, end, i)


@jit(parallel=True)
def pattern_slots(triangles, ptr, codes, indptr, indices, slot_next, slot_prev):
    """Where each incidence's two entries are: for incidence ``e`` of point ``i`` in
    triangle ``t`` at local vertex ``a``, ``slot_next[e]`` is the position of
    ``(i, triangle[t, a+1])`` in ``indices`` and ``slot_prev[e]`` that of
    ``(i, triangle[t, a+2])``."""
    n = ptr.size - 1
    for i in prange(n):
        start = indptr[i]
        end = indptr[i + 1]
        for e in range(ptr[i], ptr[i + 1]):
            t, b, c2 = _others(codes, e)
            slot_next[uint64(e)] = row_position(indices, start, end, triangles[t, b])
            slot_prev[uint64(e)] = row_position(indices, start, end, triangles[t, c2])


@jit(parallel=True)
def directed_edge_check(triangles, ptr, codes):
    """Check that every directed edge ``i -> successor`` occurs in one triangle only.

    In a valid mesh of counterclockwise triangles an interior edge is walked
    once in each direction by its two triangles, and a boundary edge once.
    A directed edge walked twice means duplicate or overlapping triangles, or
    an edge shared by more than two triangles.  Returns ``(first, second)``
    arrays over points: the two triangles of the first repeated directed edge
    leaving that point, or ``-1``.
    """
    n = ptr.size - 1
    first = np.full(n, -1, dtype=ptr.dtype)
    second = np.full(n, -1, dtype=ptr.dtype)
    for i in prange(n):
        found = False
        for e in range(ptr[i], ptr[i + 1]):
            if found:
                break
            t = codes[e] // 3
            j = triangles[t, (codes[e] - 3 * t + 1) % 3]
            for f in range(e + 1, ptr[i + 1]):
                s = codes[f] // 3
                if triangles[s, (codes[f] - 3 * s + 1) % 3] == j:
                    first[i] = t
                    second[i] = s
                    found = True
                    break
    return first, second


@jit(parallel=True)
def boundary_flags(triangles, ptr, codes):
    """For each incidence ``e`` of point ``i``: is ``i -> successor`` a boundary edge?

    It is when no triangle at ``i`` walks the reverse edge, that is when the
    successor is nobody's predecessor around ``i``.
    """
    n = ptr.size - 1
    flags = np.zeros(codes.size, dtype=np.bool_)
    for i in prange(n):
        for e in range(ptr[i], ptr[i + 1]):
            t = codes[e] // 3
            j = triangles[t, (codes[e] - 3 * t + 1) % 3]
            reverse = False
            for f in range(ptr[i], ptr[i + 1]):
                s = codes[f] // 3
                if triangles[s, (codes[f] - 3 * s + 2) % 3] == j:
                    reverse = True
                    break
            flags[e] = not reverse
    return flags


@jit(parallel=True)
def triangle_edges(triangles, indptr, indices, diag, first_edge):
    """Global edge number of the edge opposite each local vertex.

    Edge ``(i, j)`` with ``i < j`` is stored in row ``i`` of the pattern after
    the diagonal; its number is ``first_edge[i]`` plus its position there.
    """
    m = triangles.shape[0]
    out = np.empty((m, 3), dtype=indptr.dtype)
    for t in prange(m):
        for c in range(3):
            p = triangles[t, (c + 1) % 3]
            q = triangles[t, (c + 2) % 3]
            i = min(p, q)
            j = max(p, q)
            pos = row_position(indices, diag[i] + 1, indptr[i + 1], j)
            out[t, c] = first_edge[i] + pos - diag[i] - 1
    return out


@jit()
def first_appearance(triangles, n_points, new_id):
    """Number points in the order they first appear in ``triangles`` (row by row).

    Points in no triangle are numbered last, in their old order.  Writes the
    old-to-new map into ``new_id``; one serial pass.
    """
    new_id[:] = -1
    k = 0
    for t in range(triangles.shape[0]):
        for a in range(triangles.shape[1]):  # any cell width: triangles, tetrahedra
            v = triangles[t, a]
            if new_id[v] < 0:
                new_id[v] = k
                k += 1
    for v in range(n_points):
        if new_id[v] < 0:
            new_id[v] = k
            k += 1


@jit()
def _root(parent, x):
    while parent[x] != x:
        parent[x] = parent[parent[x]]  # path halving
        x = parent[x]
    return x


@jit()
def component_roots(cells, parent):
    """Union-find over the cells: ``parent`` (n_points,) ends as each point's root.

    ``parent`` must hold ``0 .. n_points - 1`` on entry.  Linking the larger
    root under the smaller makes every root the smallest point of its part.
    Serial (a union-find has no independent rows); about 10 ns per cell.
    """
    m, k = cells.shape
    for c in range(m):
        a = _root(parent, cells[c, 0])
        for j in range(1, k):
            b = _root(parent, cells[c, j])
            if a < b:
                parent[b] = a
            elif b < a:
                parent[a] = b
                a = b
    for i in range(parent.size):
        parent[i] = _root(parent, i)
