"""The ``inherited`` matrix-free variant: on a mesh made by Mesh.refine each fine
triangle's element matrix is its coarsest ancestor's times its own coefficient.

Checked against the assembled stiffness matrix (the ``reference`` strategy's plain
loops, which recompute every triangle's geometry, and the ``csr`` strategy with
scipy's sparse product), against the symmetrically eliminated matrix with Dirichlet
points, and against a manufactured solution solved with geometric multigrid.
"""

import numpy as np
import pytest
from conftest import EPS, jittered_mesh, meshes, refined, two_threads
from hypothesis import given, settings
from hypothesis import strategies as st
from test_operators import close, eliminated, product_close

import hatkernels
from hatkernels import StiffnessOperator, assemble_mass, assemble_stiffness, solve_poisson, threads
from hatkernels.assembly.csr import kernel_coefficient
from hatkernels.coefficients import parse_coefficient
from hatkernels.operators.variants import InheritedProduct, build_variant


def scalar_coefficients(m, seed=0):
    """One scalar coefficient of each kind on the fine mesh ``m`` (all positive)."""
    rng = np.random.default_rng(seed)
    return {
        "none": None,
        "constant": 2.5,
        "per-cell": rng.uniform(0.5, 4.0, m.n_triangles),
        "per-point": rng.uniform(0.5, 4.0, m.n_points),
        "callable": lambda x, y: 1.0 + np.sin(3 * x) * np.cos(2 * y) ** 2,
    }


def check_against_assembled(m, coef, x, block_size=8):
    """The inherited product equals the assembled matrix's (reference and csr strategies)."""
    op = StiffnessOperator(m, coef, block_size=block_size)
    assert op.variant == "inherited"
    assert isinstance(op._impl, InheritedProduct)
    y = op @ x
    # independent plain assembly, every triangle's geometry from its own points
    # (common practice, no source): the reference strategy of assemble_stiffness
    assert product_close(y, assemble_stiffness(m, coef, strategy="reference"), x)
    # scipy's sparse product with the csr-assembled matrix (scipy.sparse, csr_matrix @)
    A = assemble_stiffness(m, coef)
    assert product_close(y, A, x)
    assert product_close(op.serial_matvec(x), A, x)
    return op


# -- 1. the product equals the assembled matrix --


@pytest.mark.parametrize("k", [1, 2, 3])
def test_refined_rectangle_equals_the_assembled_matrix(k):
    m = refined(hatkernels.mesh.rectangle(3, 2), k)
    x = np.random.default_rng(k).standard_normal(m.n_points)
    for name, coef in scalar_coefficients(m, seed=k).items():
        try:
            check_against_assembled(m, coef, x)
        except AssertionError as err:
            raise AssertionError(f"coefficient {name}") from err


def test_irregular_coarse_mesh_refined_twice_equals_the_assembled_matrix():
    # a jittered Delaunay mesh: coarse triangles of all shapes, some obtuse
    m = refined(jittered_mesh(5, 21), 2)
    x = np.random.default_rng(7).standard_normal(m.n_points)
    for name, coef in scalar_coefficients(m, seed=3).items():
        try:
            check_against_assembled(m, coef, x)
        except AssertionError as err:
            raise AssertionError(f"coefficient {name}") from err


def test_scattered_points_refined_twice_equals_the_assembled_matrix():
    # Delaunay of random points in the plane (not a grid at all), lower numbering locality
    p = np.random.default_rng(5).random((30, 2)) * [3.0, 1.0]
    m = refined(hatkernels.mesh.triangulate(p), 2)
    x = np.random.default_rng(8).standard_normal(m.n_points)
    check_against_assembled(m, np.random.default_rng(9).uniform(0.1, 10.0, m.n_triangles), x)


@settings(max_examples=6)
@given(meshes(min_n=2, max_n=4), st.integers(1, 2), st.integers(0, 2**32 - 1))
def test_random_refined_meshes_equal_the_assembled_matrix(coarse, k, seed):
    m = refined(coarse, k)
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(m.n_points)
    check_against_assembled(m, rng.uniform(0.2, 5.0, m.n_triangles), x, block_size=4)
    check_against_assembled(m, None, x, block_size=4)


def test_diagonal_and_bound_equal_the_assembled_ones():
    m = refined(jittered_mesh(4, 6), 2)
    coef = scalar_coefficients(m)["per-cell"]
    A = assemble_stiffness(m, coef, strategy="reference")
    op = StiffnessOperator(m, coef)
    assert op.variant == "inherited"
    assert close(op.diagonal(), A.diagonal())
    # Gershgorin's bound (Gershgorin, 1931) with the element sums bounds the assembled one
    d = A.diagonal()
    assembled = float(((abs(A).sum(axis=1).A1) / d).max())
    assert op.gershgorin_bound() >= assembled * (1 - 16 * EPS)


# -- 2. Dirichlet points: the symmetrically eliminated matrix, and symmetry --


@pytest.mark.parametrize("mesh", ["rectangle", "jittered"])
def test_dirichlet_equals_the_eliminated_matrix_and_is_symmetric(mesh):
    coarse = hatkernels.mesh.rectangle(3, 2) if mesh == "rectangle" else jittered_mesh(4, 17)
    m = refined(coarse, 2)
    rng = np.random.default_rng(11)
    coef = rng.uniform(0.5, 3.0, m.n_triangles)
    # the boundary and a few interior points held
    fixed = np.union1d(m.boundary_points(), rng.choice(m.n_points, 5, replace=False))
    op = StiffnessOperator(m, coef, dirichlet=fixed)
    assert op.variant == "inherited"
    A = assemble_stiffness(m, coef, strategy="reference")
    E = eliminated(A, fixed)
    x, y = rng.standard_normal(m.n_points), rng.standard_normal(m.n_points)
    Ax, Ay = op @ x, op @ y
    assert product_close(Ax, E, x)
    assert product_close(Ay, E, y)
    assert product_close(op.serial_matvec(x), E, x)
    assert close(op.diagonal(), E.diagonal())
    # the plain matrix for lifting boundary values
    assert product_close(op.unmasked_matvec(x), A, x)
    # symmetry: x.A y = y.A x to round-off relative to |x|.|A||y| (Higham, Accuracy and
    # Stability of Numerical Algorithms, 2002, section 3.5)
    scale = np.abs(x) @ (abs(E) @ np.abs(y))
    assert abs(x @ Ay - y @ Ax) <= 64 * EPS * scale
    # the eliminated operator really is not the plain one (the test can fail)
    assert np.linalg.norm(Ax - A @ x) > 1e3 * EPS * np.linalg.norm(abs(A) @ np.abs(x))


def residual_close(r, E, x, b):
    """``r`` is ``b - E x`` to round-off relative to ``|b| + |E| |x|`` (Higham, Accuracy and
    Stability of Numerical Algorithms, 2002, section 3.5)."""
    return np.linalg.norm(r - (b - E @ x)) <= 16 * EPS * np.linalg.norm(np.abs(b) + abs(E) @ np.abs(x))


@pytest.mark.parametrize("held", [False, True])
def test_residual_equals_the_assembled_one(held):
    m = refined(jittered_mesh(4, 19), 2)
    rng = np.random.default_rng(18)
    coef = rng.uniform(0.5, 3.0, m.n_triangles)
    fixed = m.boundary_points() if held else None
    op = StiffnessOperator(m, coef, dirichlet=fixed)
    assert op.variant == "inherited"
    A = assemble_stiffness(m, coef, strategy="reference")
    E = eliminated(A, fixed) if held else A
    x, b = rng.standard_normal(m.n_points), rng.standard_normal(m.n_points)
    keep_x, keep_b = x.copy(), b.copy()
    out = np.full(m.n_points, np.nan)
    assert op.residual_into(x, b, out) is out
    assert residual_close(out, E, x, b)
    assert (x == keep_x).all() and (b == keep_b).all()


# -- 3. plain and parallel products, thread counts --


def test_serial_matvec_agrees_with_the_parallel_product():
    m = refined(jittered_mesh(6, 3), 2)
    rng = np.random.default_rng(12)
    x = rng.standard_normal(m.n_points)
    for coef in scalar_coefficients(m, seed=4).values():
        op = StiffnessOperator(m, coef, block_size=16, dirichlet=m.boundary_points())
        assert op.variant == "inherited"
        assert close(op @ x, op.serial_matvec(x), rtol=16 * EPS)


@two_threads
def test_one_and_two_threads_give_identical_bits():
    m = refined(jittered_mesh(8, 9), 2)
    rng = np.random.default_rng(2)
    x = rng.standard_normal(m.n_points)
    coef = rng.uniform(0.5, 2.0, m.n_triangles)
    b = rng.standard_normal(m.n_points)
    out = []
    for n in (1, 2):
        with threads(n):
            op = StiffnessOperator(m, coef, block_size=16, dirichlet=m.boundary_points())
            assert op.variant == "inherited" and op.n_colours > 1
            r = op.residual_into(x, b, np.empty(m.n_points))
            out.append((op @ x).tobytes() + op.unmasked_matvec(x).tobytes() + r.tobytes())
    assert out[0] == out[1]


# -- 4. which variant is taken, and refusals --


def test_default_variant_selection():
    rect = hatkernels.mesh.rectangle(3, 3)
    fine = refined(rect, 2)
    assert StiffnessOperator(fine).variant == "inherited"
    for coef in scalar_coefficients(fine).values():
        assert StiffnessOperator(fine, coef).variant == "inherited"
    assert StiffnessOperator(rect).variant == "geometry"
    assert StiffnessOperator(fine, np.diag([2.0, 1.0])).variant == "geometry"
    # a reordered mesh drops its refinement history, so its triangles are not 4t..4t+3
    assert StiffnessOperator(fine.reorder("hilbert")[0]).variant == "geometry"
    tets = hatkernels.mesh.cuboid(2).refine()
    assert StiffnessOperator(tets).variant == "edges"


def test_naming_inherited_where_it_does_not_apply_says_why():
    rect = hatkernels.mesh.rectangle(3, 3)
    fine = rect.refine()
    with pytest.raises(hatkernels.InputError, match="Mesh.refine"):
        StiffnessOperator(rect, variant="inherited")
    with pytest.raises(hatkernels.InputError, match="tensor"):
        StiffnessOperator(fine, np.diag([2.0, 1.0]), variant="inherited")
    per_cell_tensor = np.tile(np.eye(2), (fine.n_triangles, 1, 1))
    with pytest.raises(hatkernels.InputError, match="tensor"):
        StiffnessOperator(fine, per_cell_tensor, variant="inherited")
    # the kernels' entry point gives the same reason
    kc = kernel_coefficient(parse_coefficient(None, rect, name="c", tensor=True), rect, 2)
    with pytest.raises(hatkernels.InputError, match="Mesh.refine"):
        build_variant("inherited", rect, kc, 8)
    # and a solve naming it on an unrefined mesh fails the same way
    with pytest.raises(hatkernels.InputError, match="Mesh.refine"):
        solve_poisson(rect, 1.0, preconditioner="jacobi", matrix_free=True, variant="inherited")


def test_naming_inherited_on_tetrahedra_says_why():
    tets = hatkernels.mesh.cuboid(2).refine()
    with pytest.raises(hatkernels.InputError, match="tetrahedr"):
        StiffnessOperator(tets, variant="inherited")


def test_more_than_64_colours_falls_back_with_a_warning_and_the_right_product():
    from test_operators import fan

    m = fan().refine()  # the centre point is in 70 fine triangles of 70 families
    with pytest.warns(RuntimeWarning, match="more than 64 colours"):
        op = StiffnessOperator(m, block_size=4)  # one family of four per block
    x = np.random.default_rng(15).standard_normal(m.n_points)
    A = assemble_stiffness(m, strategy="reference")
    assert product_close(op @ x, A, x)
    b = np.random.default_rng(16).standard_normal(m.n_points)
    r = op.residual_into(x, b, np.empty(m.n_points))
    assert np.linalg.norm(r - (b - A @ x)) <= 16 * EPS * np.linalg.norm(np.abs(b) + abs(A) @ np.abs(x))


def test_block_size_must_hold_whole_families():
    # the product takes a triangle's four children together
    m = hatkernels.mesh.rectangle(3, 2).refine()
    assert StiffnessOperator(m, block_size=6).variant == "geometry"
    with pytest.raises(hatkernels.InputError, match="multiple of 4"):
        StiffnessOperator(m, variant="inherited", block_size=6)
    op = StiffnessOperator(m, variant="inherited", block_size=12)
    x = np.random.default_rng(17).standard_normal(m.n_points)
    assert product_close(op @ x, assemble_stiffness(m, strategy="reference"), x)


# -- 5. storage --


def test_stores_the_coarsest_mesh_entries_only():
    coarse = hatkernels.mesh.rectangle(4, 4)
    m = refined(coarse, 4)
    inherited = StiffnessOperator(m)
    factors = StiffnessOperator(m, variant="factors")
    assert inherited.variant == "inherited"
    assert factors.nbytes >= 24 * m.n_triangles  # three float64 entries per fine triangle
    # three float64 per coarsest triangle, a colouring and a constant: far below 24 per triangle
    assert inherited.nbytes < 2 * m.n_triangles
    assert inherited.nbytes < factors.nbytes / 10
    assert inherited._impl.base.shape == (coarse.n_triangles, 3)


# -- 6. multigrid on the inherited operator --


def exact(x, y):
    return np.sin(np.pi * x) * np.sin(np.pi * y)


def source(x, y):
    return 2 * np.pi**2 * exact(x, y)


def test_multigrid_solves_a_manufactured_solution_at_second_order():
    # -lap u = f, u = sin(pi x) sin(pi y) on the unit square, zero on its boundary;
    # P1 errors fall as h^2 in L2 (manufactured solution: common practice, no source)
    m = refined(jittered_mesh(3, 5), 1)
    errors, iterations = [], []
    for _ in range(3):
        m = m.refine()
        per_variant = {}
        for variant in ("inherited", "geometry"):
            sol = solve_poisson(m, source, preconditioner="gmg", variant=variant)
            assert sol.converged
            assert f"{variant} matrix-free operators" in sol.stats.preconditioner
            per_variant[variant] = sol
        inh, geo = per_variant["inherited"], per_variant["geometry"]
        assert abs(inh.stats.iterations - geo.stats.iterations) <= 1
        # one operator, computed two ways: the solutions agree to the solver's tolerance
        assert close(inh.u, geo.u, rtol=1e-8)
        e = inh.u - exact(*m.points.T)
        errors.append((np.sqrt(e @ (assemble_mass(m) @ e)), np.abs(e).max()))
        iterations.append(inh.stats.iterations)
    errors = np.array(errors)
    rates = np.log2(errors[:-1] / errors[1:])
    # L2: order 2; max norm: order 2 up to a log(1/h) factor on irregular meshes
    # (R. Scott, Optimal L-infinity estimates for the finite element method on
    # irregular meshes, Math. Comp. 1976; value from memory), measured 1.74 to 1.79 here
    assert ((rates[:, 0] > 1.85) & (rates[:, 0] < 2.2)).all(), rates
    assert ((rates[:, 1] > 1.6) & (rates[:, 1] < 2.3)).all(), rates
    # multigrid: iteration counts do not grow with the refinement
    assert max(iterations) <= min(iterations) + 2, iterations


def test_multigrid_preconditioner_on_the_inherited_operator():
    m = refined(jittered_mesh(3, 8), 3)
    fixed = m.boundary_points()
    A = StiffnessOperator(m, dirichlet=fixed)
    assert A.variant == "inherited"
    gmg = hatkernels.precond.gmg.GeometricMultigrid(A)
    assert all(lv.op.variant == "inherited" for lv in gmg.levels)
    rng = np.random.default_rng(13)
    b = rng.standard_normal(m.n_points)
    b[fixed] = 0.0
    res = hatkernels.solve(A, b, preconditioner=gmg, rtol=1e-10)
    assert res.stats.converged
    # the solution of the eliminated assembled system (scipy.sparse.linalg.spsolve)
    import scipy.sparse.linalg as spla

    E = eliminated(assemble_stiffness(m, strategy="reference"), fixed).tocsc()
    assert close(res.x, spla.spsolve(E, b), rtol=1e-8)


# -- 7. inputs are not modified --


def test_inputs_are_not_modified():
    m = refined(jittered_mesh(4, 4), 2)
    points, cells = m.points, m.triangles
    p, t = points.copy(), cells.copy()
    rng = np.random.default_rng(14)
    per_cell = rng.uniform(0.5, 2.0, m.n_triangles)
    per_point = rng.uniform(0.5, 2.0, m.n_points)
    keep_cell, keep_point = per_cell.copy(), per_point.copy()
    fixed = m.boundary_points().astype(np.int64)
    keep_fixed = fixed.copy()
    x = rng.standard_normal(m.n_points)
    keep_x = x.copy()
    for coef in (per_cell, per_point):
        op = StiffnessOperator(m, coef, dirichlet=fixed)
        assert op.variant == "inherited"
        op @ x
        op.serial_matvec(x)
        op.unmasked_matvec(x)
        op.diagonal_and_bound()
        y = np.empty(m.n_points)
        op.matvec_into(x, y)
    assert m.points is points and m.triangles is cells
    assert (points == p).all() and (cells == t).all()
    assert (per_cell == keep_cell).all() and (per_point == keep_point).all()
    assert (fixed == keep_fixed).all() and (x == keep_x).all()
    for lv in m.levels():
        assert lv.points.flags.writeable is False and lv.triangles.flags.writeable is False
