"""Same input, same bits, on 1 and 2 threads: the parallel kernels reached through public calls.

The design's kernel rule (every parallel loop owns its outputs and sums in a
fixed order, so the thread count cannot change a bit) checked where the other
test files do not: element geometry, mesh topology, Hilbert keys, the
Dirichlet reduction and the geometric-multigrid transfers.  Inputs have
several thousand rows, so each thread gets a real share of every loop.
Kernels covered elsewhere: assembly (test_assembly), matrix-free products
(test_operators), vector kernels (test_sparse_kernels).
"""

import numpy as np
import pytest
from conftest import jittered_mesh

import hatkernels
from hatkernels import Mesh, StiffnessAssembler, StiffnessOperator, apply_dirichlet, threads
from hatkernels.mesh import hilbert_keys, rectangle

pytestmark = pytest.mark.two_threads


def on_one_and_two_threads(compute):
    """``compute()`` run with 1 and then 2 numba threads; the two results."""
    out = []
    for n in (1, 2):
        with threads(n):
            out.append(compute())
    return out


def assert_same_bits(one, two):
    """Every array of two equal-length sequences equal to the bit (dtype and shape too)."""
    assert len(one) == len(two)
    for k, (a, b) in enumerate(zip(one, two, strict=True)):
        a, b = np.asarray(a), np.asarray(b)
        assert a.dtype == b.dtype and a.shape == b.shape, k
        assert a.tobytes() == b.tobytes(), k


@pytest.fixture(scope="module")
def big():
    """A Delaunay mesh of 5041 points and about 9800 triangles, numbered at random."""
    return jittered_mesh(70, 21)


def test_element_gradients_and_areas(big):
    def compute():
        areas, grads = hatkernels.element_gradients(big.points, big.triangles)
        fresh = Mesh(big.points, big.triangles)  # its areas() have not been computed yet
        return [areas, grads, fresh.areas()]

    one, two = on_one_and_two_threads(compute)
    assert np.isfinite(one[1]).all() and (one[0] > 0).all()
    assert_same_bits(one, two)


def test_mesh_topology_on_a_fresh_mesh(big):
    # a new Mesh each time: nothing is taken from a cache filled on the other count
    def compute():
        m = Mesh(big.points, big.triangles)  # incidence and the directed-edge check
        plan = StiffnessAssembler(m).plan  # the CSR pattern and its slots
        return [
            m.edges(),
            m.triangle_edges(),
            m.boundary_edges(),
            m.boundary_points(),
            plan.ptr,
            plan.codes,
            plan.indptr,
            plan.indices,
            plan.diag,
            plan.slot_next,
            plan.slot_prev,
            m.refine().triangles,
        ]

    one, two = on_one_and_two_threads(compute)
    assert len(one[0]) > 10_000  # the pattern really is big
    assert_same_bits(one, two)


@pytest.mark.parametrize("defect", ["duplicate", "overlap"])
def test_the_directed_edge_check_names_the_same_triangles(big, defect):
    # the check runs over points in parallel and reports the first point with a
    # directed edge walked twice: the same report whatever the thread count
    t = big.triangles
    last = t[-1]
    points = big.points
    if defect == "duplicate":
        extra = last[[1, 2, 0]]
        expected = f"triangles {len(t) - 1} and {len(t)} are duplicates"
    else:
        # a new point inside the last triangle, joined to its first edge: a second
        # triangle on the left of that edge
        points = np.vstack([points, points[last].mean(axis=0)])
        extra = np.array([last[0], last[1], len(big.points)])
        expected = f"triangles {len(t) - 1} and {len(t)} both lie on the left of edge"
    cells = np.vstack([t, extra])

    def compute():
        with pytest.raises(hatkernels.MeshError) as info:
            Mesh(points, cells)
        return str(info.value)

    one, two = on_one_and_two_threads(compute)
    assert expected in one
    assert one == two


def test_hilbert_keys_and_the_hilbert_order():
    xy = np.random.default_rng(4).uniform(-3.0, 5.0, size=(20_000, 2))
    m = jittered_mesh(60, 5)

    def compute():
        new, perm = m.reorder("hilbert")
        return [hilbert_keys(xy), hilbert_keys(xy, 31), perm.points, perm.triangles,
                new.triangles]

    one, two = on_one_and_two_threads(compute)
    assert len(np.unique(one[1])) > 19_000  # 31 bits: nearly every point its own cell
    assert_same_bits(one, two)


def test_dirichlet_reduction(big):
    A = hatkernels.assemble_stiffness(big, np.linspace(1.0, 2.0, big.n_triangles))
    b = hatkernels.assemble_load(big, lambda x, y: np.sin(3 * x) + y)
    fixed = big.boundary_points()
    g = 1.0 + big.points[fixed, 0] ** 2

    def compute():
        s = apply_dirichlet(A, b, fixed, g)
        return [s.A.data, s.A.indices, s.A.indptr, s.b, s.free, s.fixed, s.values]

    one, two = on_one_and_two_threads(compute)
    assert len(one[3]) > 4000
    assert_same_bits(one, two)


@pytest.mark.parametrize("options", [{}, {"cycle": "W", "smoother": "jacobi"}],
                         ids=["V-chebyshev", "W-jacobi"])
def test_multigrid_transfers_in_a_gmg_cycle(options):
    # one gmg cycle restricts, prolongs and zeroes the held points on every level
    # (the transfer kernels), around the smoothers and the coarse solve
    m = rectangle(10, 10).refine().refine().refine()  # 6561 points, 1681 on the level below
    r = np.random.default_rng(9).standard_normal(m.n_points)

    def compute():
        op = StiffnessOperator(m, dirichlet=m.boundary_points())
        M = hatkernels.make_preconditioner(op, "gmg", **options)
        return [M @ r]

    one, two = on_one_and_two_threads(compute)
    assert np.isfinite(one[0]).all() and np.abs(one[0]).max() > 0
    assert_same_bits(one, two)
