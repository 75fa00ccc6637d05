"""Iterations, memory per rank and communication of the partitioned distributed multigrid
for P = 1, 2, 4, ... ranks (not a timed test: counts and bytes; times only as measured).

    python bench/distributed_refined.py --ranks 1 2 4 8 --cells 16 --refine 6 \
        --levels matrix-free matrix-free:edges assembled --repeat 3 \
        --out bench/results/distributed_refined.json
    python bench/distributed_refined.py --dim 3 --ranks 1 2 4 8 --cells 4 --refine 4 \
        --levels matrix-free matrix-free:geometry assembled --repeat 3 \
        --out bench/results/distributed_refined_3d.json
    python bench/distributed_refined.py --per-rank --ranks 1 2 4 8 --cells 8 --refine 6 \
        --repeat 3 --out bench/results/distributed_refined_weak.json
    python bench/distributed_refined.py --threads 1 --ranks 1 2 --cells 8 --refine 6 \
        --levels matrix-free matrix-free:edges assembled --repeat 3 \
        --out bench/results/distributed_refined_1thread.json   # and --dim 3 --cells 4 --refine 4

(each under ``flock /tmp/hk-bench.lock``, so that no two benchmarks share the cores)

runs ``mpiexec -n P python bench/distributed_refined.py --worker ...`` for each P
(oversubscribed when P exceeds the cores: then the times are not scaling figures)
and writes one JSON record per P and kind of level operator (``--levels``:
matrix-free, matrix-free:<variant> or assembled; by default the first and the
last side by side): CG iterations and the time per iteration (the best of
``--repeat`` solves), the serial numbers of points and unknowns, per rank the
finest level's local points, owned points, ghosts, neighbours, peak resident
memory and the bytes per local point above the process's baseline (its
resident memory after a small warm-up solve), the halo bytes per product and
the coarse bytes per cycle.  ``--dim 3`` uses ``cuboid(cells)``;
``--per-rank`` keeps the points per rank fixed instead (weak scaling: ``cells``
grows with P).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys


def worker(args):
    from mpi4py import MPI

    import hatkernels
    from hatkernels import distributed
    from hatkernels.mesh import cuboid, rectangle
    from hatkernels.perf import rss_bytes

    comm = MPI.COMM_WORLD
    cells = args.cells
    coarse = rectangle(cells, cells) if args.dim == 2 else cuboid(cells)
    f = (lambda x, y: 1.0 + x * y) if args.dim == 2 else (lambda x, y, z: 1.0 + x * y * z)
    kind = args.levels[0]
    options = dict(preconditioner="gmg", rtol=1e-8, comm=comm, gather=False,
                   matrix_free=kind != "assembled", threads=args.threads)
    if ":" in kind:  # matrix-free:<variant>
        options["variant"] = kind.split(":")[1]
    # a small solve first: the kernels loaded, what the process holds before the
    # measured solve is its baseline (Python, numpy, scipy, numba, MPI)
    small = rectangle(4, 4) if args.dim == 2 else cuboid(2, 2, 2)
    distributed.solve_poisson(small, f, refine=2, **options)
    baseline = rss_bytes()
    sol = distributed.solve_poisson(coarse, f, refine=args.refine, **options)
    # more solves for the time only (the memory is the first one's): the best is the one
    # least disturbed by other processes on the cores
    per_iteration = [sol.stats.timings["solve"] / max(sol.stats.iterations, 1)]
    for _ in range(args.repeat - 1):
        again = distributed.solve_poisson(coarse, f, refine=args.refine, **options).stats
        per_iteration.append(again.timings["solve"] / max(again.iterations, 1))
    bases = comm.gather(baseline)
    if comm.Get_rank() == 0:
        s = sol.stats
        bal = s.distribution.balance
        print(json.dumps({
            "ranks": comm.Get_size(), "dim": args.dim, "coarse_cells": cells,
            "refine": args.refine, "points": s.unknowns + s.dirichlet_points,
            "iterations": s.iterations,
            "levels": kind, "threads": s.threads,
            "preconditioner": s.preconditioner,
            "converged": s.converged, "timings_max": s.timings,
            "seconds_per_iteration": min(per_iteration),
            "seconds_per_iteration_runs": per_iteration,
            "version": hatkernels.__version__,
            "per_rank": [{**{k: b[k] for k in ("rank", "owned_points", "ghost_points", "cells",
                                               "neighbours", "levels_points", "peak_rss_bytes",
                                               "halo_bytes_per_product", "operator_bytes",
                                               "multigrid_bytes")},
                          "baseline_rss_bytes": base,
                          "bytes_per_local_point": (b["peak_rss_bytes"] - base)
                          / b["levels_points"][-1]}
                         for b, base in zip(bal, bases, strict=True)],
            "halo_bytes_per_product": s.distribution.communication["halo_bytes_per_product"],
            "coarse_bytes_per_cycle": s.distribution.communication[
                "coarse_bytes_per_application"],
        }), flush=True)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--ranks", type=int, nargs="+", default=[1, 2, 4])
    ap.add_argument("--dim", type=int, choices=(2, 3), default=2)
    ap.add_argument("--cells", type=int, default=16)
    ap.add_argument("--refine", type=int, default=6)
    ap.add_argument("--per-rank", action="store_true",
                    help="weak scaling: coarse cells grow so that points per rank stay fixed")
    ap.add_argument("--levels", nargs="+", default=["matrix-free", "assembled"],
                    help="the multigrid levels' operators, each P run once per kind: "
                         "matrix-free (the default variant), matrix-free:<variant>, "
                         "assembled")
    ap.add_argument("--repeat", type=int, default=1,
                    help="solves per run; the time per iteration is the best of them")
    ap.add_argument("--threads", type=int, default=None,
                    help="numba threads per rank (default: the library's choice)")
    ap.add_argument("--out")
    args = ap.parse_args()
    if args.worker:
        worker(args)
        return
    here = os.path.dirname(os.path.abspath(__file__))
    mpiexec = os.path.join(os.path.dirname(sys.executable), "mpiexec")
    records = []
    for p in args.ranks:
        cells = args.cells
        if args.per_rank:
            cells = round(args.cells * p ** (1.0 / args.dim))
        for kind in args.levels:  # side by side, one after the other
            cmd = [mpiexec if os.path.exists(mpiexec) else "mpiexec", "-n", str(p),
                   sys.executable, os.path.join(here, "distributed_refined.py"), "--worker",
                   "--dim", str(args.dim), "--cells", str(cells), "--refine", str(args.refine),
                   "--levels", kind, "--repeat", str(args.repeat)]
            cmd += [] if args.threads is None else ["--threads", str(args.threads)]
            load = os.getloadavg()[0]
            out = subprocess.run(cmd, capture_output=True, text=True, check=True).stdout
            rec = json.loads(out.strip().splitlines()[-1])
            # other processes on the cores slow every parallel region: said beside the times
            rec["load_average_before_after"] = [load, os.getloadavg()[0]]
            records.append(rec)
            worst = max(r["peak_rss_bytes"] for r in rec["per_rank"]) / 2**20
            local = max(r["levels_points"][-1] for r in rec["per_rank"])
            per_point = max(r["bytes_per_local_point"] for r in rec["per_rank"])
            print(f"P={p:3d} {kind:>20}: {rec['points']:,} points, {rec['iterations']} "
                  f"iterations, largest rank {local:,} local points, peak {worst:.0f} MiB "
                  f"({per_point:.0f} B per local point above the baseline), halo "
                  f"{rec['halo_bytes_per_product'] / 1e3:.1f} kB per product, "
                  f"{1e3 * rec['seconds_per_iteration']:.0f} ms per iteration", flush=True)
    if args.out:
        with open(args.out + ".tmp", "w") as fh:
            json.dump({"runs": records, "note": "oversubscribed beyond the cores: times are "
                       "not scaling figures; bytes per local point: peak minus the "
                       "process's resident memory after a small warm-up solve, over the "
                       "finest level's local points", "cores": os.cpu_count(),
                       "per_rank": args.per_rank}, fh, indent=1)
        os.replace(args.out + ".tmp", args.out)


if __name__ == "__main__":
    main()
