"""The CSR pattern of a mesh's P1 matrices (the point graph plus the diagonal)."""

import numpy as np

from hatkernels._jit import topology as _topo
from hatkernels.mesh.core_index import index_dtype

__all__ = ["csr_pattern"]


def csr_pattern(triangles, ptr, codes, *, with_slots, index_dtype_override=None):
    """``(indptr, indices, diag, slot_next, slot_prev)`` from the incidence of a mesh.

    One pass collects each row, sorted, into a scratch array at a position
    known in advance (``i + 2 ptr[i]``, room for ``2k + 1`` columns); a second
    copies the rows into place and finds the diagonal and, ``with_slots``,
    where each incidence's two entries are.  All arrays share one index dtype:
    that of ``ptr``, or int64 when the stored entries do not fit in it.
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
    slots = m3 if with_slots else 0
    slot_next = np.empty(slots, dtype=dt)
    slot_prev = np.empty(slots, dtype=dt)
    _topo.pattern_fill(
        triangles, ptr, codes, scratch, indptr, indices, diag, slot_next, slot_prev, with_slots
    )
    return indptr, indices, diag, slot_next, slot_prev
