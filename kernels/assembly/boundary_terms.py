"""Boundary terms on sides (edges in 2-D, triangular faces in 3-D): Neumann load and Robin mass.

On an edge of length ``L`` with end points ``a, b`` and linear hat functions,
``int_e l_a^p l_b^q ds = L p! q! / (p + q + 1)!``; callables are integrated
by Gauss-Legendre rules.

On a face of area ``A`` with barycentric coordinates ``l_a, l_b, l_c``,
``int_F l_a^p l_b^q l_c^s dS = 2 A p! q! s! / (p + q + s + 2)!`` (I. Eisenberg
and L. E. Malvern, *On finite element integration in natural co-ordinates*,
Int. J. Numer. Meth. Engng 7, 1973).  Hence the load of a constant ``g`` is
``A g / 3`` per point, the mass of a constant ``r`` is ``A r (1 + delta_ij) / 12``,
and for data linear on the face (per point) the load is ``A (2 g_i + g_j + g_k) / 12``
and the mass ``A (6 r_i + 2 r_j + 2 r_k) / 60`` on the diagonal and
``A (2 r_i + 2 r_j + r_k) / 60`` off it (``k`` the third point).  Callables are
integrated by :func:`hatkernels.quadrature.triangle_rule` mapped onto the face.
"""

import numpy as np
import scipy.sparse as sp

from hatkernels.coefficients import parse_edge_coefficient
from hatkernels.errors import InputError
from hatkernels.quadrature import edge_rule, triangle_rule

__all__ = ["check_edges", "check_faces", "check_sides", "boundary_load", "boundary_mass", "side_load", "side_mass"]


def _side_array(mesh, sides, word):
    """``sides`` as an int64 (E, 2 or 3) array of point indices in range, or an InputError."""
    width = {"edge": 2, "face": 3}[word]
    a = np.asarray(sides)
    if a.ndim != 2 or a.shape[1] != width or (a.size and a.dtype.kind not in "iu"):
        raise InputError(f"{word}s must be an integer array of shape (n_{word}s, {width}), "
                         f"got {a.dtype} {a.shape}")
    a = a.astype(np.int64)
    out = (a < 0) | (a >= mesh.n_points)
    if out.any():
        k = int(np.flatnonzero(out.any(axis=1))[0])
        raise InputError(
            f"{word} {k} refers to a point outside 0..{mesh.n_points - 1}: {a[k].tolist()}"
        )
    return a


def check_edges(mesh, edges):
    """Validate an (E, 2) array of mesh edges (default: the boundary edges)."""
    if edges is None:
        return mesh.boundary_edges()
    e = _side_array(mesh, edges, "edge")
    if e.size == 0:
        return e
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
    e = check_sides(mesh, edges)
    coef = parse_edge_coefficient(g, mesh, len(e), name="boundary load", sign="any")
    return side_load(mesh, coef, e, quadrature)


def side_load(mesh, coef, e, quadrature):
    """:func:`boundary_load` for checked sides ``e`` ((E, 2) edges or (E, 3) faces) and a
    parsed coefficient (trusted)."""
    if mesh.dim == 3:
        return _face_load(mesh, coef, e, quadrature)
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
    e = check_sides(mesh, edges)
    coef = parse_edge_coefficient(r, mesh, len(e), name="boundary coefficient", sign="nonnegative")
    return side_mass(mesh, coef, e, quadrature)


def side_mass(mesh, coef, e, quadrature):
    """:func:`boundary_mass` for checked sides ``e`` ((E, 2) edges or (E, 3) faces) and a
    parsed coefficient (trusted)."""
    if mesh.dim == 3:
        return _face_mass(mesh, coef, e, quadrature)
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


def check_sides(mesh, sides):
    """Validated sides of the mesh: edges (E, 2) in 2-D, faces (E, 3) in 3-D (default: the
    boundary sides)."""
    return check_faces(mesh, sides) if mesh.dim == 3 else check_edges(mesh, sides)


def check_faces(mesh, faces):
    """Validate an (E, 3) array of faces of a tetrahedral mesh (default: the boundary faces).

    Each row must be a face of :meth:`Mesh.faces` in any order of its points; the rows
    are returned as given (their orientation kept), as int64.
    """
    if mesh.dim != 3:
        raise InputError("faces are sides of tetrahedra; this mesh has triangles: pass edges")
    if faces is None:
        return mesh.boundary_faces().astype(np.int64)
    f = _side_array(mesh, faces, "face")
    if f.size == 0:
        return f
    s = np.sort(f, axis=1)
    same = (s[:, 0] == s[:, 1]) | (s[:, 1] == s[:, 2])
    if same.any():
        k = int(np.flatnonzero(same)[0])
        raise InputError(f"face {k} {f[k].tolist()} repeats a point")
    # boundary faces first (a refined mesh has them without its whole face list),
    # then, for any face left, every face of the mesh
    missing = _not_among(np.sort(mesh.boundary_faces(), axis=1), s, mesh.n_points)
    if missing.any():
        rest = np.flatnonzero(missing)
        missing[rest] = _not_among(mesh.faces(), s[rest], mesh.n_points)
    if missing.any():
        k = int(np.flatnonzero(missing)[0])
        raise InputError(f"face {k} {tuple(f[k].tolist())} is not a face of the mesh")
    return f


def _not_among(known, want, n_points):
    """Whether each sorted triple of ``want`` is missing from the sorted triples ``known``."""
    known = known.astype(np.int64)
    n = np.int64(n_points)
    # (rank of the leading pair) * n + third point: fits int64 where i * n * n would not
    pair = known[:, 0] * n + known[:, 1]
    pairs = np.unique(pair)
    key = np.sort(np.searchsorted(pairs, pair) * n + known[:, 2])
    want_pair = want[:, 0] * n + want[:, 1]
    at = np.minimum(np.searchsorted(pairs, want_pair), len(pairs) - 1)
    target = at * n + want[:, 2]
    pos = np.minimum(np.searchsorted(key, target), len(key) - 1)
    return (pairs[at] != want_pair) | (key[pos] != target)


def _areas(mesh, f):
    p = mesh.points
    return 0.5 * np.linalg.norm(np.cross(p[f[:, 1]] - p[f[:, 0]], p[f[:, 2]] - p[f[:, 0]]), axis=1)


def _face_quadrature(coef, mesh, f, degree):
    lam, w = triangle_rule(degree)
    xq = mesh.points[f].transpose(0, 2, 1) @ lam.T  # (E, 3 coordinates, Q)
    owner = np.repeat(np.arange(len(f)), len(w))
    v = coef.evaluate(tuple(xq[:, c, :].ravel() for c in range(3)), owner, "face")
    return v.reshape(len(f), len(w)), lam, w


def _face_load(mesh, coef, f, quadrature):
    A = _areas(mesh, f)
    if coef.kind in ("constant", "edge"):  # "edge": one value per side, here per face
        vf = np.repeat((A * coef.value / 3)[:, None], 3, axis=1)
    elif coef.kind == "point":
        g = coef.value[f]
        vf = A[:, None] / 12 * (g + g.sum(axis=1, keepdims=True))
    else:
        v, lam, w = _face_quadrature(coef, mesh, f, quadrature)
        vf = A[:, None] * ((v * w) @ lam)
    return np.bincount(f.ravel(), weights=vf.ravel(), minlength=mesh.n_points)


def _face_mass(mesh, coef, f, quadrature):
    A = _areas(mesh, f)
    eye = np.eye(3)
    if coef.kind in ("constant", "edge"):
        m = (A * coef.value / 12)[:, None, None] * (1 + eye)
    elif coef.kind == "point":
        r = coef.value[f]
        # diagonal (6 r_i + 2 r_j + 2 r_k) / 60, off it (2 r_i + 2 r_j + r_k) / 60
        pair = r[:, :, None] + r[:, None, :] + r.sum(axis=1)[:, None, None]
        m = (A / 60)[:, None, None] * (1 + eye) * pair
    else:
        v, lam, w = _face_quadrature(coef, mesh, f, quadrature)
        m = A[:, None, None] * np.einsum("eq,qi,qj->eij", v * w, lam, lam)
    n = mesh.n_points
    rows = np.repeat(f, 3, axis=1).ravel()
    cols = np.tile(f, (1, 3)).ravel()
    R = sp.coo_matrix((m.ravel(), (rows, cols)), shape=(n, n)).tocsr()
    R.sum_duplicates()
    return R
