"""solve(): every preconditioner against scipy's direct solve; never a silent wrong answer."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from linear_cases import random_spd
from pyamg.gallery import poisson

from hatkernels.errors import ConvergenceError, InputError
from hatkernels.precond import PRECONDITIONERS, make_preconditioner
from hatkernels.solver import SolveResult, solve


def spd_case():
    return random_spd(70, seed=8, density=0.08)


CASES = {
    "poisson1d": lambda: poisson((50,), format="csr"),
    "poisson2d": lambda: poisson((14, 13), format="csr"),
    "random-spd": spd_case,
    "float32": lambda: poisson((9, 9), format="csr").astype(np.float32),
}
NAMES = ("none", "jacobi", "ic0", "amg-sa", "amg-rs", "amg-native", "direct", "amg")


@pytest.mark.parametrize("preconditioner", NAMES)
@pytest.mark.parametrize("case", CASES)
def test_solution_equals_spsolve(case, preconditioner):
    A = CASES[case]()
    b = np.random.default_rng(1).standard_normal(A.shape[0])
    result = solve(A, b, preconditioner=preconditioner, rtol=1e-12, start="zero")
    assert isinstance(result, SolveResult)
    assert result.converged and result.info == 0
    # reference library: scipy (sparse direct solve)
    ref = sla.spsolve(A.astype(np.float64).tocsc(), b)
    assert np.linalg.norm(result.x - ref) <= 1e-8 * np.linalg.norm(ref)
    assert result.residuals.shape == (result.iterations + 1,)
    assert result.residuals[0] == pytest.approx(np.linalg.norm(b))
    assert set(result.stats.timings) == {"setup", "solve"}
    assert all(t >= 0 for t in result.stats.timings.values())
    assert result.stats.preconditioner.startswith(preconditioner)


def test_all_builtin_names_are_covered():
    assert set(NAMES) <= set(PRECONDITIONERS)


def test_default_is_amg_and_tolerance_1e8():
    A = CASES["poisson2d"]()
    b = np.ones(A.shape[0])
    result = solve(A, b)
    assert result.stats.preconditioner.startswith("amg (= amg-")
    assert np.linalg.norm(b - A @ result.x) <= 1e-8 * np.linalg.norm(b)


def test_preconditioner_instance_and_options():
    A = CASES["poisson2d"]()
    b = np.ones(A.shape[0])
    M = make_preconditioner(A, "ic0", modified=True)
    result = solve(A, b, preconditioner=M)
    assert result.converged and result.stats.timings["setup"] == 0.0
    assert "modified incomplete Cholesky" in result.stats.preconditioner
    optioned = solve(A, b, preconditioner="amg-rs", cycle="W", max_levels=3)
    assert optioned.converged and "W-cycle" in optioned.stats.preconditioner
    with pytest.raises(InputError, match="options .*cycle.* given with a preconditioner instance"):
        solve(A, b, preconditioner=M, cycle="V")
    with pytest.raises(InputError, match="unknown option 'smoothing'"):
        solve(A, b, preconditioner="amg-sa", smoothing=2)
    with pytest.raises(InputError, match="unknown preconditioner 'no-such-thing'"):
        solve(A, b, preconditioner="no-such-thing")
    with pytest.raises(InputError, match="name or a LinearOperator"):
        solve(A, b, preconditioner=3)


def test_matrix_free_operator_with_none():
    A = CASES["poisson2d"]()
    b = np.ones(A.shape[0])
    result = solve(sla.aslinearoperator(A), b, preconditioner="none")
    assert result.converged
    assert np.allclose(result.x, sla.spsolve(A.tocsc(), b))  # reference library: scipy


def test_non_convergence_warns_or_raises():
    A = CASES["poisson2d"]()
    b = np.ones(A.shape[0])
    with pytest.warns(RuntimeWarning, match="not converged after 3 iterations"):
        result = solve(A, b, preconditioner="none", maxiter=3)
    assert not result.converged and result.info == 3 and result.iterations == 3
    assert np.linalg.norm(b - A @ result.x) > 1e-8 * np.linalg.norm(b)
    with pytest.raises(ConvergenceError, match="not converged after 3 iterations"):
        solve(A, b, preconditioner="none", maxiter=3, check=True)


def test_breakdown_is_reported_not_hidden():
    A = sp.diags_array(np.linspace(-1.0, 2.0, 20)).tocsr()
    with pytest.warns(RuntimeWarning, match="A is not positive definite"):
        result = solve(A, np.ones(20), preconditioner="none")
    assert not result.converged and result.info < 0
    with pytest.raises(ConvergenceError, match="A is not positive definite"):
        solve(A, np.ones(20), preconditioner="none", check=True)
    B = CASES["poisson2d"]()
    M = sla.aslinearoperator(-sp.eye_array(B.shape[0]))
    with pytest.raises(ConvergenceError, match="preconditioner M is not positive definite"):
        solve(B, np.ones(B.shape[0]), preconditioner=M, check=True)


def test_x0_and_zero_rhs():
    A = CASES["poisson2d"]()
    n = A.shape[0]
    x0 = np.ones(n)
    result = solve(A, np.zeros(n), x0=x0, preconditioner="jacobi")
    assert result.converged and not result.x.any() and result.iterations == 0
    assert np.array_equal(x0, np.ones(n))


def test_bad_inputs():
    A = CASES["poisson1d"]()
    b = np.ones(A.shape[0])
    b[5] = np.nan
    with pytest.raises(InputError, match=r"b\[5\] is nan"):
        solve(A, b, preconditioner="jacobi")
    with pytest.raises(InputError, match="square"):
        solve(sp.csr_array(np.ones((2, 3))), np.ones(2))
    with pytest.raises(TypeError):
        solve(A, np.ones(A.shape[0]), "jacobi")  # keyword-only


def test_monitor_sees_every_iteration_and_its_residual():
    A = poisson((30, 30), format="csr")
    seen = []
    result = solve(A, np.ones(900), preconditioner="jacobi", rtol=1e-8,
                   monitor=lambda k, r: seen.append((k, r)))
    assert [k for k, _ in seen] == list(range(1, result.iterations + 1))
    assert np.array([r for _, r in seen]) == pytest.approx(result.residuals[1:])


@pytest.mark.parametrize("preconditioner", NAMES)
@pytest.mark.parametrize("scale", (1e-250, 1e250))
def test_right_hand_side_far_from_one(scale, preconditioner):
    # b.b over- or underflows: solved scaled by a power of two, reported unscaled
    A = CASES["poisson2d"]()
    b = np.random.default_rng(4).standard_normal(A.shape[0])
    result = solve(A, b * scale, preconditioner=preconditioner, rtol=1e-10, start="zero")
    assert result.converged
    # reference library: scipy (sparse direct solve of the unscaled system)
    ref = sla.spsolve(A.tocsc(), b)
    assert np.linalg.norm(result.x / scale - ref) <= 1e-8 * np.linalg.norm(ref)
    assert result.residuals[0] == pytest.approx(np.linalg.norm(b) * scale, rel=1e-14, abs=0)
    assert result.stats.tolerance == pytest.approx(1e-10 * np.linalg.norm(b) * scale,
                                                   rel=1e-14, abs=0)
