"""Full multigrid (the nested start of gmg): discretisation accuracy for a fixed work."""

import numpy as np
import pytest
import scipy.sparse.linalg as spla
from conftest import jittered_mesh, refined, two_threads

import hatkernels
from hatkernels import norms, solve_poisson, threads
from hatkernels.assembly import assemble_load, assemble_stiffness
from hatkernels.boundary import apply_dirichlet
from hatkernels.errors import InputError
from hatkernels.mesh import rectangle
from hatkernels.precond import PreconditionerContext, make_preconditioner

PI = np.pi


def exact(x, y):
    return np.sin(PI * x) * np.sin(PI * y)


def grad_exact(x, y):
    return PI * np.cos(PI * x) * np.sin(PI * y), PI * np.sin(PI * x) * np.cos(PI * y)


def source(x, y):
    return 2 * PI**2 * exact(x, y)


def test_nested_start_alone_reaches_discretisation_accuracy_on_every_level():
    # Full multigrid leaves an algebraic error below the discretisation error, by a
    # factor that does not grow with the levels (A. Brandt, Multi-level adaptive
    # solutions to boundary-value problems, Math. Comp. 31, 1977; U. Trottenberg,
    # C. W. Oosterlee and A. Schuller, Multigrid, 2001, section 2.6).  The
    # discretisation error is that of the converged discrete solution against the
    # manufactured one u = sin(pi x) sin(pi y) (common practice, no source).
    algebraic = []
    for k in (2, 3, 4, 5):
        m = refined(rectangle(4, 4), k)
        tight = solve_poisson(m, source, preconditioner="gmg", rtol=1e-11, maxiter=100)
        fmg = solve_poisson(m, source, preconditioner="gmg", rtol=None)
        assert fmg.stats.iterations == 0 and fmg.converged
        assert "nested start alone" in fmg.stats.message
        e_l2 = norms.l2_error(m, tight.u, exact)
        e_h1 = norms.h1_seminorm_error(m, tight.u, grad_exact)
        alg = norms.l2_error(m, fmg.u - tight.u, lambda x, y: 0 * x)
        algebraic.append(alg / e_l2)
        assert norms.l2_error(m, fmg.u, exact) <= 1.5 * e_l2
        assert norms.h1_seminorm_error(m, fmg.u, grad_exact) <= 1.05 * e_h1
    assert max(algebraic) < 0.6  # measured 0.37 to 0.41
    assert algebraic[-1] <= 1.2 * algebraic[-2]  # levels off with the depth
    # two cycles per level: the algebraic error a tenth of the discretisation error
    m = refined(rectangle(4, 4), 4)
    tight = solve_poisson(m, source, preconditioner="gmg", rtol=1e-11, maxiter=100)
    two = solve_poisson(m, source, preconditioner="gmg", rtol=None, nested_cycles=2)
    alg = norms.l2_error(m, two.u - tight.u, lambda x, y: 0 * x)
    assert alg < 0.1 * norms.l2_error(m, tight.u, exact)  # measured 0.06


def test_nested_start_then_cg_reaches_scipy_and_saves_iterations():
    # reference: scipy's sparse direct solve of the same reduced system
    m = refined(jittered_mesh(4, 3), 3)
    coef = 1.0 + m.points[m.triangles].mean(axis=1)[:, 0]
    held = m.boundary_points()
    K = assemble_stiffness(m, coef)
    system = apply_dirichlet(K, assemble_load(m, source), held)
    ref = spla.spsolve(system.A.tocsc(), system.b)
    ctx = PreconditionerContext(mesh=m, coefficient=coef, fixed=held)
    zero = hatkernels.solve(system.A, system.b, preconditioner="gmg", rtol=1e-10, context=ctx)
    nested = hatkernels.solve(system.A, system.b, preconditioner="gmg", rtol=1e-10,
                              context=ctx, start="nested")
    assert nested.converged and zero.converged
    assert nested.iterations < zero.iterations
    assert nested.stats.timings["start"] > 0 and "start" not in zero.stats.timings
    scale = np.abs(ref).max()
    assert np.abs(nested.x - ref).max() <= 1e-8 * scale
    # on the data the levels see (per-cell coefficient averaged down), still accurate
    alone = hatkernels.solve(system.A, system.b, preconditioner="gmg", rtol=None, context=ctx)
    assert np.abs(alone.x - ref).max() < 0.05 * scale


def test_held_values_need_a_tolerance_and_the_nested_start_still_shortens_cg():
    # u = exp(x) sin(2y), -lap u = 3 u (common practice, no source): held on the boundary
    m = refined(rectangle(3, 2, bounds=(0, 1.5, 0, 1)), 4)
    ex = lambda x, y: np.exp(x) * np.sin(2 * y)  # noqa: E731
    f = lambda x, y: 3 * ex(x, y)  # noqa: E731
    with pytest.raises(InputError, match="zero held values only"):
        solve_poisson(m, f, dirichlet=ex, preconditioner="gmg", rtol=None)
    zero = solve_poisson(m, f, dirichlet=ex, preconditioner="gmg", rtol=1e-10)
    nested = solve_poisson(m, f, dirichlet=ex, preconditioner="gmg", rtol=1e-10,
                           start="nested")
    assert nested.converged and nested.stats.iterations <= zero.stats.iterations
    # the converged solutions agree; against the manufactured solution both have the
    # discretisation error of the mesh
    assert np.abs(nested.u - zero.u).max() <= 1e-8 * np.abs(zero.u).max()
    held = m.boundary_points()
    assert np.array_equal(nested.u[held], ex(*m.points[held].T))


@two_threads
def test_nested_start_gives_the_same_bits_on_one_and_two_threads():
    m = refined(rectangle(4, 4), 4)
    out = []
    for n in (1, 2):
        with threads(n):
            out.append(solve_poisson(m, source, preconditioner="gmg", rtol=None).u)
    assert np.array_equal(out[0], out[1])


def test_bad_starts_are_named():
    m = refined(rectangle(2, 2), 2)
    with pytest.raises(InputError, match="start must be one of"):
        solve_poisson(m, 1.0, preconditioner="gmg", start="coarse")
    with pytest.raises(InputError, match="nested levels"):
        solve_poisson(m, 1.0, preconditioner="ic0", rtol=None)
    with pytest.raises(InputError, match="start='zero'"):
        solve_poisson(m, 1.0, preconditioner="gmg", rtol=None, start="zero")
    from hatkernels import distributed

    with pytest.raises(InputError, match="serial only"):
        distributed.solve_poisson(m, 1.0, refine=1, start="nested")
    with pytest.raises(InputError, match="nested_cycles"):
        solve_poisson(m, 1.0, preconditioner="gmg", rtol=None, nested_cycles=0)
    A = apply_dirichlet(assemble_stiffness(m), assemble_load(m, 1.0), m.boundary_points())
    M = make_preconditioner(A.A, "gmg", context=PreconditionerContext(
        mesh=m, fixed=m.boundary_points()))
    with pytest.raises(InputError, match="x0 and start='nested'"):
        hatkernels.solve(A.A, A.b, preconditioner=M, x0=np.zeros(A.b.size), start="nested")


AMG_CASES = {"rectangle": lambda: rectangle(60, 60), "jittered": lambda: jittered_mesh(50, 2)}


@pytest.mark.parametrize("case", AMG_CASES)
@pytest.mark.parametrize("name", ["amg-native", "amg-rs", "amg-sa"])
def test_amg_nested_start_reaches_scipy(case, name):
    # full multigrid on an AMG hierarchy: a first iterate much closer to the solution
    # than zero (in the energy norm), then CG to scipy's direct solution; b unchanged
    m = AMG_CASES[case]()
    s = apply_dirichlet(assemble_stiffness(m), assemble_load(m, source), m.boundary_points())
    ref = spla.spsolve(s.A.tocsc(), s.b)  # reference library: scipy's direct solve
    M = make_preconditioner(s.A, name)
    b = s.b.copy()
    x = np.empty_like(b)
    M.full_cycle_into(b, x)
    assert np.array_equal(b, s.b)
    energy = lambda v: float(np.sqrt(v @ (s.A @ v)))  # noqa: E731
    assert energy(x - ref) < 0.5 * energy(ref)
    r = hatkernels.solve(s.A, s.b, preconditioner=M, rtol=1e-10, start="nested")
    assert r.converged and "start" in r.stats.timings
    assert np.linalg.norm(r.x - ref) <= 1e-7 * np.linalg.norm(ref)


def test_amg_native_starts_nested_by_default_and_saves_iterations():
    # the default preconditioner asks solve for the nested start: fewer CG iterations to
    # the same tolerance (relative to b, as from zero) on a structured mesh; start="zero"
    # and an x0 still start as told, and amg-rs keeps the zero start
    m = rectangle(120, 120)
    s = apply_dirichlet(assemble_stiffness(m), assemble_load(m, 1.0), m.boundary_points())
    default = hatkernels.solve(s.A, s.b, rtol=1e-8)
    zero = hatkernels.solve(s.A, s.b, rtol=1e-8, start="zero")
    assert "start" in default.stats.timings and "start" not in zero.stats.timings
    assert default.stats.iterations <= zero.stats.iterations - 2
    assert default.stats.tolerance == zero.stats.tolerance  # 1e-8 of |b| both
    assert np.linalg.norm(default.x - zero.x) <= 1e-6 * np.linalg.norm(zero.x)
    given = hatkernels.solve(s.A, s.b, rtol=1e-8, x0=np.zeros(s.b.size))
    assert "start" not in given.stats.timings
    assert "start" not in hatkernels.solve(s.A, s.b, preconditioner="amg-rs").stats.timings


@two_threads
def test_amg_nested_start_gives_the_same_bits_on_one_and_two_threads():
    m = jittered_mesh(40, 5)
    s = apply_dirichlet(assemble_stiffness(m), assemble_load(m, 1.0), m.boundary_points())
    out = []
    for n in (1, 2):
        with threads(n):
            M = make_preconditioner(s.A, "amg-native")
            x = np.empty(s.b.size)
            M.full_cycle_into(s.b, x)
            out.append(x)
    assert np.array_equal(*out)
