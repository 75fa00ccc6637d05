"""Sparse linear algebra: vector kernels, preconditioner setup and apply, IC(0) kernels.

    python -m pytest bench/test_bench_linear.py --benchmark-only [--size full]

Problems: the Dirichlet-reduced P1 Poisson system on ``rectangle(n, n)`` for
each size of ``--size`` (``(n - 1)^2`` unknowns, 5 nonzero entries and 2
explicit zeros of the mesh pattern per interior row); gmg gets the same mesh
made by refinement and its matrix-free operator.  Plain alternatives side by
side: NumPy for the vector kernels, PyAMG's own hierarchies
(``pyamg.ruge_stuben_solver(A)``, ``pyamg.smoothed_aggregation_solver(A)``,
applied through ``ml.aspreconditioner()``) and SuperLU (``splu``) for the
preconditioners, scipy's triangular solves for IC(0).  Whole solves are in
test_bench_solve.py.
"""

import numpy as np
import pyamg
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from conftest import (
    MAX_THREADS,
    THREADS,
    ids,
    mesh_figures,
    peak_of_call,
    poisson_system,
    record,
    shared_mesh,
    size_mode,
    timed_with_peak,
    warm,
)
from solve_worker import csr_nbytes, mesh_read_bytes

from hatkernels import StiffnessOperator, apply_dirichlet
from hatkernels._jit import sparse as K
from hatkernels._jit import threads
from hatkernels.precond import make_preconditioner


def _vector_rounds(config):
    return dict(rounds=10 if size_mode(config) == "quick" else 20, iterations=1, warmup_rounds=2)


VECTOR_CASES = [pytest.param("numpy", MAX_THREADS, id="method=numpy")] + [
    pytest.param("ours", t, id=f"method=ours-threads={t}") for t in THREADS
]


# -- dot and fused CG update --------------------------------------------------------------
@pytest.mark.parametrize("method, n_threads", VECTOR_CASES)
def test_dot(benchmark, machine, request, cells, method, n_threads):
    """x . y: fixed-chunk parallel reduction (same bits on any thread count) against BLAS."""
    n = shared_mesh(cells).n_points
    rng = np.random.default_rng(2)
    x, y = rng.standard_normal(n), rng.standard_normal(n)
    fn = (lambda: np.dot(x, y)) if method == "numpy" else (lambda: K.dot(x, y))
    with threads(n_threads):
        first = warm(benchmark, fn)
        benchmark.pedantic(fn, **_vector_rounds(request.config))
        peak, source = peak_of_call(benchmark, fn)
    record(benchmark, machine, 16 * n, 16 * n, kind="vector", operation="dot", method=method,
           plain=method == "numpy", baseline=None if method == "numpy" else "numpy",
           threads=n_threads, n_points=int(n), peak_bytes=peak, peak_source=source, **first)


@pytest.mark.parametrize("method, n_threads", VECTOR_CASES)
def test_callable_load_sums(benchmark, machine, request, cells, method, n_threads):
    """The sums of a callable load, ``areas * ((f(x_q) * w) @ lam)`` per triangle (degree 2,
    three points): the numba kernel against NumPy's product, whose inner size is 3."""
    from hatkernels._jit import assembly as JA
    from hatkernels.quadrature import triangle_rule

    mesh = shared_mesh(cells)
    lam, w = triangle_rule(2)
    m = mesh.n_triangles
    values = np.random.default_rng(3).standard_normal((m, len(w)))
    areas = np.ascontiguousarray(mesh.areas())
    out = np.empty((m, 3))
    fn = ((lambda: areas[:, None] * ((values * w) @ lam)) if method == "numpy"
          else (lambda: JA.weighted_sums(areas, values, w, lam, out)))
    with threads(n_threads):
        first = warm(benchmark, fn)
        benchmark.pedantic(fn, **_vector_rounds(request.config))
        peak, source = peak_of_call(benchmark, fn)
    moved = 8 * m * (len(w) + 1 + 3)  # read the values and the areas, write the sums
    record(benchmark, machine, moved, moved, kind="kernel", operation="callable load sums",
           method=method, plain=method == "numpy", baseline=None if method == "numpy" else "numpy",
           threads=n_threads, n_points=int(mesh.n_points), peak_bytes=peak, peak_source=source,
           **first)


@pytest.mark.parametrize("method, n_threads", VECTOR_CASES)
def test_renumber(benchmark, machine, request, cells, method, n_threads):
    """A stiffness matrix of the mesh in random point order put in locality order: Z order
    by a counting sort and the parallel permutation (``hatkernels.locality``) against the
    Hilbert keys, NumPy's argsort and scipy's ``A[p][:, p]``."""
    from hatkernels import assemble_stiffness
    from hatkernels.locality import Renumbering
    from hatkernels.mesh import Mesh
    from hatkernels.mesh.reorder import hilbert_keys

    mesh = shared_mesh(cells)
    rng = np.random.default_rng(7)
    perm = rng.permutation(mesh.n_points)
    inv = np.empty_like(perm)
    inv[perm] = np.arange(perm.size)
    shuffled = Mesh(mesh.points[perm], inv[mesh.triangles])
    A = sp.csr_matrix(assemble_stiffness(shuffled))
    points = shuffled.points
    if method == "numpy":
        def fn():
            order = np.argsort(hilbert_keys(points, plain=True), kind="stable")
            B = A[order][:, order]
            B.sort_indices()
            return B
    else:
        fn = lambda: Renumbering(points).matrix(A)  # noqa: E731
    with threads(n_threads):
        first = warm(benchmark, fn)
        benchmark.pedantic(fn, **_vector_rounds(request.config))
        peak, source = peak_of_call(benchmark, fn)
    moved = 2 * (12 * A.nnz + 4 * A.shape[0]) + 16 * A.shape[0]  # the matrix twice, the points
    record(benchmark, machine, moved, moved, kind="kernel", operation="renumber",
           method=method, plain=method == "numpy", baseline=None if method == "numpy" else "numpy",
           threads=n_threads, n_points=int(mesh.n_points), peak_bytes=peak, peak_source=source,
           **first)


@pytest.mark.parametrize("method, n_threads", VECTOR_CASES)
def test_cg_update(benchmark, machine, request, cells, method, n_threads):
    """x += alpha p; r -= alpha q; r.r -- one fused pass against three NumPy statements."""
    n = shared_mesh(cells).n_points
    rng = np.random.default_rng(3)
    p, q, x, r = (rng.standard_normal(n) for _ in range(4))
    if method == "numpy":

        def fn():
            x.__iadd__(1e-9 * p)
            r.__isub__(1e-9 * q)
            return r @ r

    else:
        fn = lambda: K.cg_step(1e-9, p, q, x, r)  # noqa: E731
    with threads(n_threads):
        first = warm(benchmark, fn)
        benchmark.pedantic(fn, **_vector_rounds(request.config))
        # NumPy's statements allocate alpha p, then alpha q
        peak, source = peak_of_call(benchmark, fn)
    record(benchmark, machine, 8 * 6 * n, 8 * 6 * n, kind="vector", operation="cg update",
           method=method, plain=method == "numpy",
           baseline=None if method == "numpy" else "numpy", threads=n_threads,
           n_points=int(n), peak_bytes=peak, peak_source=source, **first)


# -- a block of vectors times stiffness and mass (the block eigensolver) ------------------
BLOCK = 13  # ten modes and three extra vectors: eigenmodes' default block for k = 10


@pytest.mark.parametrize("method, n_threads", [
    pytest.param("scipy", 1, id="method=scipy"),
    pytest.param("vectors", MAX_THREADS, id="method=vectors"),
] + [pytest.param("ours", t, id=f"method=ours-threads={t}") for t in THREADS])
def test_block_products(benchmark, machine, request, cells, method, n_threads):
    """K X and M X for a block X of 13 vectors (n, 13): one pass over the shared pattern
    (hatkernels._jit.blocks.pair_product) against scipy's ``K @ X`` and ``M @ X`` and
    against 26 single products with the library's parallel CSR kernel."""
    from hatkernels import assemble_mass
    from hatkernels._jit import blocks as KB

    mesh, system = poisson_system(cells)
    A = system.A
    Mm = apply_dirichlet(assemble_mass(mesh), np.zeros(mesh.n_points),
                         mesh.boundary_points()).A
    n = A.shape[0]
    X = np.random.default_rng(7).standard_normal((n, BLOCK))
    AX, BX = np.empty_like(X), np.empty_like(X)
    if method == "scipy":
        fn = lambda: (A @ X, Mm @ X)  # noqa: E731
    elif method == "vectors":
        rows = np.ascontiguousarray(X.T)
        out = np.empty(n)

        def fn():
            for C in (A, Mm):
                for j in range(BLOCK):
                    K.spmv(C.indptr, C.indices, C.data, rows[j], out)
    else:
        fn = lambda: KB.pair_product(A.indptr, A.indices, A.data, Mm.data, X, AX, BX)  # noqa: E731
    with threads(n_threads):
        first = warm(benchmark, fn)
        benchmark.pedantic(fn, **_vector_rounds(request.config))
        peak, source = peak_of_call(benchmark, fn)
    # floor: the pattern and both value arrays once, the block read once, two blocks written
    floor = csr_nbytes(A) + A.data.nbytes + 3 * X.nbytes
    moved = floor if method != "vectors" else 2 * BLOCK * (csr_nbytes(A) + 16 * n)
    record(benchmark, machine, moved, floor, kind="block", operation="K X and M X, 13 vectors",
           method=method, plain=method != "ours", baseline=None if method != "ours" else "scipy",
           threads=n_threads, n_points=int(n), peak_bytes=peak, peak_source=source, **first)


@pytest.mark.parametrize("method, n_threads", [pytest.param("numpy", MAX_THREADS, id="method=numpy")]
                         + [pytest.param("ours", t, id=f"method=ours-threads={t}") for t in THREADS])
def test_gram_pairs(benchmark, machine, request, cells, method, n_threads):
    """The 12 Gram blocks of a Rayleigh-Ritz step on [X, W, P] (13 columns each) with
    their K and M products: one pass in chunks (hatkernels._jit.blocks.gram_pairs)
    against one NumPy ``X.T @ Y`` (BLAS) per block."""
    from hatkernels._jit import blocks as KB

    n = shared_mesh(cells).n_points
    pool = np.random.default_rng(8).standard_normal((9, n, BLOCK))
    pairs = [(i, j) for i in range(3) for j in range(i, 3)]
    left = np.array([i for i, _ in pairs] * 2)
    right = np.array([3 + j for _, j in pairs] + [6 + j for _, j in pairs])
    out = np.empty((len(left), BLOCK, BLOCK))
    if method == "numpy":

        def fn():
            for p in range(len(left)):
                out[p] = pool[left[p]].T @ pool[right[p]]
    else:
        fn = lambda: KB.gram_pairs(pool, left, right, out)  # noqa: E731
    with threads(n_threads):
        first = warm(benchmark, fn)
        benchmark.pedantic(fn, **_vector_rounds(request.config))
        peak, source = peak_of_call(benchmark, fn)
    floor = pool.nbytes  # each of the nine blocks read once
    moved = floor if method == "ours" else 2 * len(left) * pool[0].nbytes
    record(benchmark, machine, moved, floor, kind="block", operation="12 Gram blocks, 13 vectors",
           method=method, plain=method == "numpy", baseline=None if method == "numpy" else "numpy",
           threads=n_threads, n_points=int(n), peak_bytes=peak, peak_source=source, **first)


@pytest.mark.parametrize("method, n_threads",
                         [pytest.param("numpy", MAX_THREADS, id="method=numpy")]
                         + [pytest.param("ours", t, id=f"method=ours-threads={t}") for t in THREADS])
def test_gram_pairs_by_rows(benchmark, machine, request, cells, method, n_threads):
    """The same 12 Gram blocks with the blocks stored one vector per row (the patch path's
    layout, hatkernels.eigen_patches): each chunk of columns copied once into cache
    (hatkernels._jit.blocks.gram_pairs_by_rows) against one NumPy ``X @ Y.T`` per block."""
    from hatkernels._jit import blocks as KB

    n = shared_mesh(cells).n_points
    pool = np.random.default_rng(8).standard_normal((9, BLOCK, n))
    pairs = [(i, j) for i in range(3) for j in range(i, 3)]
    left = np.array([i for i, _ in pairs] * 2)
    right = np.array([3 + j for _, j in pairs] + [6 + j for _, j in pairs])
    used = np.arange(9)
    out = np.empty((len(left), BLOCK, BLOCK))
    if method == "numpy":

        def fn():
            for p in range(len(left)):
                out[p] = pool[left[p]] @ pool[right[p]].T
    else:
        fn = lambda: KB.gram_pairs_by_rows(pool, used, left, right, out)  # noqa: E731
    with threads(n_threads):
        first = warm(benchmark, fn)
        benchmark.pedantic(fn, **_vector_rounds(request.config))
        peak, source = peak_of_call(benchmark, fn)
    floor = pool.nbytes  # each of the nine blocks read once
    moved = floor if method == "ours" else 2 * len(left) * pool[0].nbytes
    record(benchmark, machine, moved, floor, kind="block",
           operation="12 Gram blocks by rows, 13 vectors", method=method,
           plain=method == "numpy", baseline=None if method == "numpy" else "numpy",
           threads=n_threads, n_points=int(n), peak_bytes=peak, peak_source=source, **first)


@pytest.mark.parametrize("method, n_threads",
                         [pytest.param("numpy", MAX_THREADS, id="method=numpy"),
                          pytest.param("dots", MAX_THREADS, id="method=dots")]
                         + [pytest.param("ours", t, id=f"method=ours-threads={t}") for t in THREADS])
def test_row_dots(benchmark, machine, request, cells, method, n_threads):
    """The start space's guess (hatkernels.transient_steps.StartSpace): the dot products of
    four held changes with a right-hand side, in one pass over it
    (hatkernels._jit.sparse.row_dots), against one chunked ``dot`` per change and
    NumPy's ``X @ v`` (BLAS)."""
    from hatkernels._jit import sparse as KS

    n = shared_mesh(cells).n_points
    rng = np.random.default_rng(9)
    X, v, out = rng.standard_normal((4, n)), rng.standard_normal(n), np.empty(4)
    if method == "numpy":
        fn = lambda: np.dot(X, v, out=out)  # noqa: E731
    elif method == "dots":

        def fn():
            for i in range(4):
                out[i] = KS.dot(X[i], v)
    else:
        fn = lambda: KS.row_dots(X, 4, v, out)  # noqa: E731
    with threads(n_threads):
        first = warm(benchmark, fn)
        benchmark.pedantic(fn, **_vector_rounds(request.config))
        peak, source = peak_of_call(benchmark, fn)
    floor = X.nbytes + v.nbytes  # each vector read once
    moved = floor if method != "dots" else 2 * X.nbytes
    record(benchmark, machine, moved, floor, kind="block", operation="4 dot products",
           method=method, plain=method == "numpy", baseline=None if method == "numpy" else "numpy",
           threads=n_threads, n_points=int(n), peak_bytes=peak, peak_source=source, **first)


# -- preconditioners: setup and apply -------------------------------------------------------
# name: (kind, how to build it, largest number of unknowns in the full set)
PRECONDITIONERS = {
    "jacobi": ("ours", ("jacobi", {}), None),
    "ic0": ("ours", ("ic0", {}), None),
    "ic0-modified": ("ours", ("ic0", {"modified": True}), None),
    "amg-rs": ("ours", ("amg-rs", {}), None),
    "amg-native": ("ours", ("amg-native", {}), None),
    "amg-sa": ("ours", ("amg-sa", {}), None),
    # limited to keep the suite's time (its Lanczos estimates); the n x n Gershgorin
    # temporary it once formed is gone (hatkernels._jit.amg.diagonal_and_bound)
    "amg-sa-chebyshev": ("ours", ("amg-sa", {"smoother": "chebyshev"}), 1_100_000),
    "direct": ("ours", ("direct", {"max_unknowns": 1_100_000}), 1_100_000),
    "gmg": ("ours", ("gmg", {}), None),
    "pyamg-rs": ("plain", pyamg.ruge_stuben_solver, None),
    "pyamg-sa": ("plain", pyamg.smoothed_aggregation_solver, None),
    "superlu": ("plain", None, 300_000),
}
BASELINE = {"amg-rs": "pyamg-rs", "amg-native": "pyamg-rs", "amg-sa": "pyamg-sa",
            "amg-sa-chebyshev": "pyamg-sa",
            "direct": "superlu"}


def _system(cells, name):
    """(operator to precondition, right-hand side, figures) for one preconditioner."""
    if name == "gmg":
        mesh = shared_mesh(cells, "refined")
        op = StiffnessOperator(mesh, dirichlet=mesh.boundary_points())
        b = np.random.default_rng(4).standard_normal(mesh.n_points)
        b[op.fixed] = 0.0
        return op, b, dict(mesh_figures(mesh), unknowns=int(mesh.n_points - len(op.fixed)),
                           mesh="refined")
    mesh, system = poisson_system(cells)
    b = np.random.default_rng(4).standard_normal(system.A.shape[0])
    return system.A, b, dict(mesh_figures(mesh), unknowns=int(system.A.shape[0]),
                             nnz=int(system.A.nnz), mesh="rectangle")


class _Plain:
    """A plain alternative's setup object with an ``apply`` and its memory in bytes."""

    def __init__(self, name, A):
        if name == "superlu":
            self.lu = sla.splu(sp.csc_matrix(A))
            self.apply = self.lu.solve
            self.memory_bytes = 12 * (self.lu.L.nnz + self.lu.U.nnz)
            self.description = "scipy splu (SuperLU, default options)"
        else:
            self.ml = PRECONDITIONERS[name][1](A)
            self.apply = self.ml.aspreconditioner(cycle="V").matvec
            self.memory_bytes = sum(
                sum(m.data.nbytes + m.indices.nbytes + m.indptr.nbytes
                    for m in (getattr(lv, k, None) for k in ("A", "P", "R"))
                    if m is not None and sp.issparse(m))
                for lv in self.ml.levels)
            self.description = f"pyamg {type(self.ml).__name__}, {len(self.ml.levels)} levels"


def _build(name, A):
    kind, how, _ = PRECONDITIONERS[name]
    if kind == "plain":
        return _Plain(name, A)
    pc, options = how
    return make_preconditioner(A, pc, **options)


def _apply_fn(M):
    return M.apply if isinstance(M, _Plain) else M.matvec


# -- traffic model of preconditioners ----------------------------------------------------------
def precond_traffic(name, A, M, n):
    """A model, not a measurement: ``(setup bytes, apply bytes)`` of one preconditioner.

    One pass over everything, nothing counted twice::

        setup = input read once + stored written once
        apply = stored read once + 16 n       (r read, z written)

    ``stored`` is ``M.memory_bytes`` (every level's matrix and transfer
    operators, factors, inverse diagonals, work vectors), plus for gmg the
    mesh bytes its matrix-free level operators read in each product (by
    variant, as in test_bench_matrix_free.py).  The input is the CSR matrix
    (data, indices, indptr) or, for gmg, the points and triangles of every
    level of the refined mesh (setup builds an operator on each).

    Assumptions: every stored byte is touched once per apply and once per
    setup, and caches hold nothing between passes.  The model therefore
    undercounts the bytes the code touches: a multigrid cycle reads each level's
    matrix several times (pre- and post-smoothing sweeps, the residual),
    IC(0) reads its factor twice (forward and backward sweep), and every
    setup (PyAMG's strength, coarsening and Galerkin products, SuperLU's
    elimination, the IC(0) factorisation) reads and writes intermediate
    arrays that are not stored.  ``achieved_GBs`` from it is a low figure,
    and the floor it gives (``floor_bytes`` = the model) is this
    method's own stored bytes at copy bandwidth, not the least traffic of
    any preconditioner.
    """
    stored = int(M.memory_bytes)
    if name == "gmg":
        stored += sum(mesh_read_bytes(lv.mesh, lv.op.variant) for lv in M.levels)
        source = sum(m.points.nbytes + m.triangles.nbytes for m in A.mesh.levels())
    else:
        source = csr_nbytes(A)
    return source + int(M.memory_bytes), stored + 16 * n


def _fits(request, cells, name):
    limit = PRECONDITIONERS[name][2]
    if limit is not None and (cells - 1) ** 2 > limit:
        pytest.skip(f"{name}: {(cells - 1) ** 2} unknowns is above the {limit} this suite runs it to")


_built = {}


def _warm_small(name):
    """Compile (or load) every kernel the preconditioner uses, on a small problem."""
    A, b, _ = _system(16, name)
    M = _build(name, A)
    _apply_fn(M)(b)


@pytest.mark.parametrize("name", PRECONDITIONERS, ids=ids("method"))
def test_precond_setup(benchmark, machine, request, cells, name):
    _fits(request, cells, name)
    A, b, figures = _system(cells, name)
    first = warm(benchmark, _warm_small, lambda: (name,), small=True)
    n_rounds = 3 if size_mode(request.config) == "quick" or figures["unknowns"] <= 300_000 else 1
    # a fresh operator each round: PyAMG caches spectral radii on the matrix it is given,
    # a StiffnessOperator its diagonal
    if name == "gmg":
        fresh = lambda: (StiffnessOperator(A.mesh, dirichlet=A.fixed),)  # noqa: E731
    else:
        fresh = lambda: (A.copy(),)  # noqa: E731
    M, peak, source = timed_with_peak(benchmark, lambda a: _build(name, a), fresh, n_rounds)
    if M is None:  # --benchmark-disable returns nothing through timed_with_peak
        M = _build(name, A)
    _built[(cells, name)] = M
    setup_bytes, _ = precond_traffic(name, A, M, len(b))
    record(
        benchmark, machine, setup_bytes, kind="precond-setup", traffic_model="one pass", operation="setup", method=name,
        plain=PRECONDITIONERS[name][0] == "plain", baseline=BASELINE.get(name),
        memory_bytes=int(M.memory_bytes), description=M.description, peak_bytes=peak,
        peak_source=source, **figures, **first,
    )


@pytest.mark.parametrize("name", PRECONDITIONERS, ids=ids("method"))
def test_precond_apply(benchmark, machine, request, cells, name):
    _fits(request, cells, name)
    A, b, figures = _system(cells, name)
    if (cells, name) not in _built:
        _built[(cells, name)] = _build(name, A)
    M = _built.pop((cells, name))
    fn = _apply_fn(M)
    first = warm(benchmark, fn, lambda: (b,))
    benchmark.pedantic(fn, args=(b,), rounds=5, iterations=1, warmup_rounds=1)
    peak, source = peak_of_call(benchmark, fn, b)
    _, apply_bytes = precond_traffic(name, A, M, len(b))
    record(
        benchmark, machine, apply_bytes, kind="precond-apply", operation="apply", method=name,
        plain=PRECONDITIONERS[name][0] == "plain", baseline=BASELINE.get(name),
        memory_bytes=int(M.memory_bytes), description=M.description, peak_bytes=peak,
        peak_source=source, traffic_model="one pass", **figures, **first,
    )


# -- IC(0) kernels against their plain versions ----------------------------------------------
@pytest.mark.parametrize("method", ["kernel", "reference"], ids=ids("method"))
def test_ic0_factor_vs_reference(benchmark, machine, method):
    """Factorisation: the numba kernel against the readable dense specification (small grid)."""
    from hatkernels.precond.ichol import IncompleteCholesky, ic0_reference

    mesh, system = poisson_system(20)
    A = system.A
    fn = (lambda: IncompleteCholesky(A)) if method == "kernel" else (lambda: ic0_reference(A))
    first = warm(benchmark, fn)
    benchmark.pedantic(fn, rounds=3, iterations=1, warmup_rounds=0)
    peak, source = peak_of_call(benchmark, fn)
    # no bytes moved: the reference works on dense n x n arrays, so a traffic model shared
    # by both methods would describe neither; a one-pass count for the kernel alone would
    # leave the pair without a common floor to compare
    record(benchmark, machine, kind="kernel", operation="ic0 factorisation", method=method,
           plain=method == "reference", baseline=None if method == "reference" else "reference",
           unknowns=int(A.shape[0]), nnz=int(A.nnz), peak_bytes=peak, peak_source=source,
           **mesh_figures(mesh), **first)


@pytest.mark.parametrize("method", ["kernel", "scipy-triangular"], ids=ids("method"))
def test_ic0_apply_vs_scipy(benchmark, machine, cells, method):
    """(L L^T)^-1 r: our two serial sweeps against two scipy.sparse.linalg.spsolve_triangular."""
    mesh, system = poisson_system(cells)
    A = system.A
    M = make_preconditioner(A, "ic0")
    b = np.random.default_rng(5).standard_normal(A.shape[0])
    if method == "kernel":
        fn = lambda: M.matvec(b)  # noqa: E731
    else:
        L = M.L
        U = sp.csr_array(L.T)

        def fn():
            y = sla.spsolve_triangular(L, b, lower=True)
            return sla.spsolve_triangular(U, y, lower=False)

    first = warm(benchmark, fn)
    benchmark.pedantic(fn, rounds=3, iterations=1, warmup_rounds=0)
    peak, source = peak_of_call(benchmark, fn)
    # model (the same for both methods): the stored factor read in each of the two sweeps,
    # r read, the intermediate vector written and read back, the result written
    traffic = 2 * int(M.memory_bytes) + 4 * 8 * A.shape[0]
    record(benchmark, machine, traffic, traffic, kind="kernel", operation="ic0 apply",
           method=method, plain=method == "scipy-triangular",
           baseline=None if method == "scipy-triangular" else "scipy-triangular",
           unknowns=int(A.shape[0]), nnz=int(A.nnz), peak_bytes=peak, peak_source=source,
           traffic_model="two sweeps over the factor", **mesh_figures(mesh), **first)
