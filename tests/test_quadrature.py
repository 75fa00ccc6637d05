"""Quadrature rules: exact for every polynomial of their degree, and no more."""

from math import factorial

import pytest

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
