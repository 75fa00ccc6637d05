"""The matrix-free variants on tetrahedra: the interface of
:mod:`hatkernels.operators.variants`, with the kernels of
:mod:`hatkernels._jit.operators3d`.

``geometry``
    recomputes each tetrahedron's normals and determinant at every product
    (the gradient of ``u`` on the cell, then ``n_a . kappa G`` for each
    point); stores the colouring and a varying coefficient only.
``factors``
    stores the six off-diagonal element entries per tetrahedron (48 bytes).
``edges``
    stores one weight per unique edge (the sum over the edge's tetrahedra of
    their entry for its two points) and the edge list by first point: 12
    bytes per edge and 4 per point.

The diagonal, the row sums of ``|K_ij|`` and the correction for fixed
columns come from each tetrahedron's six off-diagonal entries, recomputed.
"""

from __future__ import annotations

import numpy as np

from hatkernels._jit import operators3d as _jit3
from hatkernels.assembly.csr import KernelCoefficient
from hatkernels.assembly.elements import _tetrahedron_means
from hatkernels.mesh.colouring import Colouring
from hatkernels.mesh.core_index import index_dtype
from hatkernels.operators.blocks import EdgeRows, ElementBlocks

__all__ = [
    "tetrahedron_coefficient",
    "TetrahedronBlocks",
    "TetrahedronGeometry",
    "SerialTetrahedronGeometry",
    "TetrahedronFactors",
    "TetrahedronEdges",
    "VARIANT_CLASSES",
]


def tetrahedron_coefficient(coef, mesh, quadrature):
    """The kernels' view of a parsed stiffness coefficient on tetrahedra.

    A :class:`~hatkernels.assembly.csr.KernelCoefficient` whose tensor, if
    any, is (1, 3, 3) or (n_cells, 3, 3); scalars are each cell's mean
    (exact for per-point values, by the rule of degree ``quadrature`` for
    callables), as in the assembly.
    """
    empty = np.empty((0, 3, 3))
    if coef.kind == "tensor":
        T = np.ascontiguousarray(coef.value, dtype=np.float64).reshape(-1, 3, 3)
        return KernelCoefficient(np.ones(1), 0, T, 1 if coef.value.ndim == 3 else 0)
    mean = _tetrahedron_means(mesh.points, mesh.cells, coef, quadrature)
    if np.ndim(mean) == 0:
        return KernelCoefficient(np.array([float(mean)]), 0, empty, 0)
    return KernelCoefficient(np.ascontiguousarray(mean, dtype=np.float64), 1, empty, 0)


class TetrahedronBlocks(ElementBlocks):
    """The tetrahedron variants' setup kernels: diagonal, row sums, fixed columns.

    Parameters as :class:`~hatkernels.operators.blocks.ElementBlocks`.
    """

    def _diagonal_into(self, out):
        self._diagonal(out, np.empty(0), False)

    def diagonal_and_offsum(self, diag, off):
        self._diagonal(diag, off, True)

    def _diagonal(self, diag, off, with_off):
        m = self.mesh
        _jit3.diagonal_and_offsum(m.points, m.cells, *self.coefficient, *self.colouring,
                                  diag, off, with_off)

    def remove_fixed_columns(self, near, is_fixed, x, out):
        m = self.mesh
        _jit3.remove_fixed_columns(m.points, m.cells, *self.coefficient, near, is_fixed, x, out)


class SerialTetrahedronGeometry(TetrahedronBlocks):
    """The geometry variant on one thread, for meshes whose cells need > 64 colours.

    One block of all the cells: the same kernels, run by one thread.
    """

    name = "geometry"

    def __init__(self, mesh, coefficient, colouring=None):
        one = Colouring(max(1, mesh.n_cells), np.array([0, 1], dtype=np.int64),
                        np.zeros(1, dtype=np.int64))
        super().__init__(mesh, coefficient, one)
        self._kernel = _jit3.product_tensor if coefficient.is_tensor else _jit3.product_scalar

    def product(self, x, out):
        m = self.mesh
        self._kernel(m.points, m.cells, *self.coefficient, *self.colouring, x, out)

    def serial_product(self, x, out):
        m = self.mesh
        _jit3.product_serial(m.points, m.cells, *self.coefficient, x, out)


class TetrahedronGeometry(SerialTetrahedronGeometry):
    """Recomputes each tetrahedron's geometry at every product; stores only the colouring
    (and the coefficient, 8 bytes per cell when it varies)."""

    fallback = SerialTetrahedronGeometry

    def __init__(self, mesh, coefficient, colouring):
        super().__init__(mesh, coefficient)
        self.colouring = colouring


class TetrahedronFactors(TetrahedronBlocks):
    """Stores the six off-diagonal element entries per tetrahedron (48 bytes per cell)."""

    name = "factors"

    def __init__(self, mesh, coefficient, colouring):
        super().__init__(mesh, coefficient, colouring)
        self.offdiagonals = np.empty((mesh.n_cells, 6))
        _jit3.offdiagonal_values(mesh.points, mesh.cells, *coefficient, self.offdiagonals)

    @property
    def nbytes(self):
        return super().nbytes + self.offdiagonals.nbytes

    def product(self, x, out):
        _jit3.apply_factors(self.mesh.cells, self.offdiagonals, *self.colouring, x, out)

    def serial_product(self, x, out):
        # (K_T x)_a = sum over b != a of K_ab (x_b - x_a), pairs 01, 02, 03, 12, 13, 23
        t = self.mesh.cells
        o = self.offdiagonals
        pairs = np.array([[0, 1], [0, 2], [0, 3], [1, 2], [1, 3], [2, 3]])
        d = o * (x[t[:, pairs[:, 1]]] - x[t[:, pairs[:, 0]]])  # (M, 6): K_ab (x_b - x_a)
        out[:] = np.bincount(t[:, pairs[:, 0]].ravel(), weights=d.ravel(), minlength=out.size)
        out -= np.bincount(t[:, pairs[:, 1]].ravel(), weights=d.ravel(), minlength=out.size)


class TetrahedronEdges(EdgeRows, TetrahedronBlocks):
    """Stores one weight per unique edge and the edge list by first point; the product
    needs no cells.  12 bytes per edge and 4 per point."""

    name = "edges"
    # the default on tetrahedra: a mesh numbered with no locality still gets a product
    fallback = SerialTetrahedronGeometry

    def __init__(self, mesh, coefficient, colouring):
        super().__init__(mesh, coefficient, colouring)
        n = mesh.n_points
        # the edge list by first point straight from the cells (no (M, 6) edge numbers):
        # the rows of unique_edges, in its order
        starts = np.empty(n + 1, dtype=np.int64)
        ends = _jit3.edge_rows(mesh.cells, n, starts)
        starts = starts.astype(index_dtype(len(ends), n + 1))
        weights = np.empty(len(ends))
        _jit3.edge_weights(mesh.points, mesh.cells, *coefficient, *colouring, starts, ends,
                           weights)
        # blocks of rows holding about as many edges as a block of cells (on the
        # cuboid: 7 edges per row, 6 cells per point)
        self._store_rows(starts, ends, weights, n, colouring.block_size // 6)


#: The tetrahedron classes by variant name, in the order of the triangle ones.
VARIANT_CLASSES = {cls.name: cls for cls in
                   (TetrahedronGeometry, TetrahedronFactors, TetrahedronEdges)}
