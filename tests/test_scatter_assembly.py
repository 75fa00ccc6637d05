"""The csr numeric phase triangle by triangle (coloured blocks) against the row-by-row
gather and the plain reference assembly."""

import numpy as np
import pytest
from conftest import EPS, jittered_mesh, meshes, refined, two_threads
from hypothesis import given, settings
from hypothesis import strategies as st
from test_assembly import coefficient_kinds
from test_operators import fan

import hatkernels
from hatkernels import StiffnessAssembler, threads
from hatkernels._jit import assembly as _jit_assembly
from hatkernels.assembly.csr import kernel_coefficient
from hatkernels.coefficients import parse_coefficient
from hatkernels.mesh import Mesh


def row_gather(m, coef):
    """The plain row-by-row numeric phase: element values, then each row gathers them."""
    a = StiffnessAssembler(m)
    pl = a.plan
    kc = kernel_coefficient(parse_coefficient(coef, m, name="coefficient", tensor=True), m, 2)
    d, o = np.empty((m.n_triangles, 3)), np.empty((m.n_triangles, 3))
    _jit_assembly.stiffness_values(m.points, pl.triangles, *kc, d, o)
    data = np.empty(pl.nnz)
    _jit_assembly.gather_values(pl.indptr, pl.diag, pl.ptr, pl.codes, pl.slot_next,
                                pl.slot_prev, d, o, data)
    return data


def close(a, b, scale):
    return np.abs(a - b).max() <= 32 * EPS * scale


@pytest.mark.parametrize("kind", ["none", "per-triangle", "per-node", "tensor",
                                  "tensor-per-triangle", "callable"])
def test_scatter_equals_the_gather_and_the_reference(kind):
    m = jittered_mesh(30, 3)
    coef = coefficient_kinds(m)[kind]
    a = StiffnessAssembler(m)
    A = a.assemble(coef)
    assert a._numeric._scatter  # the coloured path ran
    scale = np.abs(A.data).max()
    assert close(A.data, row_gather(m, coef), scale)
    # the plain triangle-loop assembly (reference strategy): an independent code path
    R = StiffnessAssembler(m, strategy="reference").assemble(coef)
    assert abs(A - R).max() <= 32 * EPS * scale


@settings(max_examples=8, deadline=None)
@given(meshes(min_n=2, max_n=9))
def test_scatter_is_symmetric_to_the_bit_and_has_zero_row_sums(m):
    A = StiffnessAssembler(m).assemble(None)
    assert (A - A.T).count_nonzero() == 0
    # constants are in the kernel of the stiffness matrix (common practice, no source)
    assert np.abs(A @ np.ones(m.n_points)).max() <= 64 * EPS * np.abs(A.data).max()


@two_threads
@pytest.mark.parametrize("mixed", [False, True])
def test_one_and_two_threads_give_the_same_bits(mixed):
    # mixed: a refined mesh with a shuffled half, pairs and singles in one plan
    m = _mixed(refined(jittered_mesh(24, 3), 1), 7) if mixed else jittered_mesh(40, 7)
    out = []
    for n in (1, 2):
        with threads(n):
            kinds = coefficient_kinds(m)
            out.append([StiffnessAssembler(m).assemble(kinds[k]).data.tobytes()
                        for k in ("per-triangle", "tensor")])
    assert out[0] == out[1]


def test_without_a_colouring_the_gather_serves(monkeypatch):
    # meshes whose blocks need more than 64 colours get None from triangle_colouring
    import hatkernels.assembly.csr as csr

    monkeypatch.setattr(csr, "triangle_colouring", lambda *args: None)
    m = fan()
    a = StiffnessAssembler(m)
    A = a.assemble(None)
    assert a._numeric._scatter is False
    R = StiffnessAssembler(m, strategy="reference").assemble(None)
    assert abs(A - R).max() <= 32 * EPS * np.abs(A.data).max()


def test_the_mesh_and_coefficient_are_not_modified():
    m = jittered_mesh(12, 1)
    kappa = coefficient_kinds(m)["per-triangle"]
    before = (m.points.copy(), m.triangles.copy(), kappa.copy())
    StiffnessAssembler(m).assemble(kappa)
    for x, y in zip(before, (m.points, m.triangles, kappa), strict=True):
        assert np.array_equal(x, y)


def test_by_rows_gives_the_bits_of_assemble_stiffness():
    # the distributed assembly's owned rows rely on this order (tests/mpi_checks.py)
    m = jittered_mesh(20, 4)
    coef = coefficient_kinds(m)["per-triangle"]
    A = StiffnessAssembler(m, by_rows=True).assemble(coef)
    assert A.data.tobytes() == hatkernels.assemble_stiffness(m, coef).data.tobytes()
    assert close(StiffnessAssembler(m).assemble(coef).data, A.data, np.abs(A.data).max())


@settings(max_examples=8, deadline=None)
@given(meshes(min_n=2, max_n=9))
def test_every_entry_is_written_without_zeroing_first(m):
    # the scatter writes each entry's first term and adds the rest (no zeroing pass): into
    # an array of NaN and into a fresh one it gives the row gather's values, per triangle
    # coefficient and tensor alike
    a = StiffnessAssembler(m)
    for kind in ("per-triangle", "tensor"):
        coef = coefficient_kinds(m)[kind]
        fresh = a.assemble_data(coef)
        stale = a.assemble_data(coef, out=np.full(a.plan.nnz, np.nan))
        assert np.array_equal(fresh, stale)
        assert close(fresh, row_gather(m, coef), np.abs(fresh).max())


def _mixed(m, seed):
    """``m`` with a run of its triangles shuffled: pairs and singles in one plan."""
    rng = np.random.default_rng(seed)
    t = m.triangles.copy()
    k = t.shape[0] // 2
    t[:k] = t[rng.permutation(k)]
    return Mesh(m.points, t)


@settings(max_examples=10, deadline=None)
@given(meshes(min_n=2, max_n=9), st.integers(0, 2**32 - 1), st.integers(0, 2))
def test_pairs_and_singles_hold_every_triangle_once(m, seed, k):
    # the plan's invariants: each triangle once, as a single or in one pair of its own
    # block, a pair's triangles share an edge and are the stored ones rotated
    m = _mixed(refined(m, k), seed)
    a = StiffnessAssembler(m)
    a.assemble_data(None)
    sp = a._numeric._scatter
    size = sp.colouring.block_size
    tri = m.triangles
    seen = np.zeros(m.n_triangles, dtype=int)
    np.add.at(seen, sp.cells.ravel(), 1)
    np.add.at(seen, sp.singles, 1)
    assert (seen == 1).all()
    for b in range(sp.pair_ptr.size - 1):
        assert (sp.cells[sp.pair_ptr[b]:sp.pair_ptr[b + 1]] // size == b).all()
        assert (sp.singles[sp.single_ptr[b]:sp.single_ptr[b + 1]] // size == b).all()
    for (a_, u, v, q), (t1, t2) in zip(sp.quads, sp.cells, strict=True):
        assert _is_rotation(tri[t1], (a_, u, v)) and _is_rotation(tri[t2], (q, v, u))


def _is_rotation(t, r):
    return any(tuple(np.roll(t, -s)) == tuple(r) for s in range(3))


@pytest.mark.parametrize("kind", ["none", "per-triangle", "tensor-per-triangle"])
@pytest.mark.parametrize("k", [0, 2])
def test_pairs_and_singles_give_the_reference(kind, k):
    # the plain triangle-loop assembly (reference strategy) as the specification; the
    # shuffled half has mostly singles, the refined mesh pairs only some triangles
    m = _mixed(refined(jittered_mesh(12, 5), k), 11)
    coef = coefficient_kinds(m)[kind]
    a = StiffnessAssembler(m)
    A = a.assemble(coef)
    sp = a._numeric._scatter
    assert sp.n_pairs > 0 and sp.singles.size > 0
    R = StiffnessAssembler(m, strategy="reference").assemble(coef)
    scale = np.abs(R.data).max()
    assert abs(A - R).max() <= 32 * EPS * scale
    assert (A - A.T).count_nonzero() == 0
    stale = a.assemble_data(coef, out=np.full(a.plan.nnz, np.nan))
    assert np.array_equal(stale, A.data)
