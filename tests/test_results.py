"""Results by region and boundary part (hatkernels.results) against heat-transfer handbook
cases, independent integrals and the conservation of the discrete equations."""

import json

import numpy as np
import pytest
from conftest import EPS
from hypothesis import given
from hypothesis import strategies as st

import hatkernels
from hatkernels.distributed.solve import DistributedPoissonSolution
from hatkernels.errors import InputError
from hatkernels.mesh import cuboid, rectangle
from hatkernels.mesh.tags import label_cells, label_sides
from hatkernels.results import balance

# -- composite wall: two materials in series --------------------------------------------

T_HOT, T_COLD = 100.0, 20.0
L1, L2, K1, K2 = 0.4, 0.6, 2.0, 0.5  # the interface x = 0.4 is a mesh line of every mesh here


def wall(mesh):
    """Regions "inner" (x < L1) and "outer", boundary tags "hot" (x = 0), "cold" (x = L1 + L2)
    and "faces" (the rest: insulated)."""
    dim = mesh.dim
    end = L1 + L2
    mesh = label_cells(mesh, {"inner": lambda x, *_: x < L1, "outer": lambda x, *_: x >= L1})
    return label_sides(mesh, {"hot": lambda x, *_: x < 1e-12,
                              "cold": lambda x, *_: x > end - 1e-12,
                              "faces": lambda x, *r: np.ones_like(x, dtype=bool)}), dim


def wall_solution(x, q):
    """Temperature at ``x`` for the heat flux ``q`` (W/m^2) through the wall from T_HOT."""
    inner = T_HOT - q * x / K1
    return np.where(x < L1, inner, T_HOT - q * L1 / K1 - q * (x - L1) / K2)


WALLS = {"2d": lambda: rectangle(10, 3, bounds=(0.0, 1.0, 0.0, 0.5)),
         "3d": lambda: cuboid(5, 2, 2, bounds=(0.0, 1.0, 0.0, 0.5, 0.0, 0.5))}
END_AREA = {"2d": 0.5, "3d": 0.25}  # height in 2-D (per metre of thickness), area in 3-D

# the solution is piecewise linear with its kink on a mesh line, so P1 holds it exactly; a
# direct solve leaves round-off of the order of the condition number of these small systems
# (below 1e3) times eps, in units of the temperature difference
ROUND_OFF = 1e3 * EPS


@pytest.mark.parametrize("case", sorted(WALLS))
def test_composite_wall_held_ends(case):
    mesh, _ = wall(WALLS[case]())
    sol = hatkernels.solve_poisson(mesh, 0.0, coefficient={"inner": K1, "outer": K2},
                                   dirichlet={"hot": T_HOT, "cold": T_COLD},
                                   preconditioner="direct", rtol=1e-13)
    # thermal resistances in series: q = dT / (L1/k1 + L2/k2) (F. P. Incropera and D. P.
    # DeWitt, Fundamentals of Heat and Mass Transfer, 6th ed. 2007, section 3.1)
    q = (T_HOT - T_COLD) / (L1 / K1 + L2 / K2)
    exact = wall_solution(mesh.points[:, 0], q)
    assert np.abs(sol.u - exact).max() <= ROUND_OFF * (T_HOT - T_COLD)
    b = balance(sol)
    parts = {p.label.split(" ")[0]: p for p in b.boundary}
    assert [p.tag for p in b.boundary] == [1, 2, 3]  # every tag, no untagged entry
    heat = q * END_AREA[case]
    assert parts["cold"].outflow == pytest.approx(heat, rel=ROUND_OFF, abs=0)
    assert parts["hot"].outflow == pytest.approx(-heat, rel=ROUND_OFF, abs=0)
    assert (parts["hot"].condition, parts["cold"].condition) == ("held", "held")
    assert parts["faces"].condition == "insulated" and parts["faces"].outflow == 0.0
    assert parts["cold"].u_mean == pytest.approx(T_COLD, rel=ROUND_OFF, abs=0)
    assert parts["cold"].measure == pytest.approx(END_AREA[case], rel=10 * EPS, abs=0)
    inner, outer = b.regions
    t_i = T_HOT - q * L1 / K1  # the interface temperature
    # the mean of a linear profile is the mean of its ends (common practice, no source)
    assert inner.u_mean == pytest.approx((T_HOT + t_i) / 2, rel=ROUND_OFF, abs=0)
    assert outer.u_mean == pytest.approx((t_i + T_COLD) / 2, rel=ROUND_OFF, abs=0)
    assert (inner.u_min, outer.u_max) == pytest.approx((t_i, t_i), rel=ROUND_OFF, abs=0)
    assert inner.measure == pytest.approx(L1 * END_AREA[case], rel=10 * EPS, abs=0)
    assert b.sources == 0.0 and b.absorbed == 0.0
    assert abs(b.imbalance) <= ROUND_OFF * heat


@pytest.mark.parametrize("case", sorted(WALLS))
def test_composite_wall_convective_end(case):
    film, ambient = 4.0, T_COLD
    mesh, _ = wall(WALLS[case]())
    sol = hatkernels.solve_poisson(mesh, 0.0, coefficient={"inner": K1, "outer": K2},
                                   dirichlet={"hot": T_HOT}, robin={"cold": (film, film * ambient)},
                                   preconditioner="direct", rtol=1e-13)
    # a film in series with the two layers: q = dT / (L1/k1 + L2/k2 + 1/h) (Incropera and
    # DeWitt 2007, section 3.1, thermal resistances in series)
    q = (T_HOT - ambient) / (L1 / K1 + L2 / K2 + 1 / film)
    assert np.abs(sol.u - wall_solution(mesh.points[:, 0], q)).max() <= ROUND_OFF * T_HOT
    b = balance(sol)
    hot, cold, faces = b.boundary
    heat = q * END_AREA[case]
    assert cold.condition == "convection"
    assert cold.outflow == pytest.approx(heat, rel=ROUND_OFF, abs=0)
    assert hot.outflow == pytest.approx(-heat, rel=ROUND_OFF, abs=0)
    # the surface sits q / h above the ambient (Newton's law of cooling, same source)
    assert cold.u_mean == pytest.approx(ambient + q / film, rel=ROUND_OFF, abs=0)
    assert faces.outflow == 0.0 and abs(b.imbalance) <= ROUND_OFF * heat


# -- a fin: conduction along a strip, convection from its faces --------------------------

FIN_L, FIN_W, FIN_K, FIN_H, FIN_T = 0.1, 0.01, 200.0, 25.0, 0.002  # metres, W/(m K), W/(m^2 K)
T_BASE, T_AIR = 100.0, 20.0
C = 2 * FIN_H / FIN_T  # the faces' film per unit volume of the plate (both faces)
M_FIN = np.sqrt(C / FIN_K)


def fin(nx, tip=None):
    mesh = label_sides(rectangle(nx, 2, bounds=(0.0, FIN_L, 0.0, FIN_W)),
                       {"base": lambda x, y: x < 1e-12, "tip": lambda x, y: x > FIN_L - 1e-12})
    robin = None if tip is None else {"tip": (tip, tip * T_AIR)}
    sol = hatkernels.solve_poisson(mesh, C * T_AIR, coefficient=FIN_K, reaction=C,
                                   dirichlet={"base": T_BASE}, robin=robin, rtol=1e-12)
    on_line = np.isclose(mesh.points[:, 1], FIN_W / 2)  # the centre line is a mesh line
    return sol, mesh.points[on_line, 0], sol.u[on_line]


def test_fin_with_insulated_tip():
    # theta / theta_b = cosh(m (L - x)) / cosh(m L), m^2 = h P / (k A_c) = 2 h / (k t), fin
    # heat rate M tanh(m L), M = sqrt(h P k A_c) theta_b (Incropera and DeWitt 2007, section
    # 3.6.2, table 3.4 case B, adiabatic tip); per metre of thickness in our 2-D model, so the
    # rate is times t, with P = 2 w and A_c = w t
    theta_b = T_BASE - T_AIR
    rate = FIN_W * np.sqrt(2 * FIN_H * FIN_K * FIN_T) * theta_b * np.tanh(M_FIN * FIN_L)
    errors, rate_errors = [], []
    for nx in (10, 20, 40):
        sol, x, u = fin(nx)
        exact = T_AIR + theta_b * np.cosh(M_FIN * (FIN_L - x)) / np.cosh(M_FIN * FIN_L)
        errors.append(np.abs(u - exact).max() / theta_b)
        b = balance(sol)
        base, tip = b.boundary
        assert (base.condition, tip.condition, tip.outflow) == ("held", "insulated", 0.0)
        # what enters at the base is what the faces give off, to the solver's residual
        assert -base.outflow == pytest.approx(b.absorbed - b.sources, rel=1e-9, abs=0)
        rate_errors.append(abs(-base.outflow * FIN_T / rate - 1))
    # P1 on a smooth solution: O(h^2) (common practice, no source), measured 4.01 and 4.01
    ratios = np.array(errors[:-1]) / errors[1:]
    assert np.all((3.8 < ratios) & (ratios < 4.2)), ratios
    assert errors[-1] < 2e-5  # measured 1.7e-5
    rate_ratios = np.array(rate_errors[:-1]) / rate_errors[1:]
    assert np.all((3.8 < rate_ratios) & (rate_ratios < 4.2)), rate_ratios
    assert rate_errors[-1] < 1e-4  # measured 4.8e-5


def test_fin_with_convective_tip():
    # theta / theta_b = (cosh m(L-x) + (h/mk) sinh m(L-x)) / (cosh mL + (h/mk) sinh mL), rate
    # M (sinh mL + (h/mk) cosh mL) / (cosh mL + (h/mk) sinh mL) (Incropera and DeWitt 2007,
    # table 3.4 case A, convection from the tip)
    theta_b, a = T_BASE - T_AIR, FIN_H / (M_FIN * FIN_K)
    mL = M_FIN * FIN_L
    below = np.cosh(mL) + a * np.sinh(mL)
    rate = (FIN_W * np.sqrt(2 * FIN_H * FIN_K * FIN_T) * theta_b
            * (np.sinh(mL) + a * np.cosh(mL)) / below)
    errors = []
    for nx in (20, 40):
        sol, x, u = fin(nx, tip=FIN_H)
        s = M_FIN * (FIN_L - x)
        exact = T_AIR + theta_b * (np.cosh(s) + a * np.sinh(s)) / below
        errors.append(np.abs(u - exact).max() / theta_b)
    b = balance(sol)
    base, tip = b.boundary
    assert tip.condition == "convection" and tip.outflow > 0
    assert -base.outflow * FIN_T == pytest.approx(rate, rel=1e-4, abs=0)  # discretisation: 5e-5
    assert -base.outflow == pytest.approx(b.absorbed - b.sources + tip.outflow, rel=1e-9, abs=0)
    assert 3.8 < errors[0] / errors[1] < 4.2, errors  # O(h^2), common practice, no source


# -- tagged meshes read from files written by meshio ---------------------------------------


@pytest.fixture(scope="module")
def meshio():
    return pytest.importorskip("meshio", reason="meshio (the io extra) is not installed")


def _boundary_tags(points, sides):
    """Tags of boundary sides by their centres: 11 on x = 0, 12 on x = 1, 13 on the top
    (y = 1 in 2-D, z = 1 in 3-D), 14 on y = 0 in 3-D; 0 for the rest."""
    c = points[sides].mean(axis=1)
    top = c[:, -1] > 1 - 1e-9
    out = np.select([c[:, 0] < 1e-9, c[:, 0] > 1 - 1e-9, top], [11, 12, 13], 0)
    if points.shape[1] == 3:
        out[(out == 0) & (c[:, 1] < 1e-9)] = 14
    return out


def _written(meshio, tmp_path, mesh):
    """``mesh`` written as VTU by meshio with regions 1 (x < 1/2) and 2 and tagged boundary
    sides (untagged ones left out of the side block), then read back by hatkernels; also the
    arrays written."""
    points = mesh.points
    cells = mesh.cells
    regions = np.where(points[cells].mean(axis=1)[:, 0] < 0.5, 1, 2)
    sides = mesh.boundary_edges() if mesh.dim == 2 else mesh.boundary_faces()
    tags = _boundary_tags(points, sides)
    # an interface line between the regions too: a mesher's file may hold one, and it is dropped
    kinds = ("triangle", "line") if mesh.dim == 2 else ("tetra", "triangle")
    xyz = points if mesh.dim == 3 else np.column_stack([points, np.zeros(len(points))])
    m = meshio.Mesh(xyz, [(kinds[0], cells), (kinds[1], sides[tags > 0])],
                    cell_data={"tags": [regions, tags[tags > 0]]})  # VTU keeps no names
    path = tmp_path / f"tagged{mesh.dim}.vtu"
    meshio.write(path, m)
    from hatkernels.io import read_mesh

    return read_mesh(path), regions


def _independent_region_figures(mesh, u, regions):
    """Per region: measure, integral of u and range, with numpy alone (cell measures from
    cross products or determinants, the exact P1 integral |T| * mean of the vertex values)."""
    p = mesh.points[mesh.cells]
    edges = p[:, 1:] - p[:, :1]
    if mesh.dim == 2:
        size = np.abs(edges[:, 0, 0] * edges[:, 1, 1] - edges[:, 0, 1] * edges[:, 1, 0]) / 2
    else:
        size = np.abs(np.linalg.det(edges)) / 6
    out = {}
    for r in (1, 2):
        sel = regions == r
        out[r] = (size[sel].sum(), (size[sel] * u[mesh.cells[sel]].mean(axis=1)).sum(),
                  u[mesh.cells[sel]].min(), u[mesh.cells[sel]].max())
    return out


def _check_regions(b, mesh, u, regions, f):
    ref = _independent_region_figures(mesh, u, regions)
    for r in b.regions:
        measure, integral, low, high = ref[r.tag]
        assert r.cells == int((regions == r.tag).sum())
        assert r.measure == pytest.approx(measure, rel=50 * EPS, abs=0)
        assert r.u_mean == pytest.approx(integral / measure, rel=100 * EPS, abs=0)
        assert (r.u_min, r.u_max) == (low, high)
        # the source is f times the region's measure (exact data, common practice, no source)
        assert r.source == pytest.approx(f.get(r.tag, 0.0) * measure, rel=100 * EPS, abs=1e-300)
    assert [r.label for r in b.regions] == ["1", "2"]


def test_balance_on_a_tagged_file_mesh_2d(meshio, tmp_path):
    mesh, regions = _written(meshio, tmp_path, rectangle(8, 8))
    assert set(mesh.tags.boundary_tags().tolist()) == {11, 12, 13}
    f = {1: 5.0}
    sol = hatkernels.solve_poisson(mesh, f, coefficient={1: 1.0, 2: 3.0},
                                   dirichlet={11: 0.0}, robin={12: (2.0, 1.0)},
                                   neumann={13: -0.5}, rtol=1e-12)
    b = balance(sol)
    _check_regions(b, mesh, sol.u, regions, f)
    assert b.relative <= 1e-9
    hot, film, top = b.boundary
    assert (hot.label, film.label, top.label) == ("11", "12", "13")
    assert [p.condition for p in b.boundary] == ["held", "convection", "flux"]
    assert top.outflow == pytest.approx(0.5 * 1.0, rel=10 * EPS, abs=0)  # -h times the length
    # int (r u - s) over x = 1 by the trapezoid rule, exact for u linear on each edge
    # (common practice, no source)
    on = np.flatnonzero(np.isclose(mesh.points[:, 0], 1.0))
    y, v = mesh.points[on, 1], sol.u[on]
    order = np.argsort(y)
    assert film.outflow == pytest.approx(2.0 * np.trapezoid(v[order], y[order]) - 1.0,
                                         rel=100 * EPS, abs=0)
    assert film.measure == pytest.approx(1.0, rel=10 * EPS, abs=0)


@pytest.mark.parametrize("quadrature", [1, 2])
def test_balance_on_a_tagged_file_mesh_3d(meshio, tmp_path, quadrature):
    mesh, regions = _written(meshio, tmp_path, cuboid(3, 3, 3))
    assert set(mesh.tags.boundary_tags().tolist()) == {11, 12, 13, 14}
    film = 1.0 + mesh.points[:, 1]  # a film per point on one tag and a constant on another:
    # the solve merges them into one field evaluated at quadrature points
    f = {2: -2.0}
    sol = hatkernels.solve_poisson(mesh, f, coefficient={1: 2.0, 2: 0.5}, reaction={1: 0.3},
                                   dirichlet={11: 1.0}, robin={12: (film, 0.5), 13: (0.5, 0.0)},
                                   neumann={14: 0.25}, rtol=1e-12, quadrature=quadrature)
    b = balance(sol)
    _check_regions(b, mesh, sol.u, regions, f)
    assert b.relative <= 1e-9
    assert b.regions[1].absorbed == 0.0 and b.regions[0].absorbed > 0
    assert [p.condition for p in b.boundary] == ["held", "convection", "convection", "flux"]
    assert b.boundary[3].outflow == pytest.approx(-0.25, rel=10 * EPS, abs=0)  # -h times area
    # int r u over the top faces with r = 1/2: area times the mean of the corner values on
    # each face, exact for u linear on it (common practice, no source)
    top = mesh.tags.sides_of([13])
    p = mesh.points[top]
    area = np.linalg.norm(np.cross(p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]), axis=1) / 2
    expected = 0.5 * (area * sol.u[top].mean(axis=1)).sum()
    assert b.boundary[2].outflow == pytest.approx(expected, rel=100 * EPS, abs=0)


# -- meshes without tags; the legacy whole-boundary condition --------------------------


@pytest.mark.parametrize("make", [lambda: rectangle(32, 32), lambda: cuboid(4, 4, 4)],
                         ids=["2d", "3d"])
def test_without_tags(make):
    mesh = make()
    sol = hatkernels.solve_poisson(mesh, 1.0, rtol=1e-12)
    b = balance(sol)
    (region,), (held,) = b.regions, b.boundary
    assert (region.tag, region.label, region.cells) == (None, "all cells", mesh.n_cells)
    assert region.measure == pytest.approx(1.0, rel=100 * EPS, abs=0)
    assert region.source == pytest.approx(1.0, rel=100 * EPS, abs=0)
    # all of the source leaves through the held boundary (conservation, common practice)
    assert (held.tag, held.label, held.condition) == (None, "held points (untagged)", "held")
    assert held.outflow == pytest.approx(1.0, rel=1e-10, abs=0)
    assert held.measure == pytest.approx(2 * mesh.dim, rel=100 * EPS, abs=0)  # the surface
    assert held.sides == len(mesh.boundary_edges() if mesh.dim == 2 else mesh.boundary_faces())
    assert held.u_min == held.u_max == held.u_mean == 0.0
    assert region.u_min == 0.0 and region.u_max == sol.u.max()


def test_region_mean_against_the_torsion_constant():
    # int u for -lap u = 1, u = 0 on the unit square is k1 / 4 with the torsion constant of a
    # square bar k1 = 0.1406 (S. P. Timoshenko and J. N. Goodier, Theory of Elasticity, 3rd
    # ed. 1970, torsion of rectangular bars; value from memory, 4 digits)
    means = [balance(hatkernels.solve_poisson(rectangle(n, n), 1.0, rtol=1e-12)).regions[0].u_mean
             for n in (32, 64)]
    extrapolated = (4 * means[1] - means[0]) / 3  # P1's O(h^2) error removed (Richardson)
    assert extrapolated == pytest.approx(0.1406 / 4, rel=5e-4, abs=0)


def test_held_points_inside_and_untagged_flux_sides():
    # a tagged mesh where a flux applies by default to every side not held, and one point
    # is held inside: the flux splits by tag, the point makes an untagged held entry
    mesh = label_sides(rectangle(6, 6), {"left": lambda x, y: x < 1e-12})
    centre = int(np.argmin(np.linalg.norm(mesh.points - 0.5, axis=1)))
    sol = hatkernels.solve_poisson(mesh, 1.0, dirichlet_on=[centre], neumann=-0.1, rtol=1e-12)
    b = balance(sol)
    left, held, untagged_flux = b.boundary
    assert (left.tag, left.condition) == (1, "flux")
    assert left.outflow == pytest.approx(0.1, rel=10 * EPS, abs=0)  # -h times its length
    assert (untagged_flux.label, untagged_flux.sides) == ("flux sides (untagged)", 18)
    assert untagged_flux.outflow == pytest.approx(0.3, rel=10 * EPS, abs=0)
    assert (held.label, held.sides, held.measure) == ("held points (untagged)", 0, 0.0)
    # the held point takes what the source and the flux put in (conservation)
    assert held.outflow == pytest.approx(1.0 - 0.4, rel=1e-10, abs=0)
    assert b.relative <= 1e-9


def test_zero_mean_problem_reports_no_held_point():
    # a pure flux problem solved with mean zero: the point the solve pins is internal, and
    # all of the source leaves through the flux sides (conservation, common practice)
    sol = hatkernels.solve_poisson(rectangle(8, 8), 1.0, neumann=-0.25, zero_mean=True,
                                   rtol=1e-12)
    b = balance(sol)
    (flux,) = b.boundary
    assert flux.label == "flux sides (untagged)"
    assert flux.outflow == pytest.approx(1.0, rel=1e-12, abs=0)
    assert b.relative <= 1e-9


def test_matrix_free_solve():
    mesh = label_sides(rectangle(4, 4), {"left": lambda x, y: x < 1e-12,
                                         "right": lambda x, y: x > 1 - 1e-12})
    sol = hatkernels.solve_poisson(mesh, 1.0, refine=2, dirichlet={"left": 0.0, "right": 0.0},
                                   preconditioner="gmg", matrix_free=True, rtol=1e-12)
    b = balance(sol)
    assert b.relative <= 1e-9
    assert b.boundary[0].outflow + b.boundary[1].outflow == pytest.approx(1.0, rel=1e-10, abs=0)
    # the insulated long sides take nothing; each held side about half (symmetry up to the
    # diagonals' direction)
    assert b.boundary[0].outflow == pytest.approx(0.5, rel=0.05, abs=0)


# -- invariants and bad input ------------------------------------------------------------

_TAGGED = label_sides(
    label_cells(rectangle(6, 6), {"a": lambda x, y: y < 0.5, "b": lambda x, y: y >= 0.5}),
    {"w": lambda x, y: x < 1e-12, "e": lambda x, y: x > 1 - 1e-12,
     "n": lambda x, y: y > 1 - 1e-12})


@given(k=st.tuples(*[st.floats(0.1, 10)] * 2), f=st.tuples(*[st.floats(-5, 5)] * 2),
       c=st.floats(0, 5), r=st.floats(0, 5), s=st.floats(-5, 5), h=st.floats(-5, 5),
       g=st.floats(-5, 5))
def test_balance_holds_for_any_data(k, f, c, r, s, h, g):
    # conservation of the discrete equations: sources = absorbed + outflow up to the
    # solver's residual (common practice, no source)
    sol = hatkernels.solve_poisson(_TAGGED, {"a": f[0], "b": f[1]},
                                   coefficient={"a": k[0], "b": k[1]}, reaction={"b": c},
                                   dirichlet={"w": g}, robin={"e": (r, s)}, neumann={"n": h},
                                   rtol=1e-12)
    b = balance(sol)
    assert b.relative <= 1e-9
    assert sum(x.measure for x in b.regions) == pytest.approx(1.0, rel=100 * EPS, abs=0)
    assert [x.tag for x in b.boundary] == [1, 2, 3]
    assert b.boundary[2].outflow == pytest.approx(-h, rel=10 * EPS, abs=1e-300)
    json.dumps(b.as_dict(), allow_nan=False)


def test_as_dict_is_plain_json():
    sol = hatkernels.solve_poisson(_TAGGED, 1.0, dirichlet={"w": 0.0}, rtol=1e-12)
    d = balance(sol).as_dict()
    back = json.loads(json.dumps(d, allow_nan=False))
    assert back == d
    assert [r["label"] for r in d["regions"]] == ["a (1)", "b (2)"]
    assert [p["condition"] for p in d["boundary"]] == ["held", "insulated", "insulated"]
    assert "qualified person" in d["caution"]
    assert balance(sol.problem, sol.u).as_dict() == d  # a problem and u: the same figures


def test_bad_input():
    sol = hatkernels.solve_poisson(rectangle(4, 4), 1.0)
    with pytest.raises(InputError, match="PoissonProblem needs the values u"):
        balance(sol.problem)
    with pytest.raises(InputError, match=r"u must be real nodal values of shape \(25,\)"):
        balance(sol, np.zeros(24))
    u = sol.u.copy()
    u[7] = np.nan
    with pytest.raises(InputError, match=r"u\[7\] = nan is not finite"):
        balance(sol, u)
    with pytest.raises(InputError, match="balance needs a PoissonSolution with its problem"):
        balance(rectangle(4, 4))
    far = DistributedPoissonSolution(u=None, stats=sol.stats, mesh=sol.mesh, problem=sol.problem,
                                     rank=1, size=2)
    with pytest.raises(InputError, match="rank 1 was not given the gathered solution"):
        balance(far)
    assert np.isnan(u[7])  # inputs are never modified
