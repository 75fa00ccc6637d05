"""Preconditioners: registry, symmetry and positivity, IC(0) exactness, errors."""

import warnings

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from hypothesis import given
from hypothesis import strategies as st
from linear_cases import random_spd
from pyamg.gallery import poisson

import hatkernels
from hatkernels.errors import InputError
from hatkernels.krylov import cg_with_history
from hatkernels.precond import (
    AMG_DEFAULT,
    DIRECT_LIMIT,
    PRECONDITIONERS,
    IncompleteCholesky,
    Preconditioner,
    make_preconditioner,
    register_preconditioner,
)
from hatkernels.precond.ichol import ic0_reference
from hatkernels.precond.registry import _Registry

BUILTIN = ("none", "jacobi", "ic0", "amg-sa", "amg-rs", "amg-native", "direct", "amg")

# Kershaw's SPD matrix on which IC(0) meets a negative pivot: D. S. Kershaw, "The
# incomplete Cholesky-conjugate gradient method for the iterative solution of systems
# of linear equations", J. Comput. Phys. 26 (1978) 43-65 (matrix value from memory;
# the test checks it is SPD and that the unshifted factorisation fails).
KERSHAW = np.array([[3.0, -2.0, 0.0, 2.0],
                    [-2.0, 3.0, -2.0, 0.0],
                    [0.0, -2.0, 3.0, -2.0],
                    [2.0, 0.0, -2.0, 3.0]])


def spd_case():
    return random_spd(60, seed=3, density=0.1)


CASES = {
    "poisson1d": lambda: poisson((30,), format="csr"),
    "poisson2d": lambda: poisson((11, 9), format="csr"),
    "random-spd": spd_case,
}

VARIANTS = {
    "none": ("none", {}),
    "jacobi": ("jacobi", {}),
    "ic0": ("ic0", {}),
    "ic0-modified": ("ic0", {"modified": True}),
    "amg-sa": ("amg-sa", {}),
    "amg-sa-chebyshev": ("amg-sa", {"smoother": "chebyshev"}),
    "amg-rs": ("amg-rs", {}),
    "amg-rs-W": ("amg-rs", {"cycle": "W"}),
    "amg-rs-chebyshev": ("amg-rs", {"smoother": "chebyshev", "degree": 3}),
    "amg-native": ("amg-native", {}),
    "amg-native-deep": ("amg-native", {"max_coarse": 4}),
    "amg-native-W": ("amg-native", {"max_coarse": 4, "cycle": "W", "degree": 3}),
    "direct": ("direct", {}),
    "amg": ("amg", {}),
}


def test_registry_lists_the_builtins_in_order():
    assert tuple(PRECONDITIONERS)[: len(BUILTIN)] == BUILTIN


def test_registry_behaves_like_a_live_tuple():
    reg = _Registry()
    assert reg == () and len(reg) == 0 and repr(reg) == "()"
    reg._factories["a"] = object
    reg._factories["b"] = object
    assert reg == ("a", "b") and reg != ("b", "a") and reg != ["a", "b"]
    assert list(reg) == ["a", "b"] and reg[0] == "a" and reg[-1] == "b" and reg[:1] == ("a",)
    assert "a" in reg and "c" not in reg
    assert repr(reg) == "('a', 'b')"
    assert reg.index("b") == 1 and reg.count("a") == 1
    with pytest.raises(TypeError):
        hash(reg)


@pytest.fixture
def user_name():
    name = "test-scaled-identity"
    yield name
    PRECONDITIONERS._factories.pop(name, None)


def test_register_user_preconditioner(user_name):
    def factory(A, context, *, scale=1.0):
        n = A.shape[0]
        return sla.LinearOperator((n, n), matvec=lambda r: scale * r, dtype=np.float64)

    assert user_name not in PRECONDITIONERS
    assert register_preconditioner(user_name, factory) is factory
    assert user_name in PRECONDITIONERS and PRECONDITIONERS[-1] == user_name
    A = CASES["poisson2d"]()
    M = make_preconditioner(A, user_name, scale=0.5)
    assert isinstance(M, Preconditioner) and M.dtype == np.float64
    assert np.array_equal(M @ np.ones(A.shape[0]), np.full(A.shape[0], 0.5))
    assert user_name in repr(M) and "setup" in repr(M)
    with pytest.raises(InputError, match="unknown option 'shift'.*scale"):
        make_preconditioner(A, user_name, shift=1)
    with pytest.raises(InputError, match="already registered"):
        register_preconditioner(user_name, factory)
    register_preconditioner(user_name,
                            lambda A, context: sla.aslinearoperator(sp.eye_array(A.shape[0])),
                            overwrite=True)
    res = cg_with_history(A, np.ones(A.shape[0]), M=make_preconditioner(A, user_name))
    assert res.info == 0
    register_preconditioner(user_name, lambda A, context: np.eye(3), overwrite=True)
    with pytest.raises(InputError, match="returned ndarray"):
        make_preconditioner(A, user_name)
    with pytest.raises(InputError, match=r"must take \(A, context, \*\*options\)"):
        register_preconditioner(user_name, lambda A: A, overwrite=True)


def test_user_factory_sees_the_context(user_name):
    # the context carries the mesh and the held points, so a factory can use the
    # geometry without the driver knowing the preconditioner by name
    seen = {}

    def factory(A, context):
        seen["mesh"], seen["fixed"] = context.mesh, context.fixed
        return sla.aslinearoperator(sp.eye_array(A.shape[0]))

    register_preconditioner(user_name, factory)
    mesh = hatkernels.mesh.rectangle(6, 6)
    sol = hatkernels.solve_poisson(mesh, 1.0, preconditioner=user_name)
    assert sol.converged and seen["mesh"] is mesh
    assert np.array_equal(seen["fixed"], mesh.boundary_points())
    assert not hatkernels.precond.capabilities(user_name).prefers_matrix_free


def test_register_rejects_bad_arguments():
    with pytest.raises(InputError, match="non-empty string"):
        register_preconditioner("", lambda A, context: A)
    with pytest.raises(InputError, match="callable"):
        register_preconditioner("x-not-callable", 3)
    assert "x-not-callable" not in PRECONDITIONERS


def test_unknown_name_and_option():
    A = CASES["poisson1d"]()
    with pytest.raises(InputError) as err:
        make_preconditioner(A, "ilu")
    assert "'ilu'" in str(err.value)
    for name in BUILTIN:
        assert repr(name) in str(err.value)
    with pytest.raises(InputError, match="unknown option 'fill' for preconditioner 'ic0'.*modified"):
        make_preconditioner(A, "ic0", fill=1)
    with pytest.raises(InputError, match="unknown option 'omega' for preconditioner 'jacobi'"):
        make_preconditioner(A, "jacobi", omega=0.5)


@pytest.mark.parametrize("variant", VARIANTS)
@pytest.mark.parametrize("case", CASES)
def test_symmetric_positive_definite(case, variant):
    A = CASES[case]()
    name, options = VARIANTS[variant]
    M = make_preconditioner(A, name, **options)
    assert M.shape == A.shape and M.dtype == np.float64
    rng = np.random.default_rng(11)
    for _ in range(3):
        x, y = rng.standard_normal(A.shape[0]), rng.standard_normal(A.shape[0])
        x_keep = x.copy()
        Mx, My = M @ x, M @ y
        assert np.array_equal(x, x_keep)  # the input is not modified
        # symmetry to round-off (common practice, no source)
        scale = np.linalg.norm(x) * np.linalg.norm(My) + np.linalg.norm(y) * np.linalg.norm(Mx)
        assert abs(x @ My - y @ Mx) <= 1e-11 * scale
        assert x @ Mx > 0


@pytest.mark.parametrize("variant", VARIANTS)
@pytest.mark.parametrize("case", CASES)
def test_pcg_matches_spsolve(case, variant):
    A = CASES[case]()
    name, options = VARIANTS[variant]
    b = np.random.default_rng(2).standard_normal(A.shape[0])
    res = cg_with_history(A, b, rtol=1e-12, M=make_preconditioner(A, name, **options))
    assert res.info == 0
    ref = sla.spsolve(A.tocsc(), b)  # reference library: scipy
    assert np.linalg.norm(res.x - ref) <= 1e-8 * np.linalg.norm(ref)


@pytest.mark.parametrize("modified", [False, True], ids=["ic0", "ic0-modified"])
def test_ic0_on_tridiagonal_is_exact_cholesky(modified):
    # Zero fill loses nothing on a tridiagonal matrix, so IC(0) is the Cholesky factor
    # (common practice, no source); reference library: numpy.linalg.cholesky.
    rng = np.random.default_rng(5)
    n = 25
    off = rng.uniform(-1.0, -0.2, n - 1)
    A = sp.diags_array([off, 2.5 + rng.uniform(0, 1, n), off], offsets=[-1, 0, 1]).tocsr()
    M = IncompleteCholesky(A, modified=modified)
    L = np.linalg.cholesky(A.toarray())
    assert np.allclose(M.L.toarray(), L, rtol=1e-13, atol=1e-14)
    b = rng.standard_normal(n)
    assert np.allclose(M @ b, np.linalg.solve(A.toarray(), b), rtol=1e-11, atol=1e-12)


@pytest.mark.parametrize("modified", [False, True], ids=["ic0", "ic0-modified"])
@pytest.mark.parametrize("case", CASES)
def test_ic0_kernel_equals_plain_reference(case, modified):
    A = CASES[case]()
    M = IncompleteCholesky(A, modified=modified)
    ref = ic0_reference(A, modified=modified)
    assert np.allclose(M.L.toarray(), ref, rtol=1e-12, atol=1e-13)
    lower = sp.tril(A)
    assert M.nnz == lower.nnz  # zero fill: the pattern of tril(A)


@given(st.integers(3, 12), st.integers(3, 12), st.integers(0, 2**32 - 1))
def test_ic0_properties(nx, ny, seed):
    A = poisson((nx, ny), format="csr")
    M = IncompleteCholesky(A)
    L = M.L.toarray()
    LLt = L @ L.T
    mask = A.toarray() != 0
    # IC(0) reproduces A on its pattern (definition of zero fill; common practice, no source)
    assert np.allclose(LLt[mask], A.toarray()[mask], atol=1e-12)
    Mm = IncompleteCholesky(A, modified=True)
    Lm = Mm.L.toarray()
    # modified IC(0) keeps the row sums: L L^T e = A e (common practice, no source)
    e = np.ones(A.shape[0])
    assert np.allclose(Lm @ (Lm.T @ e), A @ e, atol=1e-11)
    r = np.random.default_rng(seed).standard_normal(A.shape[0])
    assert np.allclose(LLt @ (M @ r), r, atol=1e-10 * np.linalg.norm(r))


def test_ic0_breakdown_shifts_with_warning():
    assert np.linalg.eigvalsh(KERSHAW).min() > 0  # SPD
    with pytest.raises(InputError, match="pivot of row 3"):
        ic0_reference(KERSHAW)
    A = sp.csr_array(KERSHAW)
    with pytest.warns(RuntimeWarning, match=r"pivot of row 3 .* A \+ [0-9.e-]+ \* diag\(A\)"):
        M = make_preconditioner(A, "ic0")
    assert M.shift > 0 and "diagonal shift" in repr(M)
    b = np.arange(1.0, 5.0)
    res = cg_with_history(A, b, rtol=1e-12, M=M)
    assert res.info == 0
    assert np.allclose(res.x, np.linalg.solve(KERSHAW, b))  # reference library: numpy
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        IncompleteCholesky(A, shift=M.shift)  # a sufficient initial shift: no warning


def test_jacobi_and_ic0_name_the_bad_row():
    A = poisson((5, 5), format="lil")
    A[7, 7] = -1.0
    for name in ("jacobi", "ic0"):
        with pytest.raises(InputError, match="diagonal entry of row 7 is -1.0"):
            make_preconditioner(A.tocsr(), name)
    B = sp.csr_array(np.array([[2.0, 1.0, 0.0], [1.0, 0.0, 1.0], [0.0, 1.0, 2.0]]))
    B.eliminate_zeros()
    for name in ("jacobi", "ic0"):
        with pytest.raises(InputError, match="row 1 has no diagonal entry"):
            make_preconditioner(B, name)


def test_direct_size_limit():
    A = CASES["poisson2d"]()
    n = A.shape[0]
    big = sp.eye_array(DIRECT_LIMIT + 1, format="csr")
    with pytest.raises(InputError, match=rf"above the limit of {DIRECT_LIMIT}.*Use 'amg'"):
        make_preconditioner(big, "direct")
    with pytest.raises(InputError, match=rf"n = {n} unknowns, above the limit of 50.*"
                                         rf"max_unknowns={n}"):
        make_preconditioner(A, "direct", max_unknowns=50)
    M = make_preconditioner(A, "direct", max_unknowns=n)
    assert "nnz(L+U)" in repr(M)
    singular = sp.csr_array(np.array([[1.0, 1.0], [1.0, 1.0]]))
    with pytest.raises(InputError, match="direct: factorisation failed"):
        make_preconditioner(singular, "direct", permc_spec="COLAMD")


def test_amg_options_pass_through_and_are_checked():
    A = poisson((20, 20), format="csr")
    M = make_preconditioner(A, "amg-sa", max_levels=2)
    assert "2 levels" in repr(M)
    with pytest.raises(InputError, match="cycle must be one of"):
        make_preconditioner(A, "amg-rs", cycle="F")
    with pytest.raises(InputError, match="smoother must be one of"):
        make_preconditioner(A, "amg-rs", smoother="sor")
    with pytest.raises(InputError, match="unknown option 'presmoother'"):
        make_preconditioner(A, "amg-sa", presmoother="jacobi")
    with pytest.raises(InputError, match="degree"):
        make_preconditioner(A, "amg-sa", smoother="chebyshev", degree=0)


def test_repr_says_what_and_what_it_costs():
    A = poisson((16, 16), format="csr")
    reprs = {name: repr(make_preconditioner(A, name)) for name in BUILTIN}
    for name, text in reprs.items():
        assert text.startswith(f"<Preconditioner {name}")
        assert "memory" in text and "bytes" in text and "setup" in text
    for name in ("amg-sa", "amg-rs", "amg-native", "amg"):
        assert "levels" in reprs[name] and "operator complexity" in reprs[name]
    assert "nnz(L)=" in reprs["ic0"] and "fill" in reprs["ic0"]
    assert f"(= {AMG_DEFAULT})" in reprs["amg"]
    assert "identity" in reprs["none"] and "Jacobi" in reprs["jacobi"]
    jac = make_preconditioner(A, "jacobi")
    assert jac.memory_bytes == 8 * A.shape[0]


def test_matrix_free_operator_only_for_none():
    A = poisson((6, 6), format="csr")
    op = sla.aslinearoperator(A)
    M = make_preconditioner(op, "none")
    assert np.array_equal(M @ np.ones(36), np.ones(36))
    with pytest.raises(InputError, match="'ic0' needs an assembled sparse matrix"):
        make_preconditioner(op, "ic0")
    with pytest.raises(InputError, match="sparse matrix or a LinearOperator"):
        make_preconditioner([[1.0]], "jacobi")


def test_float32_matrix_is_converted():
    A = poisson((8, 8), format="csr").astype(np.float32)
    for name in BUILTIN:
        M = make_preconditioner(A, name)
        assert (M @ np.ones(64)).dtype == np.float64
    assert A.dtype == np.float32


def test_chebyshev_bound_from_a_csr_matrix():
    # scipy.sparse.csr_matrix row sums are (n, 1) matrices; on the finest level
    # the Gershgorin bound of D^-1 A for the 5-point Laplacian is (4 + 4) / 4 = 2
    # (Gershgorin's circle theorem), which caps the Chebyshev interval
    A = sp.csr_matrix(poisson((40, 40), format="csr"))
    M = make_preconditioner(A, "amg-sa", smoother="chebyshev")
    finest = M._cheb[0].smoother
    assert finest.theta + finest.delta <= 2.0 + 1e-12
