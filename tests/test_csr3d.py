"""The csr stiffness on tetrahedra (six edge values per cell, then the row gather).

The fast path is checked against the ``reference`` strategy (plain loops over
the element matrices of :func:`hatkernels.assembly.elements.tetrahedron_stiffness_values`,
the executable specification) for every kind of coefficient, and against
outside results: the 7-point stencil of ``tests/test_assembly3d.py``
(pyamg.gallery) and the textbook reference tetrahedron below.
"""

import numpy as np
import pytest
from conftest import EPS

import hatkernels
from hatkernels import assemble_stiffness
from hatkernels.mesh import Mesh, cuboid


@pytest.fixture(scope="module")
def delaunay():
    rng = np.random.default_rng(11)
    corners = np.array(np.meshgrid([0, 1], [0, 1], [0, 1])).reshape(3, -1).T
    return hatkernels.mesh.triangulate(np.vstack([rng.random((80, 3)), corners]))


def _coefficients(mesh):
    rng = np.random.default_rng(3)
    B = rng.normal(size=(mesh.n_cells, 3, 3))
    tensors = np.einsum("mij,mkj->mik", B, B) + 0.5 * np.eye(3)  # symmetric positive definite
    return {
        "none": None,
        "constant": 2.5,
        "cell": 1.0 + rng.random(mesh.n_cells),
        "point": 1.0 + rng.random(mesh.n_points),
        "callable": lambda x, y, z: 1.0 + x * x + y * z,
        "tensor": np.array([[2.0, 0.3, 0.1], [0.3, 1.0, 0.2], [0.1, 0.2, 3.0]]),
        "tensors": tensors,
    }


@pytest.mark.parametrize("kind", ["none", "constant", "cell", "point", "callable", "tensor",
                                  "tensors"])
def test_csr_equals_the_reference_strategy(delaunay, kind):
    coef = _coefficients(delaunay)[kind]
    ref = assemble_stiffness(delaunay, coef, strategy="reference")
    A = assemble_stiffness(delaunay, coef)
    assert np.array_equal(A.indptr, ref.indptr) and np.array_equal(A.indices, ref.indices)
    # the diagonal is minus the row's off-diagonal sum here, the square of a gradient
    # there: the two differ by the round-off of a few sums of products
    assert abs(A - ref).max() <= 64 * EPS * abs(ref).max()
    assert (A != A.T).nnz == 0  # symmetric to the bit
    # rows sum to zero: the gradients of the barycentric coordinates sum to zero
    assert np.abs(np.asarray(A.sum(axis=1))).max() <= 64 * EPS * abs(ref).max()


def test_reference_tetrahedron():
    # the corner tetrahedron (0,0,0), e1, e2, e3: gradients -(1,1,1), e1, e2, e3 and
    # volume 1/6, so K = [[3,-1,-1,-1],[-1,1,0,0],[-1,0,1,0],[-1,0,0,1]] / 6
    # (e.g. Larson & Bengzon, The Finite Element Method: Theory, Implementation and
    # Applications, 2013, chapter 4)
    mesh = Mesh(np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]]), np.array([[0, 1, 2, 3]]))
    want = np.array([[3, -1, -1, -1], [-1, 1, 0, 0], [-1, 0, 1, 0], [-1, 0, 0, 1]]) / 6.0
    assert np.abs(assemble_stiffness(mesh).toarray() - want).max() <= 4 * EPS


def test_a_bad_tensor_shape_is_named():
    mesh = cuboid(1, 1, 1)
    with pytest.raises(hatkernels.InputError, match=r"shape \(6, 2, 2\).*3x3 tensors"):
        assemble_stiffness(mesh, np.ones((mesh.n_cells, 2, 2)))


def test_reassembly_reuses_the_plan_and_scales():
    mesh = cuboid(3, 2, 2)
    assembler = hatkernels.StiffnessAssembler(mesh)
    one = assembler.assemble()
    plan = assembler.plan
    two = assembler.assemble(4.0)
    assert assembler.plan is plan
    assert np.array_equal(two.data, 4.0 * one.data)  # a power of two scales exactly


@pytest.mark.two_threads
@pytest.mark.parametrize("kind", ["cell", "tensors"])
def test_one_and_two_threads_give_the_same_bits(kind):
    mesh = cuboid(10, 9, 8)
    rng = np.random.default_rng(5)
    coef = (1.0 + rng.random(mesh.n_cells) if kind == "cell"
            else np.tile(np.diag([1.0, 2.0, 3.0]), (mesh.n_cells, 1, 1)))
    out = []
    for n in (1, 2):
        with hatkernels.threads(n):
            out.append(assemble_stiffness(mesh, coef))
    assert np.array_equal(out[0].data, out[1].data)
    assert np.array_equal(out[0].indices, out[1].indices)


@pytest.mark.parametrize("kind", ["constant", "cell"])
def test_load_kernel_equals_the_element_values(delaunay, kind):
    # the one-pass kernel against the bincount of the element load vectors |T| f / 4
    from hatkernels.assembly.elements import tetrahedron_load_values
    from hatkernels.coefficients import parse_coefficient

    f = 2.5 if kind == "constant" else 1.0 + np.arange(delaunay.n_cells) / delaunay.n_cells
    b = hatkernels.assemble_load(delaunay, f)
    coef = parse_coefficient(f, delaunay, name="load", sign="any")
    v = tetrahedron_load_values(delaunay.points, delaunay.cells, delaunay.volumes(), coef)
    plain = np.bincount(delaunay.cells.ravel(), weights=v.ravel(), minlength=delaunay.n_points)
    assert np.abs(b - plain).max() <= 16 * EPS * np.abs(plain).max()
    # the integral of f over the unit cube (common practice, no source)
    assert b.sum() == pytest.approx(float(np.sum(delaunay.volumes() * f)), rel=64 * EPS, abs=0)
