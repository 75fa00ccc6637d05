"""Tetrahedral meshes refined without storing the refinement (hatkernels.patches.tets).

A coarse tetrahedral mesh refined ``k`` times is kept as the coarse mesh and one flat
vector per level.  Every check goes against something outside that path:

* the stored refinement (``coarse.refine()`` repeated ``k`` times) with the stored
  assembly (:func:`hatkernels.assemble_stiffness`) and the stored solve
  (:func:`hatkernels.solve_poisson` with ``preconditioner="amg"``);
* reference library pyamg: its 7-point Laplacian (``pyamg.gallery.poisson``);
* the triple sine series of ``-lap u = 1`` on the unit cube, and linear functions
  (which P1 reproduces and linear interpolation keeps);
* the same bits on 1 and 2 threads (the kernels' fixed summation order).

Tolerances: linear operators at a relative 1e-13 (round-off ~1e-15); two solves to
``rtol = 1e-10`` agree to 1e-8 relative.
"""

import numpy as np
import pytest
from conftest import refined, relative_error
from hypothesis import given
from hypothesis import strategies as st
from test_threads import assert_same_bits, on_one_and_two_threads

import hatkernels as hk
from hatkernels.errors import InputError
from hatkernels.mesh import ball, cuboid
from hatkernels.mesh.refine3d import bey_order
from hatkernels.mesh.tags import label_cells, label_sides
from hatkernels.patches import PatchSolution, patch_path_reason
from hatkernels.patches.tet_multigrid import TetMultigrid
from hatkernels.patches.tets import PiecewiseDiagonal, TetLayout, TetOperator, class_weights
from hatkernels.precond.chebyshev import ChebyshevSmoother, PointDiagonal

#: Relative agreement of two implementations of one linear operator (round-off ~1e-15).
IDENTITY = 1e-13
RTOL = 1e-10


# -- helpers ------------------------------------------------------------------------------


def fine_kappa(kappa, k):  # coarse cell t's children: fine cells t 8^k ... (t + 1) 8^k - 1
    return hk.per_cell(np.repeat(np.asarray(kappa, dtype=float), 8**k))


def tagged_cube(n=2):
    """The unit cube, n^3 cubes of six tetrahedra: regions cold (x < 1/2) and hot; boundary
    tags left (x = 0), bottom (z = 0), right (x = 1); the rest untagged."""
    m = label_cells(cuboid(n), {"cold": lambda x, y, z: x < 0.5,
                                "hot": lambda x, y, z: x >= 0.5})
    return label_sides(m, {"left": lambda x, y, z: x == 0, "bottom": lambda x, y, z: z == 0,
                           "right": lambda x, y, z: x == 1})


def on_triangles(points, corners, tol=1e-12):
    """Which ``points`` lie on any of the triangles ``corners`` (t, 3, 3): plain geometry."""
    hit = np.zeros(len(points), dtype=bool)
    for a, b, c in corners:
        e1, e2, w = b - a, c - a, points - a
        normal = np.cross(e1, e2)
        G = np.array([[e1 @ e1, e1 @ e2], [e1 @ e2, e2 @ e2]])
        s, t = np.linalg.solve(G, np.stack([w @ e1, w @ e2]))
        flat = np.abs(w @ normal) <= tol * np.linalg.norm(normal)
        hit |= flat & (s >= -tol) & (t >= -tol) & (s + t <= 1 + tol)
    return hit


def layout_vector(layout, fine, u):
    x = np.empty(fine.n_points)
    x[layout.places(fine)] = u
    return x


COARSE = {"cuboid": lambda: cuboid(2), "ball": lambda: ball(2),
          "reordered": lambda: cuboid(2).reorder("rcm")[0]}  # no refinement history


# == 1. the operator against the stored assembly ==========================================


@given(k=st.integers(2, 4), seed=st.integers(0, 2**32 - 1), masked=st.booleans(),
       which=st.sampled_from(sorted(COARSE)))
def test_product_faces_row_by_row_are_the_plain_sums(k, seed, masked, which):
    # the product's face rows written out against its plain path, each face point's
    # partial stencil summed slot by slot: the same bits (common practice, no source)
    from hatkernels._jit import patches3d as t3
    from hatkernels.patches.tets import _N_SLOTS, _SLOTS

    coarse = COARSE[which]()
    rng = np.random.default_rng(seed)
    boundary = coarse.boundary_faces()
    layout = TetLayout(coarse, k, held_faces=boundary[rng.random(len(boundary)) < 0.5])
    W, _ = class_weights(coarse.points[bey_order(coarse)], rng.uniform(0.2, 5.0, coarse.n_cells))
    x = rng.standard_normal(layout.size(k))
    fast, plain = np.empty_like(x), np.empty_like(x)
    n = 2**k
    for y, how in ((fast, False), (plain, True)):
        t3.product(x, y, n, layout.topo, W, 1.0 / n, _SLOTS, _N_SLOTS, masked,
                   *layout.buffers(k), how)
    assert np.array_equal(fast.view(np.uint64), plain.view(np.uint64))


@pytest.mark.parametrize("k", [1, 2, 3])
@pytest.mark.parametrize("which", list(COARSE))
def test_product_equals_the_stored_assembly(which, k):
    coarse = COARSE[which]()
    fine = refined(coarse, k)
    rng = np.random.default_rng(7 * k + len(which))
    kappa = rng.uniform(0.2, 5.0, coarse.n_cells)
    kappa_copy, boundary = kappa.copy(), coarse.boundary_faces()
    held = boundary[rng.random(len(boundary)) < 0.5]
    layout = TetLayout(coarse, k, held_faces=held[:, ::-1])  # any order of a face's points
    W, _ = class_weights(coarse.points[bey_order(coarse)], kappa)
    u = rng.standard_normal(fine.n_points)
    x = layout_vector(layout, fine, u)
    assert layout.size(k) == fine.n_points
    # reference library: scipy's product with the stored assembly of the stored refinement
    A = hk.assemble_stiffness(fine, fine_kappa(kappa, k))
    y = (TetOperator(layout, W, k, masked=False) @ x)[layout.places(fine)]
    assert relative_error(y, A @ u) <= IDENTITY
    # held rows and columns taken out; the held points by plain geometry
    fixed = on_triangles(fine.points, coarse.points[held])
    assert np.array_equal(layout.to_refined(layout.held_mask(), mesh=fine), fixed)
    assert layout.held_count() == fixed.sum()
    free = (~fixed).astype(float)
    op = TetOperator(layout, W, k)
    assert relative_error((op @ x)[layout.places(fine)], free * (A @ (free * u))) <= IDENTITY
    # the smoother's diagonal, and Gershgorin's bound on D^-1 A (S. Gershgorin, 1931) at
    # least that of the assembled rows (the cells' absolute parts bound each |A_ij|)
    diag, bound = op.diagonal_and_bound()
    assert relative_error(diag[layout.places(fine)], free * A.diagonal()) <= IDENTITY
    E = (A.multiply(free[:, None]).multiply(free[None, :])).tocsr()
    rows = np.asarray(abs(E).sum(axis=1)).ravel()[~fixed] / E.diagonal()[~fixed]
    assert bound >= rows.max() * (1 - IDENTITY)
    # the smoother's inverse diagonal, one number per block of points: the stored
    # assembly's, point by point (0 at held points), and the same bound
    block_diag, block_bound = op.block_diagonal_and_bound()
    inv = PiecewiseDiagonal(layout, k, block_diag).expand()[layout.places(fine)]
    ref = np.divide(1.0, A.diagonal(), out=np.zeros(fine.n_points), where=~fixed)
    assert relative_error(inv, ref) <= IDENTITY
    assert block_bound == bound
    assert np.array_equal(kappa, kappa_copy)


@pytest.mark.parametrize("k", [1, 2, 4])
def test_piecewise_diagonal_updates_match_the_per_point_kernels(k):
    # the plain version: the per-point Chebyshev kernels on the expanded vector
    coarse = ball(2)
    layout = TetLayout(coarse, k, held_faces=coarse.boundary_faces()[::2])
    W, _ = class_weights(coarse.points[bey_order(coarse)],
                         np.linspace(0.5, 3.0, coarse.n_cells))
    pw = PiecewiseDiagonal(layout, k, TetOperator(layout, W, k).block_diagonal_and_bound()[0])
    pt = PointDiagonal(pw.expand())
    assert pw.nbytes == 8 * (coarse.n_cells + layout.n_faces + layout.n_edges
                             + layout.n_vertices)
    rng = np.random.default_rng(k)
    b, q, r0, d0, x0 = (rng.standard_normal(layout.size(k)) for _ in range(5))
    calls = {  # each update as the smoother makes it
        "zero start": lambda D, v: D.zero_start(0.7, v["b"], v["x"]),
        "start from zero": lambda D, v: D.start(0.7, v["b"], v["r"], v["d"], v["x"], True),
        "start": lambda D, v: D.start(0.7, v["b"], v["r"], v["d"], v["x"], False),
        "step": lambda D, v: D.step(v["q"], 0.3, 1.1, v["r"], v["d"], v["x"]),
        "last": lambda D, v: D.last(v["q"], 0.3, 1.1, v["r"], v["d"], v["x"]),
    }
    for call in calls.values():
        outs = []
        for diag in (pw, pt):
            vec = {"b": b, "q": q, "r": r0.copy(), "d": d0.copy(), "x": x0.copy()}
            call(diag, vec)
            outs.append([vec["r"], vec["d"], vec["x"]])
        assert_same_bits(outs[0], outs[1])


def test_smoother_refuses_an_estimate_without_a_vector(cube):
    layout = TetLayout(cube, 1, held_faces=cube.boundary_faces())
    op = TetOperator(layout, class_weights(cube.points[bey_order(cube)],
                                           np.ones(cube.n_cells))[0], 1)
    pw = PiecewiseDiagonal(layout, 1, op.block_diagonal_and_bound()[0])
    with pytest.raises(ValueError, match="needs dinv as a vector"):
        ChebyshevSmoother(op.matvec_into, None, pw, 2, bound=2.0, estimate=True)
    with pytest.raises(InputError, match="one number per block"):
        PiecewiseDiagonal(layout, 1, np.ones(3))


@pytest.mark.parametrize("m,k", [(2, 2), (3, 1), (1, 3)])
def test_inside_rows_are_h_times_the_seven_point_laplacian(m, k):
    # reference library: pyamg.gallery.poisson, the 7-point Laplacian on the inside grid
    # points; the cube split into six tetrahedra around its diagonal gives h times it (as
    # tests/test_operators3d.py checks for the stored operator)
    from pyamg.gallery import poisson

    coarse = cuboid(m)
    fine = refined(coarse, k)
    N = m * 2**k  # h = 1 / N
    grid = np.rint(fine.points * N).astype(np.int64)
    assert np.abs(grid - fine.points * N).max() <= 1e-9
    inside = np.flatnonzero(((grid > 0) & (grid < N)).all(axis=1))
    row = ((grid[inside, 0] - 1) * (N - 1) + grid[inside, 1] - 1) * (N - 1) + grid[inside, 2] - 1
    ref = poisson((N - 1,) * 3, format="csr")
    rng = np.random.default_rng(m + k)
    v = rng.standard_normal(ref.shape[0])
    want = (ref @ v) / N
    layout = TetLayout(coarse, k, held_faces=coarse.boundary_faces())
    W, _ = class_weights(coarse.points[bey_order(coarse)], np.ones(coarse.n_cells))
    places = layout.places(fine)
    for masked in (False, True):
        u = rng.standard_normal(fine.n_points) if masked else np.zeros(fine.n_points)
        u[inside] = v[row]  # masked: the boundary values are not read
        y = (TetOperator(layout, W, k, masked=masked) @ layout_vector(layout, fine, u))[places]
        assert relative_error(y[inside], want[row]) <= IDENTITY
        if masked:
            assert not y[np.setdiff1d(np.arange(fine.n_points), inside)].any()


# == 2. grid transfers and the multigrid ==================================================


@pytest.mark.parametrize("held", [False, True])
def test_restriction_is_the_transpose_of_the_prolongation(held):
    coarse, k = ball(1), 3
    faces = coarse.boundary_faces()[::2] if held else None
    layout = TetLayout(coarse, k, held_faces=faces)
    M = TetMultigrid(layout, np.linspace(1.0, 3.0, coarse.n_cells))
    rng = np.random.default_rng(int(held))
    for level in range(1, k + 1):
        xc = rng.standard_normal(layout.size(level - 1))
        yf = rng.standard_normal(layout.size(level))
        Pxc = np.zeros(layout.size(level))
        M._prolong_add(level, xc, Pxc)
        M._restrict(level, yf)
        Ryf = M._below(level)[1].copy()
        # <P xc, yf> = <xc, R yf> (definition of the transpose), relative to Cauchy-Schwarz
        assert abs(Pxc @ yf - xc @ Ryf) <= 1e-12 * np.linalg.norm(Pxc) * np.linalg.norm(yf)
        if not held:
            # a linear function stays itself under linear interpolation (nested P1
            # spaces; common practice, no source)
            a = np.array([0.3, -1.7, 2.2])
            lin = [layout.from_refined(refined(coarse, q).points @ a + 0.5, q)
                   for q in (level - 1, level)]
            out = np.zeros(layout.size(level))
            M._prolong_add(level, lin[0], out)
            assert np.abs(out - lin[1]).max() <= 1e-13 * np.abs(lin[1]).max()


@pytest.mark.parametrize("cycle", ["F", "V"])
def test_multigrid_is_symmetric_and_positive(cycle):
    coarse, k = tagged_cube(2), 3
    layout = TetLayout(coarse, k, held_faces=coarse.tags.sides_of([1, 2]))
    kappa = np.random.default_rng(2).uniform(0.5, 4.0, coarse.n_cells)
    M = TetMultigrid(layout, kappa, cycle=cycle)
    rng = np.random.default_rng(3)
    for _ in range(3):
        a, b = (layout.zero_held(rng.standard_normal(layout.size(k))) for _ in range(2))
        Ma, Mb = M @ a, M @ b
        # a symmetric positive definite preconditioner, as CG needs (common practice, no
        # source): <M a, b> = <a, M b> and <M a, a> > 0
        assert abs(Ma @ b - a @ Mb) <= 1e-10 * np.linalg.norm(Ma) * np.linalg.norm(b)
        assert Ma @ a > 0
        assert not Ma[layout.held_mask()].any()


# == 3. the layout ========================================================================


@pytest.mark.parametrize("which", ["ball", "reordered"])
def test_places_round_trip_and_patches_at_the_lattice_points(which):
    coarse, k = COARSE[which](), 2
    n = 2**k
    fine = refined(coarse, k)
    layout = TetLayout(coarse, k)
    places = layout.places(fine)
    assert np.array_equal(np.sort(places), np.arange(fine.n_points))  # a permutation
    for level in (1, k):
        mesh = refined(coarse, level)
        u = np.random.default_rng(level).standard_normal(mesh.n_points)
        x = layout.from_refined(u, level, mesh=mesh)
        assert np.array_equal(layout.to_refined(x, level, mesh=mesh), u)
        assert np.array_equal(layout.from_refined(layout.to_refined(x, level), level), x)
    a = np.array([1.0 / 3.0, np.sqrt(2.0), -np.pi])
    x = layout.from_refined(fine.points @ a + 0.25)  # a linear function of position
    corners = coarse.points[bey_order(coarse)]
    for cell in (0, coarse.n_cells // 2, coarse.n_cells - 1):
        lam, values = layout.patch(x, cell)
        assert len(lam) == (n + 1) * (n + 2) * (n + 3) // 6 and (lam.sum(axis=1) == n).all()
        p1, p3 = n - lam[:, 0], lam[:, 3]
        p2 = p1 - lam[:, 1]
        x0, x1, x2, x3 = corners[cell]
        where = x0 + (np.outer(p1, x1 - x0) + np.outer(p2, x2 - x1) + np.outer(p3, x3 - x2)) / n
        assert np.abs(values - (where @ a + 0.25)).max() <= 1e-13 * 8
    with pytest.raises(InputError, match="not a coarse cell"):
        layout.patch(x, coarse.n_cells)
    with pytest.raises(InputError, match="has shape"):
        layout.to_refined(x[:-1])


# == 4. the solve =========================================================================


@pytest.fixture(scope="module")
def cube():
    return tagged_cube(2)


@pytest.fixture(scope="module")
def meshes(cube):  # reordered: tags kept, no refinement history
    return {"cube": cube, "hilbert": cube.reorder("hilbert")[0]}


CASES = {
    "constant f": dict(f=1.0),
    "held at 0.5": dict(f=1.0, dirichlet=0.5),
    "regions": dict(f={"hot": 2.0, "cold": -0.5}, coefficient={"cold": 1.0, "hot": 20.0},
                    dirichlet={"left": 1.0, "bottom": -0.5}),
    "tags swapped": dict(f=1.0, dirichlet={"bottom": -0.5, "left": 1.0}),
    "named sides": dict(f={"cold": 3.0, "hot": 1.0}, dirichlet=0.25,
                        dirichlet_on=["left", "right"]),
    "callable f": dict(f=lambda x, y, z: np.sin(3.0 * x) + y * z, dirichlet={"left": 1.0}),
    "callable by region": dict(f={"cold": lambda x, y, z: x * y, "hot": 2.0}),
    "flux": dict(f=1.0, neumann=0.7, dirichlet={"left": 0.5}),
    "flux by tag": dict(f=lambda x, y, z: x, neumann={"right": 2.0, "bottom": -1.0},
                        dirichlet={"left": 1.0}),
}


@pytest.mark.parametrize("k", [2, 3])
@pytest.mark.parametrize("case", list(CASES))
@pytest.mark.parametrize("which", ["cube", "hilbert"])
def test_solve_agrees_with_the_stored_solve(meshes, which, case, k):
    data, mesh = CASES[case], meshes[which]
    before = {key: (dict(v) if isinstance(v, dict) else v) for key, v in data.items()}
    sol = hk.solve_poisson(mesh, refine=k, rtol=RTOL, **data)
    # reference: the stored refinement, the stored assembly and AMG (another path)
    ref = hk.solve_poisson(mesh, refine=k, rtol=RTOL, preconditioner="amg", **data)
    assert isinstance(sol, PatchSolution) and not isinstance(ref, PatchSolution)
    assert sol.converged and ref.converged
    assert np.array_equal(sol.mesh.points, ref.mesh.points)
    assert (sol.stats.unknowns, sol.stats.dirichlet_points) == (ref.mesh.n_points,
                                                                ref.stats.dirichlet_points)
    assert np.abs(sol.u - ref.u).max() <= 1e-8 * np.abs(ref.u).max()
    held, p = data.get("dirichlet", 0.0), sol.mesh.points  # held points by plain geometry
    if isinstance(held, dict):
        # on the edge x = 0, z = 0 of both tags the first listed wins (as the stored path)
        edge = (p[:, 0] == 0) & (p[:, 2] == 0)
        assert edge.sum() == 2**k * 2 + 1
        assert (sol.u[edge] == next(iter(held.values()))).all()
    else:  # the held value, set (not solved for) on the named sides x = 0, 1 or everywhere
        on = p[:, 0] % 1 == 0 if "dirichlet_on" in data else (p % 1 == 0).any(axis=1)
        assert (sol.u[on] == held).all()
    lam, values = sol.patch(5)  # coarse cell 5's lattice: the values at the fine points there
    where = lam @ mesh.points[bey_order(mesh)[5]] / 2**k
    near = np.argmin(((sol.mesh.points[None] - where[:, None]) ** 2).sum(axis=2), axis=1)
    assert np.abs(sol.mesh.points[near] - where).max() <= 1e-14
    assert np.array_equal(values, sol.u[near])
    assert data == before  # dicts read, not changed


@pytest.mark.parametrize("k", [1, 2])
@pytest.mark.parametrize("dirichlet", [0.0, 0.5])
def test_solve_on_a_ball_agrees_with_the_stored_solve(dirichlet, k):
    mesh = ball(2)
    points, cells = mesh.points.copy(), mesh.cells.copy()
    sol = hk.solve_poisson(mesh, 1.0, refine=k, dirichlet=dirichlet, rtol=RTOL)
    # reference: the stored path with AMG
    ref = hk.solve_poisson(mesh, 1.0, refine=k, dirichlet=dirichlet, rtol=RTOL,
                           preconditioner="amg")
    assert isinstance(sol, PatchSolution) and sol.converged
    assert relative_error(sol.u, ref.u) <= 1e-8
    assert np.array_equal(mesh.points, points) and np.array_equal(mesh.cells, cells)


def cube_series(x, y, z, terms=200):
    """``-lap u = 1`` on the unit cube, ``u = 0`` on its boundary: the triple sine series
    ``64 / pi^5 sum_{i, j, l odd} sin(i pi x) sin(j pi y) sin(l pi z) / (i j l (i^2 + j^2
    + l^2))`` (1 = (4/pi)^3 sum sin sin sin / (i j l), each term divided by its eigenvalue
    pi^2 (i^2 + j^2 + l^2); common practice, no source).  ``terms`` odd numbers each."""
    m = 2.0 * np.arange(terms) + 1.0
    sx, sy, sz = (np.sin(m * np.pi * c) for c in (x, y, z))
    total = 0.0
    for q, ml in enumerate(m):
        w = 1.0 / (m[:, None] * m[None, :] * ml * (m[:, None] ** 2 + m[None, :] ** 2 + ml**2))
        total += sz[q] * (sx @ w @ sy)
    return 64.0 / np.pi**5 * total


def test_centre_value_converges_to_the_sine_series_at_second_order():
    exact = cube_series(0.5, 0.5, 0.5)
    assert abs(exact - cube_series(0.5, 0.5, 0.5, terms=400)) <= 1e-8  # the tail is small
    errors = []
    for k in (2, 3):
        sol = hk.solve_poisson(cuboid(2), 1.0, refine=k, rtol=1e-12)
        assert isinstance(sol, PatchSolution)
        centre = np.flatnonzero((sol.mesh.points == 0.5).all(axis=1))
        assert centre.size == 1
        errors.append(abs(sol.u[centre[0]] - exact))
    assert errors[1] <= 5e-4
    assert 3.6 <= errors[0] / errors[1] <= 4.4, errors  # O(h^2)


def test_linear_solution_is_reproduced():
    # u = x: held 0 at x = 0 and 1 at x = 1, no source, no flux on the other faces; P1
    # reproduces linear functions (common practice, no source)
    box = cuboid(3, 2, 2, bounds=(0.0, 1.0, 0.0, 1.5, 0.0, 0.7))
    box = label_sides(box, {"west": lambda x, y, z: x == 0, "east": lambda x, y, z: x == 1})
    sol = hk.solve_poisson(box, 0.0, refine=3, dirichlet={"west": 0.0, "east": 1.0},
                           rtol=1e-13)
    assert isinstance(sol, PatchSolution) and sol.converged
    assert np.abs(sol.u - sol.mesh.points[:, 0]).max() < 1e-9


def test_iterations_stay_flat_with_depth():
    # the stored gmg's F-cycle documents 5, 7, 8, 8, 7 iterations (kernels/precond/gmg.py)
    counts = [hk.solve_poisson(cuboid(2), 1.0, refine=k, rtol=1e-8).stats.iterations
              for k in (1, 2, 3, 4)]
    assert max(counts) <= 9, counts


# == 5. threads ===========================================================================


@pytest.mark.two_threads
def test_kernels_same_bits_on_one_and_two_threads():
    coarse, k = ball(2), 3  # 35,937 fine points over 384 coarse cells
    layout = TetLayout(coarse, k, held_faces=coarse.boundary_faces()[::3])
    kappa = np.linspace(1.0, 4.0, coarse.n_cells)
    x = np.random.default_rng(5).standard_normal(layout.size(k))

    def compute():
        M = TetMultigrid(layout, kappa)
        P = np.zeros(layout.size(k))
        M._prolong_add(k, x[:layout.size(k - 1)], P)
        M._restrict(k, x)
        R = M._below(k)[1].copy()
        full = np.empty_like(x)
        M.full_cycle_into(layout.zero_held(x.copy()), full)
        return [TetOperator(layout, M.W) @ x, TetOperator(layout, M.W, masked=False) @ x,
                TetOperator(layout, M.W, 2) @ x[:layout.size(2)], P, R,
                M @ layout.zero_held(x.copy()), full]

    one, two = on_one_and_two_threads(compute)
    assert all(np.abs(v).max() > 0 for v in one)
    assert_same_bits(one, two)


@pytest.mark.two_threads
def test_whole_solve_same_bits_on_one_and_two_threads(cube):
    data = CASES["regions"]

    def compute():
        sol = hk.solve_poisson(cube, refine=4, rtol=RTOL, **data)
        assert isinstance(sol, PatchSolution) and sol.converged
        return [sol.values, sol.stats.residuals, sol.stats.iterations, sol.stats.threads]

    one, two = on_one_and_two_threads(compute)
    assert one[3] == 1 and two[3] == 2
    assert_same_bits(one[:3], two[:3])


# == 6. which path, and bad input =========================================================


def test_the_path_taken(cube):
    assert patch_path_reason(cube, 2) is patch_path_reason(
        cube, 2, f={"hot": 1.0}, coefficient={"cold": 2.0}, dirichlet={"left": 1.0}) is None
    assert patch_path_reason(cube, 2, f=lambda x, y, z: x) is None
    assert patch_path_reason(cube, 2, f={"hot": lambda x, y, z: x, "cold": 1.0}) is None
    assert patch_path_reason(cube, 2, neumann=1.0) is None
    assert patch_path_reason(cube, 2, neumann={"right": 1.0}, dirichlet_on=["left"]) is None
    refused = [("f is not", dict(f=np.ones(cube.n_points))),
               ("neumann is not", dict(neumann=lambda x, y, z: x)),
               ("reaction", dict(reaction=1.0))]
    for want, kw in refused:
        reason = patch_path_reason(cube, 2, **kw)
        assert reason is not None and want in reason, (kw, reason)
    for kw in ({"preconditioner": "jacobi"}, {"preconditioner": "amg"},
               {"f": np.ones(cube.refine().n_points)},  # per fine point: the stored path
               {"neumann": lambda x, y, z: x, "dirichlet_on": ["left"]}):
        sol = hk.solve_poisson(cube, **{"f": 1.0, **kw}, refine=1, rtol=1e-8)
        assert isinstance(sol, hk.PoissonSolution) and not isinstance(sol, PatchSolution), kw


def test_bad_input_names_what_and_where(cube):
    with pytest.raises(InputError, match=r"held face \(0, 1, 99\) is not a face"):
        TetLayout(cube, 1, held_faces=[[0, 1, 99]])
    with pytest.raises(InputError, match=r"coefficient in region hot \(2\) is -1\.0"):
        hk.solve_poisson(cube, refine=1, coefficient={"cold": 1.0, "hot": -1.0})
    for bad in (1.5, "2", True):
        with pytest.raises(InputError, match="refine must be an integer"):
            hk.solve_poisson(cube, refine=bad)
        with pytest.raises(InputError, match="integer"):
            TetLayout(cube, bad)


def test_multigrid_names_the_coarse_cell_of_a_bad_kappa(cube):
    kappa = np.where(np.arange(cube.n_cells) == 3, -2.0, 1.0)
    with pytest.raises(InputError, match=r"-2\.0.*coarse cell 3|coarse cell 3.*-2\.0"):
        TetMultigrid(TetLayout(cube, 1), kappa)


@pytest.mark.parametrize("triple", [
    # no face (a repeated point, 11 >= 8 points) but with the key (a n + b) n + c = 11 of
    # the face (0, 1, 3) in TetLayout.face_index
    pytest.param([0, 0, 11], id="out-of-range-alias"),
    pytest.param([0.5, 1, 3], id="fraction"),
    pytest.param([0, 1], id="two-points"),
    pytest.param(["a", "b", "c"], id="text"),
])
def test_held_faces_that_are_not_faces_are_refused(triple):
    mesh = cuboid(1)
    assert [0, 1, 3] in np.sort(mesh.faces(), axis=1).tolist()  # the face they alias
    with pytest.raises(InputError, match="held face"):
        TetLayout(mesh, 1, held_faces=[triple])


FUZZ_MESH = cuboid(1)
FACES = np.sort(FUZZ_MESH.faces(), axis=1).tolist()
WEIRD = [0.0, -1.0, np.nan, np.inf, -np.inf]
VALUE = st.sampled_from([1.0, 2.5, 1e-300, *WEIRD])
POINT = st.integers(-2, FUZZ_MESH.n_points + 1)  # in this range no triple aliases a face


@given(triples=st.lists(st.sampled_from(FACES).flatmap(st.permutations)
                        | st.lists(POINT, min_size=3, max_size=3), min_size=1, max_size=4),
       kappa=st.lists(st.sampled_from([1.0, 2.5, 1e-300]), min_size=6, max_size=6),
       bad=st.sampled_from([None, None, "short", "long", *WEIRD]), where=st.integers(0, 5))
def test_fuzz_held_faces_and_kappa(triples, kappa, bad, where):
    if bad in ("short", "long"):
        kappa = kappa[:-1] if bad == "short" else kappa + [1.0]
    elif bad is not None:
        kappa[where] = bad
    triples, kappa = np.array(triples), np.array(kappa)
    kept, layout = (triples.copy(), kappa.copy()), None
    try:
        layout = TetLayout(FUZZ_MESH, 1, held_faces=triples)
        assert all(sorted(t) in FACES for t in triples.tolist())
    except InputError as e:
        assert "held face" in str(e) and any(sorted(t) not in FACES for t in triples.tolist())
    try:
        held = FUZZ_MESH.boundary_faces()[:1]  # a held face: the coarse solve is regular
        M = TetMultigrid(layout or TetLayout(FUZZ_MESH, 1, held_faces=held), kappa)
        assert bad is None and np.isfinite(M @ np.zeros(M.shape[0])).all()
    except InputError:
        assert bad is not None
    assert np.array_equal(triples, kept[0])
    assert np.array_equal(kappa, kept[1], equal_nan=True)


@given(cold=VALUE, hot=VALUE, extra=st.sampled_from([None, None, "warm", 9, 1]),
       f=st.dictionaries(st.sampled_from(["cold", "hot", "warm"]), VALUE, max_size=2))
def test_fuzz_region_data(cube, cold, hot, extra, f):
    coefficient = {"cold": cold, "hot": hot, **({} if extra is None else {extra: 2.0})}
    kept = repr((coefficient, f))
    try:
        sol = hk.solve_poisson(cube, f or 1.0, refine=1, coefficient=coefficient, rtol=1e-8)
        assert isinstance(sol, PatchSolution) and np.isfinite(sol.u).all()
        assert extra is None and min(cold, hot) > 0 and max(cold, hot) < np.inf
    except InputError:
        pass
    assert repr((coefficient, f)) == kept  # read, not changed


def test_public_pieces_refuse_bad_arguments_by_name():
    # review findings: shapes and sizes checked before any kernel runs
    mesh = cuboid(1)
    lay = TetLayout(mesh, 2, held_faces=mesh.boundary_faces())
    W, _ = class_weights(mesh.points[lay.topo[0]], np.ones(mesh.n_cells))
    A, M = TetOperator(lay, W, 2), TetMultigrid(lay, np.ones(mesh.n_cells))
    n = lay.size(2)
    for call, want in [
        (lambda: A.matvec_into(np.ones(3), np.empty(n)), "x has shape"),
        (lambda: A.matvec_into(np.ones(n), np.empty(3)), "out has shape"),
        (lambda: M.apply_into(np.ones(3), np.empty(3)), "r has shape"),
        (lambda: TetOperator(lay, W[:, :3], 2), "class weights"),
        (lambda: lay.class_sum(np.ones((2, 15)), np.ones(2), 2), "class_sum needs"),
        (lambda: lay.zero_held(np.ones(3)), "x has shape"),
        (lambda: lay.size(-1), "level"),
        (lambda: lay.patch(np.zeros(n), 1.5), "cell"),
        (lambda: TetLayout(mesh, 21), "k"),
        (lambda: hk.patches.solve_on_patches(mesh, 1.0, 2, single=True), "single-precision"),
    ]:
        with pytest.raises(InputError, match=want):
            call()
    # the layout's size is exact in Python integers where int64 would overflow
    assert lay.size(20) == (mesh.n_cells * (2**20 - 1) * (2**20 - 2) * (2**20 - 3) // 6
                            + lay.n_faces * (2**20 - 1) * (2**20 - 2) // 2
                            + lay.n_edges * (2**20 - 1) + lay.n_vertices)
