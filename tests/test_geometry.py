"""Element gradients: the numba kernel against the NumPy version and against the definition."""

import numpy as np
import pytest
from conftest import EPS, meshes, relative_error
from hypothesis import given

import hatkernels
from hatkernels import element_gradients


@given(meshes())
def test_kernel_equals_numpy_version(m):
    a1, g1 = element_gradients(m.points, m.triangles)
    a2, g2 = element_gradients(m.points, m.triangles, plain=True)
    # the same formula in a different order of operations: a few roundings apart
    assert np.abs(a1 - a2).max() <= 4 * EPS * np.abs(a2).max()
    assert np.abs(g1 - g2).max() <= 4 * EPS * np.abs(g2).max()
    assert relative_error(a1, m.areas()) <= 4 * EPS


@given(meshes())
def test_gradients_are_those_of_the_barycentric_coordinates(m):
    # lambda_a(x_b) = delta_ab and lambda_a is linear, so
    # grad lambda_a . (x_b - x_c) = delta_ab - delta_ac (definition; common practice, no source)
    _, g = element_gradients(m.points, m.triangles)
    x = m.points[m.triangles]
    for a in range(3):
        for b in range(3):
            for c in range(3):
                d = x[:, b] - x[:, c]
                lhs = np.einsum("mi,mi->m", g[:, a], d)
                # each term |g| |d| is O(1) on a shape-regular triangle; a few roundings
                # of each, relative to it
                bound = 16 * EPS * np.einsum("mi,mi->m", np.abs(g[:, a]), np.abs(d))
                assert (np.abs(lhs - (float(a == b) - float(a == c))) <= bound).all()
    assert np.abs(g.sum(axis=1)).max() <= 4 * EPS * np.abs(g).max()


def test_unit_right_triangle():
    # gradients of 1 - x - y, x, y (definition)
    area, g = element_gradients(np.array([[0.0, 0], [1, 0], [0, 1]]), np.array([[0, 1, 2]]))
    assert area.tolist() == [0.5]
    assert g[0].tolist() == [[-1, -1], [1, 0], [0, 1]]


def test_bad_arrays_are_refused():
    with pytest.raises(hatkernels.InputError, match="shape"):
        element_gradients(np.zeros((3, 3)), np.array([[0, 1, 2]]))
    with pytest.raises(hatkernels.InputError, match="triangle 0 refers to a point outside"):
        element_gradients(np.zeros((3, 2)), np.array([[0, 1, 3]]))


def test_degenerate_or_non_finite_triangles_are_named():
    p = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [2.0, 0.0], [1.0, 1.0]])
    t = np.array([[0, 1, 2], [0, 1, 3], [1, 4, 2]])  # triangle 1 is flat
    bad = p.copy()
    bad[4, 1] = np.nan
    inputs = (p, t, bad)
    before = [a.copy() for a in inputs]
    for plain in (False, True):
        with pytest.raises(hatkernels.MeshError, match=r"triangle 1 has zero area \(points 0, 1, 3"):
            element_gradients(p, t, plain=plain)
        with pytest.raises(hatkernels.MeshError, match=r"triangle 1 has point 4 with a non-finite"):
            element_gradients(bad, t[[0, 2]], plain=plain)
        # a non-finite point in no triangle is never read
        assert np.isfinite(element_gradients(bad, t[:1], plain=plain)[1]).all()
    # inputs untouched, the one holding the NaN included (NaN where it was, nowhere else)
    for old, new in zip(before, inputs, strict=True):
        assert np.array_equal(old, new, equal_nan=True)
    assert np.isnan(bad).sum() == 1 and np.isnan(bad[4, 1])


def test_ragged_input_is_an_input_error():
    # numpy refuses ragged lists with its own ValueError; the library names the arguments
    with pytest.raises(hatkernels.InputError, match="points and cells cannot be read as arrays"):
        element_gradients([[0.0, 0.0], [1.0]], [[0, 1, 2]])
