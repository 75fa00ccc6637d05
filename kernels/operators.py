"""Matrix-free stiffness operator: ``A @ x`` without a stored matrix.

Three variants, all race-free and giving the same bits on any thread count
(see :mod:`hatkernels._jit.operators`):

``geometry``
    recomputes each triangle's geometry from the coordinates at every
    product; stores nothing beyond the mesh but a colouring of blocks
    (and the coefficient, 8 bytes per triangle when it varies).
``factors``
    stores the three off-diagonal element entries per triangle (24 bytes per
    triangle): no geometry at product time.
``edges``
    stores one weight per edge (the cotangent formula summed over the edge's
    triangles) and the edge list by first point (an end point per edge, a
    start per point): 12 bytes per edge and 4 per point, about 20 per
    triangle, 0.45 of the CSR matrix; the product no longer needs the
    triangles.

docs/matrix-free.md has the measured speeds; :data:`DEFAULT_VARIANT` is
the one the benchmark picked.
"""

from __future__ import annotations

import time
import warnings

import numpy as np
from scipy.sparse.linalg import LinearOperator

from hatkernels._jit import assembly as _jit_assembly
from hatkernels._jit import operators as _jit_ops
from hatkernels._sets import index_union
from hatkernels.assembly.csr import kernel_coefficient
from hatkernels.coefficients import parse_coefficient
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh
from hatkernels.mesh.core_index import index_dtype

__all__ = ["StiffnessOperator", "VARIANTS", "DEFAULT_VARIANT"]

_KERNEL_NAMES = {
    "serial": "product_serial",
    "values": "offdiagonal_values",
    "fixed_columns": "remove_fixed_columns",
}

VARIANTS = ("geometry", "factors", "edges")
DEFAULT_VARIANT = "geometry"
DEFAULT_BLOCK = 1024


def _colouring(elements, n_points, block_size):
    """Blocks of one colour, colour by colour: ``(colour_ptr, blocks)``, or None if > 64 colours."""
    return _colouring_of(_jit_ops.colour_blocks(elements, n_points, block_size))


def _colouring_of(colour):
    """``(colour_ptr, blocks)`` from a colour per block, or None if the colouring failed."""
    if colour.size and colour[0] < 0:
        return None
    order = np.argsort(colour, kind="stable")
    counts = np.bincount(colour, minlength=int(colour.max(initial=-1)) + 1)
    ptr = np.zeros(counts.size + 1, dtype=np.int64)
    np.cumsum(counts, out=ptr[1:])
    return ptr, order.astype(np.int64)


def _dirichlet_mask(mesh, dirichlet):
    """Fixed indices: identity rows at ``dirichlet`` and at points in no triangle."""
    if dirichlet is None:
        return np.empty(0, dtype=np.int64)
    d = np.asarray(dirichlet)
    if d.ndim != 1 or (d.size and d.dtype.kind not in "iu"):
        raise InputError(
            f"dirichlet must be a 1-D array of point indices, got {d.dtype} {d.shape}"
        )
    d = d.astype(np.int64)
    if d.size and (d.min() < 0 or d.max() >= mesh.n_points):
        k = int(np.flatnonzero((d < 0) | (d >= mesh.n_points))[0])
        raise InputError(f"dirichlet[{k}] = {d[k]} is outside 0..{mesh.n_points - 1}")
    return index_union(mesh.n_points, d, mesh.unused_points())


class StiffnessOperator(LinearOperator):
    """The P1 stiffness matrix of a mesh as a scipy ``LinearOperator``, never assembled.

    Parameters
    ----------
    mesh : Mesh
    coefficient : any kind accepted by :func:`hatkernels.assemble_stiffness`
    variant : {"geometry", "factors", "edges"}
    dirichlet : array of point indices, optional
        With it, the operator is the symmetrically eliminated matrix: identity
        rows and columns at these points (and at points in no triangle), the
        stiffness matrix between the others.  The mesh is not copied.
    quadrature : int
        Rule for averaging a callable coefficient over each triangle.
    block_size : int
        Elements per block of the colouring.

    Examples
    --------
    >>> import numpy as np, hatkernels
    >>> m = hatkernels.mesh.rectangle(16, 16)
    >>> A = hatkernels.StiffnessOperator(m)
    >>> x = np.random.default_rng(0).random(m.n_points)
    >>> bool(np.allclose(A @ x, hatkernels.assemble_stiffness(m) @ x))
    True
    """

    def __init__(
        self,
        mesh,
        coefficient=None,
        *,
        variant=DEFAULT_VARIANT,
        dirichlet=None,
        quadrature=2,
        block_size=DEFAULT_BLOCK,
    ):
        if not isinstance(mesh, Mesh):
            raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
        if variant not in VARIANTS:
            raise InputError(f"unknown matrix-free variant {variant!r}; choose one of {VARIANTS}")
        if not isinstance(block_size, int) or block_size < 1:
            raise InputError(f"block_size must be a positive integer, got {block_size!r}")
        t0 = time.perf_counter()
        n = mesh.n_points
        super().__init__(dtype=np.dtype(np.float64), shape=(n, n))
        self.mesh = mesh
        self.variant = variant
        self.block_size = block_size
        self.coefficient = parse_coefficient(coefficient, mesh, name="coefficient", tensor=True)
        self._quadrature = quadrature
        self._kc = kernel_coefficient(self.coefficient, mesh, quadrature)
        self._fixed = _dirichlet_mask(mesh, dirichlet)
        self._diag = None
        self._serial = False
        self._is_fixed = np.zeros(n if self._fixed.size else 0, dtype=np.bool_)
        self._is_fixed[self._fixed] = True
        self._near = (
            np.flatnonzero(self._is_fixed[mesh.triangles].any(axis=1))
            if self._fixed.size
            else np.empty(0, dtype=np.int64)
        )
        col = _colouring(mesh.triangles, n, block_size)
        if col is None and variant == "geometry":
            warnings.warn(
                "matrix-free product: the mesh needs more than 64 colours (a point in very many "
                "triangles, or a numbering with no locality); products run on one thread. "
                "Reorder the mesh (Mesh.reorder('hilbert')) to fix this.",
                RuntimeWarning,
                stacklevel=2,
            )
            self._serial = True
            col = (np.zeros(1, dtype=np.int64), np.zeros(0, dtype=np.int64))
        elif col is None:
            raise InputError(
                f"the {variant} variant needs a colouring with at most 64 colours; reorder the "
                "mesh (Mesh.reorder('hilbert')) or use variant='geometry'"
            )
        self._colour_ptr, self._blocks = col
        if variant == "factors":
            self._ovals = np.empty((mesh.n_triangles, 3))
            self._kernel("values")(mesh.points, mesh.triangles, *self._kc, self._ovals)
        if variant == "edges":
            cached = set(mesh._cache)
            edges = mesh.edges()
            weights = np.empty(len(edges))
            self._kernel("edge_weights")(
                mesh.points, mesh.triangles, *self._kc, block_size, self._colour_ptr,
                self._blocks, mesh.triangle_edges(), weights,
            )
            # the sorted edge list by first point: a start per point, an end per edge
            # (int64 once the edge count passes int32, even if the point count does not)
            self._starts = np.zeros(n + 1, dtype=index_dtype(len(edges), n + 1))
            np.cumsum(np.bincount(edges[:, 0], minlength=n), out=self._starts[1:])
            self._ends = np.ascontiguousarray(edges[:, 1])
            self._weights = weights
            for key in set(mesh._cache) - cached:
                # edge topology the products do not need (12 to 20 bytes per triangle)
                mesh._cache.pop(key, None)
            del edges
            # blocks of rows holding about block_size edges (three per row in 2-D)
            self._rows_per_block = max(1, block_size // 3)
            ecol = _colouring_of(
                _jit_ops.colour_row_blocks(self._starts, self._ends, n, self._rows_per_block)
            )
            if ecol is None:
                raise InputError(
                    "the edges variant needs a colouring of edges with at most 64 colours; "
                    "reorder the mesh (Mesh.reorder('hilbert')) or use variant='geometry'"
                )
            self._edge_colour_ptr, self._edge_blocks = ecol
        self.setup_time = time.perf_counter() - t0

    # -- what the operator stores ------------------------------------------------

    def _kernel(self, name):
        if name == "product":
            scalar = self._kc[2].shape[0] == 0
            return _jit_ops.product_scalar if scalar else _jit_ops.product_tensor
        return getattr(_jit_ops, _KERNEL_NAMES.get(name, name))

    def _element_values(self):
        m = self.mesh
        d = np.empty((m.n_triangles, 3))
        o = np.empty((m.n_triangles, 3))
        _jit_assembly.stiffness_values(m.points, m.triangles, *self._kc, d, o)
        return d, o

    @property
    def n_colours(self):
        """Colours of the element blocks the products run through."""
        if self.variant == "edges":
            return self._edge_colour_ptr.size - 1
        return self._colour_ptr.size - 1

    @property
    def nbytes(self):
        """Bytes the operator stores beyond the mesh it refers to."""
        parts = [self._colour_ptr, self._blocks, self._fixed, self._is_fixed, self._near]
        kappa, _, tensor, _ = self._kc
        parts += [kappa, tensor]
        if self.variant == "factors":
            parts.append(self._ovals)
        if self.variant == "edges":
            parts += [self._starts, self._ends, self._weights, self._edge_colour_ptr,
                      self._edge_blocks]
        return int(sum(a.nbytes for a in parts))

    def __repr__(self):
        return (
            f"StiffnessOperator({self.shape[0]} points, variant={self.variant}, "
            f"{self.n_colours} colours of {self.block_size}-element blocks, "
            f"{self.nbytes / 2**20:.1f} MiB stored, {len(self._fixed)} identity rows)"
        )

    # -- products ------------------------------------------------------------------

    def matvec_into(self, x, out):
        """``out = A x`` with no allocation; ``x`` must be float64, contiguous, length n."""
        self._product(x, out)
        if self._fixed.size:
            # identity rows and columns: take the fixed columns back out (only
            # the triangles next to fixed points), then the fixed rows copy x
            m = self.mesh
            self._kernel("fixed_columns")(
                m.points, m.triangles, *self._kc, self._near, self._is_fixed, x, out
            )
            _jit_ops.identity_rows(self._fixed, x, out)
        return out

    def unmasked_matvec(self, x):
        """``K x`` with the plain stiffness matrix (no identity rows): for lifting boundary values."""
        x = np.ascontiguousarray(np.ravel(x), dtype=np.float64)
        out = np.empty(self.shape[0])
        self._product(x, out)
        return out

    def _product(self, x, out):
        m = self.mesh
        if self._serial:
            self._kernel("serial")(m.points, m.triangles, *self._kc, x, out)
        elif self.variant == "geometry":
            self._kernel("product")(
                m.points, m.triangles, *self._kc, self.block_size, self._colour_ptr,
                self._blocks, x, out,
            )
        elif self.variant == "factors":
            _jit_ops.apply_factors(
                m.triangles, self._ovals, self.block_size, self._colour_ptr, self._blocks, x, out
            )
        else:
            _jit_ops.apply_edges(
                self._starts, self._ends, self._weights, self._rows_per_block, self._edge_colour_ptr,
                self._edge_blocks, x, out,
            )

    def _matvec(self, x):
        x = np.ascontiguousarray(np.ravel(x), dtype=np.float64)
        return self.matvec_into(x, np.empty(self.shape[0]))

    def _rmatvec(self, x):
        return self._matvec(x)  # symmetric

    def serial_matvec(self, x):
        """The plain version of the product (one thread, no colouring), for testing."""
        m = self.mesh
        kappa, ks, tensor, ts = self._kc
        x = np.ascontiguousarray(np.ravel(x), dtype=np.float64)
        xm = x.copy()
        xm[self._fixed] = 0.0
        y = np.empty(self.shape[0])
        self._kernel("serial")(m.points, m.triangles, kappa, ks, tensor, ts, xm, y)
        y[self._fixed] = x[self._fixed]
        return y

    def diagonal(self):
        """The diagonal of the (masked) matrix, without assembling it (cached)."""
        if self._diag is None:
            m = self.mesh
            diag = np.empty(self.shape[0])
            if self._serial:
                # no usable colouring: triangle values, summed in order
                d, _ = self._element_values()
                diag = np.bincount(m.triangles.ravel(), weights=d.ravel(), minlength=self.shape[0])
            else:
                self._kernel("diagonal")(
                    m.points, m.triangles, *self._kc, self.block_size, self._colour_ptr,
                    self._blocks, diag,
                )
            diag[self._fixed] = 1.0
            self._diag = diag
        return self._diag

    def gershgorin_bound(self):
        """``max_i (A_ii + sum_j!=i |A_ij|) / A_ii``: an upper bound on the spectrum of ``D^-1 A``.

        Guaranteed (Gershgorin's circle theorem); exactly 2 when no
        off-diagonal entry is positive (meshes without obtuse angle pairs).
        """
        return self.diagonal_and_bound()[1]

    def diagonal_and_bound(self):
        """``(diagonal, gershgorin_bound)`` in one pass over the triangles.

        The diagonal is a new array (not the cached one of :meth:`diagonal`),
        the caller's to keep or overwrite: what a smoother needs, without a
        second copy.
        """
        m = self.mesh
        n = self.shape[0]
        if self._serial:
            d, o = self._element_values()
            rows = np.abs(o)
            diag = np.bincount(m.triangles.ravel(), weights=d.ravel(), minlength=n)
            off = np.bincount(
                m.triangles.ravel(),
                weights=(np.roll(rows, -1, axis=1) + np.roll(rows, 1, axis=1)).ravel(),
                minlength=n,
            )
        else:
            diag, off = np.empty(n), np.empty(n)
            _jit_ops.diagonal_and_offsum(
                m.points, m.triangles, *self._kc, self.block_size, self._colour_ptr,
                self._blocks, diag, off,
            )
        diag[self._fixed] = 1.0
        # fixed rows are identity; removing the fixed columns only lowers free rows' sums
        off[self._fixed] = 0.0
        off += diag
        off /= diag
        return diag, float(off.max(initial=1.0))

    @property
    def fixed(self):
        """Points with identity rows (Dirichlet points and points in no triangle)."""
        return self._fixed
