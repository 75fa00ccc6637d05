"""Peak memory per rank of the replicated and the scattered input, and the two-level method's
iterations against the ranks, on an unstructured 2-D mesh read from an .npz file (not a
timed test: bytes and counts; times only as measured).

    python bench/distributed_scatter.py --ranks 1 2 4 8 --cells 999 --transfer \
        --sizes 125 250 500 999 --sweep-ranks 2 4 8 --out bench/results/distributed_scatter.json

writes the mesh once (a jittered ``rectangle(cells, cells)``: interior points moved at
random by up to 0.15 of a side, through ``Mesh(points, cells)``, then
``hatkernels.io.write_mesh``), then for each P and each input runs
``mpiexec -n P python bench/distributed_scatter.py --worker ...``:

replicated
    every rank reads the file and calls ``solve_poisson(mesh, ...)``;
scattered
    rank 0 reads it and calls ``solve_poisson(mesh, ...)``, the others
    ``solve_poisson(None, ...)``.

Each solve is ``coarse="constants"`` (block ``amg`` plus one constant per subdomain),
rtol 1e-8, ``gather=False`` (a gathered solution would add 8 bytes per point on every
rank).  Recorded per rank: resident memory after the imports (before reading), its peak
after the solve, local points; per run: iterations, timings.  ``--sizes`` adds
iterations of the scattered path at fixed P (``--sweep-ranks``) for other jittered
meshes made in the worker, with the two-level method and with block Jacobi
(``--sweep-coarse``), to show how the counts grow with the points per subdomain.  ``--transfer`` (with P = 2) sends rank 1's part a second time
both ways, buffers and a pickled dict of arrays, and records the receiver's seconds and
traced peak.  Oversubscribed beyond the cores: times are not scaling figures.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time


def jittered_square(cells, seed=1, amount=0.15):
    """A jittered ``rectangle(cells, cells)`` as a checked ``Mesh(points, cells)``."""
    import numpy as np

    import hatkernels
    from hatkernels.mesh import rectangle

    grid = rectangle(cells, cells)
    p = grid.points.copy()
    inner = np.setdiff1d(np.arange(grid.n_points), grid.boundary_points())
    rng = np.random.default_rng(seed)
    p[inner] += rng.uniform(-amount / cells, amount / cells, size=(inner.size, 2))
    return hatkernels.Mesh(p, grid.cells)


def _source(x, y):
    return 1.0 + x * y


def _transfer(comm, mesh):
    """Rank 1's part sent again, by buffers and pickled: the receiver's seconds and peak."""
    import tracemalloc

    from hatkernels.distributed import partition
    from hatkernels.distributed.scatter import part_arrays, part_of, recv_part, send_part
    from hatkernels.problem import PoissonProblem

    out = {}
    part = None
    if comm.Get_rank() == 0:
        part = part_of(PoissonProblem(mesh, _source), partition(mesh, 2), 1)
        meta, arrays = part_arrays(part)
        out["part_bytes"] = int(sum(a.nbytes for a in arrays.values()))
    for how in ("buffers", "pickled"):
        comm.Barrier()
        if comm.Get_rank() == 0:
            t = time.perf_counter()
            if how == "buffers":
                send_part(comm, part, 1)
            else:
                comm.send(part_arrays(part), dest=1, tag=5)
            out[how + "_send_seconds"] = time.perf_counter() - t
        elif comm.Get_rank() == 1:
            tracemalloc.start()
            t = time.perf_counter()
            got = recv_part(comm) if how == "buffers" else comm.recv(source=0, tag=5)
            seconds = time.perf_counter() - t
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            del got
            comm.send({how + "_recv_seconds": seconds, how + "_recv_peak_bytes": peak}, 0, 6)
        if comm.Get_rank() == 0:
            out.update(comm.recv(source=1, tag=6))
    return out


def worker(args):
    from mpi4py import MPI

    import hatkernels
    from hatkernels import distributed
    from hatkernels.io import read_mesh
    from hatkernels.perf import peak_rss_bytes

    comm = MPI.COMM_WORLD
    rank = comm.Get_rank()
    start = peak_rss_bytes()
    if args.sizes:  # iterations only, scattered, meshes made on rank 0
        found = []
        for cells in args.sizes:
            mesh = jittered_square(cells) if rank == 0 else None
            sol = distributed.solve_poisson(mesh, _source, comm=comm, coarse=args.coarse,
                                            rtol=1e-8, gather=False)
            found.append({"cells": cells, "points": (cells + 1) ** 2,
                          "iterations": sol.stats.iterations})
            del mesh, sol
        if rank == 0:
            print(json.dumps({"ranks": comm.Get_size(), "sweep": found}), flush=True)
        return
    t = time.perf_counter()
    mesh = read_mesh(args.mesh) if args.input == "replicated" or rank == 0 else None
    read = time.perf_counter() - t
    sol = distributed.solve_poisson(mesh, _source, comm=comm, coarse=args.coarse, rtol=1e-8,
                                    gather=False)
    starts = comm.gather(start, root=0)
    reads = comm.gather(read, root=0)
    transfer = _transfer(comm, mesh) if args.transfer and comm.Get_size() == 2 else {}
    if rank == 0:
        s = sol.stats
        bal = s.distribution.balance
        print(json.dumps({
            "ranks": comm.Get_size(), "input": args.input, "path": s.distribution.path,
            "points": mesh.n_points, "cells": mesh.n_cells, "unknowns": s.unknowns,
            "coarse": args.coarse, "iterations": s.iterations, "converged": s.converged,
            "timings_max": s.timings, "version": hatkernels.__version__,
            "per_rank": [{"rank": b["rank"], "owned_points": b["owned_points"],
                          "local_points": b["owned_points"] + b["ghost_points"],
                          "cells": b["cells"], "rss_after_imports": starts[b["rank"]],
                          "peak_rss_bytes": b["peak_rss_bytes"],
                          "read_seconds": reads[b["rank"]],
                          "operator_bytes": b["operator_bytes"]} for b in bal],
            "transfer": transfer,
        }), flush=True)


def _mpiexec():
    here = os.path.join(os.path.dirname(sys.executable), "mpiexec")
    return here if os.path.exists(here) else "mpiexec"


def _run(p, extra):
    cmd = [_mpiexec(), "-n", str(p), sys.executable, os.path.abspath(__file__), "--worker",
           *extra]
    out = subprocess.run(cmd, capture_output=True, text=True, check=True).stdout
    return json.loads(out.strip().splitlines()[-1])


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--input", choices=("replicated", "scattered"), help=argparse.SUPPRESS)
    ap.add_argument("--mesh", help="the .npz mesh file (written if missing)")
    ap.add_argument("--ranks", type=int, nargs="+", default=[1, 2, 4])
    ap.add_argument("--cells", type=int, default=999, help="cells per side of the mesh")
    ap.add_argument("--coarse", default="constants")
    ap.add_argument("--sizes", type=int, nargs="*", default=[],
                    help="cells per side of the iteration sweep (scattered, --sweep-ranks)")
    ap.add_argument("--sweep-ranks", type=int, nargs="*", default=[4])
    ap.add_argument("--sweep-coarse", nargs="*", default=["constants", "none"],
                    help="coarse spaces of the sweep ('none': block Jacobi)")
    ap.add_argument("--transfer", action="store_true")
    ap.add_argument("--out")
    args = ap.parse_args()
    if args.coarse == "none":
        args.coarse = None
    if args.worker:
        worker(args)
        return
    from hatkernels.io import write_mesh

    path = args.mesh or os.path.join(os.environ.get("TMPDIR", "/tmp"),
                                     f"jittered_{args.cells}.npz")
    if not os.path.exists(path):
        t = time.perf_counter()
        write_mesh(path, jittered_square(args.cells))
        print(f"wrote {path} ({os.path.getsize(path) / 2**20:.0f} MiB) in "
              f"{time.perf_counter() - t:.1f} s", flush=True)
    coarse = ["--coarse", str(args.coarse)] if args.coarse else ["--coarse", "none"]
    records = []
    for p in args.ranks:
        for mode in ("replicated", "scattered"):
            extra = ["--input", mode, "--mesh", path, *coarse]
            if args.transfer and p == 2 and mode == "scattered":
                extra.append("--transfer")
            rec = _run(p, extra)
            records.append(rec)
            per = rec["per_rank"]
            mib = [r["peak_rss_bytes"] / 2**20 for r in per]
            print(f"P={p} {mode:10s}: {rec['iterations']} iterations, peak rank 0 "
                  f"{mib[0]:.0f} MiB, largest other {max(mib[1:], default=0):.0f} MiB, "
                  f"largest local points {max(r['local_points'] for r in per):,}, solve "
                  f"{rec['timings_max']['solve']:.1f} s", flush=True)
    sweeps = []
    for kind in args.sweep_coarse if args.sizes else []:
        for p in args.sweep_ranks:
            rec = _run(p, ["--sizes", *map(str, args.sizes), "--coarse", kind])
            rec["coarse"] = None if kind == "none" else kind
            sweeps.append(rec)
            print(f"P={p} sweep, coarse {kind}: " + ", ".join(
                f"{r['points']:,} points {r['iterations']} its" for r in rec["sweep"]),
                flush=True)
    if args.out:
        with open(args.out + ".tmp", "w") as fh:
            json.dump({"runs": records, "sweeps": sweeps, "mesh": os.path.basename(path),
                       "note": "oversubscribed beyond the cores: times are not scaling "
                       "figures; peak_rss_bytes is each process's high-water mark after "
                       "the solve", "cores": os.cpu_count()}, fh, indent=1)
        os.replace(args.out + ".tmp", args.out)


if __name__ == "__main__":
    main()
