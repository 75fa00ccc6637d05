"""The record of one nested refinement: what multigrid needs to move between two levels.

It sits below both :mod:`hatkernels.mesh.core` (whose meshes carry it) and
:mod:`hatkernels.mesh.refine` (which makes it), so that neither imports the other
back.
"""

from __future__ import annotations

import dataclasses

import numpy as np

__all__ = ["Refinement"]


@dataclasses.dataclass(frozen=True, repr=False)
class Refinement:
    """How a mesh was made from a coarser one by :meth:`Mesh.refine`.

    Attributes
    ----------
    coarse : Mesh
        The mesh that was refined.
    coarse_points : ndarray, shape (coarse.n_points,)
        The fine number of each coarse point (same position).
    edge_points : ndarray, shape (n_coarse_edges, 2)
        The two coarse points of each coarse edge (``coarse.edges()``).
    midpoints : ndarray, shape (n_coarse_edges,)
        The fine number of the point at the middle of each coarse edge.

    The fine points are numbered in the order the fine triangles first use
    them, which keeps neighbours close in memory at every level; these maps
    are all that interpolation between the levels needs.  The children of
    coarse cell ``t`` are fine cells ``4t .. 4t+3`` (triangles) or ``8t ..
    8t+7`` (tetrahedra).
    """

    coarse: "Mesh"  # noqa: F821  (the class lives above this module)
    coarse_points: np.ndarray
    edge_points: np.ndarray
    midpoints: np.ndarray

    def __repr__(self):
        return f"Refinement(coarse={self.coarse!r}, new points={len(self.edge_points)})"
