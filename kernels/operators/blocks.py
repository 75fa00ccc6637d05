"""What the variants of both dimensions share: the base class, and the edge list by rows.

:class:`ElementBlocks` holds the mesh, the coefficient and the colouring of
blocks of cells; the triangle classes (:mod:`hatkernels.operators.variants`)
and the tetrahedron classes (:mod:`hatkernels.operators.variants3d`) add
their kernels.  :class:`EdgeRows` is the stored part of the ``edges``
variant, the same in 2-D and 3-D once the weights are computed.
"""

from __future__ import annotations

import numpy as np

from hatkernels._jit import operators as _jit_ops
from hatkernels.checks import into_vectors
from hatkernels.errors import InputError
from hatkernels.mesh.colouring import row_colouring
from hatkernels.mesh.core_index import index_dtype

__all__ = ["ElementBlocks", "EdgeRows"]


class ElementBlocks:
    """The interface, and what every variant holds: the coefficient and a colouring of cells.

    Parameters
    ----------
    mesh : Mesh
    coefficient : KernelCoefficient
        From :func:`hatkernels.operators.variants.variant_coefficient`.
    colouring : Colouring
        Of blocks of consecutive cells (:func:`~hatkernels.mesh.colouring.triangle_colouring`).
    """

    #: The name :data:`~hatkernels.operators.variants.VARIANT_CLASSES` knows the class by.
    name = None
    #: The class to use when the cells need more than 64 colours (None: refuse).
    fallback = None

    def __init__(self, mesh, coefficient, colouring):
        self.mesh = mesh
        self.coefficient = coefficient
        self.colouring = colouring

    @property
    def n_colours(self):
        """Colours of the blocks the product runs through."""
        return self.colouring.n_colours

    @property
    def nbytes(self):
        """Bytes stored beyond the mesh."""
        return self.colouring.nbytes + self.coefficient.nbytes

    def product(self, x, out):
        """``out = K x`` (``x`` float64, contiguous, length n_points; ``out`` overwritten)."""
        raise NotImplementedError

    def serial_product(self, x, out):
        """``out = K x``, plainly: the version the product is tested against."""
        raise NotImplementedError

    def diagonal_into(self, out):
        """``out`` = the diagonal of ``K``; returns ``out``.  ``out`` must be a writable
        C-contiguous float64 ndarray of shape (n_points,), else an InputError names it
        (``hatkernels.checks.into_vectors``)."""
        into_vectors(f"{type(self).__name__}.diagonal_into", self.mesh.n_points, None,
                     {"out": out}, size="the mesh has {:,} points")
        self._diagonal_into(out)
        return out

    def _diagonal_into(self, out):
        raise NotImplementedError

    def __repr__(self):
        return f"{type(self).__name__}({self.n_colours} colours, {self.nbytes} bytes)"


class EdgeRows:
    """Mixin of the ``edges`` variants: one weight per edge and the edge list by first point.

    ``starts`` (a start per point and one more) and ``ends`` (an end per edge)
    hold the upper triangle of the matrix's pattern without the diagonal;
    ``(K x)_i = sum over edges (i, j) of w_ij (x_j - x_i)``, so the product
    needs no cells.  Blocks of rows are coloured as the cells are
    (``row_colouring``).  Put it before the cell class among the bases.
    """

    def _store_rows(self, starts, ends, weights, n_points, rows_per_block):
        """Keep the edge list by first point and its ``weights``; colour blocks of rows."""
        self.starts, self.ends, self.weights = starts, ends, weights
        self.row_colouring = row_colouring(starts, ends, n_points, max(1, rows_per_block))
        if self.row_colouring is None:
            raise InputError(
                "the edges variant needs a colouring of edges with at most 64 colours; "
                "reorder the mesh (Mesh.reorder('hilbert')) or use variant='geometry'"
            )

    @staticmethod
    def rows_of(edges, n_points):
        """``(starts, ends)`` of sorted unique ``edges`` (n_edges, 2), ``(low, high)`` pairs."""
        n = n_points
        # int64 once the edge count passes int32, even if the point count does not
        starts = np.zeros(n + 1, dtype=index_dtype(len(edges), n + 1))
        np.cumsum(np.bincount(edges[:, 0], minlength=n), out=starts[1:])
        return starts, np.ascontiguousarray(edges[:, 1])

    @property
    def n_colours(self):
        return self.row_colouring.n_colours

    @property
    def nbytes(self):
        own = self.starts.nbytes + self.ends.nbytes + self.weights.nbytes
        return super().nbytes + own + self.row_colouring.nbytes

    def product(self, x, out):
        _jit_ops.apply_edges(self.starts, self.ends, self.weights, *self.row_colouring, x, out)

    def serial_product(self, x, out):
        # (K x)_i = sum over edges (i, j) of w_ij (x_j - x_i)
        n = out.size
        first = np.repeat(np.arange(n), np.diff(self.starts))
        d = self.weights * (x[self.ends] - x[first])
        out[:] = np.bincount(first, weights=d, minlength=n) - np.bincount(
            self.ends, weights=d, minlength=n
        )
