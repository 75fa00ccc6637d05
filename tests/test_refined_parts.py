"""Partitioned refinement: the serial fine numbering found from the coarse mesh alone, and
each part's subdomain built without the fine global mesh.

The reference is the serial ``mesh.refine()`` repeated k times and the replicated
path (:func:`hatkernels.distributed.subdomain` cut from that fine mesh): both are
the library's own, already tested against outside references; here the check is
that the scalable path reproduces them entry by entry (common practice, no source).
"""

import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import EPS

from hatkernels import StiffnessOperator, assemble_stiffness
from hatkernels.coefficients import parse_coefficient
from hatkernels.distributed import partition_from_owner, subdomain
from hatkernels.distributed.finenumbers import (
    fine_numbering,
    lattice_order,
    partition_coarse_cells,
    refined_subdomain,
)
from hatkernels.distributed.halo import CommStats
from hatkernels.distributed.levelparts import build_level, points_on
from hatkernels.distributed.levelrows import (
    TOO_MANY_COLOURS,
    AssembledRows,
    MatrixFreeRows,
    _masked_rows,
    describe_kinds,
    level_operator,
)
from hatkernels.distributed.refined_solve import _on_level
from hatkernels.errors import InputError
from hatkernels.mesh import Mesh, ball, cuboid, disk, l_shape, rectangle
from hatkernels.mesh.tags import label_cells


def _refined(mesh, k):
    for _ in range(k):
        mesh = mesh.refine()
    return mesh


MESHES = {
    "rectangle": lambda: rectangle(5, 4),
    "disk": lambda: disk(5),
    "l_shape reordered": lambda: l_shape(3).reorder("hilbert")[0],
    "cuboid": lambda: cuboid(2),
    "ball": lambda: ball(2),
    "cuboid reordered": lambda: cuboid(2).reorder("rcm")[0],
}


@pytest.mark.parametrize("name", MESHES)
@pytest.mark.parametrize("k", [1, 2])
def test_fine_cells_are_the_serial_ones(name, k):
    coarse = MESHES[name]()
    fine = _refined(coarse, k)
    fn = fine_numbering(coarse, k)
    assert fn.n_fine == fine.n_points
    ids, cells = fn.fine_cells(np.arange(coarse.n_cells))
    assert np.array_equal(ids, np.arange(fine.n_cells))
    assert np.array_equal(cells, fine.cells)
    xyz = fn.coordinates(np.arange(coarse.n_cells))
    num = fn.numbers(np.arange(coarse.n_cells))
    assert np.allclose(fine.points[num], xyz, rtol=0, atol=1e-14)


def test_three_levels_in_two_dimensions():
    coarse = rectangle(3, 2)
    fn = fine_numbering(coarse, 3)
    assert np.array_equal(fn.fine_cells(np.arange(coarse.n_cells))[1], _refined(coarse, 3).cells)


def test_a_subset_of_cells_needs_no_other():
    coarse = disk(6)
    fine = _refined(coarse, 2)
    fn = fine_numbering(coarse, 2)
    some = np.array([3, 40, 41, 100])
    ids, cells = fn.fine_cells(some)
    assert np.array_equal(cells, fine.cells[ids])


def test_lattice_has_every_point_once():
    for dim, k in ((2, 3), (3, 2)):
        lam, cells = lattice_order(dim, k)
        n = 2**k
        assert (lam.sum(axis=1) == n).all() and (lam >= 0).all()
        assert len(np.unique(lam, axis=0)) == len(lam)
        expected = (n + 1) * (n + 2) // 2 if dim == 2 else (n + 1) * (n + 2) * (n + 3) // 6
        assert len(lam) == expected  # lattice points of a simplex (common practice, no source)
        assert cells.max() == len(lam) - 1


@pytest.mark.parametrize("name, k, parts", [("rectangle", 2, 3), ("disk", 2, 4),
                                             ("cuboid", 2, 4), ("ball", 1, 3)])
def test_subdomains_equal_the_replicated_ones(name, k, parts):
    coarse = MESHES[name]()
    fn = fine_numbering(coarse, k)
    cell_owner = partition_coarse_cells(coarse, parts, k, numbering=fn)
    assert set(cell_owner.tolist()) == set(range(parts))
    fine = _refined(coarse, k)
    point_owner = cell_owner[fn.point_owner_cells(np.arange(fn.n_fine))]
    counts = np.bincount(point_owner)
    assert counts.max() <= 1.5 * counts.mean()  # balanced by owned fine points
    replicated = partition_from_owner(fine, point_owner, parts)
    for part in range(parts):
        a = refined_subdomain(coarse, k, cell_owner, part, numbering=fn)
        b = subdomain(replicated, part)
        for field in ("points", "n_owned", "cells", "ghost_owner", "neighbours",
                      "recv_offsets"):
            assert np.array_equal(getattr(a, field), getattr(b, field)), field
        assert len(a.send) == len(b.send)
        assert all(np.array_equal(x, y) for x, y in zip(a.send, b.send, strict=True))
        assert np.array_equal(a.mesh.cells, b.mesh.cells)
        assert np.allclose(a.mesh.points, b.mesh.points, rtol=0, atol=1e-14)


def test_bad_input_is_named():
    coarse = rectangle(2, 2)
    with pytest.raises(InputError, match="refine must be >= 0"):
        fine_numbering(coarse, -1)
    with pytest.raises(InputError, match="cannot split 8 coarse cells into 9 parts"):
        partition_coarse_cells(coarse, 9, 1)
    with pytest.raises(InputError, match=r"one part per coarse cell \(8,\)"):
        refined_subdomain(coarse, 1, np.zeros(3, dtype=int), 0)


# -- one rank's part of a level, against the serial refinement cut by the same rule ----------


@pytest.mark.parametrize("name, k, parts", [("rectangle", 2, 3), ("disk", 2, 4),
                                             ("cuboid reordered", 2, 3), ("ball", 1, 4)])
def test_level_parts_are_cut_from_the_serial_refinement(name, k, parts):
    coarse = _labelled(MESHES[name]())
    fine = _refined(coarse, k)
    fn = fine_numbering(coarse, k)
    owner = partition_coarse_cells(coarse, parts, k, numbering=fn)
    point_owner = owner[fn.point_owner_cells(np.arange(fine.n_points))]
    parent = np.arange(fine.n_cells) // (2**coarse.dim) ** k
    for p in range(parts):
        part = build_level(coarse, k, owner, p, _Parts(parts, p), numbering=fn)
        # the cells of the part's coarse cells and every cell with an owned point, ascending;
        # owned points ascending, then the ghosts by owner (common practice, no source)
        ids = np.flatnonzero((point_owner[fine.cells] == p).any(axis=1) | (owner[parent] == p))
        present = np.unique(fine.cells[ids])
        mine = point_owner[present] == p
        ghosts = present[~mine][np.argsort(point_owner[present[~mine]], kind="stable")]
        points = np.concatenate([present[mine], ghosts])
        assert np.array_equal(part.cells, ids) and np.array_equal(part.points, points)
        assert part.n_owned == mine.sum()
        assert np.array_equal(part.ghost_owner, point_owner[ghosts])
        local = np.empty(fine.n_points, dtype=np.int64)
        local[points] = np.arange(len(points))
        assert np.array_equal(part.mesh.cells, local[fine.cells[ids]])
        assert np.allclose(part.mesh.points, fine.points[points], rtol=0, atol=1e-14)
        assert np.array_equal(part.mesh.regions, fine.regions[ids])
        # each point's place: a lattice point of a coarse cell holding it
        lattice = fn.numbers(part.where_cell)[np.arange(part.n_local), part.where_index]
        assert np.array_equal(lattice, points)


# -- the level operators: matrix-free owned rows against the assembled ones -----------------
#
# Reference: the assembled stiffness rows with identity rows and zero columns at the held
# points (assemble_stiffness, itself checked against the 5- and 7-point stencils and the
# reference strategy elsewhere), multiplied by scipy's sparse product (reference library:
# scipy).  A part's ghosts are filled from one global vector by the test, so no MPI runs.


class _Parts:
    """What build_level asks of a communicator, for part ``rank`` of ``size`` without MPI:
    no rank asks anything of this one (its send lists stay empty, unused here)."""

    def __init__(self, size, rank):
        self.size, self.rank = size, rank

    def Get_size(self):  # noqa: N802 (mpi4py's name)
        return self.size

    def Get_rank(self):  # noqa: N802
        return self.rank

    def alltoall(self, want):
        return [[] for _ in want]


class _Filled:
    """A halo whose ghosts the test has filled already."""

    comm = None

    def __init__(self):
        self.stats = CommStats()

    def start(self, x):
        pass

    def finish(self):
        pass

    def exchange(self, x):
        return x


def _labelled(mesh):
    return label_cells(mesh, {"a": lambda *x: x[0] < 0.5, "b": lambda *x: x[0] >= -10})


def _tensor(d, scale=1.0):
    T = np.diag(np.arange(1.0, d + 1.0)) * scale
    T[0, 1] = T[1, 0] = 0.3 * scale
    return T


COEFFICIENTS = {  # the kinds _on_level hands the levels
    "none": lambda d: None,
    "number": lambda d: 3.5,
    "callable": lambda d: (lambda *x: 1.0 + x[0] ** 2 + x[1]),
    "by region": lambda d: {"a": 1.0, "b": 40.0},
    "callable by region": lambda d: {"a": lambda *x: 2.0 + x[1], "b": 0.5},
    "tensor": lambda d: _tensor(d),
    "tensor by region": lambda d: {"a": _tensor(d), "b": _tensor(d, 5.0)},
}

LEVELS = {  # (coarse mesh, refinements, parts); disk and ball have obtuse angle pairs
    "rectangle": (lambda: rectangle(5, 4), 2, 3),
    "disk": (lambda: disk(4), 2, 3),
    "cuboid": (lambda: cuboid(2), 2, 4),
    "ball": (lambda: ball(2), 1, 3),
}


def _level_parts(name, coefficient):
    """Every part of the level with its held points and its coefficient as the solve
    makes them."""
    make, k, parts = LEVELS[name]
    coarse = _labelled(make())
    value = COEFFICIENTS[coefficient](coarse.dim)
    coef = None if value is None else parse_coefficient(value, coarse, tensor=True)
    owner = partition_coarse_cells(coarse, parts, k)
    sides = (coarse.boundary_edges() if coarse.dim == 2 else coarse.boundary_faces())
    for p in range(parts):
        part = build_level(coarse, k, owner, p, _Parts(parts, p))
        fixed = points_on(part, coarse, sides.astype(np.int64))
        yield part, fixed, _on_level(coef, part, (2**coarse.dim) ** k)


def _close(actual, expected, scale, factor=64):
    """Round-off: a few tens of epsilons of the magnitudes summed (common practice)."""
    assert np.all(np.abs(actual - expected) <= factor * EPS * scale), \
        np.abs(actual - expected).max() / np.max(scale)


@pytest.mark.parametrize("coefficient", COEFFICIENTS)
@pytest.mark.parametrize("name", LEVELS)
def test_matrix_free_rows_equal_the_assembled_rows(name, coefficient):
    rng = np.random.default_rng(7)
    for part, fixed, coef in _level_parts(name, coefficient):
        n = part.n_owned
        A = assemble_stiffness(part.mesh, coef)
        rows, diag, bound = _masked_rows(A, n, fixed)
        op = MatrixFreeRows(part.mesh, n, fixed, coef, _Filled())
        assert op.kind.startswith("matrix-free") and op.nnz == 0
        x = rng.standard_normal(part.n_local)
        y = np.empty(n)
        dot = op.matvec_dot(x, y)
        scale = abs(rows) @ np.abs(x)
        _close(y, rows @ x, scale)  # reference library: scipy
        assert dot == pytest.approx(x[:n] @ y, rel=1e-14, abs=0)
        _close(op.unmasked_product(x)[:n], A[:n] @ x, abs(A[:n]) @ np.abs(x))
        r = np.empty(n)
        op.residual(x[:n], y, r, work=x.copy())
        _close(r, 0.0 * r, scale)  # b - A x with b = A x
        # Gershgorin's bound and the diagonal from the edges, as from the assembled rows
        absum = np.asarray(abs(rows).sum(axis=1)).ravel()
        _close(1.0 / op.inverse_diagonal, diag, absum)
        assert op.local_bound == pytest.approx(bound, rel=64 * EPS, abs=0)


def test_the_bound_is_the_assembled_rows_not_the_element_entries():
    # on the ball the element entries of some edges differ in sign: summing their absolute
    # values over the cells overestimates |K_ij|; the rows' bound is the smaller one
    part, fixed, _ = next(iter(_level_parts("ball", "none")))
    op = MatrixFreeRows(part.mesh, part.n_owned, fixed, None, _Filled())
    _, bound = StiffnessOperator(part.mesh).diagonal_and_bound()  # element entries, all rows
    _, _, assembled = _masked_rows(assemble_stiffness(part.mesh), part.n_owned, fixed)
    assert op.local_bound == pytest.approx(assembled, rel=64 * EPS, abs=0)
    assert bound > assembled + 0.01


def test_assembled_rows_and_the_fallback():
    part, fixed, coef = next(iter(_level_parts("disk", "callable")))
    assembled = level_operator(part, coef, fixed, _Filled(), matrix_free=False)
    assert isinstance(assembled, AssembledRows) and assembled.kind == "assembled"
    # a point in 70 cells, one cell per block: more than 64 colours, so the rows are
    # assembled, and the description says why
    angles = np.linspace(0.0, 2 * np.pi, 71)[:-1]
    fan = Mesh(np.vstack([[0.0, 0.0], np.column_stack([np.cos(angles), np.sin(angles)])]),
               np.array([[0, 1 + i, 1 + (i + 1) % 70] for i in range(70)]))
    owner = np.zeros(fan.n_cells, dtype=np.int64)
    level = build_level(fan, 1, owner, 0, _Parts(1, 0))
    held = points_on(level, fan, fan.boundary_edges().astype(np.int64))
    op = level_operator(level, None, held, _Filled(), block_size=1)
    assert isinstance(op, AssembledRows) and op.kind == f"assembled ({TOO_MANY_COLOURS})"
    mf = level_operator(level, None, held, _Filled())
    assert isinstance(mf, MatrixFreeRows)
    x = np.random.default_rng(3).standard_normal(level.n_local)
    y, z = np.empty(level.n_owned), np.empty(level.n_owned)
    op.matvec_into(x, y)
    mf.matvec_into(x, z)
    _close(z, y, abs(op.A_oo) @ np.abs(x[: level.n_owned]))
    assert describe_kinds([[mf.kind, op.kind], [mf.kind, mf.kind]]) == (
        "level operators matrix-free (geometry) on levels 1, 2 (some ranks), "
        f"assembled ({TOO_MANY_COLOURS}) on level 2 (some ranks)")


def test_bad_variant_is_named():
    part, fixed, _ = next(iter(_level_parts("rectangle", "none")))
    with pytest.raises(InputError, match="unknown matrix-free variant 'fast'"):
        level_operator(part, None, fixed, _Filled(), variant="fast")


# -- under mpiexec: the distributed solve on the partitioned refinement ----------------------

from test_distributed import needs_mpi, run_mpi  # noqa: E402


@needs_mpi
@pytest.mark.parametrize("ranks", [1, 2, 3, 4])
def test_partitioned_solve_matches_the_serial_one(ranks):
    script = Path(__file__).resolve().parent / "mpi_refined_checks.py"
    code, out, err = run_mpi(ranks, [sys.executable, str(script)])
    print(out)
    assert code == 0, f"exit {code}\n{out}\n{err}"
    assert f"all 8 checks passed on {ranks} ranks" in out
