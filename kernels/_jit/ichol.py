"""Raw-array kernels for incomplete Cholesky with zero fill, IC(0).

The factor ``L`` (lower triangular, ``L L^T ~ A``) is held by its transpose
``U = L^T`` in CSR: row ``k`` of ``U`` is column ``k`` of ``L``, sorted by
column with the diagonal first.  That is the layout the right-looking
factorisation needs (column ``k`` of ``L`` is read as one contiguous row), and
it serves both triangular solves.  The wrappers in ``hatkernels.precond.ichol``
build the arrays and check them; nothing here validates.

Both kernels are serial: IC(0) factorisation and triangular solves are
recurrences along the rows.  Serial code gives the same bits on any thread count.
"""

import math

from hatkernels._jit import jit

__all__ = ["ic0_factor", "ic0_solve"]


@jit()
def _find(indices, lo, hi, col):
    # Binary search for ``col`` in the sorted slice indices[lo:hi]; -1 if absent.
    while lo < hi:
        mid = (lo + hi) // 2
        c = indices[mid]
        if c < col:
            lo = mid + 1
        elif c > col:
            hi = mid
        else:
            return mid
    return -1


@jit()
def ic0_factor(indptr, indices, u, modified):
    """Factorise in place; return -1 on success or the row whose pivot was not positive.

    On entry ``u`` holds the upper triangle of A (diagonal first in each row,
    columns sorted); on success it holds ``U = L^T``.  The right-looking update
    subtracts ``U_ki U_kj`` from entry (i, j) when that entry is in the pattern
    and drops it otherwise; with ``modified`` true a dropped update is
    subtracted from the diagonals of rows i and j instead, which keeps the row
    sums of ``L L^T`` equal to those of A.  On failure ``u[indptr[row]]`` holds
    the offending pivot and the rest of ``u`` is partly factorised.
    """
    n = indptr.shape[0] - 1
    for k in range(n):
        dpos = indptr[k]
        pivot = u[dpos]
        if not pivot > 0.0:  # also catches nan
            return k
        d = math.sqrt(pivot)
        u[dpos] = d
        inv = 1.0 / d
        end = indptr[k + 1]
        for p in range(dpos + 1, end):
            u[p] *= inv
        for p in range(dpos + 1, end):
            i = indices[p]
            ui = u[p]
            row_lo = indptr[i]
            row_hi = indptr[i + 1]
            for q in range(p, end):
                j = indices[q]
                v = ui * u[q]
                pos = _find(indices, row_lo, row_hi, j)
                if pos >= 0:
                    u[pos] -= v
                elif modified:
                    u[row_lo] -= v
                    u[indptr[j]] -= v
    return -1


@jit()
def ic0_solve(indptr, indices, u, dinv, r, out):
    """``out = (L L^T)^{-1} r`` with ``U = L^T`` in CSR and ``dinv = 1 / diag(U)``."""
    n = indptr.shape[0] - 1
    for i in range(n):
        out[i] = r[i]
    # L y = r, with L = U^T: column-oriented sweep over the rows of U.
    for k in range(n):
        yk = out[k] * dinv[k]
        out[k] = yk
        for p in range(indptr[k] + 1, indptr[k + 1]):
            out[indices[p]] -= u[p] * yk
    # U z = y, row-oriented, in place (entries right of i are already z).
    for i in range(n - 1, -1, -1):
        s = out[i]
        for p in range(indptr[i] + 1, indptr[i + 1]):
            s -= u[p] * out[indices[p]]
        out[i] = s * dinv[i]
