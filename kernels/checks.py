"""Checks of user input shared by every layer: point indices and scalar options.

Each raises :class:`~hatkernels.errors.InputError` naming the argument, the
offending position and value, so that callers need no checking code of their own.
"""

from __future__ import annotations

import math
import numbers

import numpy as np

from hatkernels.errors import InputError

__all__ = ["point_indices", "integer_option", "real_option"]


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
