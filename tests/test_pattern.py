"""The CSR pattern of a triangle mesh: rows straight into place from predicted lengths,
against scipy's pattern of the same point pairs and against the scratch-array build."""

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import jittered_mesh
from hypothesis import given, settings
from hypothesis import strategies as st

from hatkernels import threads
from hatkernels._jit import topology as _topo
from hatkernels.mesh import rectangle
from hatkernels.mesh.pattern import csr_pattern


def incidence(tri, n):
    ptr = np.empty(n + 1, dtype=tri.dtype)
    codes = np.empty(3 * tri.shape[0], dtype=tri.dtype)
    _topo.incidence(tri, ptr, codes)
    return ptr, codes


def outgoing_plain(tri, n):
    """Per point, the edges leaving it whose reverse no triangle has (plain NumPy)."""
    heads = tri.ravel()
    tails = np.roll(tri, -1, axis=1).ravel()
    directed = set(zip(heads.tolist(), tails.tolist(), strict=True))
    boundary = [a for a, b in directed if (b, a) not in directed]
    return np.bincount(np.array(boundary, dtype=np.int64), minlength=n)


def scipy_pattern(tri, n):
    # reference library: scipy's CSR of every pair of points sharing a triangle, each
    # used point's diagonal included, duplicates summed and indices sorted
    rows = np.repeat(tri, 3, axis=1).ravel()
    cols = np.tile(tri, (1, 3)).ravel()
    S = sp.csr_array((np.ones(rows.size), (rows, cols)), shape=(n, n))
    S.sum_duplicates()
    return S


def holed_mesh(cells, seed, keep):
    """``(tri, n, ptr, codes)`` of a random subset of a Delaunay mesh's triangles (holes,
    points where fans of triangles touch, points in no triangle), or None if empty."""
    mesh = jittered_mesh(cells, seed)
    rng = np.random.default_rng(seed)
    tri = mesh.triangles[rng.random(mesh.n_triangles) < keep].astype(np.int32)
    if tri.shape[0] == 0:
        return None
    return (tri, mesh.n_points, *incidence(tri, mesh.n_points))


@settings(max_examples=25, deadline=None)
@given(cells=st.integers(3, 12), seed=st.integers(0, 10_000),
       keep=st.floats(0.3, 1.0))
def test_predicted_rows_give_scipys_pattern_on_meshes_with_holes_and_pinches(cells, seed,
                                                                            keep):
    # a random subset of a Delaunay mesh's triangles: holes, points where two fans of
    # triangles touch (their rows are longer by one per fan) and points in no triangle
    holed = holed_mesh(cells, seed, keep)
    if holed is None:
        return
    tri, n, ptr, codes = holed
    outgoing = outgoing_plain(tri, n)
    indptr, indices, diag = csr_pattern(tri, ptr, codes, outgoing=outgoing)
    ref = scipy_pattern(tri, n)
    # the prediction itself held: the one-pass kernel found every row's length right
    k = np.diff(ptr)
    lengths = np.where(k > 0, 1 + k + outgoing, 0)
    assert np.array_equal(lengths, np.diff(ref.indptr))
    assert _topo.pattern_direct(tri, ptr, codes, indptr.copy(), indices.copy(),
                                diag.copy()) == 0
    assert np.array_equal(indptr, ref.indptr) and np.array_equal(indices, ref.indices)
    used = np.diff(indptr) > 0
    assert np.all(diag[~used] == -1)
    assert np.array_equal(indices[diag[used]], np.flatnonzero(used))
    plain = csr_pattern(tri, ptr, codes)  # the scratch-array build: the same arrays
    assert all(np.array_equal(a, b) for a, b in zip(plain, (indptr, indices, diag),
                                                    strict=True))


def test_a_wrong_prediction_falls_back_to_the_scratch_build():
    mesh = rectangle(6, 5)
    tri = mesh.triangles.astype(np.int32)
    ptr, codes = incidence(tri, mesh.n_points)
    right = csr_pattern(tri, ptr, codes)
    for outgoing in (np.zeros(mesh.n_points, dtype=np.int64),  # rows too short
                     np.full(mesh.n_points, 2)):  # rows too long
        got = csr_pattern(tri, ptr, codes, outgoing=outgoing)
        assert all(np.array_equal(a, b) for a, b in zip(got, right, strict=True))


@settings(max_examples=25, deadline=None)
@given(cells=st.integers(3, 10), seed=st.integers(0, 10_000), keep=st.floats(0.3, 0.9))
def test_rows_short_by_their_boundary_edges_are_caught(cells, seed, keep):
    # a row predicted with no boundary edge takes its successors only unless the power
    # sums of its predecessors differ: on meshes with holes and pinched points (one or
    # two boundary fans at a point), predicting no boundary edge anywhere is caught,
    # and the result is scipy's pattern all the same
    holed = holed_mesh(cells, seed, keep)
    if holed is None:
        return
    tri, n, ptr, codes = holed
    indptr, indices, diag = csr_pattern(tri, ptr, codes, outgoing=np.zeros(n, np.int64))
    ref = scipy_pattern(tri, n)
    assert np.array_equal(indptr, ref.indptr) and np.array_equal(indices, ref.indices)
    # and the kernel itself reported the short rows: one per point with a boundary edge
    counts = np.where(np.diff(ptr) > 0, 1 + np.diff(ptr), 0)
    short = np.zeros(n + 1, dtype=indptr.dtype)
    np.cumsum(counts, out=short[1:])
    wrong = _topo.pattern_direct(tri, ptr, codes, short, np.empty(short[-1], indptr.dtype),
                                 np.empty(n, indptr.dtype))
    assert wrong == np.count_nonzero(outgoing_plain(tri, n))


@pytest.mark.two_threads
def test_same_pattern_on_one_and_two_threads():
    mesh = jittered_mesh(30, 4)
    tri = mesh.triangles.astype(np.int32)
    ptr, codes = incidence(tri, mesh.n_points)
    outgoing = outgoing_plain(tri, mesh.n_points)
    results = []
    for n in (1, 2):
        with threads(n):
            results.append(csr_pattern(tri, ptr, codes, outgoing=outgoing))
    assert all(np.array_equal(a, b) for a, b in zip(*results, strict=True))
