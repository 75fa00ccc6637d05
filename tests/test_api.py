"""The public names are a contract: this test locks them."""

import subprocess
import sys

import hatkernels

# The exact public names. Adding or removing one is a decision: change this
# set in the same commit, and the docs with it.
PUBLIC = {
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
    "apply_dirichlet",
    "assemble_boundary_load",
    "assemble_boundary_mass",
    "assemble_load",
    "assemble_mass",
    "assemble_stiffness",
    "balance",
    "discretise",
    "distributed",
    "element_gradients",
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
    "TransientSolution",
    "eigenmodes",
    "in_time",
}


def test_public_names_are_exactly_the_locked_set():
    assert set(hatkernels.__all__) == PUBLIC
    assert len(hatkernels.__all__) == len(PUBLIC)  # no name listed twice
    for name in hatkernels.__all__:
        assert hasattr(hatkernels, name), name
    for name in ("rectangle", "l_shape", "disk", "triangulate", "refine", "reorder", "cuboid",
                 "ball"):
        assert callable(getattr(hatkernels.mesh, name))


def test_strategies():
    assert hatkernels.STRATEGIES == ("reference", "triplets", "csr")


def test_errors_are_the_documented_types():
    assert issubclass(hatkernels.MeshError, ValueError)
    assert issubclass(hatkernels.InputError, ValueError)
    assert issubclass(hatkernels.ConvergenceError, RuntimeError)


def test_import_compiles_nothing():
    # kernels compile lazily: importing the package must not trigger numba
    code = (
        "import hatkernels, numba.core.registry as r;"
        "d = r.cpu_target.target_context;"
        "from hatkernels._jit import topology, assembly, geometry;"
        "print(sum(len(f.overloads) for f in (topology.incidence, assembly.stiffness_values, geometry.element_gradients)))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "0"


def test_command_runs():
    out = subprocess.run(
        [sys.executable, "-m", "hatkernels.cli", "--help"], capture_output=True, text=True
    )
    assert out.returncode == 0
