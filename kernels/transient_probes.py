"""Values of a P1 field at given points: the containing cell and its barycentric weights.

:func:`locate` finds, for each point, a cell that contains it (on a side or a
corner any of the cells sharing it will do: the P1 field is continuous) and
the point's barycentric coordinates in it; the value of a field is then the
weighted sum of three (four) point values, so probing a field costs O(number
of probes) per time step and no field needs to be stored.

Cells are found among the nearest cell centroids (a k-d tree, scipy's
:class:`~scipy.spatial.cKDTree`); a point that none of them contains (long
thin cells) is looked for among all cells, so the answer never depends on
the tree.  A point outside the mesh is an InputError naming it.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy.spatial import cKDTree

from hatkernels.errors import InputError

__all__ = ["Probes", "locate"]

#: Nearest centroids examined first for each point.
_NEAREST = 12
#: Cells examined at a time when a point is looked for among all of them.
_BLOCK = 1 << 16


@dataclasses.dataclass(frozen=True)
class Probes:
    """Points located in a mesh.

    Attributes
    ----------
    points : ndarray, shape (n_probes, d)
    cells : ndarray, shape (n_probes,)
        A containing cell of each point.
    vertices : ndarray, shape (n_probes, d + 1)
        That cell's points.
    weights : ndarray, shape (n_probes, d + 1)
        The barycentric coordinates (>= 0 up to round-off, summing to 1).
    """

    points: np.ndarray
    cells: np.ndarray
    vertices: np.ndarray
    weights: np.ndarray

    def values(self, u):
        """The P1 field ``u`` (n_points,) at the points, shape (n_probes,)."""
        return (np.asarray(u)[self.vertices] * self.weights).sum(axis=1)


def _barycentric(mesh, cells, x):
    """Barycentric coordinates (k, d + 1) of points ``x`` (k, d) in ``cells`` (k,)."""
    v = mesh.points[mesh.cells[cells]]  # (k, d+1, d)
    edges = np.transpose(v[:, 1:, :] - v[:, :1, :], (0, 2, 1))  # columns v_i - v_0
    mu = np.linalg.solve(edges, (x - v[:, 0, :])[:, :, None])[:, :, 0]
    return np.column_stack([1.0 - mu.sum(axis=1), mu])


def _inside(lam, tol):
    return (lam >= -tol).all(axis=1)


def _scan(mesh, x, tol):
    """A cell containing ``x`` (d,) among all cells, with its weights; (None, None) if none."""
    m = mesh.n_cells
    for start in range(0, m, _BLOCK):
        cells = np.arange(start, min(m, start + _BLOCK))
        lam = _barycentric(mesh, cells, np.broadcast_to(x, (cells.size, x.size)))
        hit = np.flatnonzero(_inside(lam, tol))
        if hit.size:
            k = hit[np.argmax(lam[hit].min(axis=1))]
            return int(cells[k]), lam[k]
    return None, None


def locate(mesh, points, *, name="probes"):
    """Locate ``points`` (n_probes, d) in ``mesh``; a :class:`Probes`.

    Raises
    ------
    InputError
        Points of the wrong shape or not finite, or a point in no cell of the
        mesh (naming its index and coordinates).

    Examples
    --------
    >>> import numpy as np, hatkernels
    >>> from hatkernels.transient_probes import locate
    >>> m = hatkernels.mesh.rectangle(4, 4)
    >>> p = locate(m, [[0.3, 0.6]])
    >>> float(p.values(m.points[:, 0] + 2 * m.points[:, 1])[0])   # linear: exact
    1.5
    """
    d = mesh.dim
    x = np.asarray(points)
    if x.dtype.kind not in "fiu":
        raise InputError(f"{name} must be real coordinates, got dtype {x.dtype}")
    if x.ndim == 1 and x.size == d:
        x = x[None, :]  # one point
    if x.ndim != 2 or x.shape[1] != d:
        raise InputError(f"{name} must be points of shape (n, {d}), got shape {x.shape}")
    x = np.array(x, dtype=np.float64)
    bad = ~np.isfinite(x).all(axis=1)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise InputError(f"{name}[{k}] = {x[k].tolist()} is not finite")
    if x.shape[0] == 0:
        empty = np.empty((0, d + 1))
        return Probes(x, np.empty(0, np.int64), empty.astype(np.int64), empty)
    span = float(np.ptp(mesh.points, axis=0).max()) or 1.0
    tol = 1e-10  # barycentric coordinates are scale-free: a relative tolerance
    centroids = mesh.points[mesh.cells].mean(axis=1)
    tree = cKDTree(centroids)
    k = min(_NEAREST, mesh.n_cells)
    _, near = tree.query(x, k=k)
    near = near.reshape(x.shape[0], k)
    cells = np.empty(x.shape[0], dtype=np.int64)
    weights = np.empty((x.shape[0], d + 1))
    for i in range(x.shape[0]):
        lam = _barycentric(mesh, near[i], np.broadcast_to(x[i], (k, d)))
        hit = np.flatnonzero(_inside(lam, tol))
        if hit.size:
            j = hit[np.argmax(lam[hit].min(axis=1))]
            cells[i], weights[i] = near[i, j], lam[j]
            continue
        cell, lam = _scan(mesh, x[i], tol)
        if cell is None:
            at = ", ".join(f"{c:.6g}" for c in x[i])
            raise InputError(f"{name}[{i}] at ({at}) is outside the mesh (in no cell; the "
                             f"mesh spans {span:.6g})")
        cells[i], weights[i] = cell, lam
    weights = np.clip(weights, 0.0, None)
    weights /= weights.sum(axis=1, keepdims=True)
    return Probes(x, cells, mesh.cells[cells].astype(np.int64), weights)
