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
"""

import functools

import numpy as np

from hatkernels.checks import integer_option

__all__ = ["triangle_rule", "edge_rule", "TRIANGLE_DEGREES"]

TRIANGLE_DEGREES = (1, 2, 5)


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
