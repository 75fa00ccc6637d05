"""Element values of the mass matrix and the load vector, vectorised over triangles.

Symmetric element matrices are kept as two (M, 3) arrays: ``d[t, a]`` the
diagonal entry of vertex ``a`` and ``o[t, c]`` the entry of the pair of
vertices opposite ``c``.  Closed forms come from the integrals of products of
barycentric coordinates, ``int_T l1^p l2^q l3^r = 2|T| p! q! r! / (p+q+r+2)!``.
"""

import numpy as np

from hatkernels.coefficients import at_quadrature
from hatkernels.errors import InputError
from hatkernels.quadrature import triangle_rule

__all__ = ["mass_values", "load_values", "lumped_values"]


def mass_values(mesh, coef, quadrature):
    """(d, o) of ``int_T c phi_a phi_b`` for each triangle."""
    A = mesh.areas()
    if coef.kind in ("constant", "cell"):
        c = coef.value if coef.kind == "constant" else coef.value[:, None]
        d = np.broadcast_to(A[:, None] * (c / 6.0), (len(A), 3)).copy()
        o = d * 0.5
    elif coef.kind == "point":
        cv = coef.value[mesh.triangles]  # (M, 3)
        s = cv.sum(axis=1, keepdims=True)
        d = A[:, None] / 30.0 * (2.0 * cv + s)  # (3 c_a + c_b + c_c) |T| / 30
        o = A[:, None] / 60.0 * (2.0 * s - cv)  # (2 c_a + 2 c_b + c_c) |T| / 60
    elif coef.kind == "callable":
        lam, w = triangle_rule(quadrature)
        v = at_quadrature(coef, mesh, quadrature) * w  # (M, Q)
        d = A[:, None] * (v @ lam**2)
        pairs = np.roll(lam, -1, axis=1) * np.roll(lam, 1, axis=1)  # opposite vertex c
        o = A[:, None] * (v @ pairs)
    else:
        raise InputError(f"{coef.name} must be scalar for a mass matrix, got a tensor")
    return d, o


def lumped_values(d, o):
    """Row sums of each element matrix: ``d_a + o_b + o_c`` with ``b, c`` the other vertices."""
    return d + np.roll(o, -1, axis=1) + np.roll(o, 1, axis=1)


def load_values(mesh, coef, quadrature):
    """(M, 3) values ``int_T f phi_a``."""
    A = mesh.areas()
    if coef.kind == "constant":
        return np.repeat((A * (coef.value / 3.0))[:, None], 3, axis=1)
    if coef.kind == "cell":
        return np.repeat((A * coef.value / 3.0)[:, None], 3, axis=1)
    if coef.kind == "point":
        fv = coef.value[mesh.triangles]
        return A[:, None] / 12.0 * (fv + fv.sum(axis=1, keepdims=True))
    if coef.kind == "callable":
        lam, w = triangle_rule(quadrature)
        return A[:, None] * ((at_quadrature(coef, mesh, quadrature) * w) @ lam)
    raise InputError(f"{coef.name} must be scalar, got a tensor")
