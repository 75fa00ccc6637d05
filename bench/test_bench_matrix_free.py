"""Matrix-free products and CG + gmg against CSR products and CG + AMG.

    python -m pytest bench/test_bench_matrix_free.py --benchmark-only [--size full]

Side by side in one run: each matrix-free variant, scipy's CSR product and
this project's parallel CSR product (time and bytes stored); then whole
solves, CG + gmg (matrix-free) against CG + AMG (assembled), end to end.
Peak memory of a whole solve is measured in a fresh process (its resident
high-water mark) so that one solve's memory does not hide another's.
"""

import json
import subprocess
import sys

import numpy as np
import pytest
from conftest import record
from scipy.sparse._sparsetools import csr_matvec

from kernels import StiffnessOperator, assemble_stiffness, solve_poisson, threads
from kernels._jit import sparse as _k
from kernels.mesh import rectangle
from kernels.operators import VARIANTS
from kernels.sparse import csr_bytes

FAST = dict(rounds=10, iterations=1, warmup_rounds=2)
ONCE = dict(rounds=1, iterations=1, warmup_rounds=0)

# coarse rectangle(88, 88) refined k times: 0.99e6, 3.96e6, 15.9e6 triangles
SOLVE_LEVELS = {"quick": [2], "full": [3, 4, 5]}


@pytest.fixture(scope="module")
def product_mesh(request):
    n = 1000 if request.config.getoption("--size") == "full" else 200
    return rectangle(n, n)


def _vectors(n):
    x = np.random.default_rng(0).standard_normal(n)
    return x, np.empty(n)


@pytest.mark.parametrize("n_threads", [1, 2])
@pytest.mark.parametrize("variant", VARIANTS)
def test_matrix_free_product(benchmark, machine, product_mesh, variant, n_threads):
    m = product_mesh
    op = StiffnessOperator(m, variant=variant, block_size=1024)
    x, y = _vectors(m.n_points)
    op.matvec_into(x, y)  # compile or load from the cache
    with threads(n_threads):
        benchmark.pedantic(op.matvec_into, args=(x, y), **FAST)
    # bytes read: triangles and coordinates (geometry), or stored values; x gathered, y read+written
    mesh_bytes = m.triangles.nbytes + m.points.nbytes
    moved = {
        "geometry": mesh_bytes,
        "factors": m.triangles.nbytes + 24 * m.n_triangles,
        "edges": op.nbytes,
    }[variant] + 3 * 8 * m.n_points
    A = assemble_stiffness(m)
    record(
        benchmark,
        machine,
        moved,
        moved,
        variant=variant,
        n_threads=n_threads,
        n_triangles=m.n_triangles,
        stored_bytes=op.nbytes,
        csr_bytes=csr_bytes(A),
        colours=op.n_colours,
    )


@pytest.mark.parametrize("impl", ["scipy", "ours-1", "ours-2"])
def test_csr_product(benchmark, machine, product_mesh, impl):
    m = product_mesh
    A = assemble_stiffness(m)
    x, y = _vectors(m.n_points)
    if impl == "scipy":

        def run():
            y[:] = 0.0
            csr_matvec(A.shape[0], A.shape[1], A.indptr, A.indices, A.data, x, y)

        benchmark.pedantic(run, **FAST)
    else:
        args = (A.indptr, A.indices, A.data, x, y)  # the kernel CG uses, on checked arrays
        _k.spmv(*args)
        with threads(int(impl[-1])):
            benchmark.pedantic(_k.spmv, args=args, **FAST)
    moved = csr_bytes(A) + 2 * 8 * m.n_points
    record(
        benchmark,
        machine,
        moved,
        moved,
        impl=impl,
        n_triangles=m.n_triangles,
        stored_bytes=csr_bytes(A),
    )


_PEAK = """
import json, sys, kernels
m = kernels.mesh.rectangle({cells}, {cells})
for _ in range({levels}):
    m = m.refine()
sol = kernels.solve_poisson(m, 1.0, preconditioner="{pc}", rtol=1e-8)
print(json.dumps({{"peak": sol.stats["peak_rss_bytes"], "it": sol.stats["iterations"]}}))
"""


def _fresh_process_peak(levels, pc, cells=88):
    out = subprocess.run(
        [sys.executable, "-c", _PEAK.format(levels=levels, pc=pc, cells=cells)],
        capture_output=True,
        text=True,
        check=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def pytest_generate_tests(metafunc):
    if "levels" in metafunc.fixturenames:
        size = metafunc.config.getoption("--size")
        lv = SOLVE_LEVELS[size]
        metafunc.parametrize("levels", lv, ids=[f"n_triangles={2 * 88 * 88 * 4**k}" for k in lv])


@pytest.mark.parametrize("preconditioner", ["gmg", "amg"])
def test_solve_end_to_end(benchmark, machine, levels, preconditioner):
    m = rectangle(88, 88)
    for _ in range(levels):
        m = m.refine()
    result = {}

    def run():
        result["sol"] = solve_poisson(m, 1.0, preconditioner=preconditioner, rtol=1e-8)

    run()  # compile or load every kernel
    benchmark.pedantic(run, **ONCE)
    sol = result["sol"]
    # the same solve on a tiny mesh: interpreter, libraries and compiled kernels
    base = _fresh_process_peak(1, preconditioner, cells=4)["peak"]
    peak = _fresh_process_peak(levels, preconditioner)
    st = sol.stats
    record(
        benchmark,
        machine,
        0,
        0,
        preconditioner=preconditioner,
        n_triangles=m.n_triangles,
        iterations=st["iterations"],
        timings=st["timings"],
        matrix_free=st["matrix_free"],
        peak_rss_bytes=peak["peak"],
        peak_above_start_bytes=peak["peak"] - base,
        seconds_per_unknown=st["timings"]["total"] / st["unknowns"],
    )
