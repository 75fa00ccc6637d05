"""Assembly of element matrices computed by the caller: any cell type, any number of dofs.

The csr strategy's symbolic plan (incidence, pattern, slot plan; see
docs/assembly.md) is built for ``k = 3`` vertices per triangle.  Here it is
built for any ``k`` from a cell-to-dof table alone, so that a code with its
own elements (higher order, quadrilaterals, several unknowns per point)
gets the same fast path: the plan once, then a row-owned parallel gather
per matrix, race-free and with the same bits for any thread count.
"""

from __future__ import annotations

import dataclasses
import operator

import numba
import numpy as np
import scipy.sparse as sp

from hatkernels._jit import dofs as _jit_dofs
from hatkernels._jit.operators import colour_blocks as _jit_colour_blocks
from hatkernels.errors import InputError
from hatkernels.mesh import core_index

__all__ = ["DofAssembler", "DofPlan"]

#: Cells per block of the colouring the matrix scatter runs through.
BLOCK_CELLS = 512


@dataclasses.dataclass(frozen=True, repr=False)
class DofPlan:
    """CSR pattern of a cell-to-dof table, with where each element entry goes.

    For dof ``i`` and each cell ``t`` that holds it at local position ``a``,
    incidence ``e`` in ``ptr[i]:ptr[i+1]`` has code ``codes[e] = k t + a``
    (in increasing ``t``), and ``slots[k t + a, b]`` (cell order) is the
    position in the CSR data of entry ``(cell_dofs[t, a], cell_dofs[t, b])``.
    All index arrays share one dtype: int32 while the dofs, incidences and
    stored entries fit, int64 beyond.  ``colour_ptr`` and ``blocks`` colour
    blocks of ``block_size`` consecutive cells so that two blocks of one
    colour share no dof (None when more than 64 colours would be needed).
    """

    n: int
    k: int
    indptr: np.ndarray
    indices: np.ndarray
    ptr: np.ndarray
    codes: np.ndarray
    slots: np.ndarray
    block_size: int = 0
    colour_ptr: np.ndarray | None = None
    blocks: np.ndarray | None = None

    @property
    def nnz(self):
        return int(self.indptr[-1])

    @property
    def dtype(self):
        return self.indptr.dtype

    @property
    def nbytes(self):
        arrays = (self.indptr, self.indices, self.ptr, self.codes, self.slots,
                  self.colour_ptr, self.blocks)
        return sum(a.nbytes for a in arrays if a is not None)

    def matrix(self, data):
        """Canonical scipy CSR on this pattern with ``data`` (not copied) and its own index arrays.

        The index arrays are copies, so that in-place scipy operations on
        the matrix cannot change the plan.
        """
        A = sp.csr_matrix(
            (data, self.indices.copy(), self.indptr.copy()), shape=(self.n, self.n), copy=False
        )
        A.has_sorted_indices = True
        A.has_canonical_format = True
        return A

    def __repr__(self):
        return (
            f"DofPlan({self.n} rows, {self.k} dofs per cell, {self.nnz} entries, "
            f"{self.dtype} indices, {self.nbytes / 2**20:.1f} MiB)"
        )


def _first(mask, k):
    """(cell, local position) of the first True entry of the (M, k) ``mask``."""
    return divmod(int(np.argmax(mask.ravel())), k)


def _check_cell_dofs(cell_dofs, n_dofs):
    """The validated table in the plan's index dtype (a copy if needed) and the number of dofs.

    The kernels only read the table, so an array already in that dtype is used as it is.
    """
    try:
        arr = np.asarray(cell_dofs)
    except (ValueError, TypeError) as exc:
        raise InputError(f"cell_dofs must be an (n_cells, k) integer array: {exc}") from None
    if arr.ndim != 2:
        raise InputError(f"cell_dofs must be 2-D, (n_cells, k), got shape {arr.shape}")
    if arr.size == 0:
        raise InputError(f"cell_dofs is empty (shape {arr.shape}): no cells or no dofs per cell")
    if arr.dtype == np.bool_ or arr.dtype.kind not in "iu":
        raise InputError(f"cell_dofs must hold integers, got dtype {arr.dtype}")
    m, k = arr.shape
    lo, hi = int(arr.min()), int(arr.max())
    if lo < 0:
        t, a = _first(arr < 0, k)
        raise InputError(f"cell {t} has a negative dof index {arr[t, a]} (local position {a})")
    if n_dofs is None:
        n = hi + 1
    else:
        if isinstance(n_dofs, (bool, np.bool_)):
            raise InputError(f"n_dofs must be an integer, got {n_dofs!r}")
        try:
            n = operator.index(n_dofs)
        except TypeError:
            raise InputError(f"n_dofs must be an integer, got {n_dofs!r}") from None
        if n < 1:
            raise InputError(f"n_dofs must be at least 1, got {n}")
    if n > np.iinfo(np.int64).max // 2:
        raise InputError(f"n_dofs = {n} is too large for int64 indices")
    if hi >= n:
        t, a = _first(arr >= n, k)
        raise InputError(
            f"cell {t} has dof index {arr[t, a]} (local position {a}), out of range "
            f"for n_dofs = {n}"
        )
    cells = np.ascontiguousarray(arr, dtype=_index_dtype(n, m * k))
    if (t := _jit_dofs.first_repeat(cells)) >= 0:
        row = cells[t].tolist()
        a = next(b for b in range(k) if row[b] in row[:b])
        raise InputError(
            f"cell {t} lists dof {row[a]} twice (local positions {row.index(row[a])} and "
            f"{a}); a dof may appear once per cell"
        )
    return cells, n


def _index_dtype(*counts):
    # looked up at call time, so that tests can lower the int32 limit
    return core_index.index_dtype(*counts)


def build_dof_plan(cells, n):
    """Symbolic phase for a validated (M, k) table ``cells`` over ``n`` dofs (only read)."""
    m, k = cells.shape
    dt = cells.dtype
    ptr = np.empty(n + 1, dtype=dt)
    codes = np.empty(m * k, dtype=dt)
    _jit_dofs.incidence(cells, ptr, codes)
    # two passes over the incidence, each row's distinct columns found by marks (one
    # row of n per chunk): count, then write each row sorted in place with its slots
    nchunks = numba.get_num_threads()
    stamps = np.full((nchunks, n), -1, dtype=dt)
    counts = np.empty(n, dtype=dt)
    _jit_dofs.pattern_counts(cells, ptr, codes, counts, stamps)
    nnz = int(counts.sum(dtype=np.int64))
    wide = np.promote_types(dt, _index_dtype(nnz))
    if wide != dt:
        # more stored entries than int32 counts: every index array in int64
        dt = wide
        cells, ptr, codes = cells.astype(dt), ptr.astype(dt), codes.astype(dt)
        stamps = stamps.astype(dt)
    indptr = np.zeros(n + 1, dtype=dt)
    np.cumsum(counts, out=indptr[1:])
    del counts
    indices = np.empty(nnz, dtype=dt)
    slots = np.empty((m * k, k), dtype=dt)
    stamps.fill(-1)  # the first pass left row numbers in them
    _jit_dofs.pattern_rows(cells, ptr, codes, indptr, indices, slots, stamps,
                           np.empty((nchunks, n), dtype=dt))
    del stamps
    colour = _jit_colour_blocks(cells, n, BLOCK_CELLS)
    colour_ptr = blocks = None
    if not (colour.size and colour[0] < 0):
        blocks = np.argsort(colour, kind="stable").astype(np.int64)
        colour_ptr = np.zeros(int(colour.max(initial=-1)) + 2, dtype=np.int64)
        np.cumsum(np.bincount(colour), out=colour_ptr[1:])
    return DofPlan(n, k, indptr, indices, ptr, codes, slots, BLOCK_CELLS, colour_ptr, blocks)


def _element_array(values, shape, name):
    """``values`` as C-contiguous float64 of ``shape``, checked finite (a copy only if needed)."""
    try:
        arr = np.asarray(values)
    except (ValueError, TypeError) as exc:
        raise InputError(f"{name} must be a real array of shape {shape}: {exc}") from None
    if arr.dtype == np.bool_ or arr.dtype.kind not in "fiu":
        raise InputError(f"{name} must hold real numbers, got dtype {arr.dtype}")
    if arr.shape != shape:
        raise InputError(f"{name} has shape {arr.shape}, expected {shape}")
    arr = np.ascontiguousarray(arr, dtype=np.float64)
    if not _all_finite(arr):
        cell_bad = ~np.isfinite(arr).reshape(shape[0], -1)
        t, p = _first(cell_bad, cell_bad.shape[1])
        where = np.unravel_index(p, shape[1:])
        local = where[0] if len(where) == 1 else tuple(int(w) for w in where)
        raise InputError(
            f"{name}: cell {t} has a non-finite entry {arr[(t, *where)]} at local {local}"
        )
    return arr


def _all_finite(arr):
    # a NaN or inf anywhere makes the sum one; a finite sum proves every entry finite
    with np.errstate(over="ignore", invalid="ignore"):
        return bool(np.isfinite(arr.sum())) or bool(np.isfinite(arr).all())


def _refuse_overflow(data, plan):
    """Finite element values whose sums leave float64 are refused, never returned as inf."""
    if _all_finite(data):
        return
    s = int(np.argmax(~np.isfinite(data)))
    row = int(np.searchsorted(plan.indptr, s, side="right")) - 1
    raise InputError(
        f"assembled entry ({row}, {plan.indices[s]}) overflows float64 (its element "
        "values are finite, their sum is not): scale the element values down"
    )


class DofAssembler:
    """Assemble element matrices and vectors of any cell type into canonical scipy CSR.

    The caller computes the element matrices (any element, any number ``k``
    of degrees of freedom per cell); this class adds them up.  The table is
    validated and the CSR pattern, slot plan and a colouring of blocks of
    cells are built once, here; each :meth:`matrix` call then runs only a
    parallel scatter by coloured blocks (or, for a table needing more than
    64 colours, a row-owned gather), each :meth:`vector` call a row-owned
    gather: race-free, with the same bits for any thread count.

    Parameters
    ----------
    cell_dofs : array_like of int, shape (n_cells, k)
        Global dof index of each cell's local dof ``a``.  A dof may not
        appear twice in one cell.  Not modified, and not kept.
    n_dofs : int, optional
        Number of dofs (rows of the matrix); default ``cell_dofs.max() + 1``.
        A dof in no cell gets an empty row.

    Raises
    ------
    InputError
        Naming the cell and the index: negative, out of range, repeated in
        a cell; or a wrong shape or dtype, or an empty table.

    Examples
    --------
    Linear elements on three intervals of length 1 (two dofs per cell):

    >>> import numpy as np
    >>> import hatkernels
    >>> assembler = hatkernels.DofAssembler([[0, 1], [1, 2], [2, 3]])
    >>> K = np.tile([[1.0, -1.0], [-1.0, 1.0]], (3, 1, 1))
    >>> assembler.matrix(K).toarray()
    array([[ 1., -1.,  0.,  0.],
           [-1.,  2., -1.,  0.],
           [ 0., -1.,  2., -1.],
           [ 0.,  0., -1.,  1.]])
    >>> assembler.vector(np.full((3, 2), 0.5))
    array([0.5, 1. , 1. , 0.5])
    """

    def __init__(self, cell_dofs, n_dofs=None):
        cells, n = _check_cell_dofs(cell_dofs, n_dofs)
        self.n_cells, self.dofs_per_cell = cells.shape
        self.n_dofs = n
        self._plan = build_dof_plan(cells, n)

    @property
    def plan(self):
        """The :class:`DofPlan`, built once and used by every call."""
        return self._plan

    @property
    def nbytes(self):
        """Bytes the plan keeps between calls."""
        return self._plan.nbytes

    def matrix(self, element_matrices):
        """The assembled matrix ``A = sum over cells of P_t^T K_t P_t``, canonical CSR.

        Parameters
        ----------
        element_matrices : array_like, shape (n_cells, k, k)
            Real, finite; not necessarily symmetric.  Row ``a``, column ``b``
            of cell ``t`` is added into entry ``(cell_dofs[t, a], cell_dofs[t, b])``.

        Returns
        -------
        scipy.sparse.csr_matrix, shape (n_dofs, n_dofs)
            Sorted indices, no duplicates; every pair of dofs that share a
            cell is stored, even where the sum is zero.  Its arrays are its
            own (the plan is not shared).
        """
        pl = self._plan
        K = _element_array(
            element_matrices, (self.n_cells, pl.k, pl.k), "element_matrices"
        )
        data = np.empty(pl.nnz)
        if pl.colour_ptr is not None:
            # coloured blocks of cells: each element matrix and its slots read once, in
            # order (measured about twice as fast as the row gather on tetrahedra)
            _jit_dofs.scatter_matrix(pl.slots, K, pl.block_size, pl.colour_ptr, pl.blocks, data)
        else:
            _jit_dofs.gather_matrix(pl.indptr, pl.ptr, pl.codes, pl.slots, K, data)
        _refuse_overflow(data, pl)
        return pl.matrix(data)

    def vector(self, element_vectors):
        """The assembled vector ``b_i = sum of element_vectors[t, a] over cell_dofs[t, a] = i``.

        ``element_vectors``: real, finite, shape (n_cells, k).  Returns (n_dofs,) float64.
        """
        pl = self._plan
        F = _element_array(element_vectors, (self.n_cells, pl.k), "element_vectors")
        out = np.empty(self.n_dofs)
        _jit_dofs.gather_vector(pl.ptr, pl.codes, F, out)
        if not _all_finite(out):
            i = int(np.argmax(~np.isfinite(out)))
            raise InputError(
                f"assembled entry {i} overflows float64 (its element values are finite, "
                "their sum is not): scale the element values down"
            )
        return out

    def __repr__(self):
        return (
            f"DofAssembler({self.n_cells} cells, {self.dofs_per_cell} dofs per cell, "
            f"{self.n_dofs} dofs, {self._plan.nnz} entries, {self._plan.dtype} indices)"
        )
