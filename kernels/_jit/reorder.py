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
