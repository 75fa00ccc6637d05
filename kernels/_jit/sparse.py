"""Raw-array sparse kernels: CSR products, chunked dot products, fused CG updates.

Every kernel gives the same bits on any number of threads:

* a CSR product owns each output row and sums the row in storage order;
* a dot product splits the vectors into chunks of ``CHUNK`` entries (a
  constant, not a function of the thread count), sums each chunk in a fixed
  order inside ``prange`` and adds the chunk sums serially in chunk order.

Index arrays may be int32 or int64 (``indptr`` and ``indices`` of one matrix
share a dtype); numba compiles one version per dtype on first use.  Nothing
here validates its arguments: the wrappers in ``hatkernels.krylov`` and
``hatkernels.precond`` do.  Arrays named ``out`` or listed as updated in place
are written; every other argument is only read.
"""

import math

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit

# Indexing with a signed integer makes numba test for negative indices on every
# access (Python's wraparound), which costs about a third of an SpMV's time.
# The wrappers check every index is in range before a kernel runs, so the
# kernels index with unsigned integers (``uint64(k)``) and skip that test.

__all__ = [
    "CHUNK",
    "spmv",
    "spmv_finite",
    "all_finite",
    "spmv_add",
    "spmv_dot",
    "residual",
    "dot",
    "cg_step",
    "cg_step_jacobi",
    "xpby",
    "fill",
    "copy",
    "jacobi_apply",
    "chebyshev_step",
    "chebyshev_zero_start",
    "chebyshev_last",
    "row_dots",
    "combine_rows",
]

#: Entries per chunk of a dot product.  Fixed so that the summation order,
#: and hence the bits of the result, never depend on the thread count.
CHUNK = 4096


@jit()
def _nchunks(n):
    return (n + CHUNK - 1) // CHUNK


@jit()
def _sum_in_order(partial):
    s = 0.0
    for c in range(partial.shape[0]):
        s += partial[c]
    return s


@jit()
def _chunk_dot(x, y, lo, hi):
    # Four independent accumulators in a fixed pattern: the compiler may keep
    # them in one vector register (no reassociation needed), the order of the
    # additions is still fixed by the source.
    s0 = 0.0
    s1 = 0.0
    s2 = 0.0
    s3 = 0.0
    m = (hi - lo) // 4
    for b in range(m):
        j = uint64(lo + 4 * b)
        s0 += x[j] * y[j]
        s1 += x[j + uint64(1)] * y[j + uint64(1)]
        s2 += x[j + uint64(2)] * y[j + uint64(2)]
        s3 += x[j + uint64(3)] * y[j + uint64(3)]
    for i in range(lo + 4 * m, hi):
        j = uint64(i)
        s0 += x[j] * y[j]
    return (s0 + s1) + (s2 + s3)


@jit()
def _row_dot(indptr, indices, data, x, i):
    # Row i of A times x, summed in storage order.
    s = 0.0
    for k in range(uint64(indptr[i]), uint64(indptr[i + 1])):
        s += data[k] * x[uint64(indices[k])]
    return s


@jit(parallel=True)
def dot(x, y):
    """``x . y`` over fixed chunks; the same bits on any thread count."""
    n = x.shape[0]
    nchunks = _nchunks(n)
    partial = np.empty(nchunks)
    for c in prange(nchunks):
        lo = c * CHUNK
        hi = min(lo + CHUNK, n)
        partial[c] = _chunk_dot(x, y, lo, hi)
    return _sum_in_order(partial)


@jit(parallel=True)
def spmv(indptr, indices, data, x, out):
    """``out = A @ x`` for A in CSR; each row summed in storage order."""
    for i in prange(out.shape[0]):
        out[i] = _row_dot(indptr, indices, data, x, i)


@jit(parallel=True)
def spmv_finite(indptr, indices, data, x, out):
    """``out = A @ x`` as :func:`spmv` (the same bits); True when every entry of ``out`` is
    finite, tested as each row is summed (no second pass over ``out``)."""
    n = out.shape[0]
    nchunks = _nchunks(n)
    bad = np.zeros(nchunks, dtype=np.uint8)
    for c in prange(nchunks):
        lo = c * CHUNK
        hi = min(lo + CHUNK, n)
        flag = 0
        for i in range(lo, hi):
            s = _row_dot(indptr, indices, data, x, i)
            out[i] = s
            if not math.isfinite(s):
                flag = 1
        bad[c] = flag
    return bad.max() == 0 if nchunks else True


@jit(parallel=True)
def all_finite(v):
    """True when every entry of ``v`` is finite (one pass, in parallel chunks)."""
    n = v.shape[0]
    nchunks = _nchunks(n)
    bad = np.zeros(nchunks, dtype=np.uint8)
    for c in prange(nchunks):
        flag = 0
        for i in range(c * CHUNK, min(c * CHUNK + CHUNK, n)):
            if not math.isfinite(v[uint64(i)]):
                flag = 1
        bad[c] = flag
    return bad.max() == 0 if nchunks else True


@jit(parallel=True)
def spmv_add(indptr, indices, data, x, out):
    """``out += A @ x`` for A in CSR (``out`` updated in place)."""
    for i in prange(out.shape[0]):
        out[i] += _row_dot(indptr, indices, data, x, i)


@jit(parallel=True)
def residual(indptr, indices, data, x, b, out):
    """``out = b - A @ x`` for A in CSR."""
    for i in prange(out.shape[0]):
        out[i] = b[i] - _row_dot(indptr, indices, data, x, i)


@jit(parallel=True)
def spmv_dot(indptr, indices, data, x, out):
    """``out = A @ x`` and return ``x . out`` in the same pass (A square, CSR).

    Rows are grouped in the same fixed chunks as :func:`dot`, so the returned
    value has the same bits on any thread count.
    """
    n = out.shape[0]
    nchunks = _nchunks(n)
    partial = np.empty(nchunks)
    for c in prange(nchunks):
        lo = c * CHUNK
        hi = min(lo + CHUNK, n)
        acc = 0.0
        for i in range(lo, hi):
            s = _row_dot(indptr, indices, data, x, i)
            out[i] = s
            acc += x[i] * s
        partial[c] = acc
    return _sum_in_order(partial)


@jit(parallel=True)
def cg_step(alpha, p, q, x, r):
    """``x += alpha p``, ``r -= alpha q`` in place; return the new ``r . r``."""
    n = x.shape[0]
    nchunks = _nchunks(n)
    partial = np.empty(nchunks)
    for c in prange(nchunks):
        lo = c * CHUNK
        hi = min(lo + CHUNK, n)
        acc = 0.0
        for i in range(lo, hi):
            x[i] += alpha * p[i]
            ri = r[i] - alpha * q[i]
            r[i] = ri
            acc += ri * ri
        partial[c] = acc
    return _sum_in_order(partial)


@jit(parallel=True)
def cg_step_jacobi(alpha, p, q, dinv, x, r, z):
    """As :func:`cg_step`, then ``z = dinv * r``; return ``(r . r, r . z)``.

    ``x``, ``r`` and ``z`` are updated in place.
    """
    n = x.shape[0]
    nchunks = _nchunks(n)
    prr = np.empty(nchunks)
    prz = np.empty(nchunks)
    for c in prange(nchunks):
        lo = c * CHUNK
        hi = min(lo + CHUNK, n)
        arr = 0.0
        arz = 0.0
        for i in range(lo, hi):
            x[i] += alpha * p[i]
            ri = r[i] - alpha * q[i]
            r[i] = ri
            zi = dinv[i] * ri
            z[i] = zi
            arr += ri * ri
            arz += ri * zi
        prr[c] = arr
        prz[c] = arz
    return _sum_in_order(prr), _sum_in_order(prz)


@jit(parallel=True)
def fill(x, value):
    """``x[:] = value`` in parallel: a fresh vector's pages are first touched (backed by
    the system) by both threads, about 1.7 times faster than numpy's one."""
    for i in prange(x.shape[0]):
        x[i] = value


@jit(parallel=True)
def copy(src, dst):
    """``dst[:] = src`` in parallel (first touch of a fresh ``dst`` as :func:`fill`)."""
    for i in prange(dst.shape[0]):
        dst[i] = src[i]


@jit(parallel=True)
def xpby(z, beta, p):
    """``p = z + beta p`` in place (the CG search-direction update)."""
    for i in prange(p.shape[0]):
        p[i] = z[i] + beta * p[i]


@jit(parallel=True)
def jacobi_apply(dinv, r, out):
    """``out = dinv * r``."""
    for i in prange(out.shape[0]):
        out[i] = dinv[i] * r[i]


@jit(parallel=True)
def chebyshev_start(c, dinv, b, r, d, x, zero_guess):
    """First step of Jacobi-preconditioned Chebyshev smoothing, in place.

    ``d = c dinv r`` and ``x += d``; with ``zero_guess`` ``x`` is taken as
    zero whatever it holds: ``r = b``, ``d = c dinv b``, ``x = d`` (one pass
    instead of zeroing ``x``, copying ``b`` and adding).
    """
    if zero_guess:
        for i in prange(x.shape[0]):
            bi = b[i]
            r[i] = bi
            di = c * dinv[i] * bi
            d[i] = di
            x[i] = di
    else:
        for i in prange(x.shape[0]):
            di = c * dinv[i] * r[i]
            d[i] = di
            x[i] += di


@jit(parallel=True)
def chebyshev_step(q, dinv, c1, c2, r, d, x):
    """One step of Jacobi-preconditioned Chebyshev smoothing, in place.

    With ``q = A d`` from the previous direction: ``r -= q``,
    ``d = c1 d + c2 dinv r``, ``x += d``.
    """
    for i in prange(x.shape[0]):
        ri = r[i] - q[i]
        r[i] = ri
        di = c1 * d[i] + c2 * dinv[i] * ri
        d[i] = di
        x[i] += di


@jit(parallel=True)
def chebyshev_zero_start(c, dinv, b, x):
    """``x = c dinv b``: the first Chebyshev step from a zero guess when no later step
    needs ``r`` (which is ``b``) or ``d`` (which is ``x``) kept apart."""
    for i in prange(x.shape[0]):
        x[i] = c * dinv[i] * b[i]


@jit(parallel=True)
def chebyshev_last(q, dinv, c1, c2, r, d, x):
    """The last step of :func:`chebyshev_step`: ``x += c1 d + c2 dinv (r - q)``, the same
    bits, with ``r`` and ``d`` read and not written (``d`` may be ``x`` itself)."""
    for i in prange(x.shape[0]):
        ri = r[i] - q[i]
        di = c1 * d[i] + c2 * dinv[i] * ri
        x[i] += di


@jit(parallel=True)
def row_dots(X, count, v, out):
    """``out[i] = X[i] . v`` for the first ``count`` rows of ``X`` in one pass over ``v``:
    chunked as :func:`dot`, so each equals ``dot(X[i], v)`` bit for bit."""
    n = v.shape[0]
    nchunks = _nchunks(n)
    partial = np.empty((count, nchunks))
    for c in prange(nchunks):
        lo = c * CHUNK
        hi = min(lo + CHUNK, n)
        for i in range(count):
            partial[i, c] = _chunk_dot(X[i], v, lo, hi)
    for i in range(count):
        out[i] = _sum_in_order(partial[i])


@jit(parallel=True)
def combine_rows(coeffs, X, count, keep, out):
    """``out = keep * out + sum_i coeffs[i] X[i]`` over the first ``count`` rows, each
    entry summed in row order (``keep`` 0 ignores what ``out`` holds)."""
    for j in prange(out.shape[0]):
        s = 0.0
        for i in range(count):
            s += coeffs[i] * X[i, j]
        out[j] = s if keep == 0.0 else keep * out[j] + s
