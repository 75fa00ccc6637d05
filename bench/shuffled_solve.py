"""A mesh numbered without locality: ``solve_poisson`` renumbered, not renumbered, and the
same mesh in its natural numbering, end to end.

    flock /tmp/hk-bench.lock python bench/shuffled_solve.py --n 1000 --rounds 3 \
        --out bench/results/shuffled_solve.json

The mesh is ``jittered_mesh(n, 7)`` of ``tests/conftest.py`` (a Delaunay mesh of an
``n x n`` grid of jittered points, ``(n + 1)^2`` points), in random point order
(``shuffled``) or as the grid numbers it (``natural``); ``-lap u = 1``, ``u = 0`` on
the boundary, ``rtol=1e-8``, the default preconditioner.  Each case runs in its own
process (best of ``--rounds`` after one warm-up solve on a small mesh), the cases
alternating, ``--repeat`` times.  It prints the best round's time, phases and
iterations, and the process's peak resident memory beyond what it held before the
first round (the OS's high-water mark, reset first).  Not part of the test run.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys

CASES = ("shuffled", "shuffled-kept", "natural")


def worker(case, n, rounds):
    import time

    sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tests"))
    from conftest import jittered_mesh

    import hatkernels

    mesh = jittered_mesh(n, 7, shuffle=case != "natural")
    hatkernels.solve_poisson(hatkernels.mesh.rectangle(30, 30), 1.0)  # compiled, cached
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")  # reset the high-water mark

    def status(key):
        with open("/proc/self/status") as f:
            return next(int(line.split()[1]) * 1024 for line in f if line.startswith(key))

    base = status("VmRSS")
    best = None
    for _ in range(rounds):
        t = time.perf_counter()
        sol = hatkernels.solve_poisson(mesh, 1.0, rtol=1e-8,
                                       renumber=False if case == "shuffled-kept" else None)
        seconds = time.perf_counter() - t
        if best is None or seconds < best["seconds"]:
            best = {"seconds": seconds, "iterations": int(sol.stats.iterations),
                    "phases": {k: float(v) for k, v in sol.stats.timings.items()}}
    best.update(case=case, points=int(mesh.n_points), unknowns=int(sol.stats.unknowns),
                peak_beyond_bytes=status("VmHWM") - base)
    print(json.dumps(best))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--out")
    ap.add_argument("--worker", choices=CASES, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        worker(args.worker, args.n, args.rounds)
        return 0
    runs = []
    print("case            points      iterations  best s  renumber  assemble  setup  solve  "
          "peak B/unknown")
    for _ in range(args.repeat):
        for case in CASES:
            out = subprocess.run([sys.executable, __file__, "--worker", case, "--n", str(args.n),
                                  "--rounds", str(args.rounds)], capture_output=True, text=True,
                                 check=True, env={**os.environ, "OPENBLAS_NUM_THREADS": "1"})
            r = json.loads(out.stdout.strip().splitlines()[-1])
            runs.append(r)
            p = r["phases"]
            print(f"{case:<15} {r['points']:>9,} {r['iterations']:>10} {r['seconds']:>8.2f} "
                  f"{p.get('renumber', 0.0):>8.2f} {p['assemble']:>9.2f} {p['setup']:>6.2f} "
                  f"{p['solve']:>6.2f} {r['peak_beyond_bytes'] / r['unknowns']:>10.0f}",
                  flush=True)
    if args.out:
        with open(args.out + ".tmp", "w") as f:
            json.dump({"n": args.n, "rounds": args.rounds, "runs": runs}, f, indent=1)
        os.replace(args.out + ".tmp", args.out)
    return 0


if __name__ == "__main__":
    sys.exit(main())
