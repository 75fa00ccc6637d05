"""Benchmark suite configuration: sizes, the machine, shared problems and figures.

    python -m pytest bench --benchmark-only                       # quick sizes, < 2 minutes
    python -m pytest bench --benchmark-only --size full --benchmark-json=bench/results/full.json
    python -m pytest bench --size quick --benchmark-disable -q    # smoke: every body once
    python bench/report.py bench/results/full.json --out docs/performance.md --images docs/images

The normal test run does not collect this directory.  Sizes are
``rectangle(n, n)`` meshes of the unit square (``2 n^2`` triangles,
``(n + 1)^2`` points, ``(n - 1)^2`` unknowns after the Dirichlet boundary);
geometric multigrid gets the same mesh made by refinement (:func:`nested`).

Every benchmark leaves its figures in ``extra_info``; this is what
``bench/report.py`` reads:

``kind``
    ``assembly``, ``product``, ``vector``, ``precond-setup``,
    ``precond-apply``, ``solve``, ``refine``, ``bandwidth``, ``first-call``
``operation``, ``method``
    what is computed, and by which strategy, variant or solver
``plain``, ``baseline``
    True for the plain alternative a user would write; the plain method
    this one is compared with at the same size (None for none)
``n_triangles``, ``n_points``, ``unknowns``, ``nnz``, ``threads``, ``mesh``
``bytes_moved``, ``floor_bytes``, ``achieved_GBs``, ``floor_s``, ``fraction_of_floor``
    traffic of the implementation (a model; the floor where there is none),
    the least traffic the result needs, and the floor time at the best copy
    bandwidth measured in this run (``bandwidth_floor_GBs``: the larger of a
    one-thread NumPy copy and the same copy split over all threads)
``peak_bytes``, ``peak_source``
    peak memory of a timed call above what was resident before it
``first_call_s``, ``compile_s``
    the warm-up call (numba compiles, or loads from its cache) and its
    excess over a timed call
solves also: ``iterations``, ``assemble_s``, ``setup_s``, ``solve_s``,
``relative_residual`` (true, recomputed), ``u_max``, ``seconds_per_unknown``
"""

from __future__ import annotations

import os
import platform
import re
import sys
import time
from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np
import pytest
from benchlib import ProcessPeak, nested, refined_rectangle, round_peak  # noqa: F401 (re-exported)

from hatkernels.mesh import rectangle
from hatkernels.perf import memory_bandwidth

SIZES = {
    # cells per side of the unit-square rectangle mesh (2 n^2 triangles)
    "quick": [100, 200],
    "full": [250, 500, 1000, 2000],
}
# whole solves add 1408 (= 11 * 2^7, 3,964,928 triangles) in the full set:
# the size at which CG + gmg is compared with CG + AMG at about 4e6 triangles
SOLVE_SIZES = {"quick": [100, 200], "full": [250, 500, 1000, 1408, 2000]}

MAX_THREADS = numba.config.NUMBA_NUM_THREADS
THREADS = sorted({1, MAX_THREADS})
THREAD_IDS = [f"threads={t}" for t in THREADS]

_session = {"start": time.time()}


def pytest_addoption(parser):
    parser.addoption(
        "--size", default="quick", choices=sorted(SIZES), help="problem sizes: quick or full"
    )


def size_mode(config):
    return config.getoption("--size")


def size_id(n):
    return f"n_triangles={2 * n * n}"


def pytest_generate_tests(metafunc):
    mode = size_mode(metafunc.config)
    if "cells" in metafunc.fixturenames:
        sizes = SIZES[mode]
        metafunc.parametrize("cells", sizes, ids=[size_id(n) for n in sizes])
    if "solve_cells" in metafunc.fixturenames:
        sizes = SOLVE_SIZES[mode]
        metafunc.parametrize("solve_cells", sizes, ids=[size_id(n) for n in sizes])


def ids(name):
    """Readable parameter ids: ``strategy=csr``."""
    return lambda value: f"{name}={value}"


# -- the machine ------------------------------------------------------------------------
def cpu_model():
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def memory_total_bytes():
    try:
        with open("/proc/meminfo") as f:
            m = re.search(r"MemTotal:\s+(\d+) kB", f.read())
        return int(m.group(1)) * 1024 if m else None
    except OSError:
        return None


def versions():
    import pyamg
    import scipy

    import hatkernels

    return {"python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "numba": numba.__version__,
            "pyamg": pyamg.__version__, "hatkernels": hatkernels.__version__}


def parallel_copy_bandwidth(mbytes=512, repeats=5, n_threads=MAX_THREADS):
    """GB/s of a large NumPy copy split into ``n_threads`` slices copied at once: the
    better of a plain copy and a negated one.

    NumPy releases the GIL while it copies, so the slices run in parallel;
    on a machine whose memory one core cannot saturate this is the higher,
    truer floor for kernels that use every core.  A plain copy is a ``memcpy``,
    whose large copies write with non-temporal stores; the negated copy writes
    with ordinary stores, which on the benchmark machine (AMD EPYC, Zen 4) are the
    faster of the two (benchlib.copy_floor).
    """
    n = mbytes * 2**20 // 8
    a = np.ones(n)
    b = np.empty(n)
    parts = [slice(k * n // n_threads, (k + 1) * n // n_threads) for k in range(n_threads)]
    best = float("inf")
    with ThreadPoolExecutor(n_threads) as pool:
        for _ in range(repeats):
            for copy in (lambda s: np.copyto(b[s], a[s]), lambda s: np.negative(a[s], out=b[s])):
                t0 = time.perf_counter()
                list(pool.map(copy, parts))
                best = min(best, time.perf_counter() - t0)
    return 2 * a.nbytes / best / 1e9


@pytest.fixture(scope="session")
def bandwidth():
    """Memory bandwidth measured in this run (GB/s): copy and triad on one thread, copy on all."""
    bw = dict(memory_bandwidth())
    bw["copy_parallel"] = parallel_copy_bandwidth()
    _session["bandwidth"] = bw
    return bw


@pytest.fixture(scope="session")
def machine(bandwidth):
    return {"threads": numba.get_num_threads(), "bandwidth_copy_GBs": bandwidth["copy"],
            "bandwidth_triad_GBs": bandwidth["triad"],
            "bandwidth_copy_parallel_GBs": bandwidth["copy_parallel"],
            # the floor is judged against the best bandwidth this machine showed
            "bandwidth_floor_GBs": max(bandwidth["copy"], bandwidth["copy_parallel"])}


def pytest_benchmark_update_machine_info(config, machine_info):
    machine_info["hatkernels"] = {
        "cpu_model": cpu_model(),
        "cores": os.cpu_count(),
        "memory_bytes": memory_total_bytes(),
        "numba_threads": MAX_THREADS,
        "versions": versions(),
        "bandwidth_GBs": _session.get("bandwidth"),
        "size": size_mode(config),
    }


def pytest_benchmark_update_json(config, benchmarks, output_json):
    output_json["hatkernels_suite"] = {
        "size": size_mode(config),
        "command": " ".join(["python -m pytest"] + sys.argv[1:]),
        "wall_seconds": time.time() - _session["start"],
    }


# -- recording ----------------------------------------------------------------------------
def best_time(benchmark):
    """The best timed round (seconds), or None with --benchmark-disable."""
    stats = getattr(benchmark, "stats", None)
    return None if stats is None else stats.stats.min


def record(benchmark, machine, bytes_moved=None, floor_bytes=None, **figures):
    """Attach the standard figures to a benchmark: GB/s achieved and fraction of the floor."""
    info = benchmark.extra_info
    info.update(machine)
    info["load_avg"] = os.getloadavg()[0]
    info.setdefault("threads", numba.get_num_threads())
    info.update(figures)
    t = best_time(benchmark)
    if bytes_moved is None:
        return
    info["bytes_moved"] = int(bytes_moved)
    info["floor_bytes"] = int(floor_bytes if floor_bytes is not None else bytes_moved)
    info["floor_s"] = info["floor_bytes"] / (machine["bandwidth_floor_GBs"] * 1e9)
    if t:
        info["achieved_GBs"] = bytes_moved / t / 1e9
        info["fraction_of_floor"] = info["floor_s"] / t


def warm(benchmark, fn, setup=None, small=False):
    """Call ``fn`` twice before timing; return the first call and its excess (compile time).

    numba compiles each kernel (or loads it from its disk cache) on the first
    call in a process; that cost is reported apart, never inside the timed
    rounds.  Kernels an earlier benchmark of the session already loaded cost
    nothing here.  ``small=True``: ``fn`` runs the benchmark's code on a
    small problem (for work too slow to run twice at full size); then only
    the compile time is returned.  With --benchmark-disable nothing is run.
    """
    if benchmark.disabled:
        return {}
    times = []
    for _ in range(2):
        args = setup() if setup else ()
        t0 = time.perf_counter()
        fn(*args)
        times.append(time.perf_counter() - t0)
    compile_s = max(0.0, times[0] - times[1])
    if small:
        return {"compile_s": compile_s, "compile_probe": "small problem"}
    return {"first_call_s": times[0], "compile_s": compile_s}


def timed_with_peak(benchmark, target, setup, rounds, keep_result=True):
    """``benchmark.pedantic`` with fresh inputs each round and the peak memory of each round.

    ``setup()`` returns the target's positional arguments (built untimed,
    before the memory baseline).  The first round's peak is exact (garbage
    collection and ``malloc_trim`` first); before each later round 1.1 times
    the largest peak so far is touched and nothing is trimmed, so those
    rounds can read low and the largest peak is the one returned.  Returns ``(result of the best round,
    largest peak of any round, how the peak was measured)``; with
    --benchmark-disable, the one call's result and no peak.  ``keep_result=False``
    drops each result at once (large matrices) and returns None for it.
    """
    peaks, results = [], []
    state = {}

    def _setup():
        args = setup()
        state["peak"] = round_peak(peaks)[0]  # as the whole solves: later rounds warm
        return args, {}

    def _teardown(*args):
        p = state.pop("peak")
        p.__exit__(None, None, None)
        peaks.append(p.peak)

    def _target(*args):
        out = target(*args)
        results.append(out if keep_result else None)

    benchmark.pedantic(_target, setup=_setup, teardown=_teardown, rounds=rounds)
    if "peak" in state:  # --benchmark-disable: no teardown
        state.pop("peak").__exit__(None, None, None)
    stats = getattr(benchmark, "stats", None)
    best = 0
    if stats is not None and len(stats.stats.data) == len(results):
        best = int(np.argmin(stats.stats.data))
    source = ProcessPeak().source
    return (results[best] if results else None), (max(peaks) if peaks else None), source


def peak_of_call(benchmark, fn, *args):
    """``(peak, source)``: :class:`ProcessPeak` over one more, untimed call of ``fn(*args)``.

    For short kernels timed with plain ``benchmark.pedantic`` (products, vector
    kernels, preconditioner applications).  :func:`timed_with_peak` would run
    ProcessPeak's garbage collection and ``malloc_trim`` before every timed
    round, and each round's allocations would then fault in fresh pages, a
    cost a caller in a loop does not pay (measured: scipy's ``A @ x`` on
    40,401 points 3.4 times slower).  The call is the same as a timed one;
    a kernel that allocates nothing shows about 0.  None with
    --benchmark-disable, as :func:`timed_with_peak`.
    """
    peak = ProcessPeak()
    if benchmark.disabled:
        return None, peak.source
    with peak:
        fn(*args)
    return peak.peak, peak.source


# -- shared problems ----------------------------------------------------------------------
_meshes = {}


def shared_mesh(n, numbering="rectangle"):
    """One mesh per size and numbering for the session (an input, never a result)."""
    key = (n, numbering)
    if key not in _meshes:
        _meshes[key] = rectangle(n, n) if numbering == "rectangle" else refined_rectangle(n)
    return _meshes[key]


_systems = {}


def poisson_system(n, numbering="rectangle"):
    """``-lap u = 1``, u = 0 on the boundary: the reduced system ``(mesh, DirichletSystem)``."""
    from hatkernels import apply_dirichlet, assemble_load, assemble_stiffness

    key = (n, numbering)
    if key not in _systems:
        mesh = shared_mesh(n, numbering)
        A = assemble_stiffness(mesh)
        b = assemble_load(mesh, 1.0)
        _systems[key] = (mesh, apply_dirichlet(A, b, mesh.boundary_points()))
    return _systems[key]


def mesh_figures(mesh):
    return {"n_triangles": int(mesh.n_triangles), "n_points": int(mesh.n_points)}
