"""Conjugate gradients: scipy's calling convention, stopping rule, breakdown, determinism."""

import inspect

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from conftest import two_threads
from linear_cases import random_spd
from pyamg.gallery import poisson

from hatkernels import krylov
from hatkernels._jit import threads
from hatkernels.errors import InputError
from hatkernels.krylov import BREAKDOWN_MATRIX, BREAKDOWN_PRECONDITIONER, cg, cg_with_history
from hatkernels.precond import make_preconditioner


def spd_case():
    return random_spd(80, seed=3, density=0.08)


def rhs(n, seed=0):
    return np.random.default_rng(seed).standard_normal(n)


CASES = {
    "poisson1d": lambda: poisson((40,), format="csr"),
    "poisson2d": lambda: poisson((12, 12), format="csr"),
    "random-spd": spd_case,
    "float32": lambda: poisson((10, 10), format="csr").astype(np.float32),
}


def _operator(A):
    return sla.aslinearoperator(A.astype(np.float64))


SOLVERS = {
    # name: (how A is passed, how M is built)
    "cg": (lambda A: A, lambda A: None),
    "cg-operator": (_operator, lambda A: None),
    "cg-jacobi": (lambda A: A, lambda A: make_preconditioner(A, "jacobi")),
    "cg-ic0": (lambda A: A, lambda A: make_preconditioner(A, "ic0")),
    "cg-dense-M": (lambda A: A, lambda A: np.diag(1.0 / A.diagonal().astype(np.float64))),
}


@pytest.mark.parametrize("solver", SOLVERS)
@pytest.mark.parametrize("case", CASES)
def test_solution_matches_spsolve(case, solver):
    A = CASES[case]()
    wrap_A, build_M = SOLVERS[solver]
    b = rhs(A.shape[0])
    x, info = cg(wrap_A(A), b, rtol=1e-12, M=build_M(A))
    assert info == 0
    A64 = A.astype(np.float64)
    # reference library: scipy (sparse direct solve)
    ref = sla.spsolve(A64.tocsc(), b)
    assert np.linalg.norm(x - ref) <= 1e-8 * np.linalg.norm(ref)
    assert np.linalg.norm(b - A64 @ x) <= 1e-12 * np.linalg.norm(b)


@pytest.mark.parametrize("case", ["poisson1d", "poisson2d", "random-spd"])
def test_iterates_follow_scipy_cg(case):
    A = CASES[case]()
    b = rhs(A.shape[0], 1)
    for k in (1, 3, 7):
        ours, _ = cg(A, b, rtol=0.0, maxiter=k)
        # reference library: scipy.sparse.linalg.cg (same recurrence, same iterate x_k)
        theirs, _ = sla.cg(A, b, rtol=0.0, atol=0.0, maxiter=k)
        assert np.allclose(ours, theirs, rtol=0, atol=1e-10 * np.linalg.norm(theirs))


def test_signature_matches_scipy():
    # reference library: scipy (the calling convention is copied, keyword-only after x0)
    ours = inspect.signature(cg)
    theirs = inspect.signature(sla.cg)
    assert list(ours.parameters) == list(theirs.parameters)
    for name, p in ours.parameters.items():
        assert p.kind == theirs.parameters[name].kind, name
        assert p.default == theirs.parameters[name].default, name


def test_keyword_only_and_no_tol():
    A = CASES["poisson1d"]()
    b = rhs(A.shape[0])
    with pytest.raises(TypeError):
        cg(A, b, None, 1e-5)  # rtol positionally
    with pytest.raises(TypeError):
        cg(A, b, tol=1e-5)


def test_maxiter_one_gives_one_callback_and_info_one():
    A = CASES["poisson2d"]()
    calls = []
    x, info = cg(A, rhs(A.shape[0]), maxiter=1, callback=lambda xk: calls.append(xk.copy()))
    assert info == 1
    assert len(calls) == 1
    assert np.array_equal(calls[0], x)


def test_callback_once_per_iteration_and_history_length():
    A = CASES["poisson2d"]()
    calls = []
    res = cg_with_history(A, rhs(A.shape[0]), rtol=1e-10, callback=lambda xk: calls.append(1))
    assert res.info == 0
    assert len(calls) == res.iterations
    assert res.residuals.shape == (res.iterations + 1,)
    assert res.residuals[0] == pytest.approx(np.linalg.norm(rhs(A.shape[0])))
    assert res.residuals[-1] <= res.tolerance


def test_x0_not_modified_and_used():
    A = CASES["poisson2d"]()
    b = rhs(A.shape[0])
    x0 = np.full(A.shape[0], 0.5)
    keep = x0.copy()
    x, info = cg(A, b, x0, rtol=1e-10)
    assert info == 0 and np.array_equal(x0, keep) and x is not x0
    near = sla.spsolve(A.tocsc(), b) + 1e-9
    res = cg_with_history(A, b, near, rtol=1e-6)
    assert res.iterations <= 1


def test_zero_rhs_returns_zeros():
    A = CASES["poisson2d"]()
    x, info = cg(A, np.zeros(A.shape[0]), x0=np.ones(A.shape[0]))
    # reference library: scipy (cg returns the zero vector, info 0, for b = 0)
    assert info == 0 and not x.any()


def test_tolerance_is_max_of_rtol_and_atol_on_true_residual():
    A = CASES["poisson2d"]()
    b = rhs(A.shape[0])
    bnorm = np.linalg.norm(b)
    for rtol, atol in ((1e-6, 0.0), (1e-12, 1e-3 * bnorm), (0.0, 1e-4)):
        res = cg_with_history(A, b, rtol=rtol, atol=atol)
        assert res.info == 0
        assert res.tolerance == max(rtol * bnorm, atol)
        assert np.linalg.norm(b - A @ res.x) <= max(rtol * bnorm, atol)


def test_exact_inverse_converges_in_at_most_three_iterations():
    A = spd_case()
    Minv = sla.aslinearoperator(np.linalg.inv(A.toarray()))
    res = cg_with_history(A, rhs(A.shape[0]), rtol=1e-10, M=Minv)
    assert res.info == 0 and res.iterations <= 3


def test_indefinite_matrix_reports_breakdown():
    n = 30
    d = np.linspace(-1.0, 2.0, n)  # indefinite diagonal matrix
    A = sp.diags_array(d).tocsr()
    b = np.ones(n)
    with pytest.warns(RuntimeWarning, match=r"iteration \d+.*A is not positive definite"):
        x, info = cg(A, b)
    assert info == BREAKDOWN_MATRIX < 0
    assert np.isfinite(x).all()


def test_a_product_that_overflows_is_named_as_such():
    # a positive definite matrix whose entries are near float64's largest number: p.Ap
    # overflows, and the message says so rather than calling A indefinite
    A = CASES["poisson2d"]() * 4.4e307  # 2-D Poisson, diagonal 4 x 4.4e307 = 1.76e308
    with pytest.warns(RuntimeWarning, match=r"p.Ap = (inf|nan) is not finite: the product overflows float64.*rescale"):
        x, info = cg(A, rhs(A.shape[0]))
    assert info == BREAKDOWN_MATRIX < 0


def test_non_spd_preconditioner_reports_breakdown():
    A = CASES["poisson2d"]()
    M = -sp.eye_array(A.shape[0]).tocsr()
    with pytest.warns(RuntimeWarning, match="preconditioner M is not positive definite"):
        x, info = cg(A, rhs(A.shape[0]), M=M)
    assert info == BREAKDOWN_PRECONDITIONER < 0
    # indefinite diagonal preconditioner: breaks down once r.z turns non-positive
    d = np.where(np.arange(A.shape[0]) % 2 == 0, 1.0, -0.3)
    with pytest.warns(RuntimeWarning, match=r"after iteration \d+: r\.z"):
        res = cg_with_history(A, rhs(A.shape[0]), M=sp.diags_array(d).tocsr())
    assert res.info == BREAKDOWN_PRECONDITIONER


def test_true_residual_check_prevents_false_convergence():
    # cond(A) = 1e6 and rtol = 1e-12: the recursive residual falls below the tolerance
    # while the attainable true residual (~ eps cond) does not (common practice, no source).
    rng = np.random.default_rng(0)
    n = 60
    Q, _ = np.linalg.qr(rng.standard_normal((n, n)))
    A = (Q * np.logspace(-3, 3, n)) @ Q.T
    A = sp.csr_array((A + A.T) / 2)
    b = rng.standard_normal(n)
    res = cg_with_history(A, b, rtol=1e-12, maxiter=2000)
    true = np.linalg.norm(b - A @ res.x)
    assert res.restarts >= 1
    assert (res.info == 0) == (true <= res.tolerance)
    assert res.info != 0 and "true residual did not" in res.message
    # the same matrix with a reachable tolerance converges, verified on the true residual
    ok = cg_with_history(A, b, rtol=1e-8, maxiter=2000)
    assert ok.info == 0 and np.linalg.norm(b - A @ ok.x) <= ok.tolerance


def test_other_sparse_formats_converted_without_modifying_input():
    A = CASES["poisson2d"]().tocoo()
    data = A.data.copy()
    b = rhs(A.shape[0])
    x, info = cg(A, b, rtol=1e-10)
    assert info == 0 and A.format == "coo" and np.array_equal(A.data, data)


@two_threads
@pytest.mark.parametrize("precond", ["none", "jacobi", "ic0"])
def test_whole_solve_identical_bits_on_one_and_two_threads(precond):
    A = poisson((90, 90), format="csr")  # 8100 unknowns: several chunks per thread
    b = rhs(A.shape[0], 4)
    M = make_preconditioner(A, precond)
    runs = []
    for nt in (1, 2):
        with threads(nt):
            runs.append(cg_with_history(A, b, rtol=1e-8, M=M))
    assert runs[0].iterations == runs[1].iterations
    assert np.array_equal(runs[0].x, runs[1].x)
    assert np.array_equal(runs[0].residuals, runs[1].residuals)


def test_bad_inputs_raise_clear_errors():
    A = CASES["poisson1d"]()
    n = A.shape[0]
    b = rhs(n)
    bad = b.copy()
    bad[7] = np.nan
    with pytest.raises(InputError, match=r"b\[7\] is nan"):
        cg(A, bad)
    x0 = np.zeros(n)
    x0[3] = np.inf
    with pytest.raises(InputError, match=r"x0\[3\] is inf"):
        cg(A, b, x0)
    with pytest.raises(InputError, match="shape"):
        cg(A, b[:-1])
    with pytest.raises(InputError, match="square"):
        cg(sp.csr_array(np.ones((3, 4))), np.ones(3))
    with pytest.raises(InputError, match="M has shape"):
        cg(A, b, M=sp.eye_array(n + 1))
    with pytest.raises(InputError, match="rtol"):
        cg(A, b, rtol=-1.0)
    with pytest.raises(InputError, match="atol"):
        cg(A, b, atol=float("nan"))
    with pytest.raises(InputError, match="maxiter"):
        cg(A, b, maxiter=0)
    with pytest.raises(InputError, match="callback"):
        cg(A, b, callback=3)
    with pytest.raises(InputError, match="complex"):
        cg(A.astype(complex), b)
    nan_A = A.copy()
    nan_A.data[4] = np.inf
    with pytest.raises(InputError, match="non-finite entry inf at row"):
        cg(nan_A, b)


def test_module_exports():
    assert set(krylov.__all__) == {"cg", "cg_with_history", "CGResult", "BREAKDOWN_MATRIX",
                                   "BREAKDOWN_PRECONDITIONER"}


def test_identity_preconditioner_is_plain_cg():
    A = CASES["poisson2d"]()
    b = rhs(A.shape[0])
    plain = cg_with_history(A, b, rtol=1e-10)
    ident = cg_with_history(A, b, rtol=1e-10, M=make_preconditioner(A, "none"))
    assert np.array_equal(plain.x, ident.x) and plain.iterations == ident.iterations


class _CountingApply:
    """An object of the preconditioner protocol only (no LinearOperator, no shape):
    ``apply_into`` is ``M = diag(A)^-1``, and the applications are counted."""

    def __init__(self, A, diagonal=False):
        self.d = 1.0 / A.diagonal().astype(np.float64)
        self.calls = 0
        if diagonal:
            self.inverse_diagonal = self.d
        self.description = "test diagonal"
        self.nbytes = self.d.nbytes

    def apply_into(self, r, z):
        self.calls += 1
        np.multiply(self.d, r, out=z)


@pytest.mark.parametrize("case", ["poisson2d", "random-spd"])
def test_protocol_object_is_a_preconditioner_applied_once_per_iteration(case):
    A = CASES[case]()
    b = rhs(A.shape[0], 5)
    M = _CountingApply(A)
    res = cg_with_history(A, b, rtol=1e-12, M=M)
    assert res.info == 0
    # reference library: scipy (sparse direct solve)
    ref = sla.spsolve(A.tocsc(), b)
    assert np.linalg.norm(res.x - ref) <= 1e-8 * np.linalg.norm(ref)
    # one application before the loop and one after each iteration but the last
    assert M.calls == res.iterations
    # with inverse_diagonal the step is fused into the vector update: no call at all
    fused = _CountingApply(A, diagonal=True)
    res2 = cg_with_history(A, b, rtol=1e-12, M=fused)
    assert fused.calls == 0 and res2.info == 0
    assert np.linalg.norm(res2.x - ref) <= 1e-8 * np.linalg.norm(ref)


def test_distributed_block_preconditioner_serves_the_serial_cg():
    # one protocol: a rank's block Jacobi over the whole matrix is the serial preconditioner
    from hatkernels.distributed.precond import BlockJacobi

    A = CASES["poisson2d"]()
    b = rhs(A.shape[0], 6)
    for name in ("ic0", "jacobi", "none"):
        block = BlockJacobi(A, name)
        assert block.nbytes >= 0 and name in block.describe()
        res = cg_with_history(A, b, rtol=1e-10, M=block)
        # reference library: scipy (sparse direct solve)
        ref = sla.spsolve(A.tocsc(), b)
        assert res.info == 0 and np.linalg.norm(res.x - ref) <= 1e-8 * np.linalg.norm(ref)


@pytest.mark.parametrize("precond", [None, "jacobi", "ic0"])
def test_condition_estimate_approaches_the_preconditioned_condition_number(precond):
    # The Lanczos tridiagonal from CG's alpha and beta has Ritz values inside the spectrum
    # of M A that reach its ends as CG converges (G. H. Golub and C. F. Van Loan, Matrix
    # Computations, 3rd ed. 1996, section 10.2.6); reference: numpy's dense eigenvalues.
    A = CASES["poisson2d"]()
    M = None if precond is None else make_preconditioner(A, precond)
    res = cg_with_history(A, rhs(A.shape[0]), rtol=1e-10, M=M)
    assert res.info == 0 and res.restarts == 0
    Mdense = np.eye(A.shape[0]) if M is None else np.column_stack(
        [M.matvec(e) for e in np.eye(A.shape[0])])
    ev = np.sort(np.linalg.eigvals(Mdense @ A.toarray()).real)
    exact = ev[-1] / ev[0]
    assert exact * 0.99 <= res.condition_estimate <= exact * (1 + 1e-8)


def test_condition_estimate_of_known_spectrum_and_after_restart():
    # diag(1..100): condition number 100 (common practice, no source)
    d = np.linspace(1.0, 100.0, 50)
    res = cg_with_history(sp.diags_array(d).tocsr(), np.ones(50), rtol=1e-12)
    assert res.info == 0 and abs(res.condition_estimate - 100.0) < 1e-6
    assert np.isnan(cg_with_history(CASES["poisson2d"](), np.zeros(144)).condition_estimate)
    # after a restart the recurrence is broken: no estimate (the case of the restart test)
    rng = np.random.default_rng(0)
    Q, _ = np.linalg.qr(rng.standard_normal((60, 60)))
    H = sp.csr_array(((Q * np.logspace(-3, 3, 60)) @ Q.T + ((Q * np.logspace(-3, 3, 60)) @ Q.T).T)
                     / 2)
    res = cg_with_history(H, rng.standard_normal(60), rtol=1e-12, maxiter=2000)
    assert res.restarts >= 1 and np.isnan(res.condition_estimate)


def test_scalar_options_are_checked_with_clear_messages():
    A = CASES["poisson1d"]()
    b = rhs(A.shape[0])
    with pytest.raises(InputError, match="maxiter must be an integer or None, got True"):
        cg(A, b, maxiter=True)
    with pytest.raises(InputError, match="maxiter must be an integer or None, got 2.5"):
        cg(A, b, maxiter=2.5)
    with pytest.raises(InputError, match=r"maxiter must be >= 1 \(info > 0 reports"):
        cg(A, b, maxiter=-3)
    with pytest.raises(InputError, match="rtol must be a real number, got '1e-5'"):
        cg(A, b, rtol="1e-5")
    with pytest.raises(InputError, match="atol must be a number, got nan"):
        cg(A, b, atol=float("nan"))
    with pytest.raises(InputError, match="atol must be >= 0"):
        cg(A, b, atol=-1.0)
    with pytest.raises(InputError, match="rtol must be >= 0"):
        cg(A, b, rtol=-1e-3)
    # numpy scalars are numbers too
    x, info = cg(A, b, rtol=np.float32(1e-6), maxiter=np.int64(500))
    assert info == 0


def test_bad_preconditioner_object_is_refused_by_name():
    A = CASES["poisson1d"]()
    with pytest.raises(InputError, match="M must be None, a matrix, a LinearOperator or a "
                                         "preconditioner with apply_into"):
        cg(A, rhs(A.shape[0]), M=object())


def test_inverse_diagonal_of_the_wrong_length_is_not_used():
    A = CASES["poisson2d"]()
    b = rhs(A.shape[0], 7)
    M = _CountingApply(A)
    M.inverse_diagonal = np.ones(A.shape[0] - 1)  # ignored: apply_into is used instead
    res = cg_with_history(A, b, rtol=1e-10, M=M)
    # reference library: scipy (sparse direct solve)
    ref = sla.spsolve(A.tocsc(), b)
    assert res.info == 0 and M.calls == res.iterations
    assert np.linalg.norm(res.x - ref) <= 1e-8 * np.linalg.norm(ref)


def _scipy_cases(A):
    D = sp.diags_array(1.0 / A.diagonal()).tocsr()
    n = A.shape[0]
    return {
        "atol-inf": dict(atol=np.inf),
        "atol-inf-x0": dict(atol=np.inf, x0=np.ones(n)),
        "rtol-inf": dict(rtol=np.inf),
        "x0-Mb": dict(x0="Mb"),
        "x0-Mb-jacobi": dict(x0="Mb", M=D),
        "x0-Mb-atol-inf": dict(x0="Mb", M=D, atol=np.inf),
        "rtol0-atol": dict(rtol=0.0, atol=1e-6),
        "rtol0-atol0-maxiter5": dict(rtol=0.0, atol=0.0, maxiter=5),
        "maxiter1": dict(maxiter=1),
        "jacobi-maxiter3": dict(M=D, maxiter=3),
        "defaults": dict(),
        "x0-column": dict(x0=np.full((n, 1), 0.25), rtol=1e-8),
        "maxiter-numpy-int": dict(maxiter=np.int64(4)),
    }


@pytest.mark.parametrize("case", ["poisson2d", "random-spd"])
def test_takes_what_scipy_takes_and_gives_the_same_info(case):
    # reference library: scipy.sparse.linalg.cg, run side by side on the same arguments
    A = CASES[case]()
    b = rhs(A.shape[0], 9)
    for name, kwargs in _scipy_cases(A).items():
        seen_theirs, seen_ours = [], []
        theirs, info_theirs = sla.cg(A, b, callback=seen_theirs.append, **kwargs)
        ours, info = cg(A, b, callback=seen_ours.append, **kwargs)
        assert info == info_theirs, name
        assert len(seen_ours) == len(seen_theirs), name
        assert ours.shape == theirs.shape, name
        # the same recurrence: the iterates agree to round-off
        assert np.linalg.norm(ours - theirs) <= 1e-10 * max(np.linalg.norm(theirs), 1.0), name


def test_x0_mb_is_m_times_b_and_b_without_m():
    # scipy: x0='Mb' means the initial guess M @ b (scipy/sparse/linalg/_isolve/utils.py,
    # make_system); with atol=inf no iteration runs, so x is that guess
    A = CASES["poisson2d"]()
    b = rhs(A.shape[0], 10)
    d = 1.0 / A.diagonal()
    x, info = cg(A, b, "Mb", atol=np.inf, M=sp.diags_array(d).tocsr())
    assert info == 0 and np.array_equal(x, d * b)
    x, info = cg(A, b, "Mb", atol=np.inf)
    assert info == 0 and np.array_equal(x, b)
    # a preconditioner of the protocol (no LinearOperator) serves the same way
    M = make_preconditioner(A, "ic0")
    x, info = cg(A, b, "Mb", atol=np.inf, M=M)
    assert info == 0 and np.array_equal(x, M.matvec(b))
    # and the guess is used: iterating from M b converges to scipy's direct solution
    x, info = cg(A, b, x0="Mb", rtol=1e-12, M=M)
    ref = sla.spsolve(A.tocsc(), b)  # reference library: scipy (sparse direct solve)
    assert info == 0 and np.linalg.norm(x - ref) <= 1e-8 * np.linalg.norm(ref)


def test_what_scipy_would_iterate_to_nan_is_refused():
    A = CASES["poisson1d"]()
    b = rhs(A.shape[0])
    with pytest.raises(InputError, match=r"x0 must be an array, None or the string 'Mb'"):
        cg(A, b, x0="mb")
    with pytest.raises(InputError, match="rtol must be a number, got nan"):
        cg(A, b, rtol=float("nan"))
    with pytest.raises(InputError, match="rtol must be >= 0"):
        cg(A, b, rtol=-1e-8)
    with pytest.raises(InputError, match=r"maxiter must be >= 1"):
        cg(A, b, maxiter=0)
    with pytest.raises(InputError, match="complex"):
        cg(A, b.astype(complex))


def test_a_workspace_gives_the_same_iterates_and_the_true_residual():
    """A march lends CG one workspace for all its steps: the same bits as fresh vectors,
    its own vectors returned, and (converged) the true residual ``b - A x`` against
    SciPy's product (reference library)."""
    from hatkernels import _cg

    A = poisson((30, 30), format="csr")
    product, n = krylov._operator(A)
    M = _cg.as_preconditioner(make_preconditioner(A, "jacobi"), n)
    work = _cg.Workspace()
    for seed in (0, 1):  # the second solve reuses the first one's vectors
        b, x0 = rhs(n, seed), rhs(n, seed + 10)
        fresh = _cg.run(product, b, x0, M, _cg.LOCAL, rtol=1e-9, atol=0.0, maxiter=500)
        lent = _cg.run(product, b, x0, M, _cg.LOCAL, rtol=1e-9, atol=0.0, maxiter=500,
                       work=work)
        assert lent.x.tobytes() == fresh.x.tobytes() and lent.iterations == fresh.iterations
        assert lent.x is work.get("x", n) and lent.residual is work.get("r", n)
        np.testing.assert_allclose(lent.residual, b - A @ lent.x, rtol=0, atol=1e-12)
    short = _cg.run(product, b, None, M, _cg.LOCAL, rtol=1e-12, atol=0.0, maxiter=2,
                    work=work)
    assert short.info > 0 and short.residual is None  # no true residual when not converged
