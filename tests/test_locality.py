"""Renumbering a poorly numbered system: the test, the order, the permuted matrix, and a
whole solve on a shuffled mesh against the same mesh in its natural numbering."""

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import jittered_mesh, two_threads
from hypothesis import given, settings
from hypothesis import strategies as st

import hatkernels
from hatkernels._jit import reorder as R
from hatkernels._jit import threads
from hatkernels.locality import MIN_ROWS, Renumbering, poorly_numbered, spread_limit


def shuffled(mesh, seed=0):
    """``mesh`` with its points (and triangles) in random order, and the old-to-new map."""
    rng = np.random.default_rng(seed)
    perm = rng.permutation(mesh.n_points)  # new point k is old point perm[k]
    inv = np.empty_like(perm)
    inv[perm] = np.arange(perm.size)
    cells = inv[mesh.triangles][rng.permutation(mesh.n_triangles)]
    return hatkernels.Mesh(mesh.points[perm], cells), inv


def z_order_plain(points, bits):
    """Z order by NumPy: cells of 2**bits per side, bits interleaved, a stable sort."""
    lo = points.min(axis=0)
    span = np.maximum(points.max(axis=0) - lo, np.finfo(float).tiny)
    cells = np.clip(((points - lo) * ((1 << bits) / span)).astype(np.int64), 0, (1 << bits) - 1)
    dim = points.shape[1]
    keys = np.zeros(len(points), dtype=np.int64)
    for b in range(bits):
        for a in range(dim):
            keys |= ((cells[:, a] >> b) & 1) << (dim * b + a)
    return np.argsort(keys, kind="stable")


def test_far_entries_counts_as_numpy():
    A = sp.random(300, 300, density=0.05, format="csr", random_state=1)
    rows = np.repeat(np.arange(300), np.diff(A.indptr))
    for limit in (0, 10, 100, 299):
        for step in (1, 3, 299, 400):
            kept = rows % step == 0
            far, seen = R.far_entries(A.indptr, A.indices, limit, step)
            assert far == np.count_nonzero(np.abs(rows - A.indices)[kept] > limit)
            assert seen == np.count_nonzero(kept)


def test_natural_numbering_is_kept_and_a_shuffled_one_is_not():
    mesh = hatkernels.mesh.rectangle(300, 300)  # 90,601 points: above MIN_ROWS
    assert mesh.n_points >= MIN_ROWS
    A = hatkernels.assemble_stiffness(mesh)
    assert not poorly_numbered(A, 2)
    B = hatkernels.assemble_stiffness(shuffled(mesh)[0])
    assert poorly_numbered(B, 2)
    small = hatkernels.mesh.rectangle(100, 100)  # below MIN_ROWS: never
    assert not poorly_numbered(hatkernels.assemble_stiffness(shuffled(small)[0]), 2)
    # a cube in its natural numbering: planes apart, well within n^(2/3) times SPREAD
    cube = hatkernels.assemble_stiffness(hatkernels.mesh.cuboid(41, 41, 41))
    assert cube.shape[0] >= MIN_ROWS and not poorly_numbered(cube, 3)
    assert spread_limit(10**6, 2) == 8000


@pytest.mark.parametrize("dim", [2, 3])
def test_z_order_matches_the_plain_version(dim):
    rng = np.random.default_rng(dim)
    points = rng.uniform(-3, 5, (5000, dim))
    points[:7] = points[7]  # repeated points keep their order
    r = Renumbering(points)
    bits = max(1, int(np.log2(5000)) // dim)
    assert np.array_equal(r.order, z_order_plain(points, bits))
    assert np.array_equal(r.order[r.inverse], np.arange(5000))


def test_z_order_brings_neighbours_together():
    # in a shuffled grid, consecutive unknowns in the new order lie a cell or so apart
    mesh, _ = shuffled(hatkernels.mesh.rectangle(200, 200))
    r = Renumbering(mesh.points)
    steps = np.linalg.norm(np.diff(mesh.points[r.order], axis=0), axis=1)
    assert np.median(steps) <= 1.5 / 200
    B = r.matrix(hatkernels.assemble_stiffness(mesh))
    assert not poorly_numbered(B, 2) or B.shape[0] < MIN_ROWS
    rows = np.repeat(np.arange(B.shape[0]), np.diff(B.indptr))
    assert np.median(np.abs(rows - B.indices)) < 0.01 * B.shape[0]


@settings(max_examples=30, deadline=None)
@given(n=st.integers(1, 60), density=st.floats(0.0, 0.3), seed=st.integers(0, 2**16),
       wide=st.booleans())
def test_permuted_matrix_equals_scipys(n, density, seed, wide):
    # reference library: scipy's fancy indexing A[p][:, p], sorted
    rng = np.random.default_rng(seed)
    A = sp.random(n, n, density=density, format="csr", random_state=seed)
    A = sp.csr_matrix(A + A.T + sp.eye(n))
    A.sort_indices()
    if wide:
        A.indptr, A.indices = A.indptr.astype(np.int64), A.indices.astype(np.int64)
    points = rng.uniform(0, 1, (n, 2))
    r = Renumbering(points)
    B = r.matrix(A)
    expected = sp.csr_matrix(A[r.order][:, r.order])
    expected.sort_indices()
    assert np.array_equal(B.indptr, expected.indptr)
    assert np.array_equal(B.indices, expected.indices)
    assert np.array_equal(B.data, expected.data)
    x = rng.standard_normal(n)
    assert np.array_equal(r.back(r.vector(x)), x)


@two_threads
def test_order_and_matrix_same_bits_on_one_and_two_threads():
    mesh, _ = shuffled(hatkernels.mesh.rectangle(150, 150), seed=4)
    A = hatkernels.assemble_stiffness(mesh)
    with threads(1):
        r1 = Renumbering(mesh.points)
        B1 = r1.matrix(A)
    with threads(2):
        r2 = Renumbering(mesh.points)
        B2 = r2.matrix(A)
    assert np.array_equal(r1.order, r2.order)
    assert np.array_equal(B1.indices, B2.indices) and np.array_equal(B1.data, B2.data)


def test_solve_on_a_shuffled_mesh_is_renumbered_and_agrees():
    # the same jittered mesh in its natural and in a random numbering: the same
    # discrete solution (to CG's tolerance), the shuffled one solved in Z order
    natural = jittered_mesh(300, 11, shuffle=False)
    mesh, inv = shuffled(natural, seed=2)
    f = lambda x, y: np.sin(3 * x) + y  # noqa: E731
    a = hatkernels.solve_poisson(natural, f, rtol=1e-10)
    b = hatkernels.solve_poisson(mesh, f, rtol=1e-10)
    assert "renumber" in b.stats.timings and "renumber" not in a.stats.timings
    assert b.stats.converged
    u = b.u[inv]  # back in the natural numbering
    assert np.linalg.norm(u - a.u) <= 1e-8 * np.linalg.norm(a.u)
    # against scipy's direct solve of the shuffled mesh's own system (reference library)
    from scipy.sparse.linalg import spsolve
    s = hatkernels.apply_dirichlet(hatkernels.assemble_stiffness(mesh),
                                   hatkernels.assemble_load(mesh, f), mesh.boundary_points())
    exact = s.expand(spsolve(sp.csc_matrix(s.A), s.b))
    assert np.linalg.norm(b.u - exact) <= 1e-8 * np.linalg.norm(exact)


def test_only_matrix_preconditioners_are_renumbered():
    # gmg (and any preconditioner that needs the mesh) gets the mesh's own rows, as does
    # a nested start; the others get the system in Z order
    from hatkernels.discretise import discretise
    from hatkernels.poisson import _renumbered
    from hatkernels.problem import PoissonProblem

    mesh, _ = shuffled(hatkernels.mesh.rectangle(300, 300), seed=3)
    system = discretise(PoissonProblem(mesh, 1.0))
    for name, start, renumbered in (("amg", None, True), ("jacobi", "zero", True),
                                    ("gmg", None, False), ("amg", "nested", False)):
        A, b, r = _renumbered(system, name, start)
        assert (r is not None) == renumbered, (name, start)
        assert (A is system.A) == (not renumbered)
    r = hatkernels.solve_poisson(mesh, 1.0, preconditioner="jacobi", rtol=1e-3)
    assert "renumber" in r.stats.timings
    # asked for: never, or always (a well-numbered mesh too)
    assert _renumbered(system, "amg", None, False)[2] is None
    natural = discretise(PoissonProblem(hatkernels.mesh.rectangle(20, 20), 1.0))
    assert _renumbered(natural, "amg", None)[2] is None
    assert _renumbered(natural, "amg", None, True)[2] is not None
    with pytest.raises(hatkernels.InputError, match="renumber must be"):
        hatkernels.solve_poisson(mesh, 1.0, renumber="yes")


def test_command_reports_the_renumbering(tmp_path, capsys):
    # the command solves a shuffled mesh file renumbered and says how long that took
    import json

    from hatkernels import cli

    mesh, _ = shuffled(hatkernels.mesh.rectangle(260, 260), seed=5)  # 68,121 points
    np.savez(tmp_path / "m.npz", points=mesh.points, triangles=mesh.triangles)
    out = tmp_path / "o"
    assert cli.main(["solve", "--mesh", str(tmp_path / "m.npz"), "--out", str(out),
                     "--quiet"]) == 0
    times = [line for line in capsys.readouterr().out.splitlines() if line.startswith("times")]
    assert len(times) == 1 and "renumber" in times[0]
    assert json.loads((out / "summary.json").read_text())["timings_s"]["renumber"] > 0


def test_distributed_solve_keeps_the_numbering():
    # one rank equals the serial solve told not to renumber (CG from zero, as the
    # distributed solve starts it), to the bit; renumber=True
    # is refused there (serial only)
    from mpi4py import MPI

    from hatkernels.distributed import solve_poisson as distributed

    mesh, _ = shuffled(hatkernels.mesh.rectangle(260, 260), seed=6)
    serial = hatkernels.solve_poisson(mesh, 1.0, rtol=1e-8, renumber=False, start="zero")
    one = distributed(mesh, 1.0, rtol=1e-8, comm=MPI.COMM_SELF)
    assert np.array_equal(one.u, serial.u)
    with pytest.raises(hatkernels.InputError, match="serial only"):
        distributed(mesh, 1.0, renumber=True, comm=MPI.COMM_SELF)


def test_march_on_a_shuffled_mesh_is_renumbered_and_agrees():
    # a time march: the shuffled mesh solved in Z order gives the natural mesh's
    # fields, probe values and heat accounts (to CG's tolerance per step)
    from hatkernels.transient import solve_transient

    natural = hatkernels.mesh.rectangle(260, 260)
    mesh, inv = shuffled(natural, seed=8)
    bump = lambda x, y: np.sin(np.pi * x) * np.sin(np.pi * y)  # noqa: E731
    kw = dict(dt=0.004, probes=[[0.3, 0.4], [0.5, 0.5]], rtol=1e-10, f=1.0, robin=(2.0, 0.5))
    a = solve_transient(natural, bump, [0.0, 0.01, 0.02], **kw)
    b = solve_transient(mesh, bump, [0.0, 0.01, 0.02], **kw)
    assert "renumber" in b.stats.timings and "renumber" not in a.stats.timings
    assert np.linalg.norm(b.u[:, inv] - a.u) <= 1e-8 * np.linalg.norm(a.u)
    assert np.allclose(b.probe_values, a.probe_values, rtol=1e-8, atol=0)
    ea, eb = a.energy(), b.energy()
    assert np.allclose(eb.stored, ea.stored, rtol=1e-8, atol=1e-12)
    off = solve_transient(mesh, bump, [0.0, 0.01], renumber=False, **kw)
    assert "renumber" not in off.stats.timings
    assert np.linalg.norm(off.u[1] - b.u[1]) <= 1e-8 * np.linalg.norm(b.u[1])


def test_nothing_to_renumber_when_every_point_is_held():
    # one square, all four corners held: no unknown; with renumber=True as with the
    # default the steady solve returns the held values and the march is refused by name,
    # not a crash in the ordering
    from hatkernels.transient import solve_transient

    m = hatkernels.mesh.rectangle(1, 1)
    for renumber in (None, True):
        sol = hatkernels.solve_poisson(m, 1.0, dirichlet=2.0, renumber=renumber)
        assert np.array_equal(sol.u, np.full(4, 2.0)) and sol.stats.unknowns == 0
        with pytest.raises(hatkernels.InputError, match="every one of the 4 points is held"):
            solve_transient(m, 0.0, [0.0, 0.1], dt=0.05, dirichlet=2.0, renumber=renumber)


def test_renumbering_names_bad_points():
    with pytest.raises(hatkernels.InputError, match="shape"):
        Renumbering(np.zeros((4, 1)))
    pts = np.random.default_rng(0).uniform(size=(6, 2))
    pts[3, 1] = np.nan
    with pytest.raises(hatkernels.InputError, match="point 3"):
        Renumbering(pts)
    r = Renumbering(np.random.default_rng(1).uniform(size=(5, 2)))
    with pytest.raises(hatkernels.InputError, match=r"shape \(5, 5\)"):
        r.matrix(sp.identity(4, format="csr"))
    with pytest.raises(hatkernels.InputError, match="CSR"):
        r.matrix(np.eye(5))


def test_eigenmodes_on_a_shuffled_mesh_are_renumbered_and_agree():
    # lobpcg on a mesh with no refinement history: the shuffled mesh's modes, renumbered,
    # are the natural mesh's (a jittered mesh: no repeated eigenvalue)
    from hatkernels.eigen import eigenmodes

    natural = jittered_mesh(260, 3, shuffle=False)
    mesh, inv = shuffled(natural, seed=9)
    a = eigenmodes(natural, 4, method="lobpcg", rtol=1e-9)
    b = eigenmodes(mesh, 4, method="lobpcg", rtol=1e-9)
    assert "renumber" in b.stats.timings and "renumber" not in a.stats.timings
    assert np.allclose(b.values, a.values, rtol=1e-8, atol=0)
    for j in range(4):  # the same mode, up to its sign
        va, vb = a.vectors[:, j], b.vectors[inv, j]
        sign = np.sign(va @ vb)
        assert np.linalg.norm(sign * vb - va) <= 1e-4 * np.linalg.norm(va)
    kept = eigenmodes(mesh, 2, method="lobpcg", renumber=False)
    assert "renumber" not in kept.stats.timings
    with pytest.raises(hatkernels.InputError, match="renumber must be"):
        eigenmodes(mesh, 2, renumber="always")
