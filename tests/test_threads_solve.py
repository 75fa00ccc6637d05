"""Whole solves give the same bits on 1 and 2 threads, with every multigrid preconditioner.

The kernels reduce over fixed chunks and own their output rows (DESIGN, kernel
rules), so a solve through :func:`hatkernels.solve` or
:func:`hatkernels.solve_poisson` must not depend on the thread count.  The mesh
is large enough (14,641 points, several dot-product chunks and many rows per
thread) for numba to split every parallel loop between the two threads.
"""

import numpy as np
import pytest
from conftest import two_threads

import hatkernels
from hatkernels.mesh import rectangle

AMG = ("amg", "amg-native", "amg-rs", "amg-sa")


@pytest.fixture(scope="module")
def mesh():
    return rectangle(120, 120)


def _solve_poisson(mesh, preconditioner, n_threads):
    with hatkernels.threads(n_threads):
        np.random.seed(0)  # noqa: NPY002 (amg-sa: PyAMG draws from numpy's global generator)
        return hatkernels.solve_poisson(mesh, 1.0, preconditioner=preconditioner, rtol=1e-10)


@two_threads
@pytest.mark.parametrize("preconditioner", AMG)
def test_solve_poisson_same_bits_on_one_and_two_threads(mesh, preconditioner):
    one = _solve_poisson(mesh, preconditioner, 1)
    two = _solve_poisson(mesh, preconditioner, 2)
    assert one.stats.converged and two.stats.converged
    assert one.stats.threads == 1 and two.stats.threads == 2
    assert one.stats.iterations == two.stats.iterations
    assert np.array_equal(one.u, two.u)
    assert np.array_equal(one.stats.residuals, two.stats.residuals)


@two_threads
def test_gmg_solve_same_bits_on_one_and_two_threads():
    fine = rectangle(30, 30).refine().refine()  # 120 x 120 cells with a refinement history
    one = _solve_poisson(fine, "gmg", 1)
    two = _solve_poisson(fine, "gmg", 2)
    assert one.stats.converged and two.stats.iterations == one.stats.iterations
    assert np.array_equal(one.u, two.u)
    assert np.array_equal(one.stats.residuals, two.stats.residuals)


@two_threads
@pytest.mark.parametrize("preconditioner", AMG)
def test_solve_on_the_assembled_system_same_bits(mesh, preconditioner):
    # hatkernels.solve on a matrix alone: the preconditioner is built from the matrix only
    A = hatkernels.assemble_stiffness(mesh)
    inner = np.setdiff1d(np.arange(mesh.n_points), mesh.boundary_points())
    A = A[inner][:, inner].tocsr()
    b = np.random.default_rng(3).standard_normal(A.shape[0])
    runs = []
    for n in (1, 2):
        with hatkernels.threads(n):
            np.random.seed(0)  # noqa: NPY002 (amg-sa: PyAMG draws from numpy's global generator)
            runs.append(hatkernels.solve(A, b, preconditioner=preconditioner, rtol=1e-10))
    assert runs[0].converged and runs[0].iterations == runs[1].iterations
    assert np.array_equal(runs[0].x, runs[1].x)
