"""Full multigrid (gmg's nested start) against CG + V-cycle from zero, in work units.

    flock /tmp/hk-bench.lock python bench/full_multigrid.py --refine 5 6 7 8 \
        --out bench/results/full_multigrid.json

The problem: ``-lap u = 2 pi^2 sin(pi x) sin(pi y)`` on the unit square, ``u = 0`` on
its boundary (exact solution ``sin(pi x) sin(pi y)``), on ``rectangle(8, 8)`` refined
``k`` times (``(8 2^k + 1)^2`` points).  In one process per size, side by side:

``nested``
    ``solve_poisson(..., preconditioner="gmg", rtol=None)``: full multigrid alone
    (one V-cycle per level); its cost is the ``start`` phase.
``nested x2``
    the same with ``nested_cycles=2``.
``cg``
    CG + V-cycle from zero to ``rtol`` 1e-8 (today's default path).
``nested + cg``
    CG + V-cycle from the nested start to ``rtol`` 1e-8.

A work unit (WU) is one product with the assembled stiffness matrix of the same mesh
(Dirichlet rows removed) by the library's parallel CSR kernel, best of 10, measured in
the same process.  Accuracy: the L2 and H1-seminorm errors against the exact solution,
and the L2 norm of the algebraic error (against a solve to rtol 1e-10), relative to
the L2 error of that converged solution.  Run it on a quiet machine.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import time

import numba
import numpy as np

import hatkernels
from hatkernels import norms, solve_poisson
from hatkernels._jit import sparse as _k
from hatkernels.assembly import assemble_stiffness
from hatkernels.boundary import apply_dirichlet
from hatkernels.mesh import rectangle

PI = np.pi


def exact(x, y):
    return np.sin(PI * x) * np.sin(PI * y)


def grad_exact(x, y):
    return PI * np.cos(PI * x) * np.sin(PI * y), PI * np.sin(PI * x) * np.cos(PI * y)


def source(x, y):
    return 2 * PI**2 * exact(x, y)


def _work_unit(mesh):
    A = apply_dirichlet(assemble_stiffness(mesh), np.zeros(mesh.n_points),
                        mesh.boundary_points()).A
    x, y = np.ones(A.shape[0]), np.empty(A.shape[0])
    best = np.inf
    for _ in range(10):
        t = time.perf_counter()
        _k.spmv(A.indptr, A.indices, A.data, x, y)
        best = min(best, time.perf_counter() - t)
    return best


def _best(fn, rounds):
    out, best = None, np.inf
    for _ in range(rounds):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return out, best


def one_size(k, rounds):
    mesh = rectangle(8, 8)
    for _ in range(k):
        mesh = mesh.refine()
    wu = _work_unit(mesh)
    tight = solve_poisson(mesh, source, preconditioner="gmg", rtol=1e-10, maxiter=100)
    e_l2 = norms.l2_error(mesh, tight.u, exact)
    e_h1 = norms.h1_seminorm_error(mesh, tight.u, grad_exact)
    rec = {"refine": k, "points": int(mesh.n_points), "unknowns": int(tight.stats.unknowns),
           "wu_s": wu, "l2_error": e_l2, "h1_error": e_h1, "runs": {}}
    runs = {
        "nested": dict(rtol=None),
        "nested x2": dict(rtol=None, nested_cycles=2),
        "cg": dict(rtol=1e-8),
        "nested + cg": dict(rtol=1e-8, start="nested"),
    }
    for name, options in runs.items():
        sol, total = _best(lambda o=options: solve_poisson(mesh, source, preconditioner="gmg",
                                                           **o), rounds)
        t = sol.stats.timings
        algebraic = norms.l2_error(mesh, sol.u - tight.u, lambda x, y: 0 * x)
        solve_s = t.get("start", 0.0) + t["solve"]
        rec["runs"][name] = {
            "iterations": int(sol.stats.iterations), "total_s": total,
            "start_wu": t.get("start", 0.0) / wu, "solve_wu": solve_s / wu,
            "total_wu": total / wu,
            "wu_per_iteration": (t["solve"] / wu / sol.stats.iterations
                                 if sol.stats.iterations else None),
            "l2_ratio": norms.l2_error(mesh, sol.u, exact) / e_l2,
            "h1_ratio": norms.h1_seminorm_error(mesh, sol.u, grad_exact) / e_h1,
            "algebraic_over_l2": algebraic / e_l2,
        }
        r = rec["runs"][name]
        print(f"{mesh.n_points:>11,} {name:12s} its {r['iterations']:3d}  solve "
              f"{r['solve_wu']:6.1f} WU  whole call {r['total_wu']:6.1f} WU  L2 x{r['l2_ratio']:.3f}"
              f"  H1 x{r['h1_ratio']:.4f}  algebraic/L2 {r['algebraic_over_l2']:.3f}", flush=True)
    return rec


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--refine", type=int, nargs="+", default=[5, 6, 7])
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--out")
    args = ap.parse_args()
    small = rectangle(4, 4).refine().refine()
    solve_poisson(small, source, preconditioner="gmg", rtol=None)  # kernels loaded
    solve_poisson(small, source, preconditioner="gmg", rtol=1e-8)
    records = [one_size(k, args.rounds) for k in args.refine]
    if args.out:
        doc = {"benchmark": "full_multigrid", "date": time.strftime("%Y-%m-%d %H:%M:%S"),
               "hatkernels": hatkernels.__version__, "threads": numba.get_num_threads(),
               "machine": platform.machine(), "load_average": os.getloadavg(),
               "records": records}
        tmp = args.out + ".tmp"
        with open(tmp, "w") as f:
            json.dump(doc, f, indent=1)
        os.replace(tmp, args.out)


if __name__ == "__main__":
    main()
