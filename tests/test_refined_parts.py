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

from hatkernels.distributed import partition_from_owner, subdomain
from hatkernels.distributed.finenumbers import (
    fine_numbering,
    lattice_order,
    partition_coarse_cells,
    refined_subdomain,
)
from hatkernels.errors import InputError
from hatkernels.mesh import ball, cuboid, disk, l_shape, rectangle


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


# -- under mpiexec: the distributed solve on the partitioned refinement ----------------------

from test_distributed import needs_mpi, run_mpi  # noqa: E402


@needs_mpi
@pytest.mark.parametrize("ranks", [1, 2, 3, 4])
def test_partitioned_solve_matches_the_serial_one(ranks):
    script = Path(__file__).resolve().parent / "mpi_refined_checks.py"
    code, out, err = run_mpi(ranks, [sys.executable, str(script)])
    print(out)
    assert code == 0, f"exit {code}\n{out}\n{err}"
    assert f"all 7 checks passed on {ranks} ranks" in out
