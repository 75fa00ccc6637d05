"""``mpiexec -n P hatkernels solve --refine K``: the command's partitioned path.

The plate refined 4 times is solved on 2 ranks, each refining its part of the
coarse mesh and writing its piece of the solution; the pieces together must
be the serial command's solution on the serial mesh.  When the plate's heat
sources do not line up with the refined mesh, the command keeps the
replicated path and says why.
"""

import json
import subprocess
import sys
import warnings

import numpy as np
import pytest
from test_distributed import MPI_TIMEOUT, needs_mpi, run_mpi

from hatkernels import io as kio

meshio = pytest.importorskip("meshio")

pytestmark = needs_mpi


def _command(tmp_path, name, *args):
    return [sys.executable, "-m", "hatkernels.cli", "solve", *args, "--quiet", "--out",
            str(tmp_path / name)]


def test_plate_on_two_ranks_is_the_serial_solution(tmp_path):
    code, out, err = run_mpi(2, _command(tmp_path, "mpi", "--refine", "4"), cwd=tmp_path)
    assert code == 0, f"{out}\n{err}"
    assert out.count("hatkernels solve:") == 1  # only rank 0 prints
    for text in ("each refined its part", "rank 1 ", "CAUTION"):
        assert text in out, text
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        serial = subprocess.run(_command(tmp_path, "serial", "--refine", "4", "--preconditioner",
                                         "gmg"), capture_output=True, text=True, cwd=tmp_path,
                                timeout=MPI_TIMEOUT)
    assert serial.returncode == 0, serial.stderr
    ref = kio.read_solution(str(tmp_path / "serial" / "solution.npz"))
    points, u_ref = ref.mesh.points, ref.point_data["u"]
    # the pieces: every serial point is in some piece, with the serial value (the serial
    # command's solution is the reference; common practice, no source)
    h = 0.008 / 2**4
    key = {tuple(k): i for i, k in enumerate(np.rint(points / h).astype(np.int64).tolist())}
    seen = np.zeros(len(points), dtype=bool)
    cells = 0
    for r in range(2):
        piece = meshio.read(tmp_path / "mpi" / "solution" / f"piece-{r:04d}.vtu")
        idx = np.array([key[tuple(k)] for k in
                        np.rint(piece.points[:, :2] / h).astype(np.int64).tolist()])
        assert np.abs(piece.points[:, :2] - points[idx]).max() < 1e-12
        assert np.abs(piece.point_data["u"] - u_ref[idx]).max() <= 1e-8 * np.abs(u_ref).max()
        seen[idx] = True
        cells += len(piece.cells_dict["triangle"])
    assert seen.all()
    assert cells == ref.mesh.n_cells  # each fine triangle in exactly one piece
    mine = json.loads((tmp_path / "mpi" / "summary.json").read_text())
    theirs = json.loads((tmp_path / "serial" / "summary.json").read_text())
    assert mine["distributed"]["path"] == "partitioned"
    assert mine["distributed"]["ranks"] == 2
    assert abs(mine["solver"]["iterations"] - theirs["solver"]["iterations"]) <= 1
    assert mine["mesh"]["points"] == theirs["mesh"]["points"]
    assert mine["unknowns"] == theirs["unknowns"]
    for key in ("max", "min", "mean"):
        assert abs(mine["solution"][key] - theirs["solution"][key]) < 1e-8, key
    assert mine["solution"]["max_at"] == pytest.approx(theirs["solution"]["max_at"])
    # conservation (common practice, no source): the components' 15 W + 5 W (the scenario's
    # data) leave through the held edges
    power = mine["power"]
    assert power["power_in"] == pytest.approx(20.0, rel=1e-12)
    assert power["heat_out"] == pytest.approx(20.0, rel=1e-8)
    assert power["components"] == pytest.approx(theirs["power"]["components"], rel=1e-12)
    assert "solution.npz" not in mine["files"]
    assert "solution/solution.pvtu" in mine["files"]


def test_which_problems_take_the_partitioned_path():
    # the plate's components lie on the lines of the 8 mm grid refined 4 times or more
    # (their edges are multiples of 0.5 mm: the scenario's data); the block and a
    # preconditioner without refinement history keep the replicated path
    from types import SimpleNamespace

    from hatkernels.cli import solve_parts

    def args(**kw):
        base = dict(refine=None, scenario=None, mesh=None, source=None, conductivity=None,
                    dirichlet=None, preconditioner="amg", given=set())
        return SimpleNamespace(**{**base, **kw})

    assert solve_parts.plan(args(), None) == (None, "")
    for k in (1, 2, 3):
        chosen, why = solve_parts.plan(args(refine=k), None)
        assert chosen is None and "do not lie on the lines" in why, k
    chosen, _ = solve_parts.plan(args(refine=2, source=1e6), None)  # uniform: any refinement
    assert chosen is not None and chosen.source == 1e6
    chosen, why = solve_parts.plan(args(refine=4), None)
    assert chosen.refine == 4 and chosen.coarse.n_cells == 300 and why == ""
    assert "bottom face" in solve_parts.plan(args(refine=4, scenario="block"), None)[1]
    chosen, why = solve_parts.plan(args(refine=4, given={"preconditioner"}), None)
    assert chosen is None and "--preconditioner amg" in why


def test_mesh_file_is_scattered_from_rank_0(tmp_path):
    # a mesh that is no refinement (jittered interior points): rank 0 reads it and sends
    # each rank its part; the solution is the serial command's (common practice, no source)
    from hatkernels import Mesh
    from hatkernels.mesh import rectangle

    grid = rectangle(24, 20)
    points = grid.points.copy()
    inner = np.ones(len(points), dtype=bool)
    inner[grid.boundary_points()] = False
    points[inner] += np.random.default_rng(3).uniform(-0.01, 0.01, (inner.sum(), 2))
    kio.write_mesh(str(tmp_path / "jittered.npz"), Mesh(points, grid.cells))
    args = ("--mesh", "jittered.npz", "--source", "2")
    code, out, err = run_mpi(2, _command(tmp_path, "mpi", *args), cwd=tmp_path)
    assert code == 0, f"{out}\n{err}"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        serial = subprocess.run(_command(tmp_path, "serial", *args), capture_output=True,
                                text=True, cwd=tmp_path, timeout=MPI_TIMEOUT)
    assert serial.returncode == 0, serial.stderr
    a = kio.read_solution(str(tmp_path / "mpi" / "solution.npz")).point_data["u"]
    b = kio.read_solution(str(tmp_path / "serial" / "solution.npz")).point_data["u"]
    assert np.abs(a - b).max() <= 1e-8 * np.abs(b).max()
    summary = json.loads((tmp_path / "mpi" / "summary.json").read_text())
    assert summary["distributed"]["path"] == "scattered"
