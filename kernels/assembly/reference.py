"""The ``reference`` strategy: plain loops over triangles, as readable as the math.

This is the executable specification every fast strategy is tested
against.  It favours clarity over speed (about 10 microseconds per
triangle): use it on meshes of up to some ten thousand triangles.
"""

from collections import defaultdict
from math import factorial

import numpy as np
import scipy.sparse as sp

from hatkernels.quadrature import triangle_rule

# Gradients of the reference hat functions 1 - xi - eta, xi, eta (as columns).
_REFERENCE_GRADIENTS = np.array([[-1.0, 1.0, 0.0], [-1.0, 0.0, 1.0]])


def _to_csr(entries, n):
    keys = sorted(entries)
    rows = np.array([k[0] for k in keys], dtype=np.int64)
    cols = np.array([k[1] for k in keys], dtype=np.int64)
    vals = np.array([entries[k] for k in keys])
    A = sp.csr_matrix((vals, (rows, cols)), shape=(n, n))
    A.sum_duplicates()
    return A


def _triangle(mesh, t):
    """Vertex coordinates (3, 2), area and gradients (2, 3) of triangle ``t``."""
    X = mesh.points[mesh.triangles[t]]
    B = np.column_stack([X[1] - X[0], X[2] - X[0]])  # Jacobian of the map from the reference
    area = 0.5 * np.linalg.det(B)
    G = np.linalg.solve(B.T, _REFERENCE_GRADIENTS)  # grad phi = B^-T grad phi_ref
    return X, area, G


def _mean_over(coef, mesh, t, X, quadrature):
    """Mean of a coefficient over triangle ``t`` (a 2x2 tensor is returned as is)."""
    if coef.kind == "constant":
        return coef.value
    if coef.kind == "cell":
        return coef.value[t]
    if coef.kind == "point":
        return coef.value[mesh.triangles[t]].mean()
    if coef.kind == "tensor":
        return coef.value if coef.value.ndim == 2 else coef.value[t]
    lam, w = triangle_rule(quadrature)
    xq = lam @ X  # quadrature points of this triangle
    return float(w @ coef.evaluate((xq[:, 0], xq[:, 1]), np.full(len(w), t)))


def stiffness(mesh, coef, quadrature):
    """``A_ij = sum_T int_T kappa grad phi_i . grad phi_j``."""
    entries = defaultdict(float)
    for t, tri in enumerate(mesh.triangles):
        X, area, G = _triangle(mesh, t)
        kappa = np.atleast_2d(_mean_over(coef, mesh, t, X, quadrature))
        K = area * G.T @ (kappa if kappa.shape == (2, 2) else kappa[0, 0] * np.eye(2)) @ G
        for a in range(3):
            for b in range(3):
                entries[tri[a], tri[b]] += K[a, b]
    return _to_csr(entries, mesh.n_points)


def _integral_of_barycentric_powers(powers, area):
    """``int_T l1^p l2^q l3^r = 2 |T| p! q! r! / (p + q + r + 2)!``."""
    p, q, r = powers
    return 2.0 * area * factorial(p) * factorial(q) * factorial(r) / factorial(p + q + r + 2)


def mass(mesh, coef, quadrature):
    """``M_ij = sum_T int_T c phi_i phi_j``."""
    entries = defaultdict(float)
    lam, w = triangle_rule(quadrature)
    for t, tri in enumerate(mesh.triangles):
        X, area, _ = _triangle(mesh, t)
        Me = np.zeros((3, 3))
        for a in range(3):
            for b in range(3):
                if coef.kind in ("constant", "cell"):
                    powers = [0, 0, 0]
                    powers[a] += 1
                    powers[b] += 1
                    Me[a, b] = _mean_over(coef, mesh, t, X, quadrature) * (
                        _integral_of_barycentric_powers(powers, area)
                    )
                elif coef.kind == "point":
                    for k in range(3):  # c = sum_k c_k phi_k
                        powers = [0, 0, 0]
                        powers[a] += 1
                        powers[b] += 1
                        powers[k] += 1
                        Me[a, b] += coef.value[tri[k]] * _integral_of_barycentric_powers(
                            powers, area
                        )
                else:
                    xq = lam @ X
                    c = coef.evaluate((xq[:, 0], xq[:, 1]), np.full(len(w), t))
                    Me[a, b] = area * np.sum(w * c * lam[:, a] * lam[:, b])
        for a in range(3):
            for b in range(3):
                entries[tri[a], tri[b]] += Me[a, b]
    return _to_csr(entries, mesh.n_points)
