"""The never-stored refinement of tetrahedra against the stored-mesh gmg, in work units.

    flock /tmp/hk-bench.lock python bench/patches3d.py --cases 8:4 4:5 8:5 \
        --out bench/results/patches3d_2026-12-03.json

The problem: ``-lap u = 1`` on the unit cube, ``u = 0`` on its boundary, on ``cuboid(c)``
(``6 c^3`` tetrahedra) refined ``k`` times (``8^k`` times as many), solved to rtol 1e-8.
Each case ``c:k`` runs in its own process per path, one after the other (never at once),
so that each peak memory is its own:

``stored``
    ``solve_poisson(coarse, 1.0, refine=k, preconditioner="gmg")``: the refined mesh
    built and stored, CG + matrix-free gmg (F-cycle); then, in the same process, the
    work unit: one product with the assembled stiffness matrix of the refined mesh (held
    rows removed) by the library's parallel CSR kernel, best of 11;
``patch``
    ``solve_poisson(coarse, 1.0, refine=k)``: the patch path (docs/patches.md), CG +
    patch multigrid on the Kuhn lattices; also its product against its floor (read x,
    write y: the faster of a plain and a negated parallel copy of the same vector,
    :func:`benchlib.copy_floor`), best of 11 each.

Both report the centre value against the triple sine series of the problem (a
separation of variables; common practice, no source).  Run it on a quiet machine.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time

import numpy as np
from benchlib import copy_floor, run_worker, worker_result

from hatkernels._output import write_json


def centre_series(terms=401):
    """``u(1/2, 1/2, 1/2)`` of ``-lap u = 1`` on the unit cube, ``u = 0`` on its boundary:
    ``sum over odd i, j, k of 64 / (pi^5 i j k (i^2 + j^2 + k^2))`` times the signs of the
    sines at 1/2 (separation of variables)."""
    odd = np.arange(1, terms + 1, 2, dtype=np.float64)
    sign = np.where((odd // 2) % 2 == 0, 1.0, -1.0)
    i, j, k = np.meshgrid(odd, odd, odd, indexing="ij", sparse=True)
    s = sign[:, None, None] * sign[None, :, None] * sign[None, None, :]
    return float((64.0 / math.pi**5 * s / (i * j * k * (i * i + j * j + k * k))).sum())


def _best(f, rounds=11):
    best = math.inf
    for _ in range(rounds):
        t = time.perf_counter()
        f()
        best = min(best, time.perf_counter() - t)
    return best


def _wu(mesh):
    import hatkernels
    from hatkernels import sparse

    A = hatkernels.assemble_stiffness(mesh)
    A = sparse.as_csr(hatkernels.apply_dirichlet(A, np.zeros(mesh.n_points),
                                                 mesh.boundary_points()).A)
    x = np.random.default_rng(1).standard_normal(A.shape[0])
    y = np.empty_like(x)
    return _best(lambda: sparse.spmv(A, x, out=y))


def _centre(mesh, u):
    d = np.abs(np.asarray(mesh.points) - 0.5).sum(axis=1)
    return float(u[int(np.argmin(d))])


def run_stored(c, k):
    import hatkernels

    coarse = hatkernels.mesh.cuboid(c)
    t = time.perf_counter()
    sol = hatkernels.solve_poisson(coarse, 1.0, refine=k, preconditioner="gmg", rtol=1e-8)
    total = time.perf_counter() - t
    st = sol.stats
    out = {"seconds": total, "phases": st.timings, "iterations": st.iterations,
           "converged": bool(sol.converged), "peak_GiB": st.peak_rss_bytes / 2**30,
           "points": int(sol.mesh.n_points), "centre": _centre(sol.mesh, sol.u)}
    out["wu_seconds_here"] = _wu(sol.mesh)
    return out


def run_patch(c, k):
    import hatkernels
    from hatkernels.patches.tets import TetOperator, class_weights

    coarse = hatkernels.mesh.cuboid(c)
    t = time.perf_counter()
    sol = hatkernels.solve_poisson(coarse, 1.0, refine=k, rtol=1e-8)
    total = time.perf_counter() - t
    st = sol.stats
    out = {"seconds": total, "phases": st.timings, "iterations": st.iterations,
           "converged": bool(sol.converged), "peak_GiB": st.peak_rss_bytes / 2**30,
           "points": int(st.unknowns), "preconditioner": st.preconditioner}
    lay = sol.layout
    # the centre (1/2, 1/2, 1/2) is a coarse vertex when c is even
    if c % 2 == 0:
        pts = coarse.points
        v = int(np.argmin(np.abs(pts - 0.5).sum(axis=1)))
        out["centre"] = float(sol.values[lay.size(k) - lay.n_vertices + v])
    W, _ = class_weights(coarse.points[lay.topo[0]], np.ones(coarse.n_cells))
    A = TetOperator(lay, W, k)
    x = np.random.default_rng(1).standard_normal(A.shape[0])
    y = np.empty_like(x)
    A.matvec_into(x, y)
    out["product_seconds"] = _best(lambda: A.matvec_into(x, y))
    # its floor: read x, write y (the faster of a plain and a negated parallel copy)
    out.update(copy_floor(x, y))
    return out


WORKERS = {"stored": run_stored, "patch": run_patch}


def warm_up(path):
    import hatkernels

    tiny = hatkernels.mesh.cuboid(2)
    if path == "patch":
        hatkernels.solve_poisson(tiny, 1.0, refine=2, rtol=1e-8)
    else:
        hatkernels.solve_poisson(tiny, 1.0, refine=2, preconditioner="gmg", rtol=1e-8)


def worker(path, c, k):
    warm_up(path)
    worker_result(WORKERS[path], c, k)


def case(path, c, k):
    return run_worker(__file__, path, c, k)


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cases", nargs="+", default=["8:4", "4:5", "8:5"],
                   help="c:k pairs: cuboid(c) refined k times")
    p.add_argument("--only", nargs="+", choices=sorted(WORKERS), default=sorted(WORKERS))
    p.add_argument("--out", help="write the results here (JSON), whole or not at all")
    p.add_argument("--worker", nargs=3, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.worker:
        worker(args.worker[0], int(args.worker[1]), int(args.worker[2]))
        return 0
    exact = centre_series()
    results = []
    for spec in args.cases:
        c, k = (int(v) for v in spec.split(":"))
        row = {"coarse": c, "refine": k, "tetrahedra": 6 * c**3 * 8**k, "exact_centre": exact}
        for path in ("stored", "patch"):
            if path in args.only:
                row[path] = case(path, c, k)
                print(f"{spec} {path}: {json.dumps(row[path])[:500]}", flush=True)
        results.append(row)
    report(results)
    if args.out:
        write_json(args.out, results)  # whole or not at all
    return 0


def report(results):
    print("\n| tetrahedra (c, k) | path | seconds | iterations | solve WU per iteration | "
          "peak GiB | centre error | product / floor |")
    print("|---|---|---|---|---|---|---|---|")
    for row in results:
        wu = row.get("stored", {}).get("wu_seconds_here")
        for path in ("stored", "patch"):
            r = row.get(path)
            if r is None:
                continue
            if "error" in r:
                print(f"| {row['tetrahedra']:.3g} | {path} | {r['error'][:60]} | | | | | |")
                continue
            its = max(r["iterations"], 1)
            per = r["phases"].get("solve", math.nan) / its / wu if wu else math.nan
            err = abs(r["centre"] - row["exact_centre"]) if "centre" in r else math.nan
            floor = r.get("floor_seconds", r.get("copy_seconds"))
            ratio = r["product_seconds"] / floor if "product_seconds" in r else math.nan
            print(f"| {row['tetrahedra']:.3g} ({row['coarse']}, {row['refine']}) | {path} | "
                  f"{r['seconds']:.2f} | {r['iterations']} | {per:.1f} | {r['peak_GiB']:.2f} | "
                  f"{err:.2e} | {ratio:.1f} |")


if __name__ == "__main__":
    sys.exit(main())
