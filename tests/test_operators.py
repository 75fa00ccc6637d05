"""The matrix-free stiffness operator against the assembled matrix."""

import warnings

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import jittered_mesh, meshes
from hypothesis import given
from test_assembly import coefficient_kinds

import hatkernels
from hatkernels import Mesh, StiffnessOperator, assemble_stiffness, threads
from hatkernels.operators import VARIANTS


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
            y = op @ x
            assert np.abs(y - A @ x).max() <= 1e-12 * np.abs(A).max() * np.abs(x).max() * 10, (
                name,
                variant,
            )
            assert np.allclose(op.diagonal(), A.diagonal(), rtol=1e-13, atol=0), (name, variant)
        assert np.allclose(op.serial_matvec(x), A @ x, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("variant", VARIANTS)
def test_dirichlet_rows_are_identity(variant, random_mesh):
    m = random_mesh
    fixed = m.boundary_points()
    coef = np.linspace(1, 3, m.n_triangles)
    op = StiffnessOperator(m, coef, variant=variant, dirichlet=fixed)
    E = eliminated(assemble_stiffness(m, coef), fixed)
    x = np.random.default_rng(1).standard_normal(m.n_points)
    before = x.copy()
    assert op @ x == pytest.approx(E @ x, rel=1e-12, abs=1e-12)
    assert (x == before).all()  # the input vector is not modified
    assert op.diagonal() == pytest.approx(E.diagonal())
    assert op.unmasked_matvec(x) == pytest.approx(assemble_stiffness(m, coef) @ x)
    assert op.dtype == np.float64 and op.shape == (m.n_points, m.n_points)


def test_unused_points_get_identity_rows_with_dirichlet():
    base = hatkernels.mesh.rectangle(4, 4)
    with pytest.warns(hatkernels.MeshWarning):
        m = Mesh(np.r_[base.points, [[3.0, 3.0]]], base.triangles)
    op = StiffnessOperator(m, dirichlet=base.boundary_points())
    x = np.ones(m.n_points)
    assert (op @ x)[-1] == 1.0 and 25 in op.fixed
    assert (StiffnessOperator(m) @ x)[-1] == 0.0  # without Dirichlet: the empty row of A


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
    colour_of_block = np.empty(len(op._blocks), dtype=int)
    for c in range(op.n_colours):
        colour_of_block[op._blocks[op._colour_ptr[c] : op._colour_ptr[c + 1]]] = c
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
    rows, starts, ends = op._rows_per_block, op._starts, op._ends
    for c in range(op.n_colours):
        owner = {}
        for b in op._edge_blocks[op._edge_colour_ptr[c] : op._edge_colour_ptr[c + 1]]:
            r0, r1 = b * rows, min(m.n_points, (b + 1) * rows)
            points = {i for i in range(r0, r1) if starts[i] < starts[i + 1]}
            points |= set(ends[starts[r0] : starts[r1]].tolist())
            for p in points:
                assert owner.setdefault(p, b) == b  # no point shared by two blocks
    # the edge list by first point is the upper triangle of the pattern
    first = np.repeat(np.arange(m.n_points), np.diff(starts))
    assert np.array_equal(np.column_stack([first, ends]), m.edges())


def test_more_than_64_colours_falls_back_or_refuses():
    # a fan of 70 triangles around one point: every triangle touches the centre
    k = 70
    a = 2 * np.pi * np.arange(k) / k
    p = np.r_[[[0.0, 0.0]], np.column_stack([np.cos(a), np.sin(a)])]
    tri = np.column_stack([np.zeros(k, int), 1 + np.arange(k), 1 + (np.arange(k) + 1) % k])
    m = Mesh(p, tri)
    with pytest.warns(RuntimeWarning, match="more than 64 colours"):
        op = StiffnessOperator(m, block_size=1)
    x = np.random.default_rng(3).standard_normal(m.n_points)
    assert op @ x == pytest.approx(assemble_stiffness(m) @ x)
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
