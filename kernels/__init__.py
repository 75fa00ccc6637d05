"""hatkernels: fast, verified kernels for linear (P1) finite elements on triangle meshes.

>>> import kernels
>>> mesh = kernels.mesh.rectangle(16, 16)
>>> A = kernels.assemble_stiffness(mesh)
>>> b = kernels.assemble_load(mesh, 1.0)
>>> system = kernels.apply_dirichlet(A, b, mesh.boundary_nodes())
>>> system.A.shape
(225, 225)
"""

from kernels import mesh
from kernels._jit import threads
from kernels.assembly import (
    STRATEGIES,
    StiffnessAssembler,
    assemble_boundary_load,
    assemble_boundary_mass,
    assemble_load,
    assemble_mass,
    assemble_stiffness,
)
from kernels.boundary import DirichletSystem, apply_dirichlet
from kernels.coefficients import per_edge, per_node, per_triangle
from kernels.errors import ConvergenceError, InputError, MeshError, MeshWarning
from kernels.geometry import element_gradients
from kernels.mesh import Mesh

__version__ = "0.1.0"

__all__ = [
    "STRATEGIES",
    "ConvergenceError",
    "DirichletSystem",
    "InputError",
    "Mesh",
    "MeshError",
    "MeshWarning",
    "StiffnessAssembler",
    "apply_dirichlet",
    "assemble_boundary_load",
    "assemble_boundary_mass",
    "assemble_load",
    "assemble_mass",
    "assemble_stiffness",
    "element_gradients",
    "mesh",
    "per_edge",
    "per_node",
    "per_triangle",
    "threads",
]
