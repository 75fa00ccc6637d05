"""Checks of user input shared by every layer: point indices, scalar options and the
vectors of the ``_into`` methods.

Each raises :class:`~hatkernels.errors.InputError` naming the argument, the
offending position and value, so that callers need no checking code of their own.
"""

from __future__ import annotations

import math
import numbers

import numpy as np

from hatkernels.errors import InputError

__all__ = ["point_indices", "integer_option", "real_option", "into_vectors"]


def point_indices(values, n_points, name="points"):
    """``values`` as a 1-D int64 array of point indices in ``0..n_points-1`` (a new array).

    Raises InputError for another shape or dtype (booleans included) or for the
    first index out of range, naming ``name[k]``.

    >>> point_indices([3, 0], 4).tolist()
    [3, 0]
    >>> point_indices([1, 4], 4, "dirichlet_on")
    Traceback (most recent call last):
    ...
    hatkernels.errors.InputError: dirichlet_on[1] = 4 is outside 0..3
    """
    try:
        a = np.asarray(values)
    except Exception as exc:  # ragged lists and the like
        raise InputError(f"{name} cannot be read as an array of point indices: {exc}") from None
    if a.ndim != 1 or (a.size and a.dtype.kind not in "iu"):
        raise InputError(f"{name} must be a 1-D array of point indices, got {a.dtype} {a.shape}")
    a = a.astype(np.int64)  # a copy: the caller's array is never kept or changed
    if a.size:
        bad = (a < 0) | (a >= n_points)
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise InputError(f"{name}[{k}] = {a[k]} is outside 0..{n_points - 1}")
    return a


def integer_option(value, name, *, minimum=None, maximum=None, allow_none=False):
    """A Python int (bools refused) from ``minimum`` to ``maximum`` (each if given);
    None passes if ``allow_none``.

    >>> integer_option(3, "maxiter", minimum=1)
    3
    >>> integer_option(0, "maxiter", minimum=1)
    Traceback (most recent call last):
    ...
    hatkernels.errors.InputError: maxiter must be >= 1, got 0
    """
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        what = "an integer or None" if allow_none else "an integer"
        raise InputError(f"{name} must be {what}, got {value!r}")
    low = minimum is not None and value < minimum
    high = maximum is not None and value > maximum
    if (low or high) and minimum is not None and maximum is not None:
        raise InputError(f"{name} must be between {minimum} and {maximum}, got {value}")
    if low:
        raise InputError(f"{name} must be >= {minimum}, got {value}")
    if high:
        raise InputError(f"{name} must be <= {maximum}, got {value}")
    return int(value)


def real_option(value, name, *, minimum=None, positive=False, finite=True, allow_none=False,
                between=None):
    """A float (bools refused), finite unless ``finite=False``, ``> 0`` if ``positive``,
    ``>= minimum`` if given, strictly inside ``between = (low, high)`` if given; None passes
    if ``allow_none``.

    >>> real_option(1e-8, "rtol", minimum=0.0)
    1e-08
    >>> real_option(float("nan"), "rtol", minimum=0.0)
    Traceback (most recent call last):
    ...
    hatkernels.errors.InputError: rtol must be a finite number, got nan
    """
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InputError(f"{name} must be a real number, got {value!r}")
    v = float(value)
    if math.isnan(v) or (finite and math.isinf(v)):
        raise InputError(f"{name} must be a {'finite ' if finite else ''}number, got {value!r}")
    if positive and not v > 0:
        raise InputError(f"{name} must be > 0, got {value!r}")
    if minimum is not None and v < minimum:
        raise InputError(f"{name} must be >= {minimum}, got {value!r}")
    if between is not None and not between[0] < v < between[1]:
        raise InputError(f"{name} must be a number between {between[0]} and {between[1]}, "
                         f"got {value!r}")
    return v


_F64 = np.dtype(np.float64)
_WRITABLE = {False: (_F64,), True: (_F64, np.dtype(np.float32))}
_ROWS = "the operator has {:,} rows"


def into_vectors(owner, n, inputs=None, outputs=None, *, single=False, size=_ROWS):
    """The vectors of a method that writes into caller-provided arrays, checked in O(1)
    (no entry is read: finiteness is not checked); returns the inputs, in order, as a tuple.

    ``inputs`` (``{name: array}``) are only read: each must be real and of shape ``(n,)``,
    and comes back as a writable C-contiguous float64 vector, itself when it is one, else
    a copy (the caller's array is never written; a read-only one is copied too, as some
    kernels write the same argument in another mode and numba then types it writable).
    ``outputs`` (``{name: array}``) are written: each must be a writable C-contiguous
    float64 ndarray of shape ``(n,)`` (float32 too with ``single``: the patch multigrid's
    single-precision levels) sharing no memory with an input or another output
    (``np.may_share_memory``, which compares bounds only: interleaved views count as
    sharing).  Otherwise an InputError starting with ``owner`` names the argument;
    ``size`` says what ``n`` is.

    >>> x, = into_vectors("A.matvec_into", 3, {"x": [1, 2, 3]}, {"out": np.empty(3)})
    >>> x.dtype.name
    'float64'
    >>> into_vectors("A.matvec_into", 3, {"x": x}, {"out": x})
    Traceback (most recent call last):
    ...
    hatkernels.errors.InputError: A.matvec_into: out shares memory with x; it must be a separate array
    """
    read, seen = [], []  # seen: (name, array) pairs an output must not overlap
    for name, x in (inputs or {}).items():
        a = x
        if not (type(x) is np.ndarray and x.dtype is _F64 and (f := x.flags).c_contiguous
                and f.writeable):
            a = _converted(owner, name, x, n, size)
            if isinstance(x, np.ndarray):
                seen.append((name, x))
        elif x.shape != (n,):
            raise InputError(f"{owner}: {name} has shape {x.shape}; {size.format(n)}")
        read.append(a)
        seen.append((name, a))
    for name, out in (outputs or {}).items():
        if not (type(out) in (np.ndarray, np.memmap) and out.dtype in _WRITABLE[single]
                and (f := out.flags).c_contiguous and f.writeable and out.shape == (n,)):
            _refuse_output(owner, name, out, n, single, size)
        for other, a in seen:
            if np.may_share_memory(out, a):
                raise InputError(f"{owner}: {name} shares memory with {other}; it must be a "
                                 f"separate array")
        seen.append((name, out))
    return tuple(read)


def _converted(owner, name, x, n, size):
    """An input that is not a writable C-contiguous float64 ndarray, as one (a copy, or a
    view of a float64 C-contiguous writable subclass)."""
    try:
        a = np.asarray(x)
    except Exception as exc:  # ragged lists and the like
        raise InputError(f"{owner}: {name} cannot be read as a vector: {exc}") from None
    if a.dtype.kind not in "biuf":
        raise InputError(f"{owner}: {name} must be a real vector, got dtype {a.dtype}")
    if a.shape != (n,):
        raise InputError(f"{owner}: {name} has shape {a.shape}; {size.format(n)}")
    a = np.ascontiguousarray(a, dtype=np.float64)
    return a if a.flags.writeable else a.copy()


def _refuse_output(owner, name, out, n, single, size):
    kinds = "float64 (or float32)" if single else "float64"
    want = f"{owner}: {name} must be a writable C-contiguous {kinds} vector"
    if not isinstance(out, np.ndarray):
        raise InputError(f"{want}, got {type(out).__name__}")
    if type(out) not in (np.ndarray, np.memmap):
        raise InputError(f"{want}, got a {type(out).__name__}")
    if out.dtype not in _WRITABLE[single]:
        raise InputError(f"{want}, got {out.dtype}")
    if out.shape != (n,):
        raise InputError(f"{owner}: {name} has shape {out.shape}; {size.format(n)}")
    if not out.flags.c_contiguous:
        raise InputError(f"{want}, got a strided view (strides {out.strides})")
    raise InputError(f"{want}, got a read-only array")
