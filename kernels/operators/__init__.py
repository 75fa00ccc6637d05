"""Matrix-free stiffness operator: ``A @ x`` without a stored matrix.

Four variants, one class each behind one interface
(:mod:`hatkernels.operators.variants`), all race-free and giving the same
bits on any thread count (see :mod:`hatkernels._jit.operators`):

``geometry``
    recomputes each triangle's geometry from the coordinates at every
    product; stores nothing beyond the mesh but a colouring of blocks
    (and the coefficient, 8 bytes per triangle when it varies).
``factors``
    stores the three off-diagonal element entries per triangle (24 bytes per
    triangle): no geometry at product time.
``inherited``
    on a triangle mesh made by :meth:`~hatkernels.Mesh.refine` with a scalar
    coefficient (the default there): every triangle's element matrix is its
    coarsest ancestor's times its coefficient, so only the coarsest mesh's
    entries are stored and nothing is recomputed.
``edges``
    stores one weight per edge (the cotangent formula summed over the edge's
    triangles) and the edge list by first point (an end point per edge, a
    start per point): 12 bytes per edge and 4 per point, about 20 per
    triangle, 0.45 of the CSR matrix; the product no longer needs the
    triangles.

On tetrahedra (:mod:`hatkernels.operators.variants3d`) the same three:
``geometry`` recomputes each tetrahedron's normals and determinant,
``factors`` stores six entries per tetrahedron (48 bytes), ``edges`` one
weight per unique edge.

docs/matrix-free.md has the measured speeds; :data:`DEFAULT_VARIANT`
(triangles) and :data:`DEFAULT_VARIANT_3D` (tetrahedra) are the ones the
benchmark picked; :func:`default_variant` gives the one for a dimension.
"""

from hatkernels.operators.stiffness import DEFAULT_BLOCK, StiffnessOperator
from hatkernels.operators.variants import (
    DEFAULT_VARIANT,
    DEFAULT_VARIANT_3D,
    INHERITED,
    VARIANTS,
    default_variant,
    preferred_variant,
)

__all__ = ["StiffnessOperator", "VARIANTS", "DEFAULT_VARIANT", "DEFAULT_VARIANT_3D",
           "default_variant", "DEFAULT_BLOCK", "INHERITED", "preferred_variant"]
