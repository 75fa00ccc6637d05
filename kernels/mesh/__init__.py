"""Triangle meshes: the :class:`Mesh` class, generators, refinement, reordering, quality.

>>> from kernels.mesh import rectangle
>>> m = rectangle(4, 4)
>>> m.refine()
Mesh(81 points, 128 triangles, 1 refinements)
"""

from kernels.mesh.core import DEGENERATE_TOL, Mesh, Refinement, index_dtype
from kernels.mesh.generators import DIAGONALS, disk, l_shape, rectangle, triangulate
from kernels.mesh.quality import MeshQuality, quality
from kernels.mesh.refine import refine
from kernels.mesh.reorder import REORDERINGS, MeshPermutation, hilbert_keys, reorder

__all__ = [
    "DEGENERATE_TOL",
    "DIAGONALS",
    "REORDERINGS",
    "Mesh",
    "MeshPermutation",
    "MeshQuality",
    "Refinement",
    "disk",
    "hilbert_keys",
    "index_dtype",
    "l_shape",
    "quality",
    "rectangle",
    "refine",
    "reorder",
    "triangulate",
]
