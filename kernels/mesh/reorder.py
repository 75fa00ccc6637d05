"""Renumbering points and triangles: bandwidth (RCM) or cache locality (Hilbert curve).

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

__all__ = ["reorder", "MeshPermutation", "hilbert_keys", "REORDERINGS"]

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

    Coordinates are quantised to ``2**bits`` cells per side (``bits <= 31``).
    The numba kernel does one point per iteration; ``plain=True`` runs the
    vectorised NumPy version it is tested against.
    """
    bits = integer_option(bits, "bits")
    if not 1 <= bits <= 31:
        raise InputError(f"bits must be between 1 and 31, got {bits}")
    q = _cells(xy, bits)
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

    Triangles are renumbered and sorted too (by their lowest new point for
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
    if mesh.dim != 2:
        raise InputError("reorder is not available for tetrahedra yet")
    tri = mesh.triangles
    if method == "rcm":
        e = mesh.edges()
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
    return new, MeshPermutation(points=perm, triangles=tperm)
