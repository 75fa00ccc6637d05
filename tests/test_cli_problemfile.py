"""Problem files: ``hatkernels solve PROBLEM.toml``, the packaged case, and every bad file.

Two runs go through the command in a subprocess (the packaged case, a composite wall); the
rest reads files in this process (hatkernels.problemfile) or calls the command's main(), which
refuses a bad file before anything compiles.
"""

import datetime
import json
import os
import subprocess
import sys
import tomllib

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from hatkernels import cli, results
from hatkernels._keylines import key_lines
from hatkernels.cases import heated_insert_mesh
from hatkernels.io import read_mesh, read_solution, write_mesh
from hatkernels.mesh import cuboid, rectangle
from hatkernels.mesh.tags import label_cells, label_sides
from hatkernels.plot import region_outlines
from hatkernels.problemfile import ProblemFileError, case_file, read_problem

SOLVE_FILES = {"solution.npz", "summary.json", "solution.png", "residuals.png", "solution.vtu"}


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "hatkernels.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, timeout=600)


def write(path, text):
    path.write_text(text)
    return path


def listing(folder):
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


# -- the packaged case ------------------------------------------------------------------


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """``hatkernels solve --scenario heated-insert``, run once."""
    base = tmp_path_factory.mktemp("demo")
    result = run("solve", "--scenario", "heated-insert", "--out", base / "out")
    return result, base / "out"


def test_the_demo_case_runs_and_its_balance_closes(demo):
    result, out = demo
    assert result.returncode == 0, result.stderr
    assert set(os.listdir(out)) == SOLVE_FILES
    summary = json.loads((out / "summary.json").read_text())
    b = summary["balance"]
    assert b["relative"] < 1e-8  # sources = heat out + absorbed, to the solver's tolerance
    # the heater by hand: 5e6 W/m^3 over 20 mm x 10 mm = 1000 W per metre of length
    assert b["sources"] == pytest.approx(5e6 * 0.020 * 0.010, rel=1e-12, abs=0)
    out_by_tag = {e["label"]: e for e in b["boundary"]}
    assert out_by_tag["bottom (3)"]["condition"] == "insulated"
    assert out_by_tag["bottom (3)"]["outflow"] == 0.0
    assert out_by_tag["clamp (1)"]["outflow"] + out_by_tag["top (2)"]["outflow"] == \
        pytest.approx(b["sources"], rel=1e-8, abs=0)
    # the clamp holds 20 degC; nothing in the body is colder (maximum principle: common
    # practice, no source) and the heater's region is the hottest
    regions = {r["label"]: r for r in b["regions"]}
    assert min(r["u_min"] for r in regions.values()) == pytest.approx(20.0, abs=1e-9)
    assert regions["insert (2)"]["u_max"] == pytest.approx(summary["solution"]["max"], rel=1e-15)
    assert "qualified person" in summary["caution"]
    text = result.stdout
    for phrase in ("heated insert", "plate (1)", "insert (2)", "clamp (1)", "top (2)",
                   "insulated", "W per metre of thickness", "held at 20 degC",
                   "convection, h = 10 W/(m^2 K) to 25 degC", "balance", "sources 1000 W/m",
                   "copy heated-insert.toml and heated-insert.npz", "CAUTION",
                   "local codes and licensed practice"):
        assert phrase in text, phrase
    saved = read_solution(out / "solution.npz")
    mesh = read_mesh(case_file("heated-insert").replace(".toml", ".npz"))
    assert np.array_equal(saved.cell_data["region"], mesh.regions)
    assert np.allclose(saved.mesh.points, mesh.points * 1e-3, rtol=0, atol=1e-15)  # mm -> m


def test_the_packaged_mesh_is_what_its_builder_makes():
    path = case_file("heated-insert").replace(".toml", ".npz")
    assert os.path.getsize(path) < 200_000
    shipped, built = read_mesh(path), heated_insert_mesh()
    assert np.array_equal(shipped.points, built.points)
    assert np.array_equal(shipped.cells, built.cells)
    assert np.array_equal(shipped.regions, built.regions)
    assert np.array_equal(shipped.tags.sides, built.tags.sides)
    assert np.array_equal(shipped.tags.side_tags, built.tags.side_tags)
    assert dict(shipped.tags.side_names) == dict(built.tags.side_names)


# -- a composite wall -------------------------------------------------------------------

L1, L2, H = 0.02, 0.03, 0.01  # metres
K1, K2 = 50.0, 2.0  # W/(m K)
T_HOT, T_COLD = 100.0, 20.0


def wall_mesh(scale=1.0):
    """Two layers side by side, the interface x = L1 on a mesh line; coordinates / ``scale``."""
    mesh = rectangle(10, 2, bounds=(0.0, (L1 + L2) / scale, 0.0, H / scale))
    mesh = label_cells(mesh, {"first": lambda x, y: x < L1 / scale,
                              "second": lambda x, y: x > L1 / scale})
    return label_sides(mesh, {"hot": lambda x, y: x == 0,
                              "cold": lambda x, y: np.isclose(x, (L1 + L2) / scale)})


def test_a_composite_wall_gives_the_piecewise_linear_temperature(tmp_path):
    # The composite wall (Incropera and DeWitt, Fundamentals of Heat and Mass Transfer,
    # 6th ed., 2007, section 3.1): in series, q'' = (T1 - T2) / (L1/k1 + L2/k2) and the
    # temperature is linear in each layer.  The second layer's conductivity is a diagonal
    # tensor: along x only k_xx acts (common practice, no source).
    write_mesh(tmp_path / "wall.npz", wall_mesh())
    write(tmp_path / "wall.toml", f"""
title = "composite wall"
mesh = "wall.npz"

[regions.first]
conductivity = {K1}

[regions.layer]
tags = ["second"]
conductivity = [[{K2}, 0.0], [0.0, {3 * K2}]]

[boundary.hot]
held = {T_HOT}

[boundary.cold]
held = {T_COLD}

[solver]
preconditioner = "jacobi"
rtol = 1e-3
maxiter = 5000

[output]
directory = "wall-out"
""")
    result = run("solve", "wall.toml", "--rtol", "1e-12", "--quiet", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    out = tmp_path / "wall-out"  # the file's directory, under the current one
    summary = json.loads((out / "summary.json").read_text())
    assert summary["solver"]["requested"] == "jacobi"  # from the file
    assert summary["solver"]["rtol"] == 1e-12  # the command line over the file
    assert summary["solver"]["maxiter"] == 5000
    flux = (T_HOT - T_COLD) / (L1 / K1 + L2 / K2)  # W/m^2
    saved = read_solution(out / "solution.npz")
    x = saved.mesh.points[:, 0]
    exact = np.where(x <= L1, T_HOT - flux * x / K1,
                     T_HOT - flux * L1 / K1 - flux * (x - L1) / K2)
    assert np.abs(saved.point_data["u"] - exact).max() <= 1e-8 * T_HOT
    flows = {e["label"]: e["outflow"] for e in summary["balance"]["boundary"]}
    # per metre of depth: the flux times the wall's height H
    assert flows["cold (2)"] == pytest.approx(flux * H, rel=1e-8, abs=0)
    assert flows["hot (1)"] == pytest.approx(-flux * H, rel=1e-8, abs=0)
    assert "W per metre of thickness" in result.stdout
    assert "first (1)" in result.stdout and "second (2)" in result.stdout


def test_length_unit_scales_the_mesh_to_metres(tmp_path):
    # A plane wall with uniform generation q between two faces held at 0 (Incropera and
    # DeWitt, 6th ed., 2007, section 3.5.1): T(x) = q x (L - x) / (2 k), and each face
    # carries q L H / 2 per metre of depth.  The same wall as a mesh in metres and in
    # millimetres (length_unit = "mm") gives the same temperatures and heat flows.
    q, k = 4e6, 20.0
    text = ('mesh = "{name}"\nlength_unit = "{unit}"\n[regions.first]\nconductivity = {k}\n'
            'source = {q}\n[regions.second]\nconductivity = {k}\nsource = {q}\n'
            '[boundary.ends]\ntags = ["hot", "cold"]\nheld = 0.0\n')
    solved = {}
    for unit, scale in (("m", 1.0), ("mm", 1e-3)):
        write_mesh(tmp_path / f"{unit}.npz", wall_mesh(scale))
        path = write(tmp_path / f"{unit}.toml", text.format(name=f"{unit}.npz", unit=unit,
                                                           k=k, q=q))
        problem = read_problem(path)
        sol = problem.solve(rtol=1e-12)
        solved[unit] = (sol, results.balance(sol))
    (sol_m, b_m), (sol_mm, b_mm) = solved["m"], solved["mm"]
    L = L1 + L2
    assert np.allclose(sol_mm.mesh.points, sol_m.mesh.points, rtol=1e-15, atol=1e-18)
    assert np.abs(sol_mm.u - sol_m.u).max() <= 1e-9 * sol_m.u.max()
    x = sol_m.mesh.points[:, 0]
    assert np.abs(sol_m.u - q * x * (L - x) / (2 * k)).max() <= 1e-6 * q * L**2 / (8 * k)
    for b in (b_m, b_mm):
        assert b.sources == pytest.approx(q * L * H, rel=1e-12, abs=0)
        assert [e.outflow for e in b.boundary] == pytest.approx([q * L * H / 2] * 2, rel=1e-8,
                                                                abs=0)


def test_a_tetrahedral_file_with_a_tensor(tmp_path):
    # 1-D conduction through a cube held at 1 and 0 on two faces, the others insulated:
    # the heat flow is k_xx A dT / L whatever k_yy and k_zz are (Incropera and DeWitt,
    # 6th ed., 2007, section 3.1; the tensor: common practice, no source).
    mesh = label_sides(cuboid(3, 2, 2), {"a": lambda x, y, z: x == 0,
                                         "b": lambda x, y, z: x == 1})
    write_mesh(tmp_path / "cube.npz", mesh)
    path = write(tmp_path / "cube.toml",
                 'mesh = "cube.npz"\n[regions.metal]\n'
                 'conductivity = [[3.0, 0, 0], [0, 5.0, 0], [0, 0, 7.0]]\n'
                 '[boundary.a]\nheld = 1.0\n[boundary.b]\nheld = 0.0\n')
    b = results.balance(read_problem(path).solve(rtol=1e-12))
    assert [e.outflow for e in b.boundary] == pytest.approx([-3.0, 3.0], rel=1e-9, abs=0)
    assert b.regions[0].label == "metal (1)"  # an untagged mesh is one region, named


# -- bad files: one line naming the file, the line and the key; nothing written ---------

GOOD = """\
title = "bar"
mesh = "bar.npz"
length_unit = "m"

[regions.copper]
conductivity = 400.0
source = 1e5

[boundary.cold]
held = 0.0

[boundary.warm]
film = 10.0
ambient = 30.0
"""

# case -> (text, key, line, part of the message)
BAD = {
    "syntax": (GOOD.replace("held = 0.0", "held = = 0.0"), "", 10, "TOML syntax"),
    "unknown-top-level-key": ("colour = 3\n" + GOOD, "colour", 1, "unknown key"),
    "unknown-key-in-a-table": (GOOD.replace("source = 1e5", "sorce = 1e5"),
                               "regions.copper.sorce", 7, "takes tags, conductivity, source"),
    "wrong-type": (GOOD.replace("conductivity = 400.0", 'conductivity = "400"'),
                   "regions.copper.conductivity", 6, "got a string '400'"),
    "missing-mesh-key": (GOOD.replace('mesh = "bar.npz"\n', ""), "mesh", 1, "missing"),
    "mesh-file-missing": (GOOD.replace("bar.npz", "nothere.npz"), "mesh", 2, "not found"),
    "region-without-material": (GOOD.replace('mesh = "bar.npz"', 'mesh = "two.npz"'),
                                "regions", 5, "region right (2) of the mesh has no material"),
    "region-the-mesh-lacks": (GOOD.replace("[regions.copper]", "[regions.brass]"),
                              "regions.brass", 5, "no region tag 'brass'"),
    "tag-the-mesh-lacks": (GOOD.replace("[boundary.warm]", "[boundary.hot]"),
                           "boundary.hot", 12, "no boundary tag 'hot'"),
    "tag-number-the-mesh-lacks": (GOOD.replace("[boundary.warm]",
                                               "[boundary.warm]\ntags = [2, 7]"),
                                  "boundary.warm.tags[1]", 13, "no boundary tag 7"),
    "two-conditions": (GOOD.replace("held = 0.0", "held = 0.0\nflux = 5.0"),
                       "boundary.cold.flux", 11, "two conditions (held and flux)"),
    "film-without-ambient": (GOOD.replace("ambient = 30.0\n", ""), "boundary.warm.film", 13,
                             "film needs ambient"),
    "ambient-without-film": (GOOD.replace("held = 0.0", "held = 0.0\nambient = 3.0"),
                             "boundary.cold.ambient", 11, "ambient goes with film"),
    "negative-conductivity": (GOOD.replace("400.0", "-400.0"), "regions.copper.conductivity", 6,
                              "expected a positive number"),
    "tensor-not-positive-definite": (
        GOOD.replace("400.0", "[[1.0, 2.0],\n  [2.0, 1.0]]"), "regions.copper.conductivity", 6,
        "not positive definite"),
    "tensor-not-symmetric": (GOOD.replace("400.0", "[[1.0, 0.5], [0.0, 1.0]]"),
                             "regions.copper.conductivity", 6, "not symmetric"),
    "tensor-of-the-wrong-size": (GOOD.replace("400.0", "[[1, 0, 0], [0, 1, 0], [0, 0, 1]]"),
                                 "regions.copper.conductivity", 6, "3x3 tensor on a 2-D mesh"),
    "tensor-entry": (GOOD.replace("400.0", "[[1.0, 0.0],\n [0.0, true]]"),
                     "regions.copper.conductivity[1][1]", 7, "expected a finite number"),
    "bad-length-unit": (GOOD.replace('"m"', '"inch"'), "length_unit", 3,
                        "expected one of 'm', 'cm', 'mm', 'um'"),
    "bad-refine": ("refine = -1\n" + GOOD, "refine", 1, "expected an integer >= 0"),
    "nothing-holds-the-temperature": (GOOD.replace("held = 0.0", "flux = 1.0").replace(
        "film = 10.0\nambient = 30.0", "flux = 2.0"), "boundary", 9, "no boundary tag is held"),
    "two-materials-for-a-region": (GOOD + '[regions.again]\ntags = ["copper"]\n'
                                   "conductivity = 1.0\n", "regions.again", 15,
                                   "already has a material"),
    "a-tag-in-two-tables": (GOOD + "[boundary.both]\ntags = [1]\nheld = 3.0\n",
                            "boundary.both", 15, "already has a condition"),
    "unknown-preconditioner": (GOOD + '[solver]\npreconditioner = "magic"\n',
                               "solver.preconditioner", 16, "expected one of"),
    "bad-rtol": (GOOD + "[solver]\nrtol = 0\n", "solver.rtol", 16, "relative tolerance > 0"),
    "inline-table": (GOOD.replace("[boundary.warm]\nfilm = 10.0\nambient = 30.0\n",
                                  "[boundary]\nwarm = { film = 10.0, ambiant = 30.0 }\n"),
                     "boundary.warm.ambiant", 13, "unknown key"),
}


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """The bar's meshes: one region, boundary tags cold (1) and warm (2); and two regions."""
    tmp_path = tmp_path_factory.mktemp("bar")
    bar = label_sides(rectangle(4, 1), {"cold": lambda x, y: x == 0,
                                        "warm": lambda x, y: x == 1})
    write_mesh(tmp_path / "bar.npz", bar.with_tags(
        regions=np.ones(bar.n_cells, int), region_names={"copper": 1},
        sides=bar.tags.sides, side_tags=bar.tags.side_tags, side_names={"cold": 1, "warm": 2}))
    write_mesh(tmp_path / "two.npz", label_cells(bar, {"copper": lambda x, y: x < 0.5,
                                                       "right": lambda x, y: x >= 0.5}))
    return tmp_path


def test_the_good_file_is_good(files):
    problem = read_problem(write(files / "bar.toml", GOOD))
    assert [m.name for m in problem.materials] == ["copper"]
    assert [c.describe() for c in problem.conditions] == [
        "held at 0 degC", "convection, h = 10 W/(m^2 K) to 30 degC"]
    assert problem.insulated_tags() == []
    # a byte-order mark first (some editors write one) is not an error
    (files / "bom.toml").write_bytes(b"\xef\xbb\xbf" + GOOD.encode())
    assert read_problem(files / "bom.toml").materials == problem.materials


@pytest.mark.parametrize("case", list(BAD))
def test_a_bad_file_exits_2_naming_the_key_and_line(files, case, capsys):
    text, key, line, message = BAD[case]
    path = write(files / "bar.toml", text)
    before = listing(files)
    code = cli.main(["solve", str(path), "--quiet", "--out", str(files / "out")])
    err = capsys.readouterr()
    assert code == 2, err.err
    lines = err.err.strip().splitlines()
    assert len(lines) == 1, err.err
    where = f"hatkernels: error: {path}, line {line}: " + (f"{key}: " if key else "")
    assert lines[0].startswith(where), lines[0]
    assert message in lines[0], lines[0]
    assert err.out == ""
    assert listing(files) == before  # nothing written


def test_a_bad_toml_syntax_names_tomllib_line(files):
    text = GOOD.replace('title = "bar"', 'title = "bar')
    with pytest.raises(ProblemFileError) as caught:
        read_problem(write(files / "bar.toml", text))
    assert caught.value.line == 1 and "TOML syntax" in str(caught.value)


#: Values of every TOML type, and where a good file has each kind of value.
TOML_VALUES = st.one_of(
    st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True),
    st.text(st.characters(blacklist_categories=("Cs", "Cc")), max_size=8), st.dates(), st.lists(st.integers(-3, 3), max_size=3),
    st.dictionaries(st.sampled_from(["a", "b"]), st.integers(0, 3), max_size=2))
SLOTS = {  # key -> (line in GOOD, the values it takes)
    "title": (1, lambda v: isinstance(v, str) and v.strip()),
    "mesh": (2, lambda v: v == "bar.npz"),  # any other value names no mesh file
    "length_unit": (3, lambda v: v in ("m", "cm", "mm", "um")),
    "regions.copper.conductivity": (6, lambda v: isinstance(v, (int, float))
                                    and not isinstance(v, bool) and 0 < v < float("inf")),
    "regions.copper.source": (7, lambda v: isinstance(v, (int, float))
                              and not isinstance(v, bool) and abs(v) < float("inf")),
    "boundary.cold.held": (10, lambda v: isinstance(v, (int, float))
                           and not isinstance(v, bool) and abs(v) < float("inf")),
    "boundary.warm.film": (13, lambda v: isinstance(v, (int, float))
                           and not isinstance(v, bool) and 0 < v < float("inf")),
}


def toml_value(v):
    """``v`` written as a TOML value."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return "nan" if v != v else ("inf" if v > 0 else "-inf") if abs(v) == float("inf") \
            else repr(v)
    if isinstance(v, (int, datetime.date)):
        return str(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    return "{ " + ", ".join(f"{k} = {toml_value(x)}" for k, x in v.items()) + " }"


@given(slot=st.sampled_from(sorted(SLOTS)), value=TOML_VALUES)
def test_fuzzed_values_are_refused_at_their_key(files, slot, value):
    line, fits = SLOTS[slot]
    name = slot.rsplit(".", 1)[-1]
    lines = GOOD.splitlines()
    assert lines[line - 1].startswith(f"{name} = ")
    lines[line - 1] = f"{name} = {toml_value(value)}"
    text = "\n".join(lines) + "\n"
    assert tomllib.loads(text)  # the fuzzed file is valid TOML
    path = write(files / "fuzz.toml", text)
    if fits(value):
        read_problem(path)
        return
    with pytest.raises(ProblemFileError) as caught:
        read_problem(path)
    assert caught.value.key.startswith(slot) and caught.value.line == line, str(caught.value)


# -- the lines of keys ---------------------------------------------------------------------

#: Keys as written and as tomllib decodes them (quoted keys may hold dots, spaces, '=').
KEY_SPELLINGS = {"k": "k", "x_1": "x_1", '"q = r"': "q = r", "'lit'": "lit", '"a.b"': "a.b"}
FILLERS = ["", "   ", "# a comment = [x] {y}", "\t# another"]


@st.composite
def documents(draw):
    """A TOML text of tables and values of every shape, and the line where each key is."""
    lines, where = [], {}

    def pairs(prefix):
        for spelled in draw(st.lists(st.sampled_from(sorted(KEY_SPELLINGS)), unique=True,
                                     max_size=3)):
            lines.extend(draw(st.lists(st.sampled_from(FILLERS), max_size=2)))
            path = prefix + (KEY_SPELLINGS[spelled],)
            kind = draw(st.sampled_from(["number", "string", "long", "array", "inline"]))
            where[path] = len(lines) + 1
            if kind == "number":
                lines.append(f"{spelled} = 3  # = not a key")
            elif kind == "string":
                lines.append(f'{spelled} = "a = [b] # \\" c"')
            elif kind == "long":
                lines.extend([f'{spelled} = """first', "fake = [1]", '[not.a.table]"""'])
            elif kind == "array":
                lines.extend([f"{spelled} = [1,", "  # inside", " [2, 3] ]"])
                where[path + (0,)] = len(lines) - 2
                where[path + (1,)] = where[path + (1, 0)] = where[path + (1, 1)] = len(lines)
            else:
                lines.append(f"{spelled} = {{ a = 1, 'b c' = [2], d.e = \"}}\" }}")
                for sub in (("a",), ("b c",), ("b c", 0), ("d",), ("d", "e")):
                    where[path + sub] = len(lines)

    pairs(())
    for spelled in draw(st.lists(st.sampled_from(sorted(KEY_SPELLINGS)), unique=True,
                                 max_size=3)):
        lines.extend(draw(st.lists(st.sampled_from(FILLERS), max_size=2)))
        lines.append(f"[ tables . {spelled} ]")
        where[("tables", KEY_SPELLINGS[spelled])] = len(lines)
        where.setdefault(("tables",), len(lines))
        pairs(("tables", KEY_SPELLINGS[spelled]))
    return "\n".join(lines) + "\n", where


@given(documents())
def test_key_lines_are_where_the_keys_are_written(document):
    # the lines are known by construction; tomllib checks the text is valid TOML
    text, where = document
    tomllib.loads(text)
    found = key_lines(text)
    assert {path: found.get(path) for path in where} == where


# -- the command line around a problem file ---------------------------------------------

USAGE = {
    "with-mesh": (["--mesh", "x.npz"], "--mesh cannot be combined with PROBLEM.toml"),
    "with-cells": (["--cells", "8"], "--cells cannot be combined"),
    "with-data": (["--source", "1", "--film", "2"], "--source and --film cannot be combined"),
    "with-scenario": (["--scenario", "plate"], "PROBLEM.toml (bar.toml) and --scenario"),
}


@pytest.mark.parametrize("case", list(USAGE))
def test_options_a_problem_file_excludes(files, case, capsys, monkeypatch):
    extra, message = USAGE[case]
    write(files / "bar.toml", GOOD)
    before = listing(files)
    monkeypatch.chdir(files)
    assert cli.main(["solve", "bar.toml", *extra, "--quiet", "--out", "o"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0], err
    assert listing(files) == before


def test_a_packaged_case_excludes_scenario_data(capsys):
    assert cli.main(["solve", "--scenario", "heated-insert", "--conductivity", "3",
                     "--quiet"]) == 2
    assert "--conductivity cannot be combined with --scenario heated-insert" in \
        capsys.readouterr().err


# -- the picture's outlines ---------------------------------------------------------------


def test_region_outlines_are_the_interface_and_the_boundary():
    # a 6 x 3 grid split at x = 1/2: the boundary has 2 (6 + 3) edges and the interface
    # 3, the grid's vertical edges at x = 1/2 (counted by hand)
    mesh = label_cells(rectangle(6, 3), {"a": lambda x, y: x < 0.5, "b": lambda x, y: x > 0.5})
    segments = region_outlines(mesh)
    assert len(segments) == 2 * (6 + 3) + 3
    inner = [s for s in segments if np.all(np.abs(s[:, 0] - 0.5) < 1e-12)]
    assert len(inner) == 3
    assert len(region_outlines(rectangle(6, 3))) == 0
