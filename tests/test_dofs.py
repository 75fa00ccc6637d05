"""DofAssembler: element matrices of the caller's own elements, assembled through the csr plan."""

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import EPS, jittered_mesh
from hypothesis import given
from hypothesis import strategies as st

import hatkernels
from hatkernels import DofAssembler, InputError
from hatkernels.mesh import core_index, rectangle

#: Round-off between two summation orders of the same few element terms per entry,
#: relative to the largest entry (the brief's tolerance; measured differences are a
#: few EPS). A misplaced element entry moves an entry by a sizeable fraction of it.
ROUNDOFF = 16 * EPS


def triplets(cell_dofs, element_matrices, n):
    """The reference: (row, column, value) triplets through scipy COO -> CSR."""
    cells = np.asarray(cell_dofs)
    k = cells.shape[1]
    rows = np.repeat(cells, k, axis=1).ravel()
    cols = np.tile(cells, (1, k)).ravel()
    return sp.coo_matrix((np.ravel(element_matrices), (rows, cols)), shape=(n, n)).tocsr()


def assert_close(A, B, rel=ROUNDOFF):
    """Same shape, same pattern (scipy keeps summed zeros too), values to ``rel`` of the largest."""
    assert A.shape == B.shape
    B = B.copy()
    B.sort_indices()
    np.testing.assert_array_equal(A.indptr, B.indptr)
    np.testing.assert_array_equal(A.indices, B.indices)
    scale = max(np.abs(B.data).max(initial=0.0), 1e-300)
    assert np.abs(A.data - B.data).max(initial=0.0) <= rel * scale


def assert_canonical(A):
    """Sorted, distinct columns in every row, checked on the arrays (not scipy's flags)."""
    assert A.indptr.dtype == A.indices.dtype
    rows = np.repeat(np.arange(A.shape[0]), np.diff(A.indptr))
    key = rows.astype(np.int64) * A.shape[1] + A.indices
    assert np.all(np.diff(key) > 0)


# ---------------------------------------------------------------- quadratic triangles


def p2_dofs(mesh):
    """(M, 6): the three vertices, then the midpoints of the sides opposite vertices 0, 1, 2."""
    return np.hstack([mesh.triangles, mesh.n_points + mesh.triangle_edges()])


def barycentric(points, triangles):
    """Areas (M,) and gradients of the barycentric coordinates (M, 3, 2), by inverting
    the 3x3 matrix [1 x y] of each triangle (common practice, no source)."""
    V = np.concatenate([np.ones(triangles.shape + (1,)), points[triangles]], axis=2)
    C = np.linalg.inv(V)  # lambda_a = C[0, a] + C[1, a] x + C[2, a] y
    return 0.5 * np.abs(np.linalg.det(V)), np.transpose(C[:, 1:, :], (0, 2, 1))


def p2_stiffness(area, G):
    """Element stiffness of the quadratic triangle, closed form in G_ij = grad l_i . grad l_j.

    Basis in area coordinates l_i: l_i (2 l_i - 1) at vertex i and 4 l_p l_q at the midpoint
    of side (p, q) (O. C. Zienkiewicz, R. L. Taylor, J. Z. Zhu, "The Finite Element Method:
    Its Basis and Fundamentals", 6th ed., 2005, the quadratic triangle in area coordinates);
    integrals of monomials by int_T l1^a l2^b l3^c = 2|T| a! b! c! / (a+b+c+2)!
    (M. A. Eisenberg, L. E. Malvern, "On finite element integration in natural
    co-ordinates", 1973). That gives, with |T| the area:
    vertex-vertex |T| G_ii and -|T|/3 G_ij; vertex i with side (i, q) 4|T|/3 G_iq, with the
    opposite side 0; side (p, q) with side (r, s)
    4|T|/3 [G_qs (1+d_pr) + G_qr (1+d_ps) + G_ps (1+d_qr) + G_pr (1+d_qs)].
    """
    Gm = np.einsum("tad,tbd->tab", G, G)
    m = area.size
    K = np.zeros((m, 6, 6))
    sides = [(1, 2), (2, 0), (0, 1)]  # local dof 3 + c: the side opposite vertex c
    d = np.eye(3)
    for i in range(3):
        for j in range(3):
            K[:, i, j] = area * Gm[:, i, i] if i == j else -area / 3 * Gm[:, i, j]
        for c, (p, q) in enumerate(sides):
            if i == p:
                v = 4 * area / 3 * Gm[:, i, q]
            elif i == q:
                v = 4 * area / 3 * Gm[:, i, p]
            else:
                v = 0.0
            K[:, i, 3 + c] = K[:, 3 + c, i] = v
    for c, (p, q) in enumerate(sides):
        for e, (r, s) in enumerate(sides):
            K[:, 3 + c, 3 + e] = 4 * area / 3 * (
                Gm[:, q, s] * (1 + d[p, r]) + Gm[:, q, r] * (1 + d[p, s])
                + Gm[:, p, s] * (1 + d[q, r]) + Gm[:, p, r] * (1 + d[q, s])
            )
    # (c, e) and (e, c) sum their four terms in different orders: symmetric to the bit
    return 0.5 * (K + np.transpose(K, (0, 2, 1)))


def p2_setup(mesh):
    cells = p2_dofs(mesh)
    area, G = barycentric(mesh.points, mesh.triangles)
    edges = mesh.edges()
    coords = np.vstack([mesh.points, 0.5 * (mesh.points[edges[:, 0]] + mesh.points[edges[:, 1]])])
    return cells, area, p2_stiffness(area, G), coords


P2_MESHES = {
    "rectangle": lambda: rectangle(7, 5, bounds=(0.0, 2.0, -1.0, 0.5)),
    "jittered": lambda: jittered_mesh(6, 7),
}


@pytest.mark.parametrize("which", sorted(P2_MESHES))
def test_quadratic_triangles_against_scipy_triplets(which):
    mesh = P2_MESHES[which]()
    cells, _, K, coords = p2_setup(mesh)
    n = len(coords)
    A = DofAssembler(cells).matrix(K)
    assert A.shape == (n, n) and A.dtype == np.float64
    assert_canonical(A)
    assert_close(A, triplets(cells, K, n))  # reference library: scipy
    # the stiffness kills constants, since the P2 basis sums to one (common practice, no source)
    assert np.abs(A @ np.ones(n)).max() <= ROUNDOFF * np.abs(A.data).max()
    # symmetric element matrices: entry (i, j) gets the terms of (j, i) in the same order
    assert (A != A.T).nnz == 0


@pytest.mark.parametrize("which", sorted(P2_MESHES))
def test_quadratic_patch_test(which):
    # P2 reproduces quadratics, so at every interior dof K u = int f phi with f = -lap u
    # exactly, up to round-off (the patch test for quadratics; common practice, no source).
    mesh = P2_MESHES[which]()
    cells, area, K, coords = p2_setup(mesh)
    x, y = coords.T
    u = 1.0 + 2.0 * x - y + 3.0 * x**2 - x * y + 2.0 * y**2  # lap u = 6 + 4
    # int_T phi = 0 at vertices and |T|/3 at midpoints (Eisenberg & Malvern 1973, as above)
    F = np.zeros((len(area), 6))
    F[:, 3:] = -10.0 * area[:, None] / 3
    assembler = DofAssembler(cells)
    A, b = assembler.matrix(K), assembler.vector(F)
    np.testing.assert_array_equal(
        b, np.bincount(cells.ravel(), F.ravel(), minlength=len(coords))
    )  # reference: numpy's bincount, the same additions in the same cell order
    boundary = np.zeros(len(coords), dtype=bool)
    boundary[mesh.boundary_points()] = True
    side = {tuple(sorted(e)) for e in mesh.boundary_edges().tolist()}
    boundary[mesh.n_points:] = [tuple(e) in side for e in mesh.edges().tolist()]
    r = (A @ u - b)[~boundary]
    # round-off of a row's dot product: Higham's bound gamma_n |A| |u|, n <= 19 here
    # (N. J. Higham, "Accuracy and Stability of Numerical Algorithms", 2002, section 3.1)
    bound = (abs(A) @ np.abs(u) + np.abs(b))[~boundary]
    assert (~boundary).sum() > 20
    assert np.all(np.abs(r) <= 32 * EPS * bound)


# ---------------------------------------------------------------- two unknowns per point


def plane_stress(points, triangles, E=210e9, nu=0.3, thickness=0.01):
    """6x6 element stiffness of the constant-strain triangle in plane stress, t |T| B^T D B
    (M. J. Turner, R. W. Clough, H. C. Martin, L. J. Topp, "Stiffness and deflection analysis
    of complex structures", 1956; D as in Zienkiewicz, Taylor & Zhu 2005), with the
    displacement unknowns ordered (ux0, uy0, ux1, uy1, ux2, uy2)."""
    area, G = barycentric(points, triangles)
    m = len(area)
    B = np.zeros((m, 3, 6))
    B[:, 0, 0::2] = G[:, :, 0]
    B[:, 1, 1::2] = G[:, :, 1]
    B[:, 2, 0::2] = G[:, :, 1]
    B[:, 2, 1::2] = G[:, :, 0]
    D = E / (1 - nu**2) * np.array([[1, nu, 0], [nu, 1, 0], [0, 0, (1 - nu) / 2]])
    return thickness * area[:, None, None] * np.einsum("tki,kl,tlj->tij", B, D, B)


def test_two_unknowns_per_point_against_scipy_triplets():
    mesh = jittered_mesh(7, 3)
    tri = mesh.triangles
    cells = np.empty((len(tri), 6), dtype=np.int64)
    cells[:, 0::2] = 2 * tri
    cells[:, 1::2] = 2 * tri + 1
    K = plane_stress(mesh.points, tri)
    n = 2 * mesh.n_points
    A = DofAssembler(cells).matrix(K)
    assert_canonical(A)
    assert_close(A, triplets(cells, K, n))  # reference library: scipy
    # rigid motions cost no strain energy: K r = 0 for both translations and the
    # rotation (-y, x) (common practice, no source)
    x, y = mesh.points.T
    scale = np.abs(A.data).max()
    for r in (np.column_stack([np.ones_like(x), 0 * x]),
              np.column_stack([0 * x, np.ones_like(x)]),
              np.column_stack([-y, x])):
        assert np.abs(A @ r.ravel()).max() <= ROUNDOFF * scale  # measured under 2 EPS


def test_vector_laplacian_block_diagonal():
    # two unknowns per point, each with the P1 stiffness (a block-diagonal element matrix):
    # the even and the odd rows and columns are the scalar stiffness matrix, the cross
    # blocks are empty; compared with the library's P1 stiffness and with scipy triplets
    mesh = rectangle(6, 4)
    tri = mesh.triangles
    cells = np.column_stack([2 * tri, 2 * tri + 1])  # (ux0, ux1, ux2, uy0, uy1, uy2)
    area, G = barycentric(mesh.points, tri)
    k3 = area[:, None, None] * np.einsum("tad,tbd->tab", G, G)
    K = np.zeros((len(tri), 6, 6))
    K[:, :3, :3] = K[:, 3:, 3:] = k3
    A = DofAssembler(cells).matrix(K)
    assert_close(A, triplets(cells, K, 2 * mesh.n_points))  # reference library: scipy
    P1 = hatkernels.assemble_stiffness(mesh)
    for block in (A[0::2, 0::2], A[1::2, 1::2]):
        assert abs(block - P1).max() <= ROUNDOFF * abs(P1).max()
    assert abs(A[0::2, 1::2]).max() == 0


# ---------------------------------------------------------------- threads, reuse, dtypes


@pytest.mark.two_threads
def test_one_and_two_threads_give_identical_bits():
    mesh = rectangle(40, 40)  # 3200 quadratic triangles
    cells = p2_dofs(mesh)
    rng = np.random.default_rng(5)
    K = rng.standard_normal((len(cells), 6, 6))  # not symmetric: any element matrix
    F = rng.standard_normal((len(cells), 6))
    results = []
    for t in (1, 2):
        with hatkernels.threads(t):
            assembler = DofAssembler(cells)
            results.append((assembler.plan, assembler.matrix(K), assembler.vector(F)))
    (p1, A1, b1), (p2, A2, b2) = results
    for name in ("indptr", "indices", "ptr", "codes", "slots"):
        np.testing.assert_array_equal(getattr(p1, name), getattr(p2, name), err_msg=name)
    np.testing.assert_array_equal(A1.data.view(np.uint64), A2.data.view(np.uint64))
    np.testing.assert_array_equal(b1.view(np.uint64), b2.view(np.uint64))
    assert_close(A1, triplets(cells, K, A1.shape[0]))  # reference library: scipy
    np.testing.assert_array_equal(
        b1, np.bincount(cells.ravel(), F.ravel(), minlength=len(b1))
    )  # reference: numpy's bincount, the same additions in the same cell order


def test_second_call_reuses_the_plan():
    mesh = rectangle(5, 4)
    cells, _, K, _ = p2_setup(mesh)
    assembler = DofAssembler(cells)
    plan = assembler.plan
    A1 = assembler.matrix(K)
    first = A1.copy()
    K2 = np.random.default_rng(1).standard_normal(K.shape)
    A2 = assembler.matrix(K2)
    assert assembler.plan is plan
    assert_close(A2, triplets(cells, K2, A2.shape[0]))  # reference library: scipy
    # each matrix owns its arrays: the second call and changes to a result touch no other
    assert_close(A1, first, rel=0)
    A2.data[:] = 0.0
    A2.indices[:] = 0
    assert_close(assembler.matrix(K), first, rel=0)


def test_inputs_are_never_modified_and_may_be_read_only():
    cells, _, K, _ = p2_setup(rectangle(3, 3))
    F = np.arange(cells.size, dtype=float).reshape(cells.shape)
    for a in (cells, K, F):
        a.setflags(write=False)
    saved = [a.copy() for a in (cells, K, F)]
    assembler = DofAssembler(cells)
    assembler.matrix(K)
    assembler.vector(F)
    for a, b in zip((cells, K, F), saved, strict=True):
        np.testing.assert_array_equal(a, b)


def test_long_rows_against_scipy_triplets():
    # twelve dofs per cell, each of the first 120 dofs in about ten cells: rows of more
    # than 64 distinct columns take the kernel's sorting branch, the others (and the
    # last cell's) its insertion branch
    rng = np.random.default_rng(11)
    cells = np.array([rng.permutation(120)[:12] for _ in range(100)]
                     + [list(range(121, 133))])
    K = rng.standard_normal((len(cells), 12, 12))
    assembler = DofAssembler(cells)
    A = assembler.matrix(K)
    assert_canonical(A)
    assert_close(A, triplets(cells, K, 133))  # reference library: scipy
    lengths = np.diff(A.indptr)
    assert lengths[:120].max() > 64 and lengths[:120].min() <= 64 and lengths[121:].max() == 12


@given(st.integers(2, 12), st.integers(1, 80), st.integers(0, 40), st.integers(0, 2**32 - 1))
def test_pattern_and_slots_match_their_definitions(k, m, spare, seed):
    # random tables (dofs in no cell included): the pattern equals scipy's pattern of the
    # same pairs, and each slot is the position of its pair in the row (by search)
    rng = np.random.default_rng(seed)
    n = k + spare + int(rng.integers(0, 2 * k))
    cells = np.array([rng.permutation(n)[:k] for _ in range(m)])
    pl = DofAssembler(cells, n_dofs=n).plan
    ones = triplets(cells, np.ones((m, k, k)), n)  # reference library: scipy
    np.testing.assert_array_equal(pl.indptr, ones.indptr)
    np.testing.assert_array_equal(pl.indices, ones.indices)
    for t in range(m):
        for a in range(k):
            i = cells[t, a]
            row = pl.indices[pl.indptr[i]:pl.indptr[i + 1]]
            want = pl.indptr[i] + np.searchsorted(row, cells[t])
            np.testing.assert_array_equal(pl.slots[k * t + a], want)


def test_explicit_zeros_are_kept_and_unused_dofs_have_empty_rows():
    cells = np.array([[0, 2, 3], [3, 2, 5]])
    assembler = DofAssembler(cells, n_dofs=7)  # dofs 1, 4 and 6 are in no cell
    A = assembler.matrix(np.zeros((2, 3, 3)))
    ones = triplets(cells, np.ones((2, 3, 3)), 7)  # the pattern (reference library: scipy)
    np.testing.assert_array_equal(A.indptr, ones.indptr)
    np.testing.assert_array_equal(A.indices, ones.indices)
    assert A.nnz == 14 and not A.data.any()
    assert np.diff(A.indptr)[[1, 4, 6]].tolist() == [0, 0, 0]
    np.testing.assert_array_equal(
        assembler.vector(np.ones((2, 3))), [1, 0, 2, 2, 0, 1, 0]
    )  # counted by hand


@pytest.mark.parametrize("limit", [10, 100])
def test_int64_indices_forced(monkeypatch, limit):
    # limit 10: everything is over it; limit 100: the dofs (25) and incidences (48) fit,
    # the stored entries do not, so the pattern is promoted after counting
    cells, _, K, _ = p2_setup(rectangle(2, 2))
    narrow = DofAssembler(cells)
    assert narrow.plan.dtype == np.int32
    assert len(cells) * 6 < 100 < narrow.plan.nnz
    monkeypatch.setattr(core_index, "_INT32_MAX", limit)
    wide = DofAssembler(cells)
    pl = wide.plan
    for a in (pl.indptr, pl.indices, pl.ptr, pl.codes, pl.slots):
        assert a.dtype == np.int64
    A = wide.matrix(K)  # scipy narrows index arrays whose values fit int32: not checked
    assert_close(A, triplets(cells, K, A.shape[0]))  # reference library: scipy
    assert_close(A, narrow.matrix(K), rel=0)
    np.testing.assert_array_equal(wide.vector(K[:, 0]), narrow.vector(K[:, 0]))


# ---------------------------------------------------------------- bad input


@pytest.mark.parametrize(
    "cells, n_dofs, words",
    [
        ([[0, 1, 2], [2, 1, -4]], None, ["cell 1", "negative", "-4", "position 2"]),
        ([[0, 1, 2], [2, 1, 3]], 3, ["cell 1", "3", "out of range", "n_dofs = 3"]),
        ([[0, 1, 2], [2, 5, 2]], None, ["cell 1", "dof 2 twice", "positions 0 and 2"]),
        ([0, 1, 2], None, ["2-D", "(3,)"]),
        (np.zeros((0, 3), dtype=int), None, ["empty", "(0, 3)"]),
        (np.zeros((4, 0), dtype=int), None, ["empty", "(4, 0)"]),
        ([[0.0, 1.0, 2.0]], None, ["integers", "float64"]),
        ([[True, False]], None, ["integers", "bool"]),
        ([[0, 1], [1, 2, 3]], None, ["(n_cells, k)"]),
        ([[0, 1, 2]], 0, ["at least 1"]),
        ([[0, 1, 2]], 2.5, ["n_dofs", "integer"]),
        ([[0, 1, 2]], True, ["n_dofs", "integer"]),
    ],
)
def test_bad_cell_dofs_are_named(cells, n_dofs, words):
    with pytest.raises(InputError) as info:
        DofAssembler(cells, n_dofs)
    for w in words:
        assert w in str(info.value)


def test_bad_element_arrays_are_named():
    assembler = DofAssembler([[0, 1, 2], [1, 2, 3], [2, 3, 4]])
    K = np.ones((3, 3, 3))
    with pytest.raises(InputError, match=r"shape \(3, 3\).*expected \(3, 3, 3\)"):
        assembler.matrix(K[0])
    with pytest.raises(InputError, match="real numbers"):
        assembler.matrix(K.astype(complex))
    bad = K.copy()
    bad[2, 0, 0] = np.inf
    bad[1, 2, 1] = np.nan
    with pytest.raises(InputError, match=r"cell 1 has a non-finite entry nan at local \(2, 1\)"):
        assembler.matrix(bad)
    F = np.ones((3, 3))
    F[2, 1] = -np.inf
    with pytest.raises(InputError, match=r"element_vectors: cell 2 .* -inf at local 1"):
        assembler.vector(F)
    with pytest.raises(InputError, match=r"element_vectors has shape \(3, 4\)"):
        assembler.vector(np.ones((3, 4)))
    # finite values whose total overflows are accepted when no assembled entry does ...
    huge = np.full((3, 3, 3), 1e308)
    huge[:, 1:, :] = huge[:, :, 1:] = 0.0  # only (dof of local 0, same): 0, 1, 2 once each
    A = assembler.matrix(huge)
    np.testing.assert_array_equal(A.diagonal(), [1e308, 1e308, 1e308, 0, 0])
    # ... and refused, naming the entry, when one does: never a silent inf
    with pytest.raises(InputError, match=r"entry \(1, 1\) overflows"):
        assembler.matrix(np.full((3, 3, 3), 1e308))
    with pytest.raises(InputError, match="entry 1 overflows"):
        assembler.vector(np.full((3, 3), 1e308))


DTYPES = [np.int8, np.int32, np.int64, np.uint8, np.uint64, np.float64, np.bool_]


@given(
    shape=st.tuples(st.integers(0, 5), st.integers(0, 4)),
    dtype=st.sampled_from(DTYPES),
    n_dofs=st.one_of(st.none(), st.integers(-1, 12)),
    valid_rows=st.booleans(),
    seed=st.integers(0, 2**32 - 1),
)
def test_random_cell_dofs_work_or_are_named(shape, dtype, n_dofs, valid_rows, seed):
    rng = np.random.default_rng(seed)
    raw = rng.integers(-2, 10, size=shape)
    if valid_rows and shape[1] <= 10:  # most cases valid, so that the results get checked
        raw = np.array([rng.permutation(10)[: shape[1]] for _ in range(shape[0])])
        raw = raw.reshape(shape)
    cells = raw.astype(dtype) if np.dtype(dtype).kind != "u" else np.abs(raw).astype(dtype)
    try:
        assembler = DofAssembler(cells, n_dofs)
    except InputError as exc:
        msg = str(exc)
        assert any(w in msg for w in ("cell", "empty", "integers", "n_dofs", "2-D")), msg
        return
    valid = cells.astype(np.int64)
    n = valid.max() + 1 if n_dofs is None else n_dofs
    assert valid.min() >= 0 and valid.max() < n
    assert all(len(set(row)) == len(row) for row in valid.tolist())
    K = rng.standard_normal((shape[0], shape[1], shape[1]))
    assert_close(assembler.matrix(K), triplets(valid, K, n))  # reference library: scipy
    F = rng.standard_normal(shape)
    # reference: numpy's bincount, the same additions in the same cell order
    np.testing.assert_array_equal(
        assembler.vector(F), np.bincount(valid.ravel(), F.ravel(), minlength=n)
    )


@given(
    shape=st.lists(st.integers(0, 4), min_size=0, max_size=4),
    poison=st.sampled_from([None, np.nan, np.inf, -np.inf]),
    kind=st.sampled_from(["float64", "float32", "int64", "complex", "object"]),
    seed=st.integers(0, 2**32 - 1),
)
def test_random_element_arrays_work_or_are_named(shape, poison, kind, seed):
    assembler = DofAssembler([[0, 1, 2], [3, 1, 0]])
    rng = np.random.default_rng(seed)
    values = rng.standard_normal(shape)
    if poison is not None and values.size:
        values.flat[rng.integers(values.size)] = poison
    values = values.astype(kind) if kind != "int64" or np.isfinite(values).all() else values
    for call, good in ((assembler.matrix, (2, 3, 3)), (assembler.vector, (2, 3))):
        try:
            call(values)
        except InputError as exc:
            msg = str(exc)
            if kind in ("complex", "object"):
                assert "real numbers" in msg, msg
            elif tuple(shape) != good:
                assert "shape" in msg, msg
            else:
                first = np.flatnonzero(~np.isfinite(values.reshape(2, -1)).all(axis=1))[0]
                assert f"cell {first} has a non-finite entry" in msg, msg
        else:
            assert tuple(shape) == good and kind not in ("complex", "object")
            assert np.isfinite(values).all()


@pytest.mark.parametrize("which", sorted(P2_MESHES))
def test_row_gather_for_tables_beyond_64_colours_agrees(which):
    # a table whose cells need more than 64 colours falls back to the row gather; both
    # paths against scipy's triplets (reference library), each symmetric to the bit
    import dataclasses

    mesh = P2_MESHES[which]()
    cells, _, K, coords = p2_setup(mesh)
    assembler = DofAssembler(cells)
    assert assembler.plan.colour_ptr is not None  # a numbered mesh: few colours
    scattered = assembler.matrix(K)
    assembler._plan = dataclasses.replace(assembler.plan, colour_ptr=None, blocks=None)
    gathered = assembler.matrix(K)
    for A in (scattered, gathered):
        assert_close(A, triplets(cells, K, len(coords)))
        assert (A != A.T).nnz == 0


def test_a_table_with_no_locality_needs_the_row_gather():
    # cells in random order over few dofs: every block touches every dof's neighbourhood,
    # more than 64 colours; the plan says so and the gather still agrees with scipy
    rng = np.random.default_rng(3)
    cells = np.array([rng.choice(200, size=3, replace=False) for _ in range(40_000)])
    assembler = DofAssembler(cells, 200)
    assert assembler.plan.colour_ptr is None
    K = rng.random((len(cells), 3, 3))
    assert_close(assembler.matrix(K), triplets(cells, K, 200))
