"""Measuring helpers: bandwidth, peak memory, first-call timing, nested sizes.

No speed is asserted here (speed is measured in bench/): only that the
figures are of the right kind and that the memory figures see memory that
was really allocated.
"""

import math
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from hatkernels import perf

MB = 2**20


def test_memory_bandwidth_is_positive_and_finite():
    bw = perf.memory_bandwidth(mbytes=16, repeats=2)  # small: a check, not a measurement
    assert set(bw) == {"copy", "triad"}
    for name, gbs in bw.items():
        assert isinstance(gbs, float) and math.isfinite(gbs) and gbs > 0, name


def test_peak_rss_is_positive_and_never_decreases():
    before = perf.peak_rss_bytes()
    assert isinstance(before, int) and before > 0
    a = np.empty(50 * MB // 8)
    a.fill(1.0)  # touched: every page resident
    during = perf.peak_rss_bytes()
    del a
    after = perf.peak_rss_bytes()
    assert before <= during <= after  # a high-water mark
    # the kernel updates the high-water mark lazily (per-thread counters synced now
    # and then), so it may lag the resident size read from /proc by a few pages
    assert during >= perf.rss_bytes() - 4 * MB


def test_peak_rss_sees_50_mb_touched_in_a_fresh_process():
    # a fresh process, whose peak is not already above what this test adds
    # (importing the library passes a transient peak above what stays resident, so the
    # new peak is compared with the resident size before the 50 MB were touched)
    code = (
        "import numpy as np; from hatkernels import perf\n"
        "resident = perf.rss_bytes()\n"
        "a = np.empty(50 * 2**20 // 8); a.fill(1.0)\n"
        "print(resident, perf.peak_rss_bytes())\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, timeout=120)
    resident, peak = map(int, out.stdout.split())
    assert peak - resident >= 45 * MB  # 50 MB less the lag above, with room


def test_peak_memory_traced_sees_an_allocation_within_ten_percent():
    size = 10 * MB
    with perf.PeakMemory() as peak:
        a = np.ones(size // 8)
        del a
    assert abs(peak.peak - size) <= 0.1 * size
    with perf.PeakMemory() as nothing:
        pass
    assert 0 <= nothing.peak < 0.01 * size  # the one before is not counted again


def test_peak_memory_rss_sees_touched_memory():
    # fresh pages of an anonymous mapping: the allocator cannot hand back memory that an
    # earlier test in this worker freed but kept resident (which np.empty may)
    import mmap

    size = 50 * MB
    with perf.PeakMemory(mode="rss") as peak:
        mapped = mmap.mmap(-1, size)
        a = np.frombuffer(mapped, dtype=np.float64)
        a.fill(2.0)
    assert peak.peak >= 0.9 * size
    del a
    mapped.close()
    with pytest.raises(ValueError, match="mode must be 'traced' or 'rss', got 'heap'"):
        perf.PeakMemory(mode="heap")


def test_timed_first_call_returns_the_result_of_the_function():
    calls = []

    def fn(x, *, y):
        calls.append((x, y))
        return {"sum": x + y, "call": len(calls)}

    out, first, second = perf.timed_first_call(fn, 2, y=3)
    assert out == {"sum": 5, "call": 2}  # the second call's result
    assert calls == [(2, 3), (2, 3)]
    assert math.isfinite(first) and first >= 0 and math.isfinite(second) and second >= 0


@given(st.integers(1, 5000), st.integers(1, 64))
def test_nested_sizes_refine_back_to_n(n, smallest):
    coarse, levels = perf.nested(n, smallest=smallest)
    assert coarse * 2**levels == n  # uniform refinement halves each cell side
    if levels:
        assert coarse >= smallest
    # as many levels as allowed: one more would go below `smallest` or split a side
    assert coarse % 2 == 1 or coarse // 2 < smallest
