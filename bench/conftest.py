"""Benchmark suite configuration: sizes, the machine's bandwidth, shared figures.

Run with ``python -m pytest bench --benchmark-only`` (add ``--size full`` for
the report sizes, ``--benchmark-json=FILE`` to save).  The normal test run
does not collect this directory.
"""

import numba
import numpy as np
import pytest

from kernels.perf import memory_bandwidth

SIZES = {
    # cells per side of the unit-square rectangle mesh (2 n^2 triangles)
    "quick": [200],
    "full": [250, 500, 1000, 2000],
}


def pytest_addoption(parser):
    parser.addoption(
        "--size", default="quick", choices=sorted(SIZES), help="problem sizes: quick or full"
    )


def pytest_generate_tests(metafunc):
    if "cells" in metafunc.fixturenames:
        sizes = SIZES[metafunc.config.getoption("--size")]
        metafunc.parametrize("cells", sizes, ids=[f"n_triangles={2 * n * n}" for n in sizes])


@pytest.fixture(scope="session")
def bandwidth():
    """Memory bandwidth measured in this run (GB/s), copy and triad."""
    return memory_bandwidth()


@pytest.fixture(scope="session")
def machine(bandwidth):
    return {"threads": numba.get_num_threads(), "bandwidth_copy_GBs": bandwidth["copy"],
            "bandwidth_triad_GBs": bandwidth["triad"], "numpy": np.__version__,
            "numba": numba.__version__}


def record(benchmark, machine, bytes_moved, floor_bytes, **figures):
    """Attach the standard figures to a benchmark: GB/s achieved and fraction of the floor."""
    t = benchmark.stats.stats.min
    info = benchmark.extra_info
    info.update(machine)
    info.update(figures)
    info["bytes_moved"] = int(bytes_moved)
    info["floor_bytes"] = int(floor_bytes)
    info["achieved_GBs"] = bytes_moved / t / 1e9
    info["floor_s"] = floor_bytes / (machine["bandwidth_copy_GBs"] * 1e9)
    info["fraction_of_floor"] = info["floor_s"] / t
