"""Time stepping on a never-stored refined mesh (hatkernels.transient_patches) and the mass
term of the patch operator and multigrid (hatkernels.patches.multigrid).

Checks against something outside the path:

* the stored refinement (``coarse.refine()`` repeated ``k`` times) with the stored
  assembly of the stiffness and mass matrices (an independent implementation over
  fine index arrays), SciPy's sparse direct solve, and the stored march
  (:func:`hatkernels.transient.solve_transient`, assembled matrices and their own
  preconditioner);
* the decay per step of ``sin(pi x) sin(pi y)`` on the right-split square with
  lumped mass, the scheme's amplification of the 5-point eigenvalue
  ``(4 - 4 cos(pi h)) / h^2`` (R. J. LeVeque, Finite Difference Methods for
  Ordinary and Partial Differential Equations, 2007, section 3.4; the
  amplification from K. W. Morton and D. F. Mayers, Numerical Solution of Partial
  Differential Equations, 2nd ed. 2005, ch. 2; value from memory);
* the same bits on 1 and 2 threads.
"""

import math

import numpy as np
import pytest
import scipy.sparse.linalg as spla
from conftest import jittered_mesh, relative_error
from hypothesis import given, settings
from hypothesis import strategies as st
from test_patches import fine_coefficient as fine_cells
from test_patches import refined, tagged_square
from test_threads import assert_same_bits, on_one_and_two_threads

import hatkernels as hk
from hatkernels import krylov
from hatkernels.errors import InputError
from hatkernels.mesh import cuboid, rectangle
from hatkernels.mesh.tags import label_cells
from hatkernels.patches import PatchLayout, PatchMultigrid, PatchOperator, element_stiffness
from hatkernels.patches.multigrid import element_mass
from hatkernels.transient import in_time, solve_transient
from hatkernels.transient_patches import march_on_patches

IDENTITY = 1e-12




def sine(x, y):
    return np.sin(np.pi * x) * np.sin(np.pi * y)


@pytest.mark.parametrize("lumped", [False, True])
@pytest.mark.parametrize("k", [1, 2, 3])
def test_operator_with_mass_equals_the_stored_assembly(k, lumped):
    coarse = jittered_mesh(3, 5)
    fine = refined(coarse, k)
    rng = np.random.default_rng(k + 7 * lumped)
    kappa = rng.uniform(0.2, 5.0, coarse.n_triangles)
    sigma = rng.uniform(0.0, 50.0, coarse.n_triangles)
    layout = PatchLayout(coarse, k)
    E = element_stiffness(coarse, kappa) + element_mass(coarse, sigma, k, lumped)
    u = rng.standard_normal(fine.n_points)
    y = layout.to_refined(PatchOperator(layout, E, k, masked=False) @ layout.from_refined(u))
    A = (hk.assemble_stiffness(fine, fine_cells(kappa, k))
         + hk.assemble_mass(fine, fine_cells(sigma, k), lumped=lumped))
    assert relative_error(y, A @ u) <= IDENTITY


@pytest.mark.parametrize("lumped", [False, True])
def test_multigrid_with_mass_keeps_its_iterations_and_solves_the_stored_system(lumped):
    coarse = rectangle(3, 3)
    counts = []
    for k in (2, 3, 4, 5):
        fine = refined(coarse, k)
        layout = PatchLayout(coarse, k, held_sides=coarse.boundary_edges())
        kappa = np.ones(coarse.n_triangles)
        sigma = np.full(coarse.n_triangles, 4.0**k)  # M / tau with tau ~ h^2: both terms count
        P = PatchMultigrid(layout, kappa, sigma=sigma, lumped=lumped)
        A = PatchOperator(layout, P.K, k)
        b = layout.from_refined(sine(*fine.points.T))
        layout.zero_held(b)
        res = krylov.cg_with_history(A, b, M=P, rtol=1e-10)
        assert res.info == 0
        counts.append(res.iterations)
        # reference: SciPy's direct solve of the stored system
        S = (hk.assemble_stiffness(fine) + hk.assemble_mass(fine, sigma[0], lumped=lumped))
        system = hk.apply_dirichlet(S, layout.to_refined(b), fine.boundary_points())
        ref = system.expand(spla.spsolve(system.A.tocsc(), system.b))
        assert relative_error(layout.to_refined(res.x), ref) <= 1e-8
    assert max(counts) <= 12 and max(counts) - min(counts) <= 3, counts


@pytest.mark.parametrize("scheme, lumped", [("crank-nicolson", False),
                                            ("backward-euler", True)])
def test_march_agrees_with_the_stored_march(scheme, lumped):
    coarse, k = tagged_square(), 3
    args = dict(dt=2e-3, scheme=scheme, lumped=lumped, rtol=1e-11,
                coefficient={"cold": 1.0, "hot": 4.0}, capacity={"cold": 2.0, "hot": 0.5},
                f=lambda x, y: 10.0 * x * (1.0 - y), dirichlet={"left": 1.0, "bottom": 0.0},
                neumann={"top": -2.0})
    u0 = lambda x, y: x * y  # noqa: E731  (differs from the held values: lifted)
    times = [0.004, 0.02]
    ours = march_on_patches(coarse, u0, times, refine=k, **args)
    stored = solve_transient(refined(coarse, k), u0, times, **args)
    assert ours.stats.converged and ours.stats.steps == stored.stats.steps
    assert np.abs(ours.u - stored.u).max() <= 1e-8 * np.abs(stored.u).max()


@pytest.mark.parametrize("scheme, theta", [("backward-euler", 1.0), ("crank-nicolson", 0.5)])
def test_decay_per_step_is_the_amplification_of_the_discrete_eigenvalue(scheme, theta):
    coarse, k = rectangle(2, 2), 3  # refined: the right-split square of 16 x 16 cells
    h, dt, steps = 1.0 / 16, 0.01, 6
    lam = (4.0 - 4.0 * math.cos(math.pi * h)) / h**2
    sol = march_on_patches(coarse, sine, dt * np.arange(steps + 1), dt=dt, refine=k,
                           scheme=scheme, lumped=True, rtol=1e-12)
    fine = refined(coarse, k)
    u = sol.u
    np.testing.assert_allclose(u[0], sine(*fine.points.T), rtol=0, atol=1e-15)
    inside = np.abs(u[0]) > 0.1
    ratios = u[1:, inside] / u[:-1, inside]
    z = dt * lam
    expected = np.full(steps, (1.0 - (1.0 - theta) * z) / (1.0 + theta * z))
    if theta == 0.5:  # Rannacher's start-up: the first two steps as four half steps of BE
        expected[:2] = (1.0 / (1.0 + z / 2)) ** 2
    assert np.abs(ratios - expected[:, None]).max() <= 1e-9


def test_same_bits_on_one_and_two_threads():
    coarse = rectangle(3, 2)

    def run():
        sol = march_on_patches(coarse, sine, [0.01, 0.03], dt=2e-3, refine=4, f=1.0)
        return [sol.values, sol.stats.iterations]

    assert_same_bits(*on_one_and_two_threads(run))


def test_outputs_patches_and_inputs_left_unchanged():
    coarse, k = rectangle(2, 2), 2
    fine = refined(coarse, k)
    u0 = fine.points[:, 0].copy()
    before = u0.copy()
    sol = march_on_patches(coarse, u0, [0.0, 0.01], dt=5e-3, refine=k)
    assert np.array_equal(u0, before)
    assert np.array_equal(sol.u[0], u0)  # t = 0 gives u0 back, in the refined numbering
    lam, values = sol.patch(1)
    assert lam.shape == (15, 3) and values.shape == (15,)
    assert sol.stats.steps == 2 + 2 and sol.stats.converged  # Rannacher's two half steps


def test_bad_input_is_refused_naming_what_and_where():
    coarse = rectangle(2, 2)
    k = 2
    size = refined(coarse, k).n_points
    with pytest.raises(InputError, match="f: the patch path takes data constant in time"):
        march_on_patches(coarse, 0.0, [0.1], dt=0.01, refine=k,
                         f=in_time(lambda x, y, t: t + 0 * x))
    with pytest.raises(InputError, match=rf"expected .* \({size},\)"):
        march_on_patches(coarse, np.zeros(size - 1), [0.1], dt=0.01, refine=k)
    with pytest.raises(InputError, match="u0\\(x, y\\) is nan at .* in coarse cell"):
        march_on_patches(coarse, lambda x, y: np.where(x > 0.9, np.nan, 0.0), [0.1],
                         dt=0.01, refine=k)
    with pytest.raises(InputError, match="capacity"):
        march_on_patches(coarse, 0.0, [0.1], dt=0.01, refine=k, capacity=-1.0)
    with pytest.raises(InputError, match="dt"):
        march_on_patches(coarse, 0.0, [0.1], dt=0.0, refine=k)
    with pytest.raises(InputError, match="triangle meshes"):
        march_on_patches(cuboid(1, 1, 1), 0.0, [0.1], dt=0.01, refine=1)
    with pytest.raises(InputError, match="refine >= 1"):
        march_on_patches(coarse, 0.0, [0.1], dt=0.01, refine=0)
    with pytest.raises(InputError, match="sigma must be >= 0 and finite; it is -1.0 on coarse "
                                         "cell 0"):
        PatchMultigrid(PatchLayout(coarse, 1), np.ones(coarse.n_triangles),
                       sigma=np.r_[-1.0, np.ones(coarse.n_triangles - 1)])


@settings(max_examples=8, deadline=None)
@given(seed=st.integers(0, 10**6), k=st.integers(1, 2), lumped=st.booleans(),
       scheme=st.sampled_from(["crank-nicolson", "backward-euler"]),
       held=st.floats(-2.0, 2.0), dt=st.floats(1e-4, 1e-1))
def test_random_data_agree_with_the_stored_march(seed, k, lumped, scheme, held, dt):
    """Random regions, coefficients, capacities, held values and steps on a jittered mesh:
    the same field as the stored march (reference: the stored assembly and its own
    solver), and the inputs left unchanged."""
    rng = np.random.default_rng(seed)
    split = rng.uniform(0.2, 0.8)
    coarse = label_cells(jittered_mesh(3, seed % 97), {"a": lambda x, y: x < split,
                                                       "b": lambda x, y: x >= split})
    kappa = {"a": rng.uniform(0.1, 10.0), "b": rng.uniform(0.1, 10.0)}
    cap = {"a": rng.uniform(0.1, 10.0), "b": rng.uniform(0.1, 10.0)}
    u0 = rng.standard_normal(refined(coarse, k).n_points)
    before = u0.copy()
    args = dict(dt=dt, scheme=scheme, lumped=lumped, rtol=1e-11, dirichlet=held,
                coefficient=kappa, capacity=cap, f=lambda x, y: np.cos(3 * x) + y)
    times = [2 * dt, 3 * dt]
    ours = march_on_patches(coarse, u0, times, refine=k, **args)
    stored = solve_transient(refined(coarse, k), u0, times, **args)
    assert np.array_equal(u0, before)
    scale = max(1.0, np.abs(stored.u).max())
    assert np.abs(ours.u - stored.u).max() <= 1e-7 * scale


def test_a_march_that_does_not_fit_is_refused_before_allocating(monkeypatch):
    import hatkernels.memory as memory

    monkeypatch.setattr(memory, "available_bytes", lambda: 10**5)
    with pytest.raises(InputError, match=r"not enough memory: march_on_patches on 4,225 fine "
                                         r"points with 3 output times"):
        march_on_patches(rectangle(2, 2), 0.0, [0.1, 0.2, 0.3], dt=0.1, refine=5)


@pytest.mark.parametrize("theta, scheme", [(0.5, "crank-nicolson"), (1.0, "backward-euler")])
def test_march_agrees_with_a_plain_theta_scheme_loop(theta, scheme):
    """Consistent mass, a source and a held value that differs from u0: against the theta
    scheme written out here with SciPy's sparse direct solve (K. W. Morton and D. F.
    Mayers, Numerical Solution of Partial Differential Equations, 2nd ed. 2005, ch. 2:
    ``M (u' - u) + h K (theta u' + (1 - theta) u) = h b`` on the free rows, the held rows
    at their value; value from memory)."""
    coarse, k, h, steps, g = rectangle(3, 3), 2, 0.01, 4, 0.7
    fine = refined(coarse, k)
    x, y = fine.points.T
    u = x * (1.0 - y) + 0.2  # not g on the boundary: the first step moves the held values
    K = hk.assemble_stiffness(fine, 2.0)
    M = hk.assemble_mass(fine, 3.0)
    b = hk.assemble_load(fine, lambda x, y: 1.0 + x)
    held = fine.boundary_points()
    free = np.setdiff1d(np.arange(fine.n_points), held)
    A = (M + theta * h * K).tocsr()
    B = (M - (1.0 - theta) * h * K).tocsr()
    ref = u.copy()
    for _ in range(steps):
        new = np.full(fine.n_points, g)
        rhs = (B @ ref + h * b)[free] - A[free][:, held] @ new[held]
        new[free] = spla.spsolve(A[free][:, free].tocsc(), rhs)
        ref = new
    u0 = u.copy()
    ours = march_on_patches(coarse, u0, [steps * h], dt=h, refine=k, scheme=scheme,
                            startup=0, coefficient=2.0, capacity=3.0,
                            f=lambda x, y: 1.0 + x, dirichlet=g, rtol=1e-13)
    stored = solve_transient(fine, u0, [steps * h], dt=h, scheme=scheme, startup=0,
                             coefficient=2.0, capacity=3.0, f=lambda x, y: 1.0 + x,
                             dirichlet=g, rtol=1e-13)
    assert np.abs(ours.u[-1] - ref).max() <= 1e-9
    assert np.abs(stored.u[-1] - ref).max() <= 1e-9
    assert np.array_equal(u0, u)


def test_a_step_that_does_not_converge_is_reported_and_the_march_goes_on():
    from hatkernels.errors import ConvergenceError

    coarse = rectangle(2, 2)
    with pytest.warns(RuntimeWarning, match="steps did not converge"):
        sol = march_on_patches(coarse, sine, [0.02], dt=0.01, refine=3, maxiter=1,
                               rtol=1e-12)
    assert sol.stats.failed_steps > 0 and not sol.stats.converged
    assert np.isfinite(sol.values).all()
    with pytest.raises(ConvergenceError, match="march_on_patches: step 1"):
        march_on_patches(coarse, sine, [0.02], dt=0.01, refine=3, maxiter=1, rtol=1e-12,
                         check=True)


def test_heat_balance_agrees_with_the_stored_march_and_closes():
    """The heat per interval: the same figures as the stored march's balance (the held rows
    of the stored assembly), and stored + out = in to the solver's tolerance (the first
    law; common practice, no source)."""
    coarse, k = tagged_square(), 2
    args = dict(dt=5e-3, rtol=1e-12, coefficient={"cold": 1.0, "hot": 3.0},
                capacity={"cold": 2.0, "hot": 0.5}, f=lambda x, y: 4.0 * x,
                dirichlet={"left": 1.0}, neumann={"top": -2.0, "right": 0.5})
    times = [0.01, 0.03]
    ours = march_on_patches(coarse, 0.2, times, refine=k, **args).energy()
    ref = solve_transient(refined(coarse, k), 0.2, times, **args).energy()
    for name in ("stored", "sources", "flux_in", "held_out", "convection_out", "absorbed"):
        np.testing.assert_allclose(getattr(ours, name), getattr(ref, name), rtol=1e-8,
                                   atol=1e-10, err_msg=name)
    scale = np.abs(ours.heat_in).max()
    assert np.abs(ours.stored + ours.heat_out - ours.heat_in).max() <= 1e-9 * scale


def test_solve_transient_takes_the_patch_path_by_itself_and_the_stored_one_when_named():
    """With ``refine`` and no preconditioner named, the never-stored refinement; the same
    field and heat as the stored march with gmg (reference: the stored assembly), the
    mesh made on use; probes, data in time or a named preconditioner keep the stored
    path."""
    coarse, k = rectangle(3, 3), 3
    args = dict(dt=4e-3, rtol=1e-11, f=1.0, capacity=2.0)
    ours = solve_transient(coarse, sine, [0.008, 0.02], refine=k, **args)
    stored = solve_transient(coarse, sine, [0.008, 0.02], refine=k, preconditioner="gmg",
                             **args)
    assert "patch" in ours.stats.preconditioner and ours.stats.nnz == 0
    assert "patch" not in stored.stats.preconditioner and stored.stats.nnz > 0
    assert "on patches" in repr(ours) and ours._mesh is None  # repr builds no mesh
    assert np.abs(ours.u - stored.u).max() <= 1e-8
    np.testing.assert_allclose(ours.energy().held_out, stored.energy().held_out, rtol=1e-7)
    assert ours.mesh.n_points == stored.mesh.n_points == ours.u.shape[1]
    assert ours.problem.mesh is ours.mesh
    probed = solve_transient(coarse, sine, [0.008], refine=k, probes=[[0.5, 0.5]], **args)
    timed = solve_transient(coarse, sine, [0.008], refine=k, dt=4e-3,
                            f=in_time(lambda x, y, t: 1.0 + t + 0 * x))
    assert probed.stats.nnz > 0 and timed.stats.nnz > 0


BAD = [float("nan"), float("inf"), -1.0, "hot", [1.0, 2.0], {"nowhere": 1.0}, object()]


@settings(max_examples=70, deadline=None)
@given(name=st.sampled_from(["capacity", "coefficient", "f", "dirichlet", "neumann", "u0", "dt",
                             "startup", "scheme", "lumped"]),
       bad=st.sampled_from(BAD))
def test_bad_values_on_the_patch_path_are_refused_by_name(name, bad):
    """Fuzzing: one bad argument of solve_transient(refine=k) with no preconditioner named is
    an InputError naming it, never a crash inside numpy or numba (the stored path may take
    the problem instead; it must refuse it just as clearly)."""
    args = dict(u0=0.5, dt=0.01, f=1.0, refine=2)
    if name in ("capacity", "coefficient") and bad == -1.0 or name == "neumann" and bad == -1.0:
        bad = float("nan") if name == "neumann" else bad  # a negative flux is valid
    if name == "f" and bad == -1.0 or name == "dirichlet" and bad == -1.0:
        return  # valid data
    if name == "u0" and bad == -1.0:
        return
    args[name] = bad
    u0 = args.pop("u0")
    with pytest.raises(InputError) as info:
        solve_transient(rectangle(2, 2), u0, [0.02], **args)
    text = str(info.value)
    named = {"f": ("f", "load"), "neumann": ("neumann", "boundary load")}.get(name, (name,))
    assert any(n in text for n in named), text


def test_the_finest_smoother_is_a_symmetric_positive_definite_preconditioner():
    """CG may take it as its preconditioner: the Chebyshev smoothing polynomial ``p`` of
    ``D^-1 A`` is positive on A's spectrum, so ``p(D^-1 A) D^-1`` is symmetric positive
    definite (common practice, no source); built here column by column on the free
    points."""
    from hatkernels.patches.multigrid import FinestSmoother

    coarse, k = rectangle(2, 2), 3
    layout = PatchLayout(coarse, k, held_sides=coarse.boundary_edges())
    P = PatchMultigrid(layout, np.ones(coarse.n_triangles),
                       sigma=np.full(coarse.n_triangles, 50.0))
    S = FinestSmoother(P)
    n = layout.size(k)
    free = np.flatnonzero(layout.zero_held(np.ones(n)))
    columns = []
    for i in free:
        e, z = np.zeros(n), np.empty(n)
        e[i] = 1.0
        S.apply_into(e, z)
        assert np.all(z[np.setdiff1d(np.arange(n), free)] == 0.0)  # held points stay 0
        columns.append(z[free])
    Smat = np.array(columns).T
    assert np.abs(Smat - Smat.T).max() <= 1e-13 * np.abs(Smat).max()
    assert np.linalg.eigvalsh(0.5 * (Smat + Smat.T)).min() > 0.0


def test_steps_the_smoother_finishes_keep_the_field_within_the_tolerance():
    """At the default rtol many steps after the start-up are finished by one CG iteration
    preconditioned by the finest level's smoother; the field stays within the tolerance of
    the theta scheme solved exactly with SciPy's sparse LU (Crank-Nicolson,
    ``M (u' - u) + h K (u' + u) / 2 = 0``, K. W. Morton and D. F. Mayers, 2005, ch. 2;
    value from memory)."""
    coarse, k, h, steps = rectangle(4, 4), 5, 1e-3, 24
    fine = refined(coarse, k)
    K, M = hk.assemble_stiffness(fine), hk.assemble_mass(fine)
    free = np.setdiff1d(np.arange(fine.n_points), fine.boundary_points())
    A = (M + 0.5 * h * K).tocsr()[free][:, free]
    B = (M - 0.5 * h * K).tocsr()[free][:, free]
    lu = spla.splu(A.tocsc())
    u = np.zeros(fine.n_points)
    u[free] = sine(*fine.points[free].T)
    ref = u.copy()
    for _ in range(steps):
        ref[free] = lu.solve(B @ ref[free])
    ours = march_on_patches(coarse, sine, [steps * h], dt=h, refine=k, startup=0)
    s = ours.stats
    finished = (s.smoother_iterations > 0) & (s.iterations == 0)
    assert finished.sum() >= steps // 4, (s.smoother_iterations, s.iterations)
    assert np.abs(ours.u[-1] - ref).max() <= 1e-5 * np.abs(ref).max()
