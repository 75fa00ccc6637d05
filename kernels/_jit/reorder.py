"""Space-filling-curve keys, one independent computation per point."""

import numpy as np
from numba import prange

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
