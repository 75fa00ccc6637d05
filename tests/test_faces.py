"""Boundary terms on the triangular faces of tetrahedra: Neumann load, Robin mass, conditions."""

import numpy as np
import pytest
from scipy import integrate

import hatkernels
from hatkernels.assembly.boundary_terms import check_faces
from hatkernels.mesh import cuboid

BOX = (0.0, 2.0, 0.0, 1.0, 0.0, 3.0)  # a x b x c = 2 x 1 x 3
AREA = 2 * (2 * 1 + 2 * 3 + 1 * 3)  # 22


def unit_tetrahedron():
    points = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], dtype=float)
    return hatkernels.Mesh(points, np.array([[0, 1, 2, 3]]))


def faces_where(mesh, axis, value):
    b = mesh.boundary_faces()
    return b[np.all(np.isclose(mesh.points[b, axis], value), axis=1)]


def on_triangle(fn):
    """int over the triangle (0,0), (1,0), (0,1) of fn(x, y), by scipy's dblquad
    (reference library)."""
    return integrate.dblquad(lambda y, x: fn(x, y), 0, 1, 0, lambda x: 1 - x,
                             epsabs=1e-13, epsrel=1e-13)[0]


# the hat functions of the face z = 0 of the unit tetrahedron, points 0, 1, 2
HATS = [lambda x, y: 1 - x - y, lambda x, y: x, lambda x, y: y]


# -- the terms themselves ------------------------------------------------------------------


@pytest.mark.parametrize("n", [1, 3])
def test_boundary_load_of_one_sums_to_the_surface_area(n):
    # surface area of a box a x b x c is 2 (ab + bc + ca) (analytic)
    assert hatkernels.assemble_boundary_load(cuboid(n, n, n), 1.0).sum() == pytest.approx(6.0)
    box = cuboid(n, 2 * n, n, bounds=BOX)
    assert hatkernels.assemble_boundary_load(box, 1.0).sum() == pytest.approx(AREA)


@pytest.mark.parametrize("r", [0.5, 4.0])
def test_boundary_mass_sums_to_r_times_the_area(r):
    # sum_ij int r phi_i phi_j = int r (partition of unity; analytic)
    box = cuboid(2, 3, 2, bounds=BOX)
    R = hatkernels.assemble_boundary_mass(box, r)
    assert R.sum() == pytest.approx(r * AREA)
    assert abs(R - R.T).max() == 0
    per_face = hatkernels.per_edge(np.full(len(box.boundary_faces()), r))
    assert hatkernels.assemble_boundary_mass(box, per_face).sum() == pytest.approx(r * AREA)


def test_a_single_face_against_the_closed_forms():
    # face z = 0 of the unit tetrahedron: area 1/2; load A g / 3, mass A r (1 + d_ij) / 12
    # (Eisenberg and Malvern, On finite element integration in natural co-ordinates, 1973)
    mesh = unit_tetrahedron()
    face = np.array([[0, 2, 1]])
    b = hatkernels.assemble_boundary_load(mesh, 3.0, face)
    assert np.allclose(b, [0.5, 0.5, 0.5, 0.0], rtol=1e-15, atol=0)
    R = hatkernels.assemble_boundary_mass(mesh, 2.0, face).toarray()
    want = np.zeros((4, 4))
    want[:3, :3] = 0.5 * 2.0 * (1 + np.eye(3)) / 12
    assert np.allclose(R, want, rtol=1e-15, atol=0)
    # the slanted face x + y + z = 1 has area sqrt(3) / 2 (analytic)
    slanted = hatkernels.assemble_boundary_load(mesh, 1.0, [[1, 2, 3]])
    assert np.allclose(slanted[1:], np.sqrt(3) / 6, rtol=1e-14, atol=0) and slanted[0] == 0


def test_per_point_data_match_the_integrals_of_their_linear_interpolant():
    # data linear on the face z = 0 (values 1, 2, 3 at points 0, 1, 2); integrals by
    # scipy's dblquad (reference library)
    mesh = unit_tetrahedron()
    values = np.array([1.0, 2.0, 3.0, 7.0])
    r = lambda x, y: 1 + x + 2 * y  # noqa: E731 - the interpolant of values on the face
    face = [[0, 1, 2]]
    b = hatkernels.assemble_boundary_load(mesh, hatkernels.per_point(values), face)
    R = hatkernels.assemble_boundary_mass(mesh, hatkernels.per_point(values), face).toarray()
    for i in range(3):
        assert b[i] == pytest.approx(on_triangle(lambda x, y, i=i: r(x, y) * HATS[i](x, y)),
                                     rel=1e-12)
        for j in range(3):
            assert R[i, j] == pytest.approx(
                on_triangle(lambda x, y, i=i, j=j: r(x, y) * HATS[i](x, y) * HATS[j](x, y)),
                rel=1e-12)
    assert b[3] == 0 and not R[3].any()


def test_callables_are_integrated_by_the_triangle_rule():
    # degree 3 data: the degree-5 rule is exact for g phi_i and r phi_i phi_j; smooth data
    # converge to dblquad's value (scipy, reference library)
    mesh = unit_tetrahedron()
    face = [[0, 1, 2]]
    g = lambda x, y, z: 1 + x * y + x**3 + 0 * z  # noqa: E731
    b = hatkernels.assemble_boundary_load(mesh, g, face, quadrature=5)
    R = hatkernels.assemble_boundary_mass(mesh, g, face, quadrature=5).toarray()
    for i in range(3):
        assert b[i] == pytest.approx(on_triangle(lambda x, y, i=i: g(x, y, 0) * HATS[i](x, y)),
                                     rel=1e-12)
        for j in range(3):
            assert R[i, j] == pytest.approx(
                on_triangle(lambda x, y, i=i, j=j: g(x, y, 0) * HATS[i](x, y) * HATS[j](x, y)),
                rel=1e-12)
    smooth = lambda x, y, z: np.exp(x) * np.cos(y) + z  # noqa: E731
    b = hatkernels.assemble_boundary_load(mesh, smooth, face, quadrature=5)
    assert b[0] == pytest.approx(on_triangle(lambda x, y: smooth(x, y, 0) * HATS[0](x, y)),
                                 rel=1e-4)


def test_conservation_the_flux_load_sums_to_the_integral_of_h():
    # constant h: h times the area; h = x + y + z over the box a x b x c:
    # 3abc + a^2 (b + c) + b^2 (a + c) + c^2 (a + b) (analytic)
    box = cuboid(2, 2, 3, bounds=BOX)
    assert hatkernels.assemble_boundary_load(box, 2.5).sum() == pytest.approx(2.5 * AREA)
    a, b, c = 2.0, 1.0, 3.0
    want = 3 * a * b * c + a * a * (b + c) + b * b * (a + c) + c * c * (a + b)
    h = lambda x, y, z: x + y + z  # noqa: E731
    assert hatkernels.assemble_boundary_load(box, h).sum() == pytest.approx(want, rel=1e-13)
    per_point = hatkernels.per_point(h(*box.points.T))
    assert hatkernels.assemble_boundary_load(box, per_point).sum() == pytest.approx(want,
                                                                                  rel=1e-13)
    # per face: the flux of each face times its area by Heron's formula (analytic)
    faces = box.boundary_faces()
    sides = np.linalg.norm(box.points[np.roll(faces, -1, axis=1)] - box.points[faces], axis=2)
    s = sides.sum(axis=1) / 2
    heron = np.sqrt(s * (s - sides[:, 0]) * (s - sides[:, 1]) * (s - sides[:, 2]))
    hf = np.arange(len(faces), dtype=float)
    got = hatkernels.assemble_boundary_load(box, hatkernels.per_edge(hf)).sum()
    assert got == pytest.approx((hf * heron).sum(), rel=1e-13)


# -- through solve_poisson -----------------------------------------------------------------


def linear(x, y, z):
    return 1 + 2 * x + 0 * y + 0 * z


KAPPA = 3.0


def test_patch_test_dirichlet_and_neumann_reproduce_a_linear_solution():
    # u = 1 + 2x, -div(kappa grad u) = 0: Dirichlet on x = 0, kappa du/dn = 2 kappa on x = 1,
    # zero flux elsewhere; P1 reproduces linear u exactly (patch test, common practice)
    mesh = cuboid(3, 3, 3)
    exact = linear(*mesh.points.T)
    held = faces_where(mesh, 0, 0.0)
    right = faces_where(mesh, 0, 1.0)
    named = hatkernels.solve_poisson(mesh, 0.0, coefficient=KAPPA, dirichlet=linear,
                                     dirichlet_on=held, neumann=(right, 2 * KAPPA), rtol=1e-13)
    assert np.abs(named.u - exact).max() < 1e-10
    # the plain form: h on every face not held (zero except on x = 1), given per face
    free = hatkernels.conditions.free_sides(mesh, np.unique(held))
    h = np.where(np.isclose(mesh.points[free, 0], 1.0).all(axis=1), 2 * KAPPA, 0.0)
    plain = hatkernels.solve_poisson(mesh, 0.0, coefficient=KAPPA, dirichlet=linear,
                                     dirichlet_on=held, neumann=hatkernels.per_edge(h),
                                     rtol=1e-13)
    assert np.abs(plain.u - exact).max() < 1e-10


def test_robin_reproduces_a_linear_solution():
    # kappa du/dn + r u = s with s from u = 1 + 2x on every face, no Dirichlet point (the
    # Robin term fixes the constant): P1 reproduces u (patch test, common practice)
    mesh = cuboid(3, 3, 3)
    r = 0.7

    def s(x, y, z):  # quadrature points lie inside the faces, so x tells the face
        dudn = np.where(np.isclose(x, 1.0), 2.0, np.where(np.isclose(x, 0.0), -2.0, 0.0))
        return KAPPA * dudn + r * linear(x, y, z)

    sol = hatkernels.solve_poisson(mesh, 0.0, coefficient=KAPPA, robin=(r, s), rtol=1e-13)
    assert np.abs(sol.u - linear(*mesh.points.T)).max() < 1e-10
    # named faces, r per face: Robin on x = 1 only, Dirichlet on x = 0, zero flux elsewhere
    right = faces_where(mesh, 0, 1.0)
    rf = hatkernels.per_edge(np.linspace(0.5, 2.0, len(right)))
    s_right = hatkernels.per_edge(KAPPA * 2 + rf.values * 3.0)  # u = 3 on x = 1
    sol = hatkernels.solve_poisson(mesh, 0.0, coefficient=KAPPA, dirichlet=linear,
                                   dirichlet_on=faces_where(mesh, 0, 0.0),
                                   robin=(right, rf, s_right), rtol=1e-13)
    assert np.abs(sol.u - linear(*mesh.points.T)).max() < 1e-10


def test_robin_with_r_zero_does_not_fix_the_constant():
    mesh = cuboid(2, 2, 2)
    with pytest.raises(hatkernels.InputError, match="no Dirichlet points, reaction or Robin"):
        hatkernels.solve_poisson(mesh, 0.0, robin=(0.0, 0.0))
    right = faces_where(mesh, 0, 1.0)
    with pytest.raises(hatkernels.InputError, match="no Dirichlet points, reaction or Robin"):
        hatkernels.solve_poisson(mesh, 0.0, robin=(right, hatkernels.per_edge(np.zeros(8)), 1.0))


def test_robin_on_one_face_alone_fixes_the_constant():
    # r > 0 only at the points of x = 1 (per point) or on its faces (per face), zero flux
    # elsewhere: u = s / r = 2 everywhere (analytic: the constant solves the problem)
    mesh = cuboid(2, 2, 2)
    right = faces_where(mesh, 0, 1.0)
    r_points = np.where(np.isclose(mesh.points[:, 0], 1.0), 1.5, 0.0)
    for r in (hatkernels.per_point(r_points), hatkernels.per_edge(np.full(len(right), 1.5))):
        sol = hatkernels.solve_poisson(mesh, 0.0, robin=(right, r, 3.0), rtol=1e-13)
        assert np.abs(sol.u - 2.0).max() < 1e-10


def test_neumann_on_part_of_the_boundary_converges_at_second_order():
    # u = exp(x) sin(pi y) sin(pi z), -lap u = (2 pi^2 - 1) u; Dirichlet on every face but
    # x = 1, du/dn = u there (analytic manufactured solution; common practice, no source)
    def exact(x, y, z):
        return np.exp(x) * np.sin(np.pi * y) * np.sin(np.pi * z)

    errors = []
    for n in (4, 8, 16):
        mesh = cuboid(n, n, n)
        held = mesh.boundary_faces()[~np.isclose(mesh.points[mesh.boundary_faces(), 0],
                                                 1.0).all(axis=1)]
        sol = hatkernels.solve_poisson(
            mesh, lambda x, y, z: (2 * np.pi**2 - 1) * exact(x, y, z), dirichlet=exact,
            dirichlet_on=held, neumann=exact, quadrature=5)
        assert sol.converged
        errors.append(np.abs(sol.u - exact(*mesh.points.T)).max())
    rates = np.log2(np.array(errors[:-1]) / errors[1:])
    assert (rates > 1.7).all(), errors


def test_pure_neumann_with_zero_mean_converges():
    # u = cos(pi x) cos(pi y) cos(pi z), -lap u = 3 pi^2 u, du/dn = 0 on the cube's faces,
    # mean 0 (analytic manufactured solution; common practice, no source)
    def exact(x, y, z):
        return np.cos(np.pi * x) * np.cos(np.pi * y) * np.cos(np.pi * z)

    errors = []
    for n in (4, 8, 16):
        mesh = cuboid(n, n, n)
        sol = hatkernels.solve_poisson(mesh, lambda x, y, z: 3 * np.pi**2 * exact(x, y, z),
                                       neumann=0.0, zero_mean=True, quadrature=5)
        assert sol.converged
        w = hatkernels.assemble_load(mesh, 1.0)
        d = sol.u - exact(*mesh.points.T)
        d -= (w @ d) / w.sum()  # the exact mean is 0; compare up to the discrete mean
        errors.append(np.sqrt(d @ (hatkernels.assemble_mass(mesh, 1.0) @ d)))
    # L2 norm of the nodal error; the rates (about 1.7 then 1.9) approach 2 from below,
    # so the first pair is pre-asymptotic
    rates = np.log2(np.array(errors[:-1]) / errors[1:])
    assert rates[0] > 1.5 and rates[1] > 1.8, errors


def test_pure_neumann_with_unbalanced_data_is_refused():
    with pytest.raises(hatkernels.InputError, match="do not balance"):
        hatkernels.solve_poisson(cuboid(2, 2, 2), 1.0, neumann=0.0, zero_mean=True)


# -- bad input -----------------------------------------------------------------------------


def test_bad_faces_are_named():
    mesh = cuboid(2, 2, 2)
    good = mesh.boundary_faces()[0].tolist()
    with pytest.raises(hatkernels.InputError, match=r"face 1 \(0, 13, 26\) is not a face"):
        check_faces(mesh, [good, [0, 13, 26]])
    with pytest.raises(hatkernels.InputError, match=r"face 1 refers to a point outside "
                                                    r"0\.\.26: \[0, 1, 99\]"):
        check_faces(mesh, [good, [0, 1, 99]])
    with pytest.raises(hatkernels.InputError, match=r"face 0 .* outside"):
        check_faces(mesh, [[-1, 0, 1]])
    with pytest.raises(hatkernels.InputError, match=r"shape \(n_faces, 3\)"):
        check_faces(mesh, [[0, 1]])
    with pytest.raises(hatkernels.InputError, match=r"integer array .* float64"):
        check_faces(mesh, np.array([good], dtype=float))
    with pytest.raises(hatkernels.InputError, match=r"face 0 \[0, 0, 1\] repeats a point"):
        check_faces(mesh, [[0, 0, 1]])
    with pytest.raises(hatkernels.InputError, match="faces are sides of tetrahedra"):
        check_faces(hatkernels.mesh.rectangle(2, 2), [[0, 1, 2]])
    # a face in any order of its points is accepted, and its order kept; input unchanged
    given = np.array([good[::-1]])
    before = given.copy()
    assert np.array_equal(check_faces(mesh, given), before) and np.array_equal(given, before)
    # through the driver
    with pytest.raises(hatkernels.InputError, match=r"face 0 \(0, 13, 26\) is not a face"):
        hatkernels.solve_poisson(mesh, 1.0, neumann=([[0, 13, 26]], 1.0), dirichlet_on=[0])
    with pytest.raises(hatkernels.InputError, match=r"face 0 \(0, 13, 26\) is not a face"):
        hatkernels.solve_poisson(mesh, 1.0, dirichlet_on=[[0, 13, 26]])
    with pytest.raises(hatkernels.InputError, match=r"face 0 \(0, 13, 26\) is not a face"):
        hatkernels.assemble_boundary_mass(mesh, 1.0, [[0, 13, 26]])


def test_bad_boundary_data_on_faces_say_face():
    mesh = cuboid(2, 2, 2)
    n_faces = len(mesh.boundary_faces())
    with pytest.raises(hatkernels.InputError, match=rf"5 values, but there are 27 points and "
                                                    rf"{n_faces} faces"):
        hatkernels.assemble_boundary_load(mesh, np.ones(5))
    with pytest.raises(hatkernels.InputError, match=r"one per face"):
        hatkernels.assemble_boundary_load(mesh, np.ones((2, 2)))
    with pytest.raises(hatkernels.InputError, match=r"not on tetrahedra"):
        hatkernels.assemble_boundary_load(mesh, hatkernels.per_cell(np.ones(mesh.n_cells)))
    r = np.ones(n_faces)
    r[7] = -1.0
    with pytest.raises(hatkernels.InputError, match=r"face 7"):
        hatkernels.assemble_boundary_mass(mesh, hatkernels.per_edge(r))
    with pytest.raises(hatkernels.InputError, match=r"a quadrature point of face \d+"):
        hatkernels.assemble_boundary_load(mesh, lambda x, y, z: np.where(x > 0.9, np.nan, 1.0))


def test_interior_faces_are_faces_too_and_refined_meshes_need_no_face_list():
    # a refined mesh checks faces on its boundary against the faces carried over from the
    # coarse mesh; an interior face is looked up in the whole face list (common practice)
    from hatkernels.assembly.boundary_terms import check_faces

    mesh = hatkernels.mesh.cuboid(2, 2, 2).refine()
    boundary = mesh.boundary_faces()[:5]
    assert np.array_equal(check_faces(mesh, boundary[:, ::-1]), boundary[:, ::-1])
    assert "faces" not in mesh.cached()  # the boundary sufficed
    inner = mesh.faces()
    is_boundary = {tuple(sorted(f)) for f in mesh.boundary_faces().tolist()}
    inside = np.array([f for f in inner.tolist() if tuple(f) not in is_boundary][:3])
    assert np.array_equal(check_faces(mesh, inside), inside)
    with pytest.raises(hatkernels.InputError, match=r"face 1 .* is not a face of the mesh"):
        check_faces(mesh, np.array([inside[0], [0, 1, mesh.n_points - 1]]))
