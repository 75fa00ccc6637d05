"""bench/report.py: tables, ratios and plots from saved pytest-benchmark output; bad input.

Two inputs.  A small hand-made file (:func:`hand_made`): a dozen benchmarks with
round times chosen so that every ratio, percentage and verdict the report
prints is worked out by hand in the comments beside them (common practice, no
source); the tests compare the report's cells with those hand-written values,
not with the report's own rules re-implemented.  And tests/data/bench_quick.json,
a real ``--size quick`` run of the benchmark suite trimmed to about fifty
benchmarks, for what only a real file shows: every section and plot is made,
and the rows are where they belong.  Nothing here times anything: speed is
measured in bench/, these tests check the arithmetic and the files the report
writes.  Only the plots need matplotlib; the tables are tested without it.
"""

import importlib.util
import json
import os
import struct
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data" / "bench_quick.json"


def _load_report():
    spec = importlib.util.spec_from_file_location("bench_report", ROOT / "bench" / "report.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


report = _load_report()


def _row(markdown, prefix):
    rows = [line for line in markdown.splitlines() if line.startswith(prefix)]
    assert len(rows) == 1, f"expected one row starting {prefix!r}, found {rows}"
    return [c.strip() for c in rows[0].strip("|").split("|")]


MIB = 2**20


def _entry(kind, method, seconds, **info):
    """One benchmark as pytest-benchmark saves it, with this suite's extra_info."""
    name = f"test_{kind}[{method}-" + "-".join(f"{k}={v}" for k, v in sorted(info.items())) + "]"
    return {"name": name, "fullname": f"bench/hand.py::{name}", "stats": {"min": seconds},
            "extra_info": {"kind": kind, "method": method, **info}}


def hand_made():
    """The hand-made benchmarks; every expected figure is derived in the tests' comments."""
    at = {"n_triangles": 2_000_000, "operation": "stiffness"}
    benches = [
        # assembly of rectangle(1000, 1000): the three sizes the targets name
        _entry("assembly", "triplets", 4.0, threads=2, plain=True, peak_bytes=3 * 2**30, **at),
        _entry("assembly", "csr-first-call", 1.0, threads=2, baseline="triplets",
               peak_bytes=2**30, fraction_of_floor=0.123, **at),
        _entry("assembly", "csr", 0.16, threads=2, baseline="triplets", **at),
        _entry("assembly", "csr-data", 0.125, threads=2, baseline="triplets", **at),
        # whole solves: 250 thousand, 1 million, 62 thousand and 4 million unknowns
        _entry("solve", "superlu", 6.0, unknowns=249_001, n_triangles=500_000, threads=2,
               plain=True, setup_s=5.0, solve_s=0.2),
        _entry("solve", "amg", 0.5, unknowns=249_001, n_triangles=500_000, threads=2,
               baseline="superlu", default=True, iterations=9, setup_s=0.1, solve_s=0.3),
        _entry("solve", "amg", 0.8, unknowns=249_001, n_triangles=500_000, threads=1,
               baseline="superlu", default=True, iterations=9, setup_s=0.2, solve_s=0.5),
        _entry("solve", "amg", 2.0, unknowns=998_001, n_triangles=2_000_000, threads=2,
               baseline="pyamg-rs", iterations=11, setup_s=0.5, solve_s=1.2),
        _entry("solve", "pyamg-rs", 2.8, unknowns=998_001, n_triangles=2_000_000, threads=2,
               plain=True, setup_s=1.0, solve_s=1.55),
        _entry("solve", "pyamg-sa", 3.5, unknowns=998_001, n_triangles=2_000_000, threads=2,
               plain=True),
        _entry("solve", "amg", 0.062, unknowns=62_001, n_triangles=125_000, threads=2,
               iterations=10),
        _entry("solve", "amg", 4.8, unknowns=3_996_001, n_triangles=8_000_000, threads=2,
               iterations=12),
        _entry("solve", "gmg", 1.0, unknowns=1_996_001, n_triangles=4_000_000, threads=2,
               iterations=7, peak_bytes=200 * MIB),
        _entry("solve", "amg-sa", 2.5, unknowns=1_996_001, n_triangles=4_000_000, threads=2,
               iterations=15, peak_bytes=1000 * MIB),
    ]
    # stiffness products at rectangle(1000, 1000), in both numberings
    for mesh, geometry in (("rectangle", 0.009), ("refined", 0.011)):
        common = {"n_triangles": 2_000_000, "mesh": mesh, "threads": 2,
                  "csr_stored_bytes": 100 * MIB}
        benches.append(_entry("product", "scipy", 0.010, plain=True, stored_bytes=100 * MIB,
                              **common))
        benches.append(_entry("product", "geometry", geometry, baseline="scipy",
                              stored_bytes=40 * MIB, **common))
    return {"benchmarks": benches}


@pytest.fixture(scope="module")
def hand(tmp_path_factory):
    """The report of the hand-made file, tables only (no matplotlib needed)."""
    d = tmp_path_factory.mktemp("hand")
    data = d / "hand.json"
    data.write_text(json.dumps(hand_made()), encoding="utf-8")
    out = d / "performance.md"
    assert report.main([str(data), "--out", str(out)]) == 0
    return out.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    """The report of the real quick run, tables only (no matplotlib needed)."""
    out = tmp_path_factory.mktemp("tables") / "performance.md"
    assert report.main([str(DATA), "--out", str(out)]) == 0
    return out.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    """The report of the real quick run with its plots: the one fixture that needs matplotlib."""
    pytest.importorskip("matplotlib")
    d = tmp_path_factory.mktemp("report")
    images = d / "images"
    images.mkdir()
    out = d / "performance.md"
    assert report.main([str(DATA), "--out", str(out), "--images", str(images)]) == 0
    return out.read_text(encoding="utf-8"), images


def test_assembly_ratios_by_hand(hand):
    # vs triplets = triplets' time / this time: 4.0 / 1.0 = 4.00 (two decimals below 10),
    # 4.0 / 0.16 = 25.0 and 4.0 / 0.125 = 32.0 (one decimal from 10 up).
    cells = _row(hand, "| 2,000,000 | `csr-first-call` | 2 |")
    assert cells[3:6] == ["1.00 s", "4.00×", "12.3 %"]  # fraction_of_floor 0.123
    # peak 1 GiB = 1024.0 MiB; per triangle 2**30 / 2e6 = 536.87, shown 537
    assert cells[7:9] == ["1024.0", "537"]
    assert _row(hand, "| 2,000,000 | `csr` | 2 |")[3:5] == ["160.00 ms", "25.0×"]
    assert _row(hand, "| 2,000,000 | `csr-data` | 2 |")[3:5] == ["125.00 ms", "32.0×"]
    triplets = _row(hand, "| 2,000,000 | `triplets` | 2 |")
    assert triplets[4] == "1 (plain)" and triplets[7:9] == ["3072.0", "1,611"]  # 3 GiB / 2e6


def test_solve_ratios_by_hand(hand):
    # amg at 249,001 unknowns on 2 threads (the row shown: most threads): superlu's
    # 6.0 s / 0.5 s = 12.0 times faster; 0.5 s / 249,001 unknowns = 2.008 µs per unknown
    cells = _row(hand, "| 249,001 | `amg` (default) |")
    assert cells[2] == "9" and cells[6] == "500.00 ms" and cells[7] == "—"
    assert cells[8] == "12.0×" and cells[9] == "2.008"
    assert _row(hand, "| 249,001 | `superlu` |")[8] == "1 (plain)"
    # 1 million: pyamg-rs 2.8 s / amg 2.0 s = 1.40
    assert _row(hand, "| 998,001 | `amg` |")[8] == "1.40×"


def test_thread_scaling_by_hand(hand):
    # amg at 249,001 unknowns: 0.8 s on 1 thread, 0.5 s on 2: 0.8 / 0.5 = 1.60 times
    cells = _row(hand, "| solve | None | `amg` | 249,001 unknowns |")
    assert cells[-3:] == ["800.00 ms", "500.00 ms (2)", "1.60×"]


def _target(markdown, start):
    section = markdown.split("### Targets", 1)[1].split("###", 1)[0]
    rows = [r for r in section.splitlines() if r.startswith("| " + start)]
    assert len(rows) == 1, (start, section)
    return [c.strip() for c in rows[0].strip("|").split("|")]


# Each target, its figure and its verdict, worked out by hand from hand_made().
HAND_TARGETS = [
    # 4.0 s / 0.16 s = 25.0 >= 20; csr-data 4.0 / 0.125 = 32.0
    ("csr numeric re-assembly", "160.00 ms against 4.00 s: 25.0×; into an existing array "
     "(`csr-data`) 32.0×", "**met**"),
    # 4.0 s / 1.0 s = 4.00 < 5
    ("csr first call", "1.00 s against 4.00 s: 4.00×", "**not met**"),
    # 1 GiB / 3 GiB = 1/3 exactly (a power of two times 1/3 on both sides): at the bound,
    # which "at most 1/3" allows
    ("csr peak memory", "1024.0 MiB against 3072.0 MiB: 0.33", "**met**"),
    # 6.0 / 0.5 = 12.0 >= 10; setup + solve alone (5.0 + 0.2) / (0.1 + 0.3) = 13.0
    ("default pipeline (`amg`) ≥ 10×", "end to end 500.00 ms against 6.00 s: 12.0×; setup + "
     "solve alone 13.0×", "**met**"),
    # the faster PyAMG, pyamg-rs 2.8 s, over amg 2.0 s: 1.40 < 1.5; setup + solve alone
    # (1.0 + 1.55) / (0.5 + 1.2) = 2.55 / 1.7 = 1.50
    ("default pipeline ≥ 1.5×", "end to end 2.00 s against `pyamg-rs` 2.80 s (the faster "
     "PyAMG): 1.40×; setup + solve alone 1.50×", "**not met**"),
    # 10 -> 12 iterations: 1.20 < 1.3
    ("AMG iterations", "10 → 12 iterations: 1.20×", "**met**"),
    # 0.062 s / 62,001 = 1.000 µs; 4.8 s / 3,996,001 = 1.201 µs; 1.201 / 1.000 = 1.20 < 1.3
    ("AMG time per unknown", "1.000 → 1.201 µs per unknown: 1.20×", "**met**"),
    # rectangle: geometry 9 ms <= scipy 10 ms, storing 40 / 100 = 0.40 <= 0.5; refined:
    # 11 ms > 10 ms, so no variant qualifies there, and the target asks for both
    ("a matrix-free variant", "rectangle: `geometry` 9.00 ms, stores 0.40 of CSR, against "
     "scipy's best 10.00 ms; refined: none; fastest `geometry` 11.00 ms against scipy's "
     "best 10.00 ms", "**not met**"),
    # amg-sa 2.5 s / gmg 1.0 s = 2.50 >= 2; peak 200 / 1000 MiB = 0.20 <= 1/4
    ("CG + gmg", "1.00 s against `amg-sa` 2.50 s: 2.50×; peak 200.0 against 1000.0 MiB: 0.20",
     "**met**"),
]


@pytest.mark.parametrize("start, measured, verdict", HAND_TARGETS,
                         ids=[t[0].split(" (")[0] for t in HAND_TARGETS])
def test_targets_by_hand(hand, start, measured, verdict):
    cells = _target(hand, start)
    assert cells[1] == measured
    assert cells[2] == verdict


def test_a_solve_without_its_phases_gets_a_dash_not_a_crash(tmp_path):
    # files from before the phases were recorded: the ratio of setup + solve is unknown
    data = hand_made()
    for b in data["benchmarks"]:
        b["extra_info"].pop("setup_s", None)
        b["extra_info"].pop("solve_s", None)
    path = tmp_path / "old.json"
    path.write_text(json.dumps(data), encoding="utf-8")
    out = tmp_path / "perf.md"
    assert report.main([str(path), "--out", str(out)]) == 0
    cells = _target(out.read_text(encoding="utf-8"), "default pipeline (`amg`) ≥ 10×")
    assert cells[1] == "end to end 500.00 ms against 6.00 s: 12.0×; setup + solve alone —"


def test_the_huge_target_unmeasured_without_its_file(hand):
    assert _target(hand, "the 1.3e8-triangle solve")[2] == "not measured"


def test_the_real_quick_run_makes_every_table(tables):
    # a real run: every section, every assembly row where it belongs; the quick set has
    # none of the sizes the targets name but the products' target
    for title in ("### Targets", "### Assembly", "### Products", "### Whole solves",
                  "### Thread scaling"):
        assert title in tables, title
    for n in ("20,000", "80,000"):
        for strategy, threads in [("triplets", 2), ("csr-first-call", 1), ("csr-first-call", 2),
                                  ("csr", 2), ("csr-data", 1), ("csr-data", 2), ("csr-fused", 2)]:
            _row(tables, f"| {n} | `{strategy}` | {threads} |")
    assert _row(tables, "| 80,000 | `triplets` | 2 |")[4] == "1 (plain)"
    assert _row(tables, "| 39,601 | `amg` (default) |")[7] == "—"  # in-process: no cold round
    assert _row(tables, "| 39,601 | `superlu` |")[2] == "—"  # a direct solve has no iterations
    assert len(_row(tables, "| `gmg` | ")) == 3  # the method and the two sizes of the quick set
    section = tables.split("### Targets", 1)[1].split("###", 1)[0]
    rows = [r for r in section.splitlines() if r.startswith("| ") and "verdict" not in r]
    assert len(rows) == 10
    assert sum(r.endswith("| not measured |") for r in rows) == 9


@pytest.mark.parametrize("peak, converged, verdict", [(14.3, True, "**met**"),
                                                       (24.5, True, "**not met**"),
                                                       (14.3, False, "**not met**")])
def test_huge_solve_target(tmp_path, peak, converged, verdict):
    # the 24 GiB target is judged from bench/huge_solve.py --json output: the peak and
    # whether the solve converged (common practice, no source)
    huge = tmp_path / "huge.json"
    huge.write_text(json.dumps({
        "triangles": 128_000_000, "points": 64_016_001, "iterations": 10,
        "converged": converged, "peak_rss_GiB": peak,
        "phases": {"mesh": 19.0, "assemble": 12.0, "setup": 8.0, "solve": 84.0, "total": 1e9},
    }), encoding="utf-8")
    out = tmp_path / "perf.md"
    assert report.main([str(DATA), "--out", str(out), "--huge", str(huge)]) == 0
    row = _row(out.read_text(encoding="utf-8"), "| the 1.3e8-triangle solve within 24 GiB |")
    assert row[1] == (f"128,000,000 triangles, peak {peak:.1f} GiB, 10 iterations, "
                      f"mesh to solution 123.0 s")  # every phase but the library's 'total'
    assert row[2] == verdict


def test_pngs_are_valid(written):
    md, images = written
    names = sorted(p.name for p in images.iterdir())
    assert names == ["perf-assembly.png", "perf-memory.png", "perf-ratios.png",
                     "perf-solve.png", "perf-threads.png"]
    for name in names:
        data = (images / name).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, W3C 2003)
        assert data[12:16] == b"IHDR"
        width, height = struct.unpack(">II", data[16:24])
        assert 200 < width < 5000 and 100 < height < 5000
        assert f"(images/{name})" in md


def test_section_replaced_rest_kept(tmp_path):
    out = tmp_path / "perf.md"
    out.write_text(f"# Title\n\nintro text\n\n{report.BEGIN}\nold tables\n{report.END}\n\noutro\n",
                   encoding="utf-8")
    assert report.main([str(DATA), "--out", str(out)]) == 0
    first = out.read_text(encoding="utf-8")
    assert first.startswith("# Title\n\nintro text\n\n" + report.BEGIN)
    assert first.endswith(report.END + "\n\noutro\n")
    assert "old tables" not in first and "### Whole solves" in first
    assert "![" not in first  # no --images: no plots, no links
    assert report.main([str(DATA), "--out", str(out)]) == 0
    assert out.read_text(encoding="utf-8") == first


def test_new_files_get_the_usual_permissions(tmp_path):
    # a temporary file (mkstemp: private) renamed into place must not stay private
    out = tmp_path / "perf.md"
    assert report.main([str(DATA), "--out", str(out)]) == 0
    umask = os.umask(0)
    os.umask(umask)
    assert out.stat().st_mode & 0o777 == 0o666 & ~umask


def _fails(capsys, argv, *words):
    assert report.main(argv) == 2
    err = capsys.readouterr().err
    assert err.startswith("report: error: ")
    for w in words:
        assert w in err, err


def test_missing_file(tmp_path, capsys):
    out = tmp_path / "perf.md"
    _fails(capsys, [str(tmp_path / "nope.json"), "--out", str(out)], "cannot read", "nope.json")
    assert not out.exists()


@pytest.mark.parametrize(
    "content, words",
    [
        ("{not json", ["is not JSON", "line 1"]),
        (json.dumps({"results": []}), ["is not pytest-benchmark output", "'benchmarks'"]),
        (json.dumps([1, 2]), ["is not pytest-benchmark output"]),
        (json.dumps({"benchmarks": [{"name": "t"}]}), ["benchmarks[0] has no stats.min"]),
        (json.dumps({"benchmarks": [{"name": "t", "stats": {"min": 1.0}, "extra_info": {}}]}),
         ["no benchmark of this suite"]),
    ],
    ids=["invalid-json", "no-benchmarks-key", "a-list", "no-stats", "not-this-suite"],
)
def test_bad_input(tmp_path, capsys, content, words):
    bad = tmp_path / "bad.json"
    bad.write_text(content, encoding="utf-8")
    out = tmp_path / "perf.md"
    _fails(capsys, [str(bad), "--out", str(out)], "bad.json", *words)
    assert not out.exists()


def test_nothing_written_when_one_input_is_bad(tmp_path, capsys):
    bad = tmp_path / "bad.json"
    bad.write_text("{}", encoding="utf-8")
    images = tmp_path / "images"
    images.mkdir()
    out = tmp_path / "perf.md"
    _fails(capsys, [str(DATA), str(bad), "--out", str(out), "--images", str(images)], "bad.json")
    assert not out.exists() and list(images.iterdir()) == []


@pytest.mark.parametrize("case", ["images-missing", "out-directory-missing", "huge-not-ours"])
def test_bad_paths(tmp_path, capsys, case):
    out = tmp_path / "perf.md"
    huge = tmp_path / "huge.json"
    huge.write_text(json.dumps({"triangles": 10}), encoding="utf-8")
    argv, words = {
        "images-missing": ([str(DATA), "--out", str(out), "--images", str(tmp_path / "img")],
                           ["--images", "is not a directory"]),
        "out-directory-missing": ([str(DATA), "--out", str(tmp_path / "no" / "perf.md")],
                                  ["does not exist"]),
        "huge-not-ours": ([str(DATA), "--out", str(out), "--huge", str(huge)],
                          ["huge.json", "is not bench/huge_solve.py --json output"]),
    }[case]
    _fails(capsys, argv, *words)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["huge.json"]  # nothing written


def test_out_without_markers_is_left_alone(tmp_path, capsys):
    out = tmp_path / "perf.md"
    out.write_text("hand-written text\n", encoding="utf-8")
    _fails(capsys, [str(DATA), "--out", str(out)], "has no generated section")
    assert out.read_text(encoding="utf-8") == "hand-written text\n"


def test_quick_suite_collects():
    env = dict(os.environ, PYTHONDONTWRITEBYTECODE="1")
    proc = subprocess.run(
        [sys.executable, "-m", "pytest", "bench", "--collect-only", "-q", "--size", "quick",
         "-p", "no:cacheprovider"],
        cwd=ROOT, capture_output=True, text=True, env=env, timeout=300,
    )
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    ids = [line for line in proc.stdout.splitlines() if "::" in line]
    assert len(ids) > 100
    for expected in [
        "bench/test_bench_assembly.py::test_stiffness[n_triangles=80000-strategy=triplets-threads=2]",
        "bench/test_bench_assembly.py::test_stiffness[n_triangles=80000-strategy=csr-data-threads=1]",
        "bench/test_bench_matrix_free.py::test_product[n_triangles=80000-method=geometry-threads=2-mesh=refined]",
        "bench/test_bench_linear.py::test_precond_setup[n_triangles=80000-method=pyamg-sa]",
        "bench/test_bench_solve.py::test_solve[n_triangles=80000-method=gmg-threads=2]",
        "bench/test_bench_solve.py::test_solve[n_triangles=80000-method=superlu-threads=2]",
    ]:
        assert expected in ids, expected
