"""Error norms and convergence studies."""

import numpy as np
import pytest
from conftest import EPS, jittered_mesh

import hatkernels
from hatkernels import norms

#: Round-off of a quadrature sum over a few hundred points, relative: a wrong weight,
#: point or area moves these norms by far more.
SUMS = 64 * EPS


def test_norms_of_simple_functions():
    # integrals of constants and linear functions over the unit square
    # (elementary; common practice, no source)
    m = jittered_mesh(5, 2)
    zero = lambda x, y: 0 * x  # noqa: E731
    assert norms.l2_error(m, np.ones(m.n_points), zero) == pytest.approx(1.0, rel=SUMS, abs=0)
    lin = lambda x, y: 1 + 2 * x - y  # noqa: E731
    # P1 holds linear functions exactly: only round-off of values of size 1 to 2 is left
    assert norms.l2_error(m, lin(*m.points.T), lin) <= 2 * SUMS
    # u_h = x: int |x|^2 = 1/3; gradient (1, 0)
    x = m.points[:, 0]
    assert norms.l2_error(m, x, zero) == pytest.approx(np.sqrt(1 / 3), rel=SUMS, abs=0)
    grad0 = lambda x, y: (0 * x, 0 * x)  # noqa: E731
    assert norms.h1_seminorm_error(m, x, grad0) == pytest.approx(1.0, rel=SUMS, abs=0)
    # gradients (2, -1) to round-off: differences of values of size 1 over edges of
    # about 1/5, a few units of EPS times |grad| = sqrt(5) each
    assert (
        norms.h1_seminorm_error(m, lin(*m.points.T), lambda x, y: (2 + 0 * x, -1 + 0 * x))
        <= SUMS * np.sqrt(5)
    )
    assert norms.energy_error(m, x, grad0, 4.0) == pytest.approx(2.0, rel=SUMS, abs=0)
    assert norms.energy_error(m, x, grad0, np.diag([9.0, 1.0])) == pytest.approx(3.0, rel=SUMS, abs=0)
    assert norms.energy_error(m, x, grad0, lambda x, y: 1 + 0 * x) == pytest.approx(1.0, rel=SUMS, abs=0)


def test_norms_leave_their_inputs_unchanged():
    # inputs are never modified (the project's rule): compared with copies taken before
    m = jittered_mesh(4, 3)
    u = np.cos(m.points[:, 0]) * m.points[:, 1]
    u32 = u.astype(np.float32)  # converted on the way, not in place
    per_point = 1.0 + m.points[:, 0]
    per_cell = np.linspace(1.0, 2.0, m.n_triangles)
    tensors = np.tile(np.array([[2.0, 0.5], [0.5, 1.0]]), (m.n_triangles, 1, 1))
    inputs = (u, u32, per_point, per_cell, tensors)
    before = [a.copy() for a in inputs]
    points, cells = m.points.copy(), m.triangles.copy()
    exact = lambda x, y: x * y  # noqa: E731
    grad = lambda x, y: (y, x)  # noqa: E731
    for values in (u, u32):
        norms.l2_error(m, values, exact)
        norms.h1_seminorm_error(m, values, grad)
        for coef in (per_point, hatkernels.per_triangle(per_cell), tensors):
            norms.energy_error(m, values, grad, coef)
    for old, new in zip(before, inputs, strict=True):
        assert np.array_equal(old, new) and old.dtype == new.dtype
    assert np.array_equal(m.points, points) and np.array_equal(m.triangles, cells)


@pytest.mark.parametrize("scale", [1e200, 1e-200])
def test_norms_are_scaled(scale):
    # a constant on the unit square: its L2 norm is the constant; u_h = s x has
    # gradient (s, 0) and H1 seminorm s (elementary; common practice, no source)
    m = hatkernels.mesh.rectangle(4, 4)
    zero = lambda x, y: 0 * x  # noqa: E731
    with np.errstate(over="ignore", under="ignore"):
        l2 = norms.l2_error(m, np.full(m.n_points, scale), zero)
        h1 = norms.h1_seminorm_error(m, scale * m.points[:, 0], lambda x, y: (0 * x, 0 * x))
    assert l2 == pytest.approx(scale, rel=SUMS, abs=0)
    assert h1 == pytest.approx(scale, rel=SUMS, abs=0)


def test_observed_rates():
    # e = C h^p gives p between any two levels (definition of the order; common practice,
    # no source); powers of two keep the logarithms exact to round-off
    h = np.array([1.0, 0.5, 0.25])
    assert norms.observed_rates(h, 3 * h**2) == pytest.approx([2.0, 2.0], rel=4 * EPS, abs=0)


def test_bad_input():
    m = hatkernels.mesh.rectangle(2, 2)
    with pytest.raises(hatkernels.InputError, match="nodal values of shape"):
        norms.l2_error(m, np.ones(3), lambda x, y: x)
    with pytest.raises(hatkernels.InputError, match=r"exact\(x, y\) returned shape"):
        norms.l2_error(m, np.ones(9), lambda x, y: np.ones(2))
    with pytest.raises(hatkernels.InputError, match="levels"):
        norms.convergence_study(m, lambda mm: np.zeros(mm.n_points), lambda x, y: x, levels=1)


def test_non_finite_values_are_named_never_returned():
    m = hatkernels.mesh.rectangle(3, 3)
    u = np.ones(m.n_points)
    with pytest.raises(
        hatkernels.InputError, match=r"exact\(x, y\) is nan at \(.*\), a quadrature point of triangle"
    ):
        norms.l2_error(m, u, lambda x, y: np.where(x > 0.5, np.nan, x))
    with pytest.raises(hatkernels.InputError, match=r"component 1 of grad_exact\(x, y\) is inf"):
        norms.h1_seminorm_error(m, u, lambda x, y: (0 * x, np.where(y > 0.5, np.inf, x)))
    with pytest.raises(hatkernels.InputError, match="must return real numbers"):
        norms.l2_error(m, u, lambda x, y: x + 1j)
    with pytest.raises(hatkernels.InputError, match="components of different shapes"):
        norms.h1_seminorm_error(m, u, lambda x, y: (0 * x, 1.0))
    bad = u.copy()
    bad[7] = np.nan
    with pytest.raises(hatkernels.InputError, match=r"u\[7\] = nan is not finite"):
        norms.l2_error(m, bad, lambda x, y: x)
    # a point in no triangle: its value is never read, so NaN there is harmless
    with pytest.warns(hatkernels.MeshWarning):
        loose = hatkernels.Mesh(np.r_[m.points, [[5.0, 5.0]]], m.triangles)
    assert norms.l2_error(loose, np.r_[u, np.nan], lambda x, y: 0 * x) == pytest.approx(
        1.0, rel=SUMS, abs=0
    )
