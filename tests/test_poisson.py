"""The one-call Poisson solve against analytic and published results."""

import functools

import numpy as np
import pytest
import scipy.sparse.linalg as spla
from conftest import jittered_mesh

import hatkernels
from hatkernels import norms
from hatkernels.mesh import Mesh, disk, rectangle
from hatkernels.poisson import solve_poisson

PI = np.pi


def sin_sin(x, y):
    return np.sin(PI * x) * np.sin(PI * y)


def grad_sin_sin(x, y):
    return PI * np.cos(PI * x) * np.sin(PI * y), PI * np.sin(PI * x) * np.cos(PI * y)


def test_manufactured_solution_rates():
    # u = sin(pi x) sin(pi y), -lap u = 2 pi^2 u: P1 errors are O(h^2) in L2 and
    # O(h) in H1 (P. G. Ciarlet, The Finite Element Method for Elliptic
    # Problems, 1978, theorems 3.2.2 and 3.2.5)
    study = norms.convergence_study(
        rectangle(4, 4),
        lambda m: solve_poisson(m, lambda x, y: 2 * PI**2 * sin_sin(x, y), quadrature=5),
        sin_sin,
        grad_sin_sin,
        levels=5,
    )
    assert 1.95 < study.rates["L2"][-1] < 2.05
    assert 0.97 < study.rates["H1"][-1] < 1.03
    assert "rate" in study.table()


def test_manufactured_solution_with_variable_coefficient_and_reaction():
    # kappa = exp(x - y), c = 1 + x: f = -div(kappa grad u) + c u for u = sin sin
    # (derived by hand; same rates as above, Ciarlet 1978)
    kappa = lambda x, y: np.exp(x - y)  # noqa: E731

    def f(x, y):
        ux, uy = grad_sin_sin(x, y)
        u = sin_sin(x, y)
        return -kappa(x, y) * (ux - uy - 2 * PI**2 * u) + (1 + x) * u

    study = norms.convergence_study(
        jittered_mesh(4, 3, jitter=0.2),
        lambda m: solve_poisson(
            m, f, coefficient=kappa, reaction=lambda x, y: 1 + x, quadrature=5
        ),
        sin_sin,
        grad_sin_sin,
        levels=4,
    )
    assert 1.9 < study.rates["L2"][-1] < 2.1
    assert 0.95 < study.rates["H1"][-1] < 1.05


def test_neumann_and_robin_reproduce_a_linear_solution():
    # u = 1 + 2x - 3y lies in the P1 space, so Galerkin gives it exactly
    # (patch test: B. M. Irons and A. Razzaque, 1972) when the boundary data
    # are integrated exactly.
    m = jittered_mesh(8, 21)
    u = lambda x, y: 1 + 2 * x - 3 * y  # noqa: E731
    b = m.boundary_edges()
    mid = m.points[b].mean(axis=1)
    left = b[np.isclose(mid[:, 0], 0)]
    right = b[np.isclose(mid[:, 0], 1)]
    top = b[np.isclose(mid[:, 1], 1)]
    bottom = b[np.isclose(mid[:, 1], 0)]
    # kappa du/dn with kappa = 2: right +4, top -6, bottom +6
    others = np.vstack([right, top, bottom])
    h = np.r_[np.full(len(right), 4.0), np.full(len(top), -6.0), np.full(len(bottom), 6.0)]
    sol = solve_poisson(
        m,
        0.0,
        coefficient=2.0,
        dirichlet=u,
        dirichlet_on=left,
        neumann=(others, hatkernels.per_edge(h)),
    )
    assert sol.u == pytest.approx(u(*m.points.T), abs=1e-8)
    # the Dirichlet part named by its points instead of its edges: the same system
    by_nodes = solve_poisson(
        m,
        0.0,
        coefficient=2.0,
        dirichlet=u,
        dirichlet_on=np.unique(left),
        neumann=(others, hatkernels.per_edge(h)),
    )
    assert np.array_equal(by_nodes.u, sol.u)
    # Robin on the right: kappa du/dn + r u = s with r = 3, s = 4 + 3 u
    sol = solve_poisson(
        m,
        0.0,
        coefficient=2.0,
        dirichlet=u,
        dirichlet_on=np.vstack([left, top, bottom]),
        robin=(right, 3.0, lambda x, y: 4 + 3 * u(x, y)),
    )
    assert sol.u == pytest.approx(u(*m.points.T), abs=1e-8)


@pytest.mark.parametrize(
    "preconditioner", ["none", "jacobi", "ic0", "amg-sa", "amg-rs", "amg-native", "amg", "direct"]
)
def test_every_preconditioner_gives_the_direct_solution(preconditioner):
    m = jittered_mesh(20, 8)
    kappa = lambda x, y: 1 + 10 * (x > 0.5)  # noqa: E731
    sol = solve_poisson(
        m,
        lambda x, y: np.cos(3 * x) * y,
        coefficient=kappa,
        preconditioner=preconditioner,
        rtol=1e-12,
    )
    # reference library: scipy's sparse direct solve of the same system
    A = hatkernels.assemble_stiffness(m, kappa)
    s = hatkernels.apply_dirichlet(
        A, hatkernels.assemble_load(m, lambda x, y: np.cos(3 * x) * y), m.boundary_points()
    )
    ref = s.expand(spla.spsolve(s.A.tocsc(), s.b))
    assert sol.converged
    assert np.linalg.norm(sol.u - ref) <= 1e-8 * np.linalg.norm(ref)


def test_smallest_eigenvalue_approaches_two_pi_squared_from_above():
    # Dirichlet Laplacian on the unit square: lambda_1 = 2 pi^2 (analytic).
    # Conforming elements give upper bounds, with error O(h^2) (min-max
    # principle; G. Strang and G. Fix, An Analysis of the Finite Element Method,
    # 1973, ch. 6).
    exact = 2 * PI**2
    values = []
    for n in (8, 16, 32):
        m = rectangle(n, n)
        free = np.setdiff1d(np.arange(m.n_points), m.boundary_points())
        K = hatkernels.assemble_stiffness(m)[free][:, free]
        M = hatkernels.assemble_mass(m)[free][:, free]
        lam = spla.eigsh(K.tocsc(), k=1, M=M.tocsc(), sigma=0, which="LM")[0][0]
        values.append(lam)
    assert all(v > exact for v in values)
    errors = np.array(values) - exact
    assert (np.diff(errors) < 0).all()
    assert 3.5 < errors[1] / errors[2] < 4.5


def square_torsion_constant():
    """J / a^4 for a square bar of side a, from the series solution of Saint-Venant torsion:
    J = (a^4 / 3) (1 - (192 / pi^5) sum over odd n of tanh(n pi / 2) / n^5)
    (S. Timoshenko and J. N. Goodier, Theory of Elasticity, 1951, torsion of a
    rectangular bar; analytic).  The terms fall as n^-5: 500 of them are exact in float64."""
    n = np.arange(1, 1001, 2, dtype=float)
    return (1 - 192 / np.pi**5 * np.sum(np.tanh(n * np.pi / 2) / n**5)) / 3


def test_torsion_of_a_square_bar():
    # Saint-Venant torsion: -lap phi = 2, phi = 0 on the boundary, J = 2 int phi.
    a = 2.0
    exact = square_torsion_constant() * a**4
    assert square_torsion_constant() == pytest.approx(0.1406, abs=5e-5)  # the handbook's 0.141
    J = []
    for n in (32, 64, 128):
        m = rectangle(n, n, bounds=(-1, 1, -1, 1))
        sol = solve_poisson(m, 2.0)
        J.append(2 * hatkernels.assemble_load(m, 1.0) @ sol.u)
    # Galerkin: J_h = a(phi_h, phi_h) <= a(phi, phi) = J, growing on nested meshes
    assert J[0] < J[1] < J[2] < exact
    # the error falls as h^2 (ratio 4 at each halving), so Richardson extrapolation
    # (common practice, no source) leaves a far smaller error
    errors = exact - np.array(J)
    assert 3.5 < errors[0] / errors[1] < 4.5 and 3.5 < errors[1] / errors[2] < 4.5, errors
    extrapolated = J[2] + (J[2] - J[1]) / 3
    assert abs(extrapolated - exact) < 0.02 * errors[2], (extrapolated, exact)


def test_torsion_of_a_circular_bar():
    # Circle of radius r: phi = (r^2 - x^2 - y^2) / 2, J = pi r^4 / 2 exactly
    # (Timoshenko and Goodier, Theory of Elasticity, 1951).
    r = 1.5
    errors = []
    for n in (8, 16, 32):
        m = disk(n, radius=r)
        sol = solve_poisson(m, 2.0)
        J = 2 * hatkernels.assemble_load(m, 1.0) @ sol.u
        errors.append(abs(J - PI * r**4 / 2) / (PI * r**4 / 2))
    assert errors[-1] < 5e-3
    assert errors[0] / errors[-1] > 10  # O(h^2): about 16 over two halvings


@functools.lru_cache(maxsize=None)
def jump_case(name):
    """A mesh, a coefficient and scipy's direct solution of its Dirichlet problem."""
    m = rectangle(12, 12).refine().refine()  # 48 x 48 cells; gmg gets three levels
    c = m.points[m.triangles].mean(axis=1)
    coef = {
        "jump-1e6": np.where(c[:, 0] > 0.5, 1e6, 1.0),
        "anisotropy-100": np.array([[100.0, 0.0], [0.0, 1.0]]),
    }[name]
    s = hatkernels.apply_dirichlet(
        hatkernels.assemble_stiffness(m, coef), hatkernels.assemble_load(m, 1.0), m.boundary_points()
    )
    return m, coef, s.expand(spla.spsolve(s.A.tocsc(), s.b))  # reference library: scipy


@pytest.mark.parametrize("case", ["jump-1e6", "anisotropy-100"])
@pytest.mark.parametrize("preconditioner",
                         ["jacobi", "ic0", "amg-sa", "amg-rs", "amg-native", "amg", "gmg"])
def test_jump_and_anisotropy_still_converge(preconditioner, case):
    # A coefficient jump of 1e6 across x = 0.5 and a 100:1 anisotropic tensor:
    # every preconditioner still converges to the direct solution (the table
    # in docs/solvers.md gives the iteration counts that guide the choice).
    m, coef, ref = jump_case(case)
    sol = solve_poisson(m, 1.0, coefficient=coef, preconditioner=preconditioner,
                        rtol=1e-10)
    assert sol.converged
    assert np.linalg.norm(sol.u - ref) <= 1e-6 * np.linalg.norm(ref)


def test_stats_and_non_convergence():
    m = rectangle(24, 24)
    sol = solve_poisson(m, 1.0, preconditioner="jacobi")
    st = sol.stats
    assert set(st.timings) == {"assemble", "boundary", "setup", "solve", "total"}
    assert st.residuals[0] == pytest.approx(
        np.linalg.norm(
            hatkernels.apply_dirichlet(
                hatkernels.assemble_stiffness(m), hatkernels.assemble_load(m, 1.0), m.boundary_points()
            ).b
        )
    )
    assert len(st.residuals) == st.iterations + 1
    assert st.unknowns == 23 * 23 and st.threads >= 1 and st.peak_rss_bytes > 0
    with pytest.warns(RuntimeWarning, match="not converged"):
        bad = solve_poisson(m, 1.0, preconditioner="none", maxiter=2)
    assert not bad.converged
    with pytest.raises(hatkernels.ConvergenceError):
        solve_poisson(m, 1.0, preconditioner="none", maxiter=2, check=True)


def test_unused_points_and_bad_input():
    base = rectangle(6, 6)
    with pytest.warns(hatkernels.MeshWarning):
        m = Mesh(np.r_[base.points, [[4.0, 4.0]]], base.triangles)
    sol = solve_poisson(m, 1.0)
    assert sol.u[-1] == 0 and np.isfinite(sol.u).all()
    with pytest.raises(hatkernels.InputError, match="no Dirichlet points, reaction or Robin term"):
        solve_poisson(base, 1.0, neumann=0.0)
    with pytest.raises(hatkernels.InputError, match=r"dirichlet\(x, y\) is nan at point"):
        solve_poisson(base, 1.0, dirichlet=lambda x, y: np.where(x > 0.9, np.nan, 0.0))
    with pytest.raises(hatkernels.InputError, match="robin must be"):
        solve_poisson(base, 1.0, robin=1.0)
    with pytest.raises(hatkernels.InputError, match=r"dirichlet_on\[0\] = 99 is outside"):
        solve_poisson(base, 1.0, dirichlet_on=[99])
    with pytest.raises(hatkernels.InputError, match="reaction is -1.0"):
        solve_poisson(base, 1.0, reaction=-1.0)


def _linear(x, y):
    return 1 + 2 * x - 3 * y


def test_data_forms_without_a_test_so_far():
    # u = 1 + 2x - 3y is harmonic and P1 reproduces it exactly (the patch test; common
    # practice, no source): every form of boundary data must give it to round-off
    m = rectangle(8, 8)
    exact = _linear(*m.points.T)
    tol = 64 * np.finfo(float).eps * np.abs(exact).max()
    # Dirichlet values as an array of one value per point
    sol = solve_poisson(m, 0.0, dirichlet=exact.copy(), rtol=1e-14)
    assert np.abs(sol.u - exact).max() <= tol
    # a plain Neumann value (here a callable of the position) applies on every side
    # that is not held: hold the left side of u = 1 + 2x, whose du/dn is 2 on the right
    # and 0 on the top and bottom
    lin = 1 + 2 * m.points[:, 0]
    held = np.flatnonzero(m.points[:, 0] == 0)
    h = lambda x, y: np.where(x == 1, 2.0, 0.0)  # noqa: E731
    sol = solve_poisson(m, 0.0, dirichlet=lin, dirichlet_on=held, neumann=h, rtol=1e-14)
    assert np.abs(sol.u - lin).max() <= tol
    # a 2-tuple robin (r, s) applies on every side that is not held:
    # kappa du/dn + r u = s with u = 1 + 2x, r = 1: s = du/dn + u on each side
    s = lambda x, y: np.where(x == 1, 2.0, 0.0) + 1 + 2 * x  # noqa: E731
    sol = solve_poisson(m, 0.0, dirichlet=lin, dirichlet_on=held, robin=(1.0, s), rtol=1e-14)
    assert np.abs(sol.u - lin).max() <= 1e-12
    # matrix-free with the preconditioner "none"
    sol = solve_poisson(m, 0.0, dirichlet=exact, matrix_free=True, preconditioner="none",
                        rtol=1e-14)
    assert sol.stats.matrix_free and np.abs(sol.u - exact).max() <= tol


def test_inputs_are_left_unchanged():
    m = rectangle(6, 6)
    f = np.linspace(1, 2, m.n_points)
    kappa = np.linspace(1, 3, m.n_cells)
    g = _linear(*m.points.T)
    held = m.boundary_points().copy()
    before = [a.copy() for a in (f, kappa, g, held, m.points, m.cells)]
    solve_poisson(m, hatkernels.per_point(f), coefficient=kappa, dirichlet=g, dirichlet_on=held)
    for old, new in zip(before, (f, kappa, g, held, m.points, m.cells), strict=True):
        assert np.array_equal(old, new)


def test_a_built_in_preconditioner_name_is_not_overwritten_by_accident():
    from hatkernels.precond import PRECONDITIONERS, register_preconditioner

    with pytest.raises(hatkernels.InputError, match="'jacobi' is already registered"):
        register_preconditioner("jacobi", lambda A, context: A)
    assert hatkernels.precond.capabilities("jacobi").is_diagonal  # still the built-in one
    assert PRECONDITIONERS.count("jacobi") == 1


def test_refine_solves_on_the_refined_mesh():
    # refine=k means "on mesh.refine() applied k times" (DESIGN.md's contract): the same
    # points, numbering and values as refining first; -lap u = 1 on the unit square has
    # its centre value 0.0737 (series solution; value from memory), which the refined
    # solve approaches
    coarse = rectangle(4, 4)
    sol = solve_poisson(coarse, 1.0, refine=3, preconditioner="gmg", rtol=1e-12)
    fine = coarse.refine().refine().refine()
    assert sol.mesh.n_points == fine.n_points and np.array_equal(sol.mesh.points, fine.points)
    direct = solve_poisson(fine, 1.0, preconditioner="direct")
    assert np.abs(sol.u - direct.u).max() <= 1e-10
    centre = np.flatnonzero((fine.points == 0.5).all(axis=1))[0]
    assert abs(sol.u[centre] - 0.0737) < 2e-4
    with pytest.raises(hatkernels.InputError, match="refine must be >= 0"):
        solve_poisson(coarse, 1.0, refine=-1)


@pytest.mark.parametrize("matrix_free", [False, True])
def test_a_problem_whose_every_point_is_held_returns_the_held_values(matrix_free):
    # with every point held there is no unknown: u is the data itself (the definition of a
    # Dirichlet condition; common practice, no source), with no CG iteration
    m = rectangle(1, 1).refine()  # 9 points, one inside
    g = lambda x, y: 1.0 + x - 2.0 * y  # noqa: E731
    sol = solve_poisson(m, 5.0, dirichlet=g, dirichlet_on=np.arange(m.n_points),
                        matrix_free=matrix_free,
                        preconditioner="none" if matrix_free else None)
    assert np.array_equal(sol.u, g(*m.points.T))
    assert sol.stats.unknowns == 0 and sol.stats.converged
    if not matrix_free:
        assert sol.stats.iterations == 0 and "nothing to solve" in sol.stats.preconditioner
    with pytest.raises(hatkernels.InputError, match="unknown preconditioner"):
        solve_poisson(m, 1.0, dirichlet_on=np.arange(m.n_points), preconditioner="nonesuch")
