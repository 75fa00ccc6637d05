"""Boundary terms on a set of edges: Neumann load and Robin mass.

On an edge of length ``L`` with end points ``a, b`` and linear hat functions,
``int_e l_a^p l_b^q ds = L p! q! / (p + q + 1)!``; callables are integrated
by Gauss-Legendre rules.
"""

import numpy as np
import scipy.sparse as sp

from hatkernels.coefficients import parse_edge_coefficient
from hatkernels.errors import InputError
from hatkernels.quadrature import edge_rule

__all__ = ["check_edges", "boundary_load", "boundary_mass", "side_load", "side_mass"]


def check_edges(mesh, edges):
    """Validate an (E, 2) array of mesh edges (default: the boundary edges)."""
    if edges is None:
        return mesh.boundary_edges()
    e = np.asarray(edges)
    if e.ndim != 2 or e.shape[1] != 2 or (e.size and e.dtype.kind not in "iu"):
        raise InputError(
            f"edges must be an integer array of shape (n_edges, 2), got {e.dtype} {e.shape}"
        )
    e = e.astype(np.int64)
    if e.size == 0:
        return e
    out = (e < 0) | (e >= mesh.n_points)
    if out.any():
        k = int(np.flatnonzero(out.any(axis=1))[0])
        raise InputError(
            f"edge {k} refers to a point outside 0..{mesh.n_points - 1}: {e[k].tolist()}"
        )
    same = e[:, 0] == e[:, 1]
    if same.any():
        k = int(np.flatnonzero(same)[0])
        raise InputError(f"edge {k} joins point {e[k, 0]} to itself")
    known = mesh.edges()
    n = np.int64(mesh.n_points)
    key = known[:, 0].astype(np.int64) * n + known[:, 1]
    want = np.minimum(e[:, 0], e[:, 1]) * n + np.maximum(e[:, 0], e[:, 1])
    pos = np.minimum(np.searchsorted(key, want), len(key) - 1)
    missing = key[pos] != want
    if missing.any():
        k = int(np.flatnonzero(missing)[0])
        raise InputError(f"edge {k} ({e[k, 0]}, {e[k, 1]}) is not an edge of the mesh")
    return e


def _lengths(mesh, e):
    p = mesh.points
    return np.linalg.norm(p[e[:, 1]] - p[e[:, 0]], axis=1)


def _edge_quadrature(coef, mesh, e, degree):
    lam, w = edge_rule(degree)
    p = mesh.points
    xq = p[e[:, 0], None, :] * lam[None, :, 0, None] + p[e[:, 1], None, :] * lam[None, :, 1, None]
    owner = np.repeat(np.arange(len(e)), len(w))
    x, y = xq[..., 0].ravel(), xq[..., 1].ravel()
    v = coef.evaluate((x, y), owner, "edge")
    return v.reshape(len(e), len(w)), lam, w


def boundary_load(mesh, g, edges=None, *, quadrature=2):
    """``b_i = int_Gamma g phi_i ds`` over the given edges; see :func:`hatkernels.assemble_boundary_load`."""
    e = check_edges(mesh, edges)
    coef = parse_edge_coefficient(g, mesh, len(e), name="boundary load", sign="any")
    return side_load(mesh, coef, e, quadrature)


def side_load(mesh, coef, e, quadrature):
    """:func:`boundary_load` for checked sides ``e`` (E, 2) and a parsed coefficient (trusted)."""
    L = _lengths(mesh, e)
    if coef.kind == "constant":
        ve = np.repeat((L * coef.value / 2)[:, None], 2, axis=1)
    elif coef.kind == "edge":
        ve = np.repeat((L * coef.value / 2)[:, None], 2, axis=1)
    elif coef.kind == "point":
        ga, gb = coef.value[e[:, 0]], coef.value[e[:, 1]]
        ve = L[:, None] / 6 * np.column_stack([2 * ga + gb, ga + 2 * gb])
    else:
        v, lam, w = _edge_quadrature(coef, mesh, e, quadrature)
        ve = L[:, None] * ((v * w) @ lam)
    return np.bincount(e.ravel(), weights=ve.ravel(), minlength=mesh.n_points)


def boundary_mass(mesh, r, edges=None, *, quadrature=2):
    """``R_ij = int_Gamma r phi_i phi_j ds`` over the given edges, as canonical CSR."""
    e = check_edges(mesh, edges)
    coef = parse_edge_coefficient(r, mesh, len(e), name="boundary coefficient", sign="nonnegative")
    return side_mass(mesh, coef, e, quadrature)


def side_mass(mesh, coef, e, quadrature):
    """:func:`boundary_mass` for checked sides ``e`` (E, 2) and a parsed coefficient (trusted)."""
    L = _lengths(mesh, e)
    if coef.kind in ("constant", "edge"):
        rv = coef.value
        daa = dbb = L * rv / 3
        dab = L * rv / 6
    elif coef.kind == "point":
        ra, rb = coef.value[e[:, 0]], coef.value[e[:, 1]]
        daa = L * (3 * ra + rb) / 12
        dbb = L * (ra + 3 * rb) / 12
        dab = L * (ra + rb) / 12
    else:
        v, lam, w = _edge_quadrature(coef, mesh, e, quadrature)
        vw = v * w
        daa = L * (vw @ lam[:, 0] ** 2)
        dbb = L * (vw @ lam[:, 1] ** 2)
        dab = L * (vw @ (lam[:, 0] * lam[:, 1]))
    daa, dbb, dab = (np.broadcast_to(x, L.shape) for x in (daa, dbb, dab))
    rows = np.concatenate([e[:, 0], e[:, 1], e[:, 0], e[:, 1]])
    cols = np.concatenate([e[:, 0], e[:, 1], e[:, 1], e[:, 0]])
    vals = np.concatenate([daa, dbb, dab, dab])
    n = mesh.n_points
    R = sp.coo_matrix((vals, (rows, cols)), shape=(n, n)).tocsr()
    R.sum_duplicates()
    return R
