"""Assembly benchmarks: every strategy side by side, with the bandwidth floor.

    python -m pytest bench/test_bench_assembly.py --benchmark-only [--size full]

Strategies (stiffness):

``triplets``        the plain alternative: vectorised NumPy element matrices, scipy COO -> CSR
``csr-first-call``  ``assemble_stiffness(mesh)`` on a mesh that has computed nothing yet:
                    topology, symbolic phase (pattern and slot plan) and numeric phase
``csr``             ``StiffnessAssembler.assemble()``: re-assembly, numeric phase and a new matrix
``csr-data``        ``assemble_data(out=...)``: the numeric phase alone, into the matrix data
``csr-fused``       the same with element values computed inside the gather
``reference``       plain loops, the executable specification (a small mesh only)

Every round gets inputs a user would have: a fresh mesh where the strategy
would otherwise reuse its cached topology, the same assembler where reuse is
the point of the strategy.  Peak memory is the process's resident high-water
mark during the timed rounds (``conftest.ProcessPeak``).
"""

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from conftest import (
    MAX_THREADS,
    THREADS,
    mesh_figures,
    record,
    size_mode,
    timed_with_peak,
    warm,
)

import hatkernels
from hatkernels import StiffnessAssembler, assemble_mass, assemble_stiffness, threads
from hatkernels.mesh import Mesh, rectangle
from hatkernels.perf import PeakMemory
from hatkernels.traffic import assembly_floors as floors


def fresh(mesh):
    """The same mesh with no cached topology, so that a first call pays for everything."""
    return Mesh._trusted(mesh.points, mesh.triangles)


def rounds(config, mesh):
    if size_mode(config) == "quick":
        return 3
    return 5 if mesh.n_triangles <= 2_000_000 else 3


def _stiffness_case(strategy, mesh, assembler):
    """(function, per-round setup, traffic, floor) for one strategy."""
    f = floors(mesh, assembler.plan)
    nnz, n = assembler.plan.nnz, mesh.n_points
    index = assembler.plan.indices.dtype.itemsize
    if strategy == "triplets":
        return (lambda m: assemble_stiffness(m, strategy="triplets"),
                lambda: (fresh(mesh),), f["first"], f["first"])
    if strategy == "csr-first-call":
        return lambda m: assemble_stiffness(m), lambda: (fresh(mesh),), f["first"], f["first"]
    if strategy == "csr":
        # numeric phase, then copies of the pattern for the new matrix
        traffic = f["csr_data"] + 2 * index * (nnz + n + 1)
        return lambda: assembler.assemble(), lambda: (), traffic, f["numeric"]
    out = np.empty(nnz)
    if strategy == "csr-data":
        return lambda: assembler.assemble_data(out=out), lambda: (), f["csr_data"], f["numeric"]
    fused = StiffnessAssembler(mesh, fused=True)
    traffic = f["csr_data"] - 2 * 48 * mesh.n_triangles  # no element values stored
    return lambda: fused.assemble_data(out=out), lambda: (), traffic, f["numeric"]


STIFFNESS_CASES = [
    pytest.param(s, t, id=f"strategy={s}-threads={t}")
    for s in ["triplets", "csr-first-call", "csr", "csr-data", "csr-fused"]
    for t in (THREADS if s in ("csr-first-call", "csr-data") else [MAX_THREADS])
]


@pytest.mark.parametrize("strategy, n_threads", STIFFNESS_CASES)
def test_stiffness(benchmark, machine, request, cells, strategy, n_threads):
    mesh = rectangle(cells, cells)
    assembler = StiffnessAssembler(mesh)
    fn, setup, traffic, floor = _stiffness_case(strategy, mesh, assembler)
    with threads(n_threads):
        first = warm(benchmark, fn, setup)
        _, peak, source = timed_with_peak(benchmark, fn, setup, rounds(request.config, mesh),
                                          False)
        traced = None if benchmark.disabled else _traced_peak(fn, setup)
    # the scatter's plan, once a variant that makes it has run: its bytes and how many
    # triangles went into pairs (docs/assembly.md, "Triangles in pairs")
    scatter = assembler._numeric._scatter
    pairs = {} if not scatter else {
        "scatter_plan_bytes": int(scatter.nbytes),
        "paired_fraction": 2 * scatter.n_pairs / mesh.n_triangles}
    record(
        benchmark, machine, traffic, floor, kind="assembly", operation="stiffness",
        method=strategy, plain=strategy == "triplets",
        baseline=None if strategy == "triplets" else "triplets", threads=n_threads,
        nnz=int(assembler.plan.nnz), plan_bytes=int(assembler.plan.nbytes), peak_bytes=peak,
        peak_source=source, peak_traced_bytes=traced, **mesh_figures(mesh), **first, **pairs,
    )


def _traced_peak(fn, setup):
    """The same call once more under tracemalloc (NumPy arrays only; numba scratch unseen)."""
    args = setup()
    with PeakMemory() as pm:
        fn(*args)
    return pm.peak


@pytest.mark.parametrize("strategy", ["triplets", "csr-first-call", "csr"], ids=lambda s: f"strategy={s}")
def test_mass(benchmark, machine, request, cells, strategy):
    mesh = rectangle(cells, cells)
    assembler = StiffnessAssembler(mesh)
    f = floors(mesh, assembler.plan)
    if strategy == "triplets":
        fn, setup = (lambda m: assemble_mass(m, strategy="triplets")), (lambda: (fresh(mesh),))
        traffic = floor = f["first"]
    elif strategy == "csr-first-call":
        fn, setup = (lambda m: assemble_mass(m)), (lambda: (fresh(mesh),))
        traffic = floor = f["first"]
    else:
        fn, setup = assembler.assemble_mass, (lambda: ())
        traffic, floor = f["csr_data"], f["numeric"]
    first = warm(benchmark, fn, setup)
    _, peak, source = timed_with_peak(benchmark, fn, setup, rounds(request.config, mesh), False)
    record(
        benchmark, machine, traffic, floor, kind="assembly", operation="mass", method=strategy,
        plain=strategy == "triplets", baseline=None if strategy == "triplets" else "triplets",
        nnz=int(assembler.plan.nnz), peak_bytes=peak, peak_source=source, **mesh_figures(mesh),
        **first,
    )


@pytest.mark.parametrize("strategy", ["reference", "triplets", "csr-first-call"], ids=lambda s: f"strategy={s}")
def test_stiffness_reference(benchmark, machine, strategy):
    """The readable specification, at a size where it is still usable, beside the others."""
    mesh = rectangle(40, 40)
    name = "csr" if strategy == "csr-first-call" else strategy
    fn = lambda m: assemble_stiffness(m, strategy=name)  # noqa: E731
    setup = lambda: (fresh(mesh),)  # noqa: E731
    first = warm(benchmark, fn, setup)
    _, peak, source = timed_with_peak(benchmark, fn, setup, 3, False)
    f = floors(mesh, StiffnessAssembler(mesh).plan)
    record(
        benchmark, machine, f["first"], f["first"], kind="assembly", operation="stiffness",
        method=strategy, plain=strategy == "triplets",
        baseline=None if strategy == "triplets" else "triplets",
        nnz=int(assemble_stiffness(mesh).nnz), peak_bytes=peak, peak_source=source,
        **mesh_figures(mesh), **first,
    )


@pytest.mark.parametrize("n_threads", THREADS, ids=lambda t: f"threads={t}")
def test_memory_bandwidth(benchmark, machine, n_threads):
    """The machine's floor in this run: a large NumPy copy (read + write), split over threads."""
    a = np.ones(2**26)  # 512 MiB
    b = np.empty_like(a)
    parts = [slice(k * a.size // n_threads, (k + 1) * a.size // n_threads)
             for k in range(n_threads)]
    with ThreadPoolExecutor(n_threads) as pool:
        def copy():
            list(pool.map(lambda s: np.copyto(b[s], a[s]), parts))

        benchmark.pedantic(copy, rounds=5, iterations=1, warmup_rounds=1)
    record(benchmark, machine, 2 * a.nbytes, 2 * a.nbytes, kind="bandwidth",
           operation="copy", method="numpy copy", plain=True, baseline=None, threads=n_threads)


def test_refine(benchmark, machine, request, cells):
    """Uniform refinement of a mesh that has computed nothing yet (edges included)."""
    mesh = rectangle(cells, cells)
    fn = lambda m: m.refine()  # noqa: E731
    setup = lambda: (fresh(mesh),)  # noqa: E731
    first = warm(benchmark, fn, setup)
    _, peak, source = timed_with_peak(benchmark, fn, setup, rounds(request.config, mesh), False)
    fine_tri = 4 * mesh.n_triangles
    index = mesh.triangles.dtype.itemsize
    # least traffic: read the coarse mesh, write the fine one
    floor = mesh.triangles.nbytes + mesh.points.nbytes + 3 * index * fine_tri + 16 * (
        mesh.n_points + len(mesh.edges()))
    record(benchmark, machine, floor, floor, kind="refine", operation="refine", method="refine",
           plain=False, baseline=None, n_triangles_fine=fine_tri, peak_bytes=peak,
           peak_source=source, kernels_version=hatkernels.__version__, **mesh_figures(mesh), **first)

