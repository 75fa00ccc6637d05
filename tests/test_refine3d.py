"""Uniform refinement of tetrahedra (Bey's rule): geometry, topology, quality, the maps;
reordering of tetrahedral meshes (RCM, Hilbert curve in space)."""

import warnings

import numpy as np
import pytest
from conftest import EPS
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components, reverse_cuthill_mckee

import hatkernels
from hatkernels import InputError, Mesh
from hatkernels.mesh import REORDERINGS, cuboid, hilbert_keys, triangulate

#: The regular tetrahedron (cells reordered to positive orientation) and a
#: deliberately uneven one.
REGULAR = (np.array([[1.0, 1.0, 1.0], [1.0, -1.0, -1.0], [-1.0, 1.0, -1.0], [-1.0, -1.0, 1.0]]),
           np.array([[0, 2, 1, 3]]))
UNEVEN = (np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.3, 0.8, 0.0], [0.2, 0.3, 0.6]]),
          np.array([[0, 1, 2, 3]]))


def checked(points, cells):
    """``Mesh(points, cells)`` failing on any warning."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        return Mesh(points, cells)


def delaunay(n=60, seed=3):
    return triangulate(np.random.default_rng(seed).random((n, 3)))


def volumes(points, cells):
    """Volumes by numpy's determinant (the test's own, not the library's)."""
    x = points[cells]
    return np.linalg.det(x[:, 1:] - x[:, :1]) / 6


def shapes_scale(points, cells):
    """Longest edge of each cell."""
    x = points[cells]
    return np.max([np.linalg.norm(x[:, a] - x[:, b], axis=1)
                   for a in range(4) for b in range(a + 1, 4)], axis=0)


def edge_set(cells):
    """Sorted unique edges of tetrahedra by numpy alone."""
    pairs = [(a, b) for a in range(4) for b in range(a + 1, 4)]
    e = np.concatenate([np.sort(cells[:, [a, b]], axis=1) for a, b in pairs])
    return np.unique(e, axis=0)


MESHES = {
    "regular": lambda: checked(*REGULAR),
    "uneven": lambda: checked(*UNEVEN),
    "cuboid": lambda: cuboid(2, 3, 2, bounds=(0, 1, 0, 2, -1, 0.5)),
    "delaunay": delaunay,
}


@pytest.fixture(params=sorted(MESHES))
def coarse(request):
    return MESHES[request.param]()


def test_volumes_add_up_per_coarse_cell(coarse):
    # Midpoint subdivision: the eight children fill their parent, and each corner
    # child is the parent scaled by 1/2 about a vertex, so 1/8 of its volume
    # (analytic: geometry of midpoint subdivision).
    fine = coarse.refine()
    parent = volumes(coarse.points, coarse.cells)
    child = volumes(fine.points, fine.cells).reshape(-1, 8)
    assert (child > 0).all()  # every child positively oriented
    # round-off of a determinant scales with the cube of the edges, not the volume
    scale = 64 * EPS * shapes_scale(coarse.points, coarse.cells) ** 3
    assert (abs(child.sum(axis=1) - parent) <= scale).all()
    assert (abs(child[:, :4] - parent[:, None] / 8) <= scale[:, None]).all()


def test_counts(coarse):
    # Euler-type counting of midpoint refinement (common practice, no source):
    # N + E points, 8 M cells, each boundary triangle into four.
    fine = coarse.refine()
    n_edges = len(edge_set(coarse.cells))
    assert fine.n_points == coarse.n_points + n_edges
    assert fine.n_cells == 8 * coarse.n_cells
    assert len(fine.boundary_faces()) == 4 * len(coarse.boundary_faces())


def test_refined_mesh_passes_full_validation(coarse):
    # conformity (each face shared by at most two cells, from opposite sides),
    # orientation and shape are all checked by the 3-D mesh validation
    fine = coarse.refine().refine()
    again = checked(fine.points, fine.cells)
    np.testing.assert_array_equal(again.cells, fine.cells)


def test_nested_points_and_maps(coarse):
    # Nested refinement by definition: coarse points stay, new points are at the
    # middle of the coarse edges (common practice, no source).
    fine = coarse.refine()
    r = fine.refinement
    assert r.coarse is coarse
    np.testing.assert_array_equal(fine.points[r.coarse_points], coarse.points)
    np.testing.assert_array_equal(r.edge_points, edge_set(coarse.cells))
    a, b = r.edge_points[:, 0], r.edge_points[:, 1]
    np.testing.assert_allclose(fine.points[r.midpoints],
                               (coarse.points[a] + coarse.points[b]) / 2, rtol=0, atol=4 * EPS)
    every = np.concatenate([r.coarse_points, r.midpoints])
    np.testing.assert_array_equal(np.sort(every), np.arange(fine.n_points))


def test_children_lie_in_their_parent(coarse):
    # children of cell t are cells 8t .. 8t+7 and use only t's points and the
    # midpoints of t's edges
    fine = coarse.refine()
    r = fine.refinement
    mid = {tuple(e): int(p) for e, p in zip(r.edge_points.tolist(), r.midpoints, strict=True)}
    for t, cell in enumerate(coarse.cells.tolist()):
        own = {int(r.coarse_points[v]) for v in cell}
        own |= {mid[(min(u, v), max(u, v))] for u in cell for v in cell if u < v}
        children = set(fine.cells[8 * t:8 * t + 8].ravel().tolist())
        assert children == own


def test_linear_function_interpolated_exactly(coarse):
    # P1 interpolation of a linear function is the function itself (analytic).
    fine = coarse.refine()
    r = fine.refinement
    g, c = np.array([0.7, -1.3, 2.1]), 0.4
    u = coarse.points @ g + c
    v = np.empty(fine.n_points)
    v[r.coarse_points] = u
    v[r.midpoints] = 0.5 * (u[r.edge_points[:, 0]] + u[r.edge_points[:, 1]])
    np.testing.assert_allclose(v, fine.points @ g + c, rtol=0, atol=64 * EPS)


def test_coarse_mesh_unchanged(coarse):
    points, cells = coarse.points.copy(), coarse.cells.copy()
    fine = coarse.refine()
    fine.refine()
    np.testing.assert_array_equal(coarse.points, points)
    np.testing.assert_array_equal(coarse.cells, cells)
    assert not coarse.cells.flags.writeable


def shapes(points, cells):
    """Sorted edge lengths over the longest, rounded: equal for similar tetrahedra."""
    x = points[cells]
    pairs = [(a, b) for a in range(4) for b in range(a + 1, 4)]
    lengths = np.stack([np.linalg.norm(x[:, a] - x[:, b], axis=1) for a, b in pairs], axis=1)
    lengths.sort(axis=1)
    return np.round(lengths / lengths[:, -1:], 9)


@pytest.mark.parametrize("name", ["regular", "uneven", "cuboid"])
def test_at_most_three_shapes_over_four_levels(name):
    # J. Bey, "Tetrahedral grid refinement", Computing 55 (1995): refined by his
    # rule, the descendants of one tetrahedron fall into at most three congruence
    # classes, over any number of levels.
    mesh = MESHES[name]()
    levels = [mesh]
    for _ in range(4):
        levels.append(levels[-1].refine())
    for root in range(mesh.n_cells):
        seen = set()
        for k, level in enumerate(levels[1:], start=1):
            block = level.cells[root * 8**k:(root + 1) * 8**k]
            seen |= {tuple(s) for s in shapes(level.points, block).tolist()}
        assert len(seen) <= 3, (name, root, len(seen))


@pytest.mark.parametrize("name", ["regular", "uneven", "cuboid", "delaunay"])
def test_quality_bounded_over_four_levels(name):
    # Bey (1995) as above: bounded shape measures; here no worse than half of the
    # first level's (a margin of our own; the classes repeat from level 3 on).
    mesh = MESHES[name]()
    fine = mesh.refine()
    first = fine.quality()
    for _ in range(3 if name != "delaunay" else 2):
        fine = fine.refine()
        q = fine.quality()
        assert q.min_radius_ratio >= 0.5 * first.min_radius_ratio
        assert q.min_dihedral >= 0.5 * first.min_dihedral


def test_orientation_restored_after_history_is_lost():
    # a refined mesh rebuilt from its arrays has no history: Bey's order starts
    # again from the stored order, and the result is still valid and bounded
    fine = checked(*UNEVEN).refine().refine()
    plain = checked(fine.points, fine.cells)
    again = plain.refine()
    assert (volumes(again.points, again.cells) > 0).all()
    checked(again.points, again.cells)


def test_components_match_scipy():
    # scipy.sparse.csgraph.connected_components on the cells' point graph
    a = cuboid(2, 1, 1)
    b = triangulate(np.random.default_rng(5).random((20, 3)) + [3.0, 0.0, 0.0])
    points = np.concatenate([a.points, b.points])
    cells = np.concatenate([a.cells, b.cells + a.n_points])
    fine = checked(points, cells).refine()
    count, labels = fine.components()
    c = fine.cells
    rows = np.repeat(c, 4, axis=1).ravel()
    cols = np.tile(c, (1, 4)).ravel()
    graph = coo_matrix((np.ones(rows.size), (rows, cols)), shape=(fine.n_points,) * 2)
    n_ref, ref = connected_components(graph, directed=False)
    assert count == n_ref == 2
    # same partition: the pairs (ours, scipy's) are one-to-one
    assert len(set(zip(labels.tolist(), ref.tolist(), strict=True))) == n_ref


# -- reordering in 3-D --


def shuffled_cuboid(n=5, seed=1):
    m = cuboid(n, n, n)
    rng = np.random.default_rng(seed)
    order = rng.permutation(m.n_points)
    inv = np.empty_like(order)
    inv[order] = np.arange(order.size)
    return checked(m.points[order], inv[m.cells][rng.permutation(m.n_cells)])


def spans(mesh):
    e = edge_set(mesh.cells)
    return np.abs(e[:, 0] - e[:, 1])


@pytest.mark.parametrize("method", REORDERINGS)
def test_reorder_preserves_tetrahedral_mesh(method):
    m = shuffled_cuboid()
    new, perm = m.reorder(method)
    assert (new.points == m.points[perm.points]).all()
    inv = perm.points_inverse()
    np.testing.assert_array_equal(new.cells, inv[m.cells[perm.triangles]])
    checked(new.points, new.cells)  # still valid and positively oriented, no warnings
    # a shuffled numbering puts neighbours far apart; both orders bring them close
    # (rcm: the largest gap, the bandwidth; hilbert: the typical gap)
    measure = np.max if method == "rcm" else np.mean
    assert measure(spans(new)) < measure(spans(m)) / 3


def test_rcm_matches_scipy_in_3d():
    m = shuffled_cuboid(4)
    _, perm = m.reorder("rcm")
    e = edge_set(m.cells)
    g = coo_matrix((np.ones(len(e)), (e[:, 0], e[:, 1])), shape=(m.n_points,) * 2)
    g = (g + g.T).tocsr()
    # reference library: scipy.sparse.csgraph.reverse_cuthill_mckee
    assert (perm.points == reverse_cuthill_mckee(g, symmetric_mode=True)).all()


@pytest.mark.parametrize("bits", [1, 2, 3, 4])
def test_hilbert_curve_in_space_visits_neighbouring_cells(bits):
    # On a full 2^b x 2^b x 2^b grid a Hilbert curve visits every cell once and
    # steps to a face neighbour each time (D. Hilbert, Math. Ann. 38, 1891; the
    # curve in space as in J. Skilling, AIP Conf. Proc. 707, 2004).
    side = 1 << bits
    grid = np.stack(np.meshgrid(*[np.arange(side)] * 3, indexing="ij"), -1).reshape(-1, 3)
    xyz = grid + 0.5
    keys = hilbert_keys(xyz, bits)
    assert (np.sort(keys) == np.arange(side**3)).all()
    path = xyz[np.argsort(keys)]
    assert (np.abs(np.diff(path, axis=0)).sum(axis=1) == 1).all()
    assert (hilbert_keys(xyz, bits, plain=True) == keys).all()


def test_hilbert_keys_in_space_kernel_equals_numpy_at_full_depth():
    xyz = np.random.default_rng(2).random((4000, 3))
    for bits in (16, 21):
        assert (hilbert_keys(xyz, bits) == hilbert_keys(xyz, bits, plain=True)).all()


def test_hilbert_keys_bad_arguments_in_space():
    xyz = np.zeros((3, 3))
    with pytest.raises(InputError, match="between 1 and 21, got 22; points in 3-D take three bits"):
        hilbert_keys(xyz, 22)
    with pytest.raises(InputError, match=r"shape \(n, 2\) or \(n, 3\), got \(3, 4\)"):
        hilbert_keys(np.zeros((3, 4)))


@pytest.mark.two_threads
def test_hilbert_keys_in_space_same_bits_on_two_threads():
    xyz = np.random.default_rng(4).random((20000, 3))
    with hatkernels.threads(1):
        one = hilbert_keys(xyz)
    with hatkernels.threads(2):
        two = hilbert_keys(xyz)
    np.testing.assert_array_equal(one, two)


def test_unused_points_stay_unused():
    points = np.concatenate([UNEVEN[0], [[5.0, 5.0, 5.0]]])
    with pytest.warns(hatkernels.MeshWarning, match="belong to no"):
        coarse = Mesh(points, UNEVEN[1])
    fine = coarse.refine()
    used = np.bincount(fine.cells.ravel(), minlength=fine.n_points) > 0
    np.testing.assert_array_equal(fine.unused_points(), np.flatnonzero(~used))
    np.testing.assert_array_equal(fine.unused_points(), fine.refinement.coarse_points[[4]])
    np.testing.assert_array_equal(fine.points[fine.unused_points()], [[5.0, 5.0, 5.0]])


@pytest.mark.parametrize("make", [lambda: hatkernels.mesh.cuboid(2, 3, 1),
                                  lambda: hatkernels.mesh.ball(2)],
                         ids=["cuboid", "ball"])
def test_boundary_faces_carried_over_equal_those_found_on_the_fine_mesh(make):
    # the refined mesh takes its boundary faces from the coarse mesh's (four children each);
    # they must be exactly what the face sort of the fine mesh finds (common practice, no source)
    mesh = make()
    for _ in range(2):
        mesh = mesh.refine()
        carried = mesh.boundary_faces()
        found = hatkernels.mesh.Mesh._trusted(mesh.points, mesh.cells).boundary_faces()
        assert carried.dtype == found.dtype and np.array_equal(carried, found)


@pytest.mark.parametrize("times", [1, 2])
def test_a_refined_cuboid_is_the_finer_grid_cut_the_same_way(times):
    # cuboid records which cells it stores swapped against their path through the cube,
    # so refinement starts Bey's rule from the path and the children are Kuhn simplices
    # again: the refined cube's interior stiffness rows are h times the 7-point stencil
    # (6 on the diagonal, -1 to the six axis neighbours, nothing else nonzero), as for
    # cuboid(2^k n) itself (Bey, Computing 55, 1995; stencil: common practice, no source)
    mesh = cuboid(3, 3, 3)
    for _ in range(times):
        mesh = mesh.refine()
    h = 1.0 / (3 * 2**times)
    A = hatkernels.assemble_stiffness(mesh).tocsr()
    inside = np.setdiff1d(np.arange(mesh.n_points), mesh.boundary_points())
    rows = A[inside]
    tol = 64 * EPS * h
    big = np.abs(rows.data) > tol
    counts = np.add.reduceat(big.astype(int), rows.indptr[:-1])
    assert (counts == 7).all()  # the diagonal and six neighbours, the rest zero to round-off
    assert np.abs(A[inside, inside].A1 - 6 * h).max() <= tol
    off = rows.data[big & (rows.data < 0)]
    assert off.size == 6 * inside.size and np.abs(off + h).max() <= tol
