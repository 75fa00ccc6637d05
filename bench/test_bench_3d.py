"""Tetrahedra side by side: assembly, the generic element path, and whole solves.

    python -m pytest bench/test_bench_3d.py --benchmark-only [--size full]

Meshes are ``cuboid(n, n, n)`` of the unit cube (``6 n^3`` tetrahedra,
``(n + 1)^3`` points); the whole solves use the same mesh made by
refinement (:func:`hatkernels.perf.nested` in 3-D: ``cuboid(n / 2^k)``
refined ``k`` times), which every method gets, so that ``gmg`` can be run
beside the others on the same numbering.

Assembly (stiffness):

``triplets``        vectorised NumPy element matrices, scipy COO -> CSR (the plain alternative)
``csr-first-call``  ``assemble_stiffness(mesh)`` on a mesh that has computed nothing yet
``csr``             ``StiffnessAssembler.assemble()``: element values and the numeric phase

The generic element path (:class:`hatkernels.DofAssembler`), for element
matrices the caller computed (here the tetrahedra's stiffness matrices):

``coo``             ``scipy.sparse.coo_matrix((values, (rows, cols))).tocsr()``
``dofs-first-call`` ``DofAssembler(cells).matrix(values)``: plan and numeric phase
``dofs``            ``assembler.matrix(values)`` again: the plan reused

Whole solves of ``-lap u = 1`` with u = 0 on the boundary, to ``RTOL``:
``amg`` (the default pipeline), ``gmg`` (matrix-free when the operator is),
``pyamg-rs`` and ``pyamg-sa`` (plain assembly, then PyAMG as its
documentation shows, with CG acceleration) and ``superlu`` (plain assembly,
``splu``) while it fits.  Every answer's residual is recomputed from an
independent assembly; peak memory is the process's high-water mark during
the round, in this process.
"""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from conftest import MAX_THREADS, THREADS, record, size_mode, timed_with_peak, warm

import hatkernels
from hatkernels import (
    DofAssembler,
    StiffnessAssembler,
    apply_dirichlet,
    assemble_load,
    assemble_stiffness,
    solve_poisson,
    threads,
)
from hatkernels.assembly.elements import tetrahedron_stiffness_values
from hatkernels.coefficients import parse_coefficient
from hatkernels.geometry import element_gradients
from hatkernels.mesh import Mesh, cuboid

SIZES = {"quick": [6, 12], "full": [30, 60, 120]}
SOLVE_SIZES = {"quick": [8], "full": [32, 64, 100]}
RTOL = 1e-8
SUPERLU_MAX_POINTS = 50_000  # fill-in in 3-D: 104k points took 145 s and 2.5e8 factor entries


def pytest_generate_tests(metafunc):
    mode = size_mode(metafunc.config)
    if "cube" in metafunc.fixturenames:
        metafunc.parametrize("cube", SIZES[mode], ids=[f"n_tetrahedra={6 * n**3}" for n in SIZES[mode]])
    if "solve_cube" in metafunc.fixturenames:
        sizes = SOLVE_SIZES[mode]
        metafunc.parametrize("solve_cube", sizes, ids=[f"n_tetrahedra={6 * n**3}" for n in sizes])


def fresh(mesh):
    """The same mesh with no cached topology."""
    return Mesh._trusted(mesh.points, mesh.cells)


def figures(mesh):
    return {"n_tetrahedra": int(mesh.n_cells), "n_points": int(mesh.n_points), "dim": 3}


def _rounds(config, mesh):
    return 3 if size_mode(config) == "quick" or mesh.n_cells > 2_000_000 else 5


def _traffic(mesh, nnz):
    """Least bytes a stiffness assembly reads and writes: the mesh in, the CSR matrix out."""
    return mesh.points.nbytes + mesh.cells.nbytes + 12 * nnz + 4 * (mesh.n_points + 1)


STIFFNESS = [pytest.param(s, t, id=f"strategy={s}-threads={t}")
             for s in ["triplets", "csr-first-call", "csr"]
             for t in (THREADS if s != "triplets" else [MAX_THREADS])]


@pytest.mark.parametrize("strategy, n_threads", STIFFNESS)
def test_stiffness_3d(benchmark, machine, request, cube, strategy, n_threads):
    mesh = cuboid(cube, cube, cube)
    if strategy == "triplets":
        fn, setup = (lambda m: assemble_stiffness(m, strategy="triplets")), (lambda: (fresh(mesh),))
    elif strategy == "csr-first-call":
        fn, setup = (lambda m: assemble_stiffness(m)), (lambda: (fresh(mesh),))
    else:
        assembler = StiffnessAssembler(mesh)
        fn, setup = (lambda: assembler.assemble()), (lambda: ())
    with threads(n_threads):
        first = warm(benchmark, fn, setup)
        A, peak, source = timed_with_peak(benchmark, fn, setup, _rounds(request.config, mesh))
    floor = _traffic(mesh, A.nnz)
    record(benchmark, machine, floor, floor, kind="assembly", operation="stiffness-3d",
           method=strategy, plain=strategy == "triplets",
           baseline=None if strategy == "triplets" else "triplets", threads=n_threads,
           nnz=int(A.nnz), peak_bytes=peak, peak_source=source, **figures(mesh), **first)


def _element_matrices(mesh):
    volumes, gradients = element_gradients(mesh.points, mesh.cells)
    coef = parse_coefficient(None, mesh, name="coefficient", tensor=True)
    return np.ascontiguousarray(
        tetrahedron_stiffness_values(mesh.points, mesh.cells, volumes, gradients, coef))


def _coo(cells, values, n):
    k = cells.shape[1]
    rows = np.repeat(cells, k, axis=1).ravel()
    cols = np.tile(cells, (1, k)).ravel()
    return sp.coo_matrix((values.ravel(), (rows, cols)), shape=(n, n)).tocsr()


@pytest.mark.parametrize("method, n_threads", [
    pytest.param(m, t, id=f"method={m}-threads={t}")
    for m in ["coo", "dofs-first-call", "dofs"] for t in (THREADS if m != "coo" else [MAX_THREADS])
])
def test_element_matrices(benchmark, machine, request, cube, method, n_threads):
    """The same element matrices through scipy's COO route and through DofAssembler."""
    mesh = cuboid(cube, cube, cube)
    cells, n = mesh.cells, mesh.n_points
    values = _element_matrices(mesh)
    if method == "coo":
        fn = lambda: _coo(cells, values, n)  # noqa: E731
    elif method == "dofs-first-call":
        fn = lambda: DofAssembler(cells, n).matrix(values)  # noqa: E731
    else:
        assembler = DofAssembler(cells, n)
        fn = lambda: assembler.matrix(values)  # noqa: E731
    with threads(n_threads):
        first = warm(benchmark, fn)
        A, peak, source = timed_with_peak(benchmark, fn, lambda: (), _rounds(request.config, mesh))
    floor = values.nbytes + cells.nbytes + 12 * A.nnz
    record(benchmark, machine, floor, floor, kind="assembly", operation="element-matrices",
           method=method, plain=method == "coo", baseline=None if method == "coo" else "coo",
           threads=n_threads, nnz=int(A.nnz), peak_bytes=peak, peak_source=source,
           **figures(mesh), **first)


@pytest.mark.parametrize("method, n_threads", [
    pytest.param(m, t, id=f"method={m}-threads={t}")
    for m in ["einsum", "ours"] for t in (THREADS if m == "ours" else [MAX_THREADS])
])
def test_quadrature_points_3d(benchmark, machine, request, cube, method, n_threads):
    """The quadrature points of a callable's rule (degree 2, four per tetrahedron): numpy's
    einsum over the cells' corners against the numba kernel."""
    from hatkernels._jit import assembly3d as J3
    from hatkernels.quadrature import tetrahedron_rule

    mesh = cuboid(cube, cube, cube)
    lam, _ = tetrahedron_rule(2)
    points, cells = mesh.points, mesh.cells
    xq = np.empty((3, mesh.n_cells, len(lam)))
    fn = ((lambda: np.einsum("qa,mai->imq", lam, points[cells])) if method == "einsum"
          else (lambda: J3.quadrature_coordinates(points, cells, lam, 0, xq)))
    with threads(n_threads):
        first = warm(benchmark, fn)
        _, peak, source = timed_with_peak(benchmark, fn, lambda: (), _rounds(request.config, mesh))
    moved = cells.nbytes + xq.nbytes  # read the cells (points in cache or not), write the points
    record(benchmark, machine, moved, moved, kind="assembly", operation="quadrature-points",
           method=method, plain=method == "einsum",
           baseline=None if method == "einsum" else "einsum", threads=n_threads,
           peak_bytes=peak, peak_source=source, **figures(mesh), **first)


# -- whole solves ------------------------------------------------------------------------
def nested_cube(n):
    """``cuboid(n, n, n)`` made by refining the coarsest cuboid that refines to it."""
    k = 0
    while n % 2 == 0 and n // 2 >= 2:
        n //= 2
        k += 1
    mesh = cuboid(n, n, n)
    for _ in range(k):
        mesh = mesh.refine()
    return mesh


def plain_system(mesh):
    """A user's own pipeline: triplets stiffness, a quarter of each volume per corner, slicing."""
    A = assemble_stiffness(mesh, strategy="triplets")
    b = np.bincount(mesh.cells.ravel(), weights=np.repeat(mesh.volumes() / 4.0, 4),
                    minlength=mesh.n_points)
    free = np.setdiff1d(np.arange(mesh.n_points), mesh.boundary_points())
    return A[free][:, free], b[free], free


def _plain(mesh, name):
    A, b, free = plain_system(mesh)
    iterations = None
    if name == "superlu":
        x = sla.splu(A.tocsc()).solve(b)
    else:
        import pyamg

        build = pyamg.ruge_stuben_solver if name == "pyamg-rs" else pyamg.smoothed_aggregation_solver
        residuals = []
        x = build(A).solve(b, tol=RTOL, accel="cg", residuals=residuals)
        iterations = len(residuals) - 1
    u = np.zeros(mesh.n_points)
    u[free] = x
    return u, iterations


def _solve(mesh, name):
    if name in ("superlu", "pyamg-rs", "pyamg-sa"):
        return _plain(mesh, name)
    options = {} if name == "amg" else {"preconditioner": name}
    sol = solve_poisson(mesh, 1.0, rtol=RTOL, **options)
    return sol.u, sol.stats.iterations


SOLVERS = ["amg", "gmg", "pyamg-rs", "pyamg-sa", "superlu"]


@pytest.mark.parametrize("name", SOLVERS, ids=lambda s: f"method={s}")
def test_solve_3d(benchmark, machine, request, solve_cube, name):
    mesh = nested_cube(solve_cube)
    if name == "superlu" and mesh.n_points > SUPERLU_MAX_POINTS:
        pytest.skip(f"superlu runs up to {SUPERLU_MAX_POINTS:,} points (fill-in)")
    if name == "gmg":
        try:
            hatkernels.StiffnessOperator(cuboid(2, 2, 2))
        except hatkernels.InputError as e:
            pytest.skip(f"gmg on tetrahedra needs the matrix-free operator: {e}")
    fn = lambda m: _solve(m, name)  # noqa: E731
    setup = lambda: (fresh_levels(mesh),)  # noqa: E731
    first = warm(benchmark, lambda: _solve(nested_cube(4), name), small=True)
    (u, iterations), peak, source = timed_with_peak(benchmark, fn, setup,
                                                    1 if mesh.n_cells > 2_000_000 else 3)
    A = assemble_stiffness(mesh)
    system = apply_dirichlet(A, assemble_load(mesh, 1.0), mesh.boundary_points())
    x = system.restrict(u)
    residual = float(np.linalg.norm(system.b - system.A @ x) / np.linalg.norm(system.b))
    assert residual < 1e-6, f"{name}: residual {residual:.2e}"
    record(benchmark, machine, kind="solve", operation="poisson-3d", method=name,
           plain=name in ("superlu", "pyamg-rs", "pyamg-sa"),
           baseline=None if name != "amg" and name != "gmg" else "pyamg-rs",
           iterations=iterations, relative_residual=residual, unknowns=int(system.A.shape[0]),
           peak_bytes=peak, peak_source=source, u_max=float(u.max()), **figures(mesh), **first)


#: What a refined mesh holds from its making (the refinement carries them over).
CARRIED = {"boundary_faces", "unused"}


def fresh_levels(mesh):
    """The refined mesh as a user holds it: its levels kept, no topology computed yet but
    what the refinement carried over (its boundary faces)."""
    for level in mesh.levels():
        level.forget(*(level.cached() - CARRIED))
    return mesh
