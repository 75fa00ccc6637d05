"""The ``csr`` strategy: symbolic phase once, then a parallel, race-free numeric phase."""

from typing import NamedTuple

import numba
import numpy as np

from hatkernels._jit import assembly as _jit_assembly
from hatkernels._jit import scatter as _jit_scatter
from hatkernels.assembly.elements import mass_values
from hatkernels.assembly.plan import build_plan
from hatkernels.coefficients import triangle_means
from hatkernels.mesh.colouring import block_size_for, triangle_colouring


class KernelCoefficient(NamedTuple):
    """A stiffness coefficient as the raw kernels take it, in their argument order.

    Cell ``t`` (triangle, d = 2, or tetrahedron, d = 3) uses ``kappa[t * kappa_step]``
    and, when ``tensor`` is not empty, the d x d matrix ``tensor[t * tensor_step]``:
    a step of 0 is one value for every cell, 1 a value per cell.  Pass it to a kernel as
    ``*coefficient``; everywhere else use the names.

    Attributes
    ----------
    kappa : ndarray, shape (1,) or (n_cells,)
        The scalar coefficient (ones for a tensor coefficient).
    kappa_step : int
    tensor : ndarray, shape (0, d, d), (1, d, d) or (n_cells, d, d)
        Empty for a scalar coefficient.
    tensor_step : int
    """

    kappa: np.ndarray
    kappa_step: int
    tensor: np.ndarray
    tensor_step: int

    @property
    def is_tensor(self):
        return self.tensor.shape[0] > 0

    @property
    def nbytes(self):
        """Bytes of the stored values."""
        return self.kappa.nbytes + self.tensor.nbytes


def kernel_coefficient(coef, mesh, quadrature):
    """The kernels' view of a parsed stiffness coefficient: a :class:`KernelCoefficient`."""
    empty = np.empty((0, 2, 2))
    if coef.kind == "tensor":
        T = np.ascontiguousarray(coef.value, dtype=np.float64).reshape(-1, 2, 2)
        return KernelCoefficient(np.ones(1), 0, T, 1 if coef.value.ndim == 3 else 0)
    mean = triangle_means(coef, mesh, quadrature)
    if np.ndim(mean) == 0:
        return KernelCoefficient(np.array([float(mean)]), 0, empty, 0)
    return KernelCoefficient(np.ascontiguousarray(mean, dtype=np.float64), 1, empty, 0)


class CSRNumeric:
    """Numeric phases on a :class:`~hatkernels.assembly.plan.CSRPlan`.

    The stiffness goes in element by element over coloured blocks, triangles that
    share an edge in pairs (:func:`~hatkernels._jit.scatter.scatter_scalar`; a
    :class:`ScatterPlan` of about 23 bytes per triangle, kept after the first
    call).  ``fused=True`` fills it row by row instead, recomputing each
    triangle's geometry at each of its vertices, with nothing stored beyond the
    plan (slower; see docs/assembly.md); ``by_rows=True`` fills it row by row
    from stored element values (the bits of the fused order).
    """

    def __init__(self, mesh, plan=None, *, fused=False, by_rows=False):
        self.mesh = mesh
        self.plan = build_plan(mesh) if plan is None else plan
        self.fused = fused
        self._scatter = False if by_rows else None

    def stiffness_data(self, coef, quadrature, out=None):
        pl, m = self.plan, self.mesh
        data = np.empty(pl.nnz) if out is None else out
        kc = kernel_coefficient(coef, m, quadrature)
        if self.fused:
            _jit_assembly.gather_stiffness(m.points, pl.triangles, *kc, pl.indptr, pl.indices,
                                           pl.diag, pl.ptr, pl.codes, data)
            return data
        scatter = self._scatter_plan()
        if scatter is not None:
            kernel = _jit_scatter.scatter_tensor if kc.is_tensor else _jit_scatter.scatter_scalar
            kernel(m.points, pl.triangles, *kc, pl.diag, *scatter[:-1], scatter.colouring.ptr,
                   scatter.colouring.blocks, data)
            return data
        d = np.empty((m.n_triangles, 3))
        o = np.empty((m.n_triangles, 3))
        _jit_assembly.stiffness_values(m.points, pl.triangles, *kc, d, o)
        self._gather(d, o, data)
        return data

    def stiffness_reduced(self, coef, quadrature, newindex, free, g, b, rindptr, rindices, rdata,
                          rb):
        """The free rows straight into a reduced system (the ``fill`` of
        :func:`hatkernels.boundary.apply_dirichlet_assembling`), with the bits of ``fused``."""
        pl, m = self.plan, self.mesh
        kc = kernel_coefficient(coef, m, quadrature)
        return _jit_assembly.gather_stiffness_reduced(
            m.points, pl.triangles, *kc, pl.indptr, pl.indices, pl.diag, pl.ptr, pl.codes,
            newindex, free, g, b, rindptr, rindices, rdata, rb, numba.get_num_threads())

    def _scatter_plan(self):
        """The :class:`ScatterPlan`, made on first use and kept, or None when the
        triangles need more than 64 colours (then the row-by-row gather serves)."""
        if self._scatter is None:
            pl, m = self.plan, self.mesh
            colouring = triangle_colouring(pl.triangles, m.n_points, block_size_for(m.n_cells))
            if colouring is None:
                self._scatter = False
                return None
            # the plan's slots are by incidence (row order); here by triangle, as offsets
            # from the row's diagonal (a row holds its neighbours: int16 always suffices
            # below 32768 neighbours, checked), 12 bytes per triangle
            rows = pl.triangles.ravel()[pl.codes]  # the point of each incidence
            near = pl.diag[rows]
            nxt = pl.slot_next - near
            prv = pl.slot_prev - near
            lim = np.iinfo(np.int16)
            if min(nxt.min(initial=0), prv.min(initial=0)) < lim.min or max(
                    nxt.max(initial=0), prv.max(initial=0)) > lim.max:
                self._scatter = False
                return None
            slots = np.empty((m.n_triangles, 3, 2), dtype=np.int16)
            flat = slots.reshape(-1, 2)
            flat[pl.codes, 0] = nxt
            flat[pl.codes, 1] = prv
            self._scatter = scatter_plan(pl.triangles, pl.diag, slots.reshape(-1, 6),
                                         colouring, pl.nnz)
        return self._scatter or None

    def mass_data(self, coef, quadrature, out=None):
        d, o = mass_values(self.mesh, coef, quadrature)
        data = np.empty(self.plan.nnz) if out is None else out
        self._gather(np.ascontiguousarray(d), np.ascontiguousarray(o), data)
        return data

    def _gather(self, d, o, data):
        pl = self.plan
        _jit_assembly.gather_values(
            pl.indptr, pl.diag, pl.ptr, pl.codes, pl.slot_next, pl.slot_prev, d, o, data
        )


class ScatterPlan(NamedTuple):
    """Pairs and singles of each block, for :func:`~hatkernels._jit.scatter.scatter_scalar`
    (its arguments from ``pair_ptr`` to ``single_first``, in that order, then the colouring's).

    Block ``b``'s pairs are ``pair_ptr[b]:pair_ptr[b + 1]``, its singles
    ``single_ptr[b]:single_ptr[b + 1]``.  A pair is two triangles of the block
    that share an edge, stored as points ``(a, u, v, q)`` (triangles ``(a, u,
    v)`` and ``(q, v, u)``), its two triangles' numbers (for per-triangle
    coefficients), ten entry offsets from the rows' diagonals and the bits of
    the entries it starts; a single is a triangle's number, six offsets and its
    bits.  About 23 bytes per paired triangle, 17 per single.
    """

    pair_ptr: np.ndarray
    quads: np.ndarray
    cells: np.ndarray
    pair_slots: np.ndarray
    pair_first: np.ndarray
    single_ptr: np.ndarray
    singles: np.ndarray
    single_slots: np.ndarray
    single_first: np.ndarray
    colouring: object

    @property
    def n_pairs(self):
        return self.quads.shape[0]

    @property
    def nbytes(self):
        return sum(a.nbytes for a in self[:-1]) + self.colouring.nbytes


def scatter_plan(triangles, diag, slots, colouring, nnz):
    """The :class:`ScatterPlan` of ``triangles`` (counterclockwise, int32) whose
    entries lie at ``diag`` of each row plus ``slots`` (per triangle, int16, in the
    order of :func:`~hatkernels._jit.scatter.fill_pairs`)."""
    size, m = colouring.block_size, triangles.shape[0]
    partner, per_block_pairs, per_block_singles = _jit_scatter.pair_cells(
        triangles, size, _jit_scatter.PAIR_WINDOW)
    pair_ptr = np.zeros(per_block_pairs.size + 1, dtype=np.int64)
    single_ptr = np.zeros(per_block_pairs.size + 1, dtype=np.int64)
    np.cumsum(per_block_pairs, out=pair_ptr[1:])
    np.cumsum(per_block_singles, out=single_ptr[1:])
    n_pairs, n_singles = int(pair_ptr[-1]), int(single_ptr[-1])
    # points in the triangles' own index type; triangle numbers in int32 while they fit
    cell_type = np.int32 if m <= np.iinfo(np.int32).max else np.int64
    quads = np.empty((n_pairs, 4), dtype=triangles.dtype)
    cells = np.empty((n_pairs, 2), dtype=cell_type)
    pair_slots = np.empty((n_pairs, 10), dtype=np.int16)
    singles = np.empty(n_singles, dtype=cell_type)
    single_slots = np.empty((n_singles, 6), dtype=np.int16)
    _jit_scatter.fill_pairs(triangles, slots, partner, size, pair_ptr, single_ptr, quads, cells,
                            pair_slots, singles, single_slots)
    del partner
    pair_first, single_first = _jit_scatter.scatter_first(
        triangles, diag, pair_ptr, quads, pair_slots, single_ptr, singles, single_slots,
        colouring.ptr, colouring.blocks, nnz)
    return ScatterPlan(pair_ptr, quads, cells, pair_slots, pair_first, single_ptr, singles,
                       single_slots, single_first, colouring)
