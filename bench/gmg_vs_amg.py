"""CG + gmg (matrix-free) against CG + amg (assembled), end to end, at 1, 4 and 16 million triangles.

    python bench/gmg_vs_amg.py                      # n = 704, 1408, 2816: 1e6, 4e6, 1.6e7 triangles
    python bench/gmg_vs_amg.py --cells 704 1408 --rounds 3

Each method and size runs in a fresh process (bench/solve_worker.py, the
pipelines of the benchmark suite's whole solves): ``rectangle(n, n)`` for
amg, the same n x n mesh made by refinement for gmg, ``-lap u = 1`` to rtol
1e-8, the answer checked afterwards against an independent assembly.  It
prints the best round's time and phases, the cold first round's time (see
solve_worker.Runner.prepare) and the peak memory above what was resident
before the solve (the largest over the rounds: the cold one's).  Not part of the test run (the largest size needs
about 6 GB and a few minutes); docs/matrix-free.md quotes a run.
"""

import argparse
import json
import os
import subprocess
import sys

import numba

WORKER = os.path.join(os.path.dirname(os.path.abspath(__file__)), "solve_worker.py")


def run(method, n, rounds, n_threads):
    """Best round (by wall time) of ``rounds`` in one fresh worker process."""
    p = subprocess.Popen([sys.executable, WORKER, method, str(n), str(n_threads)], stdin=subprocess.PIPE,
                         stdout=subprocess.PIPE, text=True, bufsize=1)

    def ask(word, answer):
        p.stdin.write(word + "\n")
        p.stdin.flush()
        line = p.stdout.readline()
        if not line.startswith(answer):
            p.kill()
            raise SystemExit(f"solve worker ({method}, n={n}): expected {answer!r}, got {line!r}")
        return line[len(answer):].strip()

    line = p.stdout.readline()
    if not line.startswith("warm"):
        p.kill()
        raise SystemExit(f"solve worker ({method}, n={n}) did not start: {line!r}")
    for _ in range(rounds):
        ask("prepare", "ready")
        ask("go", "done")
    figures = json.loads(ask("result", "result"))
    p.stdin.write("quit\n")
    p.stdin.close()
    p.wait(timeout=120)
    best = dict(min(figures, key=lambda r: r["seconds"]))
    # the peak of the cold first round (the later ones keep the allocator's memory
    # and read low: solve_worker.Runner.prepare); the time of the best round
    best["peak_bytes"] = max(r["peak_bytes"] or 0 for r in figures)
    best["cold_seconds"] = figures[0]["seconds"]
    return best


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells", type=int, nargs="+", default=[704, 1408, 2816])
    ap.add_argument("--rounds", type=int, default=2)
    ap.add_argument("--threads", type=int, default=numba.config.NUMBA_NUM_THREADS)
    args = ap.parse_args(argv)
    print("triangles   method  iterations  assemble  setup  solve  total   cold   peak MiB  rel. residual")
    for n in args.cells:
        best = {}
        for method in ("gmg", "amg"):
            r = best[method] = run(method, n, args.rounds, args.threads)
            print(f"{r['n_triangles']:>11,} {method:>6} {r['iterations']:>10} "
                  f"{r['assemble_s']:>9.2f} {r['setup_s']:>6.2f} {r['solve_s']:>6.2f} "
                  f"{r['seconds']:>6.2f} {r['cold_seconds']:>6.2f} {r['peak_bytes'] / 2**20:>10.1f} "
                  f"{r['relative_residual']:>14.1e}", flush=True)
        g, a = best["gmg"], best["amg"]
        print(f"{'':>11} amg / gmg: time {a['seconds'] / g['seconds']:.2f}, "
              f"peak memory gmg / amg {g['peak_bytes'] / a['peak_bytes']:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
