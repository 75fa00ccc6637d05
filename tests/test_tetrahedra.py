"""Tetrahedra on raw arrays: element gradients (NumPy and numba), quadrature rules and
element stiffness, mass and load values, against analytic values and published ones."""

import itertools
from math import factorial

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import EPS
from hypothesis import given
from hypothesis import strategies as st

import hatkernels
from hatkernels import element_gradients
from hatkernels.assembly import elements
from hatkernels.coefficients import Coefficient
from hatkernels.geometry import DEGENERATE_VOLUME_TOL
from hatkernels.quadrature import tetrahedron_rule

REFERENCE = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])

# The unit cube's corners numbered x + 2y + 4z, and its six tetrahedra around the main
# diagonal 0-7: each a path 0 -> a corner -> a corner -> 7 along the cube's edges, one per
# order of the three axes.
CUBE = np.array([[x, y, z] for z in (0, 1) for y in (0, 1) for x in (0, 1)], dtype=float)
CUBE_CELLS = np.array(
    [[0, 1, 3, 7], [0, 1, 5, 7], [0, 2, 3, 7], [0, 2, 6, 7], [0, 4, 5, 7], [0, 4, 6, 7]]
)


def coefficient(kind, value, sign="any"):
    return Coefficient(kind, value, "c", sign)


ONE = coefficient("constant", 1.0, "positive")


def assemble(cells, values, n):
    """Element matrices (M, k, k) or vectors (M, k) summed by scipy (triplets)."""
    if values.ndim == 2:
        return np.bincount(cells.ravel(), values.ravel(), minlength=n)
    k = cells.shape[1]
    rows = np.repeat(cells, k, axis=1).ravel()
    cols = np.tile(cells, (1, k)).ravel()
    return sp.coo_matrix((values.ravel(), (rows, cols)), shape=(n, n)).toarray()


def grid(n, jitter=0.0, seed=0):
    """n x n x n cubes of side 1/n, each split as CUBE_CELLS (a conforming mesh: the
    pattern is the same in every cube), interior points moved by up to ``jitter`` h."""
    idx = np.arange((n + 1) ** 3).reshape(n + 1, n + 1, n + 1)  # [z, y, x]
    corner = np.array([[x, y, z] for z in (0, 1) for y in (0, 1) for x in (0, 1)])
    cells = []
    for k, j, i in itertools.product(range(n), repeat=3):
        ids = idx[k + corner[:, 2], j + corner[:, 1], i + corner[:, 0]]
        cells.append(ids[CUBE_CELLS])
    z, y, x = np.meshgrid(*(np.linspace(0, 1, n + 1),) * 3, indexing="ij")
    p = np.column_stack([x.ravel(), y.ravel(), z.ravel()])
    inner = ((p > 0) & (p < 1)).all(axis=1)
    rng = np.random.default_rng(seed)
    p[inner] += rng.uniform(-jitter, jitter, size=(inner.sum(), 3)) / n
    return p, np.concatenate(cells).astype(np.int32)


def random_tetrahedra(seed, m=6, quality=0.1):
    """``m`` separate tetrahedra with points in [-1, 1]^3, either orientation, each with
    ``6 |V| / L**3 >= quality``."""
    rng = np.random.default_rng(seed)
    out = []
    while len(out) < m:
        x = rng.uniform(-1, 1, size=(4, 3))
        e = x[1:] - x[0]
        longest = max(np.sum((x[a] - x[b]) ** 2) for a, b in itertools.combinations(range(4), 2))
        if abs(np.linalg.det(e)) / longest**1.5 >= quality:
            out.append(x)
    return np.concatenate(out), np.arange(4 * m).reshape(m, 4)


seeds = st.integers(0, 2**32 - 1)


# --- gradients -----------------------------------------------------------------------


@pytest.mark.parametrize("plain", [False, True])
def test_reference_tetrahedron(plain):
    # gradients of 1 - x - y - z, x, y, z; volume 1/6 (analytic)
    vol, g = element_gradients(REFERENCE, np.array([[0, 1, 2, 3]]), plain=plain)
    assert vol.tolist() == [1 / 6]
    assert g[0].tolist() == [[-1, -1, -1], [1, 0, 0], [0, 1, 0], [0, 0, 1]]
    # negatively oriented (two vertices swapped): the same volume, the same gradient
    # for each vertex (definition of the barycentric coordinates)
    vol, g = element_gradients(REFERENCE, np.array([[0, 2, 1, 3]]), plain=plain)
    assert vol.tolist() == [1 / 6]
    assert g[0].tolist() == [[-1, -1, -1], [0, 1, 0], [1, 0, 0], [0, 0, 1]]


@given(seeds)
def test_gradients_are_those_of_the_barycentric_coordinates(seed):
    # lambda_a(x_b) = delta_ab and lambda_a is linear, so
    # grad lambda_a . (x_b - x_c) = delta_ab - delta_ac (definition; common practice, no source);
    # the volume is |det(x1 - x0, x2 - x0, x3 - x0)| / 6 (analytic; numpy's LU determinant)
    p, t = random_tetrahedra(seed)
    vol, g = element_gradients(p, t)
    x = p[t]
    det = np.linalg.det(x[:, 1:] - x[:, :1])
    assert np.abs(vol - np.abs(det) / 6).max() <= 16 * EPS * vol.max()
    for a, b, c in itertools.product(range(4), repeat=3):
        d = x[:, b] - x[:, c]
        lhs = np.einsum("mi,mi->m", g[:, a], d)
        # a few roundings relative to the largest gradient of the cell: g_0 is minus the
        # sum of the other three, so its error scales with them, not with |g_0|
        bound = 32 * EPS * np.abs(g).max(axis=(1, 2)) * np.abs(d).sum(axis=1)
        assert (np.abs(lhs - (float(a == b) - float(a == c))) <= bound).all()


@given(seeds, st.floats(0.0, 0.2))
def test_kernel_equals_numpy_version_bit_for_bit(seed, jitter):
    # the same operations in the same order (no fastmath, no contraction): the same bits
    for p, t in (random_tetrahedra(seed), grid(3, jitter, seed)):
        v1, g1 = element_gradients(p, t)
        v2, g2 = element_gradients(p, t, plain=True)
        assert np.array_equal(v1, v2) and np.array_equal(g1, g2)


@pytest.mark.two_threads
def test_one_and_two_threads_give_the_same_bits():
    p, t = grid(8, 0.2, 7)  # 3072 tetrahedra
    with hatkernels.threads(1):
        v1, g1 = element_gradients(p, t)
    with hatkernels.threads(2):
        v2, g2 = element_gradients(p, t)
    assert np.array_equal(v1, v2) and np.array_equal(g1, g2)


@given(seeds, st.sampled_from([-10.0, -1.0, 0.0, 3.0, 100.0]))
def test_invariance(seed, shift):
    """Renumbering, translation, rotation and scaling (analytic: for x' = s Q x + c,
    lambda'(x') = lambda(x), so grad' = Q grad / s and |T'| = |s|^3 |T|)."""
    p, t = random_tetrahedra(seed)
    rng = np.random.default_rng(seed)
    vol, g = element_gradients(p, t)
    K = elements.tetrahedron_stiffness_values(p, t, vol, g, ONE)
    # quality >= 0.1, coordinates <= 1: relative round-off a few hundred EPS at most,
    # grown by the shift (it spoils the edge vectors by EPS |shift|)
    tol = 1000 * EPS * (1 + abs(shift))

    def close(a, b):
        return np.abs(a - b).max() <= tol * np.abs(b).max()

    # vertices renumbered within each cell (odd and even permutations) and cells reordered
    perm = rng.permutation(4)
    order = rng.permutation(len(t))
    v2, g2 = element_gradients(p, t[order][:, perm])
    assert close(v2, vol[order]) and close(g2, g[order][:, perm])
    # points renumbered: the same cells, bit for bit
    q = rng.permutation(len(p))
    inv = np.argsort(q)
    v3, g3 = element_gradients(p[q], inv[t])
    assert np.array_equal(v3, vol) and np.array_equal(g3, g)
    # rotation (orthogonal Q, a reflection when det Q = -1) and translation
    Q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    c = shift * rng.uniform(-1, 1, size=3)
    v4, g4 = element_gradients(p @ Q.T + c, t)
    assert close(v4, vol) and close(g4, g @ Q.T)
    assert close(elements.tetrahedron_stiffness_values(p, t, v4, g4, ONE), K)
    # scaling, negative factors included (they reverse every orientation)
    for s in (2.0**-5, 0.3, -1.0, -7.0, 1e3):
        v5, g5 = element_gradients(s * p, t)
        assert close(v5, abs(s) ** 3 * vol) and close(g5, g / s)
        assert close(elements.tetrahedron_stiffness_values(s * p, t, v5, g5, ONE), abs(s) * K)


# --- bad input -----------------------------------------------------------------------


def refused(p, t, match):
    before = (np.array(p, copy=True), np.array(t, copy=True))
    for plain in (False, True):
        with pytest.raises(hatkernels.InputError, match=match):
            element_gradients(p, t, plain=plain)
    assert np.array_equal(before[0], p, equal_nan=True) and np.array_equal(before[1], t)


def test_bad_input_is_named():
    p = np.vstack([REFERENCE, [[1.0, 1, 1], [0.5, 0.5, 0]]])
    ok = [0, 1, 2, 3]
    refused(p, np.array([[0, 1, 2]]), r"tetrahedra must be an integer array of shape \(m, 4\)")
    refused(p[:, :2], np.array([ok]), r"triangles must be an integer array of shape \(m, 3\)")
    refused(p.astype(int), np.array([ok]), r"points must be a float array")
    refused(p, np.array([ok, [0, 1, 2, 6]]), r"tetrahedron 1 refers to a point outside 0\.\.5")
    refused(p, np.array([ok, [0, -1, 2, 3]]), r"tetrahedron 1 refers to a point outside")
    refused(p, np.array([ok, [0, 1, 1, 3]]), r"tetrahedron 1 repeats a vertex \[0, 1, 1, 3\]")
    refused(p, np.array([ok, [0, 1, 2, 5]]), r"tetrahedron 1 has zero volume \(points 0, 1, 2, 5 "
            r"are coplanar\)")
    q = p.copy()
    q[5, 2] = 1e-13  # 6 |V| / L^3 = 1e-13 / 2^1.5: below DEGENERATE_VOLUME_TOL = 1e-12
    refused(q, np.array([ok, [0, 1, 2, 5]]), r"tetrahedron 1 has near-zero volume \(points 0, 1, "
            r"2, 5 are nearly coplanar: 6 \|V\| / \(longest edge\)\*\*3 = 3\.5\d*e-14")
    q[5, 2] = 1e-11  # 3.5e-12: accepted, with finite gradients
    vol, g = element_gradients(q, np.array([ok, [0, 1, 2, 5]]))
    assert np.isfinite(g).all() and vol[1] == pytest.approx(1e-11 / 12, rel=1e-4)
    q = p.copy()
    q[4, 1] = np.nan
    refused(q, np.array([ok, [1, 2, 3, 4]]), r"tetrahedron 1 has point 4 with a non-finite "
            r"coordinate \(1\.0, nan, 1\.0\)")
    q[4, 1] = np.inf
    refused(q, np.array([ok, [1, 2, 3, 4]]), r"tetrahedron 1 has point 4 with a non-finite")
    assert np.isfinite(element_gradients(q, np.array([ok]))[1]).all()  # point 4 unused
    refused(p * 1e120, np.array([ok]), r"tetrahedron 0 \(points 0, 1, 2, 3\): coordinates too "
            r"large .* scale the coordinates down")
    refused(p * 1e-120, np.array([ok]), r"tetrahedron 0 \(points 0, 1, 2, 3\): coordinates too "
            r"small .* scale the coordinates up")
    refused(np.ones((4, 3)), np.array([ok]), r"tetrahedron 0 has zero volume \(points 0, 1, 2, 3 "
            r"coincide\)")
    # within the range: edges of 1e-90 and 1e90 are fine (volumes 1e-270, 1e270)
    for s in (1e-90, 1e90):
        vol, g = element_gradients(p * s, np.array([ok]))
        assert vol[0] == pytest.approx(s**3 / 6, rel=4 * EPS) and np.isfinite(g).all()
    assert 0 < DEGENERATE_VOLUME_TOL < 1e-6


def test_more_than_one_bad_cell_is_counted():
    t = np.array([[0, 1, 2, 3], [0, 0, 1, 2], [1, 1, 2, 3]])
    refused(REFERENCE, t, r"tetrahedron 1 repeats a vertex \[0, 0, 1, 2\]: zero volume; "
            r"2 tetrahedra in all")


_DTYPES = ["float64", "float32", "float16", "int64", "int32", "uint8", "int8", "complex128",
           "bool", "object"]


@given(
    st.integers(0, 8),  # points
    st.integers(0, 4),  # cells
    st.sampled_from([(3, 4), (3, 4), (3, 3), (2, 4), (4, 5), (1, 4)]),  # shapes
    st.sampled_from(["float64"] * 4 + _DTYPES),
    st.sampled_from(["int32"] * 4 + _DTYPES),
    st.sampled_from([None, None, np.nan, np.inf, -np.inf, 1e200, 1e-200]),
    st.booleans(),  # indices may leave the range
    seeds,
)
def test_fuzzed_input_works_or_is_refused(n, m, shapes, pdt, tdt, special, wild, seed):
    d, k = shapes
    rng = np.random.default_rng(seed)
    p = rng.uniform(-1, 1, size=(n, d))
    if special is not None and p.size:
        p.flat[rng.integers(p.size)] = special
    if wild or n == 0:  # out of range and repeated vertices
        t = rng.integers(-1, n + 1, size=(m, k))
    else:  # in range, distinct vertices when there are enough points
        t = np.array([rng.permutation(n)[:k] if k <= n else rng.integers(0, n, k)
                      for _ in range(m)]).reshape(m, k)
    with np.errstate(all="ignore"):  # NaN to int and the like: whatever numpy makes of it
        p, t = p.astype(pdt), t.astype(tdt)
    before = p.copy(), t.copy()
    for plain in (False, True):
        try:
            vol, g = element_gradients(p, t, plain=plain)
        except hatkernels.InputError:
            continue
        # accepted: finite, positive measures and finite gradients summing to zero
        assert np.isfinite(g).all() and len(vol) == m
        if d == 3:
            assert (vol > 0).all()
            assert np.abs(g.sum(axis=1)).max(initial=0) <= 64 * EPS * np.abs(g).max(initial=0)
    assert before[0].dtype == p.dtype  # the values, NaN included, compared as complex numbers
    assert np.array_equal(before[0].astype(complex), p.astype(complex), equal_nan=True)
    assert np.array_equal(before[1], t)


def test_2d_and_3d_do_not_mix():
    refused(np.zeros((4, 3)), np.zeros((1, 3), dtype=int), r"tetrahedra must be .* \(m, 4\)")
    refused(np.zeros((4, 2)), np.zeros((1, 4), dtype=int), r"triangles must be .* \(m, 3\)")
    with pytest.raises(hatkernels.InputError, match="cannot be read as arrays"):
        element_gradients([[0.0, 0, 0], [1, 0]], [[0, 1, 2, 3]])


# --- quadrature ----------------------------------------------------------------------


def monomial_integral(a, b, c):
    """int over the reference tetrahedron of x^a y^b z^c = a! b! c! / (a + b + c + 3)!

    (the standard formula for integrals of monomials over the unit simplex; e.g.
    M. A. Eisenberg and L. E. Malvern, On finite element integration in natural
    co-ordinates, Int. J. Numer. Meth. Eng. 7, 1973, with the reference volume 1/6.)
    """
    return factorial(a) * factorial(b) * factorial(c) / factorial(a + b + c + 3)


def monomials(degree):
    return [(a, b, d - a - b) for d in range(degree + 1) for a in range(d + 1)
            for b in range(d - a + 1)]


def rule_integral(lam, w, a, b, c):
    # on the reference tetrahedron x, y, z are the coordinates of vertices 1, 2, 3
    return w @ (lam[:, 1] ** a * lam[:, 2] ** b * lam[:, 3] ** c) / 6


@pytest.mark.parametrize("degree", [1, 2, 3, 4, 5])
def test_tetrahedron_rule_is_exact_to_its_degree(degree):
    lam, w = tetrahedron_rule(degree)
    assert np.abs(lam.sum(axis=1) - 1).max() <= 2 * EPS and (lam >= 0).all()
    assert abs(w.sum() - 1) <= 4 * EPS
    for a, b, c in monomials(degree):
        exact = monomial_integral(a, b, c)
        assert abs(rule_integral(lam, w, a, b, c) - exact) <= 16 * EPS * exact


@pytest.mark.parametrize("degree, points", [(1, 1), (2, 4), (3, 5), (5, 15)])
def test_tetrahedron_rule_degree_is_not_overstated(degree, points):
    lam, w = tetrahedron_rule(degree)
    assert len(w) == points
    errors = [abs(rule_integral(lam, w, a, b, c) - monomial_integral(a, b, c))
              / monomial_integral(a, b, c)
              for a, b, c in monomials(degree + 1) if a + b + c == degree + 1]
    assert max(errors) > 1e-3


def test_tetrahedron_rule_bad_degrees_and_read_only():
    for bad in (0, 6, 2.0, True, None):
        with pytest.raises(hatkernels.InputError, match="quadrature degree"):
            tetrahedron_rule(bad)
    lam, w = tetrahedron_rule(5)
    assert not lam.flags.writeable and not w.flags.writeable
    assert (w > 0).all() and tetrahedron_rule(4)[0] is lam  # 4 is served by the degree-5 rule
    assert tetrahedron_rule(3)[1][0] == -0.8  # the five-point rule's centroid weight


# --- element matrices ----------------------------------------------------------------


def test_reference_stiffness_and_mass():
    t = np.array([[0, 1, 2, 3]])
    vol, g = element_gradients(REFERENCE, t)
    # |T| G G^T with the gradients of the reference tetrahedron (analytic)
    K = np.array([[3, -1, -1, -1], [-1, 1, 0, 0], [-1, 0, 1, 0], [-1, 0, 0, 1]]) / 6
    S = elements.tetrahedron_stiffness_values(REFERENCE, t, vol, g, ONE)[0]
    assert np.abs(S - K).max() <= 2 * EPS
    # consistent mass |T| / 20 (1 + delta_ij) (O. C. Zienkiewicz and R. L. Taylor, The Finite
    # Element Method, vol. 1; value from memory; it is Eisenberg and Malvern's formula, 1973)
    M = (np.ones((4, 4)) + np.eye(4)) / 6 / 20
    for c in (ONE, coefficient("cell", np.array([1.0])), coefficient("point", np.ones(4))):
        assert np.abs(elements.tetrahedron_mass_values(REFERENCE, t, vol, c)[0] - M).max() <= 2 * EPS
    three = coefficient("cell", np.array([3.0]))
    assert np.abs(elements.tetrahedron_mass_values(REFERENCE, t, vol, three)[0] - 3 * M).max() \
        <= 4 * EPS
    # lumped: |T| / 4 (row sums of the above)
    lumped = elements.tetrahedron_lumped_values(REFERENCE, t, vol, three)[0]
    assert np.abs(lumped - 3 / 24).max() <= 2 * EPS


def test_cube_of_six_tetrahedra():
    vol, g = element_gradients(CUBE, CUBE_CELLS)
    assert abs(vol.sum() - 1) <= 4 * EPS and np.abs(vol - 1 / 6).max() <= EPS  # analytic
    S = elements.tetrahedron_stiffness_values(CUBE, CUBE_CELLS, vol, g, ONE)
    assert np.array_equal(S, S.transpose(0, 2, 1))
    K = assemble(CUBE_CELLS, S, 8)
    # constants are in the kernel (row sums zero); for linear u = a + b.x and v = c + d.x,
    # v^T K u = int grad v . grad u = b . d times the volume 1 (analytic)
    assert np.abs(K @ np.ones(8)).max() <= 8 * EPS
    rng = np.random.default_rng(3)
    for _ in range(5):
        (a, c), b, d = rng.normal(size=2), rng.normal(size=3), rng.normal(size=3)
        u, v = a + CUBE @ b, c + CUBE @ d
        assert abs(v @ K @ u - b @ d) <= 64 * EPS * (np.abs(b) @ np.abs(d) + abs(a) + abs(c))
        assert abs(u @ K @ u - b @ b) <= 64 * EPS * (b @ b + a * a)
    # a diagonal tensor: u^T K u = sum k_i b_i^2 (analytic); one (3, 3) or one per cell
    k = np.array([1.0, 2.0, 5.0])
    for value in (np.diag(k), np.repeat(np.diag(k)[None], 6, axis=0)):
        St = elements.tetrahedron_stiffness_values(CUBE, CUBE_CELLS, vol, g,
                                                   coefficient("tensor", value))
        assert np.array_equal(St, St.transpose(0, 2, 1))
        Kt = assemble(CUBE_CELLS, St, 8)
        b = rng.normal(size=3)
        u = CUBE @ b
        assert abs(u @ Kt @ u - k @ b**2) <= 64 * EPS * (k @ b**2)
    # mass sums to the volume, lumped mass to the volume at each cell (analytic)
    Mc = assemble(CUBE_CELLS, elements.tetrahedron_mass_values(CUBE, CUBE_CELLS, vol, ONE), 8)
    assert abs(Mc.sum() - 1) <= 16 * EPS and np.array_equal(Mc, Mc.T)


def test_seven_point_stencil_at_an_interior_point():
    # 2 x 2 x 2 cubes of side h = 1/2: the interior point's stiffness row is h times the
    # 7-point stencil: 6 on the diagonal, -1 to the six axis neighbours, 0 to the others
    # (value from memory; the check named in DESIGN.md)
    p, t = grid(2)
    vol, g = element_gradients(p, t)
    K = assemble(t, elements.tetrahedron_stiffness_values(p, t, vol, g, ONE), len(p))
    centre = 13
    assert p[centre].tolist() == [0.5, 0.5, 0.5]
    expected = np.zeros(len(p))
    expected[centre] = 6
    for axis in range(3):
        for step in (-0.5, 0.5):
            q = p[centre].copy()
            q[axis] += step
            expected[np.flatnonzero((p == q).all(axis=1))[0]] = -1
    assert np.abs(K[centre] - 0.5 * expected).max() <= 16 * EPS


@pytest.mark.parametrize("quadrature", [2, 3, 5])
def test_load_values(quadrature):
    t = np.array([[0, 1, 2, 3]])
    vol, _ = element_gradients(REFERENCE, t)
    # f = x y: int f lambda_a over the reference tetrahedron, from the monomial formula
    # (analytic): lambda_0 = 1 - x - y - z, lambda_1..3 = x, y, z
    xy = monomial_integral(1, 1, 0)
    exact = np.array([xy - monomial_integral(2, 1, 0) - monomial_integral(1, 2, 0)
                      - monomial_integral(1, 1, 1), monomial_integral(2, 1, 0),
                      monomial_integral(1, 2, 0), monomial_integral(1, 1, 1)])
    f = coefficient("callable", lambda x, y, z: x * y)
    got = elements.tetrahedron_load_values(REFERENCE, t, vol, f, quadrature)[0]
    if quadrature >= 3:
        assert np.abs(got - exact).max() <= 16 * EPS * exact.max()
    else:  # degree 2 cannot be exact for a cubic integrand, and is not
        assert np.abs(got - exact).max() > 1e-6
    # per point, f linear: |T| (f_a + sum f) / 20, the same as the rule exact for it
    fp = np.array([1.0, 2.0, -3.0, 0.5])
    lin = coefficient("callable", lambda x, y, z: fp[0] + (fp[1] - fp[0]) * x
                      + (fp[2] - fp[0]) * y + (fp[3] - fp[0]) * z)
    closed = elements.tetrahedron_load_values(REFERENCE, t, vol, coefficient("point", fp))[0]
    by_rule = elements.tetrahedron_load_values(REFERENCE, t, vol, lin, quadrature)[0]
    assert np.abs(closed - by_rule).max() <= 32 * EPS * np.abs(fp).max()
    assert np.abs(closed - (fp + fp.sum()) / 120).max() <= 4 * EPS * np.abs(fp).max()


def test_mass_with_point_and_callable_coefficients():
    # c linear, c phi_a phi_b cubic: the degree-3 rule is exact, the closed form too
    # (Eisenberg and Malvern 1973); their sums are int c = |T| mean(c) (analytic)
    p, t = random_tetrahedra(11, m=3)
    vol, _ = element_gradients(p, t)
    cp = np.random.default_rng(1).uniform(1, 2, size=len(p))
    closed = elements.tetrahedron_mass_values(p, t, vol, coefficient("point", cp))
    x = p[t]
    A = np.linalg.solve(np.concatenate([np.ones((len(t), 4, 1)), x], axis=2), cp[t][..., None])[..., 0]  # a + b.x

    def c(x, y, z):
        # the cell of each quadrature point is known from the order of evaluation
        k = np.repeat(np.arange(len(t)), len(x) // len(t))
        return A[k, 0] + A[k, 1] * x + A[k, 2] * y + A[k, 3] * z

    by_rule = elements.tetrahedron_mass_values(p, t, vol, coefficient("callable", c), 3)
    scale = np.abs(closed).max()
    assert np.abs(closed - by_rule).max() <= 64 * EPS * scale
    assert np.abs(closed.sum(axis=(1, 2)) - vol * cp[t].mean(axis=1)).max() <= 16 * EPS * scale
    lumped = elements.tetrahedron_lumped_values(p, t, vol, coefficient("point", cp))
    assert np.abs(lumped - closed.sum(axis=2)).max() <= 16 * EPS * scale


def test_callable_errors_name_the_tetrahedron():
    p, t = grid(1)
    vol, _ = element_gradients(p, t)
    bad = coefficient("callable", lambda x, y, z: np.where(z > 0.5, np.nan, 1.0))
    with pytest.raises(hatkernels.InputError, match=r"c\(x, y, z\) is nan at .* quadrature point "
                       r"of tetrahedron \d"):
        elements.tetrahedron_load_values(p, t, vol, bad, 2)
    short = coefficient("callable", lambda x, y, z: x[:1])
    with pytest.raises(hatkernels.InputError, match="returned shape"):
        elements.tetrahedron_mass_values(p, t, vol, short, 2)
    with pytest.raises(hatkernels.InputError, match="must be scalar"):
        elements.tetrahedron_load_values(p, t, vol, coefficient("tensor", np.eye(3)))
    with pytest.raises(hatkernels.InputError, match=r"shape \(3, 3\) or \(6, 3, 3\)"):
        vol, g = element_gradients(p, t)
        elements.tetrahedron_stiffness_values(p, t, vol, g, coefficient("tensor", np.eye(2)))


def test_inputs_are_not_modified():
    p, t = grid(2, 0.2, 5)
    saved = p.copy(), t.copy()
    vol, g = element_gradients(p, t)
    cp = np.linspace(1, 2, len(p))
    saved_c = cp.copy()
    for fn in (elements.tetrahedron_mass_values, elements.tetrahedron_load_values,
               elements.tetrahedron_lumped_values):
        fn(p, t, vol, coefficient("point", cp))
    elements.tetrahedron_stiffness_values(p, t, vol, g, coefficient("point", cp))
    assert np.array_equal(p, saved[0]) and np.array_equal(t, saved[1])
    assert np.array_equal(cp, saved_c)


def test_six_signed_volumes_kernel():
    # the orientation a 3-D mesh needs: det(x1 - x0, x2 - x0, x3 - x0) (analytic for the
    # reference tetrahedron: +1, and -1 with two vertices swapped); |det| / 6 is the volume
    # element_gradients returns, bit for bit (the same operations)
    from hatkernels._jit.geometry import six_signed_volumes

    out = np.empty(2)
    six_signed_volumes(REFERENCE, np.array([[0, 1, 2, 3], [0, 2, 1, 3]], dtype=np.int32), out)
    assert out.tolist() == [1.0, -1.0]
    p, t = random_tetrahedra(4, m=20)
    out = np.empty(len(t))
    six_signed_volumes(p, t, out)
    vol, _ = element_gradients(p, t)
    assert np.array_equal(np.abs(out) / 6.0, vol)
    assert (out > 0).any() and (out < 0).any()


@pytest.mark.two_threads
def test_six_signed_volumes_one_and_two_threads():
    from hatkernels._jit.geometry import six_signed_volumes

    p, t = grid(8, 0.2, 9)
    out1, out2 = np.empty(len(t)), np.empty(len(t))
    with hatkernels.threads(1):
        six_signed_volumes(p, t, out1)
    with hatkernels.threads(2):
        six_signed_volumes(p, t, out2)
    assert np.array_equal(out1, out2)
