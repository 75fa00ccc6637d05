"""eigenmodes on a refinement that is never stored (hatkernels.eigen_patches), the dispatch
of ``eigenmodes(coarse, k, refine=r)`` and the blocks stored by rows (hatkernels.eigenblock,
hatkernels._jit.blocks.gram_pairs_by_rows).

Checks against something outside the path:

* the stored path on ``coarse.refine()`` repeated ``r`` times (assembled matrices, the
  stored geometric multigrid over fine index arrays), scipy's ``eigsh`` on the matrices
  assembled there (reference library: scipy), and the residual and mass-orthonormality
  of the vectors with those matrices;
* exact eigenvalues: the unit square's ``(a^2 + b^2) pi^2`` and, held on ``x = 0`` only,
  ``((2a - 1)^2 / 4 + b^2) pi^2`` (separation of variables; common practice, no source);
  the L-shape's first value from T. Betcke and L. N. Trefethen, Reviving the method of
  particular solutions, SIAM Review 47 (2005); P1 values approach them from above, at
  order 2 for smooth modes and 4/3 at the re-entrant corner (I. Babuska and J. Osborn,
  Eigenvalue problems, Handbook of Numerical Analysis II, 1991);
* NumPy's products for the Gram kernel, with the dot-product round-off bound of N. J.
  Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed. 2002, ch. 3;
* the same bits on 1 and 2 threads.

Refined meshes have more than SHIFT_INVERT_LIMIT (20,000) points, or the patch path is
not taken.  Tolerances: the solves run to ``RTOL`` (estimated relative eigenvalue error);
two such values agree to ``2 RTOL``; a simple mode's vector is then good to about
``sqrt(RTOL lambda / gap)`` in the mass norm (a vector's error is about the square root of
its value's relative error; B. N. Parlett, The Symmetric Eigenvalue Problem, 1980).
"""

import pickle

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse.linalg as sla
from conftest import EPS
from hypothesis import given, settings
from hypothesis import strategies as st
from test_eigen import (
    PI2,
    check_from_above_at_order,
    one_thread,  # noqa: F401 (its autouse fixture: one numba thread)
    reference,
    refined,
)
from test_eigenblock import Jacobi, dirichlet_square
from test_patches import tagged_square
from test_threads import assert_same_bits, on_one_and_two_threads

import hatkernels.eigen_patches as ep
from hatkernels import InputError, Mesh, threads
from hatkernels._jit import blocks as kb
from hatkernels.assembly import assemble_mass, assemble_stiffness
from hatkernels.eigen import Eigenmodes, eigenmodes
from hatkernels.eigen_patches import PatchEigenmodes, eigen_patch_reason, eigenmodes_on_patches
from hatkernels.eigenblock import PencilBlocks, run
from hatkernels.mesh import cuboid, l_shape, rectangle
from hatkernels.mesh.tags import label_sides

RTOL = 1e-10
R = 5  # rectangle(6, 6) refined 5 times: 37,249 points, 36,481 unknowns


@pytest.fixture(scope="module")
def square():
    """The unit square, 6 x 6 cells refined 5 times: the patch result, the refined mesh and
    the stored result on it, four modes to RTOL (one thread)."""
    coarse = rectangle(6, 6)
    fine = refined(coarse, R)
    with threads(1):
        patch = eigenmodes(coarse, 4, refine=R, rtol=RTOL)
        stored = eigenmodes(fine, 4, rtol=RTOL)
    return coarse, fine, patch, stored


def vector_bound(values, j, cluster=(0,)):
    """``2 sqrt(RTOL lambda_j / gap)`` (module notes): the gap from mode ``j`` (or the
    cluster of modes ``j + cluster``) to the nearest other value."""
    inside = [j + c for c in cluster]
    others = np.delete(values, inside)
    gap = np.abs(others - values[j]).min()
    return 2.0 * np.sqrt(RTOL * values[j] / gap)


def mass_distance(a, b, M):
    d = a - b
    return float(np.sqrt(d @ (M @ d)))


# == 1. against the stored path and scipy =================================================


def test_agrees_with_the_stored_path_and_scipy_on_the_refined_mesh(square):
    coarse, fine, patch, stored = square
    assert type(patch) is PatchEigenmodes and type(stored) is Eigenmodes
    assert patch.vectors.shape == (fine.n_points, 4)
    s = patch.stats
    assert s.method == "lobpcg" and s.converged and (s.errors <= RTOL).all()
    assert s.unknowns == stored.stats.unknowns == fine.n_points - fine.boundary_points().size
    assert np.isnan(s.work_units) and s.threads == 1
    assert not patch.zero_modes.any()
    # values: both to RTOL of the same discrete problem; reference library: scipy
    assert patch.values == pytest.approx(stored.values, rel=2 * RTOL, abs=0)
    assert patch.values == pytest.approx(reference(fine, 4, fine.boundary_points()),
                                         rel=2 * RTOL, abs=0)
    M = assemble_mass(fine)
    # the simple modes 2 pi^2 and 8 pi^2 are the same vectors (same sign convention)
    for j in (0, 3):
        bound = vector_bound(stored.values, j)
        assert mass_distance(patch.vectors[:, j], stored.vectors[:, j], M) <= bound
    # the double 5 pi^2 pair spans the same plane: the M-products of the two bases form an
    # orthogonal 2 x 2 matrix (any rotation inside the plane is as good)
    C = patch.vectors[:, 1:3].T @ (M @ stored.vectors[:, 1:3])
    assert np.abs(C @ C.T - np.eye(2)).max() <= vector_bound(stored.values, 1, (0, 1))


def test_vectors_are_eigenvectors_of_the_assembled_pencil(square):
    coarse, fine, patch, _ = square
    V, lam = patch.vectors, patch.values
    K, M = assemble_stiffness(fine), assemble_mass(fine)  # reference: the stored assembly
    held = fine.boundary_points()
    free = np.setdiff1d(np.arange(fine.n_points), held)
    assert np.all(V[held] == 0)
    assert np.abs(V.T @ (M @ V) - np.eye(4)).max() < 1e-12  # M-orthonormal to round-off
    # Rayleigh quotients with the assembled K are the values
    assert np.einsum("ij,ij->j", V, K @ V) == pytest.approx(lam, rel=2 * RTOL, abs=0)
    # residual in the M^-1 norm on the free rows: some eigenvalue lies within it of the
    # value, and within its square over the gap (the Krylov-Weinstein and Kato-Temple
    # bounds; B. N. Parlett, The Symmetric Eigenvalue Problem, 1980); 3e-5 lambda keeps the
    # second below 4e-9 lambda for these gaps (at least a quarter of the value)
    res = (K @ V - (M @ V) * lam)[free]
    lu = sla.splu(M[free][:, free].tocsc())
    norms = np.sqrt(np.einsum("ij,ij->j", res, lu.solve(res)))
    assert (norms <= 3e-5 * lam).all(), norms / lam
    assert np.all(V[np.abs(V).argmax(axis=0), np.arange(4)] > 0)  # the sign convention


# == 2. against outside values ============================================================


def test_unit_square_from_above_at_order_two(square):
    # 2, 5, 5, 8 times pi^2: separation of variables (common practice, no source); order 2
    # from above on nested meshes (Babuska and Osborn, 1991): 48 and 96 cells a side
    # stored, 192 on patches
    coarse, _, patch, _ = square
    values = [eigenmodes(coarse, 4, refine=r).values / PI2 for r in (3, 4)]
    check_from_above_at_order(values + [patch.values / PI2], [2, 5, 5, 8], 1.9, 2.1)


def test_held_on_the_left_side_by_a_tag():
    # held on x = 0 only: values ((2a - 1)^2 / 4 + b^2) pi^2 = 1/4, 5/4, 9/4 (separation of
    # variables: sin((2a - 1) pi x / 2) cos(b pi y); common practice, no source), from
    # above at order 2 (Babuska and Osborn, 1991)
    coarse = label_sides(rectangle(6, 6), {"left": lambda x, y: x == 0})
    values = []
    for r in (3, 4, 5):
        modes = eigenmodes(coarse, 3, refine=r, dirichlet_on="left")
        assert isinstance(modes, PatchEigenmodes) == (r == 5)
        values.append(modes.values / PI2)
    check_from_above_at_order(values, [0.25, 1.25, 2.25], 1.9, 2.1)
    fine = modes.mesh
    assert np.all(modes.vectors[fine.points[:, 0] == 0] == 0)
    assert np.all(modes.vectors[fine.points[:, 0] == 1, 0] > 0)  # the right side is free


def test_l_shape_first_value_from_above():
    # 9.6397238440219: T. Betcke and L. N. Trefethen, Reviving the method of particular
    # solutions, SIAM Review 47 (2005); order 4/3 at the re-entrant corner, from above
    # (Babuska and Osborn, 1991); l_shape(3) refined 5 times: 28,033 points on patches
    values = []
    for r in (3, 4, 5):
        modes = eigenmodes(l_shape(3), 1, refine=r)
        assert isinstance(modes, PatchEigenmodes) == (r == 5)
        values.append(modes.values)
    check_from_above_at_order(values, [9.6397238440219], 1.2, 2.0)


# == 3. data by region ====================================================================


def test_data_by_region_agree_with_the_stored_path():
    coarse = tagged_square(6)
    fine = refined(coarse, R)
    assert np.array_equal(fine.regions, np.repeat(coarse.regions, 4**R))  # carried by refine
    args = dict(coefficient={"cold": 1.0, "hot": 8.0}, density={"cold": 2.0, "hot": 0.5},
                dirichlet_on=["left", "bottom"], rtol=RTOL)
    patch = eigenmodes(coarse, 3, refine=R, **args)
    stored = eigenmodes(fine, 3, **args)
    assert isinstance(patch, PatchEigenmodes)
    assert patch.values == pytest.approx(stored.values, rel=2 * RTOL, abs=0)
    # reference library: scipy, on the matrices assembled with the fine cells' values
    kappa = np.where(fine.regions == coarse.tags.region_tag("hot"), 8.0, 1.0)
    rho = np.where(fine.regions == coarse.tags.region_tag("hot"), 0.5, 2.0)
    held = np.unique(fine.tags.sides_of([fine.tags.side_tag(t) for t in ("left", "bottom")]))
    assert patch.values == pytest.approx(reference(fine, 3, held, kappa, rho), rel=2 * RTOL,
                                         abs=0)
    M = assemble_mass(fine, rho)
    for j in range(3):
        assert mass_distance(patch.vectors[:, j], stored.vectors[:, j], M) <= vector_bound(
            stored.values, j)


def test_constants_scale_the_values_by_kappa_over_rho(square):
    # kappa and rho constant: lambda = (kappa / rho) lambda_1 and v = v_1 / sqrt(rho) (common
    # practice, no source); the same constants by region give the same problem
    coarse, fine, patch, _ = square
    scaled = eigenmodes(coarse, 4, refine=R, coefficient=3.0, density=2.0, rtol=RTOL)
    assert scaled.values == pytest.approx(1.5 * patch.values, rel=2 * RTOL, abs=0)
    M = assemble_mass(fine)
    for j in (0, 3):
        assert mass_distance(np.sqrt(2.0) * scaled.vectors[:, j], patch.vectors[:, j],
                             M) <= vector_bound(patch.values, j)
    halves = tagged_square(6)
    by_region = eigenmodes(halves, 4, refine=R, coefficient={"cold": 3.0, "hot": 3.0},
                           density={1: 2.0, 2: 2.0}, rtol=RTOL)
    assert by_region.values == pytest.approx(scaled.values, rel=2 * RTOL, abs=0)


# == 4. the dispatch ======================================================================


SMALL = rectangle(5, 4)  # refined 5 times: 20,769 points, just above the limit
DISPATCH = [
    # (coarse, refine, eigenmodes' arguments, what eigen_patch_reason says)
    (SMALL, R, {"preconditioner": "gmg"}, "a named preconditioner belongs to the stored"),
    (SMALL, R, {"method": "shift-invert"}, "method='shift-invert' is the stored path's"),
    (SMALL, R, {"coefficient": lambda x, y: 1.0 + x}, "coefficient is not a number"),
    (SMALL, R, {"robin": (2.0, 0.0)}, "no reaction or convection term"),
    (SMALL, R, {"dirichlet_on": ()}, "dirichlet_on is not 'boundary' or boundary tags"),
    (rectangle(6, 6), 4, {}, "the problem has 9025 unknowns, few enough"),
    (cuboid(2, 2, 2), 2, {}, "eigenmodes on patches take triangle meshes"),
]


@pytest.mark.parametrize("coarse, r, kwargs, reason", DISPATCH,
                         ids=["preconditioner", "shift-invert", "callable", "robin",
                              "neumann", "few points", "tetrahedra"])
def test_problems_the_patch_path_leaves_to_the_stored_one(coarse, r, kwargs, reason):
    said = eigen_patch_reason(coarse, r, **kwargs)
    assert said is not None and reason in said, said
    got = eigenmodes(coarse, 2, refine=r, **kwargs)
    want = eigenmodes(refined(coarse, r), 2, **kwargs)  # the stored call on the refined mesh
    assert type(got) is Eigenmodes
    assert np.array_equal(got.values, want.values)
    assert np.array_equal(got.vectors, want.vectors)
    assert np.array_equal(got.zero_modes, want.zero_modes)


def test_the_patch_path_is_the_default_and_its_other_reasons():
    assert eigen_patch_reason(SMALL, R) is None
    assert eigen_patch_reason(SMALL, R, method="lobpcg", dirichlet_on="boundary") is None
    assert isinstance(eigenmodes(SMALL, 1, refine=R), PatchEigenmodes)
    reasons = [
        ({"options": {"cycles": 2}}, "preconditioner options (cycles) belong to the stored"),
        ({"density": np.ones(SMALL.n_cells)}, "density is not a number or {region: number}"),
        ({"dirichlet_on": np.array([0, 1])}, "dirichlet_on is not 'boundary'"),
    ]
    for kwargs, want in reasons:
        said = eigen_patch_reason(SMALL, R, **kwargs)
        assert said is not None and want in said, said
    for bad, want in ((0, "refine >= 1, got 0"), (2.5, "whole number of refinements, got 2.5"),
                      (True, "whole number of refinements, got True")):
        assert want in eigen_patch_reason(SMALL, bad)


def two_squares():
    """Two separate unit squares, 4 x 4 cells each (refined 5 times: 33,282 points), the
    first one's side on x = 0 tagged "left"."""
    a = rectangle(4, 4)
    return label_sides(Mesh(np.vstack([a.points, a.points + [2.0, 0.0]]),
                            np.vstack([a.cells, a.cells + a.n_points])),
                       {"left": lambda x, y: x == 0})


def test_two_parts_each_holding_a_side_take_the_patch_path():
    assert eigen_patch_reason(two_squares(), R) is None  # the whole boundary holds both


def test_a_part_that_holds_no_side_goes_to_the_stored_path():
    # the second square floats: its constant is a zero mode, which the stored path reports
    two = two_squares()
    said = eigen_patch_reason(two, R, dirichlet_on="left")
    assert said is not None and "a part of the mesh holds no side" in said
    got = eigenmodes(two, 2, refine=R, dirichlet_on="left")
    want = eigenmodes(refined(two, R), 2, dirichlet_on="left")
    assert type(got) is Eigenmodes and got.zero_modes.tolist() == [True, False]
    assert np.array_equal(got.values, want.values)


# == 5. bad input =========================================================================


@pytest.mark.parametrize("mesh, r, kwargs, message", [
    (cuboid(1, 1, 1), 2, {}, "triangle meshes"),
    (SMALL, 0, {}, "refine >= 1, got 0"),
    (SMALL, 2.5, {}, "whole number of refinements, got 2.5"),
    (SMALL, True, {}, "whole number of refinements, got True"),
    (SMALL, R, {"coefficient": lambda x, y: 1.0 + x}, "coefficient is not a number"),
    (SMALL, R, {"density": np.ones(SMALL.n_cells)}, "density is not a number"),
    (SMALL, R, {"dirichlet_on": ()}, "dirichlet_on is not"),
    (rectangle(6, 6), 4, {}, "few enough for shift-invert"),
])
def test_data_the_patch_path_cannot_take_are_refused_by_name(mesh, r, kwargs, message):
    with pytest.raises(InputError, match="eigenmodes on patches cannot take this problem") as e:
        eigenmodes_on_patches(mesh, 2, refine=r, **kwargs)
    assert message in str(e.value)


@pytest.mark.parametrize("r", [2.5, True])
def test_a_refine_that_is_not_a_whole_number_is_named_by_eigenmodes(r):
    with pytest.raises(InputError, match=f"refine must be an integer, got {r}"):
        eigenmodes(SMALL, 2, refine=r)


def test_too_many_modes_are_refused_before_allocating():
    coarse = rectangle(6, 6)  # refined 5 times: 36,481 unknowns
    with pytest.raises(InputError, match="k = 36481 eigenpairs asked for, but the problem "
                                         "has 36481 unknowns"):
        eigenmodes_on_patches(coarse, 36481, refine=R)
    # no coarser level can start so large a block: eigenmodes leaves it to the stored path
    assert "no coarser level has between 2 x" in eigen_patch_reason(coarse, R, k=36481)
    with pytest.raises(InputError, match=r"lobpcg needs at least 5 x 8750 \(the block\)"):
        eigenmodes_on_patches(coarse, 7000, refine=R)
    # a block of 6,250: no coarser level has 2 x 6,250 unknowns to start from
    with pytest.raises(InputError, match="needs a coarser level with between 2 x 6250"):
        eigenmodes_on_patches(coarse, 5000, refine=R, memory_check=False)


def test_a_solve_that_does_not_fit_is_refused_before_allocating(monkeypatch):
    def never(*args, **kwargs):
        raise AssertionError("the start was computed after the memory check refused")

    monkeypatch.setattr(ep, "available_bytes", lambda: 10**6)
    monkeypatch.setattr(ep, "_start", never)
    message = (r"not enough memory: eigenmodes on patches with 37,249 points and a block of 6 "
               r"needs about 0\.0 GiB")
    for call in (eigenmodes, eigenmodes_on_patches):
        with pytest.raises(InputError, match=message):
            call(rectangle(6, 6), 4, refine=R)


BAD = {
    "k": [0, -1, 2.5, True, "3", None],
    "refine": [-1, 2.5, True, "5", None],
    "rtol": [0.0, 1.5, -1e-8, float("nan"), "tight"],
    "maxiter": [0, -3, 1.5, False],
    "extra": [-1, 0.5, "2"],
    "seed": [-1, 0.5, "x"],
    "quadrature": [0, -1, 1.5],
    "coefficient": [-1.0, 0.0, float("nan"), float("inf"), {"nowhere": 1.0}, {"cold": 1.0},
                    {"cold": -2.0, "hot": 1.0}, "steel", np.ones(3)],
    "density": [-1.0, 0.0, float("nan"), {"nowhere": 1.0}, {"cold": True, "hot": 1.0},
                {"cold": 0.0, "hot": 1.0}, "heavy"],
    "dirichlet_on": ["nowhere", ["left", "nowhere"], 3.0],
}
#: Problems ``eigenmodes`` solves on the stored refinement, which the patch path refuses.
PATCH_ONLY = {"refine": [0], "dirichlet_on": [(), np.array([0, 1])]}


@settings(max_examples=30, deadline=None)
@given(data=st.data())
def test_bad_values_are_always_input_errors(data):
    coarse = tagged_square(6)
    name = data.draw(st.sampled_from(sorted(BAD)))
    value = data.draw(st.sampled_from(BAD[name] + PATCH_ONLY.get(name, [])))
    args = {"k": 2, "refine": R, name: value}
    k = args.pop("k")
    calls = [eigenmodes_on_patches]
    if not any(value is v for v in PATCH_ONLY.get(name, [])):
        calls.append(eigenmodes)
    for call in calls:
        with pytest.raises(InputError):
            call(coarse, k, **args)


# == 6. inputs ============================================================================


def test_inputs_are_left_unchanged():
    coarse = tagged_square(5)
    arrays = [coarse.points, coarse.cells, coarse.regions]
    copies = [a.copy() for a in arrays]
    kappa, rho, held = {"cold": 1.0, "hot": 4.0}, {"cold": 2.0, "hot": 0.5}, ["left", "top"]
    modes = eigenmodes(coarse, 1, refine=R, coefficient=kappa, density=rho, dirichlet_on=held)
    assert isinstance(modes, PatchEigenmodes)
    assert kappa == {"cold": 1.0, "hot": 4.0} and rho == {"cold": 2.0, "hot": 0.5}
    assert held == ["left", "top"]
    for a, b in zip(arrays, copies, strict=True):
        assert np.array_equal(a, b)


# == 7. blocks stored by rows =============================================================


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), b=st.integers(1, 5), m=st.integers(1, 6),
       n=st.one_of(st.integers(1, kb.GRAM_ROWS - 1),
                   st.sampled_from([kb.GRAM_ROWS, 2 * kb.GRAM_ROWS, 3 * kb.GRAM_ROWS]),
                   st.integers(kb.GRAM_ROWS + 1, 4 * kb.GRAM_ROWS + 7)),
       data=st.data())
def test_gram_pairs_by_rows_equal_numpys_products(seed, b, m, n, data):
    rng = np.random.default_rng(seed)
    pool = rng.standard_normal((b, m, n))
    before = pool.copy()
    used = np.array(data.draw(st.lists(st.integers(0, b - 1), min_size=1, max_size=b,
                                       unique=True)), dtype=np.int64)
    pairs = data.draw(st.lists(st.tuples(st.integers(0, len(used) - 1),
                                         st.integers(0, len(used) - 1)), min_size=1, max_size=6))
    left = np.array([a for a, _ in pairs], dtype=np.int64)
    right = np.array([c for _, c in pairs], dtype=np.int64)
    out = np.full((len(pairs), m, m), np.nan)
    kb.gram_pairs_by_rows(pool, used, left, right, out)
    assert np.array_equal(pool, before)
    for p, (a, c) in enumerate(pairs):
        A, B = pool[used[a]], pool[used[c]]
        # reference: NumPy; a dot product of length n errs by at most n eps sum |a_i b_i|
        # (Higham, 2002, ch. 3)
        bound = n * EPS * (np.abs(A) @ np.abs(B).T)
        assert (np.abs(out[p] - A @ B.T) <= bound).all()


class RowBlocks:
    """Scipy matrices applied to blocks stored one vector per row (``by_rows``)."""

    by_rows = True

    def __init__(self, K, M, preconditioner):
        self.K, self.M, self._T = K, M, preconditioner
        self.counts = {"stiffness": 0, "mass": 0, "preconditioner": 0}
        self.seconds = {"products": 0.0, "preconditioner": 0.0, "dense": 0.0}

    def products(self, X, KX, MX):
        KX[:] = (self.K @ X.T).T
        MX[:] = (self.M @ X.T).T

    def precondition(self, rows, out):
        for j in range(rows.shape[0]):
            self._T.apply_into(rows[j], out[j])


def test_run_by_rows_agrees_with_run_by_columns_and_scipy():
    K, M = dirichlet_square(12)  # 121 unknowns
    X0 = np.random.default_rng(8).standard_normal((K.shape[0], 6))
    X0_rows = np.ascontiguousarray(X0.T)
    before = X0_rows.copy()
    cols = run(PencilBlocks(K, M, Jacobi(K)), X0, None, k=4, rtol=1e-11, maxiter=80)
    rows = run(RowBlocks(K, M, Jacobi(K)), X0_rows, None, k=4, rtol=1e-11, maxiter=80)
    assert np.array_equal(X0_rows, before)
    assert cols.converged and rows.converged and rows.vectors.shape == (6, K.shape[0])
    assert rows.values[:4] == pytest.approx(cols.values[:4], rel=1e-12, abs=0)
    # reference library: scipy's dense symmetric-definite solver
    exact = scipy.linalg.eigh(K.toarray(), M.toarray(), eigvals_only=True)[:4]
    assert rows.values[:4] == pytest.approx(exact, rel=1e-10, abs=0)
    V = rows.vectors.T
    assert np.abs(V.T @ (M @ V) - np.eye(6)).max() < 1e-10


def test_run_by_rows_keeps_constraints_as_run_by_columns_does():
    # the Neumann square: the constant is the zero mode, kept out by the constraint Y; the
    # next values pi^2, pi^2, 2 pi^2 of the pencil (reference library: scipy)
    m = rectangle(10, 10)
    K, M = assemble_stiffness(m), assemble_mass(m)
    Y = np.full((m.n_points, 1), 1.0 / np.sqrt(M.sum()))  # M-normalised constant
    shifted = Jacobi((K + M).tocsr())
    X0 = np.random.default_rng(9).standard_normal((m.n_points, 5))
    cols = run(PencilBlocks(K, M, shifted), X0, Y, k=3, rtol=1e-10, maxiter=100)
    rows = run(RowBlocks(K, M, shifted), np.ascontiguousarray(X0.T), Y, k=3, rtol=1e-10,
               maxiter=100)
    exact = scipy.linalg.eigh(K.toarray(), M.toarray(), eigvals_only=True)[1:4]
    assert cols.values[:3] == pytest.approx(exact, rel=1e-9, abs=0)
    assert rows.values[:3] == pytest.approx(cols.values[:3], rel=1e-12, abs=0)


# == 8. threads ===========================================================================


@pytest.mark.two_threads
def test_patch_modes_same_bits_on_one_and_two_threads():
    coarse = tagged_square(6)

    def compute():
        modes = eigenmodes(coarse, 3, refine=R, coefficient={"cold": 1.0, "hot": 5.0},
                           dirichlet_on=["left", "top"])
        assert isinstance(modes, PatchEigenmodes)
        return [modes.values, modes.vectors, modes.stats.errors, modes.stats.iterations]

    assert_same_bits(*on_one_and_two_threads(compute))


@pytest.mark.two_threads
def test_gram_pairs_by_rows_same_bits_on_one_and_two_threads():
    pool = np.random.default_rng(4).standard_normal((4, 7, 9 * kb.GRAM_ROWS + 31))
    used = np.array([0, 2, 3], dtype=np.int64)
    left, right = np.array([0, 0, 1, 2], dtype=np.int64), np.array([1, 2, 2, 0], dtype=np.int64)

    def compute():
        out = np.empty((4, 7, 7))
        kb.gram_pairs_by_rows(pool, used, left, right, out)
        return [out]

    assert_same_bits(*on_one_and_two_threads(compute))


# == 9. the result ========================================================================


def test_the_mesh_is_the_refined_one_and_the_result_pickles(square):
    coarse, fine, patch, _ = square
    again = pickle.loads(pickle.dumps(patch))  # before the mesh is built: it is not pickled
    assert type(again) is PatchEigenmodes
    for a, b in zip((again.values, again.vectors, again.zero_modes, again.stats.errors),
                    (patch.values, patch.vectors, patch.zero_modes, patch.stats.errors),
                    strict=True):
        assert np.array_equal(a, b)
    assert again.stats.levels == patch.stats.levels and again.layout.k == R
    for modes in (patch, again):
        assert np.array_equal(modes.mesh.points, fine.points)
        assert np.array_equal(modes.mesh.cells, fine.cells)
    assert patch.mesh is patch.mesh  # built once
    values, vectors = patch
    assert values is patch.values and vectors is patch.vectors
    assert "lobpcg" in repr(patch) and "36481 unknowns" in repr(patch)


def test_the_dispatch_counts_unknowns_and_checks_the_start_and_the_method():
    # 20,145 points but 17,745 unknowns: method="auto" means shift-invert on the stored mesh
    assert "17745 unknowns, few enough" in eigen_patch_reason(rectangle(1, 74), 4)
    # a coarse mesh beyond the nested start's shift-invert goes to the stored path
    assert "the coarse mesh has 22201 unknowns" in eigen_patch_reason(rectangle(150, 150), 1)
    for bad in ("bogus", None, "dense"):
        with pytest.raises(InputError, match="method must be one of"):
            eigenmodes(rectangle(5, 4), 2, refine=R, method=bad)
