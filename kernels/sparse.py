"""Checked wrappers around the parallel sparse kernels, and input validation.

The kernels in :mod:`hatkernels._jit.sparse` trust their arguments; the functions
here check them once (shape, dtype, index range, finite values) and name the
offending entry when something is wrong.  The solvers and preconditioners use
:func:`as_csr` and :func:`as_vector` so that every entry point validates the
same way.  Inputs are never modified: a matrix or vector that needs another
dtype is copied.

All arithmetic is float64: float32, integer and boolean inputs are converted
(exactly); complex inputs are refused.

What is checked when (a matrix is checked once, not once per product):

* :func:`as_csr` checks a matrix's structure (shape, ``indptr`` rising from
  0, every column index in range) the first time it sees the matrix, and
  again whenever the matrix holds other arrays (``A.data = ...``,
  ``A.indices = ...``, ``A.indptr = ...`` or a new shape: the arrays it
  checked are told apart by identity).  It checks the values (finite) on
  every call (one pass over ``A.data``), unless the caller asks it not to:
* :func:`spmv` does not look at the values before the product: the parallel
  kernel tests each row's sum as it is formed, and only a non-finite result
  makes it look for the cause and name it (a non-finite entry of ``A`` always
  makes its row's sum non-finite; so does one of ``x`` in a stored column).
  :func:`dot` likewise looks at its vectors only when the result is not finite.
  A result that overflows from finite inputs is returned as it is.
* Writing into a checked matrix's index arrays in place (``A.indices[k] =
  ...``) is not seen and is not supported: assign a new array, or call
  ``as_csr(A, recheck=True)``.  Values may be written in place
  (reassembly into the same pattern): they are checked as said above.
"""

import weakref

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


#: The matrices :func:`as_csr` has checked and returned as they are, by ``id``: the shape,
#: the arrays checked (held, so that identity tells a replaced array apart) and ``nnz``.
#: An entry goes when its matrix is collected.
_CHECKED = {}


def _seen(A):
    """Whether ``A`` holds the arrays :func:`as_csr` checked last time (O(1))."""
    entry = _CHECKED.get(id(A))
    if entry is None:
        return False
    shape, data, indices, indptr, nnz = entry
    return (A.shape == shape and A.data is data and A.indices is indices
            and A.indptr is indptr and int(indptr[-1]) == nnz)


def remember_checked(A):
    """Record ``A`` as checked, so that :func:`as_csr` does not walk its structure again
    while it holds the same arrays: for :func:`as_csr`'s own results, and for matrices
    this package builds on a pattern it made itself (float64, one index dtype)."""
    key = id(A)
    if key not in _CHECKED:
        try:
            weakref.finalize(A, _CHECKED.pop, key, None)
        except TypeError:  # a matrix type with no weak references: checked on every call
            return
    _CHECKED[key] = (A.shape, A.data, A.indices, A.indptr, int(A.indptr[-1]))


def _non_finite(C, name):
    """InputError naming the first non-finite stored entry of CSR ``C``, or None."""
    nnz = int(C.indptr[-1])
    finite = np.isfinite(C.data[:nnz])
    if finite.all():
        return None
    k = int(np.argmin(finite))
    row = int(np.searchsorted(C.indptr, k, side="right") - 1)
    return InputError(f"{name} has a non-finite entry {C.data[k]} at row {row}, "
                      f"column {int(C.indices[k])}")


def as_csr(A, name="A", *, values=True, recheck=False):
    """Return ``A`` as a checked, square, float64 CSR matrix (a copy only if needed).

    Other sparse formats are converted once; ``A`` itself is never modified.
    ``indices`` and ``indptr`` of the result share one dtype (int32 or int64).
    The structure of a matrix returned as it is (already CSR, float64, one
    index dtype) is checked once and remembered while the matrix holds the
    same arrays (see the module notes).

    Parameters
    ----------
    values : bool
        Check that every stored value is finite (one pass over ``A.data``);
        False for a caller that checks its result instead (:func:`spmv`).
    recheck : bool
        Check the structure again even if it was checked before (after a
        write into the index arrays in place).

    Raises
    ------
    InputError
        Not sparse, not square, complex, malformed CSR arrays, or a non-finite
        entry (the message gives its row and column).
    """
    if not recheck and _seen(A):
        if values and not _k.all_finite(A.data[:int(A.indptr[-1])]):
            raise _non_finite(A, name)
        return A
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
    if values or C is not A:
        bad = _non_finite(C, name)
        if bad is not None:
            raise bad
    if C is A:
        remember_checked(C)
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


def _vector_fast(v, n):
    """``v`` itself when it is already a contiguous float64 vector of length ``n``, else None."""
    if (isinstance(v, np.ndarray) and v.dtype == np.float64 and v.shape == (n,)
            and v.flags.c_contiguous):
        return v
    return None


def spmv(A, x, out=None):
    """``A @ x`` with the parallel CSR kernel; ``out`` is overwritten when given.

    ``A`` is checked by :func:`as_csr` (so any sparse format works) once, not
    on every call; a non-finite result makes it look for the entry of ``A``
    or ``x`` that caused it and name it (module notes).  Rows are summed in
    storage order, so the result has the same bits on any thread count.

    Examples
    --------
    >>> import numpy as np
    >>> from pyamg.gallery import poisson
    >>> from hatkernels.sparse import spmv
    >>> A = poisson((3,), format="csr")
    >>> spmv(A, np.ones(3))
    array([1., 0., 1.])
    """
    C = as_csr(A, values=False)
    n = C.shape[0]
    v = _vector_fast(x, n)
    if v is None:
        v = as_vector(x, n, "x")
    if out is None:
        out = np.empty(n)
    elif not (isinstance(out, np.ndarray) and out.shape == (n,) and out.dtype == np.float64
              and out.flags.c_contiguous and out.flags.writeable):
        raise InputError(f"out must be a writeable contiguous float64 array of shape ({n},)")
    if np.may_share_memory(out, v):
        raise InputError("out must not overlap x (the product reads x while writing out)")
    if not _k.spmv_finite(C.indptr, C.indices, C.data, v, out):
        bad = _non_finite(C, "A")
        if bad is not None:
            raise bad
        as_vector(v, n, "x")  # raises naming the entry
    return out


def dot(x, y):
    """``x . y`` summed over fixed chunks: the same bits on any thread count.

    >>> import numpy as np
    >>> from hatkernels.sparse import dot
    >>> dot(np.arange(4.0), np.ones(4))
    6.0
    """
    a = np.asarray(x)
    if a.ndim != 1:
        raise InputError(f"x must be 1-D, got shape {a.shape}")
    n = a.shape[0]
    u, v = _vector_fast(a, n), _vector_fast(y, n)
    if u is None or v is None:  # converted and checked; the values looked at only if needed
        u = as_vector(a, n, "x") if u is None else u
        v = as_vector(y, n, "y") if v is None else v
    result = float(_k.dot(u, v))
    if not np.isfinite(result):  # a non-finite entry, or an overflow of finite ones
        as_vector(u, n, "x")
        as_vector(v, n, "y")
    return result
