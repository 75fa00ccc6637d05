"""The CSR pattern of a mesh's P1 matrices (the point graph plus the diagonal)."""

import numpy as np

from hatkernels._jit import topology as _topo
from hatkernels.mesh.core_index import index_dtype

__all__ = ["csr_pattern", "incidence_slots"]


def csr_pattern(triangles, ptr, codes, *, index_dtype_override=None):
    """``(indptr, indices, diag)`` from the incidence of a mesh.

    One pass collects each row, sorted, into a scratch array at a position
    known in advance (``i + 2 ptr[i]``, room for ``2k + 1`` columns); a second
    copies the rows into place and finds the diagonal.  All arrays share one
    index dtype: that of ``ptr``, or int64 when the stored entries do not fit
    in it.  Where each incidence's entries are is :func:`incidence_slots`.
    """
    n = ptr.size - 1
    m3 = codes.size
    sdt = index_dtype(n + 2 * m3 + 1)
    scratch = np.empty(n + 2 * m3, dtype=sdt)
    counts = np.empty(n, dtype=ptr.dtype)
    _topo.pattern_scratch(triangles, ptr, codes, scratch, counts)
    nnz = int(counts.sum(dtype=np.int64))
    dt = np.dtype(ptr.dtype)
    if index_dtype(nnz) != np.int32:
        dt = np.dtype(np.int64)
    if index_dtype_override is not None:
        dt = np.dtype(index_dtype_override)
    indptr = np.zeros(n + 1, dtype=dt)
    np.cumsum(counts, out=indptr[1:])
    del counts
    indices = np.empty(nnz, dtype=dt)
    diag = np.empty(n, dtype=dt)
    _topo.pattern_fill(ptr, scratch, indptr, indices, diag)
    return indptr, indices, diag


def incidence_slots(triangles, ptr, codes, indptr, indices):
    """``(slot_next, slot_prev)``: for incidence ``e`` of point ``i`` in triangle ``t`` at
    local vertex ``a``, the positions in ``indices`` of ``(i, triangle[t, a+1])`` and
    ``(i, triangle[t, a+2])`` (in the pattern's index dtype)."""
    slot_next = np.empty(codes.size, dtype=indptr.dtype)
    slot_prev = np.empty(codes.size, dtype=indptr.dtype)
    _topo.pattern_slots(triangles, ptr, codes, indptr, indices, slot_next, slot_prev)
    return slot_next, slot_prev
