"""Tetrahedral meshes: validation, faces, quality, and the generators cuboid, ball, triangulate."""

import warnings

import numpy as np
import pytest
from conftest import EPS
from hypothesis import given
from hypothesis import strategies as st
from scipy.spatial import ConvexHull, Delaunay

from hatkernels import InputError, Mesh, MeshError, MeshWarning
from hatkernels.mesh import ball, cuboid, rectangle, triangulate

#: Round-off of a sum of a few thousand volumes or areas, relative.
SUMS = 256 * EPS

CORNER = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
REGULAR = np.array([[1.0, 1.0, 1.0], [1.0, -1.0, -1.0], [-1.0, 1.0, -1.0], [-1.0, -1.0, 1.0]])


def checked(points, cells):
    """``Mesh(points, cells)`` failing on any warning: arrays that need no repair."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        return Mesh(points, cells)


def six_det(points, cells):
    """Six signed volumes by numpy's determinant (the test's own, not the library's)."""
    x = points[cells]
    return np.linalg.det(x[:, 1:] - x[:, :1])


def face_counts(cells):
    """Sorted face triples and how many cells have each, by numpy alone."""
    faces = np.concatenate([np.delete(cells, a, axis=1) for a in range(4)])
    return np.unique(np.sort(faces, axis=1), axis=0, return_counts=True)


def edge_count(cells):
    pairs = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]
    edges = np.concatenate([cells[:, list(p)] for p in pairs])
    return len(np.unique(np.sort(edges, axis=1), axis=0))


def enclosed_volume(points, faces):
    """Volume enclosed by outward triangles: the divergence theorem with the field x / 3,
    sum of x0 . (x1 x x2) / 6 (common practice, no source)."""
    x = points[faces]
    return np.einsum("ij,ij->", x[:, 0], np.cross(x[:, 1], x[:, 2])) / 6


def random_points(seed, n):
    return np.random.default_rng(seed).random((n, 3))


# -- validation --

TWO = np.r_[CORNER, [[0.0, 0.0, -1.0], [0.2, 0.2, 0.5]]]  # 4 below the face (0,1,2), 5 above


@pytest.mark.parametrize(
    "points, cells, message",
    [
        (CORNER[:, :1], [[0, 1, 2, 3]], r"points must have shape \(n_points, 2\), got shape \(4, 1\)"),
        (CORNER.astype(complex), [[0, 1, 2, 3]], "real floating-point"),
        (CORNER, [[0, 1, 2]], r"tetrahedra must have shape \(n_tetrahedra, 4\), got shape \(1, 3\)"),
        (CORNER, [[0.0, 1, 2, 3]], "integer array"),
        (CORNER, np.empty((0, 4), dtype=int), "tetrahedra is empty"),
        (CORNER, [[0, 1, 2, 4]], "tetrahedron 0 refers to point 4, but there are only 4"),
        (CORNER, [[0, 1, 2, 3], [0, -1, 2, 3]], "tetrahedron 1 has a negative point index"),
        (CORNER, [[0, 1, 2, 3], [0, 1, 3, 3]], r"tetrahedron 1 repeats a vertex \[0, 1, 3, 3\]"),
        (np.r_[CORNER, [[1.0, 1.0, 0.0]]], [[0, 1, 2, 3], [1, 4, 2, 0]],
         r"tetrahedron 1 has zero volume \(points 1, 4, 2, 0 are coplanar\)"),
        (np.r_[CORNER, [[1.0, 1.0, 1e-14]]], [[0, 1, 2, 3], [0, 1, 4, 2]],
         r"tetrahedron 1 has near-zero volume \(6 \|V\| / \(longest edge\)\*\*3 = 3\.5e-15"),
        (np.r_[CORNER, [[1.0, 0.0, 0.0]]], [[0, 1, 2, 3], [0, 2, 3, 4], [1, 4, 2, 3]],
         r"tetrahedron 2 has zero volume \(points 1 and 4 coincide at \(1.0, 0.0, 0.0\)\)"),
        (TWO, [[0, 1, 2, 3], [0, 2, 1, 4], [1, 2, 0, 3]],
         r"tetrahedra 0 and 2 are duplicates \(points \[0, 1, 2, 3\]\)"),
        (TWO, [[0, 1, 2, 3], [0, 1, 2, 5]],
         r"tetrahedra 0 and 1 lie on the same side of their shared face \(0, 1, 2\): they overlap"),
        (TWO, [[0, 1, 2, 3], [0, 2, 1, 4], [0, 1, 2, 5]],
         r"face \(0, 1, 2\) is shared by 3 tetrahedra \(0, 1, 2\)"),
    ],
)
def test_bad_tetrahedra_are_named(points, cells, message):
    with pytest.raises(MeshError, match=message):
        checked(np.asarray(points), cells)


@pytest.mark.parametrize("value", [np.nan, np.inf, -np.inf])
def test_non_finite_point_is_named(value):
    p = CORNER.copy()
    p[2, 2] = value
    with pytest.raises(MeshError, match=rf"point 2 has a non-finite coordinate \(0.0, 1.0, {value!r}\)"):
        Mesh(p, [[0, 1, 2, 3]])


def test_near_zero_volume_is_relative_to_the_edges():
    # a flat tetrahedron of relative height 1e-6 is fine at any scale; 1e-14 is coplanar
    # to round-off
    for h, ok in [(1e-6, True), (1e-14, False)]:
        p = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.3, 0.3, h]]) * 1e5
        if ok:
            checked(p, [[0, 1, 2, 3]])
        else:
            with pytest.raises(MeshError, match="near-zero volume"):
                checked(p, [[0, 1, 2, 3]])


@pytest.mark.parametrize("scale, word", [(1e-120, "small"), (1e120, "large")])
def test_coordinates_beyond_float64_are_refused_as_scale(scale, word):
    with pytest.raises(MeshError, match=f"coordinates too {word} to represent volumes"):
        Mesh(CORNER * scale, [[0, 1, 2, 3]])


def test_negative_tetrahedra_are_reoriented_in_a_copy():
    m0 = cuboid(2)
    cells = m0.cells.astype(np.int64)
    cells[::3, [1, 2]] = cells[::3, [2, 1]]  # every third one negative
    before_c, before_p = cells.copy(), m0.points.copy()
    with pytest.warns(MeshWarning, match="16 of 48 tetrahedra were negatively oriented"):
        m = Mesh(m0.points, cells)
    assert (cells == before_c).all() and (m0.points == before_p).all()
    assert (six_det(m.points, m.cells) > 0).all()
    # the same tetrahedra, only two vertices swapped back
    assert (np.sort(m.cells, axis=1) == np.sort(cells, axis=1)).all()
    assert not m.cells.flags.writeable and not m.points.flags.writeable
    assert m.tetrahedra is m.cells and m.cells.dtype == np.int32 and m.points.dtype == np.float64


def test_unused_points_are_reported():
    with pytest.warns(MeshWarning, match="1 of 5 points belong to no tetrahedron"):
        m = Mesh(np.r_[CORNER, [[5.0, 5.0, 5.0]]], [[0, 1, 2, 3]])
    assert m.unused_points().tolist() == [4]
    assert m.boundary_points().tolist() == [0, 1, 2, 3]


def test_triangle_only_parts_are_refused_on_tetrahedra():
    m = cuboid(1)
    for call in (lambda: m.edges(), m.triangle_edges, m.boundary_edges,
                 m.areas, m.boundary_length, lambda: m.triangles, lambda: m.n_triangles):
        with pytest.raises(InputError, match="not available for tetrahedra"):
            call()
    flat = rectangle(1, 1)
    for call in (lambda: flat.tetrahedra, flat.faces, flat.boundary_faces, flat.volumes):
        with pytest.raises(InputError, match="not available for triangles"):
            call()


# -- cuboid --


@pytest.mark.parametrize("n", [1, 2, 4])
def test_cuboid_counts_and_volume(n):
    m = cuboid(n, n, n, bounds=(-1.0, 2.0, 0.0, 0.5, 1.0, 3.0))
    again = checked(m.points, m.cells)  # every check passes, no warning
    assert (again.cells == m.cells).all()
    assert m.dim == 3 and m.n_cells == 6 * n**3 and m.n_points == (n + 1) ** 3
    # box volume 3 * 0.5 * 2 (elementary geometry)
    assert m.measures().sum() == pytest.approx(3.0, rel=SUMS, abs=0)
    assert (six_det(m.points, m.cells) > 0).all()
    # two triangles per square on each of the six sides (common practice, no source)
    assert len(m.boundary_faces()) == 2 * 6 * n * n
    assert len(m.boundary_points()) == (n + 1) ** 3 - (n - 1) ** 3
    # the boundary, outward, encloses the box
    assert enclosed_volume(m.points, m.boundary_faces()) == pytest.approx(3.0, rel=SUMS, abs=0)
    # the longest edge is a cube's main diagonal (elementary geometry)
    assert m.h() == pytest.approx(np.sqrt(9 + 0.25 + 4) / n, rel=4 * EPS, abs=0)


def test_cuboid_is_conforming():
    # by numpy alone: a face of a single cell is on the surface of the box; a face
    # inside is shared by exactly two cells (any mismatch across cubes would leave
    # faces inside the box that only one cell has)
    m = cuboid(3, 2, 4, bounds=(0.0, 3.0, 0.0, 2.0, 0.0, 4.0))
    faces, counts = face_counts(m.cells)
    assert set(counts.tolist()) == {1, 2}
    x = m.points[faces[counts == 1]]
    on_side = np.zeros(len(x), dtype=bool)
    for axis, top in ((0, 3.0), (1, 2.0), (2, 4.0)):
        on_side |= (x[:, :, axis] == 0).all(axis=1) | (x[:, :, axis] == top).all(axis=1)
    assert on_side.all()
    assert (m.faces() == faces).all()
    assert len(m.boundary_faces()) == (counts == 1).sum() == 2 * 2 * (6 + 8 + 12)


def test_cuboid_numbering_and_diagonals():
    m = cuboid(2, 3, 4)
    assert m.points[(3 * 4 + 2) * 3 + 1].tolist() == pytest.approx([0.5, 2 / 3, 0.75], rel=2 * EPS)
    # the six tetrahedra of cube 0 all hold its lowest and highest corners
    lo, hi = 0, (1 * 4 + 1) * 3 + 1
    assert all({lo, hi} <= set(c) for c in m.cells[:6].tolist())
    with pytest.raises(InputError, match="nz must be >= 1, got 0"):
        cuboid(2, 2, 0)
    with pytest.raises(InputError, match="z0 < z1"):
        cuboid(2, bounds=(0, 1, 0, 1, 1, 1))
    with pytest.raises(InputError, match="six numbers"):
        cuboid(2, bounds=(0, 1, 0, 1))


# -- faces, Euler --


def euler(m):
    """V - E + F - C, all counted with numpy."""
    faces, _ = face_counts(m.cells)
    return m.n_points - edge_count(m.cells) + len(faces) - m.n_cells


@pytest.mark.parametrize("make", [lambda: cuboid(3, 2, 2), lambda: ball(2),
                                  lambda: triangulate(random_points(3, 40))])
def test_euler_characteristic_of_a_ball(make):
    # V - E + F - C = 1 for a mesh of a ball (Euler's formula; common practice, no source)
    m = make()
    assert euler(m) == 1
    faces, counts = face_counts(m.cells)
    assert (m.faces() == faces).all()
    # the face opposite vertex a is made of the other three
    cf = m.cell_faces()
    for a in range(4):
        assert (m.faces()[cf[:, a]] == np.sort(np.delete(m.cells, a, axis=1), axis=1)).all()
    b = m.boundary_faces()
    assert (np.sort(b, axis=1) == faces[counts == 1]).all()
    assert enclosed_volume(m.points, b) == pytest.approx(m.measures().sum(), rel=SUMS, abs=0)
    assert m.components()[0] == 1


def test_two_parts_are_two_components():
    a = cuboid(1)
    p = np.r_[a.points, a.points + 5.0]
    m = checked(p, np.r_[a.cells, a.cells + 8])
    count, labels = m.components()
    assert count == 2 and labels.tolist() == [0] * 8 + [1] * 8
    assert euler(m) == 2  # two balls


# -- ball --


@pytest.mark.parametrize("n", [1, 2, 3])
def test_ball_points_on_the_sphere(n):
    r, c = 2.5, np.array([1.0, -1.0, 0.5])
    m = ball(n, radius=r, center=c)
    checked(m.points, m.cells)  # positively oriented, nowhere flat, conforming
    assert m.n_cells == 48 * n**3 and m.n_points == (2 * n + 1) ** 3
    b = m.boundary_points()
    assert len(b) == (2 * n + 1) ** 3 - (2 * n - 1) ** 3
    assert np.abs(np.linalg.norm(m.points[b] - c, axis=1) - r).max() <= 8 * EPS * r
    assert (six_det(m.points, m.cells) > 0).all()


def test_ball_volume_approaches_the_sphere_from_below():
    # 4/3 pi R^3 (analytic); every cell lies in the ball, so from below, and the error
    # of an inscribed polyhedron shrinks as h^2 (value from memory): by about 4 a halving
    exact = 4 / 3 * np.pi * 2.0**3
    errors = [exact - ball(n, radius=2.0).measures().sum() for n in (1, 2, 4, 8)]
    assert all(e > 0 for e in errors)
    assert all(b < 0.33 * a for a, b in zip(errors, errors[1:], strict=False))


# -- Delaunay --


@given(st.integers(0, 2**32 - 1), st.integers(5, 60))
def test_delaunay_of_random_points_is_scipys(seed, n):
    p = random_points(seed, n)
    m = triangulate(p)
    ref = Delaunay(p).simplices  # reference library: scipy.spatial.Delaunay
    assert (np.sort(m.cells, axis=1) == np.sort(ref, axis=1)).all()
    assert (six_det(m.points, m.cells) > 0).all()
    # it fills the convex hull (reference library: scipy.spatial.ConvexHull)
    assert m.measures().sum() == pytest.approx(ConvexHull(p).volume, rel=SUMS, abs=0)
    checked(m.points, m.cells)


def test_delaunay_slivers_dropped_on_the_hull_and_refused_inside():
    grid = cuboid(2).points
    p = grid[[0, 2, 4, 7, 9, 11, 13, 17, 18, 20, 23, 26]]
    sliver = np.abs(six_det(p, Delaunay(p).simplices)) < 1e-12
    assert sliver.sum() == 1  # scipy's own output has one flat tetrahedron here
    with pytest.warns(MeshWarning, match="dropped 1 flat tetrahedra"):
        m = triangulate(p)
    assert m.n_cells == len(sliver) - 1
    assert m.measures().sum() == pytest.approx(ConvexHull(p).volume, rel=SUMS, abs=0)
    _, counts = face_counts(m.cells)
    assert counts.max() == 2
    with pytest.raises(MeshError, match="dropping them would leave the mesh non-conforming"):
        triangulate(cuboid(3).points)
    with pytest.raises(InputError, match="cannot be tetrahedralised"):
        triangulate(np.c_[random_points(1, 10)[:, :2], np.zeros(10)])
    with pytest.raises(InputError, match="at least 4 points"):
        triangulate(CORNER[:3])


def test_delaunay_inside():
    p = cuboid(4).points + 1e-3 * random_points(7, 125)  # off the grid: no slivers
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MeshWarning)  # the cut leaves points in no cell
        m = triangulate(p, inside=lambda x, y, z: z < 0.5)
    c = m.points[m.cells].mean(axis=1)
    assert (c[:, 2] < 0.5).all() and m.n_cells > 0
    with pytest.raises(InputError, match="inside"):
        triangulate(p, inside=lambda x, y, z: True)


# -- quality --


def test_quality_of_known_tetrahedra():
    # regular: radius ratio 1, every dihedral angle arccos(1/3) (analytic)
    q = checked(REGULAR, [[0, 2, 1, 3]]).quality()  # [0, 1, 2, 3] is negative
    angle = np.degrees(np.arccos(1 / 3))
    assert q.min_dihedral == pytest.approx(angle, rel=SUMS) and q.max_dihedral == pytest.approx(angle, rel=SUMS)
    assert q.min_radius_ratio == pytest.approx(1.0, rel=SUMS, abs=0)
    assert q.min_volume == pytest.approx(8 / 3, rel=SUMS, abs=0)
    # the corner tetrahedron: r = 1 / (3 + sqrt 3), R = sqrt(3) / 2, so 3 r / R = sqrt(3) - 1;
    # dihedral angles 90 (three) and arctan(sqrt 2) (elementary geometry)
    q = checked(CORNER, [[0, 1, 2, 3]]).quality()
    assert q.min_radius_ratio == pytest.approx(np.sqrt(3) - 1, rel=SUMS, abs=0)
    assert q.max_dihedral == pytest.approx(90, rel=SUMS)
    assert q.min_dihedral == pytest.approx(np.degrees(np.arctan(np.sqrt(2))), rel=SUMS)
    assert "tetrahedra" in str(q)


# -- random meshes, random corruptions --


@given(st.integers(0, 2**32 - 1), st.integers(0, 7), st.data())
def test_random_corruption_is_named(seed, kind, data):
    rng = np.random.default_rng(seed)
    p = rng.random((30, 3))
    cells = np.sort(Delaunay(p).simplices, axis=1).astype(np.int64)  # about half negative
    c = data.draw(st.integers(0, len(cells) - 1))
    a = data.draw(st.integers(0, 3))
    expect = {
        0: "non-finite", 1: "refers to point", 2: "negative point index",
        3: "repeats a vertex", 4: "duplicates", 5: "zero volume", 6: "same side|shared by",
        7: None,
    }[kind]
    if kind == 0:
        p[cells[c, a], a % 3] = np.nan
    elif kind == 1:
        cells[c, a] = len(p)
    elif kind == 2:
        cells[c, a] = -1
    elif kind == 3:
        cells[c, a] = cells[c, (a + 1) % 4]
    elif kind == 4:
        cells = np.r_[cells, cells[c:c + 1, ::-1]]
    elif kind == 5:  # its vertex a moved into the plane of the other three
        x = p[np.delete(cells[c], a)]
        w = rng.random(3)
        p[cells[c, a]] = (w / w.sum()) @ x
    elif kind == 6:  # a copy of a cell with one vertex moved away from its face: overlap
        face = p[np.delete(cells[c], a)].mean(axis=0)
        p = np.r_[p, (p[cells[c, a]] + 0.1 * (p[cells[c, a]] - face))[None]]
        new = cells[c].copy()
        new[a] = len(p) - 1
        cells = np.r_[cells, new[None]]
    before = (p.copy(), cells.copy())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MeshWarning)
        if expect is None:  # untouched: valid once reoriented
            m = Mesh(p, cells)
            assert (six_det(m.points, m.cells) > 0).all() and m.n_cells == len(cells)
        else:
            with pytest.raises(MeshError, match=expect) as err:
                Mesh(p, cells)
            assert "tetrahedr" in str(err.value) or "point" in str(err.value)
    assert np.array_equal(p, before[0], equal_nan=True) and np.array_equal(cells, before[1])


def test_face_keys_beyond_packed_integers():
    # with 2**21 points or more the packed key n**3 overflows int64 and the faces are
    # sorted by rows instead: the same faces, shifted by the offset
    from hatkernels.mesh.tetrahedra import check_faces, face_topology

    m = ball(1)
    big = m.cells.astype(np.int64) + 2**21
    for small, large in zip(face_topology(m.cells), face_topology(big), strict=True):
        assert (large - small == (2**21 if small.shape[1] == 3 else 0)).all()
    off = 2**21  # the cells of TWO (see test_bad_tetrahedra_are_named), renumbered
    with pytest.raises(MeshError, match=rf"tetrahedra 0 and 1 lie on the same side of their shared face \({off}, {off + 1}, {off + 2}\)"):
        check_faces(np.array([[0, 1, 2, 3], [0, 1, 2, 5]]) + off)
    with pytest.raises(MeshError, match=r"is shared by 3 tetrahedra \(0, 1, 2\)"):
        check_faces(np.array([[0, 1, 2, 3], [0, 2, 1, 4], [0, 1, 2, 5]]) + off)
    with pytest.raises(MeshError, match=f"tetrahedra 0 and {len(big)} are duplicates"):
        check_faces(np.r_[big, big[:1, [1, 2, 0, 3]]])


def test_ball_bad_arguments():
    with pytest.raises(InputError, match="radius must be > 0, got 0"):
        ball(2, radius=0)
    with pytest.raises(InputError, match="center must be three finite numbers"):
        ball(2, center=(0.0, 1.0))
    with pytest.raises(InputError, match="n must be >= 1, got 0"):
        ball(0)
