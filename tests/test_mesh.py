"""Mesh validation, topology, generators, refinement, reordering, quality."""

import warnings

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import EPS, jittered_mesh, meshes
from hypothesis import given
from hypothesis import strategies as st

import hatkernels
from hatkernels import Mesh, MeshError, MeshWarning
from hatkernels.mesh import disk, hilbert_keys, l_shape, rectangle, triangulate

SQUARE = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
TWO = np.array([[0, 1, 2], [0, 2, 3]])


#: Round-off of a sum of a few hundred areas or lengths, relative: a wrong triangle
#: or edge changes the total by far more.
SUMS = 64 * EPS


def checked(points, cells):
    """``Mesh(points, cells)`` failing on any warning: arrays that need no repair."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        return Mesh(points, cells)


def shoelace_area(points, boundary_edges):
    """Area enclosed by oriented boundary edges (Green's theorem; common practice, no source)."""
    a, b = points[boundary_edges[:, 0]], points[boundary_edges[:, 1]]
    return 0.5 * np.sum(a[:, 0] * b[:, 1] - b[:, 0] * a[:, 1])


# -- validation --


@pytest.mark.parametrize(
    "points, triangles, message",
    [
        (SQUARE[:, :1], TWO, r"points must have shape \(n_points, 2\), got shape \(4, 1\)"),
        (SQUARE.astype(complex), TWO, "real floating-point"),
        (SQUARE.astype(str), TWO, "real floating-point"),
        (np.empty((0, 2)), TWO, "points is empty"),
        (SQUARE, TWO[:, :2], r"triangles must have shape \(n_triangles, 3\)"),
        (SQUARE, TWO.astype(float), "integer array"),
        (SQUARE, np.empty((0, 3), dtype=int), "triangles is empty"),
        (SQUARE, [[0, 1, 2], [0, 2, 4]], "triangle 1 refers to point 4, but there are only 4"),
        (SQUARE, [[0, 1, 2], [0, -2, 3]], "triangle 1 has a negative point index"),
        (SQUARE, [[0, 1, 2], [0, 3, 3]], r"triangle 1 repeats a vertex \[0, 3, 3\]"),
        (
            np.r_[SQUARE, [[2.0, 0.0]]],
            [[0, 1, 4], [0, 2, 3]],
            r"triangle 0 has zero area \(points 0, 1, 4 are collinear\)",
        ),
        (
            np.r_[SQUARE, [[1.0, 1.0]]],
            [[0, 1, 2], [0, 2, 3], [1, 2, 4]],
            "points 2 and 4 coincide",
        ),
        (SQUARE, [[0, 1, 2], [0, 2, 3], [2, 0, 1]], r"triangles 0 and 2 are duplicates"),
        (SQUARE, [[0, 1, 2], [0, 2, 3], [0, 1, 3]], "overlap"),
    ],
)
def test_bad_mesh_is_named(points, triangles, message):
    # refused with the error alone: no warning before it (MeshWarning is an error in
    # the test configuration, and none of these needs a repair before the check fails)
    with pytest.raises(MeshError, match=message):
        checked(points, triangles)


def test_mesh_warnings_are_errors_in_the_tests():
    # pyproject.toml's filterwarnings makes the library's MeshWarning an error, so a
    # test that makes one without expecting it (pytest.warns) fails
    with pytest.raises(MeshWarning, match="clockwise"):
        Mesh(SQUARE, TWO[:, [0, 2, 1]])


@pytest.mark.parametrize("value", [np.nan, np.inf, -np.inf])
def test_non_finite_point_is_named(value):
    p = SQUARE.copy()
    p[2, 1] = value
    with pytest.raises(MeshError, match=rf"point 2 has a non-finite coordinate \(1.0, {value!r}\)"):
        Mesh(p, TWO)


def test_near_zero_area_is_relative_to_edge_lengths():
    # a needle of relative height 1e-6 is fine; 1e-14 is collinear to round-off
    for h, ok in [(1e-6, True), (1e-14, False)]:
        p = np.array([[0.0, 0.0], [1.0, 0.0], [0.5, h]]) * 1e5
        if ok:
            Mesh(p, [[0, 1, 2]])
        else:
            with pytest.raises(MeshError, match="near-zero area"):
                Mesh(p, [[0, 1, 2]])


def test_edge_shared_by_three_triangles_is_rejected():
    p = np.array([[0.0, 0.0], [1.0, 0.0], [0.5, 1.0], [0.5, -1.0], [0.6, 2.0]])
    with pytest.raises(MeshError, match="shared by more than two"):
        Mesh(p, [[0, 1, 2], [1, 0, 3], [0, 1, 4]])


def test_clockwise_triangles_are_reoriented_in_a_copy():
    t = np.array([[0, 2, 1], [0, 2, 3]])  # the first is clockwise
    before_t, before_p = t.copy(), SQUARE.copy()
    with pytest.warns(MeshWarning, match="1 of 2 triangles were clockwise"):
        m = Mesh(SQUARE, t)
    assert (t == before_t).all() and (SQUARE == before_p).all()
    assert (m.areas() > 0).all()
    assert not m.triangles.flags.writeable and not m.points.flags.writeable


def test_unused_points_are_reported():
    p = np.r_[SQUARE, [[5.0, 5.0]]]
    with pytest.warns(MeshWarning, match="1 of 5 points belong to no triangle"):
        m = Mesh(p, TWO)
    assert m.unused_points().tolist() == [4]


def test_index_dtypes():
    m = checked(SQUARE.astype(np.float32), TWO.astype(np.uint16))
    assert m.points.dtype == np.float64 and m.triangles.dtype == np.int32


# -- topology --


@given(meshes())
def test_topology_of_random_meshes(m):
    e = m.edges()
    assert (e[:, 0] < e[:, 1]).all()
    assert len(np.unique(e, axis=0)) == len(e)
    # Euler's formula for a simply connected planar mesh: V - E + F = 1
    assert m.n_points - len(e) + m.n_triangles == 1
    b = m.boundary_edges()
    # every triangle has 3 edges, interior edges are counted twice
    assert 3 * m.n_triangles == 2 * len(e) - len(b)
    # oriented with the domain on the left: Green's theorem gives the area
    assert shoelace_area(m.points, b) == pytest.approx(1.0, rel=SUMS, abs=0)
    on_box = np.isclose(m.points, 0).any(axis=1) | np.isclose(m.points, 1).any(axis=1)
    assert set(m.boundary_points().tolist()) == set(np.flatnonzero(on_box).tolist())
    # triangle_edges: the edge opposite vertex c joins the other two
    te = m.triangle_edges()
    for c in range(3):
        pair = np.sort(m.triangles[:, [(c + 1) % 3, (c + 2) % 3]], axis=1)
        assert (e[te[:, c]] == pair).all()


def test_topology_with_a_hole():
    outer = rectangle(6, 6, bounds=(-1, 1, -1, 1))
    c = outer.points[outer.triangles].mean(axis=1)
    keep = ~((np.abs(c) < 1 / 3).all(axis=1))
    with pytest.warns(MeshWarning, match="belong to no triangle"):
        m = Mesh(outer.points, outer.triangles[keep])
    b = m.boundary_edges()
    # outer boundary counterclockwise (area 4) and hole clockwise (area -(2/3)^2)
    assert shoelace_area(m.points, b) == pytest.approx(4 - 4 / 9, rel=SUMS, abs=0)
    # the hole [-1/3, 1/3]^2 leaves its centre point in no triangle
    assert m.points[m.unused_points()].tolist() == [[0.0, 0.0]]


def test_h_is_the_longest_edge():
    # edges by hand (elementary geometry): a 3-4-5 triangle and a neighbour across
    # its side of length 4, whose other sides are sqrt(13) and sqrt(5)
    p = np.array([[0.0, 0.0], [3.0, 0.0], [0.0, 4.0], [-2.0, 1.0]])
    assert checked(p, [[0, 1, 2], [0, 2, 3]]).h() == 5.0
    # without the first triangle the side of length 5 is gone (point 1 is in none)
    with pytest.warns(MeshWarning, match="belong to no triangle"):
        assert Mesh(p, [[0, 2, 3]]).h() == 4.0
    # a 4 x 2 grid of the unit square: cells 1/4 by 1/2, the diagonal sqrt(5)/4 longest;
    # refinement halves every edge
    m = rectangle(4, 2)
    assert m.h() == pytest.approx(np.sqrt(5) / 4, rel=2 * EPS, abs=0)
    assert m.refine().h() == pytest.approx(np.sqrt(5) / 8, rel=2 * EPS, abs=0)
    assert checked(SQUARE, TWO).h() == pytest.approx(np.sqrt(2), rel=2 * EPS, abs=0)


# -- generators --


@pytest.mark.parametrize("split", hatkernels.mesh.SPLITS)
def test_rectangle(split):
    m = rectangle(5, 3, bounds=(1.0, 3.0, -1.0, 0.5), split=split)
    again = checked(m.points, m.triangles)  # passes every check, no warnings
    assert (again.triangles == m.triangles).all()
    assert m.areas().sum() == pytest.approx(3.0, rel=SUMS, abs=0)
    per_cell = 4 if split == "quartered" else 2
    assert m.n_triangles == per_cell * 15
    assert len(m.boundary_edges()) == 16
    assert m.boundary_length() == pytest.approx(7.0, rel=SUMS, abs=0)


def test_rectangle_numbering_and_bad_arguments():
    m = rectangle(3, 2)
    assert m.points[2 * 4 + 1].tolist() == pytest.approx([1 / 3, 1.0], rel=2 * EPS, abs=0)
    with pytest.raises(hatkernels.InputError, match="nx must be >= 1, got 0"):
        rectangle(0, 2)
    with pytest.raises(hatkernels.InputError, match="ny must be an integer, got 2.5"):
        rectangle(2, 2.5)
    with pytest.raises(hatkernels.InputError, match="x0 < x1"):
        rectangle(2, 2, bounds=(1, 0, 0, 1))
    with pytest.raises(hatkernels.InputError, match="unknown split"):
        rectangle(2, 2, split="up")


def test_l_shape():
    m = l_shape(4)
    checked(m.points, m.triangles)
    assert m.areas().sum() == pytest.approx(3.0, rel=SUMS, abs=0)
    assert m.n_triangles == 6 * 16
    c = m.points[m.triangles].mean(axis=1)
    assert not ((c[:, 0] > 0) & (c[:, 1] < 0)).any()
    assert shoelace_area(m.points, m.boundary_edges()) == pytest.approx(3.0, rel=SUMS, abs=0)


@pytest.mark.parametrize("n", [1, 2, 7])
def test_disk(n):
    r = 2.5
    m = disk(n, radius=r, center=(1.0, -1.0))
    checked(m.points, m.triangles)
    assert m.n_triangles == 6 * n * n and m.n_points == 3 * n * (n + 1) + 1
    b = m.boundary_points()
    assert np.abs(np.linalg.norm(m.points[b] - [1.0, -1.0], axis=1) - r).max() <= 8 * EPS * r
    # area of the inscribed regular 6n-gon: (1/2) k r^2 sin(2 pi / k) (elementary geometry)
    k = 6 * n
    assert m.areas().sum() == pytest.approx(0.5 * k * r * r * np.sin(2 * np.pi / k), rel=SUMS, abs=0)
    assert m.quality().min_angle > 40


def test_disk_and_hilbert_bad_arguments():
    with pytest.raises(hatkernels.InputError, match="radius must be > 0, got -1"):
        disk(2, radius=-1)
    with pytest.raises(hatkernels.InputError, match="radius must be a finite number, got inf"):
        disk(2, radius=np.inf)
    with pytest.raises(hatkernels.InputError, match="center must be a pair"):
        disk(2, center=(0.0, 1.0, 2.0))
    with pytest.raises(hatkernels.InputError, match="n must be an integer, got True"):
        disk(True)
    with pytest.raises(hatkernels.InputError, match="bits must be between 1 and 31, got 32"):
        hilbert_keys(SQUARE, 32)
    with pytest.raises(hatkernels.InputError, match="bits must be an integer, got 4.0"):
        hilbert_keys(SQUARE, 4.0)


def test_triangulate_with_inside_and_errors():
    g = rectangle(6, 6, bounds=(-1, 1, -1, 1)).points
    with pytest.warns(MeshWarning, match="9 of 49 points belong to no triangle"):
        m = triangulate(g, inside=lambda x, y: ~((x > 0) & (y < 0)))
    assert m.areas().sum() == pytest.approx(3.0, rel=SUMS, abs=0)
    with pytest.raises(hatkernels.InputError, match="cannot be triangulated"):
        triangulate([[0, 0], [1, 1], [2, 2], [3, 3]])
    with pytest.raises(MeshError, match="non-finite"):
        triangulate([[0, 0], [1, 0], [np.inf, 1]])


# -- refinement --


@given(meshes(max_n=5))
def test_refine_is_nested_and_consistent(m):
    f = m.refine()
    e = m.edges()
    assert f.n_points == m.n_points + len(e) and f.n_triangles == 4 * m.n_triangles
    r = f.refinement
    assert (f.points[r.coarse_points] == m.points).all()
    assert r.coarse is m and (r.edge_points == e).all()
    # halving is exact in binary: the midpoints to the last bit
    assert np.array_equal(f.points[r.midpoints], 0.5 * (m.points[e[:, 0]] + m.points[e[:, 1]]))
    # every fine point is a coarse point or a midpoint, once
    assert (np.sort(np.r_[r.coarse_points, r.midpoints]) == np.arange(f.n_points)).all()
    # each child has a quarter of its parent's area, and is counterclockwise
    assert np.abs(f.areas().reshape(-1, 4) - m.areas()[:, None] / 4).max() <= (
        8 * EPS * m.areas().max()
    )
    # the carried-over boundary equals the one computed from scratch, and the
    # refined arrays pass every check of a new mesh, with no warning
    fresh = checked(f.points, f.triangles)
    assert (fresh.boundary_edges() == f.boundary_edges()).all()
    assert (fresh.edges() == f.edges()).all()
    assert f.levels() == [m, f]


def test_refine_leaves_the_coarse_cache_as_it_was_but_for_the_edges():
    m = rectangle(3, 3)
    assert m.cached() == frozenset()
    m.refine()
    # the edges are kept (the refinement holds them anyway); the boundary and the
    # unused points were needed to carry them over
    assert m.cached() == {"edges", "boundary_edges", "unused"}
    m.triangle_edges()
    m.refine()  # what was there before stays
    assert {"incidence", "triangle_edges"} <= m.cached()


def test_forget_drops_only_the_cache():
    m = jittered_mesh(5, 3)
    points, cells = m.points, m.triangles
    edges, boundary = m.edges().copy(), m.boundary_points().copy()
    m.forget("edges", "boundary_points", "areas")  # areas was not cached: ignored
    assert "edges" not in m.cached() and "boundary_points" not in m.cached()
    assert m.points is points and m.triangles is cells  # the mesh itself is untouched
    assert (m.edges() == edges).all() and (m.boundary_points() == boundary).all()
    assert {"edges", "boundary_points"} <= m.cached()
    m.forget(*m.cached())
    assert m.cached() == frozenset()
    assert (m.unused_points() == []).all()
    with pytest.raises(hatkernels.InputError, match="'points' is not a cached array"):
        m.forget("points")


def test_refine_and_reorder_refuse_what_is_not_a_mesh():
    with pytest.raises(hatkernels.InputError, match="refine needs a hatkernels.Mesh, got list"):
        hatkernels.mesh.refine([SQUARE, TWO])
    with pytest.raises(hatkernels.InputError, match="reorder needs a hatkernels.Mesh, got tuple"):
        hatkernels.mesh.reorder((SQUARE, TWO))


def test_refine_twice_keeps_history():
    m = rectangle(2, 2)
    f = m.refine().refine()
    assert [lvl.n_triangles for lvl in f.levels()] == [8, 32, 128]
    assert f.quality().min_angle == pytest.approx(45.0, rel=SUMS, abs=0)


# -- reordering --


def edge_spans(mesh):
    e = mesh.edges()
    return np.abs(e[:, 0] - e[:, 1])


@pytest.mark.parametrize("method", hatkernels.mesh.REORDERINGS)
def test_reorder_preserves_the_mesh(method):
    m = jittered_mesh(12, 7, shuffle=True)
    new, perm = m.reorder(method)
    assert (new.points == m.points[perm.points]).all()
    # the same triangles, their vertices perhaps in another (cyclic) order
    assert np.abs(new.areas() - m.areas()[perm.triangles]).max() <= 8 * EPS * m.areas().max()
    inv = perm.points_inverse()
    assert (
        np.sort(new.triangles, axis=1) == np.sort(inv[m.triangles[perm.triangles]], axis=1)
    ).all()
    checked(new.points, new.triangles)  # still valid and counterclockwise, no warnings
    # a shuffled numbering puts neighbours far apart; both orders bring them close
    # (rcm: the largest gap, the bandwidth; hilbert: the typical gap)
    measure = np.max if method == "rcm" else np.mean
    assert measure(edge_spans(new)) < measure(edge_spans(m)) / 3


def test_rcm_matches_scipy_bandwidth():
    m = jittered_mesh(10, 3, shuffle=True)
    new, perm = m.reorder("rcm")
    e = m.edges()
    g = sp.coo_matrix((np.ones(len(e)), (e[:, 0], e[:, 1])), shape=(m.n_points,) * 2)
    g = (g + g.T).tocsr()
    # reference library: scipy.sparse.csgraph.reverse_cuthill_mckee
    ref = sp.csgraph.reverse_cuthill_mckee(g, symmetric_mode=True)
    assert (perm.points == ref).all()


@given(st.integers(1, 6))
def test_hilbert_curve_visits_neighbouring_cells(bits):
    # On a full 2^b x 2^b grid a Hilbert curve steps to an edge neighbour each
    # time (D. Hilbert, Ueber die stetige Abbildung einer Linie auf ein
    # Flaechenstueck, Math. Ann. 38, 1891).
    side = 1 << bits
    i, j = np.meshgrid(np.arange(side), np.arange(side))
    xy = np.column_stack([i.ravel(), j.ravel()]) + 0.5
    keys = hilbert_keys(xy, bits)
    assert (np.sort(keys) == np.arange(side * side)).all()
    path = xy[np.argsort(keys)]
    assert (np.abs(np.diff(path, axis=0)).sum(axis=1) == 1).all()
    assert (hilbert_keys(xy, bits, plain=True) == keys).all()


# -- quality --


def test_quality_of_known_triangles():
    # equilateral: 60 degrees, circumradius twice the inradius (elementary geometry);
    # the rounded sqrt(3)/2 and arccos allow a few units of round-off
    q = Mesh([[0, 0], [1, 0], [0.5, np.sqrt(3) / 2]], [[0, 1, 2]]).quality()
    assert q.min_angle == pytest.approx(60, rel=SUMS, abs=0) and q.max_angle == pytest.approx(60, rel=SUMS, abs=0)
    assert q.max_aspect == pytest.approx(1.0, rel=SUMS, abs=0)
    q = rectangle(3, 3).quality()
    assert (q.min_angle, q.max_angle) == pytest.approx((45, 90), rel=SUMS, abs=0)
    # right isosceles: R = c/2, r = (a + b - c)/2 (elementary geometry)
    assert q.max_aspect == pytest.approx((np.sqrt(2) / 2) / (2 - np.sqrt(2)), rel=SUMS, abs=0)
    assert "triangles" in str(q)
