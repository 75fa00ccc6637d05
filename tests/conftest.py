"""Shared fixtures and hypothesis strategies."""

import os
import warnings

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


@pytest.fixture
def random_mesh():
    return jittered_mesh(6, 1234)


def pytest_sessionfinish(session, exitstatus):
    """Fail the run if anything imported the source folder as ``kernels``: a second copy."""
    import sys

    if "kernels" in sys.modules and session.exitstatus == 0:
        sys.stderr.write("\nthe library was imported a second time as 'kernels' "
                         f"(from {sys.modules['kernels'].__file__}); import hatkernels\n")
        session.exitstatus = 1
