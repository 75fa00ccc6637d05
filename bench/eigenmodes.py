"""eigenmodes: the 10 smallest eigenpairs at 1e5 and 1e6 unknowns, lobpcg + multigrid against
scipy's shift-invert eigsh.

    OPENBLAS_NUM_THREADS=1 flock /tmp/hk-bench.lock python bench/eigenmodes.py   # writes bench/results/eigenmodes.json
    flock /tmp/hk-bench.lock python bench/eigenmodes.py --cells 320 --rounds 1 --out /tmp/e.json

(``OPENBLAS_NUM_THREADS=1``: once numba's threads have run, OpenBLAS's own
compete with them for the 2 cores, and lobpcg's dense block algebra is
OpenBLAS; DEVELOPERS.md.)

The problem: ``-lap u = lambda u`` on the unit square, ``u = 0`` on its
boundary, on ``rectangle(c, c)`` refined until it has ``n x n`` cells
(``cells`` 320 = 10 x 2^5: 101,761 unknowns; 1024 = 8 x 2^7: 1,046,529), so
that the geometric multigrid and the nested start have levels.  Exact
values ``(a^2 + b^2) pi^2``: 2, 5, 5, 8, 10, 10, 13, 13, 17, 17 times pi^2
(separation of variables).

Each method and size runs in a fresh process (``--worker``), ``--rounds``
times; the best round is reported with the first (cold) one beside it:

``lobpcg``
    :func:`hatkernels.eigen.eigenmodes` with ``method="lobpcg"`` and its
    defaults (gmg, nested start, rtol 1e-8): the whole call, assembly included;
``eigsh``
    the plain alternative: the same matrices (assembled and reduced by the
    library) and ``scipy.sparse.linalg.eigsh(K, 10, M, sigma=0)`` (SuperLU
    of ``K``, ARPACK), assembly included; skipped above ``--eigsh-max``
    cells per side.

A work unit (WU) is one product with the assembled stiffness matrix of the
same mesh, measured in the same process: the faster of the library's
parallel CSR kernel (what CG uses) and scipy's ``K @ x``, best of 10 each;
both are recorded.  The record
also carries the bandwidth measured in the same run, the product's achieved
GB/s and fraction of the bandwidth floor, the eigenvalues' agreement
between the two methods and their distance to the exact values.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numba
import numpy as np

K_MODES = 10
EXACT = np.array([2, 5, 5, 8, 10, 10, 13, 13, 17, 17], dtype=float) * np.pi**2
HERE = os.path.dirname(os.path.abspath(__file__))


def _problem(cells):
    from benchlib import refined_rectangle

    return refined_rectangle(cells)


def _reduced(mesh):
    from hatkernels import apply_dirichlet, assemble_mass, assemble_stiffness

    zeros = np.zeros(mesh.n_points)
    held = mesh.boundary_points()
    K = apply_dirichlet(assemble_stiffness(mesh), zeros, held).A
    M = apply_dirichlet(assemble_mass(mesh), zeros, held).A
    return K, M


def _best(fn, repeats=10):
    fn()
    best = float("inf")
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def _work_unit(mesh):
    """Seconds of one product with the reduced stiffness matrix: the library's parallel CSR
    kernel and scipy's, and the bytes such a product moves."""
    from hatkernels._jit import sparse as _k
    from hatkernels.sparse import csr_bytes

    K, _ = _reduced(mesh)
    x = np.random.default_rng(0).standard_normal(K.shape[0])
    y = np.empty_like(x)
    kernel = _best(lambda: _k.spmv(K.indptr, K.indices, K.data, x, y))
    plain = _best(lambda: K @ x)
    return {"wu_s": min(kernel, plain), "kernel_product_s": kernel, "scipy_product_s": plain,
            "product_bytes": int(csr_bytes(K)),
            "nnz": int(K.nnz), "unknowns": int(K.shape[0])}


def _run_lobpcg(mesh, options):
    from hatkernels.eigen import eigenmodes

    r = eigenmodes(mesh, K_MODES, method="lobpcg", **options)
    s = r.stats
    return r.values, {
        "iterations": s.iterations, "levels": [list(v) for v in s.levels], "block": s.block,
        "products": s.products, "phases": s.timings, "converged": s.converged,
        "estimated_errors_max": float(np.max(s.errors)),
        "preconditioner": s.preconditioner, "library_work_units": s.work_units,
    }


def _run_patches(mesh, options):
    from hatkernels.eigen import eigenmodes

    levels = mesh.levels()
    r = eigenmodes(levels[0], K_MODES, refine=len(levels) - 1, **options)
    if type(r).__name__ != "PatchEigenmodes":
        raise RuntimeError("eigenmodes did not take the patch path")
    s = r.stats
    return r.values, {
        "iterations": s.iterations, "levels": [list(v) for v in s.levels], "block": s.block,
        "products": s.products, "phases": s.timings, "converged": s.converged,
        "estimated_errors_max": float(np.max(s.errors)), "preconditioner": s.preconditioner,
        "coarse_cells": int(levels[0].n_triangles), "refine": len(levels) - 1,
    }


def _run_eigsh(mesh, options):
    import scipy.sparse.linalg as sla

    t0 = time.perf_counter()
    K, M = _reduced(mesh)
    t1 = time.perf_counter()
    v0 = np.random.default_rng(0).standard_normal(K.shape[0])
    values = np.sort(sla.eigsh(K, K_MODES, M, sigma=0.0, which="LM", v0=v0)[0])
    t2 = time.perf_counter()
    return values, {"phases": {"assemble": t1 - t0, "solve": t2 - t1, "total": t2 - t0}}


def worker(method, cells, rounds, options):
    """One method at one size, ``rounds`` times in this process; prints one JSON line."""
    from benchlib import ProcessPeak

    from hatkernels.eigen import eigenmodes
    from hatkernels.perf import memory_bandwidth

    # compile (or load) the kernels on a small problem first, twice
    small = _problem(64)
    t = time.perf_counter()
    eigenmodes(small, K_MODES, method="lobpcg")
    first = time.perf_counter() - t
    eigenmodes(small, K_MODES, method="lobpcg")
    if method == "patches":  # its kernels too (66,049 points)
        eigenmodes(_problem(256).levels()[0], K_MODES, refine=5)
    bandwidth = memory_bandwidth()
    mesh = _problem(cells)
    unit = _work_unit(mesh)
    run = {"lobpcg": _run_lobpcg, "eigsh": _run_eigsh, "patches": _run_patches}[method]
    out = []
    for _ in range(rounds):
        peak = ProcessPeak()
        with peak:
            t = time.perf_counter()
            values, figures = run(mesh, options)
            seconds = time.perf_counter() - t
        out.append({"seconds": seconds, "peak_bytes": peak.peak, "values": values.tolist(),
                    **figures})
    best = dict(min(out, key=lambda r: r["seconds"]))
    best["cold_seconds"] = out[0]["seconds"]
    best["peak_bytes"] = max(r["peak_bytes"] or 0 for r in out)
    best["rounds"] = rounds
    wu = unit["wu_s"]
    bw = max(bandwidth.values())
    best.update(unit, method=method, cells=cells, points=int(mesh.n_points),
                threads=numba.get_num_threads(), bandwidth_GBs=bandwidth,
                product_GBs=unit["product_bytes"] / wu / 1e9,
                product_fraction_of_floor=unit["product_bytes"] / (bw * 1e9) / wu,
                work_units=best["seconds"] / wu,
                work_units_per_mode=best["seconds"] / wu / K_MODES,
                relative_errors_to_exact=((np.array(best["values"]) - EXACT) / EXACT).tolist(),
                warm_up_first_call_s=first, options=options,
                openblas_threads=os.environ.get("OPENBLAS_NUM_THREADS", "(default)"),
                load_average=os.getloadavg())
    print("result " + json.dumps(best), flush=True)


def run(method, cells, rounds, options, timeout, threads):
    cmd = [sys.executable, os.path.abspath(__file__), "--worker", method, "--cells", str(cells),
           "--rounds", str(rounds), "--options", json.dumps(options)]
    env = dict(os.environ, NUMBA_NUM_THREADS=str(threads))
    try:
        p = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, cwd=HERE,
                           env=env)
    except subprocess.TimeoutExpired:
        return {"method": method, "cells": cells, "skipped": f"over {timeout} s"}
    lines = [ln for ln in p.stdout.splitlines() if ln.startswith("result ")]
    if p.returncode or not lines:
        return {"method": method, "cells": cells,
                "failed": (p.stderr.strip().splitlines() or ["no output"])[-1]}
    return json.loads(lines[-1][len("result "):])


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells", type=int, nargs="+", default=[320, 1024])
    ap.add_argument("--rounds", type=int, default=2)
    ap.add_argument("--eigsh-max", type=int, default=1024,
                    help="largest cells per side for eigsh (SuperLU's fill grows as n log n)")
    ap.add_argument("--timeout", type=float, default=1800.0)
    ap.add_argument("--threads", type=int, default=numba.config.NUMBA_NUM_THREADS,
                    help="numba threads of the workers")
    ap.add_argument("--options", default="{}", help="JSON: keyword arguments of eigenmodes")
    ap.add_argument("--out", default=os.path.join(HERE, "results", "eigenmodes.json"))
    ap.add_argument("--patches", action="store_true",
                    help="also eigenmodes(coarse, 10, refine=r): the refinement never stored")
    ap.add_argument("--worker", choices=("lobpcg", "eigsh", "patches"))
    args = ap.parse_args(argv)
    options = json.loads(args.options)
    if args.worker:
        worker(args.worker, args.cells[0], args.rounds, options)
        return 0
    records = []
    print(f"{'unknowns':>10} {'method':>7} {'seconds':>8} {'cold':>7} {'WU/mode':>8} "
          f"{'WU ms':>6} {'kernel ms':>9} {'scipy ms':>8} {'peak MiB':>9} {'iter':>5}  "
          f"max error to exact")
    for cells in args.cells:
        pair = {}
        for method in ("lobpcg", "patches", "eigsh"):
            if method == "eigsh" and cells > args.eigsh_max or (
                    method == "patches" and not args.patches):
                continue
            r = pair[method] = run(method, cells, args.rounds, options if method != "eigsh"
                                   else {}, args.timeout, args.threads)
            records.append(r)
            if "seconds" not in r:
                print(f"{cells:>10} {method:>7} {r.get('skipped') or r.get('failed')}")
                continue
            print(f"{r['unknowns']:>10,} {method:>7} {r['seconds']:>8.2f} {r['cold_seconds']:>7.2f} "
                  f"{r['work_units_per_mode']:>8.1f} {r['wu_s'] * 1e3:>6.2f} "
                  f"{r['kernel_product_s'] * 1e3:>9.2f} {r['scipy_product_s'] * 1e3:>8.2f} "
                  f"{r['peak_bytes'] / 2**20:>9.0f} "
                  f"{r.get('iterations', '-'):>5}  {max(r['relative_errors_to_exact']):.2e}",
                  flush=True)
        a, b = pair.get("lobpcg", {}), pair.get("eigsh", {})
        if "values" in a and "values" in b:
            diff = np.abs(np.array(a["values"]) - b["values"]) / np.array(b["values"])
            a["agreement_with_eigsh"] = float(diff.max())
            a["speedup_over_eigsh"] = b["seconds"] / a["seconds"]
            print(f"{'':>10} lobpcg / eigsh: eigenvalues agree to {diff.max():.1e} (relative), "
                  f"time eigsh / lobpcg {b['seconds'] / a['seconds']:.2f}")
        c = pair.get("patches", {})
        if "values" in a and "values" in c:
            diff = np.abs(np.array(c["values"]) - a["values"]) / np.array(a["values"])
            c["agreement_with_stored"] = float(diff.max())
            c["speedup_over_stored"] = a["seconds"] / c["seconds"]
            print(f"{'':>10} patches / stored lobpcg: eigenvalues agree to {diff.max():.1e}, "
                  f"time stored / patches {a['seconds'] / c['seconds']:.2f}")
    result = {"benchmark": "eigenmodes", "k": K_MODES, "command": " ".join(sys.argv),
              "date": time.strftime("%Y-%m-%d %H:%M:%S"), "load_average": os.getloadavg(),
              "records": records}
    os.makedirs(os.path.dirname(os.path.abspath(args.out)), exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=os.path.dirname(os.path.abspath(args.out)), suffix=".json")
    with os.fdopen(fd, "w") as f:  # whole or not at all
        json.dump(result, f, indent=1)
    os.replace(tmp, args.out)
    return 0


if __name__ == "__main__":
    sys.exit(main())
