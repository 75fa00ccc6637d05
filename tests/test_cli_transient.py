"""The command's transient mode, ``hatkernels solve --until T``: the plate, the block, a mesh
file and problem files with a ``[time]`` table, against solutions from outside the project,
and every refusal.

Runs call the command's main() in this process (small meshes, few steps); one runs it in a
subprocess without the optional libraries.  All run on one numba thread: these meshes are too
small for a second one to help, and on a busy 2-core machine each parallel region of a
2-thread run waits for a time slice (a march of 100 small steps measured 30 s instead of
0.25 s).  Thread counts are tested elsewhere (tests/test_threads.py).
"""

import csv
import errno
import json
import os
import subprocess
import sys
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.special import erf, erfc

from hatkernels import cli, plot
from hatkernels.io import meshio_available, read_solution, write_mesh
from hatkernels.mesh import rectangle
from hatkernels.mesh.tags import label_sides

#: Pure aluminium at 300 K: W/(m K), kg/m^3, J/(kg K) (Incropera and DeWitt, Fundamentals of
#: Heat and Mass Transfer, 6th ed., 2007, table A.1; values from memory).
K_AL, RHO_AL, C_AL = 237.0, 2702.0, 903.0
THICKNESS = 0.002  # the plate's, m
ONE_THREAD = ("--threads", "1")  # see the module's docstring
COOLANT = 25.0  # degC


def listing(directory):
    """Every name under ``directory`` with the bytes of each file."""
    out = {}
    for root, dirs, files in os.walk(directory):
        for name in dirs + files:
            path = os.path.join(root, name)
            out[os.path.relpath(path, directory)] = (None if os.path.isdir(path)
                                                     else open(path, "rb").read())
    return out


def solve(capsys, *args):
    """``hatkernels solve ARGS --quiet`` in this process: (exit code, stdout, stderr)."""
    code = cli.main(["solve", *map(str, args), "--quiet", *ONE_THREAD])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def one_error(err):
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("hatkernels: error: ") and "Traceback" not in err, err
    return lines[0]


def p1_integral(mesh, u):
    """The exact integral of the P1 field ``u``: each cell's measure times its points' mean."""
    return float(mesh.measures() @ u[mesh.cells].mean(axis=1))


def read_probes(path):
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    return rows[0], np.array(rows[1:], dtype=float)


# -- the plate heating up --------------------------------------------------------------------


@pytest.fixture(scope="module")
def plate(tmp_path_factory):
    """The plate, 30 x 20 cells, heating up for 12 s with 4 outputs, run once (with progress)."""
    out = tmp_path_factory.mktemp("plate") / "out"
    code = cli.main(["solve", "--cells", "30", "--until", "12", "--outputs", "4", "--out",
                     str(out), *ONE_THREAD])
    return code, out


def test_the_plate_heats_up_and_writes_every_file(plate):
    code, out = plate
    assert code == 0
    names = set(os.listdir(out))
    expected = {"solution.npz", "summary.json", "probes.csv"}
    if meshio_available():
        expected |= {"series.pvd"} | {f"temperature_{k:06d}.vtu" for k in range(5)}
    if plot.available():
        expected.add("probes.png")
    assert names == expected
    s = json.loads((out / "summary.json").read_text())
    assert s["mode"] == "transient" and "qualified person" in s["caution"]
    assert s["schedule"]["output_times"] == pytest.approx([0, 3, 6, 9, 12], rel=1e-15, abs=0)
    assert s["schedule"]["step"] == pytest.approx(0.12, rel=1e-15, abs=0)  # T/100 by default
    # the default probes are the components' centres (40, 45) mm and (90, 25) mm
    assert [(p["name"], p["at"]) for p in s["probes"]] == [
        ("processor", pytest.approx([40.0, 45.0], rel=1e-12)),
        ("voltage regulator", pytest.approx([90.0, 25.0], rel=1e-12))]
    # heat-up from the coolant temperature: never below it (maximum principle for the heat
    # equation with a non-negative source: common practice, no source), hotter with time
    maxima = [r["max"] for r in s["outputs"]]
    assert maxima[0] == COOLANT and bool(np.all(np.diff(maxima) > 0))
    assert all(r["min"] >= COOLANT - 1e-9 for r in s["outputs"])
    steps = s["steps"]
    assert len(steps["iterations"]) == s["schedule"]["steps"] == 102  # 100 + 2 half steps
    # a step whose projected start meets the tolerance takes no iteration
    assert 0 <= steps["iterations_min"] <= steps["iterations_max"] <= 20
    assert sum(steps["iterations"]) > 0
    assert steps["work_units_median"] > 0
    if meshio_available():  # the collection names each file with its time
        sets = ET.parse(out / "series.pvd").getroot().iter("DataSet")
        entries = [(float(d.get("timestep")), d.get("file")) for d in sets]
        assert entries == [(t, f"temperature_{k:06d}.vtu")
                           for k, t in enumerate([0.0, 3.0, 6.0, 9.0, 12.0])]
    text = (out / "summary.json").read_text()
    assert "NaN" not in text and "Infinity" not in text


def test_the_plate_report_and_progress(plate, capsys):
    # the fixture printed its report and progress before capsys of this test: run a tiny one
    code = cli.main(["solve", "--cells", "30", "--until", "1", "--outputs", "1", "--out",
                     str(plate[1].parent / "again"), *ONE_THREAD])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    for phrase in ("solve (transient)", "rho c dT/dt - div(k grad T) = q", "initial "
                   "temperature 25 degC", "iterations", "per step min", "WU", "processor",
                   "voltage regulator", "balance", "stored", "heat out", "heat in",
                   "relative", "CAUTION", "local codes and licensed practice"):
        assert phrase in captured.out, phrase
    assert "steady" not in captured.out.split("CAUTION")[0]
    assert "march: step 102 of 102, t = 1 s" in captured.err  # progress on stderr


def test_the_first_law_holds_for_the_plate(plate):
    # stored + heat out = heat in (the first law of thermodynamics: common practice, no
    # source); heat in by hand: 15 W + 5 W for 12 s; the stored heat by hand from the
    # written field: rho c x thickness x the integral of (T - T0)
    _, out = plate
    s = json.loads((out / "summary.json").read_text())
    total = s["energy"]["total"]
    assert total["heat_in"] == pytest.approx(20.0 * 12.0, rel=1e-12, abs=0)
    saved = read_solution(out / "solution.npz")
    u = saved.point_data["u"]
    stored = RHO_AL * C_AL * THICKNESS * p1_integral(saved.mesh, u - COOLANT)
    assert total["stored"] == pytest.approx(stored, rel=1e-10, abs=0)
    # each step solves to rtol 1e-6: the books close far closer than that
    assert abs(total["stored"] + total["heat_out"] - total["heat_in"]) <= 1e-6 * 240.0
    for row in s["energy"]["intervals"]:
        assert row["heat_in"] == pytest.approx(20.0 * (row["end"] - row["start"]), rel=1e-12,
                                               abs=0)
        assert abs(row["stored"] + row["heat_out"] - row["heat_in"]) <= 1e-6 * 60.0


def _in_triangle(points, tri, p):
    """Barycentric coordinates of ``p`` in the triangle ``tri`` (by Cramer's rule)."""
    a, b, c = points[tri]
    det = (b[0] - a[0]) * (c[1] - a[1]) - (c[0] - a[0]) * (b[1] - a[1])
    l1 = ((p[0] - a[0]) * (c[1] - a[1]) - (c[0] - a[0]) * (p[1] - a[1])) / det
    l2 = ((b[0] - a[0]) * (p[1] - a[1]) - (p[0] - a[0]) * (b[1] - a[1])) / det
    return np.array([1.0 - l1 - l2, l1, l2])


@pytest.mark.skipif(not meshio_available(), reason="the .vtu files need meshio (io extra)")
def test_probes_csv_is_the_written_field_at_the_probes(plate):
    # probes.csv at each output time equals the P1 interpolation, by hand, of the field in
    # that time's .vtu file at the probe point, and the summary's table
    import meshio

    _, out = plate
    s = json.loads((out / "summary.json").read_text())
    header, rows = read_probes(out / "probes.csv")
    assert header == ["time (s)", "processor (degC)", "voltage regulator (degC)"]
    assert rows.shape == (103, 3) and rows[0, 0] == 0.0 and rows[-1, 0] == 12.0
    assert np.all(np.diff(rows[:, 0]) > 0)
    for k, entry in enumerate(s["outputs"]):
        vtu = meshio.read(out / f"temperature_{k:06d}.vtu")
        points, tris = vtu.points[:, :2] * 1e3, vtu.cells_dict["triangle"]  # mm
        u = vtu.point_data["temperature"]
        row = rows[np.flatnonzero(rows[:, 0] == entry["time"])[0]]
        for j, probe in enumerate(s["probes"]):
            lam = np.array([_in_triangle(points, t, probe["at"]) for t in tris])
            inside = np.flatnonzero((lam >= -1e-12).all(axis=1))[0]
            by_hand = float(lam[inside] @ u[tris[inside]])
            assert row[j + 1] == pytest.approx(by_hand, rel=1e-13, abs=0)
            assert entry["probes"][probe["name"]] == row[j + 1]
        assert entry["max"] == pytest.approx(u.max(), rel=1e-15, abs=0)


def test_a_long_march_reaches_the_steady_solve(tmp_path, capsys):
    # after 100 s (about 20 of the plate's slowest time constants, rho c / (k pi^2 (1/L^2 +
    # 1/W^2)) = 4.6 s) the field is the steady mode's, which tests/test_cli.py checks against
    # the Fourier series of the plate and Richardson extrapolation
    code, _, err = solve(capsys, "--cells", 30, "--out", tmp_path / "steady")
    assert code == 0, err
    code, _, err = solve(capsys, "--cells", 30, "--until", 100, "--step", 1, "--outputs", 1,
                         "--scheme", "backward-euler", "--out", tmp_path / "transient")
    assert code == 0, err
    steady = read_solution(tmp_path / "steady" / "solution.npz").point_data["u"]
    late = read_solution(tmp_path / "transient" / "solution.npz").point_data["u"]
    rise = steady.max() - COOLANT
    assert rise > 5.0
    # exp(-100 / 4.6) ~ 4e-10 of the rise is left, plus the steps' solver tolerance (1e-6)
    assert np.abs(late - steady).max() <= 1e-6 * rise


def test_early_heat_up_at_the_components(tmp_path, capsys):
    # Before heat leaves a component's footprint, its centre heats at q / (rho c) (common
    # practice, no source).  More precisely, a uniform source q on a 2a x 2b rectangle of an
    # infinite plate, switched on at t = 0, raises the centre by
    #     (q / rho c) int_0^t erf(a / (2 sqrt(alpha s))) erf(b / (2 sqrt(alpha s))) ds
    # (the heat kernel summed over the footprint and over time: common practice, no source);
    # the held edges are 20 mm and more away, out of reach in 0.1 s (sqrt(alpha t) = 3 mm).
    code, _, err = solve(capsys, "--cells", 120, "--until", 0.1, "--step", 0.01, "--outputs",
                         2, "--out", tmp_path / "o")
    assert code == 0, err
    s = json.loads((tmp_path / "o" / "summary.json").read_text())
    rc = RHO_AL * C_AL
    alpha = K_AL / rc
    sources = {"processor": (15.0 / (0.020 * 0.020 * THICKNESS), 0.010, 0.010),
               "voltage regulator": (5.0 / (0.015 * 0.010 * THICKNESS), 0.0075, 0.005)}

    def rise(q, a, b, t):
        return q / rc * quad(lambda x: erf(a / (2 * np.sqrt(alpha * x)))
                             * erf(b / (2 * np.sqrt(alpha * x))), 0.0, t)[0]

    for row in s["outputs"][1:]:
        t = row["time"]
        for name, (q, a, b) in sources.items():
            assert row["probes"][name] - COOLANT == pytest.approx(rise(q, a, b, t), rel=3e-3,
                                                                  abs=0), (name, t)
    first = s["outputs"][1]
    assert first["probes"]["processor"] - COOLANT == pytest.approx(
        sources["processor"][0] / rc * first["time"], rel=2e-3, abs=0)


def test_the_block_heats_up_and_its_heat_adds_up(tmp_path, capsys):
    # the 3-D block: 60 + 25 + 10 W for 2 s in (by hand), stored + out = in (first law)
    code, out, err = solve(capsys, "--scenario", "block", "--refine", 1, "--until", 2,
                           "--step", 0.5, "--outputs", 1, "--out", tmp_path / "o")
    assert code == 0, err
    s = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert [p["name"] for p in s["probes"]] == ["main die", "second die", "regulator"]
    assert s["probes"][0]["at"] == pytest.approx([20.0, 28.0, 6.0], rel=1e-12)
    total = s["energy"]["total"]
    assert total["heat_in"] == pytest.approx(95.0 * 2.0, rel=1e-12, abs=0)
    assert abs(total["stored"] + total["heat_out"] - total["heat_in"]) <= 1e-6 * 190.0
    # pure copper at 300 K: 8933 kg/m^3, 385 J/(kg K) (Incropera and DeWitt, table A.1;
    # values from memory)
    saved = read_solution(tmp_path / "o" / "solution.npz")
    stored = 8933.0 * 385.0 * p1_integral(saved.mesh, saved.point_data["u"] - COOLANT)
    assert total["stored"] == pytest.approx(stored, rel=1e-10, abs=0)
    assert "tetrahedra" in out


def test_a_mesh_file_cools_like_the_double_sine_series(tmp_path, capsys):
    # --mesh: the unit square from u = 1 with u = 0 on its boundary (k = C = 1) cools as
    #   u = sum over odd m, n of 16 / (pi^2 m n) sin(m pi x) sin(n pi y) exp(-(m^2 + n^2) pi^2 t)
    # (separation of variables: common practice, no source); the heat out as 1 minus the
    # integral of that, sum of 64 / (pi^4 m^2 n^2) exp(...)
    write_mesh(tmp_path / "square.npz", rectangle(32, 32))
    code, _, err = solve(capsys, "--mesh", tmp_path / "square.npz", "--source", 0,
                         "--initial", 1, "--until", 0.1, "--step", 0.0025, "--outputs", 2,
                         "--probe", "0.5,0.5", "--probe", "0.25,0.5", "--out", tmp_path / "o")
    assert code == 0, err
    s = json.loads((tmp_path / "o" / "summary.json").read_text())
    odd = np.arange(1, 400, 2)[:, None]

    def series(x, y, t):
        m, n = odd, odd.T
        return float((16 / (np.pi**2 * m * n) * np.sin(m * np.pi * x) * np.sin(n * np.pi * y)
                      * np.exp(-(m**2 + n**2) * np.pi**2 * t)).sum())

    def integral(t):
        m, n = odd, odd.T
        return float((64 / (np.pi**4 * m**2 * n**2) * np.exp(-(m**2 + n**2) * np.pi**2 * t))
                     .sum())

    for row in s["outputs"][1:]:
        for (name, value), (x, y) in zip(row["probes"].items(), [(0.5, 0.5), (0.25, 0.5)],
                                         strict=True):
            # h = 1/32: P1's error (h^2) is about 2e-3 here
            assert value == pytest.approx(series(x, y, row["time"]), rel=5e-3, abs=0), name
    total = s["energy"]["total"]
    assert total["heat_out"] == pytest.approx(1.0 - integral(0.1), rel=2e-3, abs=0)
    assert total["heat_in"] == 0.0
    assert s["units"]["energy"] == "mesh-file units"


# -- problem files with a [time] table -------------------------------------------------------

BAR = '''title = "copper bar"
mesh = "bar.npz"
length_unit = "mm"

[regions.copper]
conductivity = 400.0
density = 8900.0
specific_heat = 385.0

[boundary.hot]
held = 100.0

[time]
end = 1.0
step = 0.01
initial = 0.0
outputs = [0.25, 0.5]

[time.probes]
near = [5.0, 1.0]
mid = [10.0, 1.0]
'''


@pytest.fixture(scope="module")
def bar(tmp_path_factory):
    """A copper bar 100 mm x 2 mm (0.5 mm cells): its end x = 0 tagged hot."""
    folder = tmp_path_factory.mktemp("bar")
    mesh = label_sides(rectangle(200, 1, bounds=(0.0, 100.0, 0.0, 2.0)),
                       {"hot": lambda x, y: x == 0, "cold": lambda x, y: x == 100})
    write_mesh(folder / "bar.npz", mesh)
    return folder


def test_a_problem_file_heats_a_bar_like_a_semi_infinite_solid(bar, capsys):
    # the face x = 0 of a solid at 0 degC is held at 100 degC from t = 0: until the heat
    # reaches the far end (100 mm; 2 sqrt(alpha t) = 22 mm at 1 s),
    #   T = 100 erfc(x / (2 sqrt(alpha t))),   heat in = 2 k 100 sqrt(t / (pi alpha)) per m^2
    # (Incropera and DeWitt, Fundamentals of Heat and Mass Transfer, 6th ed., 2007, section
    # 5.7, the semi-infinite solid with a constant surface temperature; from memory)
    (bar / "bar.toml").write_text(BAR)
    code, out, err = solve(capsys, bar / "bar.toml", "--out", bar / "o")
    assert code == 0, err
    s = json.loads((bar / "o" / "summary.json").read_text())
    assert [r["time"] for r in s["outputs"]] == [0.0, 0.25, 0.5, 1.0]  # end added
    alpha = 400.0 / (8900.0 * 385.0)
    for row in s["outputs"][1:]:
        t = row["time"]
        for name, x in (("near", 0.005), ("mid", 0.010)):
            exact = 100.0 * erfc(x / (2 * np.sqrt(alpha * t)))
            assert row["probes"][name] == pytest.approx(exact, rel=2e-3, abs=0), (name, t)
    # the heat that came in through the held face (per metre of thickness: times 2 mm)
    total = s["energy"]["total"]
    came_in = 2 * 400.0 * 100.0 * np.sqrt(1.0 / (np.pi * alpha)) * 0.002
    assert -total["heat_out"] == pytest.approx(came_in, rel=2e-3, abs=0)
    assert total["stored"] == pytest.approx(came_in, rel=2e-3, abs=0)
    assert s["units"]["energy"] == "J/m"
    assert "copper bar" in out and "near" in out and "joules per metre of thickness" in out


def test_the_command_line_overrides_the_time_table(bar, capsys):
    (bar / "bar.toml").write_text(BAR)
    code, _, err = solve(capsys, bar / "bar.toml", "--until", 0.2, "--outputs", 2, "--step",
                         0.05, "--scheme", "backward-euler", "--initial", 10, "--probe",
                         "20,1", "--out", bar / "over")
    assert code == 0, err
    s = json.loads((bar / "over" / "summary.json").read_text())
    sc = s["schedule"]
    assert sc["output_times"] == pytest.approx([0.0, 0.1, 0.2], rel=1e-15, abs=0)
    assert (sc["step"], sc["scheme"], sc["initial"], sc["steps"]) == (0.05, "backward-euler",
                                                                      10.0, 4)
    assert [p["name"] for p in s["probes"]] == ["(20, 1) mm"]
    header, rows = read_probes(bar / "over" / "probes.csv")
    assert header == ["time (s)", "(20, 1) mm (degC)"] and rows[0, 1] == 10.0


GOOD_TIME = BAR.replace('outputs = [0.25, 0.5]\n', 'outputs = 4\n')
#: case -> (text, key, line, part of the message)
BAD_TIME = {
    "no-end": (GOOD_TIME.replace("end = 1.0\n", ""), "time.end", 13, "missing"),
    "no-step": (GOOD_TIME.replace("step = 0.01\n", ""), "time.step", 13, "missing"),
    "no-initial": (GOOD_TIME.replace("initial = 0.0\n", ""), "time.initial", 13, "missing"),
    "negative-end": (GOOD_TIME.replace("end = 1.0", "end = -1.0"), "time.end", 14,
                     "the end time > 0"),
    "zero-step": (GOOD_TIME.replace("step = 0.01", "step = 0"), "time.step", 15,
                  "the largest time step > 0"),
    "too-many-steps": (GOOD_TIME.replace("step = 0.01", "step = 1e-9"), "time.step", 15,
                       "choose a longer step"),
    "text-initial": (GOOD_TIME.replace("initial = 0.0", 'initial = "cold"'), "time.initial",
                     16, "got a string 'cold'"),
    "unknown-scheme": (GOOD_TIME.replace("outputs = 4", 'outputs = 4\nscheme = "leapfrog"'),
                       "time.scheme", 18, "expected one of"),
    "zero-outputs": (GOOD_TIME.replace("outputs = 4", "outputs = 0"), "time.outputs", 17,
                     "an integer >= 1"),
    "outputs-not-increasing": (GOOD_TIME.replace("outputs = 4", "outputs = [0.5,\n  0.25]"),
                               "time.outputs[1]", 18, "must increase"),
    "output-after-end": (GOOD_TIME.replace("outputs = 4", "outputs = [0.5, 2.0]"),
                         "time.outputs[1]", 17, "after end = 1 s"),
    "unknown-key": (GOOD_TIME.replace("step = 0.01", "stepp = 0.01"), "time.stepp", 15,
                    "unknown key; [time] takes end, step"),
    "probe-of-three-coordinates": (GOOD_TIME.replace("mid = [10.0, 1.0]", "mid = [10.0, 1, 0]"),
                                   "time.probes.mid", 21, "expected a point [x, y]"),
    "probe-outside": (GOOD_TIME.replace("mid = [10.0, 1.0]", "mid = [10.0, 3.0]"),
                      "time.probes.mid", 21, "(10, 3) mm is outside the mesh"),
    "probe-coordinate": (GOOD_TIME.replace("mid = [10.0, 1.0]", "mid = [10.0, true]"),
                         "time.probes.mid[1]", 21, "a coordinate"),
    "probes-not-a-table": (GOOD_TIME.replace("[time.probes]\nnear = [5.0, 1.0]\n"
                                             "mid = [10.0, 1.0]\n", "probes = 3\n"),
                           "time.probes", 19, "expected a [time.probes] table"),
    "no-density": (GOOD_TIME.replace("density = 8900.0\n", ""), "regions.copper.density", 5,
                   "every material needs its density (kg/m^3)"),
    "no-specific-heat": (GOOD_TIME.replace("specific_heat = 385.0\n", ""),
                         "regions.copper.specific_heat", 5, "specific_heat (J/(kg K))"),
    "negative-density": (GOOD_TIME.replace("density = 8900.0", "density = -1.0"),
                         "regions.copper.density", 7, "a density > 0 in kg/m^3"),
    "time-not-a-table": ("time = 3\n" + GOOD_TIME.split("[time]")[0], "time", 1,
                         "expected a table"),
}


@pytest.mark.parametrize("case", list(BAD_TIME))
def test_a_bad_time_table_names_the_key_and_line(bar, case, capsys):
    text, key, line, message = BAD_TIME[case]
    path = bar / "bad.toml"
    path.write_text(text)
    before = listing(bar)
    code, out, err = solve(capsys, path, "--out", bar / "bad-out")
    assert code == 2, err
    first = one_error(err)
    assert first.startswith(f"hatkernels: error: {path}, line {line}: {key}: "), first
    assert message in first, first
    assert out == "" and listing(bar) == before  # nothing written


def test_a_steady_file_with_until_needs_the_capacity(bar, capsys):
    # --until on a file without [time]: --initial is required, and a material without
    # density or specific heat is named
    steady = BAR.split("[time]")[0]
    (bar / "steady.toml").write_text(steady)
    code, _, err = solve(capsys, bar / "steady.toml", "--until", 1, "--out", bar / "s1")
    assert code == 2 and "needs --initial T0" in one_error(err)
    (bar / "steady.toml").write_text(steady.replace("density = 8900.0\n", ""))
    code, _, err = solve(capsys, bar / "steady.toml", "--until", 0.1, "--initial", 0, "--out",
                         bar / "s2")
    line = one_error(err)
    assert code == 2 and "[regions.copper] has no density" in line, line
    assert not (bar / "s1").exists() and not (bar / "s2").exists()
    # the time options alone are for a transient run
    code, _, err = solve(capsys, bar / "steady.toml", "--step", 0.1, "--out", bar / "s3")
    assert code == 2 and "--step applies to the transient mode only" in one_error(err)


# -- refusals and whole-or-nothing outputs ---------------------------------------------------

#: case -> (arguments, part of the message)
USAGE = {
    "step-without-until": (["--step", "1"], "--step applies to the transient mode only"),
    "probe-without-until": (["--probe", "1,2"], "--probe applies to the transient mode only"),
    "zero-until": (["--until", "0"], "--until must be > 0"),
    "negative-step": (["--until", "1", "--step", "-1"], "--step must be > 0"),
    "zero-outputs": (["--until", "1", "--outputs", "0"], "--outputs must be >= 1"),
    "zero-capacity": (["--until", "1", "--capacity", "0"], "--capacity must be > 0"),
    "unknown-scheme": (["--until", "1", "--scheme", "leapfrog"], "invalid choice: 'leapfrog'"),
    "probe-not-a-point": (["--until", "1", "--probe", "1;2"], "expected a point X,Y"),
    "probe-not-finite": (["--until", "1", "--probe", "nan,2"], "expected a point X,Y"),
    "probe-in-3-d-on-the-plate": (["--cells", "30", "--until", "1", "--probe", "1,2,3"],
                                  "3 coordinates on a 2-D mesh"),
    "probe-off-the-plate": (["--cells", "30", "--until", "1", "--probe", "130,40"],
                            "--probe 130,40: the point (130, 40) mm is outside the mesh"),
    "until-before-the-file-outputs": (["{bar}", "--until", "0.3"],
                                      "--until 0.3 comes before the file's output time 0.5 s"),
}


@pytest.mark.parametrize("case", list(USAGE))
def test_usage_errors_name_the_option(bar, tmp_path, case, capsys):
    (bar / "bar.toml").write_text(BAR)
    args, message = USAGE[case]
    code, out, err = solve(capsys, *[a.format(bar=bar / "bar.toml") for a in args], "--out",
                           tmp_path / "o")
    assert code == 2, err
    assert message in one_error(err)
    assert out == "" and not (tmp_path / "o").exists()
    assert os.listdir(tmp_path) == []  # no temporary directory left either


def test_under_mpiexec_the_transient_mode_is_refused(tmp_path, monkeypatch, capsys):
    # the launcher's environment of 2 ranks (MPICH's PMI_SIZE), read without MPI
    monkeypatch.setenv("PMI_SIZE", "2")
    monkeypatch.setenv("PMI_RANK", "0")
    code, out, err = solve(capsys, "--cells", 30, "--until", 1, "--out", tmp_path / "o")
    assert code == 2
    assert "the transient mode (--until) runs in one process" in one_error(err)
    assert out == "" and not (tmp_path / "o").exists()


def test_outputs_are_written_whole_or_not_at_all(tmp_path, monkeypatch, capsys):
    out = tmp_path / "o"
    args = ["--cells", 30, "--until", 0.5, "--outputs", 1, "--out", out]
    assert solve(capsys, *args)[0] == 0
    before = listing(tmp_path)
    code, _, err = solve(capsys, *args)  # an output exists: --force is needed
    assert code == 2 and "exists" in one_error(err)
    assert listing(tmp_path) == before

    def full(*a, **k):  # the disk fills while the figure is written, after the other files
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(plot, "probes_figure", full)
    monkeypatch.setattr(plot, "available", lambda: True)
    code, _, err = solve(capsys, *args, "--until", 0.7, "--force")
    assert code == 74
    assert "No space left on device" in one_error(err)
    assert listing(tmp_path) == before  # the earlier output, as it was


def test_without_the_optional_extras(tmp_path):
    # matplotlib and meshio missing: the march still runs and says what it did not write
    code = ("import sys; sys.modules['matplotlib'] = None; sys.modules['meshio'] = None;"
            "from hatkernels.cli import main;"
            f"sys.exit(main(['solve', '--cells', '30', '--until', '0.5', '--outputs', '1', "
            f"'--quiet', '--threads', '1', '--out', {str(tmp_path / 'o')!r}]))")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            timeout=600)
    assert result.returncode == 0, result.stderr
    assert set(os.listdir(tmp_path / "o")) == {"solution.npz", "summary.json", "probes.csv"}
    assert "not written: series.pvd and the .vtu files (meshio is not installed" in result.stdout
    assert "not written: probes.png (matplotlib is not installed" in result.stdout


def test_the_packaged_warm_up_ends_at_the_steady_packaged_case(tmp_path, capsys):
    # --scenario heated-insert-warmup: 10 minutes from 20 degC; by then the part is at the
    # temperatures of the steady packaged case (its slowest time constant is about 50 s)
    code, out, err = solve(capsys, "--scenario", "heated-insert-warmup", "--out",
                           tmp_path / "warm")
    assert code == 0, err
    code, _, err = solve(capsys, "--scenario", "heated-insert", "--out", tmp_path / "steady")
    assert code == 0, err
    warm = read_solution(tmp_path / "warm" / "solution.npz").point_data["u"]
    steady = read_solution(tmp_path / "steady" / "solution.npz").point_data["u"]
    assert np.abs(warm - steady).max() <= 1e-3  # degC, of a rise of about 20
    s = json.loads((tmp_path / "warm" / "summary.json").read_text())
    assert [p["name"] for p in s["probes"]] == ["heater", "top", "clamp"]
    assert s["outputs"][0]["probes"] == {"heater": 20.0, "top": 20.0, "clamp": 20.0}
    # 1000 W per metre of length for 600 s (the heater by hand: 5e6 W/m^3 x 20 mm x 10 mm)
    assert s["energy"]["total"]["heat_in"] == pytest.approx(6e5, rel=1e-12, abs=0)
    assert "copy heated-insert-warmup.toml and heated-insert.npz" in out


def test_an_insulated_body_in_time_keeps_every_joule(bar, capsys):
    # a [time] file needs no held or cooled tag: the capacity fixes the temperature.
    # Insulated all round with a uniform source, the bar heats uniformly, T = T0 + q t /
    # (rho c) at every point (the first law for each piece: common practice, no source);
    # with a flux into one end instead, all of it is stored (the first law)
    heated = (BAR.replace("[boundary.hot]\nheld = 100.0\n", "")
              .replace("specific_heat = 385.0\n", "specific_heat = 385.0\nsource = 1e6\n"))
    (bar / "insulated.toml").write_text(heated)
    code, _, err = solve(capsys, bar / "insulated.toml", "--out", bar / "ins")
    assert code == 0, err
    u = read_solution(bar / "ins" / "solution.npz").point_data["u"]
    rise = 1e6 * 1.0 / (8900.0 * 385.0)  # q t / (rho c) after 1 s
    assert np.abs(u - rise).max() <= 1e-6 * rise  # each step's CG stops at rtol 1e-6
    s = json.loads((bar / "ins" / "summary.json").read_text())
    assert s["energy"]["total"]["heat_out"] == pytest.approx(0.0, abs=1e-9)
    fed = BAR.replace("held = 100.0", "flux = 1e4")
    (bar / "fed.toml").write_text(fed)
    code, _, err = solve(capsys, bar / "fed.toml", "--out", bar / "fed")
    assert code == 0, err
    saved = read_solution(bar / "fed" / "solution.npz")
    came_in = 1e4 * 0.002 * 1.0  # W/m^2 over the 2 mm end for 1 s, per metre of thickness
    stored = 8900.0 * 385.0 * p1_integral(saved.mesh, saved.point_data["u"])
    assert stored == pytest.approx(came_in, rel=1e-6, abs=0)
    total = json.loads((bar / "fed" / "summary.json").read_text())["energy"]["total"]
    assert total["heat_in"] == pytest.approx(came_in, rel=1e-12, abs=0)
