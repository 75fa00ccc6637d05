"""solve_transient: the theta scheme against analytic and textbook solutions, the heat balance,
time-dependent data, probes, the time series files, bad input.

Sources of the outside checks are named beside them.  Meshes stay small (at most
rectangle(64, 64), 4,225 points) and runs short (at most a few dozen steps).
"""

import math
import os
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from conftest import two_threads
from hypothesis import given
from hypothesis import strategies as st

import hatkernels
from hatkernels import InputError
from hatkernels.mesh import cuboid, rectangle
from hatkernels.transient import in_time, solve_transient
from hatkernels.transient_files import write_series
from hatkernels.transient_probes import locate


def sine(x, y):
    return np.sin(np.pi * x) * np.sin(np.pi * y)


# -- the cooling square: sin(pi x) sin(pi y) with u = 0 on the boundary -------------------


def amplification(z, theta):
    """The theta scheme's factor per step for ``u' = -lambda u``, ``z = dt lambda``:
    ``(1 - (1 - theta) z) / (1 + theta z)`` (K. W. Morton and D. F. Mayers, Numerical
    Solution of Partial Differential Equations, 2nd ed. 2005, ch. 2; value from memory)."""
    return (1.0 - (1.0 - theta) * z) / (1.0 + theta * z)


@pytest.mark.parametrize("scheme, theta", [("backward-euler", 1.0), ("crank-nicolson", 0.5)])
def test_decay_factor_per_step_is_the_amplification_of_the_discrete_eigenvalue(scheme, theta):
    # On the right-split square mesh the stiffness is the 5-point stencil and the lumped
    # mass is h^2 at an interior point, so the interpolant of sin(pi x) sin(pi y) is an
    # eigenvector with lambda_h = (4 - 4 cos(pi h)) / h^2 (the 5-point Laplacian's
    # eigenvalue: R. J. LeVeque, Finite Difference Methods for Ordinary and Partial
    # Differential Equations, 2007, section 3.4): each step multiplies it by
    # amplification(dt lambda_h).
    n, dt, steps = 16, 0.01, 8
    h = 1.0 / n
    lam = (4.0 - 4.0 * math.cos(math.pi * h)) / h**2
    sol = solve_transient(rectangle(n, n), sine, dt * np.arange(1, steps + 1), dt=dt,
                          scheme=scheme, lumped=True, rtol=1e-12)
    u0 = sine(*sol.mesh.points.T)
    inside = np.abs(u0) > 0.1
    fields = np.vstack([u0, sol.u])[:, inside]
    ratios = fields[1:] / fields[:-1]
    expected = np.full(steps, amplification(dt * lam, theta))
    if theta == 0.5:  # Rannacher's start-up: the first two steps as four half steps of BE
        expected[:2] = amplification(dt / 2 * lam, 1.0) ** 2
    assert np.abs(ratios - expected[:, None]).max() <= 1e-9
    assert sol.stats.converged and sol.stats.steps == steps + (2 if theta == 0.5 else 0)


@pytest.mark.parametrize("scheme, startup, order", [("backward-euler", 0, 1.0),
                                                    ("crank-nicolson", 0, 2.0),
                                                    ("crank-nicolson", 4, 2.0)])
def test_observed_order_in_time_against_the_decay_exp_minus_2_pi2_t(scheme, startup, order):
    # u = exp(-2 pi^2 t) sin(pi x) sin(pi y) solves u_t = Laplace u with u = 0 on the
    # boundary of the unit square (separation of variables: H. S. Carslaw and J. C.
    # Jaeger, Conduction of Heat in Solids, 2nd ed. 1959, section 5.4; value from memory).
    # h = 1/128 keeps the spatial error (about 4e-5 at t = 0.2) well below the time
    # errors of these steps (1e-3 and more); smooth data need no start-up, and with it
    # the order stays 2.
    mesh = rectangle(128, 128)
    centre = np.flatnonzero(np.all(np.isclose(mesh.points, 0.5, rtol=0, atol=1e-12), axis=1))
    T = 0.2
    errors = []
    for dt in (0.04, 0.02):
        sol = solve_transient(mesh, sine, [T], dt=dt, scheme=scheme, startup=startup,
                              rtol=1e-10)
        errors.append(abs(sol.u[0, centre[0]] - math.exp(-2 * math.pi**2 * T)))
    rate = math.log2(errors[0] / errors[1])
    assert abs(rate - order) < 0.15, rate


def test_iterations_per_step_are_few_and_do_not_grow_with_the_mesh():
    # multigrid's iterations are bounded independently of h (textbook multigrid
    # behaviour; W. Hackbusch, Multi-Grid Methods and Applications, 1985; value from
    # memory); warm-started, each step needs only a few
    worst = []
    for n in (32, 64):
        sol = solve_transient(rectangle(n, n), sine, [0.025], dt=0.0025)
        it = sol.stats.iterations
        assert sol.stats.converged and it.size == 12
        worst.append(int(it[4:].max()))  # after the start-up
    assert max(worst) <= 6 and worst[1] <= worst[0] + 1, worst


# -- the slab: a thin strip cooled from both faces -----------------------------------------


def slab_series(x, t, L=1.0, alpha=1.0, terms=400):
    """u / u_initial in a slab 0 < x < L at u_initial, faces held at 0 from t = 0:
    sum over odd n of (4 / (n pi)) sin(n pi x / L) exp(-n^2 pi^2 alpha t / L^2)
    (H. S. Carslaw and J. C. Jaeger, Conduction of Heat in Solids, 2nd ed. 1959,
    section 3.3, eq. (5); value from memory)."""
    n = np.arange(1, 2 * terms, 2)[:, None]
    return (4 / (n * np.pi) * np.sin(n * np.pi * x / L)
            * np.exp(-(n * np.pi / L) ** 2 * alpha * t)).sum(axis=0)


def slab(n=80):
    """A strip 1 long and 1/n wide: one row of cells, faces x = 0 and x = 1."""
    m = rectangle(n, 1, bounds=(0.0, 1.0, 0.0, 1.0 / n))
    faces = np.flatnonzero((m.points[:, 0] == 0.0) | (m.points[:, 0] == 1.0))
    return m, faces


def test_slab_cooled_from_both_faces_follows_the_series_solution():
    m, faces = slab()
    times = [0.01, 0.05, 0.2]
    k, rho_c = 2.0, 4.0  # diffusivity alpha = k / (rho c) = 0.5
    sol = solve_transient(m, 1.0, times, dt=0.001, capacity=rho_c, coefficient=k,
                          dirichlet_on=faces)
    x = m.points[:, 0]
    for row, t in zip(sol.u, times, strict=True):
        exact = slab_series(x, t, alpha=k / rho_c)
        exact[np.isin(np.arange(m.n_points), faces)] = 0.0
        assert np.abs(row - exact).max() < 2e-3, t


def test_rannacher_start_up_damps_crank_nicolson_oscillations():
    # u0 = 1 against faces held at 0 is non-smooth data: without the start-up the rough
    # modes (amplification near -1 for long steps) survive and oscillate; with it they
    # are damped (Rannacher 1984; Luskin and Rannacher 1982).  Long steps: dt lambda_max
    # is about 140 for the finest mode.
    m, faces = slab(60)
    x = m.points[:, 0]
    exact = slab_series(x, 0.1)
    exact[np.isin(np.arange(m.n_points), faces)] = 0.0
    errors = {}
    for startup in (0, 4):
        sol = solve_transient(m, 1.0, [0.1], dt=0.01, dirichlet_on=faces, startup=startup)
        errors[startup] = np.abs(sol.u[0] - exact).max()
    assert errors[0] > 0.015 and errors[4] < 0.004 and errors[4] < errors[0] / 5, errors


# -- the heat balance -------------------------------------------------------------------------


def test_heat_out_of_the_cooling_square_matches_the_analytic_flow():
    # int sin(pi x) sin(pi y) over the unit square is 4 / pi^2, so the heat that leaves
    # by t is (4 / pi^2)(1 - exp(-2 pi^2 t)) (integral of the exact solution above);
    # smooth data, so plain Crank-Nicolson (its errors here: h^2 and dt^2, about 1e-4)
    times = np.array([0.02, 0.05, 0.1])
    sol = solve_transient(rectangle(48, 48), sine, times, dt=0.005, startup=0, rtol=1e-10)
    e = sol.energy()
    gone = np.cumsum(e.held_out)
    exact = 4 / np.pi**2 * (1 - np.exp(-2 * np.pi**2 * times))
    assert np.abs(gone - exact).max() < 1e-3 * exact[-1]
    assert np.allclose(-np.cumsum(e.stored), gone, rtol=1e-8, atol=0)
    assert e.relative < 1e-8 and np.all(e.sources == 0) and np.all(e.absorbed == 0)


def test_insulated_body_stores_every_joule_of_its_source():
    # first law: with no flow out, the heat stored is what the source put in, and the
    # mean temperature rises by f t / (rho c) (common practice, no source)
    m = rectangle(12, 8, bounds=(0.0, 2.0, 0.0, 1.0))
    f = lambda x, y: 3.0 + x * y  # noqa: E731
    sol = solve_transient(m, 0.0, [0.5, 1.0], dt=0.1, capacity=2.5, f=f, neumann=0.0)
    e = sol.energy()
    source_rate = hatkernels.assemble_load(m, f).sum()  # int f by the same quadrature
    assert np.allclose(e.sources, 0.5 * source_rate, rtol=1e-12, atol=0)
    assert np.allclose(e.stored, e.sources, rtol=1e-9, atol=0)
    mean_rise = hatkernels.assemble_load(m, 1.0) @ sol.u[-1] / 2.0
    assert mean_rise == pytest.approx(1.0 * source_rate / 2.0 / 2.5, rel=1e-9, abs=0)
    assert np.all(e.held_out == 0) and e.relative < 1e-9


def test_balance_with_convection_reaction_and_flux_adds_up():
    m = rectangle(16, 16)
    sol = solve_transient(m, 20.0, [0.1, 0.3], dt=0.02, capacity=3.0, reaction=0.5,
                          robin=(10.0, 10.0 * 5.0), f=1.0, rtol=1e-11)
    e = sol.energy()
    assert e.relative < 1e-8 and np.all(e.convection_out > 0) and np.all(e.absorbed > 0)
    left = np.flatnonzero(m.points[:, 0] == 0.0)
    sol = solve_transient(m, 0.0, [0.1, 0.2], dt=0.02, dirichlet_on=left,
                          neumann=in_time(lambda x, y, t: 0.0 * x + 2.0 + t), rtol=1e-11)
    e = sol.energy()
    assert e.relative < 1e-8 and np.all(e.flux_in > 0)


# -- time-dependent data: exact for fields linear in space -------------------------------------


def test_time_dependent_held_values_and_source_are_met_exactly():
    # u = 2 t + x - y solves u_t - Laplace u = 2; P1 and both schemes reproduce it exactly
    # (linear in space and time; common practice, no source)
    m = rectangle(10, 10)
    exact = lambda x, y, t: 2.0 * t + x - y  # noqa: E731
    for scheme in ("backward-euler", "crank-nicolson"):
        sol = solve_transient(m, lambda x, y: x - y, [0.05, 0.1], dt=0.02, scheme=scheme,
                              f=2.0, dirichlet=in_time(exact), rtol=1e-12)
        for row, t in zip(sol.u, sol.times, strict=True):
            assert np.abs(row - exact(*m.points.T, t)).max() < 1e-10


def test_held_values_and_sources_in_time_given_per_tag_and_region():
    # u = 2 t + x on the unit square: held on the tagged left and right sides, the
    # others insulated (du/dn = 0 there), f = 2 given per region, in time on one of
    # them; exact for P1 and both schemes (common practice, no source)
    from hatkernels.mesh.tags import label_cells, label_sides

    m = label_sides(rectangle(8, 8), {"left": lambda x, y: x == 0.0,
                                      "right": lambda x, y: x == 1.0})
    m = label_cells(m, {"west": lambda x, y: x < 0.5, "east": lambda x, y: x == x})
    held = {"left": in_time(lambda x, y, t: 2 * t + 0 * x),
            "right": in_time(lambda x, y, t: 2 * t + 1 + 0 * x)}
    f = {"west": 2.0, "east": in_time(lambda x, y, t: 2.0 + 0 * x * t)}
    for scheme in ("backward-euler", "crank-nicolson"):
        sol = solve_transient(m, lambda x, y: x, [0.05, 0.1], dt=0.025, scheme=scheme,
                              dirichlet=held, f=f, rtol=1e-12)
        for row, t in zip(sol.u, sol.times, strict=True):
            assert np.abs(row - (2 * t + m.points[:, 0])).max() < 1e-10
        e = sol.energy()
        assert e.relative < 1e-9 and np.allclose(e.sources, 2.0 * 0.05, rtol=1e-12, atol=0)


def test_crank_nicolson_is_exact_for_a_quadratic_in_time_with_flux_and_convection():
    # u = t^2 + t x: u_t - Laplace u = 2 t + x; kappa du/dn = t on x = 1, -t on x = 0;
    # on y = 0 and 1 convection du/dn + r u = s with s = r u (du/dn = 0 there).  Crank-
    # Nicolson's trapezoidal rule is exact for data linear in time and u quadratic
    # (common practice, no source).  Nothing is held: the capacity makes it well posed.
    m = rectangle(8, 8)
    u = lambda x, y, t: t * t + t * x  # noqa: E731
    r = 3.0
    edges = m.boundary_edges()
    mid = m.points[edges].mean(axis=1)
    vertical = np.isclose(mid[:, 0], 0.0) | np.isclose(mid[:, 0], 1.0)
    flux = in_time(lambda x, y, t: t * np.where(x > 0.5, 1.0, -1.0))
    load = in_time(lambda x, y, t: r * u(x, y, t))
    sol = solve_transient(m, 0.0, [0.1, 0.3], dt=0.05, startup=0,
                          f=in_time(lambda x, y, t: 2 * t + x),
                          neumann=(edges[vertical], flux), robin=(edges[~vertical], r, load),
                          rtol=1e-12)
    for row, t in zip(sol.u, sol.times, strict=True):
        assert np.abs(row - u(*m.points.T, t)).max() < 1e-9
    assert sol.energy().relative < 1e-9


def test_tetrahedra_cooling_cube_decays_like_exp_minus_3_pi2_t():
    # sin(pi x) sin(pi y) sin(pi z) decays like exp(-3 pi^2 t) (separation of variables)
    m = cuboid(12, 12, 12)
    f0 = lambda x, y, z: np.sin(np.pi * x) * np.sin(np.pi * y) * np.sin(np.pi * z)  # noqa: E731
    sol = solve_transient(m, f0, [0.02], dt=0.002)
    centre = np.flatnonzero(np.all(np.isclose(m.points, 0.5, rtol=0, atol=1e-12), axis=1))[0]
    assert sol.u[0, centre] == pytest.approx(math.exp(-3 * math.pi**2 * 0.02), rel=0.03, abs=0)


# -- probes, outputs, stats -------------------------------------------------------------------


def test_probes_follow_the_field_without_storing_it():
    m = rectangle(16, 16)
    pts = np.array([[0.5, 0.5], [0.3, 0.7], [1.0, 0.2]])
    kept = pts.copy()
    sol = solve_transient(m, sine, [0.01, 0.02], dt=0.005, probes=pts)
    assert np.array_equal(pts, kept)
    assert sol.probe_values.shape == (sol.stats.steps + 1, 3)
    p = locate(m, pts)
    for row, t in zip(sol.u, sol.times, strict=True):
        k = int(np.flatnonzero(np.isclose(sol.probe_times, t, rtol=0, atol=1e-15))[0])
        assert np.allclose(sol.probe_values[k], p.values(row), rtol=1e-14, atol=1e-15)
    assert np.all(sol.probe_values[1:, 2] == 0.0)  # on the held boundary
    linear = m.points[:, 0] + 2 * m.points[:, 1]
    assert np.allclose(p.values(linear), pts[:, 0] + 2 * pts[:, 1], rtol=1e-13, atol=0)


def test_output_at_time_zero_is_u0_and_stats_report_cost():
    m = rectangle(12, 12)
    u0 = sine(*m.points.T) + 0.25
    keep = u0.copy()
    sol = solve_transient(m, u0, [0.0, 0.03], dt=0.01, scheme="backward-euler")
    assert np.array_equal(sol.u[0], u0) and np.array_equal(u0, keep)
    s = sol.stats
    assert s.steps == 3 and s.iterations.shape == (3,) and s.systems == 1
    assert np.all(np.isfinite(s.work_units))  # each step's cost in products is reported
    assert s.unknowns == 121 and "backward-euler" in s.scheme
    assert "caution" in sol.caution.lower()


def test_step_sizes_share_systems_and_refine_numbers_like_mesh_refine():
    m = rectangle(4, 4)
    # intervals of 0.1 and 0.25 with dt = 0.05: steps of 0.05 in both (one system)
    sol = solve_transient(m, 1.0, [0.1, 0.35], dt=0.05, refine=1, scheme="backward-euler")
    assert sol.stats.systems == 1 and sol.u.shape == (2, m.refine().n_points)
    sol = solve_transient(m, 1.0, [0.1, 0.17], dt=0.05, scheme="backward-euler")
    assert sol.stats.systems == 2  # 0.07 = 2 steps of 0.035
    # three step sizes, two systems kept at a time: the third interval's is built anew,
    # and u = 2 t + x - y (f = 2) is still met exactly (common practice, no source)
    exact = lambda x, y, t: 2.0 * t + x - y  # noqa: E731
    sol = solve_transient(m, lambda x, y: x - y, [0.1, 0.17, 0.3, 0.4], dt=0.05, f=2.0,
                          dirichlet=in_time(exact), scheme="backward-euler", rtol=1e-12)
    assert sol.stats.systems == 4  # 0.05, 0.035, 0.065, then 0.05 again
    for row, t in zip(sol.u, sol.times, strict=True):
        assert np.abs(row - exact(*m.points.T, t)).max() < 1e-10


@two_threads
def test_same_bits_on_one_and_two_threads():
    m = rectangle(100, 100)

    def run(n):
        with hatkernels.threads(n):
            return solve_transient(m, sine, [0.01, 0.02], dt=0.005, probes=[[0.4, 0.4]])

    one, two = run(1), run(2)
    assert np.array_equal(one.u, two.u) and np.array_equal(one.probe_values, two.probe_values)
    assert np.array_equal(one.stats.iterations, two.stats.iterations)


def test_time_series_files_are_a_vtk_collection(tmp_path):
    meshio = pytest.importorskip("meshio", reason="meshio (the io extra) is not installed")
    m = rectangle(6, 6)
    sol = solve_transient(m, sine, [0.0, 0.01, 0.02], dt=0.01)
    pvd = write_series(tmp_path / "run", sol)
    root = ET.parse(pvd).getroot()
    sets = root.find("Collection").findall("DataSet")
    assert root.get("type") == "Collection"
    assert [float(d.get("timestep")) for d in sets] == [0.0, 0.01, 0.02]
    for k, d in enumerate(sets):
        back = meshio.read(os.path.join(os.path.dirname(pvd), d.get("file")))
        assert np.array_equal(back.point_data["u"], sol.u[k])
    with pytest.raises(InputError, match="exists"):
        write_series(tmp_path / "run", sol)
    write_series(tmp_path / "run", sol, force=True)
    still = solve_transient(m, sine, [0.0], dt=0.01)  # no step at all
    assert still.stats.steps == 0 and np.array_equal(still.u[0], sine(*m.points.T))
    write_series(tmp_path / "still", still)


def test_time_series_is_written_whole_or_not_at_all(tmp_path, monkeypatch):
    pytest.importorskip("meshio", reason="meshio (the io extra) is not installed")
    import hatkernels.transient_files as tf

    sol = solve_transient(rectangle(4, 4), 1.0, [0.01, 0.02], dt=0.01)
    calls = []
    original = tf.write_vtu

    def failing(path, mesh, data):
        calls.append(path)
        if len(calls) == 2:
            raise OSError("disk full")
        return original(path, mesh, data)

    monkeypatch.setattr(tf, "write_vtu", failing)
    with pytest.raises(OSError, match="disk full"):
        write_series(tmp_path / "run", sol)
    assert os.listdir(tmp_path) == []


# -- bad input ----------------------------------------------------------------------------------


@pytest.mark.parametrize("kwargs, message", [
    ({"dt": 0.0}, r"dt must be > 0"),
    ({"dt": float("nan")}, r"dt must be a finite number"),
    ({"times": [0.1, 0.1]}, r"times\[1\] = 0.1 does not come after times\[0\]"),
    ({"times": [-0.1, 0.2]}, r"times\[0\] is -0.1"),
    ({"times": []}, r"non-empty"),
    ({"u0": np.ones(7)}, r"u0 has shape \(7,\)"),
    ({"u0": lambda x, y: np.where(x > 0.5, np.nan, 0.0)}, r"u0\(x, y\) is nan at point \d+"),
    ({"capacity": np.r_[np.ones(10), -1.0, np.ones(21)]}, r"capacity is -1.0 at triangle 10"),
    ({"probes": [[0.5, 0.5], [1.5, 0.5]]}, r"probes\[1\] at \(1.5, 0.5\) is outside the mesh"),
    ({"coefficient": in_time(lambda x, y, t: 1 + t)}, r"coefficient cannot change in time"),
    ({"robin": (in_time(lambda x, y, t: t), 1.0)}, r"robin r .* cannot change in time"),
    ({"f": lambda x, y, t: t}, r"f takes 3 arguments.*in_time"),
    ({"scheme": "leapfrog"}, r"unknown scheme 'leapfrog'"),
    ({"startup": 3}, r"startup must be even"),
    ({"preconditioner": np.eye(3)}, r"preconditioner must be a name"),
    ({"preconditioner": "nonesuch"}, r"unknown preconditioner 'nonesuch'"),
])
def test_bad_input_is_named(kwargs, message):
    m = rectangle(4, 4)
    args = {"u0": 1.0, "times": [0.1], "dt": 0.05, **kwargs}
    with pytest.raises(InputError, match=message):
        solve_transient(m, args.pop("u0"), args.pop("times"), **args)


def test_data_that_fail_in_time_name_the_time():
    m = rectangle(4, 4)
    g = in_time(lambda x, y, t: np.where(t > 0.05, np.inf, 0.0) + 0 * x)
    with pytest.raises(InputError, match=r"dirichlet is inf at .* at t = 0.1"):
        solve_transient(m, 0.0, [0.1], dt=0.05, dirichlet=g, scheme="backward-euler")


@given(times=st.lists(st.one_of(st.floats(-0.2, 0.4),
                                st.sampled_from([math.nan, math.inf, -math.inf])),
                      min_size=0, max_size=4),
       dt=st.one_of(st.floats(0.05, 0.5), st.floats(-0.5, 0.0),
                    st.sampled_from([math.nan, math.inf, -math.inf])))
def test_fuzzed_times_and_steps_work_or_raise_input_error(times, dt):
    m = rectangle(3, 3)
    try:
        sol = solve_transient(m, 1.0, times, dt=dt, scheme="backward-euler")
    except InputError:
        return
    assert sol.u.shape == (len(times), m.n_points) and np.isfinite(sol.u).all()


def test_a_march_whose_every_point_is_held_is_refused_by_name():
    m = rectangle(1, 1)
    with pytest.raises(InputError, match="every one of the 4 points is held"):
        hatkernels.solve_transient(m, 0.0, [0.1], dt=0.05, dirichlet=2.0)
