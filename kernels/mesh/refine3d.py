"""Uniform nested refinement of tetrahedra: each into eight by its edge midpoints.

The interior diagonal is chosen by J. Bey's rule ("Tetrahedral grid refinement",
Computing 55 (1995) 355-378): with the parent's points in the order
``(x0, x1, x2, x3)`` and ``xij`` the midpoint of edge ``ij``, the children are

    (x0, x01, x02, x03)  (x01, x1, x12, x13)  (x02, x12, x2, x23)  (x03, x13, x23, x3)
    (x01, x02, x03, x13) (x01, x02, x12, x13) (x02, x03, x13, x23) (x02, x12, x13, x23)

(the octahedron cut along x02-x13), each in that point order.  Refined again and
again in these orders, the descendants of one tetrahedron fall into at most three
classes of congruent shapes (Bey, 1995), so the shape quality is bounded over any
number of levels.

The children (x01, x02, x12, x13) and (x02, x12, x13, x23) are negatively oriented
in Bey's order.  The mesh stores every cell positively, so those two are stored
with their last two points swapped; which cells are stored swapped follows from the
refinement history (child ``8t + k`` of coarse cell ``t``), and the swap is undone
before the next refinement so that Bey's order, and his bound, carry on.  The
generators ``cuboid`` and ``ball`` record which of their cells they store swapped
against the cell's path through its cube (Kuhn's order), so that those start from
the path: Bey's rule on a Kuhn simplex in path order gives Kuhn simplices again
(one shape class), and a refined cube is the finer grid cut the same way.  Any
other mesh without history (a given mesh, or a reordered one) starts Bey's order
afresh from its stored order, which his bound allows for any starting order.
"""

import numpy as np

from hatkernels._jit import topology as _topo
from hatkernels.mesh.core_index import index_dtype
from hatkernels.mesh.refinement import Refinement
from hatkernels.mesh.tetrahedra import smallest_first

__all__ = ["refine_tetrahedra", "bey_order", "BEY_CHILDREN"]

#: The six edges of a tetrahedron as pairs of local points; edge ``j`` gets local
#: number ``4 + j`` in :data:`BEY_CHILDREN`.
EDGE_PAIRS = np.array([[0, 1], [0, 2], [0, 3], [1, 2], [1, 3], [2, 3]])

#: Bey's eight children in local numbers (0..3 the points, 4..9 the midpoints of
#: 01, 02, 03, 12, 13, 23), each in his point order.
BEY_CHILDREN = np.array([
    [0, 4, 5, 6], [4, 1, 7, 8], [5, 7, 2, 9], [6, 8, 9, 3],
    [4, 5, 6, 8], [4, 5, 7, 8], [5, 6, 8, 9], [5, 7, 8, 9],
])

#: Children whose Bey order is negatively oriented with respect to their parent's.
ODD_CHILDREN = np.array([False, False, False, False, False, True, False, True])


def _swapped(mesh):
    """Per cell, whether it is stored with the last two points of its Bey order swapped.

    Read from the refinement history: child ``8t + k`` is swapped when its parent
    was swapped xor child ``k`` is odd.  A mesh whose history is not a refinement
    into eight (none, or cell counts that do not match) starts from what its
    generator recorded (``cuboid`` and ``ball`` store half their cells swapped
    against their path through the cube), or with no swaps.
    """
    r = mesh.refinement
    if r is None or r.coarse.dim != 3 or mesh.n_cells != 8 * r.coarse.n_cells:
        given = mesh._stored_swapped  # a generator's (cuboid, ball), or none
        return np.zeros(mesh.n_cells, dtype=bool) if given is None else given
    parent = _swapped(r.coarse)
    return (parent[:, None] ^ ODD_CHILDREN[None, :]).reshape(-1)


def bey_order(mesh):
    """The cells of ``mesh`` in Bey's point order (the order :meth:`Mesh.refine` refines
    them in): a copy of the stored cells, with the last two points of the cells stored
    swapped put back."""
    cells = np.array(mesh.cells)
    swapped = _swapped(mesh)
    cells[swapped, 2], cells[swapped, 3] = cells[swapped, 3], cells[swapped, 2].copy()
    return cells


def unique_edges(cells, n_points):
    """``(edges, cell_edges)``: the sorted unique edges (n_edges, 2) as (low, high)
    point pairs in lexicographic order, and the edge number of each cell's six edges
    (n_cells, 6) in the order of :data:`EDGE_PAIRS`."""
    lo = np.minimum(cells[:, EDGE_PAIRS[:, 0]], cells[:, EDGE_PAIRS[:, 1]]).astype(np.int64)
    hi = np.maximum(cells[:, EDGE_PAIRS[:, 0]], cells[:, EDGE_PAIRS[:, 1]])
    key = lo * n_points + hi  # n_points**2 fits in int64 for any count numpy can hold
    del lo, hi
    keys, cell_edges = np.unique(key.ravel(), return_inverse=True)
    dt = index_dtype(n_points, len(keys))
    edges = np.empty((len(keys), 2), dtype=dt)
    edges[:, 0] = keys // n_points
    edges[:, 1] = keys % n_points
    return edges, cell_edges.reshape(-1, 6).astype(dt, copy=False)


def refine_tetrahedra(mesh):
    """Return the uniformly refined tetrahedral mesh; see :meth:`Mesh.refine`.

    Fine points are numbered by first use in the fine cells (the eight children
    of coarse cell ``t`` are cells ``8t .. 8t+7``), as in 2-D, for locality.
    Working memory at peak, beyond the coarse mesh: the int64 keys of the six
    edges of each coarse cell with numpy's sort and inverse map of them (about
    12 bytes per fine cell), the provisional and the final fine cells (16 bytes
    each per fine cell with int32 indices), and the points; measured figures
    belong in the benchmark report.
    """
    cells = bey_order(mesh)
    swapped = _swapped(mesh)
    n, m = mesh.n_points, mesh.n_cells
    edges, cell_edges = unique_edges(cells, n)
    n_edges = len(edges)
    dt = index_dtype(n + n_edges)

    local = np.empty((m, 10), dtype=dt)
    local[:, :4] = cells
    local[:, 4:] = cell_edges
    local[:, 4:] += dt.type(n)  # midpoint of edge e is provisional point n + e
    del cells, cell_edges
    fine = local[:, BEY_CHILDREN]  # (m, 8, 4)
    del local
    odd = swapped[:, None] ^ ODD_CHILDREN[None, :]  # store every child positively
    fine[odd, 2], fine[odd, 3] = fine[odd, 3], fine[odd, 2].copy()
    del odd
    fine = fine.reshape(8 * m, 4)

    new_id = np.empty(n + n_edges, dtype=dt)
    _topo.first_appearance(fine, n + n_edges, new_id)
    fine = new_id[fine]
    coarse_points = new_id[:n]
    midpoints = new_id[n:]
    p = mesh.points
    points = np.empty((n + n_edges, 3))
    points[coarse_points] = p
    points[midpoints] = 0.5 * (p[edges[:, 0]] + p[edges[:, 1]])
    boundary = _refined_boundary(mesh.boundary_faces(), edges, n, coarse_points, midpoints)
    return type(mesh)._trusted(
        points,
        fine,
        refinement=Refinement(
            coarse=mesh, coarse_points=coarse_points, edge_points=edges, midpoints=midpoints
        ),
        boundary_faces=boundary,
        unused=np.sort(coarse_points[mesh.unused_points()]),
    )


def _refined_boundary(faces, edges, n, coarse_points, midpoints):
    """The fine mesh's boundary faces from the coarse mesh's, as the fine mesh would find them.

    A coarse boundary face ``(a, b, c)`` splits into ``(a, ab, ca)``, ``(ab, b, bc)``,
    ``(ca, bc, c)`` and ``(ab, bc, ca)`` (``ab`` the midpoint of edge ab), all with the
    parent's outward orientation; each is rotated to start at its smallest point and
    the rows are sorted by their sorted point triples, as
    :func:`hatkernels.mesh.tetrahedra.face_topology` returns them.  Costs the
    boundary only, instead of a sort of every face of the fine mesh.
    """
    key = edges[:, 0].astype(np.int64) * n + edges[:, 1]

    def mid(u, v):
        lo, hi = np.minimum(u, v).astype(np.int64), np.maximum(u, v)
        return midpoints[np.searchsorted(key, lo * n + hi)]

    a, b, c = faces[:, 0], faces[:, 1], faces[:, 2]
    ab, bc, ca = mid(a, b), mid(b, c), mid(c, a)
    a, b, c = coarse_points[a], coarse_points[b], coarse_points[c]
    fine = np.stack([
        np.column_stack([a, ab, ca]), np.column_stack([ab, b, bc]),
        np.column_stack([ca, bc, c]), np.column_stack([ab, bc, ca]),
    ]).reshape(-1, 3)
    fine = smallest_first(fine)
    s = np.sort(fine, axis=1)
    return fine[np.lexsort((s[:, 2], s[:, 1], s[:, 0]))].astype(midpoints.dtype, copy=False)
