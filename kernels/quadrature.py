"""Quadrature rules on triangles (barycentric points) and on edges.

Triangle rules, weights normalised to sum to one (multiply by the area):

- degree 1: the centroid rule.
- degree 2: the three interior points (2/3, 1/6, 1/6) with weights 1/3
  (G. Strang and G. Fix, *An Analysis of the Finite Element Method*, 1973,
  table 4.1).
- degree 5: Radon's seven-point rule: the centroid with weight 9/40 and two
  orbits of three points ``(1 - 2a, a, a)`` with ``a = (6 -+ sqrt 15) / 21``
  and weights ``(155 -+ sqrt 15) / 1200`` (J. Radon, *Zur mechanischen
  Kubatur*, Monatshefte fur Mathematik 52, 1948; tabulated in A. H. Stroud,
  *Approximate Calculation of Multiple Integrals*, 1971, rule T2:5-1).

A requested degree is served by the cheapest rule that is exact for it
(3 and 4 use the seven-point rule).  Edge rules are Gauss-Legendre on
[0, 1] (``n`` points exact to degree ``2n - 1``).

Tetrahedron rules, weights normalised to sum to one (multiply by the volume):

- degree 1: the centroid rule.
- degree 2: the four points ``(1 - 3a, a, a, a)`` with ``a = (5 - sqrt 5) / 20``
  and weights 1/4 (P. C. Hammer, O. J. Marlowe and A. H. Stroud, *Numerical
  integration over simplexes and cones*, Math. Tables Aids Comp. 10, 1956;
  Stroud 1971, rule T3:2-1; P. Keast, *Moderate-degree tetrahedral quadrature
  formulas*, Comput. Methods Appl. Mech. Engrg. 55, 1986).
- degree 3: the centroid with weight -4/5 and the four points
  ``(1/2, 1/6, 1/6, 1/6)`` with weights 9/20 (Hammer, Marlowe and Stroud 1956;
  Stroud 1971, rule T3:3-1).  Its negative weight is the price of five
  points; a caller that needs positive weights asks for degree 4.
- degree 5: fifteen points: the centroid with weight 16/135; two orbits of
  four points ``(1 - 3a, a, a, a)`` with ``a = (7 -+ sqrt 15) / 34`` and
  weights ``(2665 +- 14 sqrt 15) / 37800``; one orbit of six points
  ``(b, b, 1/2 - b, 1/2 - b)`` with ``b = (5 - sqrt 15) / 20`` and weights
  10/189 (Stroud 1971, rule T3:5-1; Keast 1986 lists a rule of the same
  shape).  All weights positive, all points inside.

The values are checked, not trusted: tests/test_tetrahedra.py integrates
every monomial up to the degree against the closed form and shows one of the
next degree failing (tests/test_quadrature.py does the same for triangles).  3 is served by
the five-point rule, 4 and 5 by the fifteen-point rule.
"""

import functools

import numpy as np

from hatkernels.checks import integer_option

__all__ = [
    "triangle_rule", "tetrahedron_rule", "edge_rule", "TRIANGLE_DEGREES", "TETRAHEDRON_DEGREES"
]

#: Degrees of the triangle rules; a requested degree gets the cheapest rule exact for it.
TRIANGLE_DEGREES = (1, 2, 5)
#: Degrees of the tetrahedron rules; a requested degree gets the cheapest rule exact for it.
TETRAHEDRON_DEGREES = (1, 2, 3, 5)


@functools.lru_cache(maxsize=None)
def _triangle_rule(degree):
    if degree == 1:
        lam = np.array([[1 / 3, 1 / 3, 1 / 3]])
        w = np.array([1.0])
    elif degree == 2:
        lam = np.array([[2 / 3, 1 / 6, 1 / 6], [1 / 6, 2 / 3, 1 / 6], [1 / 6, 1 / 6, 2 / 3]])
        w = np.full(3, 1 / 3)
    else:
        s = np.sqrt(15.0)
        a1, a2 = (6 - s) / 21, (6 + s) / 21
        w1, w2 = (155 - s) / 1200, (155 + s) / 1200
        lam = np.array(
            [
                [1 / 3, 1 / 3, 1 / 3],
                [1 - 2 * a1, a1, a1],
                [a1, 1 - 2 * a1, a1],
                [a1, a1, 1 - 2 * a1],
                [1 - 2 * a2, a2, a2],
                [a2, 1 - 2 * a2, a2],
                [a2, a2, 1 - 2 * a2],
            ]
        )
        w = np.array([9 / 40, w1, w1, w1, w2, w2, w2])
    lam.setflags(write=False)
    w.setflags(write=False)
    return lam, w


def _degree(degree, limit):
    return integer_option(degree, "quadrature degree", minimum=1, maximum=limit)


def triangle_rule(degree):
    """Barycentric points (Q, 3) and weights (Q,) summing to 1, exact to ``degree``.

    >>> lam, w = triangle_rule(2)
    >>> lam.shape, float(w.sum())
    ((3, 3), 1.0)
    """
    d = _degree(degree, 5)
    return _triangle_rule(next(r for r in TRIANGLE_DEGREES if r >= d))


def _orbit31(a):
    """The four points with one barycentric coordinate ``1 - 3a`` and three ``a``."""
    return [np.roll([1 - 3 * a, a, a, a], k) for k in range(4)]


@functools.lru_cache(maxsize=None)
def _tetrahedron_rule(degree):
    if degree == 1:
        lam, w = np.full((1, 4), 0.25), np.array([1.0])
    elif degree == 2:
        lam, w = np.array(_orbit31((5 - np.sqrt(5.0)) / 20)), np.full(4, 0.25)
    elif degree == 3:
        lam = np.array([[0.25] * 4] + _orbit31(1 / 6))
        w = np.array([-4 / 5] + [9 / 20] * 4)
    else:
        s = np.sqrt(15.0)
        b, h = (5 - s) / 20, 0.5 - (5 - s) / 20
        pairs = [[b, b, h, h], [b, h, b, h], [b, h, h, b], [h, b, b, h], [h, b, h, b], [h, h, b, b]]
        lam = np.array([[0.25] * 4] + _orbit31((7 - s) / 34) + _orbit31((7 + s) / 34) + pairs)
        w1, w2 = (2665 + 14 * s) / 37800, (2665 - 14 * s) / 37800
        w = np.array([16 / 135] + [w1] * 4 + [w2] * 4 + [10 / 189] * 6)
    lam.setflags(write=False)
    w.setflags(write=False)
    return lam, w


def tetrahedron_rule(degree):
    """Barycentric points (Q, 4) and weights (Q,) summing to 1, exact to ``degree``.

    Degrees 1 to 5; see the module's notes for the rules and their sources.

    >>> lam, w = tetrahedron_rule(2)
    >>> lam.shape, float(w.sum())
    ((4, 4), 1.0)
    """
    d = _degree(degree, 5)
    return _tetrahedron_rule(next(r for r in TETRAHEDRON_DEGREES if r >= d))


@functools.lru_cache(maxsize=None)
def _edge_rule(n):
    x, w = np.polynomial.legendre.leggauss(n)
    s = 0.5 * (x + 1)
    out = np.column_stack([1 - s, s]), 0.5 * w
    for a in out:
        a.setflags(write=False)
    return out


def edge_rule(degree):
    """Gauss-Legendre points on an edge as barycentric pairs (Q, 2), weights summing to 1.

    >>> lam, w = edge_rule(3)
    >>> lam.shape
    (2, 2)
    """
    d = _degree(degree, 41)
    return _edge_rule((d + 2) // 2)
