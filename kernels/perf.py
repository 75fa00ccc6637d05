"""Measuring helpers: memory bandwidth, peak memory, compile time.

Used by the benchmark suite in ``bench/`` and by ``hatkernels bench``, which
also share :func:`nested`, the sizes of their meshes made by refinement.
"""

from __future__ import annotations

import os
import resource
import sys
import threading
import time
import tracemalloc

import numpy as np

__all__ = [
    "memory_bandwidth",
    "nested",
    "PeakMemory",
    "peak_rss_bytes",
    "rss_bytes",
    "timed_first_call",
]

_PAGE = os.sysconf("SC_PAGE_SIZE") if hasattr(os, "sysconf") else 4096


def rss_bytes():
    """Resident set size of this process (Linux /proc; 0 where unavailable)."""
    try:
        with open("/proc/self/statm") as f:
            return int(f.read().split()[1]) * _PAGE
    except OSError:
        return 0


def peak_rss_bytes():
    """The process's high-water mark of resident memory, in bytes (the one place that reads it)."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak if sys.platform == "darwin" else peak * 1024)  # kB on Linux


class PeakMemory:
    """Context manager: peak memory allocated inside it, above what was allocated before.

    ``mode="traced"`` (default) uses tracemalloc, which sees every NumPy and
    scipy array; the library allocates the outputs of its numba kernels in
    Python, so only kernel scratch (small) escapes it.  ``mode="rss"`` samples
    the resident set size every ``interval`` seconds instead, which sees
    everything but depends on the allocator returning memory to the system;
    use it in a fresh process for whole runs.
    """

    def __init__(self, mode="traced", interval=0.002):
        if mode not in ("traced", "rss"):
            raise ValueError(f"mode must be 'traced' or 'rss', got {mode!r}")
        self.mode = mode
        self.interval = interval
        self.peak = 0

    def __enter__(self):
        if self.mode == "traced":
            self._was_tracing = tracemalloc.is_tracing()
            if not self._was_tracing:
                tracemalloc.start()
            tracemalloc.reset_peak()
            self._start = tracemalloc.get_traced_memory()[0]
            return self
        self._start = rss_bytes()
        self._stop = threading.Event()
        self._max = self._start

        def sample():
            while not self._stop.is_set():
                self._max = max(self._max, rss_bytes())
                time.sleep(self.interval)

        self._thread = threading.Thread(target=sample, daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc):
        if self.mode == "traced":
            self.peak = tracemalloc.get_traced_memory()[1] - self._start
            if not self._was_tracing:
                tracemalloc.stop()
            return False
        self._stop.set()
        self._thread.join()
        self._max = max(self._max, rss_bytes())
        self.peak = self._max - self._start
        return False


def memory_bandwidth(mbytes=512, repeats=5):
    """Sustained memory bandwidth of this machine, measured now (GB/s).

    Returns ``{"copy": ..., "triad": ...}``: a NumPy copy ``b[:] = a`` counts
    2 bytes moved per byte of array, the triad ``a = b + s c`` (done as two
    in-place passes by NumPy, so 5 array transfers) likewise; best of
    ``repeats``.  Arrays are far larger than the caches.
    """
    n = mbytes * 2**20 // 8
    a = np.ones(n)
    b = np.empty(n)
    c = np.full(n, 2.0)
    best_copy = best_triad = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        np.copyto(b, a)
        best_copy = min(best_copy, time.perf_counter() - t0)
        t0 = time.perf_counter()
        np.multiply(c, 3.0, out=a)
        np.add(a, b, out=a)
        best_triad = min(best_triad, time.perf_counter() - t0)
    return {"copy": 2 * a.nbytes / best_copy / 1e9, "triad": 5 * a.nbytes / best_triad / 1e9}


def timed_first_call(fn, *args, **kwargs):
    """Run ``fn`` twice; return (result, first-call seconds, second-call seconds).

    The difference is the compile time (numba compiles on the first call,
    or loads from its cache).
    """
    t0 = time.perf_counter()
    fn(*args, **kwargs)
    t1 = time.perf_counter()
    out = fn(*args, **kwargs)
    t2 = time.perf_counter()
    return out, t1 - t0, t2 - t1


def nested(n, smallest=8):
    """``(coarse, levels)``: ``rectangle(coarse, coarse)`` refined ``levels`` times is ``n x n``.

    As many levels as keep the coarse mesh at ``smallest`` cells per side or
    more; ``levels`` is 0 when ``n`` is odd or below ``2 * smallest``.

    >>> nested(1000), nested(300, smallest=4), nested(15)
    ((125, 3), (75, 2), (15, 0))
    """
    coarse, levels = n, 0
    while coarse % 2 == 0 and coarse // 2 >= smallest:
        coarse //= 2
        levels += 1
    return coarse, levels
