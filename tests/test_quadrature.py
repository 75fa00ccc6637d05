"""Quadrature rules: exact for every polynomial of their degree, and no more."""

from math import factorial

import numpy as np
import pytest
from conftest import jittered_mesh

import hatkernels
from hatkernels.quadrature import edge_rule, triangle_rule


def barycentric_integral(p, q, r):
    """int_T l1^p l2^q l3^r dA / |T| = 2 p! q! r! / (p + q + r + 2)!

    (M. A. Eisenberg and L. E. Malvern, On finite element integration in
    natural co-ordinates, Int. J. Numer. Meth. Eng. 7, 1973.)
    """
    return 2.0 * factorial(p) * factorial(q) * factorial(r) / factorial(p + q + r + 2)


def monomials(degree):
    return [
        (p, q, d - p - q)
        for d in range(degree + 1)
        for p in range(d + 1)
        for q in range(d - p + 1)
    ]


@pytest.mark.parametrize("degree", [1, 2, 3, 4, 5])
def test_triangle_rule_is_exact_to_its_degree(degree):
    lam, w = triangle_rule(degree)
    for p, q, r in monomials(degree):
        approx = w @ (lam[:, 0] ** p * lam[:, 1] ** q * lam[:, 2] ** r)
        assert approx == pytest.approx(barycentric_integral(p, q, r), rel=1e-14, abs=0)


@pytest.mark.parametrize("degree, points", [(1, 1), (2, 3), (5, 7)])
def test_triangle_rule_degree_is_not_overstated(degree, points):
    lam, w = triangle_rule(degree)
    assert len(w) == points
    errors = [
        abs(w @ (lam[:, 0] ** p * lam[:, 1] ** q * lam[:, 2] ** r) - barycentric_integral(p, q, r))
        for p, q, r in monomials(degree + 1)
        if p + q + r == degree + 1
    ]
    assert max(errors) > 1e-6


@pytest.mark.parametrize("degree", range(1, 12))
def test_edge_rule_is_exact_to_its_degree(degree):
    # int_0^1 s^k ds = 1 / (k + 1)
    lam, w = edge_rule(degree)
    for k in range(degree + 1):
        assert w @ lam[:, 1] ** k == pytest.approx(1 / (k + 1), rel=1e-14, abs=0)


def test_bad_degrees():
    for bad in (0, 6, 2.0, True):
        with pytest.raises(hatkernels.InputError, match="quadrature degree"):
            triangle_rule(bad)
    assert not triangle_rule(2)[0].flags.writeable


# -- the kernels that use the rules: quadrature points and weighted sums ----------------


@pytest.mark.parametrize("degree", [1, 2, 5])
def test_quadrature_kernels_agree_with_the_plain_numpy_forms(degree):
    # plain versions (common practice, no source): the points as points[triangles] @ lam.T
    # and the weighted sums as areas * ((values * w) @ table), both in numpy
    from hatkernels._jit import assembly as J
    from hatkernels.coefficients import quadrature_points

    mesh = jittered_mesh(30, degree)
    lam, w = triangle_rule(degree)
    tri, p = mesh.triangles, mesh.points
    x, y = quadrature_points(mesh, degree, 7, mesh.n_triangles - 5)
    part = tri[7:mesh.n_triangles - 5]
    assert np.abs(x - p[part, 0] @ lam.T).max() <= 4e-16
    assert np.abs(y - p[part, 1] @ lam.T).max() <= 4e-16
    values = np.random.default_rng(degree).standard_normal((mesh.n_triangles, len(w)))
    areas = mesh.areas()
    out = np.empty((mesh.n_triangles, 3))
    J.weighted_sums(areas, values, w, lam, out)
    plain = areas[:, None] * ((values * w) @ lam)
    assert np.abs(out - plain).max() <= 1e-15 * np.abs(plain).max()
    # the load of a callable: its integral against each hat function sums to the integral
    # of f over the unit square (f = x + y: 1/2 + 1/2 = 1, analytic; exact for any rule of
    # degree >= 1)
    b = hatkernels.assemble_load(mesh, lambda x, y: x + y, quadrature=degree)
    assert abs(b.sum() - 1.0) <= 1e-13


@pytest.mark.two_threads
def test_quadrature_kernels_give_the_same_bits_on_one_and_two_threads():
    from test_threads import assert_same_bits, on_one_and_two_threads

    mesh = jittered_mesh(40, 3)
    f = lambda x, y: np.sin(3 * x) * y  # noqa: E731

    def compute():
        return [hatkernels.assemble_load(mesh, f, quadrature=5),
                hatkernels.assemble_mass(mesh, f).data]

    assert_same_bits(*on_one_and_two_threads(compute))


@pytest.mark.parametrize("degree", [1, 2, 3])
def test_tetrahedron_quadrature_points_agree_with_the_plain_einsum(degree):
    # plain version (common practice, no source): np.einsum over the cells' corners
    from hatkernels._jit import assembly3d as J3
    from hatkernels.quadrature import tetrahedron_rule

    mesh = hatkernels.mesh.ball(4)
    lam, w = tetrahedron_rule(degree)
    xq = np.empty((3, mesh.n_cells - 9, len(w)))
    J3.quadrature_coordinates(mesh.points, mesh.cells, lam, 4, xq)
    plain = np.einsum("qa,mai->imq", lam, mesh.points[mesh.cells[4:mesh.n_cells - 5]])
    assert np.abs(xq - plain).max() <= 4e-16
    # the load of x + y + z on the unit cube sums to its integral, 3/2 (analytic)
    cube = hatkernels.mesh.cuboid(3, 4, 5)
    b = hatkernels.assemble_load(cube, lambda x, y, z: x + y + z, quadrature=degree)
    assert abs(b.sum() - 1.5) <= 1e-13
    # the element masses of a callable against the plain einsum over the rule, and the
    # whole mass matrix of c = 1 + x summing to its integral, 3/2 (analytic)
    from hatkernels.assembly.elements import _tetrahedron_quadrature, tetrahedron_mass_values
    from hatkernels.coefficients import parse_coefficient

    coef = parse_coefficient(lambda x, y, z: 1.0 + x, cube, name="c", sign="positive")
    masses = tetrahedron_mass_values(cube.points, cube.cells, cube.volumes(), coef, degree)
    lam3, w3, v = _tetrahedron_quadrature(cube.points, cube.cells, coef, degree)
    plain = np.einsum("mq,qa,qb->mab", v * w3, lam3, lam3) * cube.volumes()[:, None, None]
    assert np.abs(masses - plain).max() <= 1e-15 * np.abs(plain).max()
    # (the hat functions sum to one, so the entries sum to int (1 + x): exact for any rule)
    total = hatkernels.assemble_mass(cube, lambda x, y, z: 1.0 + x, quadrature=degree).sum()
    assert abs(total - 1.5) <= 1e-13


@pytest.mark.two_threads
def test_tetrahedron_callable_load_gives_the_same_bits_on_one_and_two_threads():
    from test_threads import assert_same_bits, on_one_and_two_threads

    mesh = hatkernels.mesh.cuboid(9, 8, 7)
    f = lambda x, y, z: np.sin(3 * x) * y + z  # noqa: E731
    assert_same_bits(*on_one_and_two_threads(
        lambda: [hatkernels.assemble_load(mesh, f, quadrature=3)]))
