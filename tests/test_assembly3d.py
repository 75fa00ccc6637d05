"""Assembly on tetrahedra: the strategies against each other and against outside results."""

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import EPS
from pyamg.gallery import poisson

import hatkernels
from hatkernels import STRATEGIES, assemble_load, assemble_mass, assemble_stiffness
from hatkernels.mesh import cuboid


def interior(mesh):
    inside = np.ones(mesh.n_points, dtype=bool)
    inside[mesh.boundary_points()] = False
    return np.flatnonzero(inside)


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_cuboid_gives_h_times_the_seven_point_stencil(strategy):
    # the cube split into six tetrahedra around its main diagonal: the interior rows are
    # h times the 7-point stencil (6 on the diagonal, -1 to the six axis neighbours, 0 to
    # the face and body diagonals); reference library: pyamg.gallery.poisson in 3-D
    n = 6
    mesh = cuboid(n, n, n)
    A = assemble_stiffness(mesh, strategy=strategy)
    h = 1.0 / n
    keep = interior(mesh)
    # the cuboid numbers points x fastest, then y, then z, as pyamg numbers its grid
    ref = poisson((n - 1, n - 1, n - 1), format="csr")
    ours = A[keep][:, keep] / h
    assert abs(ours - ref).max() <= 16 * EPS * 6
    rows = A[keep]
    assert np.abs(np.asarray(rows.sum(axis=1))).max() <= 16 * EPS * 6 * h  # zero row sums


def test_strategies_agree_on_a_delaunay_mesh():
    rng = np.random.default_rng(4)
    corners = np.array(np.meshgrid([0, 1], [0, 1], [0, 1])).reshape(3, -1).T
    points = np.vstack([rng.random((60, 3)), corners])
    mesh = hatkernels.mesh.triangulate(points)
    kappa = 1.0 + rng.random(mesh.n_cells)
    ref = assemble_stiffness(mesh, kappa, strategy="reference")
    for strategy in ("triplets", "csr"):
        A = assemble_stiffness(mesh, kappa, strategy=strategy)
        assert np.array_equal(A.indptr, ref.indptr) and np.array_equal(A.indices, ref.indices)
        assert abs(A - ref).max() <= 32 * EPS * abs(ref).max()  # round-off of the sums
    M = assemble_mass(mesh)
    assert M.sum() == pytest.approx(1.0, rel=64 * EPS, abs=0)  # the unit cube's volume
    b = assemble_load(mesh, 2.0)
    assert b.sum() == pytest.approx(2.0, rel=64 * EPS, abs=0)


@pytest.mark.two_threads
def test_csr_on_tetrahedra_has_the_same_bits_on_one_and_two_threads():
    mesh = cuboid(12, 12, 12)
    kappa = np.linspace(1, 2, mesh.n_cells)
    with hatkernels.threads(1):
        one = assemble_stiffness(mesh, kappa)
    with hatkernels.threads(2):
        two = assemble_stiffness(mesh, kappa)
    assert np.array_equal(one.data, two.data) and np.array_equal(one.indices, two.indices)


def test_sparse_result_is_canonical():
    A = assemble_stiffness(cuboid(3, 3, 3))
    assert isinstance(A, sp.csr_matrix | sp.csr_array) and A.has_canonical_format


def test_what_is_not_there_yet_on_tetrahedra_is_refused_by_name():
    mesh = cuboid(3, 3, 3)
    # the matrix-free operator is there now (tests/test_operators3d.py)
    # face terms now work; what remains refused on them is a side of the wrong shape
    with pytest.raises(hatkernels.InputError, match=r"faces must be an integer array of shape "
                                                    r"\(n_faces, 3\)"):
        hatkernels.solve_poisson(mesh, 1.0, neumann=([[0, 1]], 1.0), dirichlet_on=[0])


def test_tetrahedral_mesh_files_are_read(tmp_path):
    meshio = pytest.importorskip("meshio")
    mesh = cuboid(2, 3, 4)
    path = tmp_path / "block.vtu"
    meshio.write(path, meshio.Mesh(mesh.points, [("tetra", mesh.cells),
                                                 ("triangle", mesh.boundary_faces())]))
    from hatkernels.io import read_mesh

    back = read_mesh(path)
    assert back.dim == 3 and np.array_equal(back.cells, mesh.cells)
    assert np.array_equal(back.points, mesh.points)


def test_the_distributed_solve_takes_tetrahedra_and_refuses_by_name_what_it_lacks():
    # the 3-D solves over 2 and 3 ranks are checked in tests/mpi_checks.py; here, without
    # MPI, what it does not do on any mesh is refused on tetrahedra too, by name
    from hatkernels.distributed import solve_poisson

    with pytest.raises(hatkernels.InputError, match="matrix_free=True is not available"):
        solve_poisson(cuboid(2, 2, 2), 1.0, matrix_free=True)
    with pytest.raises(hatkernels.InputError, match="zero_mean=True"):
        solve_poisson(cuboid(2, 2, 2), 1.0, zero_mean=True)
