"""The block eigensolver (hatkernels.eigenblock) and its kernels (hatkernels._jit.blocks).

References outside the project: scipy's sparse products and dense
``scipy.linalg.eigh`` / ``eigsh`` (reference libraries); the unit square's
Dirichlet eigenvalues ``(a^2 + b^2) pi^2`` by separation of variables
(common practice, no source); Rayleigh-Ritz values bound the eigenvalues from
above and do not increase when the subspace grows (the Courant-Fischer
minimum-maximum principle; common practice, no source).
"""

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from hypothesis import given, settings
from hypothesis import strategies as st

from hatkernels import ConvergenceError, apply_dirichlet, threads
from hatkernels._jit import blocks as kb
from hatkernels.assembly import assemble_mass, assemble_stiffness
from hatkernels.eigenblock import PencilBlocks, ritz, run, shared_pattern
from hatkernels.mesh import rectangle


def dirichlet_square(cells):
    mesh = rectangle(cells, cells)
    zeros = np.zeros(mesh.n_points)
    held = mesh.boundary_points()
    K = apply_dirichlet(assemble_stiffness(mesh), zeros, held).A
    M = apply_dirichlet(assemble_mass(mesh), zeros, held).A
    return K, M


class ExactInverse:
    """A preconditioner that solves with K (SuperLU): LOBPCG then converges in a few steps."""

    def __init__(self, K):
        self.lu = sla.splu(K.tocsc())

    def apply_into(self, r, out):
        out[:] = self.lu.solve(r)


class Jacobi:
    def __init__(self, K):
        self.d = 1.0 / K.diagonal()

    def apply_into(self, r, out):
        np.multiply(self.d, r, out=out)


def random_pair(seed, n, density, int64):
    """Two CSR matrices on one random pattern (diagonal included), sorted indices."""
    rng = np.random.default_rng(seed)
    A = sp.random(n, n, density=density, random_state=rng, format="csr") + sp.eye(n)
    A = A.tocsr()
    A.sort_indices()
    B = A.copy()
    B.data = rng.standard_normal(A.nnz)
    if int64:
        for C in (A, B):
            C.indptr, C.indices = C.indptr.astype(np.int64), C.indices.astype(np.int64)
    return A, B


# -- kernels against scipy and NumPy ------------------------------------------------------
@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 60), r=st.integers(1, 7),
       density=st.floats(0.0, 0.5), int64=st.booleans())
def test_pair_product_equals_scipys_products(seed, n, r, density, int64):
    A, B = random_pair(seed, n, density, int64)
    x = np.random.default_rng(seed + 1).standard_normal((n, r))
    ax, bx = np.full((n, r), np.nan), np.full((n, r), np.nan)
    kb.pair_product(A.indptr, A.indices, A.data, B.data, x, ax, bx)
    np.testing.assert_allclose(ax, A @ x, rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(bx, B @ x, rtol=1e-13, atol=1e-13)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 9000), r=st.integers(1, 5))
def test_residual_rows_and_from_rows_equal_numpy(seed, n, r):
    rng = np.random.default_rng(seed)
    ax, bx = rng.standard_normal((n, r)), rng.standard_normal((n, r))
    theta = rng.standard_normal(r)
    rows = np.empty((r, n))
    kb.residual_rows(ax, bx, theta, rows)
    np.testing.assert_array_equal(rows, (ax - bx * theta).T)
    back = np.empty((n, r))
    kb.from_rows(rows, back)
    np.testing.assert_array_equal(back, rows.T)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 7000), m=st.integers(1, 6),
       pairs=st.lists(st.tuples(st.integers(0, 3), st.integers(0, 3)), min_size=1, max_size=5))
def test_gram_pairs_equal_numpys_products(seed, n, m, pairs):
    pool = np.random.default_rng(seed).standard_normal((4, n, m))
    left = np.array([a for a, _ in pairs], dtype=np.int64)
    right = np.array([b for _, b in pairs], dtype=np.int64)
    out = np.full((len(pairs), m, m), np.nan)
    kb.gram_pairs(pool, left, right, out)
    for p, (a, b) in enumerate(pairs):
        np.testing.assert_allclose(out[p], pool[a].T @ pool[b], rtol=1e-12,
                                   atol=1e-12 * n)


def test_kernels_give_the_same_bits_on_one_and_two_threads():
    A, B = random_pair(5, 20_000, 0.0004, False)
    x = np.random.default_rng(6).standard_normal((20_000, 13))
    outs = []
    for t in (1, 2):
        with threads(t):
            ax, bx = np.empty_like(x), np.empty_like(x)
            kb.pair_product(A.indptr, A.indices, A.data, B.data, x, ax, bx)
            rows = np.empty((13, 20_000))
            kb.residual_rows(ax, bx, np.linspace(0, 1, 13), rows)
            grams = np.empty((3, 13, 13))
            kb.gram_pairs(np.stack([x, ax, bx]), np.array([0, 0, 1]), np.array([1, 2, 2]),
                          grams)
            outs.append((ax, bx, rows, grams))
    for a, b in zip(*outs, strict=True):
        np.testing.assert_array_equal(a, b)


def test_shared_pattern_of_different_patterns_keeps_both_matrices():
    A, _ = random_pair(1, 40, 0.1, False)
    B, _ = random_pair(2, 40, 0.1, False)
    indptr, indices, a, b = shared_pattern(A, B)
    n = A.shape[0]
    np.testing.assert_array_equal(sp.csr_matrix((a, indices, indptr), (n, n)).toarray(),
                                  A.toarray())
    np.testing.assert_array_equal(sp.csr_matrix((b, indices, indptr), (n, n)).toarray(),
                                  B.toarray())


# -- the small problem ----------------------------------------------------------------------
def test_ritz_equals_scipys_generalised_eigh():
    rng = np.random.default_rng(3)
    S = rng.standard_normal((50, 6))
    A, B = np.diag(np.arange(1.0, 51.0)), np.eye(50) + 0.1 * np.ones((50, 50))
    theta, C = ritz(S.T @ A @ S, S.T @ B @ S, 3)
    expected = scipy.linalg.eigh(S.T @ A @ S, S.T @ B @ S, eigvals_only=True)[:3]
    np.testing.assert_allclose(theta, expected, rtol=1e-12)
    np.testing.assert_allclose(C.T @ (S.T @ B @ S) @ C, np.eye(3), atol=1e-12)


def test_ritz_drops_a_dependent_direction_instead_of_failing():
    # a basis with a column repeated (scaled): its mass Gram matrix is singular, and a
    # Cholesky factorisation of it would fail; the Ritz values are those of the basis
    # without the copy
    rng = np.random.default_rng(4)
    S = rng.standard_normal((40, 5))
    A = np.diag(np.arange(1.0, 41.0))
    T = np.column_stack([S, 1e-3 * S[:, 2]])
    theta, C = ritz(T.T @ A @ T, T.T @ T, 4)
    expected = scipy.linalg.eigh(S.T @ A @ S, S.T @ S, eigvals_only=True)[:4]
    np.testing.assert_allclose(theta, expected, rtol=1e-9)


def test_a_start_block_with_too_few_directions_is_a_clear_error():
    K, M = dirichlet_square(12)
    X = np.random.default_rng(0).standard_normal((K.shape[0], 3))
    X[:, 2] = X[:, 0]
    with pytest.raises(ConvergenceError, match="independent directions"):
        run(PencilBlocks(K, M, Jacobi(K)), X, None, k=2, rtol=1e-8, maxiter=5)


# -- the iteration ---------------------------------------------------------------------------
def test_lobpcg_finds_the_values_of_scipys_shift_invert():
    K, M = dirichlet_square(24)
    X = np.random.default_rng(1).standard_normal((K.shape[0], 7))
    out = run(PencilBlocks(K, M, ExactInverse(K)), X, None, k=5, rtol=1e-10, maxiter=60)
    assert out.converged
    reference = np.sort(sla.eigsh(K, 5, M, sigma=0, which="LM")[0])
    np.testing.assert_allclose(out.values[:5], reference, rtol=1e-9)
    V = out.vectors
    np.testing.assert_allclose(V.T @ (M @ V), np.eye(7), atol=1e-9)
    residual = K @ V[:, :5] - (M @ V[:, :5]) * out.values[:5]
    assert np.linalg.norm(residual, axis=0).max() < 1e-4 * out.values[4]
    # the P1 values approach (a^2 + b^2) pi^2 from above (separation of variables)
    exact = np.array([2, 5, 5, 8, 10]) * np.pi**2
    assert (out.values[:5] > exact).all() and (out.values[:5] < 1.05 * exact).all()


def test_ritz_values_bound_the_eigenvalues_and_never_increase():
    # Courant-Fischer: every Ritz value is above the eigenvalue of its rank, and the
    # subspace of each step contains the last Ritz vectors
    K, M = dirichlet_square(16)
    exact = scipy.linalg.eigh(K.toarray(), M.toarray(), eigvals_only=True)[:6]
    X = np.random.default_rng(2).standard_normal((K.shape[0], 6))
    out = run(PencilBlocks(K, M, Jacobi(K)), X, None, k=6, rtol=0.0, maxiter=12)
    history = np.asarray(out.history)
    assert (history >= exact * (1 - 1e-12)).all()
    assert (np.diff(history, axis=0) <= 1e-10 * exact).all()


def test_constraints_keep_the_block_away_from_the_zero_mode():
    # Neumann square: the constant is the zero mode; with it as a constraint the block
    # finds the next values, pi^2 (double) on the way (separation of variables)
    mesh = rectangle(20, 20)
    K, M = assemble_stiffness(mesh), assemble_mass(mesh)
    one = np.ones((mesh.n_points, 1))
    Y = one / np.sqrt(float(one[:, 0] @ (M @ one[:, 0])))
    X = np.random.default_rng(3).standard_normal((mesh.n_points, 4))
    shifted = ExactInverse((K + M).tocsr())
    out = run(PencilBlocks(K, M, shifted), X, Y, k=3, rtol=1e-10, maxiter=60)
    reference = np.sort(sla.eigsh(K, 4, M, sigma=-1.0, which="LM")[0])[1:]
    np.testing.assert_allclose(out.values[:3], reference, rtol=1e-8)
    assert np.abs(Y.T @ (M @ out.vectors)).max() < 1e-10


def test_starting_from_eigenvectors_converged_residuals_are_dropped():
    # the residuals vanish, so the preconditioned block adds no direction: the small
    # problem drops it and the values stay (a Cholesky of the Gram matrix would fail)
    K, M = dirichlet_square(10)
    values, vectors = scipy.linalg.eigh(K.toarray(), M.toarray())
    out = run(PencilBlocks(K, M, Jacobi(K)), vectors[:, :4], None, k=4, rtol=0.0,
              maxiter=3, iterations=3)
    np.testing.assert_allclose(out.values, values[:4], rtol=1e-12)


def test_the_iteration_gives_the_same_bits_on_one_and_two_threads():
    K, M = dirichlet_square(40)
    X = np.random.default_rng(4).standard_normal((K.shape[0], 5))
    outs = []
    for t in (1, 2):
        with threads(t):
            outs.append(run(PencilBlocks(K, M, Jacobi(K)), X, None, k=4, rtol=0.0,
                            maxiter=4))
    np.testing.assert_array_equal(outs[0].values, outs[1].values)
    np.testing.assert_array_equal(outs[0].vectors, outs[1].vectors)


def test_the_start_block_is_not_modified():
    K, M = dirichlet_square(10)
    X = np.random.default_rng(5).standard_normal((K.shape[0], 3))
    before = X.copy()
    run(PencilBlocks(K, M, Jacobi(K)), X, None, k=2, rtol=0.0, maxiter=2)
    np.testing.assert_array_equal(X, before)


@settings(max_examples=15, deadline=None)
@given(cells=st.integers(1, 6), times=st.integers(1, 2), j=st.integers(1, 4),
       seed=st.integers(0, 2**32 - 1))
def test_prolong_is_linear_interpolation_at_the_midpoints(cells, times, j, seed):
    # the plain formula: a coarse point keeps its value, an edge midpoint takes the mean
    from hatkernels.eigensolvers import prolong

    fine = rectangle(cells, cells + 1)
    for _ in range(times):
        fine = fine.refine()
    r = fine.refinement
    X = np.random.default_rng(seed).standard_normal((r.coarse.n_points, j))
    expected = np.empty((fine.n_points, j))
    expected[r.coarse_points] = X
    e = r.edge_points
    expected[r.midpoints] = 0.5 * (X[e[:, 0]] + X[e[:, 1]])
    np.testing.assert_array_equal(prolong(fine, X), expected)
    rows = np.flatnonzero(np.arange(fine.n_points) % 3 != 1)
    np.testing.assert_array_equal(prolong(fine, X, rows), expected[rows])
    # and it is the interpolant: a linear function stays itself (common practice, no source)
    lin = r.coarse.points @ np.array([2.0, -3.0]) + 1.0
    np.testing.assert_allclose(prolong(fine, lin[:, None])[:, 0],
                               fine.points @ np.array([2.0, -3.0]) + 1.0, atol=1e-13)
