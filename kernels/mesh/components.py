"""Connected parts of a mesh: which points belong together.

Two cells are connected when they share a point. A mesh made of several
disjoint parts (two plates that do not touch, say) gives a stiffness matrix
that is singular on each part that nothing holds: the problem layer uses
:func:`point_components` to name such a part instead of letting CG fail.
"""

from __future__ import annotations

import numpy as np

from hatkernels._jit import topology as _topo

__all__ = ["point_components"]


def point_components(mesh):
    """``(count, labels)``: the number of connected parts and each point's part.

    ``labels`` has shape (n_points,), int32, parts numbered from 0 in the order
    of their smallest point; points in no cell get -1 and are not counted.
    For a mesh made by refinement the parts are those of the coarsest mesh,
    carried up level by level (refinement neither joins nor splits parts), so
    no graph of the fine mesh is built.  Otherwise a union-find over the cells
    (``component_roots`` in :mod:`hatkernels._jit.topology`).

    >>> from hatkernels.mesh import rectangle
    >>> count, labels = point_components(rectangle(2, 2))
    >>> count, labels.tolist()
    (1, [0, 0, 0, 0, 0, 0, 0, 0, 0])
    """
    r = mesh.refinement
    if r is not None:
        count, coarse = point_components(r.coarse)
        labels = np.full(mesh.n_points, -1, dtype=np.int32)
        labels[r.coarse_points] = coarse
        labels[r.midpoints] = coarse[r.edge_points[:, 0]]
        return count, labels
    cells = mesh.cells
    n = mesh.n_points
    root = np.arange(n, dtype=cells.dtype)
    _topo.component_roots(cells, root)  # each point's smallest connected point
    used = np.ones(n, dtype=bool)
    used[mesh.unused_points()] = False  # cached by the mesh
    is_root = used & (root == np.arange(n, dtype=cells.dtype))
    number = np.cumsum(is_root, dtype=np.int32) - 1  # parts in the order of their first point
    labels = np.where(used, number[root], -1).astype(np.int32)
    return int(is_root.sum()), labels
