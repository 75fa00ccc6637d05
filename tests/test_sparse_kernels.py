"""Parallel sparse kernels against scipy/numpy, and bit-identity across thread counts."""

import gc

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import EPS, two_threads
from hypothesis import given
from hypothesis import strategies as st
from pyamg.gallery import poisson

from hatkernels import sparse as hk_sparse
from hatkernels._jit import sparse as K
from hatkernels._jit import threads
from hatkernels.errors import InputError
from hatkernels.sparse import as_csr, as_vector, csr_bytes, dot, spmv


def with_index_dtype(A, dtype):
    """A copy of CSR ``A`` with both index arrays of ``dtype`` (set directly: scipy's
    constructor would choose its own)."""
    B = sp.csr_array(A, copy=True)
    B.indices = B.indices.astype(dtype)
    B.indptr = B.indptr.astype(dtype)
    return B


def dot_bound(x, y):
    # |fl(x.y) - x.y| <= gamma_n sum |x_i y_i|, gamma_n = n u / (1 - n u): Higham,
    # "Accuracy and Stability of Numerical Algorithms", 2nd ed. 2002, section 3.1.
    n = len(x)
    gamma = n * EPS / (1 - n * EPS)
    return 2 * gamma * float(np.abs(x) @ np.abs(y)) + 1e-300


@st.composite
def csr_matrices(draw, square=False):
    """Random CSR matrices with empty rows, duplicates and unsorted columns."""
    n_rows = draw(st.integers(1, 40))
    n_cols = n_rows if square else draw(st.integers(1, 40))
    nnz = draw(st.integers(0, 4 * n_rows))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    counts = rng.multinomial(nnz, np.full(n_rows, 1.0 / n_rows))
    indptr = np.concatenate([[0], np.cumsum(counts)])
    indices = rng.integers(0, n_cols, nnz)  # unsorted within rows, duplicates allowed
    data = rng.standard_normal(nnz)
    A = sp.csr_array((data, indices, indptr), shape=(n_rows, n_cols))
    return A, rng


@pytest.mark.parametrize("index_dtype", [np.int32, np.int64], ids=["int32", "int64"])
def test_spmv_equals_scipy_on_poisson(index_dtype):
    A = with_index_dtype(poisson((30, 40), format="csr"), index_dtype)
    x = np.random.default_rng(1).standard_normal(A.shape[0])
    y = np.empty(A.shape[0])
    K.spmv(A.indptr, A.indices, A.data, x, y)
    # reference library: scipy (CSR product A @ x, same row order, so equal bits expected
    # up to scipy's own summation order: compare to round-off)
    ref = A @ x
    assert np.allclose(y, ref, rtol=0, atol=8 * EPS * np.abs(A) @ np.abs(x))
    assert A.indices.dtype == index_dtype and A.indptr.dtype == index_dtype


def test_spmv_int32_and_int64_give_same_bits():
    A = poisson((25, 25), format="csr")
    x = np.random.default_rng(2).standard_normal(A.shape[0])
    y32, y64 = np.empty_like(x), np.empty_like(x)
    B = with_index_dtype(A, np.int64)
    K.spmv(A.indptr, A.indices, A.data, x, y32)
    K.spmv(B.indptr, B.indices, B.data, x, y64)
    assert np.array_equal(y32, y64)


@given(csr_matrices())
def test_spmv_kernels_match_scipy_on_random_csr(case):
    A, rng = case
    x = rng.standard_normal(A.shape[1])
    b = rng.standard_normal(A.shape[0])
    ref = A @ x  # reference library: scipy
    tol = 8 * EPS * (np.abs(A) @ np.abs(x)) + 1e-300
    for dtype in (np.int32, np.int64):
        B = with_index_dtype(A, dtype)
        y = np.empty(A.shape[0])
        K.spmv(B.indptr, B.indices, B.data, x, y)
        assert np.all(np.abs(y - ref) <= tol)
        out = b.copy()
        K.spmv_add(B.indptr, B.indices, B.data, x, out)
        assert np.all(np.abs(out - (b + ref)) <= tol + 4 * EPS * np.abs(b))
        K.residual(B.indptr, B.indices, B.data, x, b, out)
        assert np.all(np.abs(out - (b - ref)) <= tol + 4 * EPS * np.abs(b))


@given(csr_matrices(square=True))
def test_spmv_dot_matches_product_and_dot(case):
    A, rng = case
    x = rng.standard_normal(A.shape[0])
    q = np.empty_like(x)
    value = K.spmv_dot(A.indptr, A.indices, A.data, x, q)
    ref = A @ x  # reference library: scipy
    assert np.all(np.abs(q - ref) <= 8 * EPS * (np.abs(A) @ np.abs(x)) + 1e-300)
    assert abs(value - float(x @ q)) <= dot_bound(x, q)


@pytest.mark.parametrize("n", [0, 1, 3, 4095, 4096, 4097, 3 * 4096 + 5])
def test_chunked_dot_equals_numpy_to_roundoff(n):
    rng = np.random.default_rng(n)
    x, y = rng.standard_normal(n), rng.standard_normal(n)
    # reference library: numpy (np.dot), agreement within the dot-product error bound
    assert abs(K.dot(x, y) - float(np.dot(x, y))) <= dot_bound(x, y)


@given(st.integers(0, 20000), st.integers(0, 2**32 - 1))
def test_dot_is_symmetric_and_matches_numpy(n, seed):
    rng = np.random.default_rng(seed)
    x, y = rng.standard_normal(n), rng.standard_normal(n)
    assert K.dot(x, y) == K.dot(y, x)  # products commute exactly, order is fixed
    assert abs(K.dot(x, y) - float(np.dot(x, y))) <= dot_bound(x, y)


def test_fused_vector_kernels_match_numpy():
    rng = np.random.default_rng(5)
    n = 3 * 4096 + 17
    p, q, x, r = (rng.standard_normal(n) for _ in range(4))
    dinv = rng.uniform(0.5, 2.0, n)
    alpha, beta = 0.37, -1.25
    # plain version: the numpy expressions a user would write
    x_ref, r_ref = x + alpha * p, r - alpha * q
    x1, r1 = x.copy(), r.copy()
    rr = K.cg_step(alpha, p, q, x1, r1)
    assert np.array_equal(x1, x_ref) and np.array_equal(r1, r_ref)
    assert abs(rr - r_ref @ r_ref) <= dot_bound(r_ref, r_ref)
    x2, r2, z2 = x.copy(), r.copy(), np.empty(n)
    rr2, rz2 = K.cg_step_jacobi(alpha, p, q, dinv, x2, r2, z2)
    assert np.array_equal(x2, x_ref) and np.array_equal(r2, r_ref)
    assert np.array_equal(z2, dinv * r_ref)
    assert rr2 == rr
    assert abs(rz2 - r_ref @ z2) <= dot_bound(r_ref, z2)
    p3 = p.copy()
    K.xpby(q, beta, p3)
    assert np.array_equal(p3, q + beta * p)
    filled, copied = np.empty(n), np.empty(n)
    K.fill(filled, -2.5)
    K.copy(q, copied)
    assert np.array_equal(filled, np.full(n, -2.5)) and np.array_equal(copied, q)
    out = np.empty(n)
    K.jacobi_apply(dinv, r, out)
    assert np.array_equal(out, dinv * r)
    d, x4, r4 = p.copy(), x.copy(), r.copy()
    K.chebyshev_step(q, dinv, 0.5, 0.25, r4, d, x4)
    r_new = r - q
    d_new = 0.5 * p + 0.25 * dinv * r_new
    assert np.array_equal(r4, r_new)
    assert np.allclose(d, d_new, rtol=4 * EPS, atol=0)
    assert np.allclose(x4, x + d, rtol=4 * EPS, atol=4 * EPS)


def test_chebyshev_start_matches_numpy():
    # the numpy expressions a user would write, in the kernel's order of operations:
    # equal bits expected (common practice, no source)
    rng = np.random.default_rng(6)
    n = 2 * 4096 + 3
    b, r, d, x = (rng.standard_normal(n) for _ in range(4))
    dinv = rng.uniform(0.5, 2.0, n)
    c = 0.7
    r1, d1, x1 = r.copy(), d.copy(), np.full(n, np.nan)  # x ignored with a zero guess
    K.chebyshev_start(c, dinv, b, r1, d1, x1, True)
    assert np.array_equal(r1, b) and np.array_equal(d1, c * dinv * b) and np.array_equal(x1, d1)
    r2, d2, x2 = r.copy(), d.copy(), x.copy()
    K.chebyshev_start(c, dinv, b, r2, d2, x2, False)
    assert np.array_equal(r2, r)  # r is only read
    assert np.array_equal(d2, c * dinv * r) and np.array_equal(x2, x + c * dinv * r)


@two_threads
def test_one_and_two_threads_give_identical_bits():
    A = poisson((120, 120), format="csr")  # 14400 rows: several chunks per thread
    rng = np.random.default_rng(7)
    x, y, w = (rng.standard_normal(A.shape[0]) for _ in range(3))
    dinv = rng.uniform(0.5, 2.0, A.shape[0])
    out = {}
    for nt in (1, 2):
        with threads(nt):
            q = np.empty_like(x)
            K.spmv(A.indptr, A.indices, A.data, x, q)
            q2 = np.empty_like(x)
            pq = K.spmv_dot(A.indptr, A.indices, A.data, x, q2)
            xx, rr_ = x.copy(), y.copy()
            rr = K.cg_step(0.3, y, q, xx, rr_)
            added = w.copy()
            K.spmv_add(A.indptr, A.indices, A.data, x, added)
            res = np.empty_like(x)
            K.residual(A.indptr, A.indices, A.data, x, w, res)
            xj, rj, zj = x.copy(), y.copy(), np.empty_like(x)
            rrj, rzj = K.cg_step_jacobi(0.3, y, q, dinv, xj, rj, zj)
            p = w.copy()
            K.xpby(x, -1.25, p)
            jac = np.empty_like(x)
            K.jacobi_apply(dinv, y, jac)
            K.copy(y, jac2 := np.empty_like(x))
            K.fill(filled := np.empty_like(x), 0.5)
            starts = []
            for zero_guess in (True, False):
                rs, ds, xs = y.copy(), w.copy(), x.copy()
                K.chebyshev_start(0.7, dinv, w, rs, ds, xs, zero_guess)
                starts += [rs, ds, xs]
            rc, dc, xc = y.copy(), w.copy(), x.copy()
            K.chebyshev_step(q, dinv, 0.5, 0.25, rc, dc, xc)
            qf = np.empty_like(x)
            finite = K.spmv_finite(A.indptr, A.indices, A.data, x, qf)
            out[nt] = (qf, finite, K.all_finite(x), q, pq, K.dot(x, y), rr, xx, rr_, added, res, xj, rj, zj, rrj, rzj, p,
                       jac, jac2, filled, *starts, rc, dc, xc)
    for k, (a, b) in enumerate(zip(out[1], out[2], strict=True)):
        assert np.array_equal(a, b), k


def test_public_spmv_and_dot_wrappers():
    A = poisson((7, 5), format="coo")  # another format: converted once
    x = np.arange(35.0)
    # reference library: scipy, to the round-off of a product (Higham 2002, section 3.5)
    assert np.all(np.abs(spmv(A, x) - A.tocsr() @ x) <= 8 * EPS * (abs(A.tocsr()) @ np.abs(x)))
    out = np.empty(35)
    assert spmv(A, x, out=out) is out
    assert dot(x, x) == pytest.approx(float(x @ x), rel=1e-15, abs=0)
    assert csr_bytes(A.tocsr()) == A.nnz * 12 + 36 * 4 + 2 * 35 * 8


def test_as_csr_converts_without_modifying_input():
    A = poisson((4, 4), format="csr").astype(np.float32)
    before = (A.data.copy(), A.indices.copy(), A.indptr.copy())
    C = as_csr(A)
    assert C.dtype == np.float64 and C is not A
    assert A.dtype == np.float32
    for old, new in zip(before, (A.data, A.indices, A.indptr), strict=True):
        assert np.array_equal(old, new)
    mixed = poisson((4, 4), format="csr")
    mixed.indptr = mixed.indptr.astype(np.int64)
    C = as_csr(mixed)
    assert C.indices.dtype == C.indptr.dtype == np.int64
    assert mixed.indices.dtype == np.int32


def test_bad_matrices_are_refused_with_the_place_named():
    with pytest.raises(InputError, match="square"):
        as_csr(sp.csr_array(np.ones((2, 3))))
    with pytest.raises(InputError, match="sparse"):
        as_csr([[1.0]])
    A = poisson((3, 3), format="csr")
    A.data[A.indptr[4] + 1] = np.nan
    with pytest.raises(InputError, match=r"row 4, column \d"):
        as_csr(A)
    B = poisson((3, 3), format="csr")
    B.indices[5] = 99
    with pytest.raises(InputError, match="outside 0..8"):
        as_csr(B)
    with pytest.raises(InputError, match="complex"):
        as_csr(poisson((3,), format="csr").astype(complex))


def test_bad_vectors_are_refused_with_the_index_named():
    with pytest.raises(InputError, match=r"b\[2\] is inf"):
        as_vector(np.array([1.0, 2.0, np.inf]), 3, "b")
    with pytest.raises(InputError, match="shape"):
        as_vector(np.ones(4), 3, "b")
    assert as_vector(np.ones((3, 1), dtype=np.float32), 3, "b").dtype == np.float64


# -- checked once, not once per product -------------------------------------------------


@given(st.integers(0, 3 * 4096), st.integers(0, 3), st.data())
def test_finite_kernels_match_numpy(n, bad, data):
    """The fast finiteness tests against the plain ones: numpy's ``isfinite(...).all()``."""
    rng = np.random.default_rng(n)
    v = rng.standard_normal(n)
    for _ in range(bad if n else 0):
        v[data.draw(st.integers(0, n - 1))] = data.draw(st.sampled_from([np.nan, np.inf,
                                                                         -np.inf]))
    assert K.all_finite(v) == bool(np.isfinite(v).all())
    A = sp.random_array((n, n), density=min(1.0, 5.0 / max(n, 1)), rng=rng,
                        format="csr") if n else sp.csr_array((0, 0))
    y, y_plain = np.empty(n), np.empty(n)
    flag = K.spmv_finite(A.indptr, A.indices, A.data, v, y)
    K.spmv(A.indptr, A.indices, A.data, v, y_plain)
    assert np.array_equal(y, y_plain, equal_nan=True)  # the same sums, bit for bit
    assert flag == bool(np.isfinite(y_plain).all())


def test_spmv_checks_the_structure_once_and_sees_replaced_arrays():
    A = poisson((6, 6), format="csr")
    x = np.ones(36)
    spmv(A, x)
    entry = hk_sparse._CHECKED
    assert id(A) in entry  # remembered after the first product
    bad = A.indices.copy()
    bad[3] = 36
    A.indices = bad  # a new array: seen and checked again
    with pytest.raises(InputError, match="outside 0..35"):
        spmv(A, x)
    A.indices[3] = 1  # the same (now corrected) array again
    assert np.array_equal(spmv(A, x), A @ x)
    A.indices[3] = 40  # written in place: the documented way to have it seen again
    with pytest.raises(InputError, match="outside 0..35"):
        as_csr(A, recheck=True)
    key = id(A)
    del A
    gc.collect()
    assert key not in entry  # forgotten with its matrix


def test_values_written_in_place_are_named_by_the_product():
    A = poisson((5, 5), format="csr")
    x = np.ones(25)
    spmv(A, x)
    A.data[A.indptr[7] + 1] = np.inf  # reassembly in place: no new array
    with pytest.raises(InputError, match=r"non-finite entry inf at row 7"):
        spmv(A, x)
    with pytest.raises(InputError, match="row 7"):
        as_csr(A)  # values are checked on every call unless the caller checks its result
    A.data[A.indptr[7] + 1] = -1.0
    x[11] = np.nan
    with pytest.raises(InputError, match=r"x\[11\] is nan"):
        spmv(A, x)
    with pytest.raises(InputError, match=r"y\[11\] is nan"):
        dot(np.ones(25), x)
    same = np.ones(25)
    with pytest.raises(InputError, match="overlap"):
        spmv(A, same, out=same)  # the kernel would read x while writing it


def test_overflow_of_finite_inputs_is_returned_not_refused():
    # IEEE 754 arithmetic: 1e300 * 1e300 overflows to inf; no input is at fault
    A = sp.csr_array(np.array([[1e300, 0.0], [0.0, 1.0]]))
    y = spmv(A, np.array([1e300, 1.0]))
    assert y[0] == np.inf and y[1] == 1.0
    assert dot(np.array([1e300, 1.0]), np.array([1e300, 1.0])) == np.inf


def test_a_plans_own_matrix_is_taken_as_checked_and_its_values_still_are():
    import hatkernels
    from hatkernels.mesh import rectangle

    assembler = hatkernels.StiffnessAssembler(rectangle(4, 4), fused=True)
    A = assembler.plan.matrix(assembler.assemble_data(1.0))
    assert id(A) in hk_sparse._CHECKED  # its pattern is the plan's own
    # integer values are not float64: such a matrix goes the whole way through as_csr
    B = assembler.plan.matrix(np.ones(assembler.plan.nnz, dtype=np.int64))
    assert id(B) not in hk_sparse._CHECKED
    assert as_csr(B).dtype == np.float64
    A.data[5] = np.nan  # the values are still read and named
    with pytest.raises(InputError, match="non-finite entry nan"):
        as_csr(A)
