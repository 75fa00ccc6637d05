"""Error norms and convergence studies."""

import numpy as np
import pytest
from conftest import jittered_mesh

import hatkernels
from hatkernels import norms


def test_norms_of_simple_functions():
    # integrals of constants and linear functions over the unit square
    # (elementary; common practice, no source)
    m = jittered_mesh(5, 2)
    zero = lambda x, y: 0 * x  # noqa: E731
    assert norms.l2_error(m, np.ones(m.n_points), zero) == pytest.approx(1.0)
    lin = lambda x, y: 1 + 2 * x - y  # noqa: E731
    assert norms.l2_error(m, lin(*m.points.T), lin) < 1e-14
    # u_h = x: int |x|^2 = 1/3; gradient (1, 0)
    x = m.points[:, 0]
    assert norms.l2_error(m, x, zero) == pytest.approx(np.sqrt(1 / 3))
    grad0 = lambda x, y: (0 * x, 0 * x)  # noqa: E731
    assert norms.h1_seminorm_error(m, x, grad0) == pytest.approx(1.0)
    assert (
        norms.h1_seminorm_error(m, lin(*m.points.T), lambda x, y: (2 + 0 * x, -1 + 0 * x)) < 1e-12
    )
    assert norms.energy_error(m, x, grad0, 4.0) == pytest.approx(2.0)
    assert norms.energy_error(m, x, grad0, np.diag([9.0, 1.0])) == pytest.approx(3.0)
    assert norms.energy_error(m, x, grad0, lambda x, y: 1 + 0 * x) == pytest.approx(1.0)


def test_observed_rates():
    h = np.array([1.0, 0.5, 0.25])
    assert norms.observed_rates(h, 3 * h**2) == pytest.approx([2.0, 2.0])


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
    assert norms.l2_error(loose, np.r_[u, np.nan], lambda x, y: 0 * x) == pytest.approx(1.0)
