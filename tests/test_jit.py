"""The numba wrapper: caching fallback, no fastmath, thread control."""

import warnings

import numba
import pytest

import hatkernels._jit as kjit


def test_falls_back_when_no_cache_location_exists(monkeypatch):
    real = numba.njit

    def njit(*args, cache=False, **kw):
        if cache:
            raise RuntimeError("cannot cache function 'f': no locator available for file 'x.py'")
        return real(*args, cache=cache, **kw)

    monkeypatch.setattr(numba, "njit", njit)
    monkeypatch.setattr(kjit, "_cache_ok", True)
    with pytest.warns(RuntimeWarning, match="cannot cache compiled kernels"):

        @kjit.jit()
        def f(x):
            return x + 1

    assert f(1) == 2
    assert not kjit.caching_enabled()


def test_the_cache_notice_is_no_error_in_the_tests(monkeypatch):
    # RuntimeWarning is an error in the test configuration, but for this notice
    # (pyproject.toml filterwarnings): the library works with a read-only cache, and
    # so must its test suite, where the notice comes while hatkernels is imported
    real = numba.njit

    def njit(*args, cache=False, **kw):
        if cache:
            raise RuntimeError("cannot cache function 'g': no locator available for file 'y.py'")
        return real(*args, cache=cache, **kw)

    monkeypatch.setattr(numba, "njit", njit)
    monkeypatch.setattr(kjit, "_cache_ok", True)

    @kjit.jit()
    def g(x):
        return 2 * x

    assert g(2) == 4 and not kjit.caching_enabled()


def test_fastmath_is_refused():
    with pytest.raises(ValueError, match="fastmath"):
        kjit.jit(fastmath=True)


def test_threads_context_restores():
    before = numba.get_num_threads()
    with kjit.threads(1):
        assert numba.get_num_threads() == 1
    assert numba.get_num_threads() == before
    with pytest.raises(ValueError, match="thread count"):
        kjit.threads(0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with kjit.threads(numba.config.NUMBA_NUM_THREADS):
            pass
