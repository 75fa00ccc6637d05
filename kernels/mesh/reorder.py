"""Renumbering points and cells (triangles or tetrahedra): bandwidth (RCM) or cache
locality (Hilbert curve).

The renumbered mesh is built by the class of the mesh it comes from
(``type(mesh)._trusted``), so this module needs nothing from
:mod:`hatkernels.mesh.core`, which imports it.
"""

from typing import NamedTuple

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import reverse_cuthill_mckee

from hatkernels._jit import reorder as _jit_reorder
from hatkernels.checks import integer_option
from hatkernels.errors import InputError
from hatkernels.mesh.refine3d import unique_edges
from hatkernels.mesh.tags import reordered_tags

__all__ = ["reorder", "MeshPermutation", "hilbert_keys", "REORDERINGS"]

#: Values of ``method`` of :func:`reorder`: reverse Cuthill-McKee (bandwidth)
#: and the Hilbert curve (cache locality).
REORDERINGS = ("rcm", "hilbert")


class MeshPermutation(NamedTuple):
    """New-to-old index maps: ``new.points == old.points[points]``, same for triangles."""

    points: np.ndarray
    triangles: np.ndarray

    def points_inverse(self):
        """Old-to-new map of points: ``u_new[points_inverse()]`` is in the old order."""
        inv = np.empty_like(self.points)
        inv[self.points] = np.arange(self.points.size, dtype=self.points.dtype)
        return inv


def _cells(xy, bits):
    xy = np.asarray(xy, dtype=np.float64)
    lo = xy.min(axis=0)
    span = np.maximum(xy.max(axis=0) - lo, np.finfo(float).tiny)
    side = 1 << bits
    return np.minimum(((xy - lo) / span * side).astype(np.int64), side - 1)


def hilbert_keys(xy, bits=16, *, plain=False):
    """Position of each point along a Hilbert curve through its bounding box.

    Points in the plane (n, 2) or in space (n, 3).  Coordinates are quantised
    to ``2**bits`` cells per side (``bits <= 31`` in the plane, ``bits <= 21`` in
    space, where a key holds three bits a level).  The numba kernels do one
    point per iteration; ``plain=True`` runs the vectorised NumPy versions they
    are tested against.  In space the curve is J. Skilling's ("Programming the
    Hilbert curve", AIP Conf. Proc. 707, 2004).
    """
    bits = integer_option(bits, "bits")
    dim = np.shape(xy)[1] if np.ndim(xy) == 2 else 0
    if dim not in (2, 3):
        raise InputError(f"hilbert_keys needs points of shape (n, 2) or (n, 3), got {np.shape(xy)}")
    most = 31 if dim == 2 else 21
    if not 1 <= bits <= most:
        raise InputError(f"bits must be between 1 and {most}, got {bits}"
                         + ("; points in 3-D take three bits a level of a 63-bit key"
                            if dim == 3 else ""))
    q = _cells(xy, bits)
    if dim == 3:
        return _hilbert3_plain(q, bits) if plain else _jit_reorder.hilbert_keys3(q, bits)
    if not plain:
        return _jit_reorder.hilbert_keys(q, bits)
    side = 1 << bits
    x, y = q[:, 0].copy(), q[:, 1].copy()
    d = np.zeros(len(xy), dtype=np.int64)
    s = side >> 1
    while s > 0:
        rx = (x & s) > 0
        ry = (y & s) > 0
        d += np.int64(s) * s * ((3 * rx.astype(np.int64)) ^ ry.astype(np.int64))
        # rotate the quadrant so that the curve inside it has the standard orientation
        flip = (~ry) & rx
        x[flip] = side - 1 - x[flip]
        y[flip] = side - 1 - y[flip]
        swap = ~ry
        x[swap], y[swap] = y[swap], x[swap].copy()
        s >>= 1
    return d


def _hilbert3_plain(q, bits):
    """Skilling's transform of (n, 3) cells, vectorised over points (see hilbert_keys)."""
    x = [q[:, i].astype(np.int64) for i in range(3)]
    m = 1 << (bits - 1)
    while m > 1:
        p = m - 1
        for i in range(3):
            high = (x[i] & m) > 0
            t = np.where(high, 0, (x[0] ^ x[i]) & p)
            x[0] = np.where(high, x[0] ^ p, x[0] ^ t)
            if i:
                x[i] = x[i] ^ t
        m >>= 1
    x[1] ^= x[0]
    x[2] ^= x[1]
    t = np.zeros_like(x[0])
    m = 1 << (bits - 1)
    while m > 1:
        t = np.where((x[2] & m) > 0, t ^ (m - 1), t)
        m >>= 1
    d = np.zeros_like(x[0])
    for j in range(bits - 1, -1, -1):
        for i in range(3):
            d = (d << 1) | (((x[i] ^ t) >> j) & 1)
    return d


def reorder(mesh, method="rcm"):
    """Renumber a mesh; return ``(new_mesh, MeshPermutation)``.

    Parameters
    ----------
    method : {"rcm", "hilbert"}
        ``"rcm"``: reverse Cuthill-McKee on the point graph (scipy.sparse.csgraph);
        it minimises the matrix bandwidth, which helps banded and sparse
        direct factorisations and the quality of incomplete factorisations
        (ic0).  ``"hilbert"``: points sorted along a Hilbert space-filling
        curve; neighbours in the plane get nearby numbers at every scale, so
        gathers in assembly, SpMV and matrix-free products hit the cache.
        On meshes from our generators (already numbered row by row) both change
        little; on meshes read from files or from Delaunay of scattered points
        either can be worth several times in SpMV speed.

    Cells (triangles, or tetrahedra in 3-D) are renumbered and sorted too (by their lowest new point for
    rcm, by centroid along the curve for hilbert), so that per-triangle data
    must be permuted with ``perm.triangles``.  The refinement history is not
    carried over (multigrid needs the original numbering).

    Examples
    --------
    >>> from hatkernels.mesh import rectangle
    >>> m = rectangle(3, 3)
    >>> new, perm = m.reorder("hilbert")
    >>> bool((new.points == m.points[perm.points]).all())
    True
    """
    if not callable(getattr(type(mesh), "_trusted", None)):
        raise InputError(f"reorder needs a hatkernels.Mesh, got {type(mesh).__name__}")
    if method not in REORDERINGS:
        raise InputError(f"unknown reordering {method!r}; choose one of {REORDERINGS}")
    tri = mesh.cells
    if method == "rcm":
        e = mesh.edges() if mesh.dim == 2 else unique_edges(tri, mesh.n_points)[0]
        n = mesh.n_points
        g = sp.csr_matrix(
            (
                np.ones(2 * len(e), dtype=np.int8),
                (np.r_[e[:, 0], e[:, 1]], np.r_[e[:, 1], e[:, 0]]),
            ),
            shape=(n, n),
        )
        perm = reverse_cuthill_mckee(g, symmetric_mode=True).astype(tri.dtype)
    else:
        perm = np.argsort(hilbert_keys(mesh.points), kind="stable").astype(tri.dtype)
    inv = np.empty_like(perm)
    inv[perm] = np.arange(perm.size, dtype=perm.dtype)
    new_tri = inv[tri]
    if method == "rcm":
        tperm = np.argsort(new_tri.min(axis=1), kind="stable")
    else:
        cent = mesh.points[tri].mean(axis=1)
        tperm = np.argsort(hilbert_keys(cent), kind="stable")
    tperm = tperm.astype(tri.dtype)
    new = type(mesh)._trusted(
        mesh.points[perm], new_tri[tperm], unused=np.sort(inv[mesh.unused_points()])
    )
    if getattr(mesh, "tags", None) is not None:  # regions and boundary tags follow
        new._tags = reordered_tags(mesh.tags, inv, tperm, new.cells.dtype)
    return new, MeshPermutation(points=perm, triangles=tperm)
