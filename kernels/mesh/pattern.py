"""The CSR pattern of a mesh's P1 matrices (the point graph plus the diagonal)."""

import numpy as np

from hatkernels._jit import topology as _topo
from hatkernels.mesh.core_index import index_dtype

__all__ = ["csr_pattern", "incidence_slots"]


def csr_pattern(triangles, ptr, codes, *, index_dtype_override=None, outgoing=None):
    """``(indptr, indices, diag)`` from the incidence of a mesh.

    With ``outgoing`` (per point, how many boundary edges leave it, the domain
    on their left: ``np.bincount(mesh.boundary_edges()[:, 0])``) every row's
    length is known first: a point in ``k`` triangles has ``k`` neighbours
    around it, one more for each fan of triangles that ends on the boundary
    (each such fan has one boundary edge leaving the point), and itself.
    The rows then go straight into ``indices``, sorted, in one pass; if any
    row's length differs from the prediction the rows are built as without
    ``outgoing``.  Without it one pass collects each row, sorted, into a
    scratch array at a position known in advance (``i + 2 ptr[i]``, room for
    ``2k + 1`` columns), and a second copies the rows into place.  The result
    is the same either way.  All arrays share one index dtype: that of
    ``ptr``, or int64 when the stored entries do not fit in it.  Where each
    incidence's entries are is :func:`incidence_slots`.
    """
    n = ptr.size - 1
    if outgoing is not None:
        k = np.diff(ptr)
        counts = np.where(k > 0, 1 + k.astype(np.int64) + outgoing, 0)
        indptr, indices, diag = _allocate(counts, ptr.dtype, index_dtype_override)
        if _topo.pattern_direct(triangles, ptr, codes, indptr, indices, diag) == 0:
            return indptr, indices, diag
        del indptr, indices, diag
    m3 = codes.size
    sdt = index_dtype(n + 2 * m3 + 1)
    scratch = np.empty(n + 2 * m3, dtype=sdt)
    counts = np.empty(n, dtype=ptr.dtype)
    _topo.pattern_scratch(triangles, ptr, codes, scratch, counts)
    indptr, indices, diag = _allocate(counts, ptr.dtype, index_dtype_override)
    del counts
    _topo.pattern_fill(ptr, scratch, indptr, indices, diag)
    return indptr, indices, diag


def _allocate(counts, dtype, override):
    # the pattern's arrays for these row lengths, in one index dtype
    nnz = int(counts.sum(dtype=np.int64))
    dt = np.dtype(dtype)
    if index_dtype(nnz) != np.int32:
        dt = np.dtype(np.int64)
    if override is not None:
        dt = np.dtype(override)
    indptr = np.zeros(counts.size + 1, dtype=dt)
    np.cumsum(counts, out=indptr[1:])
    return indptr, np.empty(nnz, dtype=dt), np.empty(counts.size, dtype=dt)


def incidence_slots(triangles, ptr, codes, indptr, indices):
    """``(slot_next, slot_prev)``: for incidence ``e`` of point ``i`` in triangle ``t`` at
    local vertex ``a``, the positions in ``indices`` of ``(i, triangle[t, a+1])`` and
    ``(i, triangle[t, a+2])`` (in the pattern's index dtype)."""
    slot_next = np.empty(codes.size, dtype=indptr.dtype)
    slot_prev = np.empty(codes.size, dtype=indptr.dtype)
    _topo.pattern_slots(triangles, ptr, codes, indptr, indices, slot_next, slot_prev)
    return slot_next, slot_prev
