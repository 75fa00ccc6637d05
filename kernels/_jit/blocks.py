"""Raw-array kernels on blocks of vectors, for the block eigensolver.

A block is a C-ordered array of shape ``(n, w)``: row ``i`` holds the
``w`` vectors' entries at unknown ``i``, side by side.  That is the layout
a sparse product wants: each stored entry of a matrix row meets one short
contiguous run of the block (one or two cache lines), where ``w`` separate
vectors would cost ``w`` scattered reads.  Measured on a 1,046,529-unknown
stiffness and mass pair, 13 vectors: one :func:`pair_product` costs 8.6
single products (work units), the same products vector by vector in
vector-per-row storage 15.8, and separately 26
(``bench/test_bench_linear.py::test_block_products`` measures it against
scipy's products and the single-vector kernel).

A preconditioner takes one contiguous vector, so the residuals go out as
rows (:func:`residual_rows`, one vector per row) and the preconditioned
vectors come back into the block's columns (:func:`from_rows`).

Every output entry is computed by one thread in a fixed order (a row of a
product summed in storage order), so the bits never depend on the thread
count.  Nothing here validates its arguments (the caller does): arrays
named ``out`` or listed as written are written, the rest only read.
"""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit

__all__ = ["pair_product", "residual_rows", "from_rows", "gram_pairs", "gram_pairs_by_rows",
           "interpolate_rows", "ROWS", "GRAM_ROWS"]

#: Unknowns per parallel task of the copies between layouts.
ROWS = 4096

#: Rows per chunk of :func:`gram_pairs`: the blocks' chunks stay in cache while every
#: pair is formed.  Fixed, so that the sums' order never depends on the thread count.
GRAM_ROWS = 2048


@jit(parallel=True)
def pair_product(indptr, indices, a, b, x, ax, bx):
    """``ax = A @ x`` and ``bx = B @ x`` for a block ``x`` (n, r), in one pass over the
    pattern: CSR matrices ``A`` and ``B`` share ``indptr`` and ``indices`` and have the
    values ``a`` and ``b``."""
    r = x.shape[1]
    for i in prange(ax.shape[0]):
        lo = uint64(indptr[i])
        hi = uint64(indptr[i + 1])
        for j in range(r):
            ax[i, j] = 0.0
            bx[i, j] = 0.0
        for p in range(lo, hi):
            k = uint64(indices[p])
            av = a[p]
            bv = b[p]
            for j in range(r):
                v = x[k, j]
                ax[i, j] += av * v
                bx[i, j] += bv * v


@jit(parallel=True)
def residual_rows(ax, bx, theta, out):
    """``out[j] = ax[:, j] - theta[j] * bx[:, j]``: the residuals of a block's Ritz pairs,
    one vector per row of ``out``."""
    n = ax.shape[0]
    r = out.shape[0]
    for t in prange((n + ROWS - 1) // ROWS):
        lo = t * ROWS
        hi = min(lo + ROWS, n)
        for j in range(r):
            th = theta[j]
            for i in range(lo, hi):
                out[j, i] = ax[i, j] - th * bx[i, j]


@jit(parallel=True)
def from_rows(rows, x):
    """``x[:, j] = rows[j]`` for every row ``j`` of ``rows``: the transpose, copied."""
    n = x.shape[0]
    r = rows.shape[0]
    for t in prange((n + ROWS - 1) // ROWS):
        lo = t * ROWS
        hi = min(lo + ROWS, n)
        for i in range(lo, hi):
            for j in range(r):
                x[i, j] = rows[j, i]


@jit(parallel=True)
def gram_pairs(pool, left, right, out):
    """``out[p] = pool[left[p]].T @ pool[right[p]]`` for every pair ``p``; ``pool`` is
    (b, n, m), ``out`` (pairs, m, m).

    One pass over the rows: each chunk of :data:`GRAM_ROWS` rows forms every
    pair's partial product (BLAS on the cached chunk), and the partial
    products are added in chunk order.  One ``X.T @ Y`` per pair reads both
    blocks from memory each time, and BLAS runs a product this narrow (m
    columns, n rows) on one thread; for 12 pairs of 13 columns this is 3 to 4
    times faster (``bench/test_bench_linear.py::test_gram_pairs``).
    """
    n = pool.shape[1]
    q = left.shape[0]
    nc = (n + GRAM_ROWS - 1) // GRAM_ROWS
    part = np.empty((nc, q, pool.shape[2], pool.shape[2]))
    for c in prange(nc):
        lo = c * GRAM_ROWS
        hi = min(lo + GRAM_ROWS, n)
        for p in range(q):
            part[c, p] = np.dot(pool[left[p], lo:hi].T, pool[right[p], lo:hi])
    out[:] = 0.0
    for c in range(nc):
        out += part[c]


@jit(parallel=True)
def gram_pairs_by_rows(pool, used, left, right, out):
    """:func:`gram_pairs` for blocks stored by rows: ``out[p] = pool[left[p]] @
    pool[right[p]].T`` with ``pool`` (b, m, n), one vector per row (the layout of
    operators that take one contiguous vector, :mod:`hatkernels.eigen_patches`).

    Each chunk of :data:`GRAM_ROWS` columns of the blocks numbered in ``used``
    is copied once into contiguous scratch (``left`` and ``right`` index into
    ``used``), every pair's partial product is formed there (BLAS), and the
    partials are added in chunk order: the same bits on any thread count.
    """
    n = pool.shape[2]
    m = pool.shape[1]
    q = left.shape[0]
    nc = (n + GRAM_ROWS - 1) // GRAM_ROWS
    part = np.empty((nc, q, m, m))
    for c in prange(nc):
        lo = c * GRAM_ROWS
        hi = min(lo + GRAM_ROWS, n)
        local = np.empty((used.shape[0], m, hi - lo))
        for u in range(used.shape[0]):
            local[u] = pool[used[u], :, lo:hi]
        for p in range(q):
            part[c, p] = np.dot(local[left[p]], local[right[p]].T)
    out[:] = 0.0
    for c in range(nc):
        out += part[c]


@jit(parallel=True)
def interpolate_rows(x, a, b, out):
    """``out[i] = (x[a[i]] + x[b[i]]) / 2`` row by row (``a[i] == b[i]`` copies the row
    exactly): linear interpolation at edge midpoints, in one pass and no temporary."""
    r = x.shape[1]
    for i in prange(out.shape[0]):
        ia = uint64(a[i])
        ib = uint64(b[i])
        for j in range(r):
            out[i, j] = 0.5 * (x[ia, j] + x[ib, j])
