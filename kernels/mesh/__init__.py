"""Meshes of triangles and tetrahedra: the :class:`Mesh` class, generators, refinement,
reordering, quality.

>>> from hatkernels.mesh import rectangle
>>> m = rectangle(4, 4)
>>> m.refine()
Mesh(81 points, 128 triangles, 1 refinements)
"""

from hatkernels.mesh.core import DEGENERATE_TOL, Mesh
from hatkernels.mesh.core_index import index_dtype
from hatkernels.mesh.generators import SPLITS, disk, l_shape, rectangle, triangulate
from hatkernels.mesh.generators3d import ball, cuboid
from hatkernels.mesh.quality import MeshQuality, quality
from hatkernels.mesh.quality3d import TetrahedronQuality
from hatkernels.mesh.refine import refine
from hatkernels.mesh.refinement import Refinement
from hatkernels.mesh.reorder import REORDERINGS, MeshPermutation, hilbert_keys, reorder

__all__ = [
    "DEGENERATE_TOL",
    "SPLITS",
    "REORDERINGS",
    "Mesh",
    "MeshPermutation",
    "MeshQuality",
    "Refinement",
    "TetrahedronQuality",
    "ball",
    "cuboid",
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
