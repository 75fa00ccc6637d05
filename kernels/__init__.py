"""hatkernels: fast, verified kernels for linear (P1) finite elements on triangle meshes.

>>> import kernels
>>> mesh = kernels.mesh.rectangle(16, 16)
>>> A = kernels.assemble_stiffness(mesh)
>>> b = kernels.assemble_load(mesh, 1.0)
>>> system = kernels.apply_dirichlet(A, b, mesh.boundary_nodes())
>>> system.A.shape
(225, 225)
"""

from kernels import distributed, krylov, mesh, norms
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
from kernels.operators import StiffnessOperator
from kernels.poisson import PoissonSolution, solve_poisson
from kernels.precond import PRECONDITIONERS, make_preconditioner, register_preconditioner
from kernels.solve import SolveResult, solve

__version__ = "0.1.0"

__all__ = [
    "PRECONDITIONERS",
    "STRATEGIES",
    "ConvergenceError",
    "DirichletSystem",
    "InputError",
    "Mesh",
    "MeshError",
    "MeshWarning",
    "PoissonSolution",
    "SolveResult",
    "StiffnessAssembler",
    "StiffnessOperator",
    "apply_dirichlet",
    "distributed",
    "assemble_boundary_load",
    "assemble_boundary_mass",
    "assemble_load",
    "assemble_mass",
    "assemble_stiffness",
    "element_gradients",
    "krylov",
    "make_preconditioner",
    "mesh",
    "norms",
    "per_edge",
    "per_node",
    "per_triangle",
    "register_preconditioner",
    "solve",
    "solve_poisson",
    "threads",
]
