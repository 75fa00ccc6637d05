"""Checked wrappers around the parallel sparse kernels, and input validation.

The kernels in :mod:`hatkernels._jit.sparse` trust their arguments; the functions
here check them once (shape, dtype, index range, finite values) and name the
offending entry when something is wrong.  The solvers and preconditioners use
:func:`as_csr` and :func:`as_vector` so that every entry point validates the
same way.  Inputs are never modified: a matrix or vector that needs another
dtype is copied.

All arithmetic is float64: float32, integer and boolean inputs are converted
(exactly); complex inputs are refused.
"""

import numpy as np
import scipy.sparse as sp

from hatkernels._jit import sparse as _k
from hatkernels.errors import InputError

__all__ = ["as_csr", "as_vector", "spmv", "dot", "csr_bytes"]


def _real_float64(dtype, what):
    if np.issubdtype(dtype, np.complexfloating):
        raise InputError(f"{what} is complex ({dtype}); only real matrices and vectors are supported")
    if not (np.issubdtype(dtype, np.floating) or np.issubdtype(dtype, np.integer)
            or dtype == np.bool_):
        raise InputError(f"{what} has dtype {dtype}; expected a real floating-point dtype")


def as_csr(A, name="A"):
    """Return ``A`` as a checked, square, float64 CSR matrix (a copy only if needed).

    Other sparse formats are converted once; ``A`` itself is never modified.
    ``indices`` and ``indptr`` of the result share one dtype (int32 or int64).

    Raises
    ------
    InputError
        Not sparse, not square, complex, malformed CSR arrays, or a non-finite
        entry (the message gives its row and column).
    """
    if not sp.issparse(A):
        raise InputError(f"{name} must be a scipy sparse matrix, got {type(A).__name__}")
    if A.ndim != 2 or A.shape[0] != A.shape[1]:
        raise InputError(f"{name} must be square, got shape {A.shape}")
    if A.shape[0] == 0:
        raise InputError(f"{name} is empty (shape {A.shape})")
    _real_float64(A.dtype, name)
    C = A if A.format == "csr" else A.tocsr()
    if C.dtype != np.float64:
        C = C.astype(np.float64)
    n = C.shape[0]
    indptr, indices = C.indptr, C.indices
    itype = np.result_type(indptr.dtype, indices.dtype)
    if itype not in (np.int32, np.int64):
        itype = np.dtype(np.int64)
    if indptr.dtype != itype or indices.dtype != itype:
        # Assign the arrays on a copy: scipy's constructor would pick its own index dtype.
        C = C.copy()
        C.indices = indices.astype(itype)
        C.indptr = indptr.astype(itype)
        indptr, indices = C.indptr, C.indices
    if indptr.shape != (n + 1,) or indptr[0] != 0:
        raise InputError(f"{name}: CSR indptr must have {n + 1} entries starting at 0")
    steps = np.diff(indptr)
    if steps.size and steps.min() < 0:
        row = int(np.argmax(steps < 0))
        raise InputError(f"{name}: CSR indptr decreases at row {row}")
    nnz = int(indptr[-1])
    if nnz > indices.shape[0] or nnz > C.data.shape[0]:
        raise InputError(f"{name}: CSR indptr ends at {nnz} but only "
                         f"{min(indices.shape[0], C.data.shape[0])} entries are stored")
    used = indices[:nnz]
    if nnz and (used.min() < 0 or used.max() >= n):
        k = int(np.argmax((used < 0) | (used >= n)))
        row = int(np.searchsorted(indptr, k, side="right") - 1)
        raise InputError(f"{name}: row {row} has column index {int(used[k])} outside 0..{n - 1}")
    finite = np.isfinite(C.data[:nnz])
    if not finite.all():
        k = int(np.argmin(finite))
        row = int(np.searchsorted(indptr, k, side="right") - 1)
        raise InputError(f"{name} has a non-finite entry {C.data[k]} at row {row}, "
                         f"column {int(used[k])}")
    return C


def as_vector(v, n, name):
    """Return ``v`` as a float64 vector of length ``n`` (a copy only if needed).

    Shapes ``(n,)`` and ``(n, 1)`` are accepted.  A non-finite entry raises
    :class:`InputError` naming its index.
    """
    a = np.asarray(v)
    if a.shape not in ((n,), (n, 1)):
        raise InputError(f"{name} must have shape ({n},) or ({n}, 1), got {a.shape}")
    _real_float64(a.dtype, name)
    a = np.ascontiguousarray(a.reshape(n), dtype=np.float64)
    finite = np.isfinite(a)
    if not finite.all():
        i = int(np.argmin(finite))
        raise InputError(f"{name}[{i}] is {a[i]}; every entry must be finite")
    return a


def csr_bytes(A):
    """Bytes a CSR product ``A @ x`` must move: data, indices, indptr, x and y."""
    n_rows, n_cols = A.shape
    return (A.data.nbytes + A.indices.nbytes + A.indptr.nbytes
            + 8 * n_cols + 8 * n_rows)


def spmv(A, x, out=None):
    """``A @ x`` with the parallel CSR kernel; ``out`` is overwritten when given.

    ``A`` is checked by :func:`as_csr` (so any sparse format works); rows are
    summed in storage order, so the result has the same bits on any thread
    count.

    Examples
    --------
    >>> import numpy as np
    >>> from pyamg.gallery import poisson
    >>> from hatkernels.sparse import spmv
    >>> A = poisson((3,), format="csr")
    >>> spmv(A, np.ones(3))
    array([1., 0., 1.])
    """
    C = as_csr(A)
    n = C.shape[0]
    x = as_vector(x, n, "x")
    if out is None:
        out = np.empty(n)
    elif not (isinstance(out, np.ndarray) and out.shape == (n,) and out.dtype == np.float64
              and out.flags.c_contiguous and out.flags.writeable):
        raise InputError(f"out must be a writeable contiguous float64 array of shape ({n},)")
    _k.spmv(C.indptr, C.indices, C.data, x, out)
    return out


def dot(x, y):
    """``x . y`` summed over fixed chunks: the same bits on any thread count.

    >>> import numpy as np
    >>> from hatkernels.sparse import dot
    >>> dot(np.arange(4.0), np.ones(4))
    6.0
    """
    x = np.asarray(x)
    if x.ndim != 1:
        raise InputError(f"x must be 1-D, got shape {x.shape}")
    x = as_vector(x, x.shape[0], "x")
    y = as_vector(y, x.shape[0], "y")
    return float(_k.dot(x, y))
