"""Region tags on cells and tags on boundary sides (hatkernels.mesh.tags): their check, their
survival through refinement, reordering, subdomains and files, and the data given by region
and by boundary tag.

The outside reference for the data is a P1 assembly written out element by element with
numpy (J. Alberty, C. Carstensen and S. A. Funken, "Remarks around 50 lines of Matlab:
short finite element implementation", Numerical Algorithms 20, 1999), with the exact
element mass matrices ``|T| (1 + delta_ij) / ((k (k + 1))`` of a simplex of ``k`` points
(the integrals of products of barycentric coordinates; common practice, no source), and
solved by ``scipy.sparse.linalg.spsolve`` (reference library: scipy).  Loads that are
linear in x, y (z) are integrated exactly by it, as ``M @ f(points)``, and exactly by the
library's degree-2 rules, so the two agree to round-off.
"""

import json
import math

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from conftest import EPS
from hypothesis import given
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import hatkernels as hk
from hatkernels.conditions import tagged
from hatkernels.distributed import partition, subdomain
from hatkernels.distributed.assembly import assemble_local, rows_in_global
from hatkernels.distributed.solve import _local_boundary
from hatkernels.distributed.subdomain import local_coefficient
from hatkernels.errors import InputError, MeshError
from hatkernels.io import read_mesh, write_mesh
from hatkernels.mesh import cuboid, rectangle
from hatkernels.mesh.tags import label_cells, label_sides
from hatkernels.problem import PoissonProblem

#: Solutions of these small systems (condition numbers below 1e5) agree with the
#: reference to round-off times the condition number: 1e-9 relative leaves a margin.
SOLVE_TOL = 1e-9


# -- meshes -------------------------------------------------------------------------------


def tagged_square(n=4):
    """The unit square, n x n cells (n even): regions cold (1, x < 1/2) and hot (2), boundary
    tags left (1), right (2), bottom (3), top (4)."""
    m = label_cells(rectangle(n, n), {"cold": lambda x, y: x < 0.5,
                                      "hot": lambda x, y: x >= 0.5})
    return label_sides(m, {"left": lambda x, y: x == 0, "right": lambda x, y: x == 1,
                           "bottom": lambda x, y: y == 0, "top": lambda x, y: y == 1})


def tagged_cube(n=2):
    """The unit cube, n^3 cubes of six tetrahedra (n even): regions cold (x < 1/2) and hot,
    boundary tags left (x = 0), right (x = 1), top (z = 1, x < 1/2 only)."""
    m = label_cells(cuboid(n, n, n), {"cold": lambda x, y, z: x < 0.5,
                                      "hot": lambda x, y, z: x >= 0.5})
    return label_sides(m, {"left": lambda x, y, z: x == 0, "right": lambda x, y, z: x == 1,
                           "top": lambda x, y, z: (z == 1) & (x < 0.5)})


def three_regions_square():
    """rectangle(3, 3) with three regions (by centroid) and a tag on part of the top."""
    m = label_cells(rectangle(3, 3), {"a": lambda x, y: x < 1 / 3, "b": lambda x, y: y < 0.5,
                                      "c": lambda x, y: x == x})
    return label_sides(m, {"west": lambda x, y: x == 0, "south": lambda x, y: y == 0,
                           "north-west": lambda x, y: (y == 1) & (x < 0.5)})


# -- plain geometry, for the checks -------------------------------------------------------


def measures(points, simplices):
    """Length, area or volume of simplices of any dimension (Gram determinant)."""
    v = points[simplices]
    e = v[:, 1:, :] - v[:, :1, :]
    k = simplices.shape[1] - 1
    return np.sqrt(np.abs(np.linalg.det(e @ e.transpose(0, 2, 1)))) / math.factorial(k)


def per_tag_measure(mesh):
    t = mesh.tags
    m = measures(mesh.points, t.sides)
    return {int(g): float(m[t.side_tags == g].sum()) for g in t.boundary_tags()}


def per_region_measure(mesh):
    m = measures(mesh.points, mesh.cells)
    return {int(g): float(m[mesh.regions == g].sum()) for g in np.unique(mesh.regions)}


def rotated_smallest_first(faces):
    """Each row of faces rotated cyclically (orientation kept) so its smallest entry leads."""
    f = np.asarray(faces)
    shift = np.argmin(f, axis=1)
    return np.take_along_axis(f, (shift[:, None] + np.arange(3)) % 3, axis=1)


def outward(mesh, sides):
    """For each side, True when its orientation points away from the one cell holding it:
    the domain on the left of an edge, the right-hand normal of a face outward."""
    pts = mesh.points
    cells = mesh.cells
    key = {tuple(sorted(c[j] for j in range(len(c)) if j != i)): n
           for n, c in enumerate(cells.tolist()) for i in range(len(c))}
    owner = np.array([key[tuple(sorted(s))] for s in sides.tolist()])
    inside = pts[cells[owner]].mean(axis=1) - pts[sides].mean(axis=1)
    a, b = pts[sides[:, 0]], pts[sides[:, 1]]
    if mesh.dim == 2:
        t = b - a
        left = np.column_stack([-t[:, 1], t[:, 0]])  # the tangent turned counterclockwise
        return (left * inside).sum(axis=1) > 0
    n = np.cross(b - a, pts[sides[:, 2]] - a)
    return (n * inside).sum(axis=1) < 0


def on_simplex(x, corners, tol=1e-12):
    """True when point x lies on the segment or triangle ``corners`` (within tol)."""
    v = corners[1:] - corners[0]
    mu, *_ = np.linalg.lstsq(v.T, x - corners[0], rcond=None)
    lam = np.append(1 - mu.sum(), mu)
    return bool(np.linalg.norm(v.T @ mu - (x - corners[0])) < tol and (lam > -tol).all())


# -- the reference P1 system, written out element by element --------------------------


def _scatter(simplices, local, n):
    k = simplices.shape[1]
    rows = np.repeat(simplices, k, axis=1).ravel()
    cols = np.tile(simplices, (1, k)).ravel()
    return sp.coo_matrix((local.ravel(), (rows, cols)), shape=(n, n)).tocsr()


def ref_stiffness(mesh, kappa):
    """sum over cells of |T| grad(phi_i) . K_T grad(phi_j); kappa (M,) or (M, d, d)."""
    p, c, d = mesh.points, mesh.cells, mesh.dim
    V = np.concatenate([np.ones(c.shape + (1,)), p[c]], axis=2)
    G = np.linalg.inv(V)[:, 1:, :].transpose(0, 2, 1)  # gradients of the barycentrics
    vol = np.abs(np.linalg.det(V)) / math.factorial(d)
    K = kappa if np.ndim(kappa) == 3 else np.asarray(kappa)[:, None, None] * np.eye(d)
    return _scatter(c, vol[:, None, None] * (G @ K @ G.transpose(0, 2, 1)), mesh.n_points)


def ref_mass(mesh, simplices, weight):
    """Exact mass matrix of simplices (cells or sides) with a constant weight on each."""
    k = simplices.shape[1]
    w = np.broadcast_to(np.asarray(weight, dtype=float), (len(simplices),))
    local = (measures(mesh.points, simplices) * w)[:, None, None] / (k * (k + 1))
    return _scatter(simplices, local * (np.ones((k, k)) + np.eye(k)), mesh.n_points)


def ref_solve(A, b, held, values):
    """u with u[held] = values and the free rows of A u = b (scipy spsolve)."""
    u = np.zeros(len(b))
    u[held] = values
    free = np.setdiff1d(np.arange(len(b)), held)
    A = sp.csr_matrix(A)
    rhs = b[free] - A[free][:, held] @ u[held]
    u[free] = spla.spsolve(A[free][:, free].tocsc(), rhs)
    return u


def cells_of(mesh, name):
    return mesh.regions == mesh.tags.region_names[name]


def sides_of(mesh, name):
    return mesh.tags.sides_of([mesh.tags.side_names[name]])


def points_of(mesh, *names):
    return np.unique(np.concatenate([sides_of(mesh, n).ravel() for n in names]))


def rel(a, b):
    return float(np.linalg.norm(a - b) / np.linalg.norm(b))


def solve(mesh, **kw):
    kw.setdefault("preconditioner", "direct")
    return hk.solve_poisson(mesh, **kw).u


# == check_tags and with_tags =============================================================

BASE = rectangle(3, 3)  # 16 points, 18 triangles
BOUNDARY = BASE.boundary_edges()


def test_with_tags_stores_checked_copies_and_leaves_inputs_alone():
    regions = np.arange(18) % 3 - 1  # int64, negative tags allowed
    sides = np.array([[1, 0], [2, 1], [0, 1], [7, 3], [3, 7]])  # any point order, repeated
    side_tags = np.array([5, 5, 5, 6, 6])
    names = {"edge": 5}
    keep = (regions.copy(), sides.copy(), side_tags.copy(), dict(names))
    m = BASE.with_tags(regions=regions, sides=sides, side_tags=side_tags, side_names=names)
    for given_, kept in zip((regions, sides, side_tags, names), keep, strict=True):
        assert np.array_equal(given_, kept) if isinstance(kept, np.ndarray) else given_ == kept
    assert BASE.tags is None  # the mesh it came from is unchanged
    assert m.points is BASE.points and m.cells is BASE.cells  # shared, not copied
    assert m.regions.dtype == np.int32 and np.array_equal(m.regions, regions)
    assert not m.regions.flags.writeable and not m.tags.sides.flags.writeable
    # the repeats with the same tag count once, oriented as the mesh's boundary edges
    rows = {tuple(r): int(t) for r, t in zip(m.tags.sides.tolist(), m.tags.side_tags.tolist(),
                                              strict=True)}
    assert rows == {(0, 1): 5, (1, 2): 5, (3, 7): 6}
    assert {tuple(r) for r in m.tags.sides.tolist()} <= {tuple(r) for r in BOUNDARY.tolist()}
    assert m.tags.side_tag("edge") == 5 and m.tags.side_label(6) == "6"


def test_with_tags_accepts_the_names_of_another_mesh():
    # a mesh's own (read-only) names passed back: the round trip users write by hand
    m = tagged_square()
    again = m.with_tags(regions=m.regions, sides=m.tags.sides, side_tags=m.tags.side_tags,
                        region_names=m.tags.region_names, side_names=m.tags.side_names)
    assert dict(again.tags.region_names) == {"cold": 1, "hot": 2}
    assert dict(again.tags.side_names) == dict(m.tags.side_names)


@pytest.mark.parametrize("label", [label_cells, label_sides])
@pytest.mark.parametrize("test, words", [
    (lambda x, y: x[:2] < 1, ["'bad'", "2", "one value"]),
    (lambda x, y: 1 / 0, ["'bad'", "ZeroDivisionError"]),
    (lambda x: x < 1, ["'bad'", "TypeError"]),
    (0.5, ["'bad'", "callable"]),
], ids=["shape", "raises", "arguments", "not-callable"])
def test_label_tests_that_fail_are_input_errors_naming_the_label(label, test, words):
    with pytest.raises(InputError) as err:
        label(BASE, {"good": lambda x, y: x < 0.5, "bad": test})
    for w in words:
        assert w in str(err.value), (w, str(err.value))


INTERIOR = [0, 5]  # an edge of two triangles of rectangle(3, 3)


@pytest.mark.parametrize("kwargs, words", [
    (dict(regions=[1] * 17), ["(18,)", "(17,)"]),
    (dict(regions=np.ones((18, 1), int)), ["(18,)", "(18, 1)"]),
    (dict(regions=[1, 1, 1, 1, 1.5] + [1] * 13), ["triangle 4", "1.5", "not an integer"]),
    (dict(regions=[1, 1, np.nan] + [1] * 15), ["triangle 2", "nan"]),
    (dict(regions=["a"] * 18), ["integers", "dtype"]),
    (dict(regions=[1, 1, 2**40] + [1] * 15), ["triangle 2", "int32"]),
    (dict(sides=[[0, 1], INTERIOR], side_tags=[1, 7]), ["[0, 5]", "tag 7", "not a boundary"]),
    (dict(sides=[[0, 1], [1, 0], [2, 1]], side_tags=[1, 2, 1]), ["[0, 1]", "1 and 2", "twice"]),
    (dict(sides=[[0, 1], [3, 99]], side_tags=[1, 1]), ["edge 1", "[3, 99]", "0..15"]),
    (dict(sides=[[0, 1], [-1, 0]], side_tags=[1, 1]), ["edge 1", "[-1, 0]"]),
    (dict(sides=[[0, 1]], side_tags=[1, 2]), ["side_tags", "(1,)"]),
    (dict(sides=[[0, 1]], side_tags=[1.25]), ["edge 0", "1.25"]),
    (dict(sides=[[0, 1, 2]], side_tags=[1]), ["(k, 2)"]),
    (dict(sides=[[0.0, 1.0]], side_tags=[1]), ["integer", "(k, 2)"]),
    (dict(sides=[[0, 1]]), ["without side_tags"]),
    (dict(side_tags=[1]), ["without sides"]),
    (dict(side_tags=5), ["without sides"]),
    (dict(regions=[1] * 18, region_names=[("a", 1)]), ["region_names", "dict"]),
    (dict(regions=[1] * 18, region_names={"a": 1.5}), ["region_names['a']", "1.5"]),
    (dict(regions=[1] * 18, region_names={"a": True}), ["region_names['a']", "True"]),
    (dict(regions=[1] * 18, region_names={"": 1}), ["region_names", "''"]),
    (dict(regions=[1] * 18, region_names={3: 1}), ["region_names", "3"]),
    (dict(sides=[[0, 1]], side_tags=[1], side_names={"in": "1"}), ["side_names['in']"]),
])
def test_bad_tags_raise_mesh_errors_that_name_the_place(kwargs, words):
    with pytest.raises(MeshError) as err:
        BASE.with_tags(**kwargs)
    for w in words:
        assert w in str(err.value), (w, str(err.value))


def test_bad_tags_on_tetrahedra_name_the_face():
    m = cuboid(1, 1, 1)
    outside = {tuple(sorted(f)) for f in m.boundary_faces().tolist()}
    interior = sorted({tuple(f) for f in m.faces().tolist()} - outside)[0]
    with pytest.raises(MeshError, match=r"face 0 .*tag 4.*not a boundary face"):
        m.with_tags(sides=[interior], side_tags=[4])
    with pytest.raises(MeshError, match=r"tetrahedron 3 is 0.5"):
        m.with_tags(regions=[1, 1, 1, 0.5, 1, 1])
    with pytest.raises(MeshError, match=r"\(k, 3\)"):
        m.with_tags(sides=[[0, 1]], side_tags=[1])


small_ints = st.integers(-3, 20)
ragged = st.lists(st.lists(small_ints, max_size=4), max_size=5)
any_dtype = st.sampled_from([np.int64, np.int32, np.uint8, np.float64, np.float32, np.bool_,
                             np.complex128, np.str_, object])


def _elements(dtype):
    kind = np.dtype(dtype).kind
    if kind == "f":
        return st.floats(allow_nan=True, allow_infinity=True, width=np.dtype(dtype).itemsize * 8)
    if kind in "iu":
        return st.integers(-3 if kind == "i" else 0, 20)
    if kind == "b":
        return st.booleans()
    if kind == "c":
        return st.complex_numbers(max_magnitude=10, allow_nan=False, allow_infinity=False)
    if kind == "U":
        return st.text(max_size=2)
    return st.sampled_from([1, "a", None, 2.5, 2**70])


def arrays_near(shape):
    """Arrays of any dtype with shape ``shape`` or near it, and ragged lists."""
    shapes = st.one_of(st.just(shape), hnp.array_shapes(min_dims=0, max_dims=3, max_side=6))
    return st.one_of(
        st.tuples(any_dtype, shapes).flatmap(
            lambda ds: hnp.arrays(ds[0], ds[1], elements=_elements(ds[0]))),
        ragged,
        st.lists(small_ints, min_size=shape[0], max_size=shape[0]),
    )


def _frozen(x):
    """A comparable snapshot of an input (NaN-safe: the bytes of a numeric array)."""
    if isinstance(x, np.ndarray):
        body = repr(x.tolist()) if x.dtype.kind == "O" else x.tobytes()
        return (x.dtype.str, x.shape, body)
    return repr(x)


@given(st.data())
def test_fuzz_with_tags_raises_mesh_errors_only(data):
    # common practice for input validation, no source: any input either makes checked tags
    # or raises MeshError with a message; none is changed
    regions = data.draw(st.one_of(st.none(), arrays_near((BASE.n_cells,))), label="regions")
    k = data.draw(st.integers(0, 5), label="k")
    sides = data.draw(st.one_of(
        st.none(),
        hnp.arrays(np.int64, (k, 2), elements=st.sampled_from(BOUNDARY.ravel().tolist())),
        hnp.arrays(np.int64, (k, 2), elements=small_ints),
        arrays_near((k, 2))), label="sides")
    side_tags = data.draw(st.one_of(st.none(), arrays_near((k,))), label="side_tags")
    before = [_frozen(a) for a in (regions, sides, side_tags)]
    try:
        m = BASE.with_tags(regions=regions, sides=sides, side_tags=side_tags)
    except MeshError as exc:
        assert str(exc)
        m = None
    after = [_frozen(a) for a in (regions, sides, side_tags)]
    assert before == after
    if m is None:
        return
    # accepted: the tags are what was given, on boundary edges only
    if regions is not None:
        assert np.array_equal(m.regions, np.asarray(regions).astype(np.int64))
    rows = {tuple(r) for r in BOUNDARY.tolist()}
    assert all(tuple(r) in rows for r in m.tags.sides.tolist())
    if sides is not None and len(np.asarray(sides)):
        given_ = {(tuple(sorted(r)), int(t)) for r, t in
                  zip(np.asarray(sides).tolist(), np.asarray(side_tags).tolist(), strict=True)}
        kept = {(tuple(sorted(r)), int(t)) for r, t in
                zip(m.tags.sides.tolist(), m.tags.side_tags.tolist(), strict=True)}
        assert given_ == kept


# == survival: refine, reorder, subdomains ================================================


def check_refined(coarse, fine, levels):
    # geometric invariants of nested refinement, measured with numpy (common practice, no
    # source)
    children = (4 if coarse.dim == 2 else 8) ** levels
    # every fine cell has its ancestor's region (children of t: 4t..4t+3, or 8t..8t+7)
    assert np.array_equal(fine.regions, coarse.regions[np.arange(fine.n_cells) // children])
    assert dict(fine.tags.region_names) == dict(coarse.tags.region_names)
    assert dict(fine.tags.side_names) == dict(coarse.tags.side_names)
    # per tag, the same length (area), twice (four times) as many sides per level
    want, got = per_tag_measure(coarse), per_tag_measure(fine)
    assert want.keys() == got.keys()
    for t in want:
        assert got[t] == pytest.approx(want[t], rel=64 * EPS, abs=0)
    per_level = 2 if coarse.dim == 2 else 4
    assert len(fine.tags.sides) == per_level**levels * len(coarse.tags.sides)
    # every fine tagged side lies on a coarse side of the same tag, and none is repeated
    ct, ft = coarse.tags, fine.tags
    for side, t in zip(ft.sides, ft.side_tags, strict=True):
        corners = coarse.points[ct.sides[ct.side_tags == t]]
        x = fine.points[side]
        assert any(all(on_simplex(p, c) for p in x) for c in corners), (side, t)
    assert len(np.unique(np.sort(ft.sides, axis=1), axis=0)) == len(ft.sides)
    # a boundary side of the fine mesh, oriented as the fine mesh's boundary sides
    if fine.dim == 2:
        rows = {tuple(r) for r in fine.boundary_edges().tolist()}
        assert all(tuple(r) in rows for r in ft.sides.tolist())
    else:
        rows = {tuple(r) for r in rotated_smallest_first(fine.boundary_faces()).tolist()}
        assert all(tuple(r) in rows for r in rotated_smallest_first(ft.sides).tolist())
    assert outward(fine, ft.sides).all()


@pytest.mark.parametrize("levels", [1, 2])
def test_refine_carries_regions_and_tagged_edges(levels):
    coarse = three_regions_square()
    fine = coarse
    for _ in range(levels):
        fine = fine.refine()
    check_refined(coarse, fine, levels)


@pytest.mark.parametrize("levels", [1, 2])
def test_refine_carries_regions_and_tagged_faces(levels):
    coarse = tagged_cube(2)
    fine = coarse
    for _ in range(levels):
        fine = fine.refine()
    check_refined(coarse, fine, levels)


def _geometry_by_tag(mesh):
    """tag -> sorted list of each tagged side's point coordinates, in the side's order
    rotated to start from its lexicographically smallest point (orientation kept)."""
    out = {}
    for side, t in zip(mesh.tags.sides, mesh.tags.side_tags, strict=True):
        xyz = [tuple(p) for p in mesh.points[side].tolist()]
        k = xyz.index(min(xyz))
        out.setdefault(int(t), []).append(tuple(xyz[k:] + xyz[:k]))
    return {t: sorted(v) for t, v in out.items()}


@pytest.mark.parametrize("method", ["rcm", "hilbert"])
@pytest.mark.parametrize("make", [three_regions_square, tagged_cube], ids=["2d", "3d"])
def test_reorder_keeps_regions_and_tagged_sides_in_place(method, make):
    # renumbering moves nothing: measures and places measured with numpy (common practice,
    # no source)
    old = make()
    new, perm = old.reorder(method)
    assert not np.array_equal(perm.points, np.arange(old.n_points))  # really renumbered
    assert np.array_equal(new.regions, old.regions[perm.triangles])
    for a, b in ((per_region_measure(new), per_region_measure(old)),
                 (per_tag_measure(new), per_tag_measure(old))):
        assert a.keys() == b.keys()
        for t in a:
            assert a[t] == pytest.approx(b[t], rel=16 * EPS, abs=0)
    # the same sides in the same places (coordinates are copied, so exactly), still outward
    assert _geometry_by_tag(new) == _geometry_by_tag(old)
    assert outward(new, new.tags.sides).all()
    assert dict(new.tags.side_names) == dict(old.tags.side_names)


@pytest.mark.parametrize("make, parts, method", [
    (three_regions_square, 2, "rcb"), (three_regions_square, 3, "hilbert"),
    (tagged_cube, 2, "rcb"),
    # here a part has all three points of tagged faces whose tetrahedron is not its own
    (lambda: tagged_cube(4), 4, "hilbert"),
], ids=["2d-2", "2d-3", "3d-2", "3d-4"])
def test_subdomains_carry_regions_and_tagged_sides(make, parts, method):
    # the parts' tags mapped back to global numbers with numpy (common practice, no source)
    mesh = make()
    p = partition(mesh, parts, method=method)
    seen_cells = np.zeros(mesh.n_cells, dtype=bool)
    global_rows = {tuple(r): int(t) for r, t in zip(mesh.tags.sides.tolist(),
                                                    mesh.tags.side_tags.tolist(), strict=True)}
    seen_sides = set()
    for k in range(parts):
        s = subdomain(p, k)
        assert np.array_equal(s.mesh.regions, mesh.regions[s.cells])
        seen_cells[s.cells] = True
        back = s.points[s.mesh.tags.sides]  # local tagged sides in global numbers
        for row, t in zip(back.tolist(), s.mesh.tags.side_tags.tolist(), strict=True):
            assert global_rows[tuple(row)] == t  # same side, same orientation, same tag
            seen_sides.add(tuple(row))
        # every global tagged side of a local cell is there
        local_cells = set(s.cells.tolist())
        for row in global_rows:
            cell = _owner_cell(mesh, row)
            assert (row in {tuple(r) for r in back.tolist()}) == (cell in local_cells)
    assert seen_cells.all()  # the union of the parts' regions is the global one
    assert seen_sides == set(global_rows)


def _owner_cell(mesh, side):
    hit = np.isin(mesh.cells, side).sum(axis=1) == len(side)
    (cell,) = np.flatnonzero(hit)
    return int(cell)


# == files ================================================================================


@pytest.mark.parametrize("make", [tagged_square, tagged_cube], ids=["2d", "3d"])
def test_write_and_read_keep_tags_and_names(tmp_path, make):
    m = make()
    back = read_mesh(write_mesh(tmp_path / "m.npz", m))
    assert np.array_equal(back.points, m.points) and np.array_equal(back.cells, m.cells)
    assert np.array_equal(back.regions, m.regions)
    assert np.array_equal(back.tags.sides, m.tags.sides)
    assert np.array_equal(back.tags.side_tags, m.tags.side_tags)
    assert dict(back.tags.region_names) == dict(m.tags.region_names)
    assert dict(back.tags.side_names) == dict(m.tags.side_names)
    plain = read_mesh(write_mesh(tmp_path / "plain.npz", rectangle(2, 2)))
    assert plain.tags is None


def test_read_npz_with_bad_tag_arrays_names_the_file(tmp_path):
    m = tagged_square(2)
    base = {"points": m.points, "triangles": m.cells, "regions": m.regions}
    cases = {
        "not-json": ({"region_names": np.array("{cold: 1")}, InputError, "region_names"),
        "a-list": ({"side_names": np.array(json.dumps([["left", 1]]))}, InputError, "side_names"),
        "not-a-string": ({"region_names": np.array([1, 2])}, InputError, "region_names"),
        "tag-not-integer": ({"region_names": np.array(json.dumps({"cold": "x"}))}, MeshError,
                            "region_names['cold']"),
        "sides-alone": ({"sides": m.tags.sides}, InputError, "side_tags"),
        "bad-region": ({"regions": np.full(m.n_cells, 0.5)}, MeshError, "triangle 0"),
    }
    for name, (extra, error, word) in cases.items():
        path = tmp_path / f"{name}.npz"
        np.savez(path, **{**base, **extra})
        with pytest.raises(error) as err:
            read_mesh(path)
        assert str(path) in str(err.value) and word in str(err.value), (name, str(err.value))


def test_read_vtu_triangles_with_line_tags_drops_interior_lines(tmp_path):
    meshio = pytest.importorskip("meshio")
    m = rectangle(2, 2)
    b = m.boundary_edges()
    interior = [3, 4]  # an edge of two triangles
    assert interior in m.edges().tolist() and interior not in np.sort(b, axis=1).tolist()
    regions = np.where(m.points[m.cells].mean(axis=1)[:, 0] < 0.5, 7, 9)
    lines = np.array([b[1][::-1], b[0], interior])  # one reversed
    path = tmp_path / "m.vtu"
    meshio.write(str(path), meshio.Mesh(np.column_stack([m.points, np.zeros(m.n_points)]),
                                        [("triangle", m.cells), ("line", lines)],
                                        cell_data={"material": [regions, np.array([1, 2, 5])]}))
    r = read_mesh(path)
    assert np.array_equal(r.regions, regions)
    got = {tuple(s): int(t) for s, t in zip(r.tags.sides.tolist(), r.tags.side_tags.tolist(),
                                             strict=True)}
    assert got == {tuple(b[0]): 2, tuple(b[1]): 1}  # boundary orientation; tag 5 dropped
    assert r.tags.boundary_tags().tolist() == [1, 2]


def test_read_vtu_tetrahedra_with_face_tags(tmp_path):
    meshio = pytest.importorskip("meshio")
    m = cuboid(1, 1, 1)
    bf = m.boundary_faces()
    inside = {tuple(f) for f in m.faces().tolist()} - {tuple(sorted(f)) for f in bf.tolist()}
    faces = np.array([bf[0][::-1], bf[3], sorted(inside)[0]])
    path = tmp_path / "m.vtu"
    meshio.write(str(path), meshio.Mesh(m.points, [("tetra", m.cells), ("triangle", faces)],
                                        cell_data={"id": [np.arange(6) // 3, np.array([4, 5, 6])]}))
    r = read_mesh(path)
    assert r.dim == 3 and r.regions.tolist() == [0, 0, 0, 1, 1, 1]
    got = {tuple(rotated_smallest_first([s])[0]): int(t)
           for s, t in zip(r.tags.sides.tolist(), r.tags.side_tags.tolist(), strict=True)}
    assert got == {tuple(rotated_smallest_first([bf[0]])[0]): 4,
                   tuple(rotated_smallest_first([bf[3]])[0]): 5}
    assert outward(r, r.tags.sides).all()


# == data by region and by tag, against the reference assembly ==========================


def linear(x, y, z=0.0):
    return 1.0 + x + 2.0 * y - z


def test_region_constants_equal_the_per_cell_array_and_the_reference():
    m = tagged_square(6)
    hot, cold = cells_of(m, "hot"), cells_of(m, "cold")
    kappa = np.where(hot, 10.0, 1.0)
    f = np.where(hot, 0.0, 3.0)
    u_dict = solve(m, f={"cold": 3.0}, coefficient={"cold": 1.0, "hot": 10.0},
                   dirichlet={"left": 0.0, "right": 1.0})
    u_cell = solve(m, f=hk.per_cell(f), coefficient=hk.per_cell(kappa),
                   dirichlet_on=np.concatenate([sides_of(m, "left"), sides_of(m, "right")]),
                   dirichlet=m.points[:, 0])
    A = ref_stiffness(m, kappa)
    b = ref_mass(m, m.cells, f) @ np.ones(m.n_points)
    held = points_of(m, "left", "right")
    u_ref = ref_solve(A, b, held, m.points[held, 0])
    # reference: the numpy assembly solved by scipy spsolve (Alberty et al. 1999; reference
    # library: scipy); the per-cell solve must agree with it too
    assert rel(u_dict, u_ref) < SOLVE_TOL
    assert rel(u_cell, u_ref) < SOLVE_TOL
    assert cold.sum() == hot.sum() == m.n_cells // 2


def test_callable_source_in_one_region_is_the_callable_times_the_indicator():
    m = tagged_square(6)
    hot = cells_of(m, "hot")
    # the load vector itself: int over the hot cells of f phi_i, f linear so exactly M_hot f
    # reference: exact integrals by the element mass matrices (module notes)
    b_ref = ref_mass(m, m.cells, hot.astype(float)) @ linear(*m.points.T)
    b = hk.assemble_load(m, {"hot": linear})
    assert np.abs(b - b_ref).max() <= 64 * EPS * np.abs(b_ref).max()
    # and the solution, with a tagged Dirichlet side
    u = solve(m, f={"hot": linear}, dirichlet={"bottom": 0.0})
    held = points_of(m, "bottom")
    # reference: the numpy assembly solved by scipy spsolve (module notes)
    u_ref = ref_solve(ref_stiffness(m, np.ones(m.n_cells)), b_ref, held, 0.0)
    assert rel(u, u_ref) < SOLVE_TOL


def test_per_point_array_in_a_region_and_tensors_mixed_with_scalars():
    m = tagged_square(6)
    hot, cold = cells_of(m, "hot"), cells_of(m, "cold")
    g = 1.0 + m.points[:, 1] ** 2  # per point, piecewise linear between them
    K = np.array([[2.0, 0.5], [0.5, 1.0]])
    f = {"cold": hk.per_point(g), "hot": 2.0}
    kappa_by_region = {"cold": K, "hot": 3.0}
    kept = (g.copy(), K.copy(), dict(f), dict(kappa_by_region))
    u = solve(m, f=f, coefficient=kappa_by_region, reaction={"hot": 0.5},
              dirichlet={"left": 0.0})
    # the data are read, never changed
    assert np.array_equal(g, kept[0]) and np.array_equal(K, kept[1])
    assert f == kept[2] and kappa_by_region.keys() == kept[3].keys()
    kappa = np.where(cold[:, None, None], K, 3.0 * np.eye(2))
    A = ref_stiffness(m, kappa) + ref_mass(m, m.cells, 0.5 * hot)
    b = ref_mass(m, m.cells, cold.astype(float)) @ g + ref_mass(m, m.cells, 2.0 * hot) @ np.ones(
        m.n_points)
    # reference: the numpy assembly solved by scipy spsolve (module notes)
    u_ref = ref_solve(A, b, points_of(m, "left"), 0.0)
    assert rel(u, u_ref) < SOLVE_TOL


def test_neumann_by_tag_with_per_side_values_and_a_callable_and_robin_by_tag():
    m = tagged_square(4)
    right, top = sides_of(m, "right"), sides_of(m, "top")
    h = np.arange(1.0, len(right) + 1)  # one value per side of "right", in its row order
    u = solve(m, f=0.0, dirichlet={"left": 0.0},
              neumann={"right": hk.per_edge(h), "top": lambda x, y: x},
              robin={"bottom": (2.0, 0.5)})
    bottom = sides_of(m, "bottom")
    A = ref_stiffness(m, np.ones(m.n_cells)) + ref_mass(m, bottom, 2.0)
    b = (ref_mass(m, right, h) @ np.ones(m.n_points) + ref_mass(m, top, 1.0) @ m.points[:, 0]
         + ref_mass(m, bottom, 0.5) @ np.ones(m.n_points))
    # reference: the numpy assembly solved by scipy spsolve (module notes)
    u_ref = ref_solve(A, b, points_of(m, "left"), 0.0)
    assert rel(u, u_ref) < SOLVE_TOL


def test_three_dimensional_regions_and_tags_against_the_reference():
    m = tagged_cube(2)
    hot, cold = cells_of(m, "hot"), cells_of(m, "cold")
    right, top = sides_of(m, "right"), sides_of(m, "top")
    h = np.linspace(0.5, 1.5, len(top))
    u = solve(m, f={"hot": linear, "cold": 1.0}, coefficient={"cold": 1.0, "hot": 4.0},
              dirichlet={"left": 0.0}, robin={"right": (3.0, 1.0)},
              neumann={"top": hk.per_edge(h)})
    A = ref_stiffness(m, np.where(hot, 4.0, 1.0)) + ref_mass(m, right, 3.0)
    one = np.ones(m.n_points)
    b = (ref_mass(m, m.cells, hot.astype(float)) @ linear(*m.points.T)
         + ref_mass(m, m.cells, cold.astype(float)) @ one
         + ref_mass(m, right, 1.0) @ one + ref_mass(m, top, h) @ one)
    # reference: the numpy assembly solved by scipy spsolve (module notes)
    u_ref = ref_solve(A, b, points_of(m, "left"), 0.0)
    assert rel(u, u_ref) < SOLVE_TOL


def test_where_held_tags_meet_the_first_listed_gives_the_value():
    # The intent: dirichlet={tag: g} lists the held tags in the user's order of priority; a
    # corner shared by two held tags takes the value of the one listed first (the rule
    # parse_conditions documents), so swapping the order swaps the corner's value and
    # nothing else.
    m = tagged_square(4)
    corner = int(np.flatnonzero((m.points == 0).all(axis=1))[0])
    u1 = solve(m, f=0.0, dirichlet={"left": 1.0, "bottom": 2.0})
    u2 = solve(m, f=0.0, dirichlet={"bottom": 2.0, "left": 1.0})
    assert u1[corner] == 1.0 and u2[corner] == 2.0
    left, bottom = points_of(m, "left"), points_of(m, "bottom")
    assert (u1[np.setdiff1d(left, corner)] == 1.0).all()
    assert (u1[np.setdiff1d(bottom, corner)] == 2.0).all()
    # each against the reference with that corner value (insulated right and top)
    for u, v in ((u1, 1.0), (u2, 2.0)):
        held = np.union1d(left, bottom)
        g = np.where(np.isin(held, left), 1.0, 2.0)
        g[held == corner] = v
        # reference: the numpy assembly solved by scipy spsolve (module notes)
        u_ref = ref_solve(ref_stiffness(m, np.ones(m.n_cells)), np.zeros(m.n_points), held, g)
        assert rel(u, u_ref) < SOLVE_TOL


def test_integer_tags_through_tagged():
    m = tagged_square(4)
    bottom = m.tags.side_names["bottom"]
    assert bottom == 3
    u_tag = solve(m, dirichlet_on=tagged(3), neumann=(tagged(2), 0.5))
    u_name = solve(m, dirichlet_on="bottom", neumann=(["right"], 0.5))
    A = ref_stiffness(m, np.ones(m.n_cells))
    b = ref_mass(m, m.cells, 1.0) @ np.ones(m.n_points) + ref_mass(
        m, sides_of(m, "right"), 0.5) @ np.ones(m.n_points)
    # reference: the numpy assembly solved by scipy spsolve (module notes)
    u_ref = ref_solve(A, b, points_of(m, "bottom"), 0.0)
    assert rel(u_tag, u_ref) < SOLVE_TOL and rel(u_name, u_ref) < SOLVE_TOL
    # integers alone are point indices, not tags
    problem = PoissonProblem(m, dirichlet_on=[3], neumann=(tagged(2), 0.5))
    assert problem.dirichlet.points.tolist() == [3]
    with pytest.raises(InputError, match="at least one"):
        tagged()


UNTAGGED = rectangle(2, 2)


@pytest.mark.parametrize("mesh, kwargs, words", [
    ("tagged", dict(coefficient={"cold": 1.0, "steel": 2.0}),
     ["'steel'", "cold (1)", "hot (2)"]),
    ("tagged", dict(f={7: 1.0}), ["7", "cold (1)", "hot (2)"]),
    ("tagged", dict(dirichlet={"inlet": 0.0}), ["'inlet'", "left (1)", "top (4)"]),
    ("tagged", dict(dirichlet_on=tagged(9)), ["9", "left (1)"]),
    ("tagged", dict(neumann={"outlet": 1.0}), ["'outlet'", "bottom (3)"]),
    ("tagged", dict(coefficient={"cold": 1.0, 1: 2.0, "hot": 1.0}),
     ["cold (1)", "twice", "'cold'", "1"]),
    ("tagged", dict(coefficient={"cold": 1.0}), ["hot (2)", "every region"]),
    ("tagged", dict(dirichlet={"left": 0.0}, neumann={"left": 1.0}),
     ["left (1)", "two conditions"]),
    ("tagged", dict(dirichlet_on=tagged(1), robin={1: (1.0, 0.0)}),
     ["left (1)", "two conditions"]),
    ("tagged", dict(dirichlet={"left": 0.0}, neumann={3: 1.0, "bottom": 2.0}),
     ["bottom (3)", "two conditions"]),
    ("tagged", dict(dirichlet={"left": 0.0}, robin={"right": [1.0, 0.0]}),
     ["right (2)", "pair"]),
    ("tagged", dict(dirichlet={"left": 0.0}, robin={"right": 1.0}), ["right (2)", "pair"]),
    ("plain", dict(coefficient={"steel": 1.0}), ["'steel'", "no region tags"]),
    ("plain", dict(dirichlet={"inlet": 0.0}), ["inlet", "no boundary tags"]),
    ("plain", dict(dirichlet_on="inlet"), ["inlet", "no boundary tags"]),
    ("plain", dict(dirichlet_on=tagged(4)), ["4", "no boundary tags"]),
    ("plain", dict(neumann={"outlet": 1.0}), ["outlet", "no boundary tags"]),
    ("plain", dict(robin={"wall": (1.0, 0.0)}), ["wall", "no boundary tags"]),
], ids=lambda v: v if isinstance(v, str) else None)
def test_data_by_region_or_tag_errors_name_the_tag(mesh, kwargs, words):
    m = tagged_square(2) if mesh == "tagged" else UNTAGGED
    with pytest.raises(InputError) as err:
        PoissonProblem(m, **kwargs)
    for w in words:
        assert w in str(err.value), (w, str(err.value))


def test_unknown_tag_names_given_as_odd_strings_are_input_errors():
    m = tagged_square(2)
    for key in ("--3", "\u00b3", "-", "", " "):
        with pytest.raises(InputError, match="no boundary tag"):
            PoissonProblem(m, dirichlet={key: 0.0})
    assert m.tags.side_tag(" 3 ") == 3  # a number written as text is the tag


# == the solvers on tagged data ==========================================================


@pytest.fixture(scope="module")
def fine_square():
    return tagged_square(4).refine().refine().refine()  # 2048 triangles, nested for gmg


def test_amg_gmg_and_direct_agree_on_two_materials_with_convection_on_a_tag(fine_square):
    m = fine_square
    data = dict(f={"hot": linear}, coefficient={"cold": 1.0, "hot": 20.0},
                dirichlet={"left": 0.0}, robin={"right": (5.0, 1.0)}, rtol=1e-12)
    u = {pc: hk.solve_poisson(m, preconditioner=pc, **data).u for pc in ("amg", "gmg", "direct")}
    hot = cells_of(m, "hot")
    right = sides_of(m, "right")
    A = ref_stiffness(m, np.where(hot, 20.0, 1.0)) + ref_mass(m, right, 5.0)
    b = (ref_mass(m, m.cells, hot.astype(float)) @ linear(*m.points.T)
         + ref_mass(m, right, 1.0) @ np.ones(m.n_points))
    # reference: the numpy assembly solved by scipy spsolve (module notes)
    u_ref = ref_solve(A, b, points_of(m, "left"), 0.0)
    for pc, v in u.items():
        assert rel(v, u_ref) < 1e-8, pc  # CG to rtol 1e-12 on a system of condition ~1e5
    # the matrix-free form has the stiffness term only: convection is refused, with why
    with pytest.raises(InputError, match="robin"):
        hk.solve_poisson(m, preconditioner="gmg", matrix_free=True, **data)


def test_matrix_free_gmg_and_assembled_amg_agree_on_two_materials_with_a_tagged_flux(
        fine_square):
    m = fine_square
    data = dict(f={"hot": linear, "cold": 0.5}, coefficient={"cold": 1.0, "hot": 20.0},
                dirichlet={"left": 0.0, "top": 0.25}, neumann={"right": -1.0}, rtol=1e-12)
    u_free = hk.solve_poisson(m, preconditioner="gmg", matrix_free=True, **data)
    u_amg = hk.solve_poisson(m, preconditioner="amg", matrix_free=False, **data)
    assert "matrix-free" in u_free.stats.preconditioner
    hot, cold = cells_of(m, "hot"), cells_of(m, "cold")
    one = np.ones(m.n_points)
    b = (ref_mass(m, m.cells, hot.astype(float)) @ linear(*m.points.T)
         + ref_mass(m, m.cells, 0.5 * cold) @ one - ref_mass(m, sides_of(m, "right"), 1.0) @ one)
    left, top = points_of(m, "left"), points_of(m, "top")
    held = np.union1d(left, top)
    # reference: the numpy assembly solved by scipy spsolve (module notes)
    u_ref = ref_solve(ref_stiffness(m, np.where(hot, 20.0, 1.0)), b, held,
                      np.where(np.isin(held, left), 0.0, 0.25))
    for sol in (u_free, u_amg):
        assert rel(sol.u, u_ref) < 1e-8, sol.stats.preconditioner


@pytest.mark.parametrize("parts", [2, 3])
def test_local_assembly_of_tagged_data_gives_the_whole_mesh_rows(parts):
    # The distributed solve itself runs under mpiexec only (tests/mpi_checks.py); here its
    # per-rank assembly of data by region and by tag is checked in this process: the owned
    # rows of every part equal the reference rows of the whole mesh.
    m = tagged_square(6)
    h = np.linspace(1.0, 2.0, len(sides_of(m, "top")))
    problem = PoissonProblem(m, {"hot": linear, "cold": 2.0},
                             coefficient={"cold": [[2.0, 0.5], [0.5, 1.0]], "hot": 3.0},
                             dirichlet={"left": 0.0}, neumann={"top": hk.per_edge(h)},
                             robin={"right": (4.0, lambda x, y: y), "bottom": (1.0, 0.5)})
    hot, cold = cells_of(m, "hot"), cells_of(m, "cold")
    right, bottom, top = sides_of(m, "right"), sides_of(m, "bottom"), sides_of(m, "top")
    kappa = np.where(cold[:, None, None], [[2.0, 0.5], [0.5, 1.0]], 3.0 * np.eye(2))
    A = ref_stiffness(m, kappa) + ref_mass(m, right, 4.0) + ref_mass(m, bottom, 1.0)
    one = np.ones(m.n_points)
    b = (ref_mass(m, m.cells, hot.astype(float)) @ linear(*m.points.T)
         + ref_mass(m, m.cells, 2.0 * cold) @ one + ref_mass(m, top, h) @ one
         + ref_mass(m, right, 1.0) @ m.points[:, 1] + ref_mass(m, bottom, 0.5) @ one)
    p = partition(m, parts)
    for k in range(parts):
        s = subdomain(p, k)
        nb, rb = _local_boundary(s, problem)
        A_L, b_L, _ = assemble_local(
            s, kappa=local_coefficient(problem.coefficient, s),
            f=local_coefficient(problem.source, s), neumann=nb, robin=rb)
        rows = rows_in_global(A_L[: s.n_owned], s.points, m.n_points)
        # reference: the numpy assembly of the whole mesh (module notes), to round-off
        assert abs(rows - A[s.owned]).max() <= 64 * EPS * abs(A).max()
        assert np.abs(b_L[: s.n_owned] - b[s.owned]).max() <= 64 * EPS * np.abs(b).max()


@pytest.mark.parametrize("name", ["neumann", "robin"])
def test_an_empty_condition_dict_is_named(name):
    # an empty {tag: value} dict names the argument, as dirichlet={} does (common practice,
    # no source)
    m = label_sides(rectangle(4, 4), {"left": lambda x, y: x == 0})
    with pytest.raises(InputError, match=f"{name} is an empty dict"):
        hk.solve_poisson(m, 1.0, dirichlet_on="left", **{name: {}})
