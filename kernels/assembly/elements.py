"""Element values of the mass matrix and the load vector, vectorised over triangles;
element stiffness, mass and load values on tetrahedra.

Symmetric triangle element matrices are kept as two (M, 3) arrays: ``d[t, a]``
the diagonal entry of vertex ``a`` and ``o[t, c]`` the entry of the pair of
vertices opposite ``c``.  Closed forms come from the integrals of products of
barycentric coordinates, ``int_T l1^p l2^q l3^r = 2|T| p! q! r! / (p+q+r+2)!``,
and on a tetrahedron ``int_T l1^p l2^q l3^r l4^s = 6|T| p! q! r! s! / (p+q+r+s+3)!``
(M. A. Eisenberg and L. E. Malvern, *On finite element integration in natural
co-ordinates*, Int. J. Numer. Meth. Eng. 7, 1973).  Tetrahedron values are full
(M, 4, 4) matrices and (M, 4) vectors, computed from raw arrays (points,
cells, volumes, gradients from :func:`hatkernels.element_gradients`) and a
checked :class:`hatkernels.coefficients.Coefficient`, so that they need no mesh.
"""

import numpy as np

from hatkernels._jit import assembly as _jit_assembly
from hatkernels._jit import assembly3d as _jit_assembly3d
from hatkernels.coefficients import at_quadrature
from hatkernels.errors import InputError
from hatkernels.quadrature import tetrahedron_rule, triangle_rule

__all__ = [
    "mass_values",
    "load_values",
    "lumped_values",
    "tetrahedron_stiffness_values",
    "tetrahedron_mass_values",
    "tetrahedron_lumped_values",
    "tetrahedron_load_values",
]

# Callables are evaluated on this many tetrahedra at a time, to bound the
# temporaries at (chunk * points per tetrahedron) values.
_TET_CHUNK = 1 << 16


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
        v = at_quadrature(coef, mesh, quadrature)  # (M, Q)
        pairs = np.roll(lam, -1, axis=1) * np.roll(lam, 1, axis=1)  # opposite vertex c
        d, o = np.empty((len(A), 3)), np.empty((len(A), 3))
        _jit_assembly.weighted_sums(A, v, w, np.ascontiguousarray(lam**2), d)
        _jit_assembly.weighted_sums(A, v, w, np.ascontiguousarray(pairs), o)
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
        out = np.empty((len(A), 3))
        _jit_assembly.weighted_sums(A, at_quadrature(coef, mesh, quadrature), w, lam, out)
        return out
    raise InputError(f"{coef.name} must be scalar, got a tensor")


def _tetrahedron_quadrature(points, cells, coef, quadrature):
    """Rule ``(lam (Q, 4), w (Q,))`` and a callable's checked values (M, Q) at its points."""
    lam, w = tetrahedron_rule(quadrature)
    m = len(cells)
    out = np.empty((m, len(w)))
    for start in range(0, m, _TET_CHUNK):
        stop = min(m, start + _TET_CHUNK)
        xq = np.empty((3, stop - start, len(w)))
        _jit_assembly3d.quadrature_coordinates(points, cells, lam, start, xq)
        owners = np.repeat(np.arange(start, stop), len(w))
        coords = tuple(c.ravel() for c in xq)
        v = coef.evaluate(coords, owners, owner="tetrahedron")
        out[start:stop] = v.reshape(stop - start, len(w))
    return lam, w, out


def _tetrahedron_means(points, cells, coef, quadrature):
    """Mean of a scalar coefficient over each tetrahedron: a float or an (M,) array
    (exact for constant, per-cell and per-point values; by quadrature for callables)."""
    if coef.kind == "constant":
        return coef.value
    if coef.kind == "cell":
        return coef.value
    if coef.kind == "point":
        return coef.value[cells].mean(axis=1)
    if coef.kind == "callable":
        _, w, v = _tetrahedron_quadrature(points, cells, coef, quadrature)
        return v @ w
    raise InputError(f"{coef.name} must be scalar here, got a {coef.kind}")


def tetrahedron_stiffness_values(points, cells, volumes, gradients, coef, quadrature=2):
    """Element stiffness matrices ``int_T kappa grad(phi_a) . grad(phi_b)``, (M, 4, 4).

    Parameters
    ----------
    points : ndarray, shape (n_points, 3)
    cells : ndarray, shape (n_cells, 4)
    volumes, gradients : ndarray, shapes (n_cells,) and (n_cells, 4, 3)
        From :func:`hatkernels.element_gradients`.
    coef : Coefficient
        ``kappa``: a constant, one value per cell (M,), per point (N,; its exact
        mean over the cell, kappa being linear and the gradients constant), a
        callable (its mean by the rule of degree ``quadrature``), or a tensor,
        one (3, 3) for all cells or one per cell (M, 3, 3): then the values are
        ``|T| grad(phi_a) . K grad(phi_b)`` made exactly symmetric by averaging
        with the transpose (a symmetric ``K`` changes only by round-off).
    quadrature : int
        Degree of the rule for a callable.

    Returns
    -------
    ndarray, shape (n_cells, 4, 4)
        Symmetric bit for bit, rows summing to zero up to round-off.
    """
    G = gradients
    if coef.kind == "tensor":
        K = np.asarray(coef.value, dtype=np.float64)
        if K.shape not in ((3, 3), (len(G), 3, 3)):
            raise InputError(
                f"{coef.name}: a tensor on tetrahedra must have shape (3, 3) or "
                f"({len(G)}, 3, 3), got {K.shape}"
            )
        spec = "ij,mbj->mbi" if K.ndim == 2 else "mij,mbj->mbi"
        S = np.einsum("mai,mbi->mab", G, np.einsum(spec, K, G)) * volumes[:, None, None]
        return 0.5 * (S + S.transpose(0, 2, 1))
    w = volumes * _tetrahedron_means(points, cells, coef, quadrature)
    return np.einsum("mai,mbi->mab", G, G) * w[:, None, None]


def tetrahedron_mass_values(points, cells, volumes, coef, quadrature=2):
    """Element mass matrices ``int_T c phi_a phi_b``, (M, 4, 4).

    For constant or per-cell ``c``: ``c |T| (1 + delta_ab) / 20``; for ``c``
    per point (linear on the cell): ``|T| (2 c_a + S) / 60`` on the diagonal and
    ``|T| (c_a + c_b + S) / 120`` off it, ``S`` the sum of the four values
    (both exact, from the integrals in the module's notes); for a callable, by
    the rule of degree ``quadrature``.
    """
    m = len(volumes)
    if coef.kind in ("constant", "cell"):
        c = volumes * coef.value / 20.0
        M = np.broadcast_to(c[:, None, None], (m, 4, 4)).copy()
        M[:, range(4), range(4)] *= 2.0
        return M
    if coef.kind == "point":
        cv = coef.value[cells]  # (M, 4)
        s = cv.sum(axis=1)
        M = (cv[:, :, None] + cv[:, None, :] + s[:, None, None]) * (volumes / 120.0)[:, None, None]
        M[:, range(4), range(4)] = (2.0 * cv + s[:, None]) * (volumes / 60.0)[:, None]
        return M
    if coef.kind == "callable":
        lam, w, v = _tetrahedron_quadrature(points, cells, coef, quadrature)
        pairs = np.ascontiguousarray((lam[:, :, None] * lam[:, None, :]).reshape(len(w), 16))
        out = np.empty((m, 16))
        _jit_assembly.weighted_sums(np.ascontiguousarray(volumes, dtype=np.float64), v, w,
                                    pairs, out)
        return out.reshape(m, 4, 4)
    raise InputError(f"{coef.name} must be scalar for a mass matrix, got a {coef.kind}")


def tetrahedron_load_values(points, cells, volumes, coef, quadrature=2):
    """Element load vectors ``int_T f phi_a``, (M, 4).

    Constant or per-cell ``f``: ``f |T| / 4``; per point (``f`` linear on the
    cell): ``|T| (f_a + S) / 20``, ``S`` the sum of the four values (exact); a
    callable ``f(x, y, z)``: by the rule of degree ``quadrature`` at its points.
    """
    if coef.kind in ("constant", "cell"):
        return np.repeat((volumes * coef.value / 4.0)[:, None], 4, axis=1)
    if coef.kind == "point":
        fv = coef.value[cells]
        return (fv + fv.sum(axis=1, keepdims=True)) * (volumes / 20.0)[:, None]
    if coef.kind == "callable":
        lam, w, v = _tetrahedron_quadrature(points, cells, coef, quadrature)
        out = np.empty((len(cells), 4))
        _jit_assembly.weighted_sums(np.ascontiguousarray(volumes, dtype=np.float64), v, w,
                                    lam, out)
        return out
    raise InputError(f"{coef.name} must be scalar, got a {coef.kind}")


def tetrahedron_lumped_values(points, cells, volumes, coef, quadrature=2):
    """Row sums of the element mass matrices, (M, 4): ``c |T| / 4`` for constant or
    per-cell ``c``.

    The hat functions sum to one on the cell, so the row sums of
    ``int_T c phi_a phi_b`` are ``int_T c phi_a``: the load values of ``c``,
    computed by the same closed forms (exact) or the same rule.
    """
    return tetrahedron_load_values(points, cells, volumes, coef, quadrature)
