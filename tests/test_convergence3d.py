"""Tetrahedra against outside results: convergence rates, the cube's first eigenvalue, the
ball's torsion-like problem, error norms on tetrahedra, and the invariances of the
assembled stiffness of every strategy on random Delaunay tetrahedralisations."""

import itertools

import numpy as np
import pytest
import scipy.sparse.linalg as sla
from conftest import EPS
from hypothesis import given
from hypothesis import strategies as st

import hatkernels
from hatkernels import STRATEGIES, Mesh, assemble_mass, assemble_stiffness, norms
from hatkernels.mesh import ball, cuboid
from hatkernels.quadrature import tetrahedron_rule

PI = np.pi

#: Round-off of a quadrature sum over a few thousand points, relative: a wrong weight,
#: point or volume moves these norms by far more.
SUMS = 64 * EPS


def sines(x, y, z):
    return np.sin(PI * x) * np.sin(PI * y) * np.sin(PI * z)


def grad_sines(x, y, z):
    sx, sy, sz = np.sin(PI * x), np.sin(PI * y), np.sin(PI * z)
    cx, cy, cz = np.cos(PI * x), np.cos(PI * y), np.cos(PI * z)
    return PI * cx * sy * sz, PI * sx * cy * sz, PI * sx * sy * cz


def zero_gradient(x, y, z):
    return 0 * x, 0 * x, 0 * x


# --- convergence -----------------------------------------------------------------------


def test_manufactured_sines_converge_at_rates_two_and_one():
    # u = sin(pi x) sin(pi y) sin(pi z), -lap u = 3 pi^2 u, u = 0 on the unit cube's
    # boundary: P1 errors are O(h^2) in L2 and O(h) in H1 (S. C. Brenner and L. R. Scott,
    # The Mathematical Theory of Finite Element Methods, 3rd ed., 2008: the a-priori
    # estimate in H1 and, by duality, in L2). Measured (4 meshes, 125 to 35937 points):
    # L2 rates 1.75, 1.91, 1.97; H1 rates 0.88, 0.96, 0.98.
    nodal = []

    def solver(mesh):
        sol = hatkernels.solve_poisson(mesh, lambda x, y, z: 3 * PI**2 * sines(x, y, z),
                                       quadrature=5)
        assert sol.converged
        nodal.append(np.abs(sol.u - sines(*mesh.points.T)).max())
        return sol

    study = norms.convergence_study(cuboid(4, 4, 4), solver, sines, grad_sines, levels=4)
    assert list(study.n_points) == [125, 729, 4913, 35937]
    assert np.allclose(study.h[:-1] / study.h[1:], 2.0, rtol=1e-12, atol=0)  # Bey halves h
    l2, h1 = study.rates["L2"], study.rates["H1"]
    assert 1.9 < l2[-1] < 2.1 and 0.95 < h1[-1] < 1.05, study.table()
    assert (np.diff(l2) > 0).all() and (np.diff(h1) > 0).all(), study.table()  # pre-asymptotic
    # the largest nodal error: O(h^2) up to a logarithm (the analytic solution above;
    # value from memory); measured rates 1.70, 1.81, 1.87
    nodal_rates = norms.observed_rates(study.h, nodal)
    assert (nodal_rates[1:] > 1.7).all(), nodal


def test_first_dirichlet_eigenvalue_of_the_cube_is_approached_from_above():
    # -lap u = lambda u on the unit cube, u = 0 on its boundary: lambda_1 = 3 pi^2 with
    # u = sin(pi x) sin(pi y) sin(pi z) (analytic, separation of variables). Galerkin on
    # nested conforming spaces gives upper bounds that decrease with each refinement (the
    # min-max principle: R. Courant and D. Hilbert, Methods of Mathematical Physics I,
    # 1953), with an error O(h^2) for P1 (G. Strang and G. Fix, An Analysis of the Finite
    # Element Method, 1973, chapter 6). Measured: 38.027, 31.733, 30.145 against 29.609
    # (relative errors 0.284, 0.0717, 0.0181).
    exact = 3 * PI**2
    values, h = [], []
    mesh = cuboid(2, 2, 2)
    for _ in range(3):
        mesh = mesh.refine()  # nested: each space contains the one before
        A, M = assemble_stiffness(mesh), assemble_mass(mesh)
        # the library's Dirichlet elimination: the free points' rows and columns
        held = hatkernels.apply_dirichlet(A, np.zeros(mesh.n_points), mesh.boundary_points())
        free = held.free
        Mf = M[free][:, free]
        lam = sla.eigsh(held.A, k=1, M=Mf, sigma=0.0, which="LM", return_eigenvectors=False)
        values.append(float(lam[0]))
        h.append(mesh.h())
    assert all(v > exact for v in values), values
    assert values[0] > values[1] > values[2], values
    assert values[-1] == pytest.approx(exact, rel=0.02, abs=0)
    rates = norms.observed_rates(h, np.array(values) - exact)
    assert 1.9 < rates[-1] < 2.1, (values, rates)


def test_ball_torsion_like_problem_converges_to_the_paraboloid():
    # -lap u = 1 in the ball of radius R, u = 0 on the sphere: u = (R^2 - r^2) / 6 and
    # max u = R^2 / 6 (analytic). The meshes are polyhedra inscribed in the sphere: the
    # error of the domain is O(h^2) like that of the elements (value from memory), so
    # max u, the L2 error and the H1 error converge at about 2, 2 and 1. Measured on
    # ball(4), ball(8), ball(12): max u 0.6843, 0.6723, 0.6695 (above R^2 / 6 = 0.6667 on
    # these meshes), rates 1.81, 1.79; L2 rates 2.16, 2.08; H1 rates 1.06, 1.03.
    # (Moved here from tests/test_assembly3d.py and extended.)
    R = 2.0

    def exact(x, y, z):
        return (R * R - x * x - y * y - z * z) / 6

    def grad(x, y, z):
        return -x / 3, -y / 3, -z / 3

    h, peak, l2, h1 = [], [], [], []
    for n in (4, 8, 12):
        mesh = ball(n, radius=R)
        u = hatkernels.solve_poisson(mesh, 1.0).u
        h.append(mesh.h())
        peak.append(abs(u.max() - R * R / 6))
        l2.append(norms.l2_error(mesh, u, exact))
        h1.append(norms.h1_seminorm_error(mesh, u, grad))
    assert peak[0] > peak[1] > peak[2], peak
    assert peak[-1] < 0.005 * R * R / 6
    assert (norms.observed_rates(h, peak) > 1.5).all(), (h, peak)
    assert (norms.observed_rates(h, l2) > 1.8).all(), (h, l2)
    assert (abs(norms.observed_rates(h, h1) - 1) < 0.15).all(), (h, h1)


# --- norms on tetrahedra ---------------------------------------------------------------


def jittered_cuboid(n, seed, jitter=0.1):
    """cuboid(n, n, n) with its interior points moved by up to ``jitter`` cells."""
    m = cuboid(n, n, n)
    p = m.points.copy()
    inner = ((p > 0) & (p < 1)).all(axis=1)
    p[inner] += np.random.default_rng(seed).uniform(-jitter, jitter, (inner.sum(), 3)) / n
    return Mesh(p, m.cells)


def test_linear_functions_have_zero_error():
    # P1 holds linear functions exactly (common practice, no source): only the round-off
    # of values of size 1 to 5 is left, and of gradients (2, -1, 0.5) from differences of
    # such values over edges of about 1/4
    m = jittered_cuboid(4, 1)
    lin = lambda x, y, z: 1 + 2 * x - y + 0.5 * z  # noqa: E731
    grad = lambda x, y, z: (2 + 0 * x, -1 + 0 * x, 0.5 + 0 * x)  # noqa: E731
    u = lin(*m.points.T)
    for q in (1, 2, 3, 5):
        assert norms.l2_error(m, u, lin, quadrature=q) <= 4 * SUMS
    assert norms.h1_seminorm_error(m, u, grad) <= 16 * SUMS * np.sqrt(5.25)
    assert norms.energy_error(m, u, grad, np.diag([1.0, 2.0, 3.0])) <= 16 * SUMS * 3


def test_norms_of_known_functions_on_the_unit_cube():
    # elementary integrals over the unit cube (common practice, no source)
    m = jittered_cuboid(3, 2)
    x = m.points[:, 0]
    # e = x y + z^2 with u_h = 1 + x interpolated exactly: int e^2 = 1/9 + 1/6 + 1/5 = 43/90,
    # degree 4, exact for the rules of degree 5 (fifteen points) and 4 (the same rule)
    def exact(x, y, z):
        return 1 + x - (x * y + z * z)

    for q in (4, 5):
        assert norms.l2_error(m, 1 + x, exact, quadrature=q) == pytest.approx(
            np.sqrt(43 / 90), rel=SUMS, abs=0)
    # |grad e|^2 = y^2 + x^2 + 4 z^2 integrates to 1/3 + 1/3 + 4/3 = 2 (degree 2)
    def grad(x, y, z):
        return 1 - y, -x + 0 * y, -2 * z

    for q in (2, 3, 5):
        assert norms.h1_seminorm_error(m, 1 + x, grad, quadrature=q) == pytest.approx(
            np.sqrt(2), rel=SUMS, abs=0)
    # int sin^2(pi x) sin^2(pi y) sin^2(pi z) = 1/8 (analytic); the degree-5 rule on cubes of
    # side 1/4 leaves a quadrature error far below the 1e-3 allowed here, and a wrong
    # weight or point far above it
    c = cuboid(4, 4, 4)
    assert norms.l2_error(c, np.zeros(c.n_points), sines) == pytest.approx(
        np.sqrt(1 / 8), rel=1e-3, abs=0)


def test_energy_norms_of_every_coefficient_kind():
    # u_h = x + 2 y + z against a constant exact solution: the error's gradient is
    # a = (1, 2, 1) everywhere, |a|^2 = 6; the energy norm squared is int a.K a (by hand)
    m = cuboid(2, 2, 2)
    x, y, z = m.points.T
    u = x + 2 * y + z
    assert norms.energy_error(m, u, zero_gradient) == pytest.approx(np.sqrt(6), rel=SUMS, abs=0)
    assert norms.energy_error(m, u, zero_gradient, 4.0) == pytest.approx(
        np.sqrt(24), rel=SUMS, abs=0)
    # kappa = 1 + x per point (linear): int = 6 * 3/2 = 9
    assert norms.energy_error(m, u, zero_gradient, 1 + x) == pytest.approx(3.0, rel=SUMS, abs=0)
    # kappa = 1 + x y z, a callable of degree 3: int = 6 (1 + 1/8)
    assert norms.energy_error(m, u, zero_gradient, lambda x, y, z: 1 + x * y * z) == \
        pytest.approx(np.sqrt(6.75), rel=SUMS, abs=0)
    # two halves x < 1/2 and x > 1/2 (volume 1/2 each), per cell and per-cell tensors:
    # K1 = [[2, 0, 1], [0, 1, 0], [1, 0, 3]]: a.K1 a = 2 + 4 + 3 + 2 (1 * 1 * 1) = 11
    # K2 = [[1, .5, 0], [.5, 2, .5], [0, .5, 4]]: a.K2 a = 1 + 8 + 4 + 2 (.5 * 2 + .5 * 2) = 17
    left = m.points[m.cells].mean(axis=1)[:, 0] < 0.5
    per_cell = np.where(left, 3.0, 5.0)
    assert norms.energy_error(m, u, zero_gradient, hatkernels.per_cell(per_cell)) == \
        pytest.approx(np.sqrt(6 * 4.0), rel=SUMS, abs=0)
    K1 = np.array([[2.0, 0, 1], [0, 1, 0], [1, 0, 3]])
    K2 = np.array([[1.0, 0.5, 0], [0.5, 2, 0.5], [0, 0.5, 4]])
    K = np.where(left[:, None, None], K1, K2)
    assert norms.energy_error(m, u, zero_gradient, K) == pytest.approx(
        np.sqrt(14.0), rel=SUMS, abs=0)
    assert norms.energy_error(m, u, zero_gradient, K1) == pytest.approx(
        np.sqrt(11.0), rel=SUMS, abs=0)


@pytest.mark.parametrize("scale", [1e200, 1e-200])
def test_norms_on_tetrahedra_are_scaled(scale):
    # a constant on the unit cube: its L2 norm is the constant; u_h = s z has gradient
    # (0, 0, s) (elementary; common practice, no source)
    m = cuboid(2, 2, 2)
    zero = lambda x, y, z: 0 * x  # noqa: E731
    with np.errstate(over="ignore", under="ignore"):
        l2 = norms.l2_error(m, np.full(m.n_points, scale), zero)
        h1 = norms.h1_seminorm_error(m, scale * m.points[:, 2], zero_gradient)
    assert l2 == pytest.approx(scale, rel=SUMS, abs=0)
    assert h1 == pytest.approx(scale, rel=SUMS, abs=0)


def test_chunks_give_the_same_norms_and_name_the_right_tetrahedron(monkeypatch):
    m = jittered_cuboid(3, 5)
    u = np.cos(m.points[:, 0]) * m.points[:, 1] + m.points[:, 2]
    K = np.tile(np.array([[2.0, 0.3, 0.1], [0.3, 1.0, 0.2], [0.1, 0.2, 3.0]]), (m.n_cells, 1, 1))
    K[::2] *= 2.0

    def measure():
        return [norms.l2_error(m, u, sines), norms.h1_seminorm_error(m, u, grad_sines),
                norms.energy_error(m, u, grad_sines, K),
                norms.energy_error(m, u, grad_sines, lambda x, y, z: 1 + x * y),
                norms.energy_error(m, u, grad_sines, hatkernels.per_cell(1.0 + K[:, 0, 0]))]

    whole = measure()
    monkeypatch.setattr(norms, "_CHUNK", 14)  # 7 tetrahedra a chunk
    # the same sums in another order: round-off only
    assert measure() == pytest.approx(whole, rel=SUMS, abs=0)
    # the first tetrahedron with a quadrature point near the corner (1, 1, 1), found here
    lam, _ = tetrahedron_rule(5)
    xq = np.einsum("qa,mai->mqi", lam, m.points[m.cells])
    first = int(np.flatnonzero((xq.sum(axis=2) > 2.8).any(axis=1))[0])
    assert first >= 7  # not in the first chunk

    def corner(x, y, z):
        return np.where(x + y + z > 2.8, np.nan, x)

    with pytest.raises(hatkernels.InputError, match=rf"a quadrature point of tetrahedron {first};"):
        norms.l2_error(m, u, corner)


def test_norms_on_tetrahedra_leave_their_inputs_unchanged():
    # inputs are never modified (the project's rule): compared with copies taken before
    m = jittered_cuboid(2, 3)
    u = np.cos(m.points[:, 0]) * m.points[:, 1]
    u32 = u.astype(np.float32)
    per_point = 1.0 + m.points[:, 0]
    per_cell = np.linspace(1.0, 2.0, m.n_cells)
    tensors = np.tile(np.diag([2.0, 1.0, 3.0]), (m.n_cells, 1, 1))
    inputs = (u, u32, per_point, per_cell, tensors)
    before = [a.copy() for a in inputs]
    points, cells = m.points.copy(), m.cells.copy()
    for values in (u, u32):
        norms.l2_error(m, values, sines)
        norms.h1_seminorm_error(m, values, grad_sines)
        for coef in (per_point, hatkernels.per_cell(per_cell), tensors):
            norms.energy_error(m, values, grad_sines, coef)
    for old, new in zip(before, inputs, strict=True):
        assert np.array_equal(old, new) and old.dtype == new.dtype
    assert np.array_equal(m.points, points) and np.array_equal(m.cells, cells)


def test_bad_input_to_the_norms_on_tetrahedra_is_named():
    m = cuboid(2, 2, 2)
    u = np.zeros(m.n_points)
    Error = hatkernels.InputError
    with pytest.raises(Error, match=r"nodal values of shape \(27,\), got float64 \(26,\)"):
        norms.l2_error(m, u[:-1], sines)
    with pytest.raises(Error, match=r"exact\(x, y, z\) returned shape \(2,\), expected one value"):
        norms.l2_error(m, u, lambda x, y, z: np.ones(2))
    with pytest.raises(Error, match=r"exact\(x, y, z\) raised TypeError"):
        norms.l2_error(m, u, lambda x, y: x)  # a 2-D callable on a 3-D mesh
    with pytest.raises(Error, match=r"grad_exact\(x, y, z\) returned shape \(2, 48, 15\), "
                                    r"expected 3 components \(ux, uy, uz\)"):
        norms.h1_seminorm_error(m, u, lambda x, y, z: (x, y))
    with pytest.raises(Error, match=r"exact\(x, y, z\) is nan at \(.*\), a quadrature point "
                                    r"of tetrahedron \d+; it must be finite"):
        norms.l2_error(m, u, lambda x, y, z: np.where(z > 0.9, np.nan, z))
    with pytest.raises(Error, match=r"component 2 of grad_exact\(x, y, z\) is inf"):
        norms.h1_seminorm_error(m, u, lambda x, y, z: (x, y, np.where(z > 0.5, np.inf, z)))
    with pytest.raises(Error, match=r"coefficient\(x, y, z\) is -1.0 at .* tetrahedron 0;"):
        norms.energy_error(m, u, zero_gradient, lambda x, y, z: -1 + 0 * x)
    with pytest.raises(Error, match=r"coefficient has shape \(2, 2\).*3x3 tensors"):
        norms.energy_error(m, u, zero_gradient, np.eye(2))
    with pytest.raises(Error, match="tensor of tetrahedron 3 is not positive definite"):
        K = np.tile(np.eye(3), (m.n_cells, 1, 1))
        K[3, 2, 2] = -1.0
        norms.energy_error(m, u, zero_gradient, K)
    bad = u.copy()
    bad[5] = np.nan
    with pytest.raises(Error, match=r"u\[5\] = nan is not finite"):
        norms.l2_error(m, bad, sines)
    with pytest.raises(Error, match="levels"):
        norms.convergence_study(m, lambda mm: np.zeros(mm.n_points), sines, levels=1)


# --- invariances of the assembled stiffness ---------------------------------------------


seeds = st.integers(0, 2**32 - 1)


def delaunay(seed):
    """The Delaunay tetrahedralisation of 8 to 39 random points in the unit cube."""
    rng = np.random.default_rng(seed)
    return hatkernels.mesh.triangulate(rng.random((int(rng.integers(8, 40)), 3)))


def sensitivity(mesh):
    """``max over cells of L**3 / (6 |V| l)`` (L, l the longest and shortest edge): moving
    the points by ``d`` (in the mesh's units) changes an element's stiffness relatively by
    up to about ``d`` times this. A relative change ``d / l`` of the shortest edge is
    amplified by the cell's conditioning, of order ``L**3 / (6 |V|)``; Delaunay meshes of
    random points have slivers where it reaches 1e4 and more. (Measured on 200 random
    meshes moved by similarities: the stiffness changed by at most 0.12 of
    EPS (1 + |c| / s) times this bound.)"""
    p, t = mesh.points, mesh.cells
    longest = np.zeros(len(t))
    shortest = np.full(len(t), np.inf)
    for a, b in itertools.combinations(range(4), 2):
        d = np.linalg.norm(p[t[:, a]] - p[t[:, b]], axis=1)
        longest, shortest = np.maximum(longest, d), np.minimum(shortest, d)
    return float((longest**3 / (6 * mesh.volumes() * shortest)).max())


def close(A, B, rel):
    """Same pattern and values equal to ``rel`` relative to the largest entry."""
    scale = max(abs(A).max(), abs(B).max())
    return A.shape == B.shape and abs(A - B).max() <= rel * scale


def even_permutation(rng):
    """A random even permutation of the four vertices (an odd one reverses the orientation,
    which the mesh would undo with a warning)."""
    p = rng.permutation(4)
    inversions = sum(p[i] > p[j] for i, j in itertools.combinations(range(4), 2))
    if inversions % 2:
        p[[2, 3]] = p[[3, 2]]
    return p


def kappa(x, y, z):
    return 1 + x * x + y * z


@given(seeds)
def test_stiffness_of_every_strategy_is_invariant_under_renumbering(seed):
    # points and cells renumbered and each cell's vertices turned: the same operator in
    # another numbering, A' = P A P^T (common practice, no source)
    m = delaunay(seed)
    rng = np.random.default_rng(seed)
    perm = rng.permutation(m.n_points)  # new -> old
    inv = np.argsort(perm)
    order = rng.permutation(m.n_cells)
    r = Mesh(m.points[perm], inv[m.cells[order]][:, even_permutation(rng)])
    B = rng.normal(size=(m.n_cells, 3, 3))
    K = B @ B.transpose(0, 2, 1) + np.eye(3)  # symmetric positive definite
    point = 1 + rng.random(m.n_points)
    cell = 1 + rng.random(m.n_cells)
    cases = {
        "none": (None, None),
        "per point": (point, point[perm]),
        "per cell": (hatkernels.per_cell(cell), hatkernels.per_cell(cell[order])),
        "tensor per cell": (K, K[order]),
        "callable": (kappa, kappa),
    }
    tol = 16 * EPS * sensitivity(m)
    for strategy in STRATEGIES:
        for name, (c, c_r) in cases.items():
            A = assemble_stiffness(m, c, strategy=strategy)
            Ar = assemble_stiffness(r, c_r, strategy=strategy)
            assert close(Ar, A[perm][:, perm], tol), (strategy, name)


@given(seeds, st.floats(0.0, 10.0), st.floats(1e-3, 1e3))
def test_stiffness_of_every_strategy_is_invariant_under_similarity(seed, shift, s):
    # x' = s Q x + c (Q a rotation): gradients scale by 1/s and volumes by s^3, so the
    # stiffness of the Laplacian scales by s in 3-D, the mass by s^3; an anisotropic
    # tensor turns with the mesh, K' = Q K Q^T, and a callable is read at the moved
    # points (change of variables; common practice, no source). Reflections reverse
    # every orientation; tests/test_tetrahedra.py checks them on the element values.
    m = delaunay(seed)
    rng = np.random.default_rng(seed)
    Q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    if np.linalg.det(Q) < 0:
        Q[:, 0] = -Q[:, 0]
    c = shift * rng.uniform(-1, 1, size=3)
    moved = Mesh(s * m.points @ Q.T + c, m.cells)
    K = np.array([[4.0, 1.0, 0.5], [1.0, 2.0, 0.0], [0.5, 0.0, 0.5]])

    def kappa_moved(x, y, z):
        back = (np.stack([x, y, z], axis=-1) - c) @ Q / s  # Q^T (x' - c) / s, row-wise
        return kappa(*np.moveaxis(back, -1, 0))

    # rounding the moved coordinates moves each point by about EPS (s + |c|), that is
    # EPS (1 + |c| / s) in the original units (see sensitivity)
    tol = 16 * EPS * (1 + np.abs(c).max() / s) * sensitivity(m)
    for strategy in STRATEGIES:
        for coef, coef_moved in ((None, None), (K, Q @ K @ Q.T), (kappa, kappa_moved)):
            A = assemble_stiffness(m, coef, strategy=strategy)
            B = assemble_stiffness(moved, coef_moved, strategy=strategy)
            assert close(B, s * A, tol), (strategy, coef)
        M = assemble_mass(m, strategy=strategy)
        assert close(assemble_mass(moved, strategy=strategy), s**3 * M, tol), strategy
