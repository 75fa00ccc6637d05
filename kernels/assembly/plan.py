"""The symbolic phase: the CSR pattern of a mesh and the slot plan of its incidences."""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse as sp

from hatkernels._jit import topology as _topo
from hatkernels.errors import InputError
from hatkernels.mesh.core import index_dtype
from hatkernels.mesh.pattern import csr_pattern, incidence_slots
from hatkernels.sparse import remember_checked

__all__ = ["CSRPlan", "build_plan"]


@dataclasses.dataclass(frozen=True, repr=False)
class CSRPlan:
    """CSR pattern of the P1 matrices of a mesh, with where each element entry goes.

    For point ``i`` and each triangle ``t`` around it (local vertex ``a``),
    incidence ``e`` in ``ptr[i]:ptr[i+1]`` has code ``codes[e] = 3t + a`` and
    the data positions ``slot_next[e]`` of ``(i, vertex a+1)`` and
    ``slot_prev[e]`` of ``(i, vertex a+2)``; ``diag[i]`` is the position of
    ``(i, i)``.  All index arrays share one dtype: int32 while the number of
    incidences, points and stored entries fit, int64 beyond.  ``ptr`` and
    ``codes`` are the mesh's own incidence where its dtype is the plan's.

    The slots are made on first use and kept: the fused stiffness finds its
    entries in each row and needs none, the element-value gathers (by rows,
    mass) and the triangle-by-triangle scatter read them.

    Memory: ``3`` indices per triangle (codes), ``6`` more once the slots are
    made, plus ``3`` per point (ptr, diag, indptr) and one per stored entry
    (indices): with int32 and ``nnz ~ 3.5 M``, about 34 bytes per triangle, 58
    with the slots.
    """

    n: int
    indptr: np.ndarray
    indices: np.ndarray
    diag: np.ndarray
    ptr: np.ndarray
    codes: np.ndarray
    triangles: np.ndarray  # the mesh's triangles in the plan's index dtype
    _slots: list = dataclasses.field(default_factory=list, compare=False)

    @property
    def slot_next(self):
        return self._made_slots()[0]

    @property
    def slot_prev(self):
        return self._made_slots()[1]

    def _made_slots(self):
        if not self._slots:
            self._slots.extend(incidence_slots(self.triangles, self.ptr, self.codes,
                                               self.indptr, self.indices))
        return self._slots

    @property
    def nnz(self):
        return int(self.indptr[-1])

    @property
    def dtype(self):
        return self.indptr.dtype

    @property
    def nbytes(self):
        arrays = (self.indptr, self.indices, self.diag, self.ptr, self.codes, *self._slots)
        return sum(a.nbytes for a in arrays)

    def matrix(self, data, *, copy_pattern=False):
        """A canonical scipy CSR matrix on this pattern with the given data (not copied).

        With ``copy_pattern`` the matrix gets its own index arrays, so that
        in-place scipy operations on it cannot change the plan.
        """
        indices, indptr = self.indices, self.indptr
        if copy_pattern:
            indices, indptr = indices.copy(), indptr.copy()
        A = sp.csr_matrix((data, indices, indptr), shape=(self.n, self.n), copy=False)
        A.has_sorted_indices = True
        A.has_canonical_format = True
        if A.dtype == np.float64 and A.data.shape == indices.shape:
            # the pattern is the plan's own (built and tested here): as_csr need not walk
            # it again; the values are still checked for finiteness where they are read
            remember_checked(A)
        return A

    def __repr__(self):
        return (
            f"CSRPlan({self.n} rows, {self.nnz} entries, {self.dtype} indices, "
            f"{self.nbytes / 2**20:.1f} MiB)"
        )


def build_plan(mesh, *, index_dtype_override=None):
    """Symbolic phase for ``mesh``: pattern and diagonal positions (slots on first use).

    ``index_dtype_override`` (np.int64) forces wide indices, for testing the
    path that very large meshes take.
    """
    tri = mesh.triangles
    dt = index_dtype(mesh.n_points + 1, 3 * mesh.n_triangles + 3)
    if index_dtype_override is not None:
        if np.dtype(index_dtype_override) not in (np.dtype(np.int32), np.dtype(np.int64)):
            raise InputError(f"index dtype must be int32 or int64, got {index_dtype_override}")
        if np.dtype(index_dtype_override).itemsize < dt.itemsize:
            raise InputError(f"this mesh needs {dt} indices")
        dt = np.dtype(index_dtype_override)
    tri = tri.astype(dt, copy=False)
    ptr, codes = mesh._incidence()  # cached by the mesh (its checks made it)
    if ptr.dtype != dt:
        ptr = np.empty(mesh.n_points + 1, dtype=dt)
        codes = np.empty(3 * mesh.n_triangles, dtype=dt)
        _topo.incidence(tri, ptr, codes)
    # the rows' lengths from the boundary (which the mesh keeps once found): no scratch
    outgoing = np.bincount(mesh.boundary_edges()[:, 0], minlength=mesh.n_points)
    indptr, indices, diag = csr_pattern(tri, ptr, codes, outgoing=outgoing,
                                        index_dtype_override=index_dtype_override)
    if indptr.dtype != dt:
        # more stored entries than int32 can count: everything in int64
        return build_plan(mesh, index_dtype_override=np.int64)
    return CSRPlan(mesh.n_points, indptr, indices, diag, ptr, codes, tri)
