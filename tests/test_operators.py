"""The matrix-free stiffness operator, and each of its variant classes, against the assembled matrix."""

import warnings

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import EPS, jittered_mesh, meshes, two_threads
from hypothesis import given
from test_assembly import coefficient_kinds

import hatkernels
from hatkernels import Mesh, StiffnessOperator, assemble_stiffness, threads
from hatkernels.assembly.csr import KernelCoefficient, kernel_coefficient
from hatkernels.coefficients import parse_coefficient
from hatkernels.mesh.colouring import triangle_colouring
from hatkernels.operators import VARIANTS
from hatkernels.operators.variants import (
    VARIANT_CLASSES,
    SerialGeometryProduct,
    build_variant,
)

#: Every implementation: the three variants and the geometry variant's one-thread fallback.
CLASSES = {**VARIANT_CLASSES, "serial-geometry": SerialGeometryProduct}

#: The element-by-element sums and the CSR rows add the same terms in other orders:
#: measured under 2 EPS (2-norm, relative) on the meshes here; 16 EPS still catches
#: any wrong element contribution.
ROUNDOFF = 16 * EPS


def product_close(y, A, x):
    """``y`` is ``A @ x`` to round-off, relative to ``|A| |x|`` (Higham, Accuracy and
    Stability of Numerical Algorithms, 2002, section 3.5: the error bound of a
    matrix-vector product), so cancellation in ``A @ x`` costs nothing."""
    return np.linalg.norm(y - A @ x) <= ROUNDOFF * np.linalg.norm(abs(A) @ np.abs(x))


def eliminated(A, fixed):
    """A with identity rows and columns at ``fixed`` (symmetric elimination; common practice, no source)."""
    n = A.shape[0]
    keep = np.ones(n)
    keep[fixed] = 0
    K = sp.diags(keep) @ A @ sp.diags(keep)
    return (K + sp.diags(1 - keep)).tocsr()


@given(meshes(max_n=5))
def test_matvec_and_diagonal_equal_the_assembled_matrix(m):
    x = np.random.default_rng(0).standard_normal(m.n_points)
    for name, coef in coefficient_kinds(m).items():
        A = assemble_stiffness(m, coef)  # the csr strategy, tested against the reference
        for variant in VARIANTS:
            op = StiffnessOperator(m, coef, variant=variant, block_size=8)
            assert product_close(op @ x, A, x), (name, variant)
            assert close(op.diagonal(), A.diagonal()), (name, variant)
        assert product_close(op.serial_matvec(x), A, x), name


@pytest.mark.parametrize("variant", VARIANTS)
def test_dirichlet_rows_are_identity(variant, random_mesh):
    m = random_mesh
    fixed = m.boundary_points()
    coef = np.linspace(1, 3, m.n_triangles)
    op = StiffnessOperator(m, coef, variant=variant, dirichlet=fixed)
    E = eliminated(assemble_stiffness(m, coef), fixed)
    x = np.random.default_rng(1).standard_normal(m.n_points)
    before = x.copy()
    assert product_close(op @ x, E, x)
    assert (x == before).all()  # the input vector is not modified
    assert close(op.diagonal(), E.diagonal())
    assert product_close(op.unmasked_matvec(x), assemble_stiffness(m, coef), x)
    assert op.dtype == np.float64 and op.shape == (m.n_points, m.n_points)


def test_unused_points_get_identity_rows_with_dirichlet():
    base = hatkernels.mesh.rectangle(4, 4)
    with pytest.warns(hatkernels.MeshWarning):
        m = Mesh(np.r_[base.points, [[3.0, 3.0]]], base.triangles)
    op = StiffnessOperator(m, dirichlet=base.boundary_points())
    x = np.ones(m.n_points)
    assert (op @ x)[-1] == 1.0 and 25 in op.fixed
    assert (StiffnessOperator(m) @ x)[-1] == 0.0  # without Dirichlet: the empty row of A


@two_threads
@pytest.mark.parametrize("variant", VARIANTS)
def test_one_and_two_threads_give_identical_bits(variant):
    m = jittered_mesh(30, 9)
    x = np.random.default_rng(2).standard_normal(m.n_points)
    coef = coefficient_kinds(m)["tensor-per-triangle"]
    out = []
    for n in (1, 2):
        with threads(n):
            op = StiffnessOperator(
                m, coef, variant=variant, block_size=16, dirichlet=m.boundary_points()
            )
            out.append((op @ x).tobytes() + op.diagonal().tobytes())
    assert out[0] == out[1]


def test_colouring_is_valid():
    m = hatkernels.mesh.rectangle(20, 20).refine()
    op = StiffnessOperator(m, block_size=16)
    colour_of_block = op._impl.colouring.colour_of_blocks()
    block = np.arange(m.n_triangles) // 16
    for c in range(op.n_colours):
        owner = {}
        for t in np.flatnonzero(colour_of_block[block] == c):
            for p in m.triangles[t]:
                assert owner.setdefault(p, block[t]) == block[t]  # no point shared by two blocks
    assert op.n_colours <= 8


def test_edge_row_blocks_colouring_is_valid():
    """Blocks of rows of the edge list: two blocks of one colour share no point."""
    m = hatkernels.mesh.rectangle(20, 20).refine()
    op = StiffnessOperator(m, variant="edges", block_size=16)
    impl = op._impl
    col, starts, ends = impl.row_colouring, impl.starts, impl.ends
    rows = col.block_size
    assert rows == 16 // 3 and op.n_colours == col.n_colours
    for c in range(op.n_colours):
        owner = {}
        for b in col.blocks[col.ptr[c] : col.ptr[c + 1]]:
            r0, r1 = b * rows, min(m.n_points, (b + 1) * rows)
            points = {i for i in range(r0, r1) if starts[i] < starts[i + 1]}
            points |= set(ends[starts[r0] : starts[r1]].tolist())
            for p in points:
                assert owner.setdefault(p, b) == b  # no point shared by two blocks
    # the edge list by first point is the upper triangle of the pattern
    first = np.repeat(np.arange(m.n_points), np.diff(starts))
    assert np.array_equal(np.column_stack([first, ends]), m.edges())


def fan(k=70):
    """``k`` triangles around one point: every triangle touches the centre."""
    a = 2 * np.pi * np.arange(k) / k
    p = np.r_[[[0.0, 0.0]], np.column_stack([np.cos(a), np.sin(a)])]
    tri = np.column_stack([np.zeros(k, int), 1 + np.arange(k), 1 + (np.arange(k) + 1) % k])
    return Mesh(p, tri)


def test_library_runtime_warnings_are_errors_in_the_tests():
    # pyproject.toml's filterwarnings makes RuntimeWarning an error, so a library
    # warning (this fallback, a solve that did not converge) fails any test that does
    # not expect it with pytest.warns
    with pytest.raises(RuntimeWarning, match="more than 64 colours"):
        StiffnessOperator(fan(), block_size=1)


def test_more_than_64_colours_falls_back_or_refuses():
    m = fan()
    with pytest.warns(RuntimeWarning, match="more than 64 colours"):
        op = StiffnessOperator(m, block_size=1)
    x = np.random.default_rng(3).standard_normal(m.n_points)
    assert product_close(op @ x, assemble_stiffness(m), x)
    with pytest.raises(hatkernels.InputError, match="at most 64 colours"):
        StiffnessOperator(m, variant="factors", block_size=1)


def test_storage():
    m = hatkernels.mesh.rectangle(100, 100)
    A = assemble_stiffness(m)
    csr = A.data.nbytes + A.indices.nbytes + A.indptr.nbytes
    op = StiffnessOperator(m)
    assert op.nbytes < csr / 10  # the geometry variant stores a colouring only
    assert StiffnessOperator(m, variant="factors").nbytes >= 24 * m.n_triangles
    # edges by first point: 12 bytes per edge and 4 per point, under half the CSR matrix
    assert StiffnessOperator(m, variant="edges").nbytes < 0.5 * csr
    assert "colours" in repr(op)


def test_bad_input():
    m = hatkernels.mesh.rectangle(3, 3)
    with pytest.raises(hatkernels.InputError, match="unknown matrix-free variant"):
        StiffnessOperator(m, variant="csr")
    with pytest.raises(hatkernels.InputError, match=r"dirichlet\[1\] = 99 is outside"):
        StiffnessOperator(m, dirichlet=[0, 99])
    with pytest.raises(hatkernels.InputError, match="block_size"):
        StiffnessOperator(m, block_size=0)
    with pytest.raises(hatkernels.InputError, match="coefficient is -1.0"):
        StiffnessOperator(m, -1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        StiffnessOperator(m, dirichlet=np.array([], dtype=int))


# -- each variant class on its own --


def variant(name, m, coef, block_size=8):
    kc = kernel_coefficient(parse_coefficient(coef, m, name="coefficient", tensor=True), m, 2)
    if name == "serial-geometry":
        return SerialGeometryProduct(m, kc)
    return VARIANT_CLASSES[name](m, kc, triangle_colouring(m.triangles, m.n_points, block_size))


def close(y, ref, rtol=ROUNDOFF):
    """``|y - ref| <= rtol |ref|`` in the 2-norm: a tight relative check, not numpy's loose defaults."""
    return np.linalg.norm(y - ref) <= rtol * np.linalg.norm(ref)


@pytest.mark.parametrize("name", CLASSES)
def test_each_variant_class_equals_the_assembled_matrix(name):
    # the assembled matrix (the csr strategy, itself tested against the reference
    # strategy) as reference: common practice, no source
    m = jittered_mesh(8, 11)
    x = np.random.default_rng(5).standard_normal(m.n_points)
    for kind, coef in coefficient_kinds(m).items():
        A = assemble_stiffness(m, coef)
        v = variant(name, m, coef)
        y, ys, diag = np.empty(m.n_points), np.empty(m.n_points), np.empty(m.n_points)
        v.product(x, y)
        v.serial_product(x, ys)
        v.diagonal_into(diag)
        assert product_close(y, A, x), (name, kind)
        assert product_close(ys, A, x), (name, kind)
        assert close(diag, A.diagonal()), (name, kind)
        d2, off = np.empty(m.n_points), np.empty(m.n_points)
        v.diagonal_and_offsum(d2, off)
        assert (d2 == diag).all(), (name, kind)  # one kernel's sums, in one order
        # the element-wise sums of |K_ij| bound the assembled ones (triangle inequality)
        offdiag = abs(A - sp.diags(A.diagonal())).sum(axis=1).A1
        assert (off >= offdiag * (1 - ROUNDOFF)).all(), (name, kind)
        assert v.nbytes >= kernel_coefficient(
            parse_coefficient(coef, m, name="coefficient", tensor=True), m, 2
        ).nbytes


@pytest.mark.parametrize("name", CLASSES)
def test_each_variant_class_off_diagonal_sums_on_right_triangles(name):
    # on right triangles no two element entries of one pair differ in sign, so the
    # element-wise sums of |K_ij| are the assembled ones (common practice, no source)
    m = hatkernels.mesh.rectangle(6, 5)
    A = assemble_stiffness(m, 1.5)
    v = variant(name, m, 1.5)
    diag, off = np.empty(m.n_points), np.empty(m.n_points)
    v.diagonal_and_offsum(diag, off)
    assert close(off, abs(A - sp.diags(A.diagonal())).sum(axis=1).A1)
    assert close(diag, A.diagonal())


@pytest.mark.parametrize("name", CLASSES)
def test_each_variant_class_removes_fixed_columns(name):
    m = jittered_mesh(6, 2)
    coef = coefficient_kinds(m)["tensor-per-triangle"]
    fixed = m.boundary_points()
    is_fixed = np.zeros(m.n_points, dtype=bool)
    is_fixed[fixed] = True
    near = np.flatnonzero(is_fixed[m.triangles].any(axis=1))
    x = np.random.default_rng(6).standard_normal(m.n_points)
    A = assemble_stiffness(m, coef)
    xf = np.where(is_fixed, x, 0.0)
    v = variant(name, m, coef)
    y = np.empty(m.n_points)
    v.product(x, y)
    v.remove_fixed_columns(near, is_fixed, x, y)
    # common practice, no source: the product with the fixed columns taken out
    assert product_close(y, A, x - xf)


@two_threads
@pytest.mark.parametrize("name", VARIANT_CLASSES)
def test_each_variant_class_gives_the_same_bits_on_one_and_two_threads(name):
    m = jittered_mesh(30, 9)
    x = np.random.default_rng(2).standard_normal(m.n_points)
    for kind in ("per-triangle", "tensor"):
        coef = coefficient_kinds(m)[kind]
        out = []
        for n in (1, 2):
            with threads(n):
                v = variant(name, m, coef, block_size=16)
                y, diag, off = np.empty(m.n_points), np.empty(m.n_points), np.empty(m.n_points)
                v.product(x, y)
                v.diagonal_and_offsum(diag, off)
                out.append(y.tobytes() + diag.tobytes() + off.tobytes())
        assert out[0] == out[1], (name, kind)


@pytest.mark.parametrize("name", VARIANTS)
@pytest.mark.parametrize("edges_first", [False, True])
def test_building_a_variant_leaves_the_mesh_as_it_was(name, edges_first):
    m = jittered_mesh(7, 4)
    if edges_first:
        m.edges()
    points, cells = m.points, m.triangles
    p, t = points.copy(), cells.copy()
    cached = m.cached()
    op = StiffnessOperator(m, np.linspace(1, 2, m.n_triangles), variant=name,
                           dirichlet=m.boundary_points())
    op @ np.ones(m.n_points)
    op.diagonal_and_bound()
    assert m.points is points and m.triangles is cells
    assert not points.flags.writeable and not cells.flags.writeable
    assert (points == p).all() and (cells == t).all()
    # the edges variant takes the edge topology it needs and leaves none behind;
    # what the mesh held before stays
    assert m.cached() == cached | {"boundary_edges", "boundary_points"}


def test_kernel_coefficient_is_named():
    m = hatkernels.mesh.rectangle(2, 2)
    per = kernel_coefficient(parse_coefficient(np.arange(1.0, 9.0), m, name="c"), m, 2)
    assert isinstance(per, KernelCoefficient) and not per.is_tensor
    assert per.kappa.tolist() == list(range(1, 9)) and per.kappa_step == 1
    tensor = kernel_coefficient(parse_coefficient(np.eye(2), m, name="c", tensor=True), m, 2)
    assert tensor.is_tensor and tensor.tensor_step == 0 and tensor.tensor.shape == (1, 2, 2)
    assert tensor.nbytes == tensor.kappa.nbytes + tensor.tensor.nbytes


def test_build_variant_picks_the_class_by_name():
    m = hatkernels.mesh.rectangle(4, 4)
    kc = kernel_coefficient(parse_coefficient(None, m, name="c", tensor=True), m, 2)
    for name in VARIANTS:
        v = build_variant(name, m, kc, 8)
        assert type(v) is VARIANT_CLASSES[name] and v.name == name
        op = StiffnessOperator(m, variant=name, block_size=8)
        assert op.nbytes == v.nbytes  # no Dirichlet arrays
