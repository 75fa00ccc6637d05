"""The memory check before a solve: refuse with the estimate instead of dying mid-phase."""

import subprocess
import sys
import textwrap

import numpy as np
import pytest

import hatkernels
from hatkernels import memory
from hatkernels.mesh import rectangle


def test_estimate_uses_the_measured_figures():
    mesh = rectangle(100, 100)
    caps = hatkernels.precond.capabilities
    assert memory.solve_bytes(mesh, "amg") == mesh.n_points * caps("amg").solve_bytes_per_point
    # a multigrid on the mesh's refinement history needs far less than an assembled AMG
    # (docs/performance.md measured 151 against 627 bytes per point at 1e6 unknowns)
    assert memory.solve_bytes(mesh, "gmg") < memory.solve_bytes(mesh, "amg") / 3
    assert memory.solve_bytes(mesh, object()) == mesh.n_points * memory.UNKNOWN_BYTES_PER_POINT
    # the second splitting pass can more than double a classical hierarchy (measured)
    assert memory.solve_bytes(mesh, "amg", {"second_pass": True}) == int(
        mesh.n_points * caps("amg").solve_bytes_per_point * memory.SECOND_PASS_FACTOR)


def test_tetrahedra_get_their_own_figures():
    # a point of a tetrahedral mesh has about 15 matrix entries instead of 7: the 3-D
    # estimate follows the peaks measured on tetrahedra (module docstring of
    # hatkernels.memory), and a direct factorisation's fill-in far more so
    cube = hatkernels.mesh.cuboid(10, 10, 10)
    flat = rectangle(36, 36)  # 1,369 points, about cube's 1,331
    for name in ("amg", "ic0", "jacobi", "gmg"):
        per3 = memory.solve_bytes(cube, name) / cube.n_points
        per2 = memory.solve_bytes(flat, name) / flat.n_points
        assert per3 >= 1.5 * per2
    assert memory.solve_bytes(cube, "amg") >= memory.THREE_D_ASSEMBLED * cube.n_points
    assert memory.solve_bytes(cube, "gmg") < memory.solve_bytes(cube, "amg") / 3
    stated = hatkernels.precond.capabilities("direct").solve_bytes_per_point_3d
    assert stated > 10 * memory.THREE_D_ASSEMBLED  # SuperLU's fill-in in 3-D
    assert memory.solve_bytes(cube, "direct") == stated * cube.n_points


def test_available_memory_is_read():
    have = memory.available_bytes()
    assert have is None or have > 0


def test_a_solve_that_does_not_fit_is_refused_before_it_starts(monkeypatch):
    mesh = rectangle(40, 40)
    monkeypatch.setattr(memory, "available_bytes", lambda: 100_000)
    with pytest.raises(hatkernels.InputError,
                       match=r"not enough memory: solving on 1,681 points with amg needs about "
                             r"0\.0 GiB .* 0\.0 GiB are available.*memory_check=False"):
        hatkernels.solve_poisson(mesh, 1.0)
    assert hatkernels.solve_poisson(mesh, 1.0, memory_check=False).converged


def test_the_address_space_limit_counts():
    # a process limited to its current size plus 64 MiB cannot take a solve estimated at
    # 640 bytes per point on 1e6 points: refused with the limit's room, no MemoryError
    code = textwrap.dedent("""
        import resource
        import hatkernels
        from hatkernels import memory
        mesh = hatkernels.mesh.rectangle(999, 999)
        size = int(open("/proc/self/statm").read().split()[0]) * 4096
        resource.setrlimit(resource.RLIMIT_AS, (size + 64 * 2**20, resource.RLIM_INFINITY))
        assert memory.available_bytes() <= 64 * 2**20
        try:
            hatkernels.solve_poisson(mesh, 1.0)
        except hatkernels.InputError as exc:
            print("refused:", exc)
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=300)
    assert out.returncode == 0, out.stderr
    assert out.stdout.startswith("refused: not enough memory"), out.stdout


def test_a_march_that_does_not_fit_is_refused_before_it_starts(monkeypatch):
    mesh = rectangle(20, 20)
    times = [0.0, 0.1, 0.2]
    monkeypatch.setattr(memory, "available_bytes", lambda: 100_000)
    with pytest.raises(hatkernels.InputError,
                       match=r"not enough memory: marching \(3 output times\) on 441 points "
                             r"with amg needs about .*memory_check=False"):
        hatkernels.solve_transient(mesh, 0.0, times, dt=0.05, f=1.0)
    sol = hatkernels.solve_transient(mesh, 0.0, times, dt=0.05, f=1.0, memory_check=False)
    assert len(sol.u) == 3


def test_the_march_estimate_counts_its_outputs_and_its_matrices():
    mesh = rectangle(20, 20)
    one, eleven = memory.transient_bytes(mesh, "amg", 1), memory.transient_bytes(mesh, "amg", 11)
    assert eleven - one == 8 * 10 * mesh.n_points
    assert one > memory.solve_bytes(mesh, "amg")
    # a march assembles even with a matrix-free preconditioner
    assert memory.transient_bytes(mesh, "gmg", 1) >= memory.UNKNOWN_BYTES_PER_POINT * mesh.n_points


@pytest.mark.parametrize("method", ["shift-invert", "lobpcg"])
def test_modes_that_do_not_fit_are_refused_before_they_start(monkeypatch, method):
    from hatkernels.eigen import eigenmodes

    mesh = rectangle(20, 20).refine()
    monkeypatch.setattr(memory, "available_bytes", lambda: 100_000)
    with pytest.raises(hatkernels.InputError,
                       match=rf"not enough memory: finding modes by {method} on 1,681 points "
                             r".*memory_check=False"):
        eigenmodes(mesh, 3, method=method)
    values, _ = eigenmodes(mesh, 3, method=method, memory_check=False)
    # the first Dirichlet eigenvalue of the unit square, 2 pi^2, approached from above
    # (common practice, no source)
    assert 2 * np.pi**2 < values[0] < 2 * np.pi**2 * 1.01


def test_the_modes_estimate_grows_with_the_block_and_the_factorisation_is_the_direct_one():
    mesh = rectangle(20, 20)
    assert memory.eigen_bytes(mesh, "lobpcg", 20) > memory.eigen_bytes(mesh, "lobpcg", 10)
    assert memory.eigen_bytes(mesh, "shift-invert", 10) == memory.solve_bytes(mesh, "direct")
