"""Space-filling-curve keys, one independent computation per point."""

import numpy as np
from numba import prange, uint64

from hatkernels._jit import jit


@jit(parallel=True)
def hilbert_keys(q, bits):
    """Hilbert-curve index of integer cell coordinates ``q`` (n, 2) in ``[0, 2**bits)``."""
    n = q.shape[0]
    side = np.int64(1) << bits
    out = np.empty(n, dtype=np.int64)
    for k in prange(n):
        x = q[k, 0]
        y = q[k, 1]
        d = np.int64(0)
        s = side >> 1
        while s > 0:
            rx = 1 if (x & s) > 0 else 0
            ry = 1 if (y & s) > 0 else 0
            d += s * s * ((3 * rx) ^ ry)
            if ry == 0:
                if rx == 1:
                    x = side - 1 - x
                    y = side - 1 - y
                x, y = y, x
            s >>= 1
        out[k] = d
    return out


@jit(parallel=True)
def hilbert_keys3(q, bits):
    """Hilbert-curve index of integer cell coordinates ``q`` (n, 3) in ``[0, 2**bits)``,
    ``bits <= 21``.

    J. Skilling, "Programming the Hilbert curve", AIP Conf. Proc. 707 (2004) 381-387:
    the coordinates are turned into the curve's "transposed" index by undoing the
    rotations and reflections level by level, then Gray-decoded; the key interleaves
    the transposed bits, most significant level first.
    """
    n = q.shape[0]
    out = np.empty(n, dtype=np.int64)
    top = np.int64(1) << (bits - 1)
    for k in prange(n):
        x0 = np.int64(q[k, 0])
        x1 = np.int64(q[k, 1])
        x2 = np.int64(q[k, 2])
        m = top
        while m > 1:
            p = m - 1
            # the three axes in turn, as in Skilling's loop over i
            if x0 & m:
                x0 ^= p
            if x1 & m:
                x0 ^= p
            else:
                t = (x0 ^ x1) & p
                x0 ^= t
                x1 ^= t
            if x2 & m:
                x0 ^= p
            else:
                t = (x0 ^ x2) & p
                x0 ^= t
                x2 ^= t
            m >>= 1
        x1 ^= x0
        x2 ^= x1
        t = np.int64(0)
        m = top
        while m > 1:
            if x2 & m:
                t ^= m - 1
            m >>= 1
        x0 ^= t
        x1 ^= t
        x2 ^= t
        d = np.int64(0)
        for j in range(bits - 1, -1, -1):
            d = (d << 3) | (((x0 >> j) & 1) << 2) | (((x1 >> j) & 1) << 1) | ((x2 >> j) & 1)
        out[k] = d
    return out


@jit(parallel=True)
def far_entries(indptr, indices, limit, step):
    """``(far, seen)``: of the stored entries ``(i, j)`` of rows ``0, step, 2 step, ...`` of a
    CSR matrix, how many have ``|i - j| > limit``, and how many there are."""
    n = indptr.shape[0] - 1
    m = (n + step - 1) // step
    far = np.zeros(m, dtype=np.int64)
    seen = np.zeros(m, dtype=np.int64)
    for r in prange(m):
        i = r * step
        c = 0
        for k in range(indptr[i], indptr[i + 1]):
            d = indices[k] - i
            if d > limit or d < -limit:
                c += 1
        far[r] = c
        seen[r] = indptr[i + 1] - indptr[i]
    return far.sum(), seen.sum()


@jit(parallel=True)
def permute_symmetric(indptr, indices, data, perm, inverse, new_indptr, new_indices, new_data):
    """``P A P^T`` in CSR: new row ``k`` is old row ``perm[k]`` with its columns renamed by
    ``inverse`` (old to new) and sorted; ``new_indptr`` is given.  Rows are independent.

    Unsigned indices: numba then skips its negative-index tests (kernels/_jit/sparse.py).
    """
    n = perm.shape[0]
    for k in prange(n):
        p = uint64(perm[k])
        lo = uint64(new_indptr[k])
        c = uint64(0)
        for s in range(uint64(indptr[p]), uint64(indptr[p + uint64(1)])):
            col = inverse[uint64(indices[s])]
            v = data[s]
            pos = lo + c  # insertion into the sorted part: rows hold a few entries
            while pos > lo and new_indices[pos - uint64(1)] > col:
                new_indices[pos] = new_indices[pos - uint64(1)]
                new_data[pos] = new_data[pos - uint64(1)]
                pos -= uint64(1)
            new_indices[pos] = col
            new_data[pos] = v
            c += uint64(1)


@jit()
def _spread_bits(v, dim):
    """The bits of ``v`` spaced ``dim`` apart (bit ``b`` to bit ``dim * b``)."""
    out = np.int64(0)
    b = 0
    while v > 0:
        out |= (v & np.int64(1)) << (dim * b)
        v >>= 1
        b += 1
    return out


@jit(parallel=True)
def morton_keys(points, lo, scale, bits):
    """Z-order key of each point: its coordinates cut into ``2**bits`` cells per side
    (``cell = min((x - lo) * scale, 2**bits - 1)``) and their bits interleaved."""
    n, dim = points.shape
    top = (np.int64(1) << bits) - 1
    keys = np.empty(n, dtype=np.int64)
    for k in prange(n):
        key = np.int64(0)
        for a in range(dim):
            c = np.int64((points[k, a] - lo[a]) * scale[a])
            c = min(max(c, np.int64(0)), top)
            key |= _spread_bits(c, dim) << a
        keys[k] = key
    return keys


@jit()
def counting_order(keys, n_keys):
    """The stable order of ``keys`` (each in ``[0, n_keys)``) by one counting sort."""
    counts = np.zeros(n_keys + 1, dtype=np.int64)
    for k in range(keys.shape[0]):
        counts[keys[k] + 1] += 1
    for b in range(n_keys):
        counts[b + 1] += counts[b]
    order = np.empty(keys.shape[0], dtype=np.int64)
    for k in range(keys.shape[0]):
        b = keys[k]
        order[counts[b]] = k
        counts[b] += 1
    return order
