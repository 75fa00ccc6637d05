"""Assembly of stiffness, mass, load and boundary terms, by every strategy."""

import warnings
from math import factorial

import numpy as np
import pyamg
import pytest
import scipy.sparse as sp
from conftest import EPS, jittered_mesh, meshes, relative_error, two_threads
from hypothesis import given
from hypothesis import strategies as st

import hatkernels
from hatkernels import (
    STRATEGIES,
    Mesh,
    StiffnessAssembler,
    assemble_boundary_load,
    assemble_boundary_mass,
    assemble_load,
    assemble_mass,
    assemble_stiffness,
    threads,
)
from hatkernels.mesh import disk, rectangle

UNIT_RIGHT = Mesh([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]], [[0, 1, 2]])


#: Round-off between two ways of summing the same few element contributions per entry,
#: relative to the largest entry: measured up to 3.5 EPS on the random meshes of these
#: tests; a wrong element entry moves an entry by a sizeable fraction of the largest.
ROUNDOFF = 32 * EPS


def close(A, B, rel=ROUNDOFF):
    """Same shape and values equal to round-off relative to the largest entry."""
    A, B = sp.csr_matrix(A), sp.csr_matrix(B)
    scale = max(abs(A).max(), abs(B).max(), 1e-300)
    return A.shape == B.shape and abs(A - B).max() <= rel * scale


def coefficient_kinds(m):
    """One coefficient of each kind the contract allows, on mesh ``m``."""
    x, y = m.points.T
    c = m.points[m.triangles].mean(axis=1)
    theta = 0.3
    R = np.array([[np.cos(theta), -np.sin(theta)], [np.sin(theta), np.cos(theta)]])
    K = R @ np.diag([3.0, 0.5]) @ R.T
    return {
        "none": None,
        "scalar": 2.5,
        "per-triangle": 1.0 + c[:, 0] ** 2,
        "per-node": 1.0 + x + y * y,
        "tensor": K,
        "tensor-per-triangle": K[None] * (1.0 + c[:, 1])[:, None, None],
        "callable": lambda x, y: 1.0 + np.sin(x) * np.cos(y) ** 2,
    }


# -- element matrices --


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_unit_right_triangle_element_matrices(strategy):
    # Textbook element matrices of the triangle (0,0), (1,0), (0,1): stiffness
    # 1/2 [[2,-1,-1],[-1,1,0],[-1,0,1]] and mass |T|/12 [[2,1,1],[1,2,1],[1,1,2]]
    # (C. Johnson, Numerical Solution of Partial Differential Equations by the
    # Finite Element Method, 1987, ch. 1; values from memory).
    K = assemble_stiffness(UNIT_RIGHT, strategy=strategy).toarray()
    assert K == pytest.approx(0.5 * np.array([[2, -1, -1], [-1, 1, 0], [-1, 0, 1]]), abs=1e-15)
    M = assemble_mass(UNIT_RIGHT, strategy=strategy).toarray()
    assert M == pytest.approx(0.5 / 12 * np.array([[2, 1, 1], [1, 2, 1], [1, 1, 2]]), abs=1e-15)


@pytest.mark.parametrize("split", ["rising", "falling", "checkerboard"])
@pytest.mark.parametrize("strategy", STRATEGIES)
def test_uniform_mesh_gives_the_five_point_stencil(split, strategy):
    # On a uniform mesh of right isosceles triangles the interior rows are the
    # 5-point stencil: reference library pyamg.gallery.poisson.  With h = 1/16
    # the fast strategies' arithmetic is exact in binary, so they match bit for
    # bit; the reference strategy's LU solve for the gradients rounds.
    n = 16
    m = rectangle(n, n, split=split)
    A = assemble_stiffness(m, strategy=strategy)
    interior = np.setdiff1d(np.arange(m.n_points), m.boundary_points())
    Ai = A[interior][:, interior]
    Ai.eliminate_zeros()
    P = pyamg.gallery.poisson((n - 1, n - 1), format="csr")
    if strategy == "reference":
        assert abs(Ai - P).max() < 1e-14 and (Ai.indices == P.indices).all()
    else:
        assert (Ai != P).nnz == 0
    assert np.abs(A.diagonal()[interior] - 4).max() <= 4 * 4 * EPS


# -- properties --


@given(meshes())
def test_row_sums_area_and_symmetry(m):
    A = assemble_stiffness(m)
    # constants are in the kernel of the Laplacian (common practice, no source)
    assert np.abs(A @ np.ones(m.n_points)).max() <= ROUNDOFF * abs(A).max()
    assert (A != A.T).nnz == 0  # symmetric to the last bit
    M = assemble_mass(m)
    # int 1 = |unit square|, a sum of M.nnz positive entries: round-off grows with their number
    assert M.sum() == pytest.approx(1.0, rel=M.nnz * EPS, abs=0)
    assert assemble_mass(m, lumped=True).sum() == pytest.approx(1.0, rel=M.nnz * EPS, abs=0)
    assert (M != M.T).nnz == 0
    assert A.has_canonical_format and M.has_canonical_format


@given(meshes())
def test_cotangent_formula(m):
    # A_ij = -(cot a + cot b) / 2 over the angles opposite edge ij
    # (R. J. Duffin, Distributed and lumped networks, J. Math. Mech. 8, 1959;
    # U. Pinkall and K. Polthier, Computing discrete minimal surfaces and their
    # conjugates, Experimental Mathematics 2, 1993)
    A = assemble_stiffness(m).tolil()
    expected = {}
    x = m.points
    for tri in m.triangles:
        for c in range(3):
            i, j, k = tri[(c + 1) % 3], tri[(c + 2) % 3], tri[c]
            u, v = x[i] - x[k], x[j] - x[k]
            # cot = cos / sin = u.v / |u x v|: a few roundings, no arccos to amplify them
            cot = (u @ v) / abs(u[0] * v[1] - u[1] * v[0])
            key = (min(i, j), max(i, j))
            expected[key] = expected.get(key, 0.0) - 0.5 * cot
    scale = abs(A).max()
    for (i, j), value in expected.items():
        assert abs(A[i, j] - value) <= ROUNDOFF * scale, (i, j)


@given(meshes(max_n=5))
def test_all_strategies_agree_for_every_coefficient_kind(m):
    # The reference strategy is the executable specification (plain loops over
    # triangles); every fast path must give its pattern and its values to round-off.
    for name, coef in coefficient_kinds(m).items():
        ref = assemble_stiffness(m, coef, strategy="reference")
        paths = {
            "triplets": assemble_stiffness(m, coef, strategy="triplets"),
            "assemble_stiffness csr": assemble_stiffness(m, coef, strategy="csr"),
            # the csr assembler's two numeric phases: element values stored and
            # gathered (the default), and computed inside the gather (fused)
            "StiffnessAssembler": StiffnessAssembler(m).assemble(coef),
            "StiffnessAssembler fused": StiffnessAssembler(m, fused=True).assemble(coef),
        }
        for path, A in paths.items():
            assert (A.indices == ref.indices).all() and (A.indptr == ref.indptr).all(), (name, path)
            assert close(A, ref), (name, path)
        # fused (entries found in each row) and by rows (slots) add the same terms in the
        # same order: the serial solve, which uses fused, relies on it
        by_rows = StiffnessAssembler(m, by_rows=True).assemble(coef).data
        assert np.array_equal(paths["StiffnessAssembler fused"].data, by_rows), name
        if "tensor" not in name:
            refm = assemble_mass(m, coef, strategy="reference")
            for strategy in ("triplets", "csr"):
                assert close(assemble_mass(m, coef, strategy=strategy), refm), (name, strategy)


@given(meshes(max_n=5), st.integers(0, 2**32 - 1))
def test_renumbering(m, seed):
    rng = np.random.default_rng(seed)
    perm = rng.permutation(m.n_points)  # new -> old
    inv = np.argsort(perm)
    tperm = rng.permutation(m.n_triangles)
    r = Mesh(m.points[perm], inv[m.triangles[tperm]])
    for coef_name, coef in coefficient_kinds(m).items():
        if coef_name == "per-node":
            coef_r = coef[perm]
        elif coef_name in ("per-triangle", "tensor-per-triangle"):
            coef_r = coef[tperm]
        else:
            coef_r = coef
        A, Ar = assemble_stiffness(m, coef), assemble_stiffness(r, coef_r)
        assert close(Ar, A[perm][:, perm]), coef_name
    b, br = assemble_load(m, lambda x, y: x * y), assemble_load(r, lambda x, y: x * y)
    assert relative_error(br, b[perm]) <= ROUNDOFF


@given(
    meshes(max_n=5),
    st.floats(-10, 10),
    st.floats(-10, 10),
    st.floats(0, 2 * np.pi),
    st.floats(1e-3, 1e3),
)
def test_translation_rotation_scaling(m, dx, dy, theta, s):
    R = np.array([[np.cos(theta), -np.sin(theta)], [np.sin(theta), np.cos(theta)]])
    moved = Mesh(s * m.points @ R.T + [dx, dy], m.triangles)
    # Rounding the moved coordinates perturbs each edge by about EPS (s + |d|), an
    # edge of length s h_min relatively by EPS (1 + |d| / s) / h_min; the entries
    # inherit that (measured: under 0.8 of it), so allow 16 times.
    e = m.edges()
    h_min = np.linalg.norm(m.points[e[:, 0]] - m.points[e[:, 1]], axis=1).min()
    rel = 16 * EPS * (1 + (abs(dx) + abs(dy)) / s) / h_min
    # the 2-D Laplacian's stiffness is invariant under similarity transforms;
    # the mass matrix scales with the area, s^2 (change of variables; common practice,
    # no source)
    assert close(assemble_stiffness(moved), assemble_stiffness(m), rel=rel)
    assert close(assemble_mass(moved), s * s * assemble_mass(m), rel=rel)
    # an anisotropic tensor turns with the mesh: K' = R K R^T
    K = np.array([[4.0, 1.0], [1.0, 0.5]])
    assert close(assemble_stiffness(moved, R @ K @ R.T), assemble_stiffness(m, K), rel=rel)


def test_lumped_mass_is_the_row_sums_of_the_consistent_one():
    # lumping = replacing M by the diagonal of its row sums (common practice, no source);
    # the consistent matrix from the reference strategy, the specification
    m = jittered_mesh(6, 8)
    for name, coef in coefficient_kinds(m).items():
        if "tensor" in name:
            continue
        L = assemble_mass(m, coef, lumped=True)
        consistent = assemble_mass(m, coef, strategy="reference")
        assert L.shape == consistent.shape
        assert (L - sp.diags(L.diagonal())).nnz == 0, name  # diagonal only
        assert relative_error(L.diagonal(), consistent.sum(axis=1).A1) <= ROUNDOFF, name


def test_lumped_mass_of_known_triangles():
    # each vertex of a triangle T gets |T|/3 (common practice, no source)
    p = np.array([[0.3, -0.2], [2.0, 0.1], [0.7, 1.4]])
    area = 0.5 * abs((p[1, 0] - p[0, 0]) * (p[2, 1] - p[0, 1]) - (p[2, 0] - p[0, 0]) * (p[1, 1] - p[0, 1]))
    L = assemble_mass(Mesh(p, [[0, 1, 2]]), lumped=True).toarray()
    assert np.diag(L) == pytest.approx(np.full(3, area / 3), rel=4 * EPS, abs=0)
    assert (L == np.diag(np.diag(L))).all()
    # the unit square cut along one diagonal: the two corners on it belong to both
    # triangles (2 * (1/2) / 3), the other two to one (1/6); a coefficient scales them
    m = rectangle(1, 1)
    on_diagonal = np.isclose(m.points[:, 0], m.points[:, 1])
    expected = np.where(on_diagonal, 1 / 3, 1 / 6)
    assert assemble_mass(m, lumped=True).diagonal() == pytest.approx(expected, rel=4 * EPS, abs=0)
    assert assemble_mass(m, 3.0, lumped=True).diagonal() == pytest.approx(3 * expected, rel=4 * EPS, abs=0)


# -- coefficients --


def test_coefficient_equivalences(random_mesh):
    m = random_mesh
    A1 = assemble_stiffness(m)
    assert close(assemble_stiffness(m, 3.0), 3.0 * A1)
    assert close(assemble_stiffness(m, np.eye(2)), A1)
    # a linear coefficient: per-node values and the callable agree, because the
    # centroid rule integrates a linear function exactly
    f = lambda x, y: 2.0 + x - 0.5 * y  # noqa: E731
    nodal = f(*m.points.T)
    assert close(assemble_stiffness(m, nodal), assemble_stiffness(m, f, quadrature=1))
    # mass with a linear coefficient is a cubic integrand: the degree-5 rule is exact
    assert close(assemble_mass(m, nodal), assemble_mass(m, f, quadrature=5))
    assert close(assemble_mass(m, 2.0), 2.0 * assemble_mass(m))
    per_tri = np.linspace(1, 2, m.n_triangles)
    assert close(
        assemble_stiffness(m, per_tri), assemble_stiffness(m, per_tri[:, None, None] * np.eye(2))
    )


def test_coefficient_errors_name_the_place(random_mesh):
    m = random_mesh
    bad = np.ones(m.n_triangles)
    bad[5] = -1.0
    with pytest.raises(hatkernels.InputError, match="coefficient is -1.0 at triangle 5"):
        assemble_stiffness(m, bad)
    bad = np.ones(m.n_points)
    bad[3] = np.nan
    with pytest.raises(hatkernels.InputError, match="coefficient is nan at point 3"):
        assemble_stiffness(m, bad)
    with pytest.raises(hatkernels.InputError, match="has 7 values, but there are .* points and .* triangles"):
        assemble_stiffness(m, np.ones(7))
    with pytest.raises(hatkernels.InputError, match="not symmetric"):
        assemble_stiffness(m, np.array([[1.0, 0.5], [0.0, 1.0]]))
    K = np.tile(np.eye(2), (m.n_triangles, 1, 1))
    K[9] = [[1.0, 2.0], [2.0, 1.0]]
    with pytest.raises(hatkernels.InputError, match="tensor of triangle 9 is not positive definite"):
        assemble_stiffness(m, K)
    with pytest.raises(hatkernels.InputError, match=r"returned shape \(2,\)"):
        assemble_stiffness(m, lambda x, y: np.ones(2))
    with pytest.raises(
        hatkernels.InputError, match=r"is nan at \(.*\), a quadrature point of triangle"
    ):
        assemble_stiffness(m, lambda x, y: np.where(x > 0.5, np.nan, 1.0))
    with pytest.raises(hatkernels.InputError, match="scalar"):
        assemble_mass(m, np.eye(2))
    with pytest.raises(hatkernels.InputError, match="unknown assembly strategy"):
        assemble_stiffness(m, strategy="fast")
    with pytest.raises(hatkernels.InputError, match="expected a hatkernels.Mesh"):
        assemble_stiffness(m.points)
    with pytest.raises(hatkernels.InputError, match="real numbers"):
        assemble_stiffness(m, np.ones(m.n_points, dtype=complex))


def test_ambiguous_arrays_must_be_tagged():
    base = rectangle(3, 3)  # 16 points, 18 triangles: add two unused points
    with pytest.warns(hatkernels.MeshWarning):
        m = Mesh(np.r_[base.points, [[5.0, 5.0], [6.0, 5.0]]], base.triangles)
    assert m.n_points == m.n_triangles
    values = np.linspace(1, 2, m.n_points)
    with pytest.raises(hatkernels.InputError, match="per_point"):
        assemble_stiffness(m, values)
    A_node = assemble_stiffness(m, hatkernels.per_point(values))
    A_tri = assemble_stiffness(m, hatkernels.per_triangle(values))
    assert not close(A_node, A_tri)
    assert close(A_tri, assemble_stiffness(m, hatkernels.per_triangle(values), strategy="reference"))


def test_inputs_are_not_modified(random_mesh):
    m = random_mesh
    coef = np.linspace(1, 2, m.n_points)
    coef.setflags(write=False)  # read-only input is accepted
    before = coef.copy()
    for strategy in STRATEGIES:
        assemble_stiffness(m, coef, strategy=strategy)
        assemble_mass(m, coef, strategy=strategy)
    assemble_load(m, coef)
    assert (coef == before).all()


# -- the csr strategy: threads, index width, reuse --


@two_threads
def test_one_and_two_threads_give_identical_bits():
    m = jittered_mesh(40, 5)
    kinds = coefficient_kinds(m)
    results = []
    for n in (1, 2):
        with threads(n):
            assembler = StiffnessAssembler(m)
            out = [assembler.plan.indices.copy(), assembler.plan.slot_next.copy()]
            for coef in kinds.values():
                out.append(assembler.assemble(coef).data)
            out.append(StiffnessAssembler(m, fused=True).assemble(kinds["tensor"]).data)
            out.append(assembler.assemble_mass(kinds["per-node"]).data)
            out.append(m.refine().triangles)
        results.append(out)
    for a, b in zip(*results, strict=True):
        assert a.tobytes() == b.tobytes()


def test_int64_indices_give_the_same_matrix():
    m = jittered_mesh(8, 2)
    A32 = StiffnessAssembler(m).assemble(2.0)
    asm64 = StiffnessAssembler(m, index_dtype=np.int64)
    A64 = asm64.assemble(2.0)
    assert asm64.plan.dtype == np.int64 and asm64.plan.codes.dtype == np.int64
    assert asm64.plan.slot_next.dtype == np.int64 and asm64.plan.triangles.dtype == np.int64
    assert asm64._numeric._scatter.quads.dtype == np.int64  # the scatter's pairs too
    # (scipy itself narrows the matrix's indices back to int32 when they fit)
    assert (A32.data == A64.data).all() and (A32.indices == A64.indices).all()


def test_assembler_reuses_the_pattern_and_hands_out_independent_matrices(random_mesh):
    assembler = StiffnessAssembler(random_mesh)
    A = assembler.assemble(1.0)
    B = assembler.assemble(np.linspace(1, 3, random_mesh.n_triangles))
    assert not np.shares_memory(A.indices, B.indices)
    assert not np.shares_memory(A.indices, assembler.plan.indices)
    data = assembler.assemble_data(1.0)
    assert (data == A.data).all()
    out = np.empty_like(data)
    assert assembler.assemble_data(1.0, out=out) is out
    with pytest.raises(hatkernels.InputError, match="assemble_data: out has shape"):
        assembler.assemble_data(1.0, out=np.empty(3))
    # written in place, so refused rather than converted (common practice, no source)
    read_only = np.empty_like(data)
    read_only.flags.writeable = False
    for bad, why in ((np.empty(2 * data.size)[::2], "strided"), (read_only, "read-only"),
                     (np.empty(data.size, np.float32), "float32")):
        with pytest.raises(hatkernels.InputError, match=why):
            assembler.assemble_data(1.0, out=bad)
    assert "entries" in repr(assembler.plan)


def test_unused_points_give_empty_rows():
    base = rectangle(2, 2)
    with pytest.warns(hatkernels.MeshWarning):
        m = Mesh(np.r_[base.points, [[3.0, 3.0]]], base.triangles)
    for strategy in STRATEGIES:
        A = assemble_stiffness(m, strategy=strategy)
        assert A.shape == (10, 10) and A.indptr[-1] == A.indptr[-2]


# -- load vectors --


def _poly_mul(p, q):
    out = {}
    for ea, ca in p.items():
        for eb, cb in q.items():
            e = tuple(a + b for a, b in zip(ea, eb, strict=True))
            out[e] = out.get(e, 0.0) + ca * cb
    return out


def exact_load_of_monomial(mesh, i, j):
    """int_T x^i y^j phi_a for each triangle, by expanding in barycentric coordinates.

    x = sum_k x_k l_k, and int_T l^p = 2|T| p! q! r! / (p+q+r+2)! (Eisenberg and
    Malvern, Int. J. Numer. Meth. Eng. 7, 1973).
    """
    out = np.zeros((mesh.n_triangles, 3))
    for t, tri in enumerate(mesh.triangles):
        X = mesh.points[tri]
        lin_x = {(1, 0, 0): X[0, 0], (0, 1, 0): X[1, 0], (0, 0, 1): X[2, 0]}
        lin_y = {(1, 0, 0): X[0, 1], (0, 1, 0): X[1, 1], (0, 0, 1): X[2, 1]}
        poly = {(0, 0, 0): 1.0}
        for _ in range(i):
            poly = _poly_mul(poly, lin_x)
        for _ in range(j):
            poly = _poly_mul(poly, lin_y)
        area = mesh.areas()[t]
        for a in range(3):
            hat = {tuple(int(k == a) for k in range(3)): 1.0}
            for e, c in _poly_mul(poly, hat).items():
                out[t, a] += (
                    c * 2 * area * np.prod([factorial(k) for k in e]) / factorial(sum(e) + 2)
                )
    return np.bincount(mesh.triangles.ravel(), weights=out.ravel(), minlength=mesh.n_points)


@pytest.mark.parametrize("degree", [1, 2, 5])
def test_load_is_exact_for_polynomials_within_the_rule(degree):
    m = jittered_mesh(3, 11)
    for total in range(degree):  # f phi has degree total + 1 <= degree
        for i in range(total + 1):
            j = total - i
            b = assemble_load(m, lambda x, y: x**i * y**j, quadrature=degree)  # noqa: B023
            # the rule's weights and points are rounded decimals of irrational numbers:
            # agreement to round-off (Eisenberg and Malvern 1973 for the exact value)
            assert relative_error(b, exact_load_of_monomial(m, i, j)) <= ROUNDOFF


def test_load_of_other_kinds(random_mesh):
    m = random_mesh
    fn = np.cos(m.points[:, 0]) + m.points[:, 1]
    # a nodal load is the linear interpolant: b = M f exactly (common practice, no source)
    assert relative_error(assemble_load(m, fn), assemble_mass(m) @ fn) <= ROUNDOFF
    assert relative_error(assemble_load(m, 2.0), assemble_mass(m) @ np.full(m.n_points, 2.0)) <= ROUNDOFF
    ft = np.linspace(0, 1, m.n_triangles)
    # sum_i phi_i = 1: the entries of a per-triangle load add up to int f
    assert assemble_load(m, ft).sum() == pytest.approx(ft @ m.areas(), rel=ROUNDOFF, abs=0)
    with pytest.raises(hatkernels.InputError, match="load is inf at point 0"):
        assemble_load(m, np.r_[np.inf, np.ones(m.n_points - 1)])


def test_load_kernel_equals_the_plain_sum(random_mesh):
    """The one-pass kernel for per-triangle values against NumPy's bincount of element values."""
    m = random_mesh
    t = m.triangles
    for f in (2.5, np.linspace(-1.0, 3.0, m.n_triangles)):
        v = m.areas() * (np.asarray(f) / 3.0) * np.ones(m.n_triangles)
        plain = sum(np.bincount(t[:, a], weights=v, minlength=m.n_points) for a in range(3))
        assert assemble_load(m, f) == pytest.approx(plain, rel=1e-14, abs=1e-17)


# -- boundary terms --


def test_boundary_load_and_mass():
    m = disk(6, radius=2.0)
    perimeter = m.boundary_length()
    # sum_i phi_i = 1 on each side: the entries add up to the integral over the
    # boundary (common practice, no source)
    assert assemble_boundary_load(m, 3.0).sum() == pytest.approx(3.0 * perimeter, rel=ROUNDOFF, abs=0)
    R = assemble_boundary_mass(m, 0.5)
    assert R.sum() == pytest.approx(0.5 * perimeter, rel=ROUNDOFF, abs=0)
    assert (R != R.T).nnz == 0
    # R @ 1 = int r phi_i ds, the boundary load of r (same integral)
    g = lambda x, y: 1.0 + x * x  # noqa: E731
    assert relative_error(R @ np.ones(m.n_points), assemble_boundary_load(m, 0.5)) <= ROUNDOFF
    # a linear g: the nodal form (exact for the interpolant) equals the callable
    lin = lambda x, y: 1.0 + x - 2 * y  # noqa: E731
    assert relative_error(assemble_boundary_load(m, lin(*m.points.T)),
                          assemble_boundary_load(m, lin)) <= ROUNDOFF
    # r g phi_i phi_j with r linear: the nodal closed form against Gauss-Legendre
    Rn = assemble_boundary_mass(m, g(*m.points.T) * 0 + lin(*m.points.T) + 5)
    Rc = assemble_boundary_mass(m, lambda x, y: lin(x, y) + 5, quadrature=3)
    assert close(Rn, Rc)


def test_boundary_terms_on_given_edges():
    m = rectangle(4, 4)
    bottom = m.boundary_edges()[np.all(m.points[m.boundary_edges()][:, :, 1] == 0, axis=1)]
    # the bottom side has length 1; per-edge values integrate over edges of length 1/4
    assert assemble_boundary_load(m, 1.0, bottom).sum() == pytest.approx(1.0, rel=ROUNDOFF, abs=0)
    per_edge = np.arange(1.0, 5.0)
    assert assemble_boundary_load(m, hatkernels.per_edge(per_edge), bottom).sum() == pytest.approx(
        per_edge.sum() / 4, rel=ROUNDOFF, abs=0
    )
    with pytest.raises(hatkernels.InputError, match=r"edge 1 \(0, 7\) is not an edge of the mesh"):
        assemble_boundary_load(m, 1.0, [[0, 1], [0, 7]])
    with pytest.raises(hatkernels.InputError, match="edge 0 refers to a point outside"):
        assemble_boundary_load(m, 1.0, [[0, 99]])
    with pytest.raises(hatkernels.InputError, match="boundary coefficient is -1.0"):
        assemble_boundary_mass(m, -1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assemble_boundary_mass(m, 1.0, np.empty((0, 2), dtype=int))
