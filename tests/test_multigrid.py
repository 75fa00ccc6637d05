"""Geometric multigrid: transfers, symmetry, mesh-independent convergence."""

import numpy as np
import pytest
import scipy.sparse.linalg as spla
from conftest import EPS, jittered_mesh, refined

import hatkernels
from hatkernels import StiffnessOperator, make_preconditioner, norms, solve_poisson, threads
from hatkernels._jit import multigrid as _mg
from hatkernels.krylov import cg_with_history
from hatkernels.mesh import rectangle
from hatkernels.precond.gmg import GeometricMultigrid, coarsen_coefficient


def test_prolongation_is_exact_for_linear_functions_and_restriction_is_its_transpose():
    # P1 interpolation at edge midpoints reproduces linear functions
    # (common practice, no source); restriction is defined as P^T
    coarse = jittered_mesh(5, 4)
    fine = coarse.refine()
    gm = GeometricMultigrid(StiffnessOperator(fine, dirichlet=fine.boundary_points()))
    cp, e, mid, first_low, by_high_ptr, by_high = gm.levels[0].transfer
    lin = lambda p: 1 + 2 * p[:, 0] - 3 * p[:, 1]  # noqa: E731
    xf = np.zeros(fine.n_points)
    _mg.prolong_add(cp, e, mid, lin(coarse.points), xf)
    # linear interpolation reproduces a linear function (exact but for round-off)
    assert xf == pytest.approx(lin(fine.points), rel=8 * EPS, abs=8 * EPS)
    rng = np.random.default_rng(0)
    xc, yf = rng.standard_normal(coarse.n_points), rng.standard_normal(fine.n_points)
    Px = np.zeros(fine.n_points)
    _mg.prolong_add(cp, e, mid, xc, Px)
    Ry = np.empty(coarse.n_points)
    _mg.restrict(cp, mid, first_low, by_high_ptr, by_high, yf, Ry)
    assert Px @ yf == pytest.approx(xc @ Ry, rel=1e-13, abs=0)  # R = P^T, sums of ~1e3 terms


@pytest.mark.parametrize("cycle", ["V", "W", "F"])
@pytest.mark.parametrize("smoother", ["chebyshev", "jacobi"])
def test_cycles_are_symmetric_positive_definite(cycle, smoother):
    m = refined(rectangle(3, 3), 3)
    A = StiffnessOperator(m, np.linspace(1, 2, m.n_triangles), dirichlet=m.boundary_points())
    M = make_preconditioner(A, "gmg", cycle=cycle, smoother=smoother, degree=2)
    rng = np.random.default_rng(5)
    for _ in range(3):
        x, y = rng.standard_normal(m.n_points), rng.standard_normal(m.n_points)
        assert x @ (M @ y) == pytest.approx(y @ (M @ x), rel=1e-10)
        assert x @ (M @ x) > 0


def test_iterations_are_mesh_independent():
    # Multigrid converges at a rate independent of h (W. Hackbusch, Multi-Grid
    # Methods and Applications, 1985, ch. 6; A. Brandt, Multi-level adaptive
    # solutions to boundary-value problems, Math. Comp. 31, 1977).
    counts = []
    for levels in range(3, 7):
        m = refined(rectangle(4, 4), levels)
        A = StiffnessOperator(m, dirichlet=m.boundary_points())
        b = hatkernels.assemble_load(m, 1.0)
        b[m.boundary_points()] = 0
        res = cg_with_history(A, b, rtol=1e-8, M=make_preconditioner(A, "gmg"))
        assert res.converged
        counts.append(res.iterations)
    assert max(counts) <= 12
    assert counts[-1] - counts[0] <= 2


def test_gmg_reaches_the_direct_solution_with_coefficients():
    m = refined(jittered_mesh(4, 2), 3)
    c = m.points[m.triangles].mean(axis=1)
    K = np.array([[2.0, 0.5], [0.5, 1.0]])
    for coef in (1.0 + c[:, 0], lambda x, y: 1 + x * y, K, 2.0 + m.points[:, 1]):
        sol = solve_poisson(
            m,
            lambda x, y: np.sin(3 * x),
            coefficient=coef,
            preconditioner="gmg",
            dirichlet=lambda x, y: y,
        )
        A = hatkernels.assemble_stiffness(m, coef)
        s = hatkernels.apply_dirichlet(
            A,
            hatkernels.assemble_load(m, lambda x, y: np.sin(3 * x)),
            m.boundary_points(),
            m.points[m.boundary_points(), 1],
        )
        ref = s.expand(spla.spsolve(s.A.tocsc(), s.b))  # reference library: scipy
        assert sol.converged and sol.stats.matrix_free
        assert np.linalg.norm(sol.u - ref) <= 1e-8 * np.linalg.norm(ref)
        assert sol.stats.iterations <= 20


def test_reduced_systems_and_assembled_path():
    m = refined(rectangle(4, 4), 3)
    A = hatkernels.assemble_stiffness(m)
    s = hatkernels.apply_dirichlet(A, hatkernels.assemble_load(m, 1.0), m.boundary_points())
    M = make_preconditioner(s.A, "gmg", mesh=m)
    res = cg_with_history(s.A, s.b, rtol=1e-10, M=M)
    assert res.converged and res.iterations <= 14
    sol = solve_poisson(m, 1.0, reaction=3.0, preconditioner="gmg")  # assembled + gmg
    assert sol.converged and not sol.stats.matrix_free


def test_manufactured_rates_with_gmg():
    # same rates as with any exact solver (Ciarlet, 1978): L2 ~ 2, H1 ~ 1
    pi = np.pi

    def u(x, y):
        return np.sin(pi * x) * np.sin(pi * y)

    def grad(x, y):
        return pi * np.cos(pi * x) * np.sin(pi * y), pi * np.sin(pi * x) * np.cos(pi * y)

    study = norms.convergence_study(
        rectangle(4, 4).refine(),
        lambda mm: solve_poisson(
            mm, lambda x, y: 2 * pi**2 * u(x, y), preconditioner="gmg", quadrature=5
        ),
        u,
        grad,
        levels=4,
    )
    assert 1.95 < study.rates["L2"][-1] < 2.05
    assert 0.97 < study.rates["H1"][-1] < 1.03


@pytest.mark.two_threads
def test_one_and_two_threads_give_identical_solves():
    m = refined(rectangle(5, 5), 3)
    out = []
    for n in (1, 2):
        with threads(n):
            out.append(solve_poisson(m, 1.0, preconditioner="gmg").u.tobytes())
    assert out[0] == out[1]


def test_coefficients_go_down_the_levels():
    coarse = rectangle(2, 2)
    fine = coarse.refine()
    per_tri = np.arange(fine.n_triangles, dtype=float) + 1
    coef = hatkernels.coefficients.parse_coefficient(per_tri, fine)
    down = coarsen_coefficient(coef, fine, coarse)
    assert down.value == pytest.approx(per_tri.reshape(-1, 4).mean(axis=1), rel=2 * EPS, abs=0)
    nodal = hatkernels.coefficients.parse_coefficient(fine.points[:, 0] + 1, fine)
    assert np.array_equal(coarsen_coefficient(nodal, fine, coarse).value,
                          coarse.points[:, 0] + 1)  # the coarse points keep their values
    # per-triangle tensors are averaged over the children too
    K = np.einsum("t,ij->tij", per_tri, np.eye(2))
    tens = hatkernels.coefficients.parse_coefficient(K, fine, tensor=True)
    assert np.array_equal(coarsen_coefficient(tens, fine, coarse).value[:, 0, 0], down.value)


def test_errors_say_how_to_fix_them():
    flat = rectangle(8, 8)
    with pytest.raises(hatkernels.InputError, match="no refinement history.*Mesh.refine"):
        make_preconditioner(StiffnessOperator(flat), "gmg")
    with pytest.raises(hatkernels.InputError, match="no refinement history"):
        solve_poisson(flat, 1.0, preconditioner="gmg")
    m = flat.refine()
    A = hatkernels.assemble_stiffness(m)
    with pytest.raises(hatkernels.InputError, match="pass mesh="):
        make_preconditioner(A, "gmg")
    with pytest.raises(hatkernels.InputError, match="rows, but the mesh has"):
        make_preconditioner(A[:10, :10], "gmg", mesh=m)
    with pytest.raises(hatkernels.InputError, match="cycle must be"):
        make_preconditioner(StiffnessOperator(m), "gmg", cycle="X")
    with pytest.raises(hatkernels.InputError, match="needs an assembled sparse matrix"):
        solve_poisson(m, 1.0, preconditioner="ic0", matrix_free=True)
