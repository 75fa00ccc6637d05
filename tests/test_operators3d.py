"""The matrix-free stiffness operator on tetrahedra, each variant against the assembled matrix.

Reference: the scipy sparse product of the assembled matrix
(``assemble_stiffness``, itself checked against the 7-point stencil of
pyamg.gallery.poisson and the reference strategy in test_assembly3d.py);
reference library: scipy.
"""

import warnings

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from conftest import EPS
from hypothesis import given, settings
from hypothesis import strategies as st

import hatkernels
from hatkernels import Mesh, StiffnessOperator, assemble_stiffness, threads
from hatkernels.coefficients import parse_coefficient
from hatkernels.mesh import cuboid
from hatkernels.mesh.colouring import triangle_colouring
from hatkernels.operators import DEFAULT_VARIANT, DEFAULT_VARIANT_3D, VARIANTS, default_variant
from hatkernels.operators.variants import build_variant, variant_coefficient
from hatkernels.operators.variants3d import (
    VARIANT_CLASSES,
    SerialTetrahedronGeometry,
    TetrahedronGeometry,
)

#: Every implementation: the three variants and the geometry variant's one-thread fallback.
CLASSES = {**VARIANT_CLASSES, "serial-geometry": SerialTetrahedronGeometry}

#: Element-by-element sums and CSR rows add the same terms in other orders, and the
#: fast products use the normals' form of the element matrix: measured under 2 EPS
#: (2-norm, relative to |A| |x|) here; 16 EPS still catches any wrong contribution.
ROUNDOFF = 16 * EPS


def delaunay_mesh(seed=4, n=60):
    """Delaunay tetrahedra of the unit cube's corners and ``n`` random points."""
    rng = np.random.default_rng(seed)
    corners = np.array(np.meshgrid([0, 1], [0, 1], [0, 1])).reshape(3, -1).T
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # random points: no flat cells to drop
        return hatkernels.mesh.triangulate(np.vstack([rng.random((n, 3)), corners]))


MESHES = {"cuboid": lambda: cuboid(3, 4, 5, bounds=(0, 1, 0, 1.5, 0, 2)),
          "delaunay": delaunay_mesh}


def coefficient_kinds(m):
    """One coefficient of each kind the contract allows, on tetrahedral mesh ``m``."""
    x, y, z = m.points.T
    c = m.points[m.cells].mean(axis=1)
    theta = 0.4
    R = np.array([[np.cos(theta), -np.sin(theta), 0], [np.sin(theta), np.cos(theta), 0],
                  [0, 0, 1]])
    K = R @ np.diag([3.0, 0.5, 1.5]) @ R.T
    return {
        "none": None,
        "scalar": 2.5,
        "per-cell": 1.0 + c[:, 0] ** 2,
        "per-point": 1.0 + x + y * z,
        "tensor": K,
        "tensor-per-cell": K[None] * (1.0 + c[:, 1])[:, None, None],
        "callable": lambda x, y, z: 1.0 + np.sin(x) * np.cos(y) ** 2 + z,
    }


def product_close(y, A, x):
    """``y`` is ``A @ x`` to round-off, relative to ``|A| |x|`` (N. J. Higham, Accuracy and
    Stability of Numerical Algorithms, 2002, section 3.5: the error bound of a
    matrix-vector product)."""
    return np.linalg.norm(y - A @ x) <= ROUNDOFF * np.linalg.norm(abs(A) @ np.abs(x))


def close(y, ref):
    return np.linalg.norm(y - ref) <= ROUNDOFF * np.linalg.norm(ref)


def eliminated(A, fixed):
    """A with identity rows and columns at ``fixed`` (symmetric elimination; common
    practice, no source)."""
    keep = np.ones(A.shape[0])
    keep[fixed] = 0
    return (sp.diags(keep) @ A @ sp.diags(keep) + sp.diags(1 - keep)).tocsr()


def variant(name, m, coef, block_size=16):
    kc = variant_coefficient(parse_coefficient(coef, m, name="coefficient", tensor=True), m, 2)
    if name == "serial-geometry":
        return SerialTetrahedronGeometry(m, kc)
    return VARIANT_CLASSES[name](m, kc, triangle_colouring(m.cells, m.n_points, block_size))


@pytest.mark.parametrize("mesh", MESHES)
@pytest.mark.parametrize("name", CLASSES)
def test_each_variant_equals_the_assembled_matrix(name, mesh):
    # reference library: scipy's product with our assembled matrix (module docstring)
    m = MESHES[mesh]()
    x = np.random.default_rng(5).standard_normal(m.n_points)
    for kind, coef in coefficient_kinds(m).items():
        A = assemble_stiffness(m, coef)
        v = variant(name, m, coef)
        y, ys, diag = np.empty(m.n_points), np.empty(m.n_points), np.empty(m.n_points)
        v.product(x, y)
        v.serial_product(x, ys)  # the plain version
        v.diagonal_into(diag)
        assert product_close(y, A, x), (name, kind)
        assert product_close(ys, A, x), (name, kind)
        assert np.linalg.norm(y - ys) <= ROUNDOFF * np.linalg.norm(abs(A) @ np.abs(x))
        assert close(diag, A.diagonal()), (name, kind)
        d2, off = np.empty(m.n_points), np.empty(m.n_points)
        v.diagonal_and_offsum(d2, off)
        assert (d2 == diag).all(), (name, kind)  # one kernel's sums, in one order
        # the element-wise sums of |K_ij| bound the assembled ones (triangle inequality)
        offdiag = abs(A - sp.diags(A.diagonal())).sum(axis=1).A1
        assert (off >= offdiag * (1 - ROUNDOFF)).all(), (name, kind)


@pytest.mark.parametrize("name", VARIANTS)
def test_the_operator_with_dirichlet_rows_is_the_eliminated_matrix(name):
    m = delaunay_mesh(7)
    fixed = m.boundary_points()
    coef = coefficient_kinds(m)["tensor-per-cell"]
    K = assemble_stiffness(m, coef)
    E = eliminated(K, fixed)
    op = StiffnessOperator(m, coef, variant=name, dirichlet=fixed, block_size=8)
    x = np.random.default_rng(1).standard_normal(m.n_points)
    before = x.copy()
    assert product_close(op @ x, E, x)
    assert (x == before).all()  # the input vector is not modified
    assert product_close(op.serial_matvec(x), E, x)
    assert close(op.diagonal(), E.diagonal())
    assert product_close(op.unmasked_matvec(x), K, x)
    assert op.dtype == np.float64 and op.shape == (m.n_points, m.n_points)


def test_the_cuboid_operator_is_h_times_the_seven_point_stencil():
    # interior rows of the cuboid's stiffness are h times the 7-point stencil; reference
    # library: pyamg.gallery.poisson in 3-D (as in test_assembly3d.py)
    from pyamg.gallery import poisson

    n = 5
    m = cuboid(n, n, n)
    op = StiffnessOperator(m, dirichlet=m.boundary_points())
    inside = np.setdiff1d(np.arange(m.n_points), m.boundary_points())
    ref = poisson((n - 1,) * 3, format="csr")
    x = np.random.default_rng(3).standard_normal(ref.shape[0])
    full = np.zeros(m.n_points)
    full[inside] = x
    assert product_close((op @ full)[inside] * n, ref, x)


def test_gershgorin_bound_covers_the_spectrum_of_the_jacobi_scaled_matrix():
    # Gershgorin's circle theorem (S. Gershgorin, 1931): every eigenvalue of D^-1 A lies
    # below max_i (A_ii + sum_j |A_ij|) / A_ii; the largest eigenvalue by scipy's eigsh
    m = delaunay_mesh(11, 40)
    fixed = m.boundary_points()
    coef = coefficient_kinds(m)["per-cell"]
    E = eliminated(assemble_stiffness(m, coef), fixed)
    lam = spla.eigsh(E, k=1, M=sp.diags(E.diagonal()).tocsc(), which="LA",
                     return_eigenvectors=False)[0]
    for name in VARIANTS:
        op = StiffnessOperator(m, coef, variant=name, dirichlet=fixed)
        diag, bound = op.diagonal_and_bound()
        assert bound == op.gershgorin_bound()
        assert close(diag, E.diagonal())
        assert bound >= lam * (1 - 1e-8), name  # eigsh's own tolerance
        assert lam > 1.0  # the bound is not trivially met


def test_on_the_cuboid_the_bound_is_two():
    # no positive off-diagonal entry on the cuboid (non-obtuse dihedral angles), so the
    # Gershgorin bound of D^-1 A is exactly 2 up to round-off (common practice, no source)
    m = cuboid(4, 4, 4)
    assert StiffnessOperator(m).gershgorin_bound() == pytest.approx(2.0, rel=64 * EPS, abs=0)


@settings(max_examples=10)  # three variants and an assembly per example
@given(st.integers(0, 2**32 - 1))
def test_linear_functions_are_in_the_kernel_of_interior_rows(seed):
    # P1 reproduces linear functions: the interior rows of K vanish on them, and every
    # row on constants (patch test; common practice, no source)
    m = delaunay_mesh(seed, 20)
    c = np.random.default_rng(seed).standard_normal(4)
    u = c[0] + m.points @ c[1:]
    inside = np.setdiff1d(np.arange(m.n_points), m.boundary_points())
    scale = np.linalg.norm(abs(assemble_stiffness(m)) @ np.abs(u))
    for name in VARIANTS:
        op = StiffnessOperator(m, variant=name, block_size=8)
        assert np.linalg.norm((op @ u)[inside]) <= ROUNDOFF * scale, name
        assert np.abs(op @ np.ones(m.n_points)).max() <= ROUNDOFF * scale, name


@pytest.mark.two_threads
@pytest.mark.parametrize("name", VARIANTS)
def test_one_and_two_threads_give_identical_bits(name):
    m = cuboid(10, 9, 8).refine()
    x = np.random.default_rng(2).standard_normal(m.n_points)
    for kind in ("per-cell", "tensor-per-cell"):
        coef = coefficient_kinds(m)[kind]
        out = []
        for n in (1, 2):
            with threads(n):
                op = StiffnessOperator(m, coef, variant=name, block_size=64,
                                       dirichlet=m.boundary_points())
                diag, bound = op.diagonal_and_bound()
                out.append((op @ x).tobytes() + op.diagonal().tobytes() + diag.tobytes()
                           + np.float64(bound).tobytes())
        assert op.n_colours > 1  # more than one colour: blocks really ran side by side
        assert out[0] == out[1], (name, kind)


def test_variants_are_picked_by_dimension():
    m = cuboid(3, 3, 3)
    kc = variant_coefficient(parse_coefficient(None, m, name="c", tensor=True), m, 2)
    assert kc.tensor.shape == (0, 3, 3)
    for name in VARIANTS:
        v = build_variant(name, m, kc, 8)
        assert type(v) is VARIANT_CLASSES[name] and v.name == name
    op = StiffnessOperator(m, variant="geometry")
    assert isinstance(op._impl, TetrahedronGeometry) and "colours" in repr(op)
    assert StiffnessOperator(m, variant="edges", block_size=8).nbytes == build_variant(
        "edges", m, kc, 8).nbytes  # no Dirichlet arrays


def test_storage():
    m = cuboid(12, 12, 12)
    A = assemble_stiffness(m)
    csr = A.data.nbytes + A.indices.nbytes + A.indptr.nbytes
    assert StiffnessOperator(m, variant="geometry").nbytes < csr / 50  # a colouring
    assert StiffnessOperator(m, variant="factors").nbytes >= 48 * m.n_cells
    # 12 bytes per unique edge and 4 per point: about half of the CSR matrix
    assert StiffnessOperator(m, variant="edges").nbytes < 0.55 * csr


def hedgehog(k=100):
    """Delaunay tetrahedra of a centre and ``k`` points on the sphere: all touch the centre."""
    rng = np.random.default_rng(0)
    p = rng.standard_normal((k, 3))
    p /= np.linalg.norm(p, axis=1)[:, None]
    return hatkernels.mesh.triangulate(np.r_[[[0.0, 0.0, 0.0]], p])


def test_more_than_64_colours_falls_back_or_refuses():
    m = hedgehog()
    x = np.random.default_rng(3).standard_normal(m.n_points)
    A = assemble_stiffness(m)
    for name in ("geometry", "edges"):  # edges is the default: it falls back too
        with pytest.warns(RuntimeWarning, match="more than 64 colours.*tetrahedra"):
            op = StiffnessOperator(m, variant=name, block_size=1)
        assert isinstance(op._impl, SerialTetrahedronGeometry) and op.n_colours == 1
        assert product_close(op @ x, A, x)
        assert close(op.diagonal(), A.diagonal())
    with pytest.raises(hatkernels.InputError, match="at most 64 colours"):
        StiffnessOperator(m, variant="factors", block_size=1)


def test_the_default_variant_follows_the_dimension():
    assert StiffnessOperator(cuboid(2, 2, 2)).variant == DEFAULT_VARIANT_3D == "edges"
    assert StiffnessOperator(hatkernels.mesh.rectangle(2, 2)).variant == DEFAULT_VARIANT
    assert default_variant(3) == DEFAULT_VARIANT_3D and default_variant(2) == DEFAULT_VARIANT


def test_bad_input_is_named():
    m = cuboid(2, 2, 2)
    with pytest.raises(hatkernels.InputError, match="unknown matrix-free variant"):
        StiffnessOperator(m, variant="csr")
    with pytest.raises(hatkernels.InputError, match=r"dirichlet\[1\] = 999 is outside"):
        StiffnessOperator(m, dirichlet=[0, 999])
    with pytest.raises(hatkernels.InputError, match="coefficient is -1.0"):
        StiffnessOperator(m, -1.0)
    with pytest.raises(hatkernels.InputError, match="3x3"):
        StiffnessOperator(m, np.eye(2))
    with pytest.raises(hatkernels.InputError, match="tetrahedr"):
        StiffnessOperator(m, np.ones(m.n_cells + 1))
    bad = coefficient_kinds(m)["tensor-per-cell"].copy()
    bad[5, 0, 1] += 1.0
    with pytest.raises(hatkernels.InputError, match="tensor of tetrahedron 5 is not symmetric"):
        StiffnessOperator(m, bad)
    with pytest.raises(hatkernels.InputError, match="tetrahedron"):
        StiffnessOperator(m, lambda x, y, z: np.where(z > 0.5, np.nan, 1.0))


def test_unused_points_get_identity_rows_with_dirichlet():
    base = cuboid(2, 2, 2)
    with pytest.warns(hatkernels.MeshWarning):
        m = Mesh(np.r_[base.points, [[3.0, 3.0, 3.0]]], base.cells)
    op = StiffnessOperator(m, dirichlet=[0])
    x = np.ones(m.n_points)
    assert (op @ x)[-1] == 1.0 and m.n_points - 1 in op.fixed
    assert (StiffnessOperator(m) @ x)[-1] == 0.0  # without Dirichlet: the empty row of K


@pytest.mark.parametrize("mesh", MESHES)
def test_edge_rows_are_the_unique_edges(mesh):
    # reference library: numpy's unique over the sorted point pairs of every cell
    m = MESHES[mesh]()
    pairs = np.sort(m.cells[:, [[0, 1], [0, 2], [0, 3], [1, 2], [1, 3], [2, 3]]], axis=2)
    ref = np.unique(pairs.reshape(-1, 2), axis=0)
    impl = StiffnessOperator(m, variant="edges", block_size=8)._impl
    first = np.repeat(np.arange(m.n_points), np.diff(impl.starts))
    assert np.array_equal(np.column_stack([first, impl.ends]), ref)
    assert impl.ends.dtype == m.cells.dtype
