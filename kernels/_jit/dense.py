"""Small dense kernels of the AMG's coarsest level: a Cholesky factor and its solve.

Plain loops on purpose: BLAS would start its own threads, which then compete with
the parallel kernels for the cores.
"""

import numpy as np

from hatkernels._jit import jit

__all__ = ["dense_cholesky", "cholesky_solve"]


@jit()
def dense_cholesky(a):
    """Lower Cholesky factor of the symmetric matrix ``a`` (its lower triangle is read).

    Returns ``(L, row)``: ``row`` is -1, or the first row whose pivot is not
    above ``1e-10`` times its diagonal entry (the matrix is not positive
    definite, or singular up to rounding; ``L`` is then incomplete).
    """
    n = a.shape[0]
    L = np.zeros((n, n))
    for j in range(n):
        s = a[j, j]
        for k in range(j):
            s -= L[j, k] * L[j, k]
        if not s > 1e-10 * abs(a[j, j]):
            return L, j
        d = np.sqrt(s)
        L[j, j] = d
        for i in range(j + 1, n):
            t = a[i, j]
            for k in range(j):
                t -= L[i, k] * L[j, k]
            L[i, j] = t / d
    return L, -1


@jit()
def cholesky_solve(L, b, out):
    """``out = (L L^T)^-1 b`` by forward and back substitution."""
    n = L.shape[0]
    for i in range(n):
        t = b[i]
        for k in range(i):
            t -= L[i, k] * out[k]
        out[i] = t / L[i, i]
    for i in range(n - 1, -1, -1):
        t = out[i]
        for k in range(i + 1, n):
            t -= L[k, i] * out[k]
        out[i] = t / L[i, i]
