"""hatkernels._jit.simd: the explicit-vector rows of the patch stencil against the same sums
made by NumPy, element by element in the same order (IEEE 754 rounds each operation
alone, so the same operations in the same order give the same bits: common practice,
no source).  Every width from 0 to 40 covers the plain loop (0 to 3 points), the 4-lane
vectors (4 to 7), whole 8-lane vectors, the overlapping last one and the end lanes set
from the sides; each output starts as NaN, so a point written outside the row shows."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from numba import njit

from hatkernels._jit.simd import stencil_row, stencil_row_plain


@njit
def _explicit_row(x, xb, y, row, below, above, width, d, h, v, g, ends):
    stencil_row(x, xb, y, row, below, above, width, d, h, v, g, ends[0], ends[1], ends[2],
                ends[3])


@njit
def _plain_row(x, xb, y, row, below, above, width, d, h, v, g, ends):
    stencil_row_plain(x, xb, y, row, below, above, width, d, h, v, g, ends[0], ends[1],
                      ends[2], ends[3])


def numpy_whole_row(x, xb, row, below, above, width, d, h, v, g, ends):
    """The whole row ``q = 0 .. width - 1`` by NumPy: the first point's left and upper-left
    neighbours and the last point's right and upper neighbours are ``ends``."""
    left, upleft, right, up = ends
    q = np.arange(width)
    xl, xr = x[row + q - 1].copy(), x[row + q + 1].copy()
    xu, xul = x[above + q].copy(), x[above + q - 1].copy()
    if width:
        xl[0], xul[0], xr[-1], xu[-1] = left, upleft, right, up
    return (d * x[row + q] + h * (xl + xr) + v * (xb[below + q] + xu)
            + g * (xb[below + q + 1] + xul))


def check_whole(width, row, below, above, weights, ends, seed, kernel):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(row + above + 2 * width + 4)
    xb = rng.standard_normal(below + width + 2)
    x_before, xb_before = x.copy(), xb.copy()
    y = np.full(row + width + 3, np.nan)
    kernel(x, xb, y, row, below, above, width, *weights, np.array(ends))
    want = numpy_whole_row(x, xb, row, below, above, width, *weights, ends)
    assert y[row:row + width].tobytes() == want.tobytes()
    assert np.isnan(y[:row]).all() and np.isnan(y[row + width:]).all()
    assert x.tobytes() == x_before.tobytes() and xb.tobytes() == xb_before.tobytes()


def test_whole_rows_of_every_width_up_to_40_take_their_ends_from_the_sides():
    weights, ends = (4.3, -0.7, -1.1, 0.35), (10.5, -20.25, 30.125, -40.0625)
    for width in range(41):
        for kernel in (_explicit_row, _plain_row):
            check_whole(width, 5, 3, 50, weights, ends, width, kernel)


@settings(max_examples=30, deadline=None)
@given(width=st.integers(0, 70), row=st.integers(1, 30), below=st.integers(0, 30),
       above=st.integers(1, 30),
       weights=st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=4, max_size=4),
       ends=st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=4, max_size=4),
       seed=st.integers(0, 2**32 - 1))
def test_any_whole_row_anywhere_gives_numpys_bits(width, row, below, above, weights, ends,
                                                   seed):
    check_whole(width, row, below, row + width + above, tuple(weights), tuple(ends), seed,
                _explicit_row)
