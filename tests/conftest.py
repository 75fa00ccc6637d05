"""Shared fixtures and hypothesis strategies."""

import os
import warnings

import numba
import numpy as np
import pytest
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st

import hatkernels

settings.register_profile(
    "ci",
    max_examples=int(os.environ.get("HATKERNELS_EXAMPLES", "20")),
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
    derandomize=True,
)
settings.load_profile("ci")

#: Machine epsilon of float64, the unit of the round-off tolerances in the tests.
EPS = np.finfo(np.float64).eps

#: Threads numba can really run at once: a 1-vs-2-thread test needs two of them,
#: else ``hatkernels.threads(2)`` fails (fewer numba threads) or runs both halves on
#: one core, where a race in a kernel cannot show.
N_THREADS = min(os.cpu_count() or 1, numba.config.NUMBA_NUM_THREADS)

#: The one guard for 1-vs-2-thread tests: ``@two_threads`` (from conftest) or
#: ``@pytest.mark.two_threads``; both skip with the reason on a single core.
TWO_THREADS_REASON = (
    f"a 1-vs-2-thread test needs 2 cores and 2 numba threads; this machine has "
    f"{os.cpu_count()} cores and NUMBA_NUM_THREADS={numba.config.NUMBA_NUM_THREADS}"
)
two_threads = pytest.mark.skipif(N_THREADS < 2, reason=TWO_THREADS_REASON)


def pytest_configure(config):
    config.addinivalue_line(
        "markers", "two_threads: a 1-vs-2-thread test; skipped unless 2 threads can run"
    )


def pytest_runtest_setup(item):
    if item.get_closest_marker("two_threads") is not None and N_THREADS < 2:
        pytest.skip(TWO_THREADS_REASON)


def relative_error(actual, expected):
    """``||actual - expected|| / ||expected||`` (2-norm; Frobenius for sparse matrices).

    Round-off agreements in the tests are ``relative_error(a, b) <= k * EPS`` with a
    modest ``k``: a wrong entry anywhere moves the norm far more than that.
    """
    import scipy.sparse as sp

    if sp.issparse(actual) or sp.issparse(expected):
        diff = sp.csr_matrix(actual) - sp.csr_matrix(expected)
        num = np.sqrt((abs(diff).power(2)).sum())
        den = np.sqrt((abs(sp.csr_matrix(expected)).power(2)).sum())
    else:
        a, b = np.asarray(actual, dtype=float), np.asarray(expected, dtype=float)
        if a.shape != b.shape:
            raise AssertionError(f"shapes differ: {a.shape} and {b.shape}")
        num, den = np.linalg.norm(a - b), np.linalg.norm(b)
    if den == 0:
        return float(num)
    return float(num / den)


def jittered_mesh(n, seed, jitter=0.3, shuffle=True):
    """Delaunay mesh of an n x n grid of points moved randomly by up to ``jitter`` cells.

    Interior points only are moved, so the domain stays the unit square.
    """
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 1.0, n + 1)
    X, Y = np.meshgrid(x, x)
    p = np.column_stack([X.ravel(), Y.ravel()])
    inner = (p > 0).all(axis=1) & (p < 1).all(axis=1)
    p[inner] += rng.uniform(-jitter, jitter, size=(inner.sum(), 2)) / n
    if shuffle:
        p = p[rng.permutation(len(p))]
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a valid Delaunay mesh needs no repairs
        return hatkernels.mesh.triangulate(p)


@st.composite
def meshes(draw, min_n=2, max_n=7):
    """Random valid meshes of the unit square."""
    n = draw(st.integers(min_n, max_n))
    seed = draw(st.integers(0, 2**32 - 1))
    return jittered_mesh(n, seed)


def refined(mesh, k):
    """``mesh.refine()`` repeated ``k`` times."""
    for _ in range(k):
        mesh = mesh.refine()
    return mesh


@pytest.fixture
def random_mesh():
    return jittered_mesh(6, 1234)


#: Second copies reported by pytest-xdist workers, read by the controller at the end.
_SECOND_COPIES = []


def _second_copy():
    """Where the source folder was imported from as ``kernels``, or None."""
    import sys

    module = sys.modules.get("kernels")
    return None if module is None else str(getattr(module, "__file__", None) or module)


@pytest.hookimpl(optionalhook=True)  # a pytest-xdist hook: unknown (and unused) without it
def pytest_testnodedown(node, error):
    found = getattr(node, "workeroutput", {}).get("second_copy")
    if found:
        _SECOND_COPIES.append(found)


def pytest_sessionfinish(session, exitstatus):
    """Fail the run if anything imported the source folder as ``kernels``: a second copy.

    Under pytest-xdist the tests run in worker processes, whose own exit status does
    not reach the run's: each worker hands what it found to the controller
    (``workeroutput``, read in ``pytest_testnodedown``), which fails the run.
    """
    import sys

    found = _second_copy()
    workeroutput = getattr(session.config, "workeroutput", None)
    if workeroutput is not None:  # an xdist worker
        workeroutput["second_copy"] = found
        return
    found = found or next(iter(_SECOND_COPIES), None)
    if found and session.exitstatus == 0:
        sys.stderr.write("\nthe library was imported a second time as 'kernels' "
                         f"(from {found}); import hatkernels\n")
        session.exitstatus = 1
