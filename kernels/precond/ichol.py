"""Incomplete Cholesky with zero fill, IC(0), and its modified variant.

``L`` is lower triangular with the pattern of the lower triangle of A and
``L L^T ~ A``; the preconditioner applies ``(L L^T)^{-1}`` by a forward and a
backward triangular solve.  The factor is stored as ``U = L^T`` in CSR (the
same arrays as ``L`` in CSC), see :mod:`hatkernels._jit.ichol`; the
:attr:`IncompleteCholesky.L` property returns ``L`` as a scipy CSR matrix.

On a non-positive pivot the factorisation is retried on ``A + s diag(A)``
with a growing shift ``s`` (a warning names the row that broke down and the
shift used); the result is still SPD, only a weaker approximation of A.
"""

import math
import warnings

import numpy as np
import scipy.sparse as sp

from hatkernels._jit import ichol as _k
from hatkernels.checks import into_vectors, real_option
from hatkernels.errors import InputError
from hatkernels.precond.registry import Preconditioner, checked_diagonal, require_csr

__all__ = ["IncompleteCholesky", "ic0_reference"]

_FIRST_SHIFT = 1e-3
_SHIFT_GROWTH = 4.0


def _upper_pattern(C):
    """Upper triangle of C in CSR: duplicates summed, columns sorted, diagonal first."""
    U = sp.triu(C, format="csr")
    U.sum_duplicates()  # also sorts the column indices; U is our own copy
    itype = np.result_type(U.indptr.dtype, U.indices.dtype)
    return (np.ascontiguousarray(U.indptr, dtype=itype),
            np.ascontiguousarray(U.indices, dtype=itype),
            np.ascontiguousarray(U.data, dtype=np.float64))


class IncompleteCholesky(Preconditioner):
    """IC(0): ``M = (L L^T)^{-1}``, ``L`` with the pattern of ``tril(A)``.

    Parameters
    ----------
    A : sparse matrix, shape (n, n)
        Symmetric positive definite; only its upper triangle is read.
    modified : bool
        Modified IC(0): fill that zero fill drops is subtracted from the
        diagonal instead, so ``L L^T`` has the row sums of A.
    shift : float
        Initial relative diagonal shift ``s`` (factorise ``A + s diag(A)``);
        raised automatically on breakdown.

    Costs: setup about ``sum over rows of (entries in the row of U)^2`` binary
    searches (a few per unknown on a 2-D mesh); storage of ``tril(A)`` (12
    bytes per entry with int32 indices) plus the inverse diagonal; an apply
    is two serial sweeps over ``U``: about 4 flops and 24 bytes per entry of
    ``tril(A)``, not parallel (each row depends on the previous ones).

    Raises
    ------
    InputError
        A diagonal entry is missing or not positive (named by row), or no
        shift up to the limit gives positive pivots.
    """

    name = "ic0"
    #: Peak bytes per point of a whole solve with it, beyond the mesh (measured at
    #: about 1e6 unknowns, docs/performance.md; hatkernels.memory uses it).
    solve_bytes_per_point = 500

    def __init__(self, A, *, modified=False, shift=0.0):
        C = require_csr(A, self.name)
        if not isinstance(modified, (bool, np.bool_)):
            raise InputError(f"ic0: modified must be True or False, got {modified!r}")
        shift = real_option(shift, "ic0: shift", minimum=0.0)
        n = C.shape[0]
        super().__init__(n)
        checked_diagonal(C, self.name)
        self.modified = bool(modified)
        indptr, indices, values = _upper_pattern(C)
        diag_pos = indptr[:-1]
        # Enough shift makes A + s diag(A) diagonally dominant, where IC(0) cannot fail.
        limit = 2.0 * max(1, int(np.diff(indptr).max()))
        s = float(shift)
        first_failure = None
        tries = 0
        while True:
            u = values.copy()
            if s:
                u[diag_pos] *= 1.0 + s
            row = _k.ic0_factor(indptr, indices, u, self.modified)
            if row < 0:
                break
            if first_failure is None:
                first_failure = (int(row), float(u[indptr[row]]))
            tries += 1
            s = _FIRST_SHIFT if s == 0.0 else s * _SHIFT_GROWTH
            if s > limit:
                raise InputError(f"ic0: pivot of row {first_failure[0]} is "
                                 f"{first_failure[1]:.3e}; no diagonal shift up to {limit:g} "
                                 f"gave positive pivots (is A symmetric positive definite?)")
        if first_failure is not None:
            warnings.warn(
                f"ic0: pivot of row {first_failure[0]} is {first_failure[1]:.3e} (not positive); "
                f"factorised A + {s:g} * diag(A) instead, after {tries} "
                f"{'retry' if tries == 1 else 'retries'}. The preconditioner is SPD but weaker.",
                RuntimeWarning,
                stacklevel=3,
            )
        self.shift = s
        self._indptr = indptr
        self._indices = indices
        self._u = u
        self._dinv = 1.0 / u[diag_pos]

    @property
    def kind(self):
        variant = "modified incomplete" if self.modified else "incomplete"
        return f"{variant} Cholesky, zero fill"

    @property
    def L(self):
        """The lower factor as a scipy CSR matrix (built on request)."""
        n = self.shape[0]
        U = sp.csr_array((self._u, self._indices, self._indptr), shape=(n, n))
        return U.T.tocsr()

    @property
    def nnz(self):
        return int(self._indptr[-1])

    @property
    def memory_bytes(self):
        return self._u.nbytes + self._indices.nbytes + self._indptr.nbytes + self._dinv.nbytes

    def _details(self):
        text = f"nnz(L)={self.nnz} (fill 1.00 x nnz(tril A))"
        if self.shift:
            text += f", diagonal shift {self.shift:g}"
        return text

    def _apply(self, r):
        out = np.empty_like(r)
        self.apply_into(r, out)
        return out

    def apply_into(self, r, z):
        """``z = M r`` (the two triangular solves); returns ``z``.  ``r`` is read only (any
        real vector of length n, copied unless it is a writable C-contiguous float64
        one); ``z`` must be a writable C-contiguous float64 ndarray of shape (n,)
        sharing no memory with ``r``, else an InputError names the argument
        (``hatkernels.checks.into_vectors``)."""
        r, = into_vectors("IncompleteCholesky.apply_into", self.shape[0], {"r": r}, {"z": z})
        _k.ic0_solve(self._indptr, self._indices, self._u, self._dinv, r, z)
        return z


def ic0_reference(A, modified=False):
    """Readable dense IC(0) on a small matrix: the specification the kernel is tested against.

    Returns the dense lower factor ``L`` with the sparsity pattern of
    ``tril(A)``; raises InputError on a non-positive pivot (no shifting).
    """
    C = sp.csr_array(A)
    n = C.shape[0]
    a = C.toarray().astype(np.float64)
    pattern = np.zeros((n, n), dtype=bool)
    pattern[np.repeat(np.arange(n), np.diff(C.indptr)), C.indices] = True
    pattern |= pattern.T
    np.fill_diagonal(pattern, True)
    L = np.zeros((n, n))
    for k in range(n):
        if not a[k, k] > 0:
            raise InputError(f"ic0_reference: pivot of row {k} is {a[k, k]}")
        L[k, k] = math.sqrt(a[k, k])
        for i in range(k + 1, n):
            if pattern[i, k]:
                L[i, k] = a[i, k] / L[k, k]
        for j in range(k + 1, n):
            if not pattern[j, k]:
                continue
            for i in range(j, n):
                if not pattern[i, k]:
                    continue
                v = L[i, k] * L[j, k]
                if pattern[i, j]:
                    a[i, j] -= v
                elif modified:
                    a[i, i] -= v
                    a[j, j] -= v
    return L
