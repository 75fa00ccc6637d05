"""The vectors of every public method that writes into a caller's array are checked.

``hatkernels.checks.into_vectors`` is the one place: inputs (only read) are any real
vector of the right length, converted into a float64 copy unless they are a C-contiguous
float64 one; outputs must be writable, C-contiguous, float64 (float32 too where a
layout's single-precision levels need it), of the right length, and share no memory
with an input.  Anything else is an InputError naming the method and the argument,
raised before anything is written (common practice for input validation, no source).

Valid calls are checked against an outside reference named beside each case: the
stored assembly with scipy's product, scipy's solvers, the dense incomplete Cholesky
of :func:`hatkernels.precond.ichol.ic0_reference`, the stored multigrid against the
patch one (two implementations), or, for cycles with no second implementation, that
one cycle from zero contracts the error in the energy norm (common practice, no source).
"""

import copy
import dataclasses
import functools
import tempfile
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg as sl
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from conftest import jittered_mesh, refined, relative_error
from hypothesis import given, settings
from hypothesis import strategies as st

import hatkernels as hk
from hatkernels.checks import into_vectors
from hatkernels.errors import InputError
from hatkernels.mesh import cuboid, rectangle
from hatkernels.patches import PatchLayout, PatchMultigrid, PatchOperator, element_stiffness
from hatkernels.patches.multigrid import FinestSmoother
from hatkernels.patches.tet_multigrid import TetMultigrid
from hatkernels.patches.tets import TetLayout, TetOperator, class_weights
from hatkernels.precond import (
    ClassicalAMG,
    GeometricMultigrid,
    Identity,
    IncompleteCholesky,
    Jacobi,
    RugeStubenAMG,
    SmoothedAggregationAMG,
    SparseDirect,
)
from hatkernels.precond.ichol import ic0_reference

#: Two implementations of one linear operator agree to round-off (~1e-15).
IDENTITY = 1e-12


# -- the systems, built once --------------------------------------------------------------


def masked(A, fixed):
    """``A`` with identity rows and columns at ``fixed`` (scipy; the symmetric elimination)."""
    keep = np.ones(A.shape[0])
    keep[fixed] = 0.0
    D = sp.diags_array(keep)
    return (D @ A @ D + sp.diags_array(1.0 - keep)).tocsr()


@functools.cache
def stiffness_2d():
    m = jittered_mesh(8, 3)
    fixed = m.boundary_points()
    return hk.StiffnessOperator(m, dirichlet=fixed), masked(hk.assemble_stiffness(m), fixed)


@functools.cache
def stiffness_3d():
    # on tetrahedra with Dirichlet points the product runs on a masked copy of x
    m = cuboid(2)
    fixed = m.boundary_points()
    return hk.StiffnessOperator(m, dirichlet=fixed), masked(hk.assemble_stiffness(m), fixed)


@functools.cache
def reduced_system(n=12, seed=5):
    """The stored system on the free points of a jittered square (SPD)."""
    m = jittered_mesh(n, seed)
    return hk.apply_dirichlet(hk.assemble_stiffness(m), np.zeros(m.n_points),
                              m.boundary_points()).A.tocsr()


@functools.cache
def patches_2d():
    # right triangles only: the patch and the stored cycles are the same linear operator
    # (tests/test_patches.py, test_multigrid_equals_the_stored_cycle)
    coarse, k = rectangle(3, 2), 2
    fine = refined(coarse, k)
    layout = PatchLayout(coarse, k, held_sides=coarse.boundary_edges())
    kappa = np.random.default_rng(1).uniform(0.5, 2.0, coarse.n_triangles)
    fine_kappa = hk.per_triangle(np.repeat(kappa, 4**k))
    fixed = fine.boundary_points()
    stored = hk.StiffnessOperator(fine, coefficient=fine_kappa, dirichlet=fixed)
    return {
        "layout": layout, "fine": fine,
        "A": PatchOperator(layout, element_stiffness(coarse, kappa), k),
        "M": PatchMultigrid(layout, kappa),
        "G": GeometricMultigrid(stored, coarse="direct"),
        "K": masked(hk.assemble_stiffness(fine, fine_kappa), fixed), "fixed": fixed,
    }


@functools.cache
def patches_3d():
    coarse, k = cuboid(1), 2
    fine = refined(coarse, k)
    layout = TetLayout(coarse, k, held_faces=coarse.boundary_faces())
    kappa = np.random.default_rng(2).uniform(0.5, 2.0, coarse.n_cells)
    W, _ = class_weights(coarse.points[layout.topo[0]], kappa)
    fixed = layout.to_refined(layout.held_mask(), mesh=fine).astype(bool)
    free = (~fixed).astype(float)
    A = hk.assemble_stiffness(fine, hk.per_cell(np.repeat(kappa, 8**k)))
    K = (A.multiply(free[:, None]).multiply(free[None, :])).tocsr()  # held rows zero
    return {"layout": layout, "fine": fine, "A": TetOperator(layout, W, k),
            "M": TetMultigrid(layout, kappa), "K": K, "free": free}


# -- the cases: every public method that writes into a given vector -----------------------


@dataclasses.dataclass
class Case:
    owner: str  # "Class.method", the start of every message
    build: object  # () -> (call, n, reference); call(*inputs, out)
    inputs: tuple = ("x",)  # names of the vectors only read, in call order
    output: str = "out"

    def __repr__(self):
        return self.owner


def _stiffness(which, method):
    def build():
        op, K = which()
        if method == "matvec_into":
            # reference: scipy's product with the stored assembly, eliminated
            return op.matvec_into, op.shape[0], lambda x: K @ x
        return op.residual_into, op.shape[0], lambda x, b: b - K @ x
    return build


def _diagonal(mesh, variant):
    def build():
        impl = hk.StiffnessOperator(mesh(), variant=variant)._impl
        # reference: the stored assembly's diagonal
        return impl.diagonal_into, mesh().n_points, lambda: hk.assemble_stiffness(
            mesh()).diagonal()
    return build


def _patch_operator():
    p = patches_2d()
    lay = p["layout"]
    # reference: the stored assembly of the stored refinement, eliminated
    return (p["A"].matvec_into, lay.size(lay.k),
            lambda x: lay.from_refined(p["K"] @ lay.to_refined(x)))


def _multigrid(method, patch):
    def build():
        p = patches_2d()
        lay = p["layout"]
        # reference: the stored geometric multigrid on the stored refinement for the patch
        # one, and the other way round (two implementations of the same cycle)
        mine, other = (p["M"], p["G"]) if patch else (p["G"], p["M"])
        there, back = ((lay.to_refined, lay.from_refined) if patch
                       else (lay.from_refined, lay.to_refined))

        def ref(r):
            out = np.empty(other.shape[0])
            getattr(other, method)(there(r), out)
            return back(out)
        return getattr(mine, method), mine.shape[0], ref
    return build


def _finest_smoother():
    p = patches_2d()
    lay, level, K, fixed = p["layout"], p["M"].levels[-1], p["K"], p["fixed"]
    dinv = 1.0 / K.diagonal()
    dinv[fixed] = 0.0  # no smoothing at held points

    def ref(r):
        # reference: Chebyshev iteration of degree 2 from zero on D^-1 A (Y. Saad,
        # Iterative methods for sparse linear systems, 2nd ed., 2003, Algorithm 12.1)
        r = lay.to_refined(r)
        sigma = level.theta / level.delta
        d = dinv * r / level.theta
        x, res = d.copy(), r - K @ d
        rho0, rho1 = 1.0 / sigma, 1.0 / (2.0 * sigma - 1.0 / sigma)
        x += rho1 * rho0 * d + 2.0 * rho1 / level.delta * (dinv * res)
        return lay.from_refined(x)
    return FinestSmoother(p["M"]).apply_into, lay.size(lay.k), ref


def _tet_operator():
    p = patches_3d()
    lay, fine = p["layout"], p["fine"]
    # reference: the stored assembly of the stored refinement, held rows and columns zero
    return (p["A"].matvec_into, lay.size(lay.k),
            lambda x: lay.from_refined(p["K"] @ lay.to_refined(x, mesh=fine), mesh=fine))


def _tet_multigrid(method):
    def build():
        p = patches_3d()
        return getattr(p["M"], method), p["layout"].size(p["layout"].k), None
    return build


def _assembled(cls, method="apply_into", **options):
    def build():
        A = reduced_system()
        M = cls(A, **options)
        return getattr(M, method), A.shape[0], None
    return build


def _jacobi():
    A = reduced_system()
    # reference: scipy's diagonal of the matrix
    return Jacobi(A).apply_into, A.shape[0], lambda r: r / A.diagonal()


def _identity():
    A = reduced_system()
    return Identity(A).apply_into, A.shape[0], lambda r: r.astype(float)


def _direct():
    A = reduced_system()
    # reference: scipy's sparse solve (the base class's apply_into)
    return SparseDirect(A).apply_into, A.shape[0], lambda r: spla.spsolve(A.tocsc(), r)


def _ichol():
    A = reduced_system(6, 1)  # the dense reference is cubic in n
    L = ic0_reference(A)
    # reference: the readable dense IC(0) and scipy's triangular solves
    return (IncompleteCholesky(A).apply_into, A.shape[0],
            lambda r: sl.solve_triangular(L.T, sl.solve_triangular(L, r, lower=True)))


CASES = [
    Case("StiffnessOperator.matvec_into", _stiffness(stiffness_2d, "matvec_into")),
    Case("StiffnessOperator.matvec_into", _stiffness(stiffness_3d, "matvec_into")),
    Case("StiffnessOperator.residual_into", _stiffness(stiffness_2d, "residual_into"),
         ("x", "b")),
    Case("StiffnessOperator.residual_into", _stiffness(stiffness_3d, "residual_into"),
         ("x", "b")),
    Case("GeometryProduct.diagonal_into",
         _diagonal(lambda: jittered_mesh(6, 2), "geometry"), ()),
    Case("EdgesProduct.diagonal_into", _diagonal(lambda: jittered_mesh(6, 2), "edges"), ()),
    Case("TetrahedronEdges.diagonal_into", _diagonal(lambda: cuboid(2), None), ()),
    Case("PatchOperator.matvec_into", _patch_operator),
    Case("PatchMultigrid.apply_into", _multigrid("apply_into", True), ("r",)),
    Case("PatchMultigrid.full_cycle_into", _multigrid("full_cycle_into", True), ("r",)),
    Case("FinestSmoother.apply_into", _finest_smoother, ("r",), "z"),
    Case("GeometricMultigrid.apply_into", _multigrid("apply_into", False), ("r",)),
    Case("GeometricMultigrid.full_cycle_into", _multigrid("full_cycle_into", False), ("r",)),
    Case("TetOperator.matvec_into", _tet_operator),
    Case("TetMultigrid.apply_into", _tet_multigrid("apply_into"), ("r",)),
    Case("TetMultigrid.full_cycle_into", _tet_multigrid("full_cycle_into"), ("r",)),
    Case("SmoothedAggregationAMG.apply_into", _assembled(SmoothedAggregationAMG), ("r",)),
    Case("RugeStubenAMG.apply_into", _assembled(RugeStubenAMG), ("r",)),
    Case("RugeStubenAMG.full_cycle_into", _assembled(RugeStubenAMG, "full_cycle_into"),
         ("b",), "x"),
    Case("SmoothedAggregationAMG.full_cycle_into",
         _assembled(SmoothedAggregationAMG, "full_cycle_into"), ("b",), "x"),
    Case("ClassicalAMG.apply_into", _assembled(ClassicalAMG, max_coarse=10), ("r",)),
    Case("IncompleteCholesky.apply_into", _ichol, ("r",), "z"),
    Case("Jacobi.apply_into", _jacobi, ("r",), "z"),
    Case("Identity.apply_into", _identity, ("r",), "z"),
    Case("SparseDirect.apply_into", _direct, ("r",), "z"),
]
IDS = [f"{c.owner}-{i}" for i, c in enumerate(CASES)]


@functools.cache
def built(i):
    return CASES[i].build()


def valid_inputs(case, n, rng):
    """Float64 inputs of the case; zero at held points where a multigrid needs it."""
    xs = [rng.standard_normal(n) for _ in case.inputs]
    if case.owner.startswith("Tet") and case.inputs:
        xs = [patches_3d()["layout"].zero_held(x) for x in xs]
    return xs


def energy_contracts(A, r, z):
    """``z``, one cycle from zero for ``A u = r``, reduces the error in the energy norm:
    ``||u - z||_A^2 < ||u||_A^2 / 2``, ``u`` from scipy's solve (common practice, no
    source: a convergent cycle contracts the error)."""
    u = spla.spsolve(A.tocsc(), r)
    e = u - z
    return e @ (A @ e) < 0.5 * (u @ (A @ u))


def check_result(case, i, xs, out):
    """``out`` (of ``call(*xs, out)``) against the case's outside reference."""
    _, _, ref = built(i)
    xs = [np.asarray(x, dtype=float) for x in xs]
    if ref is not None:
        assert relative_error(out, ref(*xs)) <= IDENTITY
    elif case.owner.startswith("Tet"):
        p = patches_3d()
        lay, fine, free = p["layout"], p["fine"], np.flatnonzero(p["free"])
        assert np.array_equal(out, lay.zero_held(out.copy()))  # held points stay 0
        r, z = (lay.to_refined(v, mesh=fine)[free] for v in (xs[0], out))
        assert energy_contracts(p["K"][free][:, free], r, z)  # K is 0 on held rows
    else:
        assert energy_contracts(reduced_system(), xs[0], out)


# -- valid calls ----------------------------------------------------------------------------


def variants_of(x, kind):
    """The same values as another valid input: int, float32, list, strided, read-only."""
    if kind == "float64":
        return x
    if kind == "int":
        return np.rint(4 * x).astype(np.int64)
    if kind == "float32":
        return x.astype(np.float32)
    if kind == "list":
        return x.tolist()
    if kind == "strided":
        s = np.zeros(2 * x.size)
        s[::2] = x
        return s[::2]
    r = x.copy()
    r.flags.writeable = False
    return r


def pairs(kinds, needs_input):
    """``(case, kind)`` for every case, the kinds in ``needs_input`` only where it has an
    input vector."""
    return [pytest.param(i, kind, id=f"{IDS[i]}-{kind}") for i, c in enumerate(CASES)
            for kind in kinds if c.inputs or kind not in needs_input]


INPUT_KINDS = ["float64", "int", "float32", "list", "strided", "read-only"]


@pytest.mark.parametrize("i, kind", pairs(INPUT_KINDS, INPUT_KINDS[1:]))
def test_valid_calls_give_the_reference_result_and_keep_the_inputs(i, kind):
    case = CASES[i]
    call, n, _ = built(i)
    xs = [variants_of(x, kind) for x in valid_inputs(case, n, np.random.default_rng(i))]
    kept = [np.array(x, copy=True) for x in xs]
    out = np.full(n, np.nan)
    assert call(*xs, out) is out
    check_result(case, i, xs, out)
    for x, k in zip(xs, kept, strict=True):
        assert np.array_equal(np.asarray(x), k)  # inputs never modified
    if case.inputs and kind != "float64":  # converted: the same bits as the float64 values
        same = np.empty(n)
        call(*[np.asarray(x, dtype=np.float64).copy() for x in xs], same)
        assert np.array_equal(out, same)


# -- bad calls ------------------------------------------------------------------------------


def bad_output(kind, n, xs):
    if kind == "short":
        return np.empty(5 if n != 5 else 4)
    if kind == "long":
        return np.empty(n + 1)
    if kind == "2-D":
        return np.empty((n, 1))
    if kind == "float32":
        return np.empty(n, dtype=np.float32)
    if kind == "int":
        return np.zeros(n, dtype=np.int64)
    if kind == "strided":
        return np.zeros(2 * n)[::2]
    if kind == "list":
        return [0.0] * n
    if kind == "read-only":
        out = np.zeros(n)
        out.flags.writeable = False
        return out
    if kind == "is-input":
        return xs[0]
    raise AssertionError(kind)


OUTPUT_FAULTS = ["short", "long", "2-D", "float32", "int", "strided", "list", "read-only",
                 "is-input", "overlaps-input"]
OUTPUT_WORDS = {"short": "has shape", "long": "has shape", "2-D": "has shape",
                "float32": "float32", "int": "int64", "strided": "strided", "list": "list",
                "read-only": "read-only", "is-input": "shares memory with",
                "overlaps-input": "shares memory with"}


def refused(case, call, args, out, argument, word):
    """``call(*args, out)`` raises an InputError naming the method, ``argument`` and
    ``word``, before anything is written; the inputs are kept."""
    kept = copy.deepcopy(args)
    out_kept = np.array(out, copy=True) if isinstance(out, np.ndarray) else None
    with pytest.raises(InputError) as info:
        call(*args, out)
    text = str(info.value)
    assert text.startswith(f"{case.owner}: {argument} ") and word in text, text
    for a, k in zip(args, kept, strict=True):
        assert np.array_equal(a, k) if isinstance(a, np.ndarray) else a == k
    if out_kept is not None:  # nothing written
        assert np.array_equal(out, out_kept, equal_nan=out.dtype.kind == "f")


@pytest.mark.parametrize("i, fault", pairs(OUTPUT_FAULTS, ("is-input", "overlaps-input")))
def test_a_bad_output_is_refused_by_name(i, fault):
    case = CASES[i]
    call, n, _ = built(i)
    xs = valid_inputs(case, n, np.random.default_rng(i))
    if fault == "overlaps-input":
        buf = np.random.default_rng(0).standard_normal(n + 1)
        buf[:n] = xs[0]
        xs[0], out = buf[:n], buf[1:]
    else:
        out = bad_output(fault, n, xs)
    refused(case, call, xs, out, case.output, OUTPUT_WORDS[fault])


INPUT_FAULTS = {"short": (lambda x: x[:-1], "has shape"),
                "long": (lambda x: np.append(x, 1.0), "has shape"),
                "2-D": (lambda x: x[:, None], "has shape"),
                "complex": (lambda x: x + 1j, "real vector"),
                "text": (lambda x: np.array(["a"] * x.size), "real vector"),
                "ragged": (lambda x: [[1.0], [1.0, 2.0]], "cannot be read")}


@pytest.mark.parametrize("fault", sorted(INPUT_FAULTS))
@pytest.mark.parametrize("i", [i for i, c in enumerate(CASES) if c.inputs],
                         ids=[IDS[i] for i, c in enumerate(CASES) if c.inputs])
def test_a_bad_input_is_refused_by_name(i, fault):
    case = CASES[i]
    call, n, _ = built(i)
    xs = valid_inputs(case, n, np.random.default_rng(i))
    spoil, word = INPUT_FAULTS[fault]
    j = len(xs) - 1  # the last input (b of residual_into; x or r elsewhere)
    xs[j] = spoil(xs[j])
    refused(case, call, xs, np.zeros(n), case.inputs[j], word)


@given(i=st.integers(0, len(CASES) - 1), length=st.integers(0, 40), which=st.booleans(),
       dtype=st.sampled_from([np.float64, np.float32, np.float16, np.int32, np.uint8,
                              np.bool_, np.complex64]))
@settings(max_examples=20, deadline=None)
def test_fuzzed_lengths_and_dtypes_are_refused_or_right(i, length, which, dtype):
    # a vector of a random length and dtype in the place of the output or an input: an
    # output is refused unless it is float64 of length n; an input is taken when it is
    # real and of length n (then the result is the reference's)
    case = CASES[i]
    call, n, _ = built(i)
    rng = np.random.default_rng(length)
    xs = valid_inputs(case, n, rng)
    length = n if length % 3 == 0 else length  # a third of the draws the right length
    v = np.ones(length).astype(dtype)
    if which or not xs:
        ok = length == n and dtype == np.float64
        if ok:
            assert call(*xs, v) is v
            check_result(case, i, xs, v)
        else:
            refused(case, call, xs, v, case.output, "")
        return
    if case.owner.startswith("Tet") and length == n:
        v = patches_3d()["layout"].zero_held(v.astype(np.float64)).astype(dtype)
    xs[0] = v
    out = np.zeros(n)
    if length == n and np.dtype(dtype).kind != "c":
        call(*xs, out)
        check_result(case, i, xs, out)
    else:
        refused(case, call, xs, out, case.inputs[0], "")


# -- the layouts' in-place methods ----------------------------------------------------------


def test_layout_methods_check_what_they_write():
    p2, p3 = patches_2d(), patches_3d()
    lay2, lay3 = p2["layout"], p3["layout"]
    n2, n3 = lay2.size(lay2.k), lay3.size(lay3.k)
    x = np.random.default_rng(4).standard_normal(n2)
    held = lay2.zero_held(np.ones(n2)) == 0.0
    # valid: the held points zeroed, reference: the stored refinement's boundary points
    assert np.array_equal(lay2.to_refined(held), np.isin(np.arange(n2), p2["fixed"]))
    single = x.astype(np.float32)  # the multigrid's single-precision levels write these
    assert lay2.zero_held(single) is single and not single[held].any()
    out = np.empty(n2, dtype=np.float32)
    assert lay2.to_refined(x, out=out) is out
    for call, owner, argument, word in [
        (lambda: lay2.zero_held(np.ones(n2, dtype=np.float16)), "PatchLayout.zero_held",
         "x", "float16"),
        (lambda: lay2.zero_held(np.ones(2 * n2)[::2]), "PatchLayout.zero_held", "x",
         "strided"),
        (lambda: lay2.zero_held(np.ones(n2 - 1)), "PatchLayout.zero_held", "x", "has shape"),
        (lambda: lay2.copy_held(x, x), "PatchLayout.copy_held", "dst", "shares memory"),
        (lambda: lay2.copy_held(x[:3], np.empty(n2)), "PatchLayout.copy_held", "src",
         "has shape"),
        (lambda: lay2.to_refined(x, out=x), "PatchLayout.to_refined", "out", "shares memory"),
        (lambda: lay2.to_refined(x, out=np.empty((n2, 1))), "PatchLayout.to_refined", "out",
         "has shape"),
        (lambda: lay3.zero_held(np.ones(n3, dtype=np.float32)), "TetLayout.zero_held", "x",
         "float32"),
        (lambda: lay3.class_sum(np.ones((lay3.n_cells, 15)), np.ones(lay3.n_cells), lay3.k,
                                out=np.empty(n3)[::-1]), "TetLayout.class_sum", "out",
         "strided"),
    ]:
        with pytest.raises(InputError) as info:
            call()
        text = str(info.value)
        assert text.startswith(f"{owner}: {argument} ") and word in text, text


# -- the helper itself ----------------------------------------------------------------------


def test_the_helper_reads_no_entry_and_takes_what_numba_can_write():
    n = 6
    x = np.arange(n, dtype=np.float64)
    # an input of the right kind comes back as itself (no copy); others as float64 copies
    assert into_vectors("f", n, {"x": x})[0] is x
    swapped = x.astype(">f8")
    (got,) = into_vectors("f", n, {"x": swapped})
    assert got.dtype == np.float64 and np.array_equal(got, x)
    # non-finite values are not looked at (the check is O(1))
    assert into_vectors("f", n, {"x": np.full(n, np.nan)}, {"out": np.empty(n)})
    with tempfile.TemporaryDirectory() as d:  # a memory map is an ndarray numba writes
        mm = np.memmap(Path(d) / "v", dtype=np.float64, mode="w+", shape=(n,))
        assert into_vectors("f", n, {"x": x}, {"out": mm})[0] is x
        del mm
    for out, word in [(x.astype(">f8"), ">f8"), (np.ma.zeros(n), "MaskedArray"),
                      (np.empty(0), r"has shape \(0,\)")]:
        with pytest.raises(InputError, match=word):
            into_vectors("f", n, {"x": x}, {"out": out})
    # two outputs may not overlap either; the message says what n is
    a = np.empty(n)
    with pytest.raises(InputError, match="b shares memory with a"):
        into_vectors("f", n, None, {"a": a, "b": a.view()})
    with pytest.raises(InputError, match="level 2 has 6 points"):
        into_vectors("f", n, {"x": x[:2]}, size="level 2 has {:,} points")
