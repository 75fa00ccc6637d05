"""Scale: every problem float64 can represent solves right, the others are refused.

The solution of ``-lap u = f`` with zero Dirichlet data scales as the square of
the length: on the domain stretched by ``L``, ``u_L(L x) = L**2 u_1(x)``, and with
a reaction ``c`` the same holds when ``c`` is divided by ``L**2`` (analytic
scaling of the equation; common practice, no source).  P1 on the stretched
mesh is the same discrete problem, so the discrete solutions obey it to the
solver's tolerance.
"""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from pyamg.gallery import poisson

import hatkernels
from hatkernels.errors import InputError, MeshError
from hatkernels.krylov import cg, cg_with_history
from hatkernels.mesh import rectangle
from hatkernels.precond import make_preconditioner

LENGTHS = (1e-150, 1e-100, 1e-40, 1.0, 1e40, 1e100, 1e150)
PRECONDITIONERS = ("amg", "amg-sa", "ic0", "jacobi", "gmg")


def _mesh(L, preconditioner):
    base = rectangle(20, 20) if preconditioner != "gmg" else rectangle(10, 10)
    mesh = hatkernels.Mesh(base.points * L, base.cells)
    # gmg needs the refinement history: build the fine mesh by refining the scaled one
    return mesh.refine() if preconditioner == "gmg" else mesh


def _u_max(L, preconditioner, **kwargs):
    np.random.seed(0)  # noqa: NPY002 (amg-sa: PyAMG draws from numpy's global generator)
    sol = hatkernels.solve_poisson(_mesh(L, preconditioner), 1.0,
                                   preconditioner=preconditioner, rtol=1e-12, **kwargs)
    assert sol.stats.converged
    assert np.isfinite(sol.u).all()
    return float(sol.u.max())


@pytest.fixture(scope="module")
def unit_u_max():
    return {pc: _u_max(1.0, pc) for pc in PRECONDITIONERS}


def test_unit_square_maximum_is_the_torsion_value(unit_u_max):
    # max of u for -lap u = 1 on the unit square, u = 0 on its sides: 0.0736713
    # (series solution; value from memory); P1 on a 20 x 20 grid is within 0.5 %
    for pc, value in unit_u_max.items():
        assert abs(value - 0.0736713) <= 5e-3 * 0.0736713, pc


@pytest.mark.parametrize("preconditioner", PRECONDITIONERS)
@pytest.mark.parametrize("L", LENGTHS, ids=lambda L: f"L={L:g}")
def test_solution_scales_as_length_squared(L, preconditioner, unit_u_max):
    # u_max(L) = L**2 u_max(1) (analytic scaling of -lap u = 1; common practice, no source)
    expected = L * L * unit_u_max[preconditioner]
    assert abs(_u_max(L, preconditioner) - expected) <= 1e-10 * expected


@pytest.mark.parametrize("preconditioner", ("none", "gmg"))
@pytest.mark.parametrize("L", (1e-150, 1e-100, 1e100, 1e150), ids=lambda L: f"L={L:g}")
def test_matrix_free_solution_scales_as_length_squared(L, preconditioner):
    # the matrix-free product through the same loop (analytic scaling; common practice,
    # no source): compared with the assembled solve on the unit mesh
    expected = L * L * _u_max(1.0, preconditioner)
    got = _u_max(L, preconditioner, matrix_free=True)
    assert abs(got - expected) <= 1e-10 * expected


@pytest.mark.parametrize("L", (1e-100, 1e100), ids=("L=1e-100", "L=1e100"))
def test_reaction_scales_with_length(L):
    # -lap u + c u = 1 stretched by L: u_{L, c / L**2}(L x) = L**2 u_{1, c}(x)
    # (analytic scaling; common practice, no source).  c = 1 on the stretched mesh makes
    # the mass part of the operator about L**2 times its stiffness part.
    for c in (1.0, 1e-3):
        for pc in ("amg", "ic0", "jacobi"):
            ref = _u_max(1.0, pc, reaction=c * L * L)
            got = _u_max(L, pc, reaction=c)
            assert abs(got - L * L * ref) <= 1e-10 * L * L * ref, (c, pc)


@pytest.mark.parametrize("L", (1e-160, 1e-200, 1e-300), ids=lambda L: f"L={L:g}")
def test_mesh_too_small_for_float64_is_refused_with_the_reason(L):
    m = rectangle(20, 20)
    with pytest.raises(MeshError, match=r"triangle 0 \(points 0, 1, 22\): coordinates too "
                                        r"small to represent areas in float64"):
        hatkernels.Mesh(m.points * L, m.cells)


@pytest.mark.parametrize("L", (1e160, 1e200, 1e300), ids=lambda L: f"L={L:g}")
def test_mesh_too_large_for_float64_is_refused_with_the_reason(L):
    m = rectangle(20, 20)
    with pytest.raises(MeshError, match=r"triangle 0 \(points 0, 1, 22\): coordinates too "
                                        r"large to represent areas in float64"):
        hatkernels.Mesh(m.points * L, m.cells)


def test_refined_below_float64_range_is_refused_by_areas():
    # refinement builds meshes without validation: areas() refuses subnormal areas
    m = rectangle(20, 20)
    coarse = hatkernels.Mesh(m.points * 1e-152, m.cells)
    assert coarse.refine().areas().min() > 0  # twice the area 6.2e-308: still normal
    with pytest.raises(MeshError, match="coordinates too small to represent areas in float64"):
        coarse.refine().refine().areas()


def test_flat_triangles_keep_their_own_reason():
    with pytest.raises(MeshError, match=r"triangle 0 has zero area \(points 0, 1, 2 are "
                                        r"collinear\)"):
        hatkernels.Mesh([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0]], [[0, 1, 2]])
    with pytest.raises(MeshError, match="points 0 and 1 coincide"):
        hatkernels.Mesh([[3.0, 1.0], [3.0, 1.0], [4.0, 2.0]], [[0, 1, 2]])
    # tiny but representable, and thin: accepted (twice the area 1e-290)
    m = hatkernels.Mesh([[0.0, 0.0], [1e-140, 0.0], [0.5e-140, 1e-150]], [[0, 1, 2]])
    assert m.areas()[0] == pytest.approx(0.5e-290, rel=1e-15, abs=0)


def test_solution_beyond_float64_is_refused():
    # the mesh fits (areas near 1e307) but u_max = 0.0735 * 1e310 does not
    m = rectangle(20, 20)
    mesh = hatkernels.Mesh(m.points * 1e155, m.cells)
    with pytest.raises(InputError, match=r"solution's largest entry, about 2\*\*10\d\d "
                                         r"\(1e309\), is beyond float64's largest number"):
        hatkernels.solve_poisson(mesh, 1.0)


def _reference():
    A = poisson((20, 20), format="csr")
    b = np.random.default_rng(2).standard_normal(A.shape[0])
    # reference library: scipy (sparse direct solve)
    return A, b, sla.spsolve(A.tocsc(), b)


@pytest.mark.parametrize("scale", (1e200, 1e-200, 1e300, 1e-300))
@pytest.mark.parametrize("precond", ("none", "jacobi", "ic0", "amg"))
def test_krylov_cg_scaled_right_hand_side(scale, precond):
    A, b, ref = _reference()
    x, info = cg(A, b * scale, rtol=1e-10, M=make_preconditioner(A, precond))
    assert info == 0
    assert np.isfinite(x).all()
    assert np.linalg.norm(x / scale - ref) <= 1e-8 * np.linalg.norm(ref)


@pytest.mark.parametrize("scale", (1e250, 1e-250))
@pytest.mark.parametrize("precond", ("none", "jacobi", "ic0"))
def test_krylov_cg_scaled_operator(scale, precond):
    # A times 1e+-250: p.Ap and r.z leave float64's range unless the system is rescaled
    A, b, ref = _reference()
    As = (A * scale).tocsr()
    x, info = cg(As, b, rtol=1e-10, M=make_preconditioner(As, precond))
    assert info == 0
    assert np.linalg.norm(x * scale - ref) <= 1e-8 * np.linalg.norm(ref)


def test_power_of_two_rescaling_keeps_every_bit():
    # a power of two scales every floating-point operation exactly (IEEE 754), so a
    # right-hand side that must be rescaled gives the scaled bits of the ordinary one
    A, b, _ = _reference()
    M = make_preconditioner(A, "ic0")
    plain = cg_with_history(A, b, rtol=1e-10, M=M)
    for k in (900, -900):
        big = cg_with_history(A, np.ldexp(b, k), rtol=1e-10, M=M)
        assert big.iterations == plain.iterations
        assert np.array_equal(big.x, np.ldexp(plain.x, k))
        assert np.array_equal(big.residuals, np.ldexp(plain.residuals, k))
        assert f"= 2**{-k - 2} b" in big.message  # the largest entry of b is 2.85


def test_scaled_solve_reports_unscaled_callback_monitor_and_history():
    A, b, ref = _reference()
    seen, norms = [], []
    res = cg_with_history(A, b * 1e-300, rtol=1e-10, callback=lambda xk: seen.append(xk.max()),
                          monitor=lambda it, rn: norms.append(rn))
    assert res.info == 0 and len(seen) == res.iterations == len(norms)
    # the last iterate's maximum as the callback saw it, and the norms as in the history
    assert seen[-1] == res.x.max()
    assert np.array_equal(norms, res.residuals[1:])
    assert res.residuals[0] == pytest.approx(np.linalg.norm(b) * 1e-300, rel=1e-14, abs=0)
    assert res.tolerance == pytest.approx(1e-10 * np.linalg.norm(b) * 1e-300, rel=1e-14, abs=0)
    assert res.residuals[-1] <= res.tolerance
    assert np.linalg.norm(b - A @ res.x * 1e300) * 1e-300 <= res.tolerance * (1 + 1e-6)


def test_zero_and_subnormal_right_hand_sides():
    A, b, _ = _reference()
    x, info = cg(A, np.zeros_like(b))
    # reference library: scipy (cg returns the zero vector, info 0, for b = 0)
    assert info == 0 and not x.any()
    # b = 1e-300 in one entry only: b.b underflows to 0 but b is not zero
    e = np.zeros_like(b)
    e[7] = 1e-300
    x, info = cg(A, e, rtol=1e-10)
    # reference library: scipy (sparse direct solve of the right-hand side scaled by 1e300)
    ref = sla.spsolve(A.tocsc(), e * 1e300)
    assert info == 0 and np.linalg.norm(x * 1e300 - ref) <= 1e-8 * np.linalg.norm(ref)


@pytest.mark.parametrize("precond", ("none", "ic0"))
def test_solution_below_float64_normal_range_is_refused(precond):
    # a subnormal right-hand side has a solution near 1e-320: only a few digits exist
    A, b, _ = _reference()
    with pytest.raises(InputError, match=r"solution's largest entry, about 2\*\*-10\d\d "
                                         r"\(1e-3\d\d\), is below float64's smallest normal"):
        cg(A, b * 5e-320, M=make_preconditioner(A, precond))


def test_badly_scaled_preconditioner_and_operator():
    # A near 1e-300 with M = 1e-300 I (a preconditioner scaled far from A's inverse):
    # r.z near 1e-300 r.r and p.Ap near 1e-900 r.r; A and M are rescaled apart
    A, b, ref = _reference()
    As = (A * 1e-300).tocsr()
    Minv = sla.aslinearoperator(sp.identity(A.shape[0], format="csr") * 1e-300)
    x, info = cg(As, b, rtol=1e-10, M=Minv)
    assert info == 0
    assert np.linalg.norm(x * 1e-300 - ref) <= 1e-8 * np.linalg.norm(ref)
