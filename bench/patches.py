"""The never-stored refinement against the stored-mesh gmg, in work units, up to 1e9 triangles.

    flock /tmp/hk-bench.lock python bench/patches.py --cases 125:3 125:4 125:5 125:6 \
        --out bench/results/patches.json
    flock /tmp/hk-bench.lock python bench/patches.py --cases 177:7 --only patch

The problem: ``-lap u = 1`` on the unit square, ``u = 0`` on its boundary, on
``rectangle(c, c)`` refined ``k`` times (``2 c^2 4^k`` triangles), solved to rtol 1e-8.
Each case ``c:k`` runs in its own process per path, one after the other (never at once),
so that each peak memory is its own:

``csr``
    the work unit: one product with the assembled stiffness matrix of the refined mesh
    (held rows removed) by the library's parallel CSR kernel, best of 10, and the
    machine's copy bandwidth (:func:`hatkernels.perf.memory_bandwidth`);
``stored``
    ``solve_poisson(coarse, 1.0, refine=k, preconditioner="gmg")``: the refined mesh
    built and stored, CG + matrix-free gmg (today's path for refined meshes);
``patch``
    ``solve_poisson(coarse, 1.0, refine=k)``: the patch path (docs/patches.md), CG +
    patch multigrid; also the patch product, the operator's fused kernel and the
    buffered path beside it (against their floor: read x, write y, the faster of a
    plain and a negated parallel copy, :func:`benchlib.copy_floor`),
    full multigrid alone (``rtol=None``) and its error.

Accuracy of full multigrid: on every fine point of 12 sample coarse cells (away from
the sides y = 0 and 1, where the series converges fast), the maximum error of the
converged solution against the series solution of the problem (its discretisation
error; series: S. Timoshenko and J. N. Goodier, Theory of Elasticity, 1951, torsion
of a rectangular bar) and of the full multigrid solution (its total error); and the
maximum difference between the two over all points (its algebraic error).  A case whose path does not fit
in memory is reported as such.  Run it on a quiet machine.
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


def series(x, y, terms=4001):
    """``u`` of ``-lap u = 1`` on the unit square with ``u = 0`` on its boundary: the
    single series ``x(1-x)/2 - 4/pi^3 sum_{n odd} sin(n pi x) cosh(n pi (y-1/2)) /
    (n^3 cosh(n pi/2))``, its tail below about 2e-9 with 2001 odd terms (S. Timoshenko and
    J. N. Goodier, Theory of Elasticity, 1951, torsion of a rectangular bar)."""
    x, y = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(y, dtype=float))
    u = 0.5 * x * (1.0 - x)
    a = np.abs(y - 0.5)
    for n in range(1, terms + 1, 2):
        # cosh(n pi a) / cosh(n pi / 2) without overflow
        ratio = (np.exp(n * math.pi * (a - 0.5)) * (1 + np.exp(-2 * n * math.pi * a))
                 / (1 + math.exp(-n * math.pi)))
        u -= 4.0 / (math.pi**3 * n**3) * np.sin(n * math.pi * x) * ratio
    return u


# above this many points the patch case runs the solve alone (the full multigrid run and
# the product timing would need memory beside the kept solution)
EXTRAS_UP_TO = 3e8


def _points(c, k):
    return (c * 2**k + 1) ** 2


def run_csr(c, k):
    import hatkernels
    from hatkernels.perf import memory_bandwidth

    mesh = hatkernels.mesh.rectangle(c, c)
    for _ in range(k):
        mesh = mesh.refine()
    return {"wu_seconds": _wu(mesh), "points": int(mesh.n_points),
            "numpy_copy_GBs": memory_bandwidth()["copy"]}


def run_stored(c, k):
    import hatkernels

    coarse = hatkernels.mesh.rectangle(c, c)
    stamps = []  # after each CG iteration: their differences time iterations 2, 3, ...

    def monitor(iteration, residual):
        stamps.append(time.perf_counter())

    t = time.perf_counter()
    sol = hatkernels.solve_poisson(coarse, 1.0, refine=k, preconditioner="gmg", rtol=1e-8,
                                   monitor=monitor)
    total = time.perf_counter() - t
    st = sol.stats
    out = {"seconds": total, "phases": st.timings, "iterations": st.iterations,
           "converged": bool(sol.converged), "peak_GiB": st.peak_rss_bytes / 2**30,
           "u_max": float(sol.u.max())}
    if len(stamps) > 2:
        # a steady iteration: the solve phase also holds the first touch of every vector
        # (this machine backs fresh memory at 1 to 3 s per GiB) and one cycle more than
        # iterations (the first preconditioning)
        out["steady_iteration_seconds"] = float(np.median(np.diff(stamps)))
    if _points(c, k) <= WU_HERE_UP_TO:
        # the work unit again in this process, right after the solve: the machine's state
        # changes between processes (up to 1.8 times in one day), a ratio should not
        out["wu_seconds_here"] = _wu(sol.mesh)
    return out


# up to this many points the stored case also times its work unit in its own process
# (the assembled matrix then sits beside the refined mesh: about 250 bytes per point more)
WU_HERE_UP_TO = 4e7


def _wu(mesh):
    """Best of 11 products with the assembled stiffness matrix of ``mesh`` (held rows removed)."""
    import hatkernels
    from hatkernels import sparse

    A = hatkernels.assemble_stiffness(mesh)
    A = sparse.as_csr(hatkernels.apply_dirichlet(A, np.zeros(mesh.n_points),
                                                 mesh.boundary_points()).A)
    x = np.random.default_rng(1).standard_normal(A.shape[0])
    y = np.empty_like(x)
    best = math.inf
    for _ in range(11):
        t = time.perf_counter()
        sparse.spmv(A, x, out=y)
        best = min(best, time.perf_counter() - t)
    return best


def run_patch(c, k):
    import hatkernels
    from hatkernels.patches import PatchLayout, PatchOperator, element_stiffness
    from hatkernels.perf import peak_rss_bytes

    coarse = hatkernels.mesh.rectangle(c, c)
    t = time.perf_counter()
    sol = hatkernels.solve_poisson(coarse, 1.0, refine=k, rtol=1e-8)
    total = time.perf_counter() - t
    st = sol.stats
    layout = sol.layout
    out = {"seconds": total, "phases": st.timings, "iterations": st.iterations,
           "converged": bool(sol.converged), "peak_GiB": st.peak_rss_bytes / 2**30,
           "points": int(st.unknowns), "preconditioner": st.preconditioner}
    # accuracy on the fine points of sample coarse cells away from the sides y = 0, 1
    # (where the series converges fast): every fine point of 12 cells
    out["u_max"] = float(sol.values.max())
    centre_y = coarse.points[coarse.triangles].mean(axis=1)[:, 1]
    middle = np.flatnonzero((centre_y > 0.2) & (centre_y < 0.8))
    sample = middle[np.linspace(0, middle.size - 1, 12).astype(int)]
    corners = coarse.points[coarse.triangles[sample]]  # (12, 3, 2)
    lam = layout.patch(sol.values, int(sample[0]))[0] / 2.0**k
    xy = np.einsum("pr,crd->cpd", lam, corners)
    exact = series(xy[..., 0], xy[..., 1], terms=401)

    def sample_error(values):
        got = np.array([layout.patch(values, int(c))[1] for c in sample])
        return float(np.abs(got - exact).max())

    out["discretisation_error"] = sample_error(sol.values)
    converged = sol.values
    del sol
    if out["points"] <= EXTRAS_UP_TO:  # else full multigrid beside the solution would not fit
        t = time.perf_counter()
        fmg = hatkernels.solve_poisson(coarse, 1.0, refine=k, rtol=None)
        out["fmg_seconds"] = time.perf_counter() - t
        out["fmg_phases"] = fmg.stats.timings
        out["fmg_algebraic_error"] = float(np.abs(fmg.values - converged).max())
        out["fmg_error"] = sample_error(fmg.values)
        del fmg
    del converged
    # the patch product (the CG's operator) against its floor
    K = element_stiffness(coarse, np.ones(coarse.n_triangles))
    layout = PatchLayout(coarse, k, held_sides=coarse.boundary_edges())
    A = PatchOperator(layout, K)
    x = np.random.default_rng(1).standard_normal(A.shape[0])
    y = np.empty_like(x)
    # the fused kernel (what the operator runs) and the plain four-pass path beside it,
    # alternating, best of 11 each
    from hatkernels._jit import patches as _p

    def plain():
        _p.apply(x, y, A.n, A.K, layout.topo, layout.held_e, layout.held_v, True, A.pe, A.pv, 0)

    plain()
    best = best_plain = math.inf
    for _ in range(11):
        t = time.perf_counter()
        A.matvec_into(x, y)
        best = min(best, time.perf_counter() - t)
        t = time.perf_counter()
        plain()
        best_plain = min(best_plain, time.perf_counter() - t)
    out["product_seconds"] = best
    out["product_plain_seconds"] = best_plain
    # its floor: the same bytes (read x, write y) moved by the faster of a plain and a
    # negated parallel copy, best of 11 each (benchlib.copy_floor)
    out.update(copy_floor(x, y))
    out["peak_GiB_all"] = peak_rss_bytes() / 2**30
    return out


WORKERS = {"csr": run_csr, "stored": run_stored, "patch": run_patch}


def warm_up(path):
    """Compile (or load from numba's cache) every kernel of the path on a tiny problem, so
    that no timed run pays for it."""
    import hatkernels

    tiny = hatkernels.mesh.rectangle(2, 2)
    if path == "patch":
        hatkernels.solve_poisson(tiny, 1.0, refine=2, rtol=1e-8)
        hatkernels.solve_poisson(tiny, 1.0, refine=2, rtol=None)
        from hatkernels.patches import solve_on_patches

        solve_on_patches(tiny, 1.0, 2, rtol=1e-8, single=True)
    elif path == "stored":
        hatkernels.solve_poisson(tiny, 1.0, refine=2, preconditioner="gmg", rtol=1e-8)


def worker(path, c, k):
    warm_up(path)
    worker_result(WORKERS[path], c, k)


def case(path, c, k):
    return run_worker(__file__, path, c, k)


def fits(path, c, k, have):
    """A rough check before starting a case, from measured bytes per point."""
    per_point = {"csr": 250, "stored": 180, "patch": 43}[path]
    if path == "stored" and _points(c, k) <= WU_HERE_UP_TO:
        per_point += 250  # its work unit beside it
    return per_point * _points(c, k) < have


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cases", nargs="+", default=["125:3", "125:4", "125:5", "125:6"],
                   help="c:k pairs: rectangle(c, c) refined k times")
    p.add_argument("--only", nargs="+", choices=sorted(WORKERS), default=sorted(WORKERS))
    p.add_argument("--out", help="write the results here (JSON), whole or not at all")
    p.add_argument("--worker", nargs=3, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.worker:
        worker(args.worker[0], int(args.worker[1]), int(args.worker[2]))
        return 0
    from hatkernels.memory import available_bytes

    results = []
    for spec in args.cases:
        c, k = (int(v) for v in spec.split(":"))
        row = {"coarse": c, "refine": k, "triangles": 2 * c * c * 4**k,
               "points": _points(c, k)}
        for path in ("csr", "stored", "patch"):
            if path not in args.only:
                continue
            have = available_bytes() or 0
            row[path] = case(path, c, k) if fits(path, c, k, have) else {
                "error": "skipped: does not fit in memory (estimate)"}
            print(f"{spec} {path}: {json.dumps(row[path])[:400]}", flush=True)
        results.append(row)
    report(results)
    if args.out:
        write_json(args.out, results)  # whole or not at all
    return 0


def report(results):
    """A table in work units (the WU of the largest case that has one, per point, where a
    case has none of its own: marked)."""
    per_point = None
    for row in results:
        if "wu_seconds" in row.get("csr", {}):
            per_point = row["csr"]["wu_seconds"] / row["csr"]["points"]
    print("\n| triangles | path | seconds | iterations | WU total | WU per iteration | "
          "WU per steady iteration | peak GiB |")
    print("|---|---|---|---|---|---|---|---|")
    for row in results:
        csr = row.get("csr", {})
        wu = csr.get("wu_seconds")
        mark = ""
        if wu is None and per_point is not None:
            wu, mark = per_point * row["points"], " (WU extrapolated)"
        for path in ("stored", "patch"):
            r = row.get(path)
            if r is None:
                continue
            if "error" in r:
                print(f"| {row['triangles']:.3g} | {path} | {r['error'][:60]} | | | | | |")
                continue
            solve = r["phases"].get("solve", math.nan)
            its = max(r["iterations"], 1)
            here = r.get("wu_seconds_here")
            unit, note = (here, " (WU timed in its process)") if here else (wu, mark)
            steady = r.get("steady_iteration_seconds", math.nan)
            print(f"| {row['triangles']:.3g} | {path} | {r['seconds']:.1f} | {r['iterations']} "
                  f"| {r['seconds'] / unit if unit else math.nan:.0f}{note} | "
                  f"{solve / its / unit if unit else math.nan:.1f} | "
                  f"{steady / unit if unit else math.nan:.1f} | {r['peak_GiB']:.1f} |")
    # the patch product against its floor (the faster of two parallel copies of its vector;
    # results before 2026-12-05 had the plain copy alone)
    rows = [(row, row["patch"]) for row in results
            if "product_seconds" in row.get("patch", {})]
    if rows:
        # (product: the operator's kernel, fused since 2026-12-04; buffered: patches.apply)
        print("\n| triangles | n | product | buffered path | plain copy | negated copy "
              "| product / floor | buffered / floor |")
        print("|---|---|---|---|---|---|---|---|")
        for row, r in rows:
            floor = r.get("floor_seconds", r["copy_seconds"])
            neg = r.get("negated_copy_seconds", math.nan)
            plain = r.get("product_plain_seconds", math.nan)
            print(f"| {row['triangles']:.3g} | {2**row['refine']} | "
                  f"{r['product_seconds'] * 1e3:.1f} ms | {plain * 1e3:.1f} ms | "
                  f"{r['copy_seconds'] * 1e3:.1f} ms | {neg * 1e3:.1f} ms | "
                  f"{r['product_seconds'] / floor:.2f} | {plain / floor:.2f} |")


if __name__ == "__main__":
    sys.exit(main())
