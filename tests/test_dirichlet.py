"""Dirichlet reduction and lifting."""

import warnings

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from conftest import EPS, jittered_mesh, meshes, two_threads
from hypothesis import given
from hypothesis import strategies as st

import hatkernels
from hatkernels import Mesh, apply_dirichlet, assemble_load, assemble_stiffness
from hatkernels.mesh import rectangle


@given(meshes())
def test_reduction_equals_scipy_slicing(m):
    A = assemble_stiffness(m, np.linspace(1, 2, m.n_triangles))
    b = assemble_load(m, lambda x, y: np.sin(3 * x) + y)
    points = m.boundary_points()
    g = 1.0 + m.points[points, 0] ** 2
    s = apply_dirichlet(A, b, points, g)
    free = np.setdiff1d(np.arange(m.n_points), points)
    # reference library: scipy sparse indexing
    Aff = A[free][:, free]
    Afd = A[free][:, points]
    assert (s.free == free).all()
    assert abs(s.A - Aff).max() == 0 and (s.A.indices == Aff.indices).all()
    # the same sum in another order: within the round-off bound of a product
    # (Higham, Accuracy and Stability of Numerical Algorithms, 2002, section 3.5)
    bound = 8 * EPS * (np.abs(b[free]) + abs(Afd) @ np.abs(g))
    assert np.all(np.abs(s.b - (b[free] - Afd @ g)) <= bound)
    assert s.A.has_canonical_format


def test_reduced_matrix_is_spd_and_linear_solutions_are_exact():
    # P1 elements reproduce linear functions exactly: the patch test (B. M. Irons
    # and A. Razzaque, Experience with the patch test for convergence of finite
    # elements, 1972).  u = 1 + 2x - 3y is harmonic; with its boundary values the
    # discrete solution equals it at every point.
    m = jittered_mesh(9, 4)
    u = lambda x, y: 1 + 2 * x - 3 * y  # noqa: E731
    A = assemble_stiffness(m)
    points = m.boundary_points()
    s = apply_dirichlet(A, np.zeros(m.n_points), points, u(*m.points[points].T))
    eig = np.linalg.eigvalsh(s.A.toarray())
    assert eig.min() > 0
    x = spla.spsolve(s.A.tocsc(), s.b)  # reference library: scipy
    # a backward-stable solve is exact up to cond(A) times round-off (Higham 2002, ch. 7)
    exact = u(*m.points.T)
    cond = eig.max() / eig.min()
    assert np.abs(s.expand(x) - exact).max() <= 16 * EPS * cond * np.abs(exact).max()
    assert np.array_equal(s.restrict(s.expand(x)), x)  # copies, no arithmetic


def test_inputs_are_not_modified_and_odd_inputs_work():
    m = rectangle(4, 4)
    A = assemble_stiffness(m)
    A_dup = sp.coo_matrix(A)
    A_dup = sp.coo_matrix(
        (
            np.r_[A_dup.data / 2, A_dup.data / 2],
            (np.r_[A_dup.row, A_dup.row], np.r_[A_dup.col, A_dup.col]),
        ),
        shape=A.shape,
    ).tocsr()  # duplicates, not canonical
    b = np.ones(m.n_points)
    points = np.r_[m.boundary_points(), m.boundary_points()[:3]]  # repeats with equal values
    before = (A.data.copy(), b.copy(), points.copy(), A_dup.data.copy())
    s1 = apply_dirichlet(A, b, points, 2.0)
    s2 = apply_dirichlet(A_dup, b, points, 2.0)
    # halves add back exactly in binary: the same matrix and vector to the bit
    assert (s1.A != s2.A).nnz == 0 and np.array_equal(s1.b, s2.b)
    assert (A.data == before[0]).all() and (b == before[1]).all()
    assert (points == before[2]).all() and (A_dup.data == before[3]).all()
    s3 = apply_dirichlet(A.astype(np.float32), b, m.boundary_points(), 2.0)
    assert s3.A.dtype == np.float64


def test_one_point_may_be_given_as_a_number():
    m = rectangle(3, 3)
    A = assemble_stiffness(m)
    b = assemble_load(m, 1.0)
    for point in (5, np.int32(5), np.array(5)):
        s = apply_dirichlet(A, b, point, 2.0)
        assert s.fixed.tolist() == [5] and s.values.tolist() == [2.0]


def test_isolated_points_are_left_out():
    base = rectangle(3, 3)
    with pytest.warns(hatkernels.MeshWarning):
        m = Mesh(np.r_[base.points, [[9.0, 9.0]]], base.triangles)
    A = assemble_stiffness(m)
    b = assemble_load(m, 1.0)
    s = apply_dirichlet(A, b, base.boundary_points())
    assert s.isolated.tolist() == [16]
    assert 16 not in s.free
    u = s.expand(spla.spsolve(s.A.tocsc(), s.b))
    assert u[16] == 0 and np.isfinite(u).all()
    b[16] = 1.0
    with pytest.raises(
        hatkernels.InputError, match=r"row 16 of the matrix is empty but b\[16\] = 1.0"
    ):
        apply_dirichlet(A, b, base.boundary_points())


def test_bad_inputs_are_named():
    m = rectangle(3, 3)
    A = assemble_stiffness(m)
    b = np.zeros(m.n_points)
    with pytest.raises(hatkernels.InputError, match=r"points\[1\] = 16 is outside 0..15"):
        apply_dirichlet(A, b, [0, 16])
    with pytest.raises(hatkernels.InputError, match="point 3 is given two different Dirichlet values"):
        apply_dirichlet(A, b, [3, 3], [1.0, 2.0])
    with pytest.raises(hatkernels.InputError, match="Dirichlet value nan at point 5"):
        apply_dirichlet(A, b, [5], [np.nan])
    with pytest.raises(hatkernels.InputError, match="got 2 Dirichlet values for 3 points"):
        apply_dirichlet(A, b, [0, 1, 2], [1.0, 2.0])
    with pytest.raises(hatkernels.InputError, match=r"b must have shape \(16,\)"):
        apply_dirichlet(A, b[:3], [0])
    with pytest.raises(hatkernels.InputError, match=r"b\[2\] = inf"):
        apply_dirichlet(A, np.r_[0, 0, np.inf, np.zeros(13)], [0])
    with pytest.raises(hatkernels.InputError, match="must be square"):
        apply_dirichlet(A[:3], b, [0])
    with pytest.raises(hatkernels.InputError, match=r"points must be a 1-D array .* bool"):
        apply_dirichlet(A, b, np.ones(16, dtype=bool))
    with pytest.raises(hatkernels.InputError, match="points cannot be read as an array"):
        apply_dirichlet(A, b, [[0], [1, 2]])
    F = A.copy()
    F[2, 3] = np.inf
    with pytest.raises(hatkernels.InputError, match="non-finite entry inf at row 2, column 3"):
        apply_dirichlet(F, b, [0])
    with pytest.raises(hatkernels.InputError, match="scipy sparse matrix"):
        apply_dirichlet(A.toarray(), b, [0])
    N = A.copy()
    N[5, 5] = -1.0
    with pytest.raises(hatkernels.InputError, match="row 5 has diagonal -1.0 <= 0"):
        apply_dirichlet(N, b, [0])


@pytest.mark.two_threads
@given(st.integers(1, 40), st.floats(0.0, 0.5), st.integers(0, 2**32 - 1))
def test_row_summary_matches_scipy(n, density, seed):
    # reference library: scipy's diagonal and row sums of absolute values; rows with no
    # entry, rows of explicit zeros and repeated entries included
    from hatkernels import threads
    from hatkernels._jit import dirichlet as _jd

    rng = np.random.default_rng(seed)
    A = sp.random_array((n, n), density=density, rng=rng, format="coo")
    rows = np.r_[A.row, rng.integers(0, n, 3)]  # three repeated or explicitly zero entries
    cols = np.r_[A.col, rng.integers(0, n, 3)]
    vals = np.r_[A.data, 0.0, 0.0, rng.standard_normal()]
    C = sp.csr_array((vals, (rows, cols)), shape=(n, n))  # keeps explicit zeros
    C.sum_duplicates()
    results = []
    for t in (1, 2):
        with threads(t):
            diag, empty = np.empty(n), np.empty(n, dtype=np.bool_)
            _jd.row_summary(C.indptr, C.indices, C.data, diag, empty)
            results.append((diag, empty))
    diag, empty = results[0]
    assert np.array_equal(diag, results[1][0]) and np.array_equal(empty, results[1][1])
    assert np.array_equal(diag, C.diagonal())
    assert np.array_equal(empty, np.asarray(abs(C).sum(axis=1)).ravel() == 0)


@given(meshes(), st.floats(0.0, 0.9), st.integers(0, 2**32 - 1))
def test_reduction_in_place_equals_scipy_slicing(m, fraction, seed):
    # the solvers' reduction writes the free-free block over the assembled matrix's own
    # arrays; checked against scipy's indexing, with many points held (the copy branch)
    rng = np.random.default_rng(seed)
    A = assemble_stiffness(m, np.linspace(1, 2, m.n_triangles))
    b = assemble_load(m, lambda x, y: np.sin(3 * x) + y)
    points = np.union1d(m.boundary_points(),
                        np.flatnonzero(rng.random(m.n_points) < fraction))
    g = 1.0 + m.points[points, 0] ** 2
    free = np.setdiff1d(np.arange(m.n_points), points)
    Aff, Afd = A[free][:, free], A[free][:, points]  # reference library: scipy
    b_before = b.copy()
    s = hatkernels.boundary.apply_dirichlet_in_place(A.copy(), b, points, g)
    assert np.array_equal(b, b_before)
    assert (s.free == free).all() and s.A.has_canonical_format
    assert np.array_equal(s.A.indptr, Aff.indptr) and np.array_equal(s.A.indices, Aff.indices)
    assert np.array_equal(s.A.data, Aff.data)
    # the same sum in another order (Higham, Accuracy and Stability of Numerical
    # Algorithms, 2002, section 3.5)
    bound = 8 * EPS * (np.abs(b[free]) + abs(Afd) @ np.abs(g))
    assert np.all(np.abs(s.b - (b[free] - Afd @ g)) <= bound)
    # and to the bit what the copying reduction gives
    c = apply_dirichlet(A, b, points, g)
    assert np.array_equal(s.b, c.b) and np.array_equal(s.A.data, c.A.data)


def _holed(mesh, keep, seed):
    """A random subset of ``mesh``'s triangles on all its points: holes, pinched points
    and points in no triangle (the mesh warns about those)."""
    rng = np.random.default_rng(seed)
    tri = mesh.triangles[rng.random(mesh.n_triangles) < keep]
    if tri.shape[0] == 0:
        tri = mesh.triangles[:1]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", hatkernels.MeshWarning)
        return Mesh(mesh.points, tri)


@given(meshes(), st.floats(0.4, 1.0), st.floats(0.0, 0.9), st.integers(0, 2**32 - 1),
       st.sampled_from(["scalar", "per-triangle", "tensor"]))
def test_rows_assembled_straight_into_the_reduced_system(m, keep, fraction, seed, kind):
    # the solvers' reduction without the whole matrix: each free row goes straight into
    # the reduced system.  Against scipy's indexing of the reference assembly, and to the
    # bit what reducing the whole (fused) matrix gives
    m = _holed(m, keep, seed)
    rng = np.random.default_rng(seed)
    coefficient = {"scalar": 2.5, "per-triangle": rng.uniform(1, 3, m.n_triangles),
                   "tensor": np.array([[2.0, 0.3], [0.3, 1.0]])}[kind]
    b = assemble_load(m, lambda x, y: np.sin(3 * x) + y)
    points = np.flatnonzero(rng.random(m.n_points) < fraction)
    g = 1.0 + m.points[points, 0] ** 2
    b_before = b.copy()
    s = hatkernels.StiffnessAssembler(m).assemble_reduced(b, points, g, coefficient)
    assert np.array_equal(b, b_before)
    A = assemble_stiffness(m, coefficient, strategy="reference")
    used = np.unique(m.triangles)
    free = np.setdiff1d(used, points)
    assert np.array_equal(s.free, free)
    assert np.array_equal(s.isolated, np.setdiff1d(np.setdiff1d(np.arange(m.n_points), used),
                                                   points))
    Aff, Afd = A[free][:, free], A[free][:, points]  # reference library: scipy's indexing
    assert s.A.has_canonical_format and np.array_equal(s.A.indptr, Aff.indptr)
    assert np.array_equal(s.A.indices, Aff.indices)
    # the reference strategy sums each entry's terms in another order (Higham, Accuracy
    # and Stability of Numerical Algorithms, 2002, section 3.5)
    scale = abs(A).max()
    assert np.allclose(s.A.data, Aff.data, rtol=0, atol=16 * EPS * scale)
    lifted = b[free] - Afd @ g
    assert np.allclose(s.b, lifted, rtol=0, atol=16 * EPS * (np.abs(b).max() + scale * 3))
    whole = hatkernels.StiffnessAssembler(m, fused=True).assemble(coefficient)
    c = apply_dirichlet(whole, b, points, g)
    assert np.array_equal(s.A.data, c.A.data) and np.array_equal(s.b, c.b)


@two_threads
def test_rows_assembled_straight_give_the_same_bits_on_one_and_two_threads():
    m = jittered_mesh(40, 7)
    b = assemble_load(m, 1.0)
    results = []
    for n in (1, 2):
        with hatkernels.threads(n):
            s = hatkernels.StiffnessAssembler(m).assemble_reduced(b, m.boundary_points(), 0.5,
                                                                  np.linspace(1, 2, m.n_triangles))
            results.append((s.A.data, s.A.indices, s.b))
    assert all(np.array_equal(x, y) for x, y in zip(*results, strict=True))


def test_a_row_that_cannot_be_reduced_takes_the_whole_matrix_path(monkeypatch):
    # valid meshes and coefficients always give free rows a positive diagonal (the mesh
    # refuses areas float64 cannot hold, the coefficient must be positive), so the
    # kernel's report of a bad row is forced here: the call then reduces the whole
    # matrix, and gives what that gives
    from hatkernels.assembly.csr import CSRNumeric

    m = jittered_mesh(6, 3)
    b = assemble_load(m, 1.0)
    straight = hatkernels.StiffnessAssembler(m).assemble_reduced(b, m.boundary_points(), 2.0)
    monkeypatch.setattr(CSRNumeric, "stiffness_reduced", lambda self, *args: 5)
    s = hatkernels.StiffnessAssembler(m).assemble_reduced(b, m.boundary_points(), 2.0)
    c = apply_dirichlet(hatkernels.StiffnessAssembler(m, fused=True).assemble(), b,
                        m.boundary_points(), 2.0)
    for r in (s, straight):
        assert np.array_equal(r.A.data, c.A.data) and np.array_equal(r.A.indices, c.A.indices)
        assert np.array_equal(r.b, c.b) and np.array_equal(r.free, c.free)


@given(meshes(), st.floats(0.4, 1.0), st.floats(0.0, 0.9), st.integers(0, 2**32 - 1))
def test_row_counts_from_the_fixed_rows_match_the_plain_count(m, keep, fraction, seed):
    # on a symmetric pattern the fixed rows alone tell each free row's fixed columns;
    # against the count over every entry (reduced_counts) and scipy's indexing
    from hatkernels._jit import dirichlet as _jd

    m = _holed(m, keep, seed)
    A = assemble_stiffness(m)
    fixed = np.flatnonzero(np.random.default_rng(seed).random(m.n_points) < fraction)
    free = np.setdiff1d(np.arange(m.n_points), fixed).astype(A.indptr.dtype)
    newindex = np.full(m.n_points, -1, dtype=A.indptr.dtype)
    newindex[free] = np.arange(free.size)
    counts = np.empty(free.size, dtype=A.indptr.dtype)
    _jd.reduced_counts_symmetric(A.indptr, A.indices, fixed.astype(A.indptr.dtype), free,
                                 np.zeros(m.n_points, dtype=A.indptr.dtype), counts)
    assert np.array_equal(counts, _jd.reduced_counts(A.indptr, A.indices, newindex, free))
    assert np.array_equal(counts, np.diff(A[free][:, free].indptr))  # reference: scipy
