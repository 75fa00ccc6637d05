"""Stiffness products: each matrix-free variant against CSR products, side by side.

    python -m pytest bench/test_bench_matrix_free.py --benchmark-only [--size full]

Triangles (``test_product``) and tetrahedra (``test_product_tetrahedra``, on
``cuboid(n, n, n)``, up to 1e7 tetrahedra with ``--size full``).

``y = K x`` with the full stiffness matrix ``K`` of a mesh (no Dirichlet rows),
on two numberings of the same ``n x n`` mesh: ``rectangle`` (row by row, as
the generator numbers it) and ``refined`` (``rectangle(c, c)`` refined until
``n x n``, numbered by first use, as gmg sees it).  Methods:

``scipy``          ``A @ x`` with scipy's CSR matrix, as a user writes it (allocates y)
``scipy-into``     scipy's own CSR kernel into a preallocated y (its best case)
``csr``            this project's parallel CSR kernel (what CG uses)
``public``         the same kernel through the checked public wrapper
                   ``hatkernels.sparse.spmv(A, x, out=y)``, called in a loop as a user
                   would: the matrix's structure is checked on the first call only, and
                   the values through the result (``sparse`` module notes)
``geometry``, ``factors``, ``edges``   :class:`hatkernels.StiffnessOperator` variants
``inherited``      the variant of refined meshes (``refined`` numbering only; the default
                   there): the coarsest mesh's element matrices, four children at a time

Bytes moved: the stored operator (CSR: data, indices, indptr; matrix-free:
the mesh or the stored values it reads), ``x`` read, ``y`` written (and read
back, for the matrix-free accumulation).  Peak memory: one more, untimed
call under ``conftest.ProcessPeak`` (``conftest.peak_of_call``); scipy's
``A @ x`` allocates ``y``, the others nothing.  Whole solves (CG + gmg
against CG + AMG) are in test_bench_solve.py.
"""

import numpy as np
import pytest
from conftest import (
    MAX_THREADS,
    THREADS,
    best_time,
    peak_of_call,
    record,
    shared_mesh,
    size_mode,
    warm,
)
from scipy.sparse._sparsetools import csr_matvec

from hatkernels import StiffnessOperator, assemble_stiffness, threads
from hatkernels._jit import sparse as _k
from hatkernels.operators import DEFAULT_VARIANT, DEFAULT_VARIANT_3D, INHERITED, VARIANTS
from hatkernels.sparse import csr_bytes, spmv

CASES = [pytest.param("scipy", MAX_THREADS, id="method=scipy"),
         pytest.param("scipy-into", MAX_THREADS, id="method=scipy-into")]
CASES += [pytest.param(m, t, id=f"method={m}-threads={t}")
          for m in ("csr", "public") + VARIANTS + (INHERITED,) for t in THREADS]

#: Tetrahedra: the inherited variant is for triangles only (refined tetrahedra are not all
#: similar to their parent).
CASES_3D = [c for c in CASES if c.values[0] != INHERITED]

_operators = {}


def _rounds(config):
    return dict(rounds=5 if size_mode(config) == "quick" else 10, iterations=1, warmup_rounds=1)


@pytest.mark.parametrize("numbering", ["rectangle", "refined"], ids=lambda s: f"mesh={s}")
@pytest.mark.parametrize("method, n_threads", CASES)
def test_product(benchmark, machine, request, cells, numbering, method, n_threads):
    if method == INHERITED and numbering != "refined":
        pytest.skip("the inherited variant needs a mesh made by refinement")
    mesh = shared_mesh(cells, numbering)
    key = (cells, numbering)
    if key not in _operators:
        _operators[key] = assemble_stiffness(mesh)
    A = _operators[key]
    n = mesh.n_points
    x = np.random.default_rng(0).standard_normal(n)
    y = np.empty(n)
    if method == "scipy":
        fn = lambda: A @ x  # noqa: E731
        stored, moved = csr_bytes(A) - 16 * n, csr_bytes(A)
    elif method == "scipy-into":

        def fn():
            y[:] = 0.0
            csr_matvec(n, n, A.indptr, A.indices, A.data, x, y)

        stored, moved = csr_bytes(A) - 16 * n, csr_bytes(A) + 8 * n
    elif method == "csr":
        fn = lambda: _k.spmv(A.indptr, A.indices, A.data, x, y)  # noqa: E731
        stored, moved = csr_bytes(A) - 16 * n, csr_bytes(A)
    elif method == "public":
        fn = lambda: spmv(A, x, out=y)  # noqa: E731
        stored, moved = csr_bytes(A) - 16 * n, csr_bytes(A)
    else:
        op = StiffnessOperator(mesh, variant=method)
        fn = lambda: op.matvec_into(x, y)  # noqa: E731
        reads = {
            "geometry": mesh.triangles.nbytes + mesh.points.nbytes,
            "factors": mesh.triangles.nbytes + op.nbytes,
            "edges": op.nbytes,
            INHERITED: mesh.triangles.nbytes + op.nbytes,
        }[method]
        stored, moved = op.nbytes, reads + 3 * 8 * n
    with threads(n_threads):
        first = warm(benchmark, fn)
        benchmark.pedantic(fn, **_rounds(request.config))
        peak, source = peak_of_call(benchmark, fn)
    record(
        benchmark, machine, moved, moved, kind="product", operation="stiffness product",
        method=method, plain=method == "scipy", baseline=None if method == "scipy" else "scipy",
        mesh=numbering, threads=n_threads, n_triangles=int(mesh.n_triangles), n_points=int(n),
        nnz=int(A.nnz), stored_bytes=int(stored), csr_stored_bytes=int(csr_bytes(A) - 16 * n),
        default_variant=op_default(method, numbering), peak_bytes=peak, peak_source=source,
        **first,
    )


def op_default(method, numbering):
    """Whether ``method`` is what StiffnessOperator takes by default on this numbering."""
    return method == (INHERITED if numbering == "refined" else DEFAULT_VARIANT)


# -- tetrahedra ----------------------------------------------------------------------------
#: cells per side of cuboid(n, n, n) (6 n^3 tetrahedra); full reaches about 1e7
CUBE_SIZES = {"quick": [6, 12], "full": [30, 60, 120]}


def pytest_generate_tests(metafunc):
    # the sizes of the tetrahedral cases (bench/conftest.py's hook sizes the 2-D ones)
    if "cube" in metafunc.fixturenames:
        sizes = CUBE_SIZES[size_mode(metafunc.config)]
        metafunc.parametrize("cube", sizes, ids=[f"n_tetrahedra={6 * n**3}" for n in sizes])


_cubes = {}


def cube_mesh(n, numbering):
    """``cuboid(n, n, n)`` as the generator numbers it, or made by refinement (numbered by
    first use, as gmg sees it): ``cuboid(n / 4)`` refined twice, or ``cuboid(n / 2)`` once."""
    key = (n, numbering)
    if key not in _cubes:
        from hatkernels.mesh import cuboid

        if numbering == "cuboid":
            _cubes[key] = cuboid(n, n, n)
        else:
            levels = 2 if n % 4 == 0 else 1
            m = cuboid(n >> levels, n >> levels, n >> levels)
            for _ in range(levels):
                m = m.refine()
            _cubes[key] = m
    return _cubes[key]


@pytest.mark.parametrize("numbering", ["cuboid", "refined"], ids=lambda s: f"mesh={s}")
@pytest.mark.parametrize("method, n_threads", CASES_3D)
def test_product_tetrahedra(benchmark, machine, request, cube, numbering, method, n_threads):
    """As :func:`test_product` on tetrahedra; ``ns_per_point`` and ``bytes_per_point`` (stored)
    in extra_info, kind ``product-3d``."""
    mesh = cube_mesh(cube, numbering)
    key = (cube, numbering, 3)
    if key not in _operators:
        _operators.clear()  # one assembled matrix at a time: 10^7 tetrahedra hold 0.3 GiB
        _operators[key] = assemble_stiffness(mesh)
    A = _operators[key]
    n = mesh.n_points
    x = np.random.default_rng(0).standard_normal(n)
    y = np.empty(n)
    csr_stored = csr_bytes(A) - 16 * n
    if method == "scipy":
        fn = lambda: A @ x  # noqa: E731
        stored, moved = csr_stored, csr_bytes(A)
    elif method == "scipy-into":

        def fn():
            y[:] = 0.0
            csr_matvec(n, n, A.indptr, A.indices, A.data, x, y)

        stored, moved = csr_stored, csr_bytes(A) + 8 * n
    elif method == "csr":
        fn = lambda: _k.spmv(A.indptr, A.indices, A.data, x, y)  # noqa: E731
        stored, moved = csr_stored, csr_bytes(A)
    elif method == "public":
        fn = lambda: spmv(A, x, out=y)  # noqa: E731
        stored, moved = csr_stored, csr_bytes(A)
    else:
        op = StiffnessOperator(mesh, variant=method)
        fn = lambda: op.matvec_into(x, y)  # noqa: E731
        reads = {
            "geometry": mesh.cells.nbytes + mesh.points.nbytes,
            "factors": mesh.cells.nbytes + op.nbytes,
            "edges": op.nbytes,
        }[method]
        stored, moved = op.nbytes, reads + 3 * 8 * n
    with threads(n_threads):
        first = warm(benchmark, fn)
        benchmark.pedantic(fn, **_rounds(request.config))
        peak, source = peak_of_call(benchmark, fn)
    t = best_time(benchmark)
    record(
        benchmark, machine, moved, moved, kind="product-3d",
        operation="stiffness product on tetrahedra", method=method, plain=method == "scipy",
        baseline=None if method == "scipy" else "scipy", mesh=numbering, threads=n_threads,
        n_tetrahedra=int(mesh.n_cells), n_points=int(n), nnz=int(A.nnz),
        stored_bytes=int(stored), csr_stored_bytes=int(csr_stored),
        bytes_per_point=stored / n, ns_per_point=None if t is None else t / n * 1e9,
        default_variant=method == DEFAULT_VARIANT_3D, peak_bytes=peak, peak_source=source, **first,
    )
