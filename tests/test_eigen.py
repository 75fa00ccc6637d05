"""eigenmodes: the smallest eigenpairs of -div(kappa grad u) = lambda rho u.

Exact eigenvalues of the unit square and cube, the half-Neumann square and
the Neumann square come from separation of variables (common practice, no
source); the L-shape's from Betcke and Trefethen; the disk's from the first
zero of J0 (scipy.special).  P1 eigenvalues approach the exact ones from
above at order 2 in h for smooth eigenfunctions, 4/3 at the L-shape's
re-entrant corner (I. Babuska and J. Osborn, Eigenvalue problems, Handbook
of Numerical Analysis II, 1991): on nested meshes they decrease
monotonically (min-max over nested spaces).

Most tests run on one numba thread: they check numbers, and on a 2-core
machine shared with other work every parallel region of the many small
products waits for a second time slice.  The thread test runs on both.
"""

import pickle

import numpy as np
import pytest
import scipy.sparse.linalg as sla
from conftest import EPS, refined
from hypothesis import given
from hypothesis import strategies as st
from scipy.special import jn_zeros

import hatkernels
from hatkernels import ConvergenceError, InputError, Mesh, threads
from hatkernels.assembly import assemble_mass, assemble_stiffness
from hatkernels.eigen import Eigenmodes, eigenmodes
from hatkernels.mesh import cuboid, disk, l_shape, rectangle

PI2 = np.pi**2


@pytest.fixture(autouse=True)
def one_thread(request):
    if request.node.get_closest_marker("two_threads"):
        yield
        return
    with threads(1):
        yield


def orders(errors, ratio=2.0):
    errors = np.asarray(errors)
    return np.log(errors[:-1] / errors[1:]) / np.log(ratio)


def check_from_above_at_order(values, exact, low, high):
    """Each column of ``values`` (one row per mesh, h halved each time) above ``exact``,
    decreasing, at an observed order between ``low`` and ``high`` on the last pair."""
    errors = np.asarray(values) - np.asarray(exact)
    assert (errors > 0).all()
    assert (np.diff(errors, axis=0) < 0).all()
    rate = orders(errors)[-1]
    assert np.all((low < rate) & (rate < high)), rate


# -- against outside values -------------------------------------------------------------------

def test_unit_square_values_from_above_at_order_two():
    # 2 pi^2, 5 pi^2 (double: modes (1,2) and (2,1)), 8 pi^2: separation of variables
    # (common practice, no source); order 2 from above: Babuska and Osborn, 1991
    values = [eigenmodes(rectangle(n, n), 4).values / PI2 for n in (8, 16, 32)]
    check_from_above_at_order(values, [2, 5, 5, 8], 1.9, 2.1)
    assert abs(values[-1][1] - values[-1][2]) < 0.02  # the double value, split by the mesh


def test_l_shape_first_value_from_above():
    # 9.6397238440219: T. Betcke and L. N. Trefethen, Reviving the method of particular
    # solutions, SIAM Review 47 (2005); the eigenfunction is singular at the re-entrant
    # corner, so the order tends to 4/3 (Babuska and Osborn, 1991) from above
    values = [eigenmodes(l_shape(n), 1).values for n in (4, 8, 16)]
    check_from_above_at_order(values, [9.6397238440219], 1.2, 2.0)


def test_unit_cube_value_from_above():
    # 3 pi^2: separation of variables (common practice, no source); order 2
    values = [eigenmodes(cuboid(n, n, n), 1).values / PI2 for n in (4, 8)]
    check_from_above_at_order(values, [3], 1.8, 2.2)


def test_disk_value_from_above():
    j01 = jn_zeros(0, 1)[0]  # the first zero of J0 (scipy.special)
    assert j01 == pytest.approx(2.404825557695773, rel=4 * EPS, abs=0)  # value from memory
    # the mesh fills an inscribed polygon, which only raises the Dirichlet value (domain
    # monotonicity; common practice, no source): still from above, at order 2
    values = [eigenmodes(disk(n), 1).values for n in (4, 8, 16)]
    check_from_above_at_order(values, [j01**2], 1.9, 2.1)


def test_neumann_square_zero_mode_then_pi_squared_double():
    # Neumann modes cos(a pi x) cos(b pi y): 0, pi^2 (double), ... (common practice, no source)
    values = []
    for n in (8, 16, 32):
        modes = eigenmodes(rectangle(n, n), 3, dirichlet_on=())
        assert modes.zero_modes.tolist() == [True, False, False]
        assert modes.values[0] == 0.0
        assert np.all(modes.vectors[:, 0] == modes.vectors[0, 0])  # the constant
        assert modes.vectors[0, 0] == pytest.approx(1.0, rel=16 * EPS, abs=0)  # area 1
        values.append(modes.values[1:] / PI2)
    check_from_above_at_order(values, [1, 1], 1.9, 2.1)


def test_mixed_conditions_half_wavelengths():
    # held on x = 0 only: sin((2a - 1) pi x / 2) cos(b pi y), values ((2a-1)^2/4 + b^2) pi^2:
    # 1/4, 5/4, 9/4 (common practice, no source)
    values = []
    for n in (8, 16, 32):
        m = rectangle(n, n)
        values.append(eigenmodes(m, 3, dirichlet_on=np.flatnonzero(m.points[:, 0] == 0))
                      .values / PI2)
    check_from_above_at_order(values, [0.25, 1.25, 2.25], 1.9, 2.1)


def test_coefficient_and_density_scale_the_values():
    # kappa and rho constant: lambda = (kappa / rho) lambda_1 (common practice, no source);
    # per-cell arrays and region dicts of the same constants give the same problem
    m = rectangle(12, 12)
    plain = eigenmodes(m, 4).values
    scaled = eigenmodes(m, 4, coefficient=3.0, density=2.0).values
    assert scaled == pytest.approx(1.5 * plain, rel=64 * EPS, abs=0)
    per_cell = eigenmodes(m, 4, coefficient=np.full(m.n_cells, 3.0),
                          density=np.full(m.n_cells, 2.0)).values
    assert per_cell == pytest.approx(scaled, rel=64 * EPS, abs=0)
    halves = m.with_tags(regions=(m.points[m.cells].mean(axis=1)[:, 0] > 0.5).astype(int))
    by_region = eigenmodes(halves, 4, coefficient={0: 3.0, 1: 3.0}, density={0: 2.0, 1: 2.0})
    assert by_region.values == pytest.approx(scaled, rel=64 * EPS, abs=0)


def test_vectors_are_mass_normalised_and_orthogonal_eigenvectors():
    m = rectangle(16, 16)
    rng = np.random.default_rng(3)
    rho = rng.uniform(0.5, 2.0, m.n_cells)
    kappa = rng.uniform(1.0, 3.0, m.n_cells)
    modes = eigenmodes(m, 5, coefficient=kappa, density=rho)
    V = modes.vectors
    K, M = assemble_stiffness(m, kappa), assemble_mass(m, rho)
    assert np.abs(V.T @ (M @ V) - np.eye(5)).max() < 1e-12
    free = np.setdiff1d(np.arange(m.n_points), m.boundary_points())
    R = (K @ V - (M @ V) * modes.values)[free]  # the equations of the points not held
    assert np.abs(R).max() < 1e-12 * modes.values.max() * np.abs(M @ V).max()
    assert np.all(V[m.boundary_points()] == 0)
    assert np.all(V[np.abs(V).argmax(axis=0), np.arange(5)] > 0)  # the sign convention


# -- lobpcg with multigrid against scipy --------------------------------------------------

def reference(mesh, k, held, kappa=None, rho=None, shift=0.0):
    """The k smallest eigenvalues by scipy's eigsh in shift-invert mode (reference library:
    scipy) on the matrices reduced to the points not held."""
    K, M = assemble_stiffness(mesh, kappa), assemble_mass(mesh, rho)
    free = np.setdiff1d(np.arange(mesh.n_points), held)
    K, M = K[free][:, free], M[free][:, free]
    values = sla.eigsh(K, k, M, sigma=-shift, which="LM", v0=np.ones(free.size))[0]
    return np.sort(values)


def test_lobpcg_with_geometric_multigrid_agrees_with_scipy():
    m = refined(rectangle(8, 8), 3)  # 3,969 unknowns, started on the 32 x 32 mesh
    modes = eigenmodes(m, 6, method="lobpcg", rtol=1e-10)
    s = modes.stats
    assert s.method == "lobpcg" and s.converged and s.levels[0] == (961, 0)
    assert s.preconditioner.startswith("gmg")
    expected = reference(m, 6, m.boundary_points())
    assert modes.values == pytest.approx(expected, rel=1e-9, abs=0)
    assert (s.errors <= 1e-10).all()
    # the same eigenvectors as shift-invert: the simple ones up to round-off, the
    # double pair up to a rotation inside its plane (their M-products form an orthogonal matrix)
    other = eigenmodes(m, 6, method="shift-invert")
    C = modes.vectors.T @ (assemble_mass(m) @ other.vectors)
    assert np.abs(np.abs(C[[0, 3], [0, 3]]) - 1).max() < 1e-8
    assert np.abs(C[1:3, 1:3] @ C[1:3, 1:3].T - np.eye(2)).max() < 1e-8


def test_lobpcg_with_varying_data_down_the_levels():
    # per-region kappa with a jump, per-cell rho and per-point kappa go down the nested
    # levels (averaged or sampled); the answer on the given mesh is what counts
    coarse = rectangle(8, 8)
    halves = coarse.with_tags(regions=(coarse.points[coarse.cells].mean(axis=1)[:, 0] > 0.5)
                              .astype(int))
    m = refined(halves, 3)
    rho = np.random.default_rng(5).uniform(0.5, 2.0, m.n_cells)
    for kappa in ({0: 1.0, 1: 10.0}, 1.0 + m.points[:, 0] * m.points[:, 1]):
        modes = eigenmodes(m, 4, method="lobpcg", coefficient=kappa, density=rho)
        expected = eigenmodes(m, 4, method="shift-invert", coefficient=kappa, density=rho)
        assert modes.stats.levels[0][1] == 0 and len(modes.stats.levels) == 2
        assert modes.values == pytest.approx(expected.values, rel=1e-7, abs=0)


def test_lobpcg_without_refinement_history_uses_amg():
    m = rectangle(50, 50)
    modes = eigenmodes(m, 4, method="lobpcg", coefficient=2.0, density=0.5)
    assert modes.stats.levels == [(2401, modes.stats.iterations)]  # one level: random start
    assert modes.stats.preconditioner.startswith("amg")
    assert modes.values == pytest.approx(reference(m, 4, m.boundary_points(), 2.0, 0.5),
                                         rel=1e-7, abs=0)


def test_lobpcg_neumann_keeps_the_zero_mode_exact():
    m = refined(rectangle(8, 8), 3)
    modes = eigenmodes(m, 5, method="lobpcg", dirichlet_on=())
    assert modes.zero_modes.tolist() == [True] + [False] * 4
    assert modes.values[0] == 0.0 and modes.stats.shift > 0
    expected = reference(m, 5, [], shift=1.0)
    assert abs(expected[0]) < 1e-10  # scipy's zero, to round-off
    assert modes.values[1:] == pytest.approx(expected[1:], rel=1e-7, abs=0)
    V = modes.vectors
    assert np.abs(V.T @ (assemble_mass(m) @ V) - np.eye(5)).max() < 1e-10


def test_lobpcg_on_tetrahedra():
    m = refined(cuboid(2, 2, 2), 2)  # 343 unknowns, started on the 27 of cuboid(4, 4, 4)
    modes = eigenmodes(m, 4, method="lobpcg", extra=1)
    assert modes.stats.levels[0] == (27, 0)
    assert modes.values == pytest.approx(reference(m, 4, m.boundary_points()), rel=1e-7, abs=0)


def test_a_mesh_whose_coarsest_level_is_all_held_falls_back_to_amg():
    # rectangle(1, 1) has no interior point: the default multigrid cannot use it as its
    # coarsest level, so the default preconditioner serves instead
    m = refined(rectangle(1, 1), 6)
    modes = eigenmodes(m, 3, method="lobpcg")
    assert modes.stats.preconditioner.startswith("amg")
    assert modes.values == pytest.approx(reference(m, 3, m.boundary_points()), rel=1e-7, abs=0)


def test_not_converging_is_an_error_saying_how_many_converged():
    m = refined(rectangle(8, 8), 3)
    with pytest.raises(ConvergenceError, match=r"converged \d+ of the 6 eigenpairs"):
        eigenmodes(m, 6, method="lobpcg", rtol=1e-9, maxiter=1)


# -- the result --------------------------------------------------------------------------

def test_the_result_unpacks_as_values_and_vectors():
    m = rectangle(6, 6)
    modes = eigenmodes(m, 2)
    values, vectors = modes
    assert isinstance(modes, tuple) and isinstance(modes, Eigenmodes)
    assert values is modes.values and vectors is modes.vectors and modes[0] is values
    assert values.shape == (2,) and vectors.shape == (m.n_points, 2)
    again = pickle.loads(pickle.dumps(modes))
    assert np.array_equal(again.values, values) and again.stats.method == "dense"
    assert "2 zero modes" not in repr(modes) and "dense" in repr(modes)


def test_zero_modes_only_and_one_per_floating_part():
    # two separate squares, nothing held: two zero modes, each constant on its square
    a = rectangle(3, 3)
    points = np.vstack([a.points, a.points + [2.0, 0.0]])
    two = Mesh(points, np.vstack([a.cells, a.cells + a.n_points]))
    modes = eigenmodes(two, 2, dirichlet_on=())
    assert modes.values.tolist() == [0.0, 0.0] and modes.zero_modes.all()
    assert modes.stats.method == "zero modes"
    on = modes.vectors != 0
    assert on[:, 0].sum() == on[:, 1].sum() == a.n_points and not (on[:, 0] & on[:, 1]).any()
    # holding one square leaves one zero mode, then the held square's and the free one's
    modes = eigenmodes(two, 3, dirichlet_on=a.boundary_points())
    assert modes.zero_modes.tolist() == [True, False, False]


# -- bad input ------------------------------------------------------------------------------

@pytest.mark.parametrize("kwargs, message", [
    ({"k": 0}, "k must be >= 1"),
    ({"k": 2.5}, "k must be an integer"),
    ({"k": True}, "k must be an integer"),
    ({"k": 9}, "k = 9 eigenpairs asked for, but the problem has 9 unknowns"),
    ({"density": -1.0}, "density is -1.0"),
    ({"coefficient": 0.0}, "coefficient is 0.0"),
    ({"method": "arnoldi"}, "method must be one of"),
    ({"rtol": 0.0}, "rtol must be a number between 0"),
    ({"rtol": 1.5}, "rtol must be a number between 0"),
    ({"maxiter": 0}, "maxiter must be >= 1"),
    ({"extra": -1}, "extra must be >= 0"),
    ({"quadrature": 0}, "quadrature must be >= 1"),
    ({"preconditioner": "magic"}, "unknown preconditioner 'magic'"),
    ({"dirichlet_on": [0, 99]}, r"dirichlet_on\[1\] = 99 is outside"),
    ({"method": "lobpcg"}, "method='lobpcg' needs at least 5 x"),
])
def test_bad_input_names_the_problem(kwargs, message):
    kwargs = {"k": 2, **kwargs}
    with pytest.raises(InputError, match=message):
        eigenmodes(rectangle(4, 4), **kwargs)


def test_bad_data_name_the_cell():
    m = rectangle(4, 4)
    rho = np.ones(m.n_cells)
    rho[5] = -2.0
    with pytest.raises(InputError, match="density is -2.0 at triangle 5"):
        eigenmodes(m, 2, density=rho)
    with pytest.raises(InputError, match="expected a hatkernels.Mesh"):
        eigenmodes(m.points, 2)
    # a density by region must name the region it lacks, as the coefficient's does
    halves = m.with_tags(regions=(m.points[m.cells].mean(axis=1)[:, 0] > 0.5).astype(int))
    with pytest.raises(InputError, match=r"density: region 1 has none"):
        eigenmodes(halves, 2, density={0: 2.0})


def test_multigrid_with_the_shifts_mass_serves_a_floating_part():
    # nothing held (Neumann): gmg's levels carry K + shift M (the shift's mass lumped), as
    # amg gets the assembled K + shift M; the unit square's Neumann eigenvalues are
    # (a^2 + b^2) pi^2 = 0, pi^2, pi^2, 2 pi^2 (separation of variables, cosines; common
    # practice, no source), approached from above
    m = refined(rectangle(8, 8), 3)
    modes = eigenmodes(m, 4, method="lobpcg", dirichlet_on=(), preconditioner="gmg",
                       rtol=1e-8)
    assert modes.zero_modes.tolist() == [True, False, False, False]
    assert modes.stats.preconditioner.startswith("gmg")
    exact = np.array([1.0, 1.0, 2.0]) * np.pi**2
    assert np.all(modes.values[1:] > exact)
    assert np.all(modes.values[1:] < exact * (1 + 2e-3)), modes.values[1:] / exact - 1


def test_inputs_are_left_unchanged():
    m = rectangle(12, 12)
    rho = np.linspace(1.0, 2.0, m.n_cells)
    kappa = np.linspace(1.0, 3.0, m.n_points)
    held = np.flatnonzero(m.points[:, 1] == 0)
    copies = [a.copy() for a in (rho, kappa, held, m.points, m.cells)]
    eigenmodes(m, 3, density=rho, coefficient=kappa, dirichlet_on=held)
    for a, b in zip((rho, kappa, held, m.points, m.cells), copies, strict=True):
        assert np.array_equal(a, b)


# -- invariants ---------------------------------------------------------------------------

@given(angle=st.floats(0.0, 2 * np.pi), shift=st.tuples(st.floats(-5, 5), st.floats(-5, 5)),
       scale=st.floats(0.25, 4.0))
def test_rigid_motions_keep_and_scaling_divides_the_values(angle, shift, scale):
    # the Laplacian commutes with rotations and translations, and x -> s x scales its
    # eigenvalues by 1 / s^2 (common practice, no source); the P1 matrices do the same
    m = disk(3)
    base = eigenmodes(m, 4).values
    c, s = np.cos(angle), np.sin(angle)
    moved = Mesh(m.points @ np.array([[c, s], [-s, c]]) * scale + np.asarray(shift), m.cells)
    values = eigenmodes(moved, 4).values
    assert values * scale**2 == pytest.approx(base, rel=1e-10, abs=0)


@pytest.mark.two_threads
def test_same_bits_on_one_and_two_threads():
    m = refined(rectangle(8, 8), 2)
    out = []
    for n in (1, 2):
        with threads(n):
            modes = eigenmodes(m, 3, method="lobpcg", preconditioner="ic0")
            out.append((modes.values, modes.vectors))
    for a, b in zip(out[0], out[1], strict=True):
        assert a.tobytes() == b.tobytes()


def test_the_public_name_is_reachable():
    assert hatkernels.eigen.eigenmodes is eigenmodes
