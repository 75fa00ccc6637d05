"""``hatkernels modes``: the natural thermal modes of the plate, the block, mesh files and
problem files, against values from outside the project, and every refusal.

Runs call the command's main() in this process on small meshes.  References:
separation of variables for the rectangle and the box (common practice, no
source); the slab with linear heat transfer at a face, beta tan(beta) = Bi
(H. S. Carslaw and J. C. Jaeger, Conduction of Heat in Solids, 2nd ed., 1959,
chapter III), roots by scipy.optimize.brentq.  P1 eigenvalues lie above the
exact ones (I. Babuska and J. Osborn, Eigenvalue problems, Handbook of
Numerical Analysis II, 1991).
"""

import errno
import json
import os

import numpy as np
import pytest
from scipy.optimize import brentq

from hatkernels import cli, plot
from hatkernels.assembly import assemble_mass
from hatkernels.cli import modes_report
from hatkernels.io import meshio_available, read_mesh, write_mesh
from hatkernels.mesh import rectangle
from hatkernels.mesh.tags import label_cells, label_sides

PI2 = np.pi**2
#: Pure aluminium and copper at 300 K: W/(m K), kg/m^3, J/(kg K) (Incropera and DeWitt,
#: Fundamentals of Heat and Mass Transfer, table A.1; values from memory): the plate's and
#: the block's data, typed here from the book, not read from the library.
K_AL, RHO_AL, C_AL = 237.0, 2702.0, 903.0
K_CU, RHO_CU, C_CU = 401.0, 8933.0, 385.0


def modes(capsys, *args):
    """``hatkernels modes ARGS --quiet --threads 1`` in this process: (exit code, stdout,
    stderr).  One numba thread: these check numbers, and on a 2-core machine shared with
    other work every parallel region of the many small products waits for a time slice
    (measured: the plate's test 30 s with two threads under a load of 4, 1.8 s with one)."""
    code = cli.main(["modes", *map(str, args), "--quiet", "--threads", "1"])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def one_error(err):
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("hatkernels: error: ") and "Traceback" not in err, err
    return lines[0]


def record(out):
    with open(out / "summary.json") as f:
        return json.load(f)


def tan_roots(count, bi):
    """Roots of beta tan(beta) = bi, one in each (j pi, j pi + pi/2)."""
    return np.array([brentq(lambda b: b * np.tan(b) - bi, j * np.pi + 1e-12,
                            j * np.pi + np.pi / 2 - 1e-12) for j in range(count)])


def listing(directory):
    out = {}
    for root, dirs, files in os.walk(directory):
        for name in dirs + files:
            path = os.path.join(root, name)
            out[os.path.relpath(path, directory)] = (None if os.path.isdir(path)
                                                     else open(path, "rb").read())
    return out


# -- against outside values ------------------------------------------------------------------

def test_unit_square_mesh_file(tmp_path, capsys):
    # -lap u = lambda u, u = 0 on the boundary: 2 pi^2, 5 pi^2 (double), separation of
    # variables; with k and c constants lambda scales by k / c
    write_mesh(tmp_path / "square.npz", rectangle(32, 32))
    code, text, err = modes(capsys, "--mesh", tmp_path / "square.npz", "--count", 3, "--out",
                            tmp_path / "o")
    assert code == 0, err
    s = record(tmp_path / "o")
    values = np.array(s["eigenvalues"])
    exact = np.array([2, 5, 5]) * PI2
    # from above; 32 cells: the P1 errors are 0.3 % and 0.7 % (O(h^2), Babuska and
    # Osborn, 1991); bounded at 1 %
    assert np.all(values > exact) and np.all(values < exact * 1.01), values / PI2
    assert "the mesh file's units" in s["units"]["eigenvalue"]
    assert s["decay_times"] == pytest.approx(1 / values, rel=4 * np.finfo(float).eps, abs=0)
    assert not any(m["zero_mode"] for m in s["modes"])
    assert "CAUTION" in text and "qualified person" in text
    # modes.npz: (count, n_points) vectors, 0 at the held boundary, mass-orthonormal (an
    # invariant of the definition; round-off of a sparse solve on 961 unknowns)
    mesh = read_mesh(tmp_path / "o" / "modes.npz")
    with np.load(tmp_path / "o" / "modes.npz") as z:
        V, stored = z["vectors"], z["values"]
        assert z["decay_times"].tolist() == s["decay_times"]
    assert V.shape == (3, mesh.n_points) and stored.tolist() == s["eigenvalues"]
    assert np.all(V[:, mesh.boundary_points()] == 0.0)
    assert np.abs(V @ assemble_mass(mesh) @ V.T - np.eye(3)).max() < 1e-9

    code, _, err = modes(capsys, "--mesh", tmp_path / "square.npz", "--count", 1,
                         "--conductivity", 3, "--capacity", 1.5, "--out", tmp_path / "o2")
    assert code == 0, err
    value = record(tmp_path / "o2")["eigenvalues"][0]
    assert 2 * 2 * PI2 < value < 2 * 2 * PI2 * 1.004  # k / c = 2; 0.3 % as above


def test_plate_against_the_separable_rectangle(tmp_path, capsys):
    # the plate held on its four edges: lambda_mn = (k / (rho c)) pi^2 (m^2/a^2 + n^2/b^2),
    # a = 120 mm, b = 80 mm (separation of variables); modes (1,1), (2,1), (1,2)
    alpha = K_AL / (RHO_AL * C_AL)
    a, b = 0.120, 0.080
    exact = alpha * PI2 * np.array([1 / a**2 + 1 / b**2, 4 / a**2 + 1 / b**2,
                                    1 / a**2 + 4 / b**2])
    code, text, err = modes(capsys, "--refine", 2, "--count", 3, "--method", "lobpcg",
                            "--rtol", 1e-9, "--out", tmp_path / "o")
    assert code == 0, err
    s = record(tmp_path / "o")
    values = np.array(s["eigenvalues"])
    # 2 mm cells: P1 errors about 0.1 to 0.5 % (O(h^2)); bounded at 1 %, from above
    assert np.all(values > exact) and np.all(values < exact * 1.01), values / exact - 1
    assert s["solver"]["method"] == "lobpcg" and s["solver"]["converged"]
    assert s["units"]["eigenvalue"] == "1/s" and s["units"]["decay_time"] == "s"
    tau = 1 / values[0]
    assert f"{tau:.3g} s" in text  # the note on the first decay time
    assert "1/e" in text and "lambda (1/s)" in text and "decay time (s)" in text
    assert "qualified person" in s["caution"]
    files = {"modes.npz", "summary.json"}
    files |= {"modes.png"} if plot.available() else set()
    files |= {"modes.vtu"} if meshio_available() else set()
    assert set(os.listdir(tmp_path / "o")) == files


def test_block_against_the_slab_cooled_at_its_bottom(tmp_path, capsys):
    # the block: insulated but for the bottom face (h = 5000 W/(m^2 K)); separation of
    # variables gives cos(m pi x / a) cos(n pi y / b) Z(z), Z from beta tan(beta) = Bi,
    # Bi = h H / k (Carslaw and Jaeger, 1959, chapter III)
    alpha = K_CU / (RHO_CU * C_CU)
    a, b, H, h = 0.064, 0.048, 0.008, 5000.0
    beta = tan_roots(1, h * H / K_CU)[0]
    exact = np.sort([alpha * ((m * np.pi / a) ** 2 + (n * np.pi / b) ** 2 + (beta / H) ** 2)
                     for m in range(4) for n in range(3)])[:4]
    code, text, err = modes(capsys, "--scenario", "block", "--refine", 1, "--count", 4,
                            "--out", tmp_path / "o")
    assert code == 0, err
    s = record(tmp_path / "o")
    values = np.array(s["eigenvalues"])
    # 2 mm cubes: the cos(3 pi x / a) mode's P1 error is about 2 %; from above
    assert np.all(values > exact) and np.all(values < exact * 1.03), values / exact - 1
    assert s["problem"]["cooling"]["film"] == h and s["zero_modes"] == 0
    assert "modes.png" not in s["files"] and "2-D meshes only" in " ".join(s["skipped"])


BAR = """\
mesh = "bar.npz"
length_unit = "mm"
[regions.copper]
conductivity = 400.0
density = 8900.0
specific_heat = 390.0
source = 1e5
"""


def bar_folder(tmp_path):
    """A bar 100 mm x 5 mm: "cold" at x = 0, "film" at x = 100 mm, the rest untagged."""
    mesh = rectangle(80, 4, bounds=(0.0, 100.0, 0.0, 5.0))
    mesh = label_cells(mesh, {"copper": lambda x, y: x >= 0})
    mesh = label_sides(mesh, {"cold": lambda x, y: x == 0.0, "film": lambda x, y: x == 100.0})
    write_mesh(tmp_path / "bar.npz", mesh)
    return tmp_path


def test_insulated_problem_file_reports_the_steady_mode(tmp_path, capsys):
    # nothing held or cooled: lambda = 0 (the uniform temperature does not decay), then the
    # Neumann bar's alpha (pi / L)^2 (separation of variables), from above
    folder = bar_folder(tmp_path)
    (folder / "bar.toml").write_text(BAR)
    code, text, err = modes(capsys, folder / "bar.toml", "--count", 2, "--out", folder / "o")
    assert code == 0, err
    s = record(folder / "o")
    assert s["modes"][0]["zero_mode"] and s["eigenvalues"][0] == 0.0
    assert s["decay_times"][0] is None and s["zero_modes"] == 1
    alpha = 400.0 / (8900.0 * 390.0)
    exact = alpha * (np.pi / 0.1) ** 2
    # 80 cells along: (pi h / L)^2 / 12 = 1.3e-4 relative (common practice, no source)
    assert exact < s["eigenvalues"][1] < exact * (1 + 3e-4)
    assert "steady mode" in text and "0 (steady)" in text


def test_problem_file_held_and_cooled_slab(tmp_path, capsys):
    # held at x = 0, cooled at x = L: sin(beta x / L) with beta cot(beta) = -Bi, Bi = h L / k
    # (Carslaw and Jaeger, 1959, chapter III); the ambient and held values do not enter
    folder = bar_folder(tmp_path)
    (folder / "bar.toml").write_text(BAR + "[boundary.cold]\nheld = 20.0\n"
                                     "[boundary.film]\nfilm = 8000.0\nambient = 30.0\n")
    code, _, err = modes(capsys, folder / "bar.toml", "--count", 2, "--out", folder / "o")
    assert code == 0, err
    L, bi = 0.1, 8000.0 * 0.1 / 400.0
    beta = np.array([brentq(lambda b: b * np.cos(b) + bi * np.sin(b), j * np.pi + np.pi / 2,
                            (j + 1) * np.pi - 1e-12) for j in range(2)])
    exact = 400.0 / (8900.0 * 390.0) * (beta / L) ** 2
    values = np.array(record(folder / "o")["eigenvalues"])
    # (beta h / L)^2 / 12 below 1e-3 for the second (common practice, no source)
    assert np.all(values > exact) and np.all(values < exact * (1 + 1e-3)), values / exact - 1


# -- refusals --------------------------------------------------------------------------------

@pytest.mark.parametrize("args, message", [
    (["--scenario", "block", "--cells", 10], "--cells applies to the plate only"),
    (["--cells", 10, "--refine", 1], "--cells and --refine both set the mesh size"),
    (["--mesh", "{square}", "--scenario", "plate"], "--mesh and --scenario both"),
    (["{bar}", "--scenario", "block"], "and --scenario both choose the problem"),
    (["{bar}", "--capacity", 3], "--capacity cannot be combined with PROBLEM.toml"),
    (["--scenario", "heated-insert", "--conductivity", 3], "--conductivity cannot be combined"),
    (["--count", 2, "--pictures", 3], "--pictures 3 is more than the 2 modes"),
    (["--count", 0], "--count"),
    (["--capacity", -1], "--capacity"),
    (["--method", "newton"], "invalid choice"),
    (["--mesh", "{square}", "--count", 50], "k = 50 eigenpairs asked for"),
    (["--mesh", "{missing}"], "not found"),
    (["{nodensity}"], "has no density and specific_heat"),
])
def test_usage_errors_are_named_and_nothing_is_written(tmp_path, capsys, args, message):
    write_mesh(tmp_path / "square.npz", rectangle(6, 6))
    folder = bar_folder(tmp_path)
    (folder / "bar.toml").write_text(BAR)
    (folder / "nodensity.toml").write_text(BAR.replace("density = 8900.0\n", "")
                                           .replace("specific_heat = 390.0\n", ""))
    paths = {"square": tmp_path / "square.npz", "bar": folder / "bar.toml",
             "missing": tmp_path / "missing.npz", "nodensity": folder / "nodensity.toml"}
    args = [str(a).format(**paths) for a in args]
    before = set(os.listdir(tmp_path))
    code, out, err = modes(capsys, *args, "--out", tmp_path / "o")
    assert code == 2, err
    assert message in one_error(err)
    assert out == "" and set(os.listdir(tmp_path)) == before


def test_under_mpiexec_modes_are_refused(tmp_path, monkeypatch, capsys):
    # the launcher's environment of 2 ranks (MPICH's PMI_SIZE), read without MPI
    monkeypatch.setenv("PMI_SIZE", "2")
    monkeypatch.setenv("PMI_RANK", "0")
    code, out, err = modes(capsys, "--refine", 1, "--out", tmp_path / "o")
    assert code == 2 and "runs in one process" in one_error(err)
    assert out == "" and os.listdir(tmp_path) == []


def test_outputs_are_written_whole_or_not_at_all(tmp_path, monkeypatch, capsys):
    write_mesh(tmp_path / "square.npz", rectangle(8, 8))
    out = tmp_path / "o"
    args = ["--mesh", tmp_path / "square.npz", "--count", 2, "--out", out]
    assert modes(capsys, *args)[0] == 0
    before = listing(tmp_path)
    code, _, err = modes(capsys, *args)  # the output exists: --force is needed
    assert code == 2 and "exists" in one_error(err)
    assert listing(tmp_path) == before

    def full(*a, **k):  # the disk fills while summary.json, the last file, is written
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(modes_report.kio, "write_json", full)
    code, _, err = modes(capsys, *args, "--count", 3, "--force")
    assert code == 74 and "the disk is full" in one_error(err)
    assert listing(tmp_path) == before  # the old output whole, no temporary directory
    monkeypatch.undo()
    code, _, err = modes(capsys, *args, "--count", 3, "--force")
    assert code == 0, err
    assert len(record(out)["eigenvalues"]) == 3


def test_without_the_optional_libraries_the_files_say_so(tmp_path, monkeypatch, capsys):
    write_mesh(tmp_path / "square.npz", rectangle(8, 8))
    monkeypatch.setattr(plot, "available", lambda: False)
    monkeypatch.setattr(modes_report.kio, "meshio_available", lambda: False)
    code, text, err = modes(capsys, "--mesh", tmp_path / "square.npz", "--count", 2, "--out",
                            tmp_path / "o")
    assert code == 0, err
    assert sorted(os.listdir(tmp_path / "o")) == ["modes.npz", "summary.json"]
    skipped = " ".join(record(tmp_path / "o")["skipped"])
    assert "modes.png (matplotlib is not installed" in skipped
    assert "modes.vtu (meshio is not installed" in skipped and "not written" in text


def test_a_run_that_does_not_converge_exits_1_and_writes_nothing(tmp_path, capsys):
    code, out, err = modes(capsys, "--refine", 1, "--method", "lobpcg", "--maxiter", 1,
                           "--rtol", 1e-12, "--out", tmp_path / "o")
    assert code == 1 and "did not converge" in one_error(err) and "--maxiter" in err
    assert out == "" and os.listdir(tmp_path) == []


def test_the_command_lists_modes(capsys):
    assert cli.main([]) == 2
    assert "choose a command: solve, modes" in capsys.readouterr().err
    assert "modes" in cli.build_parser().commands
