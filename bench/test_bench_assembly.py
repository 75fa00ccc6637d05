"""Assembly benchmarks: every strategy side by side, with the bandwidth floor.

    python -m pytest bench/test_bench_assembly.py --benchmark-only [--size full]
"""

import numpy as np
import pytest
from conftest import record

import kernels
from kernels import StiffnessAssembler, assemble_mass, assemble_stiffness, threads
from kernels.mesh import Mesh, rectangle
from kernels.perf import PeakMemory, timed_first_call

ROUNDS = dict(rounds=5, iterations=1, warmup_rounds=1)


def fresh(mesh):
    """The same mesh with no cached topology, so that a first call pays for everything."""
    return Mesh._trusted(mesh.points, mesh.triangles)


def sizes(mesh, nnz):
    n, m = mesh.n_points, mesh.n_triangles
    index = 4  # int32
    return {
        "n_points": n,
        "n_triangles": m,
        "nnz": nnz,
        # floors: read the mesh, write what must be written
        "floor_first": m * 3 * index + 16 * n + (8 + index) * nnz + index * n,
        "floor_numeric": m * 3 * index + 16 * n + 8 * nnz,
        # the csr numeric phase as written: element values (48 B) out and back,
        # incidences and slots (36 B), output data, index copies for the matrix
        "csr_traffic": m * (3 * index + 48 + 36 + 48) + 8 * nnz + 28 * n + 2 * (index * nnz + index * n),
    }


@pytest.fixture(scope="module")
def problem(request):
    return {}


def _peak(fn):
    with PeakMemory() as pm:
        fn()
    return pm.peak


@pytest.mark.parametrize(
    "strategy", ["triplets", "csr-first-call", "csr-numeric", "csr-numeric-data", "csr-fused"]
)
def test_stiffness(benchmark, machine, cells, strategy):
    mesh = rectangle(cells, cells)
    asm = StiffnessAssembler(mesh)
    nnz = asm.plan.nnz
    s = sizes(mesh, nnz)
    compile_s = None
    if strategy == "triplets":
        fn = lambda: assemble_stiffness(mesh, strategy="triplets")  # noqa: E731
        benchmark.pedantic(fn, **ROUNDS)
        peak = _peak(fn)
        floor, traffic = s["floor_first"], s["floor_first"]
    elif strategy == "csr-first-call":
        _, first, second = timed_first_call(lambda: assemble_stiffness(fresh(mesh)))
        compile_s = first - second
        benchmark.pedantic(
            lambda m: assemble_stiffness(m), setup=lambda: ((fresh(mesh),), {}), rounds=5
        )
        peak = _peak(lambda: assemble_stiffness(fresh(mesh)))
        floor, traffic = s["floor_first"], s["floor_first"]
    elif strategy == "csr-numeric":
        benchmark.pedantic(asm.assemble, **ROUNDS)
        peak = _peak(asm.assemble)
        floor, traffic = s["floor_numeric"], s["csr_traffic"]
    elif strategy == "csr-numeric-data":
        out = np.empty(nnz)
        benchmark.pedantic(lambda: asm.assemble_data(out=out), **ROUNDS)
        peak = _peak(lambda: asm.assemble_data(out=out))
        floor = s["floor_numeric"]
        traffic = s["csr_traffic"] - 2 * 4 * (nnz + mesh.n_points)
    else:
        fused = StiffnessAssembler(mesh, fused=True)
        out = np.empty(nnz)
        benchmark.pedantic(lambda: fused.assemble_data(out=out), **ROUNDS)
        peak = _peak(lambda: fused.assemble_data(out=out))
        floor = s["floor_numeric"]
        traffic = s["csr_traffic"] - 2 * 4 * (nnz + mesh.n_points) - 48 * 2 * mesh.n_triangles
    record(
        benchmark, machine, traffic, floor, strategy=strategy, peak_bytes=peak,
        peak_bytes_per_triangle=peak / mesh.n_triangles, compile_s=compile_s,
        plan_bytes=asm.plan.nbytes, **{k: v for k, v in s.items() if not k.startswith("floor")},
    )


@pytest.mark.parametrize("n_threads", [1, 2])
def test_stiffness_threads(benchmark, machine, cells, n_threads):
    mesh = rectangle(cells, cells)
    asm = StiffnessAssembler(mesh)
    out = np.empty(asm.plan.nnz)
    s = sizes(mesh, asm.plan.nnz)
    with threads(n_threads):
        benchmark.pedantic(lambda: asm.assemble_data(out=out), **ROUNDS)
    record(benchmark, machine, s["csr_traffic"], s["floor_numeric"], n_threads=n_threads,
           n_triangles=mesh.n_triangles)


@pytest.mark.parametrize("strategy", ["triplets", "csr"])
def test_mass(benchmark, machine, cells, strategy):
    mesh = rectangle(cells, cells)
    if strategy == "csr":
        asm = StiffnessAssembler(mesh)
        fn = asm.assemble_mass
    else:
        fn = lambda: assemble_mass(mesh, strategy="triplets")  # noqa: E731
    benchmark.pedantic(fn, **ROUNDS)
    s = sizes(mesh, fn().nnz)
    record(benchmark, machine, s["floor_numeric"], s["floor_numeric"], strategy=strategy,
           n_triangles=mesh.n_triangles)


def test_reference_small(benchmark, machine):
    """The readable specification, at a size where it is still usable."""
    mesh = rectangle(40, 40)
    benchmark.pedantic(lambda: assemble_stiffness(mesh, strategy="reference"), rounds=2,
                       iterations=1)
    s = sizes(mesh, assemble_stiffness(mesh).nnz)
    record(benchmark, machine, s["floor_first"], s["floor_first"], strategy="reference",
           n_triangles=mesh.n_triangles)


def test_memory_bandwidth(benchmark, machine):
    """The machine's floor in this run: a large NumPy copy (read + write)."""
    a = np.ones(2**26)  # 512 MiB
    b = np.empty_like(a)
    benchmark.pedantic(np.copyto, args=(b, a), rounds=5, iterations=1, warmup_rounds=1)
    record(benchmark, machine, 2 * a.nbytes, 2 * a.nbytes, kernel="numpy copy")


def test_refine(benchmark, machine, cells):
    mesh = rectangle(cells, cells)
    benchmark.pedantic(lambda m: m.refine(), setup=lambda: ((fresh(mesh),), {}), rounds=3)
    fine_tri = 4 * mesh.n_triangles
    record(benchmark, machine, 12 * fine_tri, 12 * fine_tri, n_triangles_fine=fine_tri,
           kernels_version=kernels.__version__)
