"""bench/report.py: tables, ratios and plots from saved pytest-benchmark output; bad input.

The input is tests/data/bench_quick.json, a real ``--size quick`` run of the
benchmark suite trimmed to about fifty benchmarks (the per-round samples,
the options and the CPU flags removed).  Expected figures are recomputed
here from the raw ``stats.min`` and ``extra_info`` values of that file,
independently of the report's own lookups (common practice, no source).  Nothing here times
anything: speed is measured in bench/, these tests check the arithmetic and
the files the report writes.
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


@pytest.fixture(scope="module")
def raw():
    with open(DATA, encoding="utf-8") as f:
        return json.load(f)


def _bench(raw, name):
    (b,) = [b for b in raw["benchmarks"] if b["name"] == name]
    return b


def _ratio_text(r):
    # the report's rule: two decimals below 10, one above
    return f"{r:.2f}×" if r < 10 else f"{r:.1f}×"


def _row(markdown, prefix):
    rows = [line for line in markdown.splitlines() if line.startswith(prefix)]
    assert len(rows) == 1, f"expected one row starting {prefix!r}, found {rows}"
    return [c.strip() for c in rows[0].strip("|").split("|")]


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    pytest.importorskip("matplotlib")
    d = tmp_path_factory.mktemp("report")
    images = d / "images"
    images.mkdir()
    out = d / "performance.md"
    assert report.main([str(DATA), "--out", str(out), "--images", str(images)]) == 0
    return out.read_text(encoding="utf-8"), images


def test_assembly_rows_and_ratios(written, raw):
    md, _ = written
    for n in ("20,000", "80,000"):
        for strategy, threads in [("triplets", 2), ("csr-first-call", 1), ("csr-first-call", 2),
                                  ("csr", 2), ("csr-data", 1), ("csr-data", 2), ("csr-fused", 2)]:
            _row(md, f"| {n} | `{strategy}` | {threads} |")
    triplets = _bench(raw, "test_stiffness[n_triangles=80000-strategy=triplets-threads=2]")
    for strategy in ("csr-data-threads=2", "csr-first-call-threads=1", "csr-fused-threads=2"):
        b = _bench(raw, f"test_stiffness[n_triangles=80000-strategy={strategy}]")
        method, threads = strategy.rsplit("-threads=", 1)
        cells = _row(md, f"| 80,000 | `{method}` | {threads} |")
        assert cells[4] == _ratio_text(triplets["stats"]["min"] / b["stats"]["min"])
        e = b["extra_info"]
        # the floor: the least bytes at the best copy bandwidth of the run (1 or all threads)
        bandwidth = max(e["bandwidth_copy_GBs"], e["bandwidth_copy_parallel_GBs"])
        floor_s = e["floor_bytes"] / (bandwidth * 1e9)
        assert cells[5] == f"{100 * floor_s / b['stats']['min']:.1f} %"
        assert cells[8] == f"{round(e['peak_bytes'] / e['n_triangles']):,}"
    assert _row(md, "| 80,000 | `triplets` | 2 |")[4] == "1 (plain)"


def test_solve_rows_ratios_and_pivot(written, raw):
    md, _ = written
    amg = _bench(raw, "test_solve[n_triangles=80000-method=amg-threads=2]")
    pyamg = _bench(raw, "test_solve[n_triangles=80000-method=pyamg-rs-threads=2]")
    cells = _row(md, "| 39,601 | `amg` (default) |")
    assert cells[2] == str(amg["extra_info"]["iterations"])
    assert cells[7] == "—"  # quick runs are in-process: no cold first round recorded
    assert cells[8] == _ratio_text(pyamg["stats"]["min"] / amg["stats"]["min"])
    assert cells[11] == f"{round(amg['extra_info']['peak_bytes'] / amg['extra_info']['n_points']):,}"
    none = _bench(raw, "test_solve[n_triangles=80000-method=none-threads=2]")
    scipy_cg = _bench(raw, "test_solve[n_triangles=80000-method=scipy-cg-threads=2]")
    assert _row(md, "| 39,601 | `none` |")[8] == _ratio_text(
        scipy_cg["stats"]["min"] / none["stats"]["min"])
    assert _row(md, "| 39,601 | `superlu` |")[2] == "—"  # a direct solve has no iterations
    pivot = _row(md, "| `gmg` | ")
    assert len(pivot) == 3  # the method and the two sizes of the quick set


def test_thread_scaling_rows(written, raw):
    md, _ = written
    one = _bench(raw, "test_stiffness[n_triangles=80000-strategy=csr-data-threads=1]")
    two = _bench(raw, "test_stiffness[n_triangles=80000-strategy=csr-data-threads=2]")
    cells = _row(md, "| assembly | stiffness | `csr-data` | 80,000 triangles |")
    assert cells[-1] == _ratio_text(one["stats"]["min"] / two["stats"]["min"])
    cells = _row(md, "| solve | poisson | `amg` (rectangle) | 39,601 unknowns |")
    a1 = _bench(raw, "test_solve[n_triangles=80000-method=amg-threads=1]")
    a2 = _bench(raw, "test_solve[n_triangles=80000-method=amg-threads=2]")
    assert cells[-1] == _ratio_text(a1["stats"]["min"] / a2["stats"]["min"])


def test_targets(written, raw):
    md, _ = written
    section = md.split("### Targets", 1)[1].split("###", 1)[0]
    rows = [r for r in section.splitlines() if r.startswith("| ") and "verdict" not in r]
    assert len(rows) == 10
    # the quick set has none of the sizes the targets name, but the products' target
    assert sum(r.endswith("| not measured |") for r in rows) == 9
    (mf,) = [r for r in rows if "matrix-free variant" in r]
    oks = []
    for mesh in ("rectangle", "refined"):
        es = [b for b in raw["benchmarks"] if b["extra_info"].get("kind") == "product"
              and b["extra_info"]["mesh"] == mesh]
        scipy = min(b["stats"]["min"] for b in es if b["extra_info"]["method"].startswith("scipy"))
        oks.append(any(b["stats"]["min"] <= scipy
                       and b["extra_info"]["stored_bytes"] <= 0.5 * b["extra_info"]["csr_stored_bytes"]
                       for b in es if b["extra_info"]["method"] in ("geometry", "edges")))
    assert mf.endswith("| **met** |" if all(oks) else "| **not met** |")


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
