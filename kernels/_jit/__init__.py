"""Private numba kernels on raw arrays.

Kernels here never see scipy objects and never validate: the public wrappers
check shapes, dtypes and values first.  Every kernel is compiled lazily on
first call and cached on disk when a writable cache location exists; when
none exists (a read-only install with no writable home or NUMBA_CACHE_DIR)
the kernels still work, they are only compiled again in every process.
"""

import warnings

import numba

__all__ = ["jit", "caching_enabled", "threads"]

_cache_ok = True


def caching_enabled():
    """True while every kernel compiled so far could be cached on disk."""
    return _cache_ok


def jit(parallel=False, **options):
    """``numba.njit`` with the project's rules: cached when possible, never fastmath."""
    if options.get("fastmath"):
        raise ValueError("fastmath is not allowed: kernels must give the same bits every run")

    def decorate(func):
        global _cache_ok
        try:
            return numba.njit(cache=True, parallel=parallel, **options)(func)
        except RuntimeError as exc:  # numba found no writable cache location
            if _cache_ok:
                warnings.warn(
                    f"numba cannot cache compiled kernels ({exc}); they will be compiled "
                    "in every process. Set NUMBA_CACHE_DIR to a writable directory to fix this.",
                    RuntimeWarning,
                    stacklevel=2,
                )
            _cache_ok = False
            return numba.njit(cache=False, parallel=parallel, **options)(func)

    return decorate


class threads:
    """Context manager that runs the numba kernels inside it on ``n`` threads.

    >>> from hatkernels._jit import threads
    >>> with threads(1):
    ...     pass
    """

    def __init__(self, n):
        self.n = int(n)
        if not 1 <= self.n <= numba.config.NUMBA_NUM_THREADS:
            raise ValueError(
                f"thread count must be between 1 and {numba.config.NUMBA_NUM_THREADS}, got {n}"
            )

    def __enter__(self):
        self._saved = numba.get_num_threads()
        numba.set_num_threads(self.n)
        return self

    def __exit__(self, *exc):
        numba.set_num_threads(self._saved)
        return False
