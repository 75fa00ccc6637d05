"""Refinement that is never stored: a triangle or tetrahedral mesh refined ``k`` times
kept as its coarse mesh and one vector per level, with the operator, smoother and grid
transfers applied patch by patch by stencil kernels (docs/patches.md; tetrahedra:
:mod:`hatkernels.patches.tets`).

:func:`hatkernels.solve_poisson` takes this path by itself for ``refine=k`` when the data
allow it (:func:`patch_path_reason` says why not when they do not).
"""

from hatkernels.patches.layout import PatchLayout
from hatkernels.patches.multigrid import PatchMultigrid, PatchOperator, element_stiffness
from hatkernels.patches.solve import PatchSolution, patch_path_reason, solve_on_patches

__all__ = ["PatchLayout", "PatchMultigrid", "PatchOperator", "PatchSolution",
           "element_stiffness", "patch_path_reason", "solve_on_patches"]
