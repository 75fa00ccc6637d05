"""The public names are a contract: this test locks them."""

import subprocess
import sys

import kernels

# The contract of docs/architecture.md (from the project's design document).
CONTRACT = {
    "Mesh",
    "MeshError",
    "ConvergenceError",
    "STRATEGIES",
    "StiffnessAssembler",
    "element_gradients",
    "assemble_stiffness",
    "assemble_mass",
    "assemble_load",
    "apply_dirichlet",
    "mesh",
}


def test_contract_names_are_exported():
    assert CONTRACT <= set(kernels.__all__)
    for name in kernels.__all__:
        assert hasattr(kernels, name), name
    for name in ("rectangle", "l_shape", "disk", "triangulate", "refine", "reorder"):
        assert callable(getattr(kernels.mesh, name))


def test_strategies():
    assert kernels.STRATEGIES == ("reference", "triplets", "csr")


def test_errors_are_the_documented_types():
    assert issubclass(kernels.MeshError, ValueError)
    assert issubclass(kernels.InputError, ValueError)
    assert issubclass(kernels.ConvergenceError, RuntimeError)


def test_import_compiles_nothing():
    # kernels compile lazily: importing the package must not trigger numba
    code = (
        "import kernels, numba.core.registry as r;"
        "d = r.cpu_target.target_context;"
        "from kernels._jit import topology, assembly, geometry;"
        "print(sum(len(f.overloads) for f in (topology.incidence, assembly.stiffness_values, geometry.element_gradients)))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "0"


def test_command_runs():
    out = subprocess.run(
        [sys.executable, "-m", "kernels.cli", "--help"], capture_output=True, text=True
    )
    assert out.returncode == 0
