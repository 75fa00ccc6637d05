"""The problem layer: data checked once, connected parts that nothing holds, pure Neumann."""

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import jittered_mesh
from hypothesis import given
from hypothesis import strategies as st
from scipy.sparse.csgraph import connected_components

import hatkernels
from hatkernels.mesh import rectangle
from hatkernels.problem import PoissonProblem


def union(*meshes):
    """Disjoint union of meshes (points renumbered after each other)."""
    points = np.concatenate([m.points for m in meshes])
    offsets = np.cumsum([0] + [m.n_points for m in meshes[:-1]])
    cells = np.concatenate([m.cells + o for m, o in zip(meshes, offsets, strict=True)])
    return hatkernels.Mesh(points, cells)


def scipy_parts(mesh):
    """Connected parts by scipy's graph routine (reference library: scipy.sparse.csgraph)."""
    c = mesh.cells
    rows = np.concatenate([c[:, 0], c[:, 1], c[:, 2]])
    cols = np.concatenate([c[:, 1], c[:, 2], c[:, 0]])
    n = mesh.n_points
    graph = sp.csr_array((np.ones(rows.size), (rows, cols)), shape=(n, n))
    return connected_components(graph, directed=False)


@given(st.lists(st.integers(2, 5), min_size=1, max_size=4), st.integers(0, 2**32 - 1))
def test_components_match_scipy(sizes, seed):
    rng = np.random.default_rng(seed)
    parts = []
    for k, n in enumerate(sizes):
        m = jittered_mesh(n, int(rng.integers(2**31)))
        parts.append(hatkernels.Mesh(m.points + [3.0 * k, 0.0], m.cells))
    mesh = union(*parts)
    count, labels = mesh.components()
    ref_count, ref = scipy_parts(mesh)
    assert count == ref_count == len(sizes)
    # the same partition of the points, whatever the numbering of the parts
    pairs = set(zip(labels.tolist(), ref.tolist(), strict=True))
    assert len(pairs) == count
    # parts numbered in the order of their first point
    firsts = [int(np.flatnonzero(labels == p)[0]) for p in range(count)]
    assert firsts == sorted(firsts)


def test_components_of_a_refined_mesh_are_carried_up():
    mesh = union(rectangle(3, 3), rectangle(2, 2, bounds=(5, 6, 0, 1)))
    fine = mesh.refine().refine()
    count, labels = fine.components()
    ref_count, ref = scipy_parts(hatkernels.Mesh(fine.points, fine.cells))
    assert count == ref_count == 2
    assert len(set(zip(labels.tolist(), ref.tolist(), strict=True))) == 2
    assert np.array_equal(labels == 1, fine.points[:, 0] >= 5)


def test_a_floating_part_is_named():
    # two squares that do not touch, held on the first only: the stiffness matrix is
    # singular on the second, and CG broke down there (1e14 returned) before this check
    mesh = union(rectangle(6, 6), rectangle(4, 4, bounds=(2, 3, 0, 1)))
    held = rectangle(6, 6).boundary_points()
    with pytest.raises(hatkernels.InputError,
                       match=r"part 1 of the mesh \(2 parts\): 25 points, the first point 49 "
                             r"at \(2, 0\)"):
        hatkernels.solve_poisson(mesh, 1.0, dirichlet_on=held)
    # a reaction on the second part holds it (per cell: only the second part's cells)
    c = np.where(np.arange(mesh.n_cells) >= 72, 1.0, 0.0)
    assert hatkernels.solve_poisson(mesh, 1.0, dirichlet_on=held, reaction=c).converged
    # and the problem object checks it without solving
    with pytest.raises(hatkernels.InputError, match="part 1"):
        PoissonProblem(mesh, 1.0, dirichlet_on=held, reaction=c[::-1].copy())


def test_pure_neumann_is_refused_unless_asked_for_mean_zero():
    mesh = rectangle(8, 8)
    with pytest.raises(hatkernels.InputError,
                       match="no Dirichlet points, reaction or Robin term in the mesh.*zero_mean"):
        hatkernels.solve_poisson(mesh, 1.0, neumann=0.0)
    # the source 1 with no flux out has no steady solution: refused with the imbalance
    with pytest.raises(hatkernels.InputError, match="do not balance.*add up to 1 "):
        hatkernels.solve_poisson(mesh, 1.0, neumann=0.0, zero_mean=True)


def _cosines(x, y):
    return np.cos(np.pi * x) * np.cos(np.pi * y)


@pytest.mark.parametrize("preconditioner", ["amg", "ic0", "direct"])
def test_pure_neumann_with_mean_zero_converges_to_the_exact_solution(preconditioner):
    # -lap u = 2 pi^2 u with du/dn = 0 on the unit square: u = cos(pi x) cos(pi y), whose
    # mean is zero (analytic; common practice, no source).  P1 nodal error O(h^2).
    errors = []
    for n in (16, 32, 64):
        mesh = rectangle(n, n)
        sol = hatkernels.solve_poisson(mesh, lambda x, y: 2 * np.pi**2 * _cosines(x, y),
                                       neumann=0.0, zero_mean=True, quadrature=5,
                                       preconditioner=preconditioner)
        assert sol.converged
        weights = hatkernels.assemble_load(mesh, 1.0)
        assert abs(weights @ sol.u) <= 1e-12 * weights.sum()
        errors.append(np.abs(sol.u - _cosines(*mesh.points.T)).max())
    rates = np.log2(np.array(errors[:-1]) / errors[1:])
    assert (rates > 1.6).all() and rates[1] > rates[0], errors  # order 2 approached


def test_pure_neumann_matrix_free_gmg_agrees_with_assembled():
    mesh = rectangle(8, 8).refine().refine()

    def f(x, y):
        return 2 * np.pi**2 * _cosines(x, y)

    mg = hatkernels.solve_poisson(mesh, f, neumann=0.0, zero_mean=True, preconditioner="gmg")
    assembled = hatkernels.solve_poisson(mesh, f, neumann=0.0, zero_mean=True, rtol=1e-12)
    assert mg.converged and mg.stats.matrix_free and mg.stats.iterations <= 15
    assert np.abs(mg.u - assembled.u).max() <= 1e-8 * np.abs(assembled.u).max()


def test_a_floating_part_with_mean_zero_next_to_a_held_one():
    # part 0 held at 0 with source 1, part 1 floating with the cosine data shifted by 2 in x
    mesh = union(rectangle(8, 8), rectangle(32, 32, bounds=(2, 3, 0, 1)))

    def f(x, y):
        return np.where(x >= 2, 2 * np.pi**2 * _cosines(x - 2, y), 1.0)

    held = rectangle(8, 8).boundary_points()
    sol = hatkernels.solve_poisson(mesh, f, dirichlet_on=held, neumann=0.0, zero_mean=True,
                                   quadrature=5)
    right = mesh.points[:, 0] >= 2
    exact = _cosines(mesh.points[right, 0] - 2, mesh.points[right, 1])
    assert np.abs(sol.u[right] - exact).max() < 0.005  # 0.0039 at h = 1/32 alone (O(h^2))
    left = hatkernels.solve_poisson(rectangle(8, 8), 1.0)
    assert np.abs(sol.u[~right] - left.u).max() <= 1e-9  # the held part is not shifted


def test_problem_checks_its_options():
    mesh = rectangle(4, 4)
    with pytest.raises(hatkernels.InputError, match="zero_mean must be True or False"):
        PoissonProblem(mesh, 1.0, zero_mean=1)
    with pytest.raises(hatkernels.InputError, match="quadrature must be >= 1"):
        PoissonProblem(mesh, 1.0, quadrature=0)
    with pytest.raises(hatkernels.InputError, match="expected a hatkernels.Mesh"):
        PoissonProblem(mesh.points, 1.0)
