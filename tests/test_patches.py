"""The refinement that is never stored (hatkernels.patches): layout, operator, multigrid, solve.

A coarse triangle mesh refined ``k`` times is kept as the coarse mesh and one
flat vector per level.  Every check here goes against something outside that
path:

* the stored refinement (``coarse.refine()`` repeated ``k`` times) with the
  stored assembly (:func:`hatkernels.assemble_stiffness`), the stored
  matrix-free :class:`hatkernels.StiffnessOperator`, the stored geometric
  multigrid (:class:`hatkernels.precond.gmg.GeometricMultigrid`) and the stored
  solve (:func:`hatkernels.solve_poisson` with ``preconditioner="gmg"``):
  independent implementations over fine index arrays;
* the analytic solution of ``-lap u = 1`` on the unit square (the double sine
  series of the membrane / torsion problem);
* the same bits on 1 and 2 threads (the kernels' fixed summation order).

Tolerances: identities of linear operators at a relative 1e-12 (round-off is
about 1e-15); solutions at what the solver's tolerance implies, bounded from the
residual in the stored system as ``||e|| <= ||r|| / lambda_min``.
"""

import numpy as np
import pytest
import scipy.sparse.linalg as spla
from conftest import jittered_mesh, meshes, refined, relative_error
from hypothesis import given, settings
from hypothesis import strategies as st
from test_threads import assert_same_bits, on_one_and_two_threads

import hatkernels as hk
from hatkernels.errors import InputError
from hatkernels.mesh import cuboid, rectangle
from hatkernels.mesh.tags import label_cells, label_sides
from hatkernels.patches import PatchLayout, PatchMultigrid, PatchOperator, element_stiffness
from hatkernels.patches.solve import patch_path_reason, solve_on_patches
from hatkernels.precond.gmg import GeometricMultigrid

#: Relative agreement of two implementations of one linear operator (round-off ~1e-15).
IDENTITY = 1e-12


# -- helpers ------------------------------------------------------------------------------


def fine_coefficient(kappa, k):
    """The per-cell values of the coarse cells on the fine cells: the children of coarse
    cell ``t`` are fine cells ``t * 4**k ... (t + 1) * 4**k - 1`` (Mesh.refine's order)."""
    return hk.per_triangle(np.repeat(np.asarray(kappa, dtype=float), 4**k))


def on_sides(points, mesh, sides, tol=1e-12):
    """Which of ``points`` lie on the segments ``sides`` of ``mesh`` (plain geometry)."""
    hit = np.zeros(len(points), dtype=bool)
    for p, q in mesh.points[np.asarray(sides)]:
        d = q - p
        w = points - p
        cross = d[0] * w[:, 1] - d[1] * w[:, 0]
        along = w @ d
        hit |= (np.abs(cross) <= tol * (d @ d)) & (along >= -tol) & (along <= (1 + tol) * (d @ d))
    return hit


def bottom_sides(mesh):
    b = mesh.boundary_edges()
    return b[(mesh.points[b][:, :, 1] == 0.0).all(axis=1)]


def tagged_square(n=4):
    """The unit square, n x n cells: regions cold (x < 1/2) and hot, boundary tags left,
    right, bottom, top (as tests/test_tags.py builds it)."""
    m = label_cells(rectangle(n, n), {"cold": lambda x, y: x < 0.5,
                                      "hot": lambda x, y: x >= 0.5})
    return label_sides(m, {"left": lambda x, y: x == 0, "right": lambda x, y: x == 1,
                           "bottom": lambda x, y: y == 0, "top": lambda x, y: y == 1})


def reduced_system(fine, kappa, f, held, values):
    """The stored system on the free points: ``(A_ff, b_f, free)`` from the stored assembly
    and :func:`hatkernels.apply_dirichlet`."""
    A = hk.assemble_stiffness(fine, kappa)
    b = hk.assemble_load(fine, f)
    s = hk.apply_dirichlet(A, b, held, values)
    return s.A, s.b, s.free


def smallest_eigenvalue(A):
    return float(spla.eigsh(A, k=1, sigma=0.0, which="LM", return_eigenvectors=False)[0])


# == 1. the layout and the operator =======================================================


@pytest.fixture(scope="module")
def jittered():
    """A non-uniform Delaunay mesh of the unit square, points numbered at random."""
    return jittered_mesh(4, 7)


def coarse_meshes(jittered):
    return {"rectangle": rectangle(3, 2), "jittered": jittered}


# k = 1, 2: the buffered product (_jit.patches.apply); k = 3, 5 (8 and 32 subdivisions):
# the fused one (_jit.patch_product), its rows next to the sides read from the sides'
# copies and the rest of the inside straight from the vector
@pytest.mark.parametrize("k", [1, 2, 3, 5])
@pytest.mark.parametrize("which", ["rectangle", "jittered"])
def test_operator_equals_the_stored_assembly_and_the_stored_operator(jittered, which, k):
    coarse = coarse_meshes(jittered)[which]
    fine = refined(coarse, k)
    rng = np.random.default_rng(10 * k + len(which))
    kappa = rng.uniform(0.2, 5.0, coarse.n_triangles)
    u = rng.standard_normal(fine.n_points)
    u_copy, kappa_copy = u.copy(), kappa.copy()

    layout = PatchLayout(coarse, k, held_sides=coarse.boundary_edges())
    assert layout.size(k) == fine.n_points
    x = layout.from_refined(u)
    assert np.array_equal(layout.to_refined(x), u)  # the round trip is a permutation
    K = element_stiffness(coarse, kappa)

    # the whole stiffness matrix; reference: the stored assembly (an independent
    # implementation over the fine index arrays)
    y = layout.to_refined(PatchOperator(layout, K, k, masked=False) @ x)
    ref = hk.assemble_stiffness(fine, fine_coefficient(kappa, k)) @ u
    assert relative_error(y, ref) <= IDENTITY

    # held rows and columns taken out; reference: the stored matrix-free operator with the
    # fine boundary points as Dirichlet points
    y = layout.to_refined(PatchOperator(layout, K, k) @ x)
    op = hk.StiffnessOperator(fine, coefficient=fine_coefficient(kappa, k),
                              dirichlet=fine.boundary_points())
    assert relative_error(y, op @ u) <= IDENTITY

    # a constant coefficient given as one number
    y = layout.to_refined(PatchOperator(layout, element_stiffness(coarse, 2.5), k,
                                        masked=False) @ x)
    assert relative_error(y, hk.assemble_stiffness(fine, 2.5) @ u) <= IDENTITY
    assert np.array_equal(u, u_copy) and np.array_equal(kappa, kappa_copy)  # inputs kept


def test_every_level_of_one_layout_and_held_sides_on_part_of_the_boundary():
    coarse = rectangle(2, 3, bounds=(0.0, 2.0, 0.0, 1.0))
    k = 3
    held = bottom_sides(coarse)
    layout = PatchLayout(coarse, k, held_sides=held[:, ::-1])  # either order of the points
    kappa = np.linspace(0.5, 3.0, coarse.n_triangles)
    K = element_stiffness(coarse, kappa)
    for level in range(1, k + 1):
        fine = refined(coarse, level)
        u = np.random.default_rng(level).standard_normal(fine.n_points)
        x = layout.from_refined(u, level)
        assert x.size == layout.size(level)
        assert np.array_equal(layout.to_refined(x, level), u)
        fixed = np.flatnonzero(fine.points[:, 1] == 0.0)  # the fine points of the bottom
        # reference: the stored matrix-free operator, Dirichlet at those points
        op = hk.StiffnessOperator(fine, coefficient=fine_coefficient(kappa, level),
                                  dirichlet=fixed)
        y = layout.to_refined(PatchOperator(layout, K, level) @ x, level)
        assert relative_error(y, op @ u) <= IDENTITY
        # identity rows at the held points (common practice, no source)
        assert np.array_equal(y[fixed], u[fixed])


@settings(max_examples=6)
@given(coarse=meshes(min_n=2, max_n=4), k=st.integers(1, 2),
       seed=st.integers(0, 2**32 - 1))
def test_operator_on_random_meshes_equals_the_stored_one(coarse, k, seed):
    rng = np.random.default_rng(seed)
    fine = refined(coarse, k)
    kappa = rng.uniform(0.1, 10.0, coarse.n_triangles)
    boundary = coarse.boundary_edges()
    held = boundary[rng.random(len(boundary)) < 0.5]
    layout = PatchLayout(coarse, k, held_sides=held)
    u = rng.standard_normal(fine.n_points)
    x = layout.from_refined(u)
    assert np.array_equal(layout.to_refined(x), u)
    K = element_stiffness(coarse, kappa)
    # reference: the stored assembly, and the stored operator with the fine points on the
    # held sides (found by plain geometry) as Dirichlet points
    y = layout.to_refined(PatchOperator(layout, K, masked=False) @ x)
    assert relative_error(y, hk.assemble_stiffness(fine, fine_coefficient(kappa, k)) @ u) \
        <= IDENTITY
    fixed = np.flatnonzero(on_sides(fine.points, coarse, held))
    op = hk.StiffnessOperator(fine, coefficient=fine_coefficient(kappa, k), dirichlet=fixed)
    y = layout.to_refined(PatchOperator(layout, K) @ x)
    assert relative_error(y, op @ u) <= IDENTITY


def test_patch_values_sit_at_the_lattice_points_of_their_cell(jittered):
    coarse, k = jittered, 2
    n = 2**k
    fine = refined(coarse, k)
    layout = PatchLayout(coarse, k)
    u = fine.points[:, 0] + 3.0 * fine.points[:, 1] ** 2  # a function of position
    x = layout.from_refined(u)
    for cell in (0, coarse.n_triangles // 2, coarse.n_triangles - 1):
        lam, values = layout.patch(x, cell)
        assert (lam.sum(axis=1) == n).all() and len(lam) == (n + 1) * (n + 2) // 2
        where = lam @ coarse.points[coarse.triangles[cell]] / n
        # the fine point at each lattice position, found by coordinates
        nearest = np.argmin(((fine.points[None] - where[:, None]) ** 2).sum(axis=2), axis=1)
        assert np.allclose(fine.points[nearest], where, rtol=0, atol=1e-14)
        assert np.array_equal(values, u[nearest])
    with pytest.raises(InputError, match="not a coarse cell"):
        layout.patch(x, coarse.n_triangles)


# == 2. the multigrid cycle ===============================================================


@pytest.mark.parametrize("held", ["boundary", "bottom"])
@pytest.mark.parametrize("k", [1, 3])
def test_multigrid_equals_the_stored_cycle(held, k):
    # right triangles only (no obtuse angle): Gershgorin's bound is then that of the stored
    # operator, so the two cycles are the same linear operator
    coarse = rectangle(3, 2)
    fine = refined(coarse, k)
    sides = coarse.boundary_edges() if held == "boundary" else bottom_sides(coarse)
    fixed = (fine.boundary_points() if held == "boundary"
             else np.flatnonzero(fine.points[:, 1] == 0.0))
    rng = np.random.default_rng(k)
    kappa = rng.uniform(0.5, 2.0, coarse.n_triangles)
    kappa_copy = kappa.copy()
    layout = PatchLayout(coarse, k, held_sides=sides)
    M = PatchMultigrid(layout, kappa)
    # reference: the stored geometric multigrid on the stored refinement
    G = GeometricMultigrid(hk.StiffnessOperator(fine, coefficient=fine_coefficient(kappa, k),
                                                dirichlet=fixed), coarse="direct")
    r = rng.standard_normal(fine.n_points)
    x = layout.from_refined(r)
    x_copy = x.copy()
    assert relative_error(layout.to_refined(M @ x), G @ r) <= IDENTITY
    out, ref = np.empty(layout.size(k)), np.empty(fine.n_points)
    M.full_cycle_into(x, out)
    G.full_cycle_into(r, ref)
    assert relative_error(layout.to_refined(out), ref) <= IDENTITY
    M.full_cycle_into(x, out, cycles=2)
    G.full_cycle_into(r, ref, cycles=2)
    assert relative_error(layout.to_refined(out), ref) <= IDENTITY
    assert np.array_equal(x, x_copy) and np.array_equal(kappa, kappa_copy)  # inputs kept


# == 3. the solve =========================================================================

RTOL = 1e-10

#: (data, held(x, y) -> bool, held value(x, y)); held points and values by plain geometry
CASES = {
    "constant f": (dict(f=1.0), lambda x, y: (x == 0) | (x == 1) | (y == 0) | (y == 1),
                   lambda x, y: 0.0 * x),
    "held at 0.5": (dict(f=1.0, dirichlet=0.5),
                    lambda x, y: (x == 0) | (x == 1) | (y == 0) | (y == 1),
                    lambda x, y: 0.5 + 0.0 * x),
    "regions": (dict(f={"hot": 2.0, "cold": 0.5}, coefficient={"cold": 1.0, "hot": 20.0},
                     dirichlet={"left": 0.0, "top": 0.25}),
                lambda x, y: (x == 0) | (y == 1),
                lambda x, y: np.where(x == 0, 0.0, 0.25)),  # the first listed tag wins
    "two tags": (dict(f=1.0, dirichlet=1.0, dirichlet_on=["left", "bottom"]),
                 lambda x, y: (x == 0) | (y == 0), lambda x, y: 1.0 + 0.0 * x),
}


@pytest.fixture(scope="module")
def square():
    return tagged_square(4)


def stored_data(coarse, data, k):
    """The coefficient and the source of ``data`` per fine cell (plain lookups of the
    coarse cells' regions)."""
    names = coarse.tags.region_names

    def per_cell(v, default):
        if v is None:
            return np.full(coarse.n_triangles, default)
        if isinstance(v, dict):
            out = np.zeros(coarse.n_triangles)
            for name, value in v.items():
                out[coarse.tags.regions == names[name]] = value
            return out
        return np.full(coarse.n_triangles, float(v))

    return (fine_coefficient(per_cell(data.get("coefficient"), 1.0), k),
            fine_coefficient(per_cell(data.get("f"), 0.0), k))


def stored_check(coarse, case, k):
    """For ``CASES[case]`` on ``coarse`` refined ``k`` times, with the held points and values
    found by plain geometry and the stored system from the stored assembly:
    ``(held, g, free, residual, ||b||, 1 / lambda_min)``, ``residual(u)`` the norm of
    ``b - A u`` on the free points.

    CG's contract is ``||r|| <= rtol ||b||`` there, and then
    ``||u - u_exact|| <= ||r|| / lambda_min`` on the free points (common practice, no
    source)."""
    data, is_held, value = CASES[case]
    fine = refined(coarse, k)
    held = np.flatnonzero(is_held(*fine.points.T))
    g = value(*fine.points[held].T)
    kappa, f = stored_data(coarse, data, k)
    A, b, free = reduced_system(fine, kappa, f, held, g)

    def residual(u):
        return np.linalg.norm(b - A @ u[free])

    return held, g, free, residual, np.linalg.norm(b), 1.0 / smallest_eigenvalue(A)


@pytest.mark.parametrize("k", [2, 3])
@pytest.mark.parametrize("case", list(CASES))
def test_solve_agrees_with_the_stored_solve(square, case, k):
    data = CASES[case][0]
    sol = solve_on_patches(square, refine=k, rtol=RTOL, **data)
    # reference: the stored refinement and the stored gmg (an independent implementation)
    ref = hk.solve_poisson(square, refine=k, preconditioner="gmg", rtol=RTOL, **data)
    assert isinstance(ref, hk.PoissonSolution)  # the stored path, not the patch path again
    assert sol.converged and ref.stats.converged
    fine = ref.mesh
    assert np.array_equal(sol.mesh.points, fine.points)
    assert np.array_equal(sol.mesh.triangles, fine.triangles)
    held, g, free, residual, b_norm, inverse = stored_check(square, case, k)
    assert sol.stats.unknowns == fine.n_points and sol.stats.dirichlet_points == held.size
    assert np.array_equal(sol.u[held], g)  # held values set, not solved for
    r_sol = residual(sol.u)
    assert r_sol <= 1.01 * RTOL * b_norm
    bound = (r_sol + residual(ref.u)) * inverse
    assert np.linalg.norm(sol.u[free] - ref.u[free]) <= 1.01 * bound
    assert bound <= 1e-6 * np.linalg.norm(ref.u)  # the bound itself is small
    # the stored path solves its identity rows with CG too: held values to its tolerance
    assert np.abs(ref.u[held] - g).max() <= 1e-8 * max(1.0, np.abs(g).max())


def test_zero_source_keeps_the_held_value_everywhere():
    # f = 0 with u = g on the whole boundary: u == g (common practice, no source); CG
    # from zero reaches the inside to its tolerance, so the check is at that tolerance
    coarse, k, g = rectangle(3, 3), 3, 0.75
    sol = solve_on_patches(coarse, 0.0, refine=k, dirichlet=g, rtol=RTOL)
    fine = sol.mesh
    held = fine.boundary_points()
    assert np.array_equal(sol.u[held], np.full(held.size, g))
    A, b, free = reduced_system(fine, None, 0.0, held, g)
    r = np.linalg.norm(b - A @ sol.u[free])
    assert r <= 1.01 * RTOL * np.linalg.norm(b)
    assert np.linalg.norm(sol.u - g) <= 1.01 * r / smallest_eigenvalue(A)
    assert np.abs(sol.u - g).max() <= 1e-8 * g


def membrane(x, y, terms=1001):
    """``-lap u = 1`` on the unit square, ``u = 0`` on its boundary: the double sine series
    ``16 / pi^4 sum_{m, n odd} sin(m pi x) sin(n pi y) / (m n (m^2 + n^2))`` (S. Timoshenko
    and J. N. Goodier, Theory of Elasticity, 1951); ``terms`` odd m and n each, the tail
    below 1e-10 at the points used here."""
    m = 2.0 * np.arange(terms) + 1.0
    w = 1.0 / (m[:, None] * m[None, :] * (m[:, None] ** 2 + m[None, :] ** 2))
    out = np.empty(len(x))
    for q, (a, b) in enumerate(zip(x, y, strict=True)):
        out[q] = np.sin(m * np.pi * a) @ w @ np.sin(m * np.pi * b)
    return 16.0 / np.pi**4 * out


def test_solve_converges_to_the_membrane_series_at_second_order():
    centre = membrane(np.array([0.5]), np.array([0.5]))[0]
    assert abs(centre - 0.0736713533) <= 1e-9  # value from memory
    coarse = rectangle(4, 4)
    errors = []
    for k in (2, 3, 4):
        sol = solve_on_patches(coarse, 1.0, refine=k, rtol=1e-12)
        p = sol.mesh.points
        lattice = np.flatnonzero((np.abs(4 * p - np.round(4 * p)) <= 1e-12).all(axis=1))
        assert lattice.size == coarse.n_points
        errors.append(np.abs(sol.u[lattice] - membrane(*p[lattice].T)).max())
    order = np.log2(np.array(errors[:-1]) / np.array(errors[1:]))
    assert errors[-1] <= 2e-5
    assert ((order > 1.9) & (order < 2.1)).all(), (errors, order)


def test_nested_start_alone_equals_the_stored_one(square):
    # full multigrid alone (rtol=None) is one linear map of the load: the same as the stored
    # one to round-off; reference: the stored solve with gmg
    k = 3
    data = dict(f={"hot": 2.0, "cold": 0.5}, coefficient={"cold": 1.0, "hot": 20.0})
    sol = solve_on_patches(square, refine=k, rtol=None, **data)
    ref = hk.solve_poisson(square, refine=k, preconditioner="gmg", rtol=None, **data)
    assert sol.stats.iterations == ref.stats.iterations == 0
    assert relative_error(sol.u, ref.u) <= IDENTITY
    started = solve_on_patches(square, refine=k, rtol=RTOL, start="nested", **data)
    zero = solve_on_patches(square, refine=k, rtol=RTOL, **data)
    assert started.converged and started.stats.iterations < zero.stats.iterations
    with pytest.raises(InputError, match="rtol=None"):
        solve_on_patches(square, refine=k, rtol=None, dirichlet=1.0)


def test_solution_patches_sit_at_the_points_of_the_refined_mesh(square):
    k = 2
    sol = solve_on_patches(square, refine=k, rtol=RTOL, f={"hot": 1.0, "cold": -1.0})
    fine = sol.mesh
    n = 2**k
    for cell in (0, 17, square.n_triangles - 1):
        lam, values = sol.patch(cell)
        where = lam @ square.points[square.triangles[cell]] / n
        nearest = np.argmin(((fine.points[None] - where[:, None]) ** 2).sum(axis=2), axis=1)
        assert np.allclose(fine.points[nearest], where, rtol=0, atol=1e-14)
        assert np.array_equal(values, sol.u[nearest])


# == 4. threads ===========================================================================


@pytest.fixture(scope="module")
def big_layout():
    """rectangle(8, 8) refined 4 times (16,641 points): every thread gets real work."""
    coarse = rectangle(8, 8)
    return PatchLayout(coarse, 4, held_sides=coarse.boundary_edges())


@pytest.mark.two_threads
def test_operator_and_multigrid_same_bits_on_one_and_two_threads(big_layout):
    lay = big_layout
    kappa = np.linspace(1.0, 4.0, lay.n_cells)
    x = np.random.default_rng(5).standard_normal(lay.size(4))

    def compute():
        K = element_stiffness(lay.coarse, kappa)
        M = PatchMultigrid(lay, kappa)
        full = np.empty_like(x)
        M.full_cycle_into(x, full)
        return [PatchOperator(lay, K) @ x, PatchOperator(lay, K, masked=False) @ x,
                PatchOperator(lay, K, 2) @ x[:lay.size(2)], M @ x, full]

    one, two = on_one_and_two_threads(compute)
    assert np.isfinite(one[3]).all() and np.abs(one[3]).max() > 0
    assert_same_bits(one, two)


@pytest.mark.two_threads
def test_whole_solve_same_bits_on_one_and_two_threads():
    coarse = tagged_square(8)
    data = dict(f={"hot": 2.0, "cold": 0.5}, coefficient={"cold": 1.0, "hot": 20.0},
                dirichlet={"left": 0.0, "top": 0.25})

    def compute():
        sol = solve_on_patches(coarse, refine=4, rtol=1e-10, **data)
        assert sol.converged
        return [sol.values, sol.u, sol.stats.residuals, sol.stats.iterations, sol.stats.threads]

    one, two = on_one_and_two_threads(compute)
    assert one[4] == 1 and two[4] == 2
    assert_same_bits(one[:4], two[:4])


# == 5. what the path refuses =============================================================


def test_reasons_the_patch_path_cannot_take_a_problem(square):
    tets = cuboid(1, 1, 1)
    cases = [
        ("triangle and tetrahedral meshes", object(), 2, {}),
        ("neumann is not a number", tets, 2, {"neumann": lambda x, y, z: x}),
        ("f is not a number", tets, 2, {"f": np.ones(tets.n_points)}),
        ("refine >= 1, got 0", square, 0, {}),
        ("whole number of refinements, got 2.5", square, 2.5, {}),
        ("whole number of refinements, got True", square, True, {}),
        ("reaction", square, 2, {"reaction": 1.0}),
        ("coefficient is not a number", square, 2, {"coefficient": lambda x, y: 1.0 + x}),
        ("coefficient is not a number", square, 2, {"coefficient": np.ones(square.n_triangles)}),
        ("f is not a number", square, 2, {"f": np.ones(square.n_points)}),
    ]
    for want, mesh, k, kw in cases:
        reason = patch_path_reason(mesh, k, **kw)
        assert reason is not None and want in reason, (want, reason)
    assert patch_path_reason(square, 2) is None
    assert patch_path_reason(square, 2, f={"hot": 1.0}, coefficient={"cold": 2.0},
                             dirichlet={"left": 1.0}) is None


def test_refused_problems_raise_input_errors_naming_the_reason(square):
    points, triangles = square.points.copy(), square.triangles.copy()
    kappa = np.ones(square.n_triangles)
    kappa_copy = kappa.copy()
    coefficient = {"cold": 1.0, "hot": 20.0}
    refused = [
        (cuboid(1, 1, 1), dict(refine=2, neumann=lambda x, y, z: x), "neumann is not"),
        (square, dict(refine=0), "refine >= 1"),
        (square, dict(refine=2, coefficient=lambda x, y: 1.0 + x), "coefficient"),
        (square, dict(refine=2, coefficient=kappa), "coefficient"),
        (square, dict(refine=2, f=np.zeros(square.n_points)), "f is not"),
        (square, dict(refine=2, dirichlet=np.zeros(3)), "dirichlet"),
    ]
    for mesh, kw, want in refused:
        with pytest.raises(InputError, match="patch path cannot take") as info:
            solve_on_patches(mesh, **kw)
        assert want in str(info.value) and want in patch_path_reason(
            mesh, kw["refine"], **{k: v for k, v in kw.items() if k != "refine"})
    # accepted data are read, not changed
    solve_on_patches(square, refine=1, coefficient=coefficient)
    assert coefficient == {"cold": 1.0, "hot": 20.0}
    assert np.array_equal(kappa, kappa_copy)
    assert np.array_equal(square.points, points) and np.array_equal(square.triangles, triangles)
    # held sides that are not edges of the coarse mesh
    with pytest.raises(InputError, match="not an edge"):
        PatchLayout(square, 1, held_sides=[[0, square.n_points - 1]])
