"""``hatkernels bench --mesh FILE``: the side-by-side comparison on a mesh read from a file.

Run in this process through :func:`hatkernels.cli.main` on small meshes; the sizes the
command reports are checked against counts made here with numpy and scipy from the
file's own arrays, not with the library.
"""

import json
import math
import os

import numpy as np
import pytest
import scipy.sparse as sp

from hatkernels import PRECONDITIONERS
from hatkernels import io as kio
from hatkernels.cli import main
from hatkernels.mesh import Mesh, cuboid, disk

# two cheap preconditioners that apply on any mesh, triangles or tetrahedra
NAMES = ["jacobi", "ic0"]
FAST = ["--repeat", "1", "--bandwidth-mb", "8", "--preconditioners", ",".join(NAMES), "--quiet"]


def pattern_nnz(cells, n_points):
    """Entries of the P1 pattern: pairs of points that share a cell, each point with itself.

    Counted with scipy from the cell-point incidence C (the pattern of C^T C), the
    full pattern of the mesh graph that the assembled matrix stores, explicit zeros
    included (common practice, no source; reference library: scipy).
    """
    m, k = cells.shape
    C = sp.csr_matrix((np.ones(m * k), (np.repeat(np.arange(m), k), cells.ravel())),
                      shape=(m, n_points))
    return (C.T @ C).nnz


def boundary_count(cells):
    """Points on a side (edge or face) that belongs to one cell only, by numpy
    (common practice, no source)."""
    k = cells.shape[1]
    sides = np.sort(np.concatenate([np.delete(cells, j, axis=1) for j in range(k)]), axis=1)
    unique, counts = np.unique(sides, axis=0, return_counts=True)
    return np.unique(unique[counts == 1]).size


def bench(tmp_path, capsys, *args):
    record = tmp_path / "bench.json"
    code = main(["bench", *map(str, args), *FAST, "--json", str(record)])
    out, err = capsys.readouterr()
    return code, out, err, record


#: Figures each record must carry (finite numbers; their size is bench/'s business).
ASSEMBLY_FIGURES = ("seconds", "floor_seconds", "speedup_vs_triplets")
SOLVE_FIGURES = ("setup_seconds", "solve_seconds", "total_seconds", "vs_fastest")


def _recorded(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def check_record(record, path, points, cells, out):
    """Everything bench writes, against the file's arrays; every figure recorded (a finite
    number: how large is for bench/ to say, not a test)."""
    n, m = len(points), len(cells)
    dim = points.shape[1]
    rec = json.loads(record.read_text())
    held = boundary_count(cells)
    assert rec["mesh"] == {"file": str(path), "dim": dim, "points": n, "cells": m,
                           "boundary_points": held, "unknowns": n - held}
    assert rec["points"] == n and rec["cells"] is None
    assert rec["triangles" if dim == 2 else "tetrahedra"] == m
    assert rec["nnz"] == pattern_nnz(cells, n)
    # The least bytes an assembly moves: read the cells (dim + 1 int32 each) and the points
    # (dim float64 each), write the values (float64) and, on a first call, the column
    # indices and the n + 1 row starts (int32) (common practice, no source).
    read = 4 * (dim + 1) * m + 8 * dim * n
    numeric = read + 8 * rec["nnz"]
    first = numeric + 4 * rec["nnz"] + 4 * (n + 1)
    assert [r["strategy"] for r in rec["assembly"]] == ["triplets", "csr first call",
                                                       "csr numeric"]
    assert [r["floor_bytes"] for r in rec["assembly"]] == [first, first, numeric]
    for r in rec["assembly"]:
        assert all(_recorded(r[k]) for k in ASSEMBLY_FIGURES)
    assert [r["preconditioner"] for r in rec["solve"]] == NAMES
    for r in rec["solve"]:
        assert r["converged"] and r["iterations"] >= 1
        assert all(_recorded(r[k]) for k in SOLVE_FIGURES)
    assert _recorded(rec["bandwidth_GBs"]["copy"]) and _recorded(rec["bandwidth_GBs"]["triad"])
    # what is printed says which mesh, its sizes and dimension, and the problem
    words = "triangles" if dim == 2 else "tetrahedra"
    assert (f"mesh {path}: {dim}-D, {n:,} points, {m:,} {words}, {held:,} on the boundary; "
            f"problem -div grad u = 1 with u = 0 on the whole boundary") in out
    assert f"{n - held:,} unknowns" in out
    for phrase in ("triplets", "csr first call", "csr numeric", "GB/s", *NAMES, "vs fastest"):
        assert phrase in out, phrase


def test_triangles_from_npz(tmp_path, capsys):
    mesh = disk(6)
    path = tmp_path / "disk.npz"
    np.savez(path, points=mesh.points, triangles=mesh.cells)
    code, out, err, record = bench(tmp_path, capsys, "--mesh", path)
    assert code == 0, err
    check_record(record, path, mesh.points, mesh.cells, out)


def test_triangles_through_meshio(tmp_path, capsys):
    pytest.importorskip("meshio")
    mesh = disk(4)
    path = kio.write_vtu(tmp_path / "disk.vtu", mesh)  # VTK XML, read back by meshio
    code, out, err, record = bench(tmp_path, capsys, "--mesh", path)
    assert code == 0, err
    check_record(record, path, mesh.points, mesh.cells, out)


def test_tetrahedra_from_npz(tmp_path, capsys):
    mesh = cuboid(3, 3, 3)
    path = tmp_path / "cube.npz"
    np.savez(path, points=mesh.points, tetrahedra=mesh.cells)
    code, out, err, record = bench(tmp_path, capsys, "--mesh", path)
    assert code == 0, err
    check_record(record, path, mesh.points, mesh.cells, out)
    # a cube of 3 x 3 x 3 cells: 4^3 points of which 2^3 are inside (common practice, no source)
    assert json.loads(record.read_text())["mesh"]["unknowns"] == 8


def test_a_preconditioner_the_mesh_cannot_take_is_skipped_with_its_reason(tmp_path, capsys):
    # a file's mesh has no refinement history: a preconditioner that needs one is left out
    # with the library's one-line reason, and the others still run
    if "gmg" not in PRECONDITIONERS:
        pytest.skip("no gmg preconditioner registered")
    mesh = disk(4)
    path = tmp_path / "disk.npz"
    np.savez(path, points=mesh.points, triangles=mesh.cells)
    record = tmp_path / "b.json"
    code = main(["bench", "--mesh", str(path), "--repeat", "1", "--bandwidth-mb", "8",
                 "--preconditioners", "jacobi,gmg", "--json", str(record), "--quiet"])
    out, err = capsys.readouterr()
    assert code == 0, err
    jacobi, skipped = json.loads(record.read_text())["solve"]
    assert jacobi["converged"]
    assert "refinement history" in skipped["skipped"] and "\n" not in skipped["skipped"]
    assert "--cells" not in skipped["skipped"]  # no unit-square hint for a file's mesh
    assert [line for line in out.splitlines() if line.startswith("gmg ")
            and "skipped: " in line]


def _garbage(path):
    path.write_bytes(b"PK\x03\x04 the start of a zip archive, then nothing valid")


def _thin(path):
    # 2 x 1 squares: every point lies on the boundary, nothing is left to solve for
    np.savez(path, points=[[0, 0], [1, 0], [2, 0], [0, 1], [1, 1], [2, 1]],
             triangles=[[0, 1, 4], [0, 4, 3], [1, 2, 5], [1, 5, 4]])


ERRORS = {  # case: (what to write at the path, extra options, words of the error)
    "missing": (None, [], "not found"),
    "cells-and-mesh": (_thin, ["--cells", "8"], "not allowed with argument"),
    "corrupt": (_garbage, [], "not a readable .npz archive"),
    "no-unknowns": (_thin, [], "leaves no unknown to solve for"),
}


@pytest.mark.parametrize("case", list(ERRORS))
def test_bad_mesh_files_exit_2_and_write_nothing(tmp_path, capsys, case):
    write, extra, words = ERRORS[case]
    path = tmp_path / "mesh.npz"
    if write is not None:
        write(path)
    before = sorted(os.listdir(tmp_path))
    record = tmp_path / "bench.json"
    code = main(["bench", "--mesh", str(path), *extra, *FAST, "--json", str(record)])
    out, err = capsys.readouterr()
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("hatkernels: error: ")
    assert words in lines[0]
    if case != "cells-and-mesh":  # a usage error names both options instead
        assert str(path) in lines[0]
    else:
        assert "--mesh" in lines[0] and "--cells" in lines[0]
    assert out == ""
    assert sorted(os.listdir(tmp_path)) == before  # no record, no temporary file


def test_a_mesh_without_boundary_is_refused(tmp_path, capsys, monkeypatch):
    # The mesh checks refuse every closed surface laid in the plane (two of its cells
    # overlap), so no valid file gives a mesh without boundary; the guard is tested by
    # having the mesh report no boundary point.
    mesh = disk(4)
    path = tmp_path / "disk.npz"
    np.savez(path, points=mesh.points, triangles=mesh.cells)
    monkeypatch.setattr(Mesh, "boundary_points", lambda self: np.empty(0, dtype=np.int32))
    before = sorted(os.listdir(tmp_path))
    code = main(["bench", "--mesh", str(path), *FAST, "--json", str(tmp_path / "b.json")])
    out, err = capsys.readouterr()
    assert code == 2 and out == ""
    assert f"mesh file {path}: the mesh has no boundary" in err
    assert sorted(os.listdir(tmp_path)) == before
