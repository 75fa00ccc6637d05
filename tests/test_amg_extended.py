"""amg-native's extended interpolation: the kernel against a plain transcription of the
published formula, its properties, and what it buys on unstructured meshes.

The formula is extended+i interpolation (H. De Sterck, R. D. Falgout, J. W. Nolting
and U. M. Yang, "Distance-two interpolation for parallel algebraic multigrid", Numer.
Linear Algebra Appl. 15, 2008), used on the rows that need it: an F point with a strong
F neighbour that has no strong coupling to any of the F point's strong C points also
interpolates from that neighbour's strong C points; every other row keeps the classical
interpolation (test_amg_native.py checks it against PyAMG's).
"""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from conftest import jittered_mesh
from hypothesis import given, settings
from hypothesis import strategies as st

import hatkernels
from hatkernels._jit import amg as _a
from hatkernels._jit.amg_split import C_POINT
from hatkernels.errors import InputError
from hatkernels.krylov import cg_with_history
from hatkernels.precond import make_preconditioner
from hatkernels.precond.classical import EXTENDED_CAP as CAP
from hatkernels.precond.classical import (
    ClassicalAMG,
    ClassicalHierarchy,
    _interpolation,
    _Room,
    _split,
)

THETA = 0.25


def reduced_stiffness(mesh):
    A = hatkernels.assemble_stiffness(mesh)
    return hatkernels.apply_dirichlet(A, np.ones(mesh.n_points), mesh.boundary_points()).A


def kernel_p(A, theta=THETA, extend=True):
    """(P, strong, state) from the kernels, as ClassicalHierarchy builds them."""
    n = A.shape[0]
    strong = np.empty(A.indptr[-1], dtype=np.uint8)
    _a.strength(A.indptr, A.indices, A.data, theta, strong, np.empty(A.shape[0]))
    state = _split(A.indptr, A.indices, strong, n)
    cidx = np.cumsum(state, dtype=A.indptr.dtype) - 1
    pptr, pind, pdata, _ = _interpolation((A.indptr, A.indices, A.data), strong, state, cidx,
                                          extend, _Room())
    P = sp.csr_array((pdata, pind, pptr), shape=(n, int(state.sum())))
    return P, strong, state


def plain_extended_p(A, strong, state):
    """The rows that need extending, written from the paper's formula with dictionaries
    (before the cap on their entries); None for the other rows (classical)."""
    n = A.shape[0]
    ip, ix, dx = A.indptr, A.indices, A.data
    row = [dict(zip(ix[ip[i]:ip[i + 1]].tolist(), dx[ip[i]:ip[i + 1]].tolist(), strict=True))
           for i in range(n)]
    strong_of = [set(ix[ip[i]:ip[i + 1]][strong[ip[i]:ip[i + 1]] == 1].tolist())
                 for i in range(n)]
    is_c = state == C_POINT
    cidx = np.cumsum(state) - 1
    rows = {}
    for i in np.flatnonzero(~is_c):
        # i's strong C points, then those of each strong F neighbour that shares none
        own = [j for j in row[i] if j in strong_of[i] and is_c[j]]
        strong_f = [k for k in strong_of[i] if not is_c[k]]
        extended = list(own)
        for k in (k for k in row[i] if k in strong_f):
            c_of_k = [j for j in row[k] if j in strong_of[k] and is_c[j]]
            if not set(c_of_k) & set(own):
                extended += [j for j in c_of_k if j not in extended]
        if extended == own:
            rows[i] = None
            continue
        neg = lambda v: v if v < 0 else 0.0  # noqa: E731  (a-: the negative entries)
        w = {j: row[i].get(j, 0.0) for j in extended}
        d = row[i][i]
        for j, a in row[i].items():
            if j != i and j not in extended and j not in strong_f:
                d += a  # couplings to points neither interpolated from nor strong F
        for k in strong_f:
            d_k = sum(neg(row[k].get(m, 0.0)) for m in extended) + neg(row[k].get(i, 0.0))
            if d_k == 0.0:
                d += row[i][k]
                continue
            for m in extended:
                w[m] += row[i][k] * neg(row[k].get(m, 0.0)) / d_k
            d += row[i][k] * neg(row[k].get(i, 0.0)) / d_k
        rows[i] = {int(cidx[j]): -w[j] / d for j in extended}  # before the cap
    return rows


def check_against_plain(A, theta=THETA):
    P, strong, state = kernel_p(A, theta)
    classical, _, _ = kernel_p(A, theta, extend=False)
    plain = plain_extended_p(A, strong, state)
    # no column twice in a row; rows sorted when A's are (a Galerkin level's need not be)
    assert all(np.unique(P.indices[P.indptr[i]:P.indptr[i + 1]]).size == P.indptr[i + 1] - P.indptr[i]
               for i in range(P.shape[0]))
    if A.has_sorted_indices:
        assert P.has_sorted_indices
    extended = capped = 0
    for i, want in plain.items():
        got = P[[i], :]
        if want is None:  # this row keeps the classical weights, to the bit
            assert np.array_equal(got.toarray(), classical[[i], :].toarray())
            continue
        extended += 1
        kept = got.indices.tolist()
        assert set(kept) <= set(want) and len(kept) == min(len(want), CAP)
        if len(want) > CAP:
            capped += 1
            # the largest in size (ties, as on the disk's symmetric rows, either way),
            # scaled so that the row keeps its sum
            dropped = max(abs(v) for j, v in want.items() if j not in kept)
            assert min(abs(want[j]) for j in kept) >= dropped * (1 - 1e-12)
            scale = sum(want.values()) / sum(want[j] for j in kept)
            want = {j: want[j] * scale for j in kept}
        for j, v in zip(got.indices, got.data, strict=True):
            assert abs(v - want[j]) <= 1e-13 * max(1.0, abs(want[j]))
    for i in np.flatnonzero(state == C_POINT):  # C points: one 1 in their own column
        got = P[[i], :]
        assert got.nnz == 1 and got.data[0] == 1.0
    return extended, capped


@pytest.mark.parametrize("mesh", [jittered_mesh(24, 3), hatkernels.mesh.disk(14)],
                         ids=["jittered", "disk"])
def test_kernel_matches_the_plain_formula(mesh):
    A = reduced_stiffness(mesh)
    extended, capped = check_against_plain(A)
    assert extended > 0 and capped > 0  # the meshes need extending, and the cap acts
    coarse = ClassicalHierarchy(A, max_coarse=20).levels[1].A  # and a Galerkin level
    check_against_plain(sp.csr_array(coarse))


@settings(max_examples=20, deadline=None)
@given(st.integers(4, 14), st.integers(0, 2**32 - 1), st.sampled_from([0.1, 0.25, 0.5]))
def test_kernel_matches_the_plain_formula_on_random_meshes(n, seed, theta):
    check_against_plain(reduced_stiffness(jittered_mesh(n, seed)), theta)


def test_constants_are_interpolated_exactly():
    # Where a row of A sums to zero (a point away from the held boundary), the
    # extended+i weights sum to one, so P reproduces constants there (De Sterck et al.
    # 2008, the derivation of the formula from the row's equation for a constant).
    A = reduced_stiffness(jittered_mesh(30, 5))
    P, _, state = kernel_p(A)
    zero_sum = np.abs(np.asarray(A.sum(axis=1)).ravel()) <= 1e-12 * A.diagonal()
    sums = np.asarray(P.sum(axis=1)).ravel()
    assert zero_sum[state == 0].sum() > 100
    assert np.allclose(sums[zero_sum], 1.0, rtol=0, atol=1e-12)


@pytest.mark.parametrize("mesh", [jittered_mesh(60, 11), hatkernels.mesh.disk(30)],
                         ids=["jittered", "disk"])
def test_fewer_iterations_than_classical_interpolation_on_unstructured_meshes(mesh):
    # reference library: PyAMG's Ruge-Stueben hierarchy with classical interpolation (the
    # same strength and first pass) as CG's preconditioner; the extended rows at least
    # cut its iterations by a quarter here (measured: about half, docs/solvers.md)
    import pyamg

    A = reduced_stiffness(mesh)
    b = np.ones(A.shape[0])
    ref = pyamg.ruge_stuben_solver(
        A, strength=("classical", {"theta": THETA, "norm": "min"}),
        CF=("RS", {"second_pass": False}), interpolation="classical", max_coarse=50)
    residuals = []
    ref.solve(b, tol=1e-8, accel="cg", residuals=residuals)
    ours = cg_with_history(A, b, rtol=1e-8, M=ClassicalAMG(A, max_coarse=50))
    assert ours.info == 0
    assert ours.iterations <= 0.75 * (len(residuals) - 1), (ours.iterations, len(residuals) - 1)
    assert np.allclose(ours.x, sla.spsolve(A.tocsc(), b), rtol=1e-6)  # reference: scipy


def test_structured_mesh_keeps_the_classical_hierarchy():
    # On a uniform mesh every strong F pair has a strong C point in common: no row is
    # extended, and the hierarchy is PyAMG's (test_amg_native.py) to the bit
    A = reduced_stiffness(hatkernels.mesh.rectangle(40, 40))
    P, _, _ = kernel_p(A)
    classical, _, _ = kernel_p(A, extend=False)
    assert np.array_equal(P.indptr, classical.indptr)
    assert np.array_equal(P.data, classical.data)


def test_option_is_checked_and_shown():
    A = reduced_stiffness(hatkernels.mesh.rectangle(8, 8))
    with pytest.raises(InputError, match="interpolation must be one of"):
        make_preconditioner(A, "amg-native", interpolation="distance-two")
    assert "extended interpolation" in repr(make_preconditioner(A, "amg"))
    assert "classical interpolation" in repr(
        make_preconditioner(A, "amg-native", interpolation="classical"))
    # auto: tetrahedra's denser matrices keep the classical interpolation, unless asked
    T = reduced_stiffness(hatkernels.mesh.cuboid(6))
    assert T.nnz > 10 * T.shape[0]
    assert "classical interpolation" in repr(make_preconditioner(T, "amg"))
    assert "extended interpolation" in repr(
        make_preconditioner(T, "amg", interpolation="extended"))
