"""CG's first guess for a time step from the last solutions (hatkernels.transient_steps.
StartSpace) and its kernels (``row_dots``, ``combine_rows`` in hatkernels._jit.sparse).

References outside the project: NumPy's dot products and SciPy's dense Cholesky
factor and least squares (reference libraries); the guess is defined as the
projection of ``A^-1 b`` onto the held solutions in ``A``'s energy norm,
P. F. Fischer, *Projection techniques for iterative solution of Ax = b with
successive right-hand sides*, Computer Methods in Applied Mechanics and
Engineering 163 (1998); the projection is the best element of the span in that
norm (common practice, no source); the cooling square decays like
``exp(-2 pi^2 t)`` (separation of variables, common practice, no source).
"""

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from hatkernels import threads
from hatkernels import transient_steps as ts
from hatkernels._jit import sparse as _k
from hatkernels.mesh import rectangle
from hatkernels.transient import solve_transient
from hatkernels.transient_steps import StartSpace


def laplacian(m):
    """The 5-point Laplacian on an ``m x m`` grid, built with SciPy alone."""
    T = sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(m, m))
    return (sp.kron(T, sp.eye(m)) + sp.kron(sp.eye(m), T)).tocsr()


def product_of(A):
    def product(v, out):
        out[:] = A @ v
    return product


def best_in_span(A, X, b):
    """The energy-norm projection of ``A^-1 b`` onto the rows of ``X``, by SciPy: with
    ``A = L L^T``, the least-squares fit of ``L^T x*`` by the columns ``L^T X^T``."""
    L = scipy.linalg.cholesky(A.toarray(), lower=True)
    target = L.T @ scipy.linalg.solve(A.toarray(), b)
    a = scipy.linalg.lstsq(L.T @ X.T, target)[0]
    return X.T @ a


@settings(max_examples=25, deadline=None)
@given(n=st.integers(1, 3 * _k.CHUNK + 7), count=st.integers(0, 5), seed=st.integers(0, 99))
def test_row_dots_and_combine_rows_agree_with_numpy(n, count, seed):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((5, n))
    v = rng.standard_normal(n)
    out = np.full(5, np.nan)
    _k.row_dots(X, count, v, out)
    np.testing.assert_allclose(out[:count], X[:count] @ v, rtol=1e-12, atol=1e-12 * n)
    assert np.isnan(out[count:]).all()  # rows past count are not touched
    for i in range(count):  # chunked as dot(): the same bits
        assert out[i] == _k.dot(X[i], v)
    c = rng.standard_normal(5)
    y = np.full(n, np.nan)
    _k.combine_rows(c, X, count, 0.0, y)  # keep = 0 ignores what y holds
    np.testing.assert_allclose(y, c[:count] @ X[:count], rtol=1e-12, atol=1e-12)
    z = v.copy()
    _k.combine_rows(c, X, count, 2.0, z)
    np.testing.assert_allclose(z, 2.0 * v + c[:count] @ X[:count], rtol=1e-12, atol=1e-12)


def test_kernels_give_the_same_bits_on_one_and_two_threads():
    rng = np.random.default_rng(3)
    X = rng.standard_normal((4, 5 * _k.CHUNK + 13))
    v = rng.standard_normal(X.shape[1])
    c = rng.standard_normal(4)
    got = []
    for t in (1, 2):
        with threads(t):
            d = np.empty(4)
            _k.row_dots(X, 4, v, d)
            y = v.copy()
            _k.combine_rows(c, X, 4, 1.0, y)
            got.append((d, y))
    assert got[0][0].tobytes() == got[1][0].tobytes()
    assert got[0][1].tobytes() == got[1][1].tobytes()


@settings(max_examples=20, deadline=None)
@given(held=st.integers(1, 4), seed=st.integers(0, 999))
def test_the_guess_is_the_energy_projection_and_the_best_in_the_span(held, seed):
    A = laplacian(9)
    n = A.shape[0]
    rng = np.random.default_rng(seed)
    space = StartSpace(n, 4)
    sols = rng.standard_normal((held, n))
    for x in sols:
        space.add(x, product_of(A))
    b = rng.standard_normal(n)
    before = b.copy()
    x0 = space.guess(b, np.empty(n))
    np.testing.assert_array_equal(b, before)
    ref = best_in_span(A, sols, b)
    np.testing.assert_allclose(x0, ref, rtol=1e-9, atol=1e-9 * np.abs(ref).max())
    xs = scipy.linalg.solve(A.toarray(), b)

    def energy(e):
        return float(e @ (A @ e))
    for _ in range(5):  # no other member of the span is closer in the energy norm
        other = rng.standard_normal(held) @ sols
        assert energy(xs - x0) <= energy(xs - other) * (1 + 1e-12)


def test_a_solution_in_the_span_is_found_exactly_and_the_window_drops_the_oldest():
    A = laplacian(8)
    n = A.shape[0]
    rng = np.random.default_rng(1)
    space = StartSpace(n, 3)
    sols = rng.standard_normal((5, n))
    for x in sols:
        space.add(x, product_of(A))
    assert space.count == 3
    target = 0.3 * sols[2] - 1.7 * sols[4]  # in the span of the last three
    x0 = space.guess(A @ target, np.empty(n))
    np.testing.assert_allclose(x0, target, rtol=1e-9, atol=1e-9)
    oldest = sols[0]  # dropped: no longer found exactly
    x0 = space.guess(A @ oldest, np.empty(n))
    assert np.abs(x0 - oldest).max() > 1e-3


def test_nearly_parallel_solutions_and_the_zero_solution():
    """Successive steps' solutions differ in their last digits: the guess stays finite and
    as good as the best of them; a zero solution is not held."""
    A = laplacian(8)
    n = A.shape[0]
    rng = np.random.default_rng(2)
    x = rng.standard_normal(n)
    space = StartSpace(n, 4)
    assert space.guess(np.ones(n), np.empty(n)) is None
    space.add(np.zeros(n), product_of(A))
    assert space.count == 0
    for k in range(4):
        space.add(x * (1.0 + k * 1e-15), product_of(A))
    x0 = space.guess(A @ (2.0 * x), np.empty(n))
    assert np.isfinite(x0).all()
    np.testing.assert_allclose(x0, 2.0 * x, rtol=1e-9, atol=1e-9)


@pytest.fixture
def cooling():
    mesh = rectangle(48, 48)
    x, y = mesh.points.T
    return mesh, np.sin(np.pi * x) * np.sin(np.pi * y)


def test_the_projection_start_saves_iterations_and_keeps_the_solution(cooling, monkeypatch):
    mesh, u0 = cooling
    t_end = 0.05
    exact = np.exp(-2 * np.pi**2 * t_end) * u0  # separation of variables
    with_space = solve_transient(mesh, u0, [t_end], dt=1e-3, rtol=1e-8)
    monkeypatch.setattr(ts, "START_SPACE", 0)  # the extrapolated start alone
    without = solve_transient(mesh, u0, [t_end], dt=1e-3, rtol=1e-8)
    a, b = with_space.stats.iterations.sum(), without.stats.iterations.sum()
    assert a <= 0.7 * b, (a, b)
    # the same discrete solution to the solver's tolerance, and both near the exact decay
    assert np.abs(with_space.u[-1] - without.u[-1]).max() < 1e-6
    assert np.abs(with_space.u[-1] - exact).max() < 2e-3


def test_a_product_from_the_residual_holds_the_same_space():
    """``add(x, b=b, r=r)`` takes ``A x = b - r`` instead of a product: the same Gram
    matrix and guess to rounding (reference: SciPy's product)."""
    A = laplacian(7)
    n = A.shape[0]
    rng = np.random.default_rng(4)
    one, two = StartSpace(n, 3), StartSpace(n, 3)
    for _ in range(4):
        x, b = rng.standard_normal(n), rng.standard_normal(n)
        r = b - A @ x
        one.add(x, product_of(A))
        two.add(x, None, b, r)
    np.testing.assert_allclose(two.G, one.G, rtol=1e-12, atol=1e-12 * np.abs(one.G).max())
    c = rng.standard_normal(n)
    np.testing.assert_allclose(two.guess(c, np.empty(n)), one.guess(c, np.empty(n)),
                               rtol=1e-9, atol=1e-9)


# -- the smoother first (transient_steps.smoother_first) --------------------------------


def test_the_assembled_smoother_is_symmetric_positive_definite_and_reads_only():
    """CG may take it as a preconditioner: Chebyshev smoothing of degree 2 on ``D^-1 A``
    from a zero guess is ``p(D^-1 A) D^-1`` with ``p`` positive on the spectrum (common
    practice, no source); built here column by column on a step matrix."""
    import hatkernels as hk

    m = rectangle(6, 6)
    A = (hk.assemble_mass(m) + 1e-2 * hk.assemble_stiffness(m)).tocsr()
    system = hk.apply_dirichlet(A, np.zeros(m.n_points), m.boundary_points())
    S = ts._AssembledSmoother(system.A.tocsr())
    n = system.A.shape[0]
    columns = []
    for i in range(n):
        e, z = np.zeros(n), np.empty(n)
        e[i] = 1.0
        S.apply_into(e, z)
        assert e[i] == 1.0 and np.count_nonzero(e) == 1  # r is read, not written
        columns.append(z)
    Smat = np.array(columns).T
    assert np.abs(Smat - Smat.T).max() <= 1e-13 * np.abs(Smat).max()
    assert np.linalg.eigvalsh(0.5 * (Smat + Smat.T)).min() > 0.0


@pytest.mark.parametrize("preconditioner", ["amg", "jacobi"])
def test_the_stored_march_with_the_smoother_first_keeps_the_tolerance(preconditioner):
    """Against the theta scheme solved exactly with SciPy's sparse LU (Crank-Nicolson,
    K. W. Morton and D. F. Mayers, Numerical Solution of Partial Differential Equations,
    2nd ed. 2005, ch. 2; value from memory): many steps end after the smoother alone and
    the field stays within the tolerance's share; ``maxiter`` bounds the iterations of a
    step, the smoother's counted in."""
    import scipy.sparse.linalg as spla

    import hatkernels as hk

    mesh, h, steps = rectangle(30, 30), 1e-3, 24
    K, M = hk.assemble_stiffness(mesh), hk.assemble_mass(mesh)
    free = np.setdiff1d(np.arange(mesh.n_points), mesh.boundary_points())
    lu = spla.splu((M + 0.5 * h * K).tocsr()[free][:, free].tocsc())
    B = (M - 0.5 * h * K).tocsr()[free][:, free]
    sine = lambda x, y: np.sin(np.pi * x) * np.sin(np.pi * y)  # noqa: E731
    ref = np.zeros(mesh.n_points)
    ref[free] = sine(*mesh.points[free].T)
    for _ in range(steps):
        ref[free] = lu.solve(B @ ref[free])
    sol = solve_transient(mesh, sine, [steps * h], dt=h, startup=0,
                          preconditioner=preconditioner)
    s = sol.stats
    assert ((s.smoother_iterations > 0) & (s.iterations == 0)).sum() >= steps // 4
    assert np.abs(sol.u[-1] - ref).max() <= 1e-5 * np.abs(ref).max()
    with pytest.warns(RuntimeWarning, match="did not converge"):
        tight = solve_transient(mesh, sine, [steps * h], dt=h, startup=0, rtol=1e-12,
                                maxiter=2, preconditioner=preconditioner)
    assert np.all(tight.stats.smoother_iterations + tight.stats.iterations <= 2)
