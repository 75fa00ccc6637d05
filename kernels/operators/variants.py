"""The matrix-free variants: one small class each, behind one interface, chosen by name.

Every variant holds what it stores and implements

``product(x, out)``
    ``out = K x`` with the plain stiffness matrix, in parallel, the same bits
    for any thread count;
``serial_product(x, out)``
    the same product written plainly (one thread, no colouring), which the
    fast one is tested against;
``diagonal_into(out)``, ``diagonal_and_offsum(diag, off)``
    the diagonal of ``K`` (``out`` checked by the base class, written by each
    class's ``_diagonal_into``), and the row sums of ``|K_ij|``, ``j != i``, for
    Gershgorin's bound;
``remove_fixed_columns(near, is_fixed, x, out)``
    ``out -= K[:, fixed] x[fixed]`` over the triangles next to fixed points;
``nbytes``, ``n_colours``
    what it stores beyond the mesh, and the colours its product runs through.

The diagonal, the row sums and the column correction come from each
triangle's element matrix (recomputed from the coordinates) for every
variant: they run once per setup, or on the boundary only.
:func:`build_variant` picks the class from :data:`VARIANT_CLASSES`.
"""

from __future__ import annotations

import warnings

import numpy as np

from hatkernels._jit import assembly as _jit_assembly
from hatkernels._jit import inherited as _jit_inh
from hatkernels._jit import operators as _jit_ops
from hatkernels.assembly.csr import kernel_coefficient
from hatkernels.errors import InputError
from hatkernels.mesh.colouring import triangle_colouring
from hatkernels.operators import variants3d
from hatkernels.operators.blocks import EdgeRows, ElementBlocks

__all__ = [
    "TriangleBlocks",
    "GeometryProduct",
    "SerialGeometryProduct",
    "FactorsProduct",
    "EdgesProduct",
    "InheritedProduct",
    "VARIANT_CLASSES",
    "INHERITED",
    "inherited_reason",
    "preferred_variant",
    "VARIANTS",
    "DEFAULT_VARIANT",
    "DEFAULT_VARIANT_3D",
    "default_variant",
    "build_variant",
    "variant_coefficient",
]


class TriangleBlocks(ElementBlocks):
    """The triangle variants' setup kernels: diagonal, row sums, fixed columns.

    Parameters as :class:`~hatkernels.operators.blocks.ElementBlocks`.
    """

    def _diagonal_into(self, out):
        m = self.mesh
        _jit_ops.diagonal(m.points, m.triangles, *self.coefficient, *self.colouring, out)

    def diagonal_and_offsum(self, diag, off):
        m = self.mesh
        _jit_ops.diagonal_and_offsum(
            m.points, m.triangles, *self.coefficient, *self.colouring, diag, off
        )

    def remove_fixed_columns(self, near, is_fixed, x, out):
        m = self.mesh
        _jit_ops.remove_fixed_columns(
            m.points, m.triangles, *self.coefficient, near, is_fixed, x, out
        )


class SerialGeometryProduct(TriangleBlocks):
    """The geometry variant on one thread, for meshes whose triangles need > 64 colours."""

    name = "geometry"

    def __init__(self, mesh, coefficient, colouring=None):
        super().__init__(mesh, coefficient, colouring)

    @property
    def n_colours(self):
        return 0

    @property
    def nbytes(self):
        return self.coefficient.nbytes

    def product(self, x, out):
        m = self.mesh
        _jit_ops.product_serial(m.points, m.triangles, *self.coefficient, x, out)

    serial_product = product

    def _element_values(self):
        m = self.mesh
        d = np.empty((m.n_triangles, 3))
        o = np.empty((m.n_triangles, 3))
        _jit_assembly.stiffness_values(m.points, m.triangles, *self.coefficient, d, o)
        return d, o

    def _diagonal_into(self, out):
        # no usable colouring: triangle values, summed in order
        d, _ = self._element_values()
        out[:] = np.bincount(self.mesh.triangles.ravel(), weights=d.ravel(), minlength=out.size)

    def diagonal_and_offsum(self, diag, off):
        d, o = self._element_values()
        rows = np.abs(o)
        cells = self.mesh.triangles.ravel()
        diag[:] = np.bincount(cells, weights=d.ravel(), minlength=diag.size)
        off[:] = np.bincount(
            cells,
            weights=(np.roll(rows, -1, axis=1) + np.roll(rows, 1, axis=1)).ravel(),
            minlength=off.size,
        )


class GeometryProduct(TriangleBlocks):
    """Recomputes each triangle's geometry at every product.

    Stores only the colouring (and the coefficient, 8 bytes per triangle when
    it varies).
    """

    name = "geometry"
    fallback = SerialGeometryProduct

    def __init__(self, mesh, coefficient, colouring):
        super().__init__(mesh, coefficient, colouring)
        # one kernel per kind of coefficient: a per-triangle branch measured 20 % slower
        tensor = coefficient.is_tensor
        self._kernel = _jit_ops.product_tensor if tensor else _jit_ops.product_scalar

    def product(self, x, out):
        m = self.mesh
        self._kernel(m.points, m.triangles, *self.coefficient, *self.colouring, x, out)

    def serial_product(self, x, out):
        m = self.mesh
        _jit_ops.product_serial(m.points, m.triangles, *self.coefficient, x, out)


class FactorsProduct(TriangleBlocks):
    """Stores the three off-diagonal element entries per triangle (24 bytes per triangle)."""

    name = "factors"

    def __init__(self, mesh, coefficient, colouring):
        super().__init__(mesh, coefficient, colouring)
        self.offdiagonals = np.empty((mesh.n_triangles, 3))
        _jit_ops.offdiagonal_values(mesh.points, mesh.triangles, *coefficient, self.offdiagonals)

    @property
    def nbytes(self):
        return super().nbytes + self.offdiagonals.nbytes

    def product(self, x, out):
        _jit_ops.apply_factors(self.mesh.triangles, self.offdiagonals, *self.colouring, x, out)

    def serial_product(self, x, out):
        _plain_product(self.mesh.triangles, self.offdiagonals, x, out)


def _plain_product(t, o, x, out):
    """``out = K x`` from the off-diagonals ``o`` (M, 3) of the triangles ``t``, plainly."""
    # (K_T x)_a = sum over b != a of K_ab (x_b - x_a); column c holds the pair opposite c
    x0, x1, x2 = x[t[:, 0]], x[t[:, 1]], x[t[:, 2]]
    terms = np.column_stack([
        o[:, 2] * (x1 - x0) + o[:, 1] * (x2 - x0),
        o[:, 2] * (x0 - x1) + o[:, 0] * (x2 - x1),
        o[:, 1] * (x0 - x2) + o[:, 0] * (x1 - x2),
    ])
    out[:] = np.bincount(t.ravel(), weights=terms.ravel(), minlength=out.size)


class EdgesProduct(EdgeRows, TriangleBlocks):
    """Stores one weight per edge and the edge list by first point; the product needs no triangles.

    The weight of an edge is the sum over its triangles of their entry for
    its two points (the cotangent formula).  12 bytes per edge and 4 per
    point, about 20 per triangle, 0.45 of the CSR matrix.
    """

    name = "edges"

    def __init__(self, mesh, coefficient, colouring):
        super().__init__(mesh, coefficient, colouring)
        had = mesh.cached()
        edges = mesh.edges()
        weights = np.empty(len(edges))
        _jit_ops.edge_weights(
            mesh.points, mesh.triangles, *coefficient, *colouring, mesh.triangle_edges(), weights
        )
        # blocks of rows holding about as many edges as a block of triangles (three per row)
        starts, ends = self.rows_of(edges, mesh.n_points)
        self._store_rows(starts, ends, weights, mesh.n_points, colouring.block_size // 3)
        del edges
        # edge topology the products do not need (12 to 20 bytes per triangle)
        mesh.forget(*(mesh.cached() - had))


_EMPTY = np.empty(0)

#: The variant for triangle meshes made by :meth:`Mesh.refine` (scalar coefficients).
INHERITED = "inherited"


def inherited_reason(mesh, coefficient):
    """Why the ``inherited`` variant cannot serve ``mesh`` and ``coefficient``, or None.

    ``coefficient`` is the kernels' view (:func:`variant_coefficient`).
    """
    if mesh.dim != 2:
        return "the children of a tetrahedron are not all similar to it"
    if mesh.refinement is None:
        return "the mesh was not made by Mesh.refine (it has no coarsest ancestor to inherit from)"
    if coefficient.is_tensor:
        return "a tensor coefficient turns with each triangle's own axes"
    return None


class InheritedProduct(TriangleBlocks):
    """On a triangle mesh made by :meth:`Mesh.refine`: each element matrix is its ancestor's.

    Refinement by edge midpoints makes four children similar to their parent
    with their vertices in the same order (three shrunk copies and one turned
    half round), and the P1 stiffness matrix does not change under shrinking,
    moving or a half turn.  So fine triangle ``t``'s element matrix is that of
    its coarsest ancestor ``t >> 2k`` (``k`` refinements; the children of
    cell ``t`` are ``4t .. 4t+3``) times its own coefficient.  Stores the
    coarsest mesh's three off-diagonals per triangle (with unit coefficient):
    the product reads nothing per triangle but its points, and no geometry is
    recomputed.  The same idea as :mod:`hatkernels.patches`, on a stored mesh.
    """

    name = INHERITED
    fallback = SerialGeometryProduct

    def __init__(self, mesh, coefficient, colouring):
        reason = inherited_reason(mesh, coefficient)
        if reason is not None:
            raise InputError(f"the {INHERITED} variant does not apply: {reason}")
        if colouring.block_size % 4:
            raise InputError(f"the {INHERITED} variant takes the four children of a triangle "
                             f"together: block_size must be a multiple of 4, got "
                             f"{colouring.block_size}")
        super().__init__(mesh, coefficient, colouring)
        levels = mesh.levels()
        base = levels[0]
        self.shift = 2 * (len(levels) - 1)
        self.base = np.empty((base.n_triangles, 3))
        _jit_ops.offdiagonal_values(base.points, base.triangles, np.ones(1), 0,
                                    np.empty((0, 2, 2)), 0, self.base)
        kc = self.coefficient
        self._kappa = (kc.kappa, kc.kappa_step)

    @property
    def nbytes(self):
        return super().nbytes + self.base.nbytes

    def product(self, x, out):
        _jit_inh.apply_inherited(self.mesh.triangles, self.base, self.shift, *self._kappa,
                                 *self.colouring, x, _EMPTY, out)

    def residual(self, x, b, out):
        """``out = b - K x`` in one pass (the plain stiffness matrix)."""
        _jit_inh.apply_inherited(self.mesh.triangles, self.base, self.shift, *self._kappa,
                                 *self.colouring, x, b, out)

    def add_fixed_columns(self, near, is_fixed, x, out):
        """``out += K[:, fixed] x[fixed]``: :meth:`remove_fixed_columns` after :meth:`residual`."""
        _jit_inh.remove_fixed_columns_inherited(self.mesh.triangles, self.base, self.shift,
                                                *self._kappa, near, is_fixed, x, out, -1.0)

    def serial_product(self, x, out):
        t = self.mesh.triangles
        kappa, ks = self._kappa
        cells = np.arange(len(t))
        o = self.base[cells >> self.shift] * kappa[cells * ks][:, None]
        _plain_product(t, o, x, out)

    def remove_fixed_columns(self, near, is_fixed, x, out):
        _jit_inh.remove_fixed_columns_inherited(self.mesh.triangles, self.base, self.shift,
                                                *self._kappa, near, is_fixed, x, out, 1.0)


def preferred_variant(mesh, coefficient):
    """The variant a :class:`~hatkernels.StiffnessOperator` takes when none is named.

    :data:`INHERITED` where it applies (``inherited_reason``), else
    :func:`default_variant` of the mesh's dimension.  ``coefficient`` is the
    kernels' view (``variant_coefficient``).
    """
    if inherited_reason(mesh, coefficient) is None:
        return INHERITED
    return default_variant(mesh.dim)


#: The variants by name; the first is the default.
VARIANT_CLASSES = {cls.name: cls for cls in (GeometryProduct, FactorsProduct, EdgesProduct)}
#: Values of ``variant``, the default (on triangles) first.
VARIANTS = tuple(VARIANT_CLASSES)
#: The one the benchmark picked on triangles (docs/matrix-free.md has the measured speeds).
DEFAULT_VARIANT = "geometry"
#: The one the benchmark picked on tetrahedra: ``edges``, the fastest product, whose
#: setup pays for itself within one solve, storing under half of the CSR matrix;
#: ``geometry`` stores nothing but recomputes six tetrahedra per point at every
#: product, several times slower (docs/matrix-free.md has the figures).
DEFAULT_VARIANT_3D = "edges"


def default_variant(dim):
    """:data:`DEFAULT_VARIANT` on triangles (``dim`` 2), :data:`DEFAULT_VARIANT_3D` on tetrahedra."""
    return DEFAULT_VARIANT if dim == 2 else DEFAULT_VARIANT_3D


def variant_coefficient(coef, mesh, quadrature):
    """The kernels' view of a parsed stiffness coefficient on the cells of ``mesh``: a
    :class:`~hatkernels.assembly.csr.KernelCoefficient` with 2x2 or 3x3 tensors."""
    if mesh.dim == 3:
        return variants3d.tetrahedron_coefficient(coef, mesh, quadrature)
    return kernel_coefficient(coef, mesh, quadrature)


def build_variant(name, mesh, coefficient, block_size):
    """The variant ``name`` for ``mesh``, on blocks of ``block_size`` cells.

    The class comes from :data:`VARIANT_CLASSES` on triangles and from
    :data:`hatkernels.operators.variants3d.VARIANT_CLASSES` on tetrahedra.
    Falls back to the variant's :attr:`~ElementBlocks.fallback`, with a
    RuntimeWarning, when the cells need more than 64 colours, or raises
    InputError if it has none.  Arguments are trusted (checked by the caller).
    """
    classes = VARIANT_CLASSES if mesh.dim == 2 else variants3d.VARIANT_CLASSES
    if name == INHERITED:
        reason = inherited_reason(mesh, coefficient)
        if reason is not None:
            raise InputError(f"the {INHERITED} variant does not apply: {reason}")
        classes = {INHERITED: InheritedProduct}
    cls = classes[name]
    colouring = triangle_colouring(mesh.cells, mesh.n_points, block_size)
    if colouring is not None:
        return cls(mesh, coefficient, colouring)
    if cls.fallback is None:
        raise InputError(
            f"the {name} variant needs a colouring with at most 64 colours; reorder the "
            "mesh (Mesh.reorder('hilbert')) or use variant='geometry'"
        )
    cells = "triangles" if mesh.dim == 2 else "tetrahedra"
    warnings.warn(
        f"matrix-free product: the mesh needs more than 64 colours (a point in very many "
        f"{cells}, or a numbering with no locality); products run on one thread. "
        "Reorder the mesh (Mesh.reorder('hilbert')) to fix this.",
        RuntimeWarning,
        stacklevel=3,  # the caller of StiffnessOperator
    )
    return cls.fallback(mesh, coefficient)
