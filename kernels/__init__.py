"""hatkernels: fast, verified kernels for linear (P1) finite elements on triangles and tetrahedra.

>>> import hatkernels
>>> mesh = hatkernels.mesh.rectangle(16, 16)
>>> A = hatkernels.assemble_stiffness(mesh)
>>> b = hatkernels.assemble_load(mesh, 1.0)
>>> system = hatkernels.apply_dirichlet(A, b, mesh.boundary_points())
>>> system.A.shape
(225, 225)
"""

from hatkernels import distributed, krylov, mesh, norms
from hatkernels._jit import threads
from hatkernels.assembly import (
    STRATEGIES,
    DofAssembler,
    StiffnessAssembler,
    assemble_boundary_load,
    assemble_boundary_mass,
    assemble_load,
    assemble_mass,
    assemble_stiffness,
)
from hatkernels.boundary import DirichletSystem, apply_dirichlet
from hatkernels.coefficients import per_cell, per_edge, per_point, per_triangle
from hatkernels.discretise import LinearSystem, discretise
from hatkernels.eigen import Eigenmodes, eigenmodes
from hatkernels.errors import ConvergenceError, InputError, MeshError, MeshWarning
from hatkernels.geometry import element_gradients
from hatkernels.mesh import Mesh
from hatkernels.operators import StiffnessOperator
from hatkernels.poisson import PoissonSolution, solve_poisson
from hatkernels.precond import PRECONDITIONERS, make_preconditioner, register_preconditioner
from hatkernels.problem import PoissonProblem
from hatkernels.results import balance
from hatkernels.solver import SolveResult, solve
from hatkernels.stats import SolveStats
from hatkernels.transient import TransientSolution, in_time, solve_transient

__version__ = "0.1.0"

__all__ = [
    "PRECONDITIONERS",
    "STRATEGIES",
    "ConvergenceError",
    "DirichletSystem",
    "DofAssembler",
    "Eigenmodes",
    "InputError",
    "Mesh",
    "MeshError",
    "MeshWarning",
    "LinearSystem",
    "PoissonProblem",
    "PoissonSolution",
    "SolveResult",
    "SolveStats",
    "StiffnessAssembler",
    "StiffnessOperator",
    "TransientSolution",
    "apply_dirichlet",
    "discretise",
    "distributed",
    "eigenmodes",
    "assemble_boundary_load",
    "assemble_boundary_mass",
    "assemble_load",
    "assemble_mass",
    "assemble_stiffness",
    "balance",
    "element_gradients",
    "in_time",
    "krylov",
    "make_preconditioner",
    "mesh",
    "norms",
    "per_cell",
    "per_edge",
    "per_point",
    "per_triangle",
    "register_preconditioner",
    "solve",
    "solve_poisson",
    "solve_transient",
    "threads",
]
