"""hatkernels._jit.hints: a prefetch changes no value, compiles for both index kinds
(common practice, no source: a hint has no result to check but its absence of effect)."""

import numpy as np
from numba import njit, uint64

from hatkernels._jit.hints import prefetch


@njit
def _sum_with_hints(x):
    total = 0.0
    for i in range(x.shape[0]):
        if i + 8 < x.shape[0]:
            prefetch(x, i + 8)
            prefetch(x, uint64(i + 8))
        total += x[i]
    return total


def test_prefetch_changes_no_value_and_leaves_its_array_alone():
    x = np.random.default_rng(0).standard_normal(1000)
    before = x.copy()
    total = _sum_with_hints(x)
    plain = 0.0
    for v in before:
        plain += v
    assert total == plain  # the same additions in the same order
    assert np.array_equal(x.view(np.uint64), before.view(np.uint64))
