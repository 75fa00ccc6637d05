"""Sparse linear algebra benchmarks: SpMV, dot, preconditioners, CG solves.

    python -m pytest bench/test_bench_linear.py --benchmark-only -q

Every benchmark calls its function once before timing (numba compilation, or
loading it from the cache) and reports compile time apart where it applies.
Problems are pyamg.gallery.poisson grids (the 5-point Laplacian).  The load
average at the start of each benchmark is recorded (``load_avg``): other
processes on the 2 cores distort the 2-thread figures.
"""

import os
import time

import numpy as np
import pyamg
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from conftest import record

from kernels._jit import sparse as K
from kernels._jit import threads
from kernels.krylov import cg_with_history
from kernels.precond import make_preconditioner
from kernels.sparse import csr_bytes

SPMV_GRIDS = [1000, 2000]  # poisson((g, g)): 1e6 and 4e6 unknowns
GRID = 1000  # preconditioners and solves
RTOL = 1e-8
FAST = dict(rounds=20, iterations=1, warmup_rounds=2)
SLOW = dict(rounds=3, iterations=1, warmup_rounds=0)
ONCE = dict(rounds=1, iterations=1, warmup_rounds=0)

_problems = {}


def problem(grid):
    if grid not in _problems:
        A = pyamg.gallery.poisson((grid, grid), format="csr")
        b = np.random.default_rng(0).standard_normal(A.shape[0])
        _problems[grid] = (A, b)
    return _problems[grid]


def _note(benchmark, **extra):
    benchmark.extra_info["load_avg"] = os.getloadavg()[0]
    benchmark.extra_info.update(extra)


# -- SpMV -------------------------------------------------------------------------------
@pytest.mark.parametrize("nthreads", [1, 2], ids=lambda t: f"threads={t}")
@pytest.mark.parametrize("grid", SPMV_GRIDS, ids=lambda g: f"poisson={g}x{g}")
def test_spmv_ours(benchmark, machine, grid, nthreads):
    A, _ = problem(grid)
    x = np.random.default_rng(1).standard_normal(A.shape[0])
    y = np.empty_like(x)
    args = (A.indptr, A.indices, A.data, x, y)
    t0 = time.perf_counter()
    K.spmv(*args)  # compile (or load from cache)
    first = time.perf_counter() - t0
    _note(benchmark, first_call_s=first)
    with threads(nthreads):
        benchmark.pedantic(K.spmv, args=args, **FAST)
    record(benchmark, machine, csr_bytes(A), csr_bytes(A), nnz=A.nnz, nthreads=nthreads)


@pytest.mark.parametrize("grid", SPMV_GRIDS, ids=lambda g: f"poisson={g}x{g}")
def test_spmv_scipy(benchmark, machine, grid):
    A, _ = problem(grid)
    x = np.random.default_rng(1).standard_normal(A.shape[0])
    y = np.empty_like(x)
    _note(benchmark)
    # scipy's CSR product written into a preallocated output, as our kernel does
    from scipy.sparse._sparsetools import csr_matvec

    def run():
        y[:] = 0.0
        csr_matvec(A.shape[0], A.shape[1], A.indptr, A.indices, A.data, x, y)

    benchmark.pedantic(run, **FAST)
    record(benchmark, machine, csr_bytes(A), csr_bytes(A), nnz=A.nnz)


@pytest.mark.parametrize("grid", SPMV_GRIDS[:1], ids=lambda g: f"poisson={g}x{g}")
def test_spmv_scipy_operator(benchmark, machine, grid):
    """``A @ x`` as a user writes it (allocates the result)."""
    A, _ = problem(grid)
    x = np.random.default_rng(1).standard_normal(A.shape[0])
    _note(benchmark)
    benchmark.pedantic(lambda: A @ x, **FAST)
    record(benchmark, machine, csr_bytes(A), csr_bytes(A), nnz=A.nnz)


# -- dot and fused update ---------------------------------------------------------------
@pytest.mark.parametrize("impl", ["ours-1", "ours-2", "numpy"])
@pytest.mark.parametrize("n", [10**6, 16 * 10**6], ids=lambda n: f"n={n}")
def test_dot(benchmark, machine, n, impl):
    rng = np.random.default_rng(2)
    x, y = rng.standard_normal(n), rng.standard_normal(n)
    K.dot(x, y)
    _note(benchmark)
    if impl == "numpy":
        benchmark.pedantic(np.dot, args=(x, y), **FAST)
    else:
        with threads(int(impl[-1])):
            benchmark.pedantic(K.dot, args=(x, y), **FAST)
    record(benchmark, machine, 16 * n, 16 * n)


@pytest.mark.parametrize("impl", ["fused-1", "fused-2", "numpy"])
def test_cg_update(benchmark, machine, impl):
    """x += alpha p; r -= alpha q; r.r -- fused in one pass vs three NumPy statements."""
    n = GRID * GRID
    rng = np.random.default_rng(3)
    p, q, x, r = (rng.standard_normal(n) for _ in range(4))
    K.cg_step(1e-9, p, q, x, r)
    _note(benchmark)
    if impl == "numpy":
        def run():
            x.__iadd__(1e-9 * p)
            r.__isub__(1e-9 * q)
            return r @ r
        benchmark.pedantic(run, **FAST)
    else:
        with threads(int(impl[-1])):
            benchmark.pedantic(K.cg_step, args=(1e-9, p, q, x, r), **FAST)
    record(benchmark, machine, 8 * 6 * n, 8 * 6 * n)  # read p, q, x, r; write x, r


# -- preconditioners: setup and apply ---------------------------------------------------
VARIANTS = {
    "none": ("none", {}),
    "jacobi": ("jacobi", {}),
    "ic0": ("ic0", {}),
    "ic0-modified": ("ic0", {"modified": True}),
    "amg-sa": ("amg-sa", {}),
    "amg-rs": ("amg-rs", {}),
    "amg-sa-chebyshev2": ("amg-sa", {"smoother": "chebyshev", "degree": 2}),
    "amg-sa-chebyshev3": ("amg-sa", {"smoother": "chebyshev", "degree": 3}),
    "amg-rs-chebyshev2": ("amg-rs", {"smoother": "chebyshev", "degree": 2}),
    "amg-rs-chebyshev3": ("amg-rs", {"smoother": "chebyshev", "degree": 3}),
    "direct": ("direct", {"max_unknowns": GRID * GRID}),
}
_built = {}


def _warm(name, options):
    """Compile every kernel the variant uses on a small problem."""
    A, b = problem(40)
    M = make_preconditioner(A, name, **options)
    cg_with_history(A, b, M=M, maxiter=3)


def built(variant):
    if variant not in _built:
        name, options = VARIANTS[variant]
        _warm(name, options)
        A, _ = problem(GRID)
        _built[variant] = make_preconditioner(A, name, **options)
    return _built[variant]


@pytest.mark.parametrize("variant", VARIANTS)
def test_precond_setup(benchmark, machine, variant):
    name, options = VARIANTS[variant]
    _warm(name, options)
    A, _ = problem(GRID)
    _note(benchmark)
    M = benchmark.pedantic(make_preconditioner, args=(A, name), kwargs=options,
                           **(ONCE if variant == "direct" else SLOW))
    _built[variant] = M
    benchmark.extra_info.update(description=M.description, memory_bytes=M.memory_bytes,
                                memory_bytes_per_unknown=M.memory_bytes / A.shape[0])


@pytest.mark.parametrize("variant", VARIANTS)
def test_precond_apply(benchmark, machine, variant):
    M = built(variant)
    A, b = problem(GRID)
    M @ b
    _note(benchmark, description=M.description)
    benchmark.pedantic(M.matvec, args=(b,), rounds=10, iterations=1, warmup_rounds=1)


# -- CG solves --------------------------------------------------------------------------
SOLVE_VARIANTS = list(VARIANTS)


@pytest.mark.parametrize("nthreads", [1, 2], ids=lambda t: f"threads={t}")
@pytest.mark.parametrize("variant", SOLVE_VARIANTS)
def test_solve_ours(benchmark, machine, variant, nthreads):
    if nthreads == 1 and "amg" not in variant:
        pytest.skip("1-thread solves are measured for the AMG smoother experiment only")
    M = built(variant)
    A, b = problem(GRID)
    _note(benchmark, description=M.description, setup_s=M.setup_seconds)
    outcome = {}

    def run():
        outcome["r"] = cg_with_history(A, b, rtol=RTOL, M=M)

    slow = variant in ("none", "jacobi", "ic0", "ic0-modified")
    with threads(nthreads):
        benchmark.pedantic(run, **(ONCE if slow else SLOW))
    res = outcome["r"]
    assert res.info == 0
    benchmark.extra_info.update(iterations=res.iterations, nthreads=nthreads,
                                setup_plus_solve_s=M.setup_seconds + benchmark.stats.stats.min,
                                per_iteration_ms=1e3 * benchmark.stats.stats.min / res.iterations)


@pytest.mark.parametrize("variant", ["none", "jacobi", "ic0", "amg-sa", "amg-rs"])
def test_solve_scipy_cg(benchmark, machine, variant):
    """scipy.sparse.linalg.cg with the same preconditioner objects (ours for M)."""
    M = None if variant == "none" else built(variant)
    A, b = problem(GRID)
    _note(benchmark)
    iterations = []

    def run():
        iterations.clear()
        x, info = sla.cg(A, b, rtol=RTOL, M=M, callback=lambda xk: iterations.append(1))
        assert info == 0

    benchmark.pedantic(run, **(SLOW if "amg" in variant else ONCE))
    benchmark.extra_info["iterations"] = len(iterations)


@pytest.mark.parametrize("method", ["sa", "rs"])
def test_solve_pyamg(benchmark, machine, method):
    """PyAMG used as documented: build the hierarchy, then ml.solve(b, accel='cg')."""
    A, b = problem(GRID)
    build = pyamg.smoothed_aggregation_solver if method == "sa" else pyamg.ruge_stuben_solver
    t0 = time.perf_counter()
    ml = build(A)
    setup = time.perf_counter() - t0
    _note(benchmark, setup_s=setup)
    residuals = []

    def run():
        residuals.clear()
        ml.solve(b, tol=RTOL, accel="cg", residuals=residuals)

    benchmark.pedantic(run, **SLOW)
    benchmark.extra_info.update(iterations=len(residuals) - 1,
                                setup_plus_solve_s=setup + benchmark.stats.stats.min)


# -- IC(0) kernels against their plain versions -------------------------------------------
@pytest.mark.parametrize("impl", ["kernel", "reference"])
def test_ic0_factor_vs_reference(benchmark, impl):
    """Factorisation: the numba kernel against the readable dense specification (small grid)."""
    from kernels.precond.ichol import IncompleteCholesky, ic0_reference

    A, _ = problem(20)
    IncompleteCholesky(A)
    _note(benchmark, n=A.shape[0])
    fn = (lambda: IncompleteCholesky(A)) if impl == "kernel" else (lambda: ic0_reference(A))
    benchmark.pedantic(fn, rounds=3, iterations=1, warmup_rounds=0)


@pytest.mark.parametrize("impl", ["kernel", "scipy-triangular"])
def test_ic0_apply_vs_scipy(benchmark, machine, impl):
    """(L L^T)^-1 r: our two serial sweeps against two scipy.sparse.linalg.spsolve_triangular."""
    M = built("ic0")
    A, b = problem(GRID)
    _note(benchmark)
    if impl == "kernel":
        fn = lambda: M.matvec(b)  # noqa: E731
    else:
        L = M.L
        U = sp.csr_array(L.T)

        def fn():
            y = sla.spsolve_triangular(L, b, lower=True)
            return sla.spsolve_triangular(U, y, lower=False)

        assert np.allclose(fn(), M.matvec(b))
    benchmark.pedantic(fn, **SLOW)
