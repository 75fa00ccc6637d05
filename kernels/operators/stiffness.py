"""The matrix-free stiffness operator: a scipy ``LinearOperator`` over one variant."""

from __future__ import annotations

import time

import numpy as np
from scipy.sparse.linalg import LinearOperator

from hatkernels._jit import operators as _jit_ops
from hatkernels._jit import sparse as _jit_sparse
from hatkernels._sets import index_union
from hatkernels.checks import integer_option, into_vectors, point_indices
from hatkernels.coefficients import parse_coefficient
from hatkernels.errors import InputError
from hatkernels.mesh.colouring import block_size_for
from hatkernels.mesh.core import Mesh
from hatkernels.operators.variants import (
    INHERITED,
    VARIANTS,
    build_variant,
    default_variant,
    preferred_variant,
    variant_coefficient,
)

__all__ = ["StiffnessOperator", "DEFAULT_BLOCK"]

#: Triangles per block of the colouring.
DEFAULT_BLOCK = 1024


def _dirichlet_mask(mesh, dirichlet):
    """Fixed indices: identity rows at ``dirichlet`` and at points in no cell."""
    if dirichlet is None:
        return np.empty(0, dtype=np.int64)
    d = point_indices(dirichlet, mesh.n_points, "dirichlet")
    return index_union(mesh.n_points, d, mesh.unused_points())


class StiffnessOperator(LinearOperator):
    """The P1 stiffness matrix of a mesh as a scipy ``LinearOperator``, never assembled.

    Parameters
    ----------
    mesh : Mesh
    coefficient : any kind accepted by :func:`hatkernels.assemble_stiffness`
    variant : {"geometry", "factors", "edges", "inherited"}, optional
        What is stored and how the product runs (see :mod:`hatkernels.operators`);
        default: ``inherited`` on triangle meshes made by :meth:`Mesh.refine`
        with a scalar coefficient (the fastest, storing least), else
        :data:`~hatkernels.operators.DEFAULT_VARIANT` (``geometry``) on
        triangles and :data:`~hatkernels.operators.DEFAULT_VARIANT_3D` (``edges``)
        on tetrahedra, the ones the benchmark picked
        (:func:`~hatkernels.operators.preferred_variant`).
    dirichlet : array of point indices, optional
        With it, the operator is the symmetrically eliminated matrix: identity
        rows and columns at these points (and at points in no cell), the
        stiffness matrix between the others.  The mesh is not copied.
    quadrature : int
        Rule for averaging a callable coefficient over each cell.
    block_size : int, optional
        Elements per block of the colouring: default :data:`DEFAULT_BLOCK`, or
        for the ``inherited`` variant
        ``hatkernels.mesh.colouring.block_size_for`` of the cell count.

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
        variant=None,
        dirichlet=None,
        quadrature=2,
        block_size=None,
    ):
        if not isinstance(mesh, Mesh):
            raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
        names = VARIANTS + (INHERITED,)
        if variant is not None and variant not in names:
            raise InputError(f"unknown matrix-free variant {variant!r}; choose one of {names}")
        chosen = block_size is None
        block_size = DEFAULT_BLOCK if chosen else integer_option(block_size, "block_size",
                                                                  minimum=1)
        t0 = time.perf_counter()
        n = mesh.n_points
        super().__init__(dtype=np.dtype(np.float64), shape=(n, n))
        self.mesh = mesh
        self.block_size = block_size
        self.coefficient = parse_coefficient(coefficient, mesh, name="coefficient", tensor=True)
        self._quadrature = quadrature
        kc = variant_coefficient(self.coefficient, mesh, quadrature)
        if variant is None:
            # the inherited variant's blocks hold whole families of four
            variant = (preferred_variant(mesh, kc) if block_size % 4 == 0
                       else default_variant(mesh.dim))
        if chosen and variant == INHERITED:
            block_size = block_size_for(mesh.n_cells)
            self.block_size = block_size
        self._fixed = _dirichlet_mask(mesh, dirichlet)
        self._diag = None
        self._is_fixed = np.zeros(n if self._fixed.size else 0, dtype=np.bool_)
        self._is_fixed[self._fixed] = True
        # Dirichlet columns: on triangles, taken back out over the cells next to
        # fixed points (few: the boundary is O(sqrt n) of the points); on
        # tetrahedra, where the cells next to the boundary are a larger share
        # (a tenth of cuboid(64, 64, 64)) and their serial correction measured
        # slower than the product itself, the product runs on a copy of x with
        # the fixed entries zeroed (8 bytes per point more)
        self._masked = None
        self._near = np.empty(0, dtype=np.int64)
        if self._fixed.size and mesh.dim == 3:
            self._masked = np.empty(n)
        elif self._fixed.size:
            cells = mesh.cells
            touches = self._is_fixed[cells[:, 0]]
            for c in range(1, cells.shape[1]):  # column by column: any(axis=1) was 10x slower
                touches |= self._is_fixed[cells[:, c]]
            self._near = np.flatnonzero(touches)
        self._impl = build_variant(variant, mesh, kc, block_size)
        self.variant = self._impl.name  # a fallback's own name when the colouring failed
        self.setup_time = time.perf_counter() - t0

    # -- what the operator stores ------------------------------------------------

    @property
    def n_colours(self):
        """Colours of the element blocks the products run through."""
        return self._impl.n_colours

    @property
    def nbytes(self):
        """Bytes the operator stores beyond the mesh it refers to."""
        own = self._fixed.nbytes + self._is_fixed.nbytes + self._near.nbytes
        own += 0 if self._masked is None else self._masked.nbytes
        return int(own + self._impl.nbytes)

    def __repr__(self):
        return (
            f"StiffnessOperator({self.shape[0]} points, variant={self.variant}, "
            f"{self.n_colours} colours of {self.block_size}-element blocks, "
            f"{self.nbytes / 2**20:.1f} MiB stored, {len(self._fixed)} identity rows)"
        )

    # -- products ------------------------------------------------------------------

    def matvec_into(self, x, out):
        """``out = A x`` with no allocation; returns ``out``.

        ``x`` is read only: any real vector of length n (copied unless it is a writable
        C-contiguous float64 one).  ``out`` must be a writable C-contiguous float64
        ndarray of shape (n,) sharing no memory with ``x``; else an InputError names the
        argument (``hatkernels.checks.into_vectors``).
        On tetrahedra with Dirichlet points the operator holds one work vector:
        one product at a time per operator.
        """
        x, = into_vectors("StiffnessOperator.matvec_into", self.shape[0], {"x": x},
                          {"out": out})
        return self._product(x, out)

    def _product(self, x, out):
        if self._masked is not None:
            _jit_ops.masked_copy(x, self._fixed, self._masked)
            self._impl.product(self._masked, out)
            _jit_ops.identity_rows(self._fixed, x, out)
            return out
        self._impl.product(x, out)
        if self._fixed.size:
            # identity rows and columns: take the fixed columns back out (only
            # the cells next to fixed points), then the fixed rows copy x
            self._impl.remove_fixed_columns(self._near, self._is_fixed, x, out)
            _jit_ops.identity_rows(self._fixed, x, out)
        return out

    def residual_into(self, x, b, out):
        """``out = b - A x`` with no allocation; returns ``out``.  One pass over the cells
        where the variant has a residual form, else a product and a subtraction.

        ``x`` and ``b`` are read only (as ``x`` of :meth:`matvec_into`); ``out`` as there,
        sharing no memory with ``x`` or ``b``.
        """
        x, b = into_vectors("StiffnessOperator.residual_into", self.shape[0],
                            {"x": x, "b": b}, {"out": out})
        residual = getattr(self._impl, "residual", None)
        if residual is None or self._masked is not None:
            self._product(x, out)
            _jit_sparse.xpby(b, -1.0, out)
            return out
        residual(x, b, out)
        if self._fixed.size:
            self._impl.add_fixed_columns(self._near, self._is_fixed, x, out)
            _jit_ops.residual_rows(self._fixed, x, b, out)
        return out

    def unmasked_matvec(self, x):
        """``K x`` with the plain stiffness matrix (no identity rows): for lifting boundary values."""
        x = np.ascontiguousarray(np.ravel(x), dtype=np.float64)
        out = np.empty(self.shape[0])
        self._impl.product(x, out)
        return out

    def _matvec(self, x):
        x = np.ascontiguousarray(np.ravel(x), dtype=np.float64)
        return self.matvec_into(x, np.empty(self.shape[0]))

    def _rmatvec(self, x):
        return self._matvec(x)  # symmetric

    def serial_matvec(self, x):
        """The plain version of the product (one thread, no colouring), for testing."""
        x = np.ascontiguousarray(np.ravel(x), dtype=np.float64)
        xm = x.copy()
        xm[self._fixed] = 0.0
        y = np.empty(self.shape[0])
        self._impl.serial_product(xm, y)
        y[self._fixed] = x[self._fixed]
        return y

    def diagonal(self):
        """The diagonal of the (masked) matrix, without assembling it (cached)."""
        if self._diag is None:
            diag = np.empty(self.shape[0])
            self._impl.diagonal_into(diag)
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
        """``(diagonal, gershgorin_bound)`` in one pass over the cells.

        The diagonal is a new array (not the cached one of :meth:`diagonal`),
        the caller's to keep or overwrite: what a smoother needs, without a
        second copy.
        """
        n = self.shape[0]
        diag, off = np.empty(n), np.empty(n)
        self._impl.diagonal_and_offsum(diag, off)
        diag[self._fixed] = 1.0
        # fixed rows are identity; removing the fixed columns only lowers free rows' sums
        off[self._fixed] = 0.0
        off += diag
        off /= diag
        return diag, float(off.max(initial=1.0))

    @property
    def fixed(self):
        """Points with identity rows (Dirichlet points and points in no cell)."""
        return self._fixed
