"""The patch path through its public doors: solve_poisson(refine=k) choosing it, callable
sources evaluated on the fly, single-precision levels, the four-vector CG, the memory check.

References: the stored refinement (solve_poisson with a named preconditioner, which
builds and stores the refined mesh: an independent implementation of every piece), and
analytic solutions named beside each check.
"""

import math

import numpy as np
import pytest

import hatkernels
from hatkernels.errors import InputError
from hatkernels.mesh import rectangle
from hatkernels.mesh.tags import label_cells, label_sides
from hatkernels.patches import PatchSolution, patch_path_reason, solve_on_patches
from hatkernels.patches.solve import bytes_per_point


def stored(coarse, f, k, **kw):
    """The stored-mesh solve of the same problem (the reference)."""
    return hatkernels.solve_poisson(coarse, f, refine=k, preconditioner="gmg", **kw)


def test_solve_poisson_takes_the_patch_path_by_default_and_agrees_with_the_stored_one():
    coarse = rectangle(4, 3)
    sol = hatkernels.solve_poisson(coarse, 1.0, refine=3, dirichlet=0.25, rtol=1e-11)
    assert isinstance(sol, PatchSolution) and sol.converged
    assert isinstance(sol, hatkernels.PoissonSolution)  # code testing for one still works
    ref = stored(coarse, 1.0, 3, dirichlet=0.25, rtol=1e-11)
    assert not isinstance(ref, PatchSolution)
    assert sol.u.shape == ref.u.shape
    np.testing.assert_allclose(sol.u, ref.u, rtol=0, atol=1e-9 * np.abs(ref.u).max())
    # the lazily built mesh is the refined one, point for point
    np.testing.assert_array_equal(sol.mesh.points, ref.mesh.points)
    assert sol.stats.unknowns == ref.mesh.n_points


def test_data_the_patch_path_cannot_take_go_to_the_stored_path():
    coarse = rectangle(3, 3)
    sol = hatkernels.solve_poisson(coarse, 1.0, refine=2, reaction=1.0)
    assert not isinstance(sol, PatchSolution) and sol.converged
    assert "reaction" in patch_path_reason(coarse, 2, reaction=1.0)
    assert "coefficient" in patch_path_reason(coarse, 2, coefficient=lambda x, y: 1 + x)


def test_a_callable_source_is_evaluated_on_the_fly_as_the_stored_load():
    # -lap u = 2 pi^2 sin(pi x) sin(pi y), u = 0: exact u = sin(pi x) sin(pi y)
    # (common practice, no source); the load by the same quadrature as the stored path
    def f(x, y):
        return 2 * math.pi**2 * np.sin(math.pi * x) * np.sin(math.pi * y)

    coarse = rectangle(3, 3)
    errors = []
    for k in (2, 3, 4):
        sol = solve_on_patches(coarse, f, k, rtol=1e-12)
        ref = stored(coarse, f, k, rtol=1e-12)
        np.testing.assert_allclose(sol.u, ref.u, rtol=0, atol=1e-9)
        p = ref.mesh.points
        errors.append(np.abs(sol.u - np.sin(math.pi * p[:, 0]) * np.sin(math.pi * p[:, 1])).max())
    orders = np.log2(np.array(errors[:-1]) / np.array(errors[1:]))
    assert (orders > 1.8).all(), orders


def test_regions_and_boundary_tags_as_on_the_stored_mesh():
    # two materials, a source by region (one a callable), held values by tag on two sides
    coarse = label_sides(
        label_cells(rectangle(4, 4), {"cold": lambda x, y: x < 0.5, "hot": lambda x, y: x >= 0.5}),
        {"left": lambda x, y: x == 0, "right": lambda x, y: x == 1,
         "bottom": lambda x, y: y == 0, "top": lambda x, y: y == 1})
    data = dict(f={"cold": lambda x, y: 1 + x * y, "hot": 2.0},
                coefficient={"cold": 1.0, "hot": 5.0},
                dirichlet={"left": 0.0, "right": 1.0})
    assert patch_path_reason(coarse, 3, **data) is None
    sol = hatkernels.solve_poisson(coarse, refine=3, rtol=1e-12, **data)
    ref = stored(coarse, data.pop("f"), 3, rtol=1e-12, **data)
    assert isinstance(sol, PatchSolution)
    np.testing.assert_allclose(sol.u, ref.u, rtol=0, atol=1e-9)


def test_a_bad_callable_value_names_the_coarse_cell():
    def f(x, y):
        return np.where(x > 0.9, np.nan, 1.0)

    with pytest.raises(InputError, match="coarse cell"):
        solve_on_patches(rectangle(3, 3), f, 2)


def test_single_precision_levels_leave_the_final_accuracy_unchanged():
    # the preconditioner's vectors in single precision: CG still reaches the tolerance,
    # and the solution agrees with the double-precision one to that tolerance
    coarse = rectangle(6, 5)
    double = solve_on_patches(coarse, 1.0, 4, rtol=1e-10, single=False)
    single = solve_on_patches(coarse, 1.0, 4, rtol=1e-10, single=True)
    assert single.converged and double.converged
    assert single.stats.iterations <= double.stats.iterations + 1
    scale = np.abs(double.u).max()
    np.testing.assert_allclose(single.u, double.u, rtol=0, atol=1e-8 * scale)
    assert "single" in single.stats.preconditioner


def test_the_four_vector_cg_meets_the_true_residual():
    coarse = rectangle(5, 5)
    sol = solve_on_patches(coarse, 1.0, 3, dirichlet=1.5, rtol=1e-9)
    ref = stored(coarse, 1.0, 3, dirichlet=1.5)
    A = hatkernels.assemble_stiffness(ref.mesh)
    b = hatkernels.assemble_load(ref.mesh, 1.0)
    system = hatkernels.apply_dirichlet(A, b, ref.mesh.boundary_points(), 1.5)
    free = system.free
    r = system.b - system.A @ sol.u[free]
    assert np.linalg.norm(r) <= 1e-9 * np.linalg.norm(system.b) * 1.0001
    assert np.linalg.norm(r) <= sol.stats.tolerance * 1.0001


def test_nested_start_alone_is_at_discretisation_accuracy():
    # full multigrid alone against the exact sin(pi x) sin(pi y) (common practice, no
    # source): its total error is within a small factor of the converged solution's
    # (A. Brandt, Multi-level adaptive solutions to boundary-value problems, Math. Comp. 31,
    # 1977: a fixed number of cycles per level reaches discretisation accuracy); measured
    # here 1.17x with one cycle per level, and the algebraic error 0.17x with two
    def f(x, y):
        return 2 * math.pi**2 * np.sin(math.pi * x) * np.sin(math.pi * y)

    def rms(v):
        return float(np.sqrt(np.mean(v**2)))

    coarse = rectangle(4, 4)
    sol = solve_on_patches(coarse, f, 4, rtol=1e-12)
    p = sol.mesh.points
    exact = np.sin(math.pi * p[:, 0]) * np.sin(math.pi * p[:, 1])
    discretisation = rms(sol.u - exact)
    one = solve_on_patches(coarse, f, 4, rtol=None)
    two = solve_on_patches(coarse, f, 4, rtol=None, nested_cycles=2)
    assert one.stats.iterations == 0 and two.stats.iterations == 0
    assert rms(one.u - exact) < 1.5 * discretisation
    assert rms(two.u - sol.u) < 0.25 * discretisation


def test_memory_check_refuses_what_cannot_fit(monkeypatch):
    import hatkernels.memory as memory

    monkeypatch.setattr(memory, "available_bytes", lambda: 10 * 2**20)
    with pytest.raises(InputError, match="not enough memory"):
        solve_on_patches(rectangle(8, 8), 1.0, 3)
    # single precision halves the multigrid's part of the estimate
    assert bytes_per_point(True) < bytes_per_point(False)


def test_inputs_are_not_modified():
    coarse = rectangle(3, 3)
    points, cells = coarse.points.copy(), coarse.triangles.copy()
    solve_on_patches(coarse, 1.0, 2)
    np.testing.assert_array_equal(coarse.points, points)
    np.testing.assert_array_equal(coarse.triangles, cells)


def test_results_by_region_and_tag_work_on_a_patch_solution():
    # the heat balance of hatkernels.results: what the source puts in leaves through the
    # held sides (conservation, common practice, no source), read from the lazily built
    # mesh and problem as from a stored solve's
    from hatkernels import results

    coarse = label_sides(rectangle(4, 4), {"left": lambda x, y: x == 0,
                                           "right": lambda x, y: x == 1})
    sol = hatkernels.solve_poisson(coarse, 2.0, refine=2, dirichlet={"left": 0.0, "right": 1.0},
                                   rtol=1e-12)
    ref = stored(coarse, 2.0, 2, dirichlet={"left": 0.0, "right": 1.0}, rtol=1e-12)
    assert isinstance(sol, PatchSolution)
    got, want = results.balance(sol), results.balance(ref)
    assert got.sources == pytest.approx(2.0, rel=1e-12)  # 2 times the unit area
    assert got.relative < 1e-9 and want.relative < 1e-9
    assert [b.outflow for b in got.boundary] == pytest.approx(
        [b.outflow for b in want.boundary], rel=1e-8, abs=1e-10)


def test_a_coarse_mesh_with_a_point_in_no_cell_takes_the_stored_path():
    # the refined numbering counts the points of cells only: such a mesh is refused by the
    # patch path, never given a vector of the wrong length
    import warnings

    base = rectangle(3, 3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        loose = hatkernels.Mesh(np.vstack([base.points, [[2.0, 2.0]]]), base.triangles)
    assert "no cell" in patch_path_reason(loose, 2)
    with pytest.raises(InputError, match="no cell"):
        solve_on_patches(loose, 1.0, 2)


@pytest.mark.parametrize("bad", [dict(rtol=-1.0), dict(atol=float("nan")), dict(maxiter=0),
                                 dict(monitor=3), dict(start="sideways")])
def test_bad_solver_options_are_refused_by_name(bad):
    with pytest.raises(InputError, match=next(iter(bad))):
        solve_on_patches(rectangle(3, 3), 1.0, 2, **bad)


def test_a_flux_by_tag_as_on_the_stored_mesh():
    # held at 0 on the left, a flux in through the bottom (2.5) and out through the top
    # (-1.0), the right insulated: against the stored refinement, and the balance
    # (what comes in leaves: conservation, common practice, no source)
    from hatkernels import results

    coarse = label_sides(rectangle(4, 3), {"left": lambda x, y: x == 0,
                                           "bottom": lambda x, y: y == 0,
                                           "top": lambda x, y: y == 1})
    data = dict(dirichlet={"left": 0.0}, neumann={"bottom": 2.5, "top": -1.0})
    assert patch_path_reason(coarse, 3, **data) is None
    sol = hatkernels.solve_poisson(coarse, 0.5, refine=3, rtol=1e-12, **data)
    ref = stored(coarse, 0.5, 3, rtol=1e-12, **data)
    assert isinstance(sol, PatchSolution)
    np.testing.assert_allclose(sol.u, ref.u, rtol=0, atol=1e-9 * np.abs(ref.u).max())
    assert results.balance(sol).relative < 1e-9
    assert "neumann" in patch_path_reason(coarse, 3, neumann=lambda x, y: x)


def test_a_flux_number_reaches_sides_whose_ends_are_held():
    # a boundary side not held but with both ends held (between two held tags) has free
    # fine points: the number given as neumann must reach them, as on the stored mesh
    coarse = label_sides(rectangle(3, 3), {
        "ends": lambda x, y: (y == 0) & ((x < 0.3) | (x > 0.7)),
        "left": lambda x, y: x == 0})
    for data in (dict(dirichlet_on=["ends", "left"], neumann=1.0),
                 dict(dirichlet={"ends": 0.0, "left": 0.0}, neumann=1.0)):
        sol = hatkernels.solve_poisson(coarse, 1.0, refine=2, rtol=1e-12, **data)
        ref = stored(coarse, 1.0, 2, rtol=1e-12, **data)
        assert isinstance(sol, PatchSolution)
        np.testing.assert_allclose(sol.u, ref.u, rtol=0, atol=1e-9 * np.abs(ref.u).max())


def test_a_coarse_mesh_with_every_point_held():
    # rectangle(1, 1): no free coarse point, the coarse correction is zero; against the
    # stored mesh solved with amg (the stored gmg cannot take it)
    sol = hatkernels.solve_poisson(rectangle(1, 1), 1.0, refine=3, rtol=1e-12)
    ref = hatkernels.solve_poisson(rectangle(1, 1), 1.0, refine=3, preconditioner="amg",
                                   rtol=1e-12)
    assert isinstance(sol, PatchSolution) and sol.converged
    np.testing.assert_allclose(sol.u, ref.u, rtol=0, atol=1e-10)


def test_layout_methods_refuse_vectors_of_the_wrong_size():
    from hatkernels.patches import PatchLayout

    layout = PatchLayout(rectangle(3, 3), 2, held_sides=rectangle(3, 3).boundary_edges())
    for call in (lambda: layout.to_refined(np.ones(5)), lambda: layout.from_refined(np.ones(5)),
                 lambda: layout.patch(np.ones(5), 0), lambda: layout.zero_held(np.ones(5)),
                 lambda: layout.zero_held(np.ones(layout.size(2), dtype=np.int64))):
        with pytest.raises(InputError, match="shape|float64"):
            call()
    with pytest.raises(InputError):
        PatchLayout(rectangle(3, 3), -1)


def test_solve_on_patches_names_what_it_cannot_take():
    with pytest.raises(InputError, match="reaction"):
        solve_on_patches(rectangle(3, 3), 1.0, 2, reaction=1.0)
