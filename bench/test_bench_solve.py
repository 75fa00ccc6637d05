"""Whole solves of -lap u = 1 on the unit square (u = 0 on the boundary), side by side.

    python -m pytest bench/test_bench_solve.py --benchmark-only [--size full]

Each round starts from the mesh a user has (``rectangle(n, n)``, built
untimed and fresh for every round) and ends with the nodal values ``u``;
every method must reach the relative residual ``RTOL`` (recomputed
afterwards from an independent assembly, ``relative_residual``).  Methods
(bench/solve_worker.py has the pipelines):

this project, ``hatkernels.solve_poisson(mesh, 1.0, preconditioner=..., rtol=RTOL)``:
    ``amg`` (the default, = ``hatkernels.precond.AMG_DEFAULT``), ``amg-sa``,
    ``amg-sa-chebyshev``, ``ic0``, ``ic0-modified``, ``jacobi``, ``none``
    (plain CG on our kernels), ``direct``, and ``gmg``: matrix-free, on the
    same ``n x n`` mesh made by refinement (``benchlib.nested``)
plain alternatives, plain end to end (``solve_worker.plain_system``: the
``triplets`` assembly, a NumPy load vector, the Dirichlet rows and columns
sliced away with scipy), then:
    ``scipy-cg``   ``scipy.sparse.linalg.cg(A, b, rtol=RTOL)``, no preconditioner
    ``superlu``    ``scipy.sparse.linalg.splu(A).solve(b)``, default options
    ``pyamg-rs``   ``pyamg.ruge_stuben_solver(A).solve(b, tol=RTOL, accel="cg")``
    ``pyamg-sa``   ``pyamg.smoothed_aggregation_solver(A).solve(b, tol=RTOL, accel="cg")``

Phases (``assemble_s``: load, matrix and Dirichlet reduction, or the
matrix-free operator; ``setup_s``; ``solve_s``) are timed inside the call;
the benchmark time is the whole call.  ``setup_s + solve_s`` compares the
solvers alone.  Bytes moved are a one-pass model (:func:`solve_traffic`) that
undercounts.  Peak memory is the high-water mark of
the round above what was resident before it (mesh built): with ``--size
full`` each benchmark runs in a fresh process (bench/solve_worker.py, timed
from here over a pipe) so that no earlier benchmark's freed memory is
reused; with ``--size quick`` in this process.  Slow methods (time growing
faster than the unknowns) run up to a size limit; skipped sizes say so.
"""

import json
import os
import subprocess
import sys
import tempfile

import numpy as np
import pytest
from conftest import MAX_THREADS, best_time, record, size_mode
from solve_worker import BASELINE, METHODS, RTOL, SLOW, Runner

from hatkernels import threads

ONE_THREAD = {"amg", "gmg"}  # thread scaling, up to 1.1e6 unknowns
CASES = [pytest.param(m, MAX_THREADS, id=f"method={m}-threads={MAX_THREADS}") for m in METHODS]
CASES += [pytest.param(m, 1, id=f"method={m}-threads=1") for m in sorted(ONE_THREAD)
          if MAX_THREADS > 1]
WORKER = os.path.join(os.path.dirname(os.path.abspath(__file__)), "solve_worker.py")


class FreshProcess:
    """A Runner in a new process (bench/solve_worker.py), driven over its stdin and stdout."""

    def __init__(self, name, n, n_threads):
        self._err = tempfile.TemporaryFile(mode="w+")
        self.p = subprocess.Popen([sys.executable, WORKER, name, str(n), str(n_threads)],
                                  stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                  stderr=self._err, text=True, bufsize=1)
        self.warm_figures = json.loads(self._expect("warm"))

    def _expect(self, tag):
        line = self.p.stdout.readline()
        if not line.startswith(tag):
            self.p.kill()
            self._err.seek(0)
            raise RuntimeError(f"solve worker: expected {tag!r}, got {line!r}; its stderr:\n"
                               + self._err.read()[-4000:])
        return line[len(tag):].strip()

    def _ask(self, word, answer):
        self.p.stdin.write(word + "\n")
        self.p.stdin.flush()
        return self._expect(answer)

    def warm(self):
        return self.warm_figures

    def prepare(self):
        self._ask("prepare", "ready")

    def go(self):
        self._ask("go", "done")

    def result(self):
        rounds = json.loads(self._ask("result", "result"))
        self.p.stdin.write("quit\n")
        self.p.stdin.close()
        self.p.wait(timeout=120)
        self._err.close()
        return rounds


class InProcess(Runner):
    def result(self):
        self.finish()
        for rd in self.rounds:
            rd["peak_source"] = "this process, " + rd["peak_source"]
        return self.rounds


# vector passes of length n per CG iteration, counted on this project's loop
# (kernels/krylov.py): q = A p (p read, q written) 2, fused update x += a p,
# r -= a q, r.r (p, q, x, r read, x, r written) 6, z = M r (r read, z written) 2,
# r.z 2, p = z + b p (z, p read, p written) 3; Jacobi's fused update computes z
# and r.z in the same pass (12); without a preconditioner z is r (11).
# scipy's and PyAMG's CG loops make more passes: for them this is a lower count.
CG_VECTORS = {"none": 11, "scipy-cg": 11, "jacobi": 12}


def solve_traffic(name, rd):
    """A model, not a measurement: bytes a whole solve moves, from one round's figures.

    One pass over everything, nothing counted twice::

        assemble  = mesh read + load vector written (8 points) + operator written
        setup     = operator read + preconditioner written
        iteration = operator read + preconditioner read + CG_VECTORS[name] * 8 n
        total     = assemble + setup + iterations * iteration + u written (8 points)

    ``operator`` is the reduced CSR matrix (data, indices, indptr) or the
    matrix-free operator's arrays, plus what a product reads of the mesh
    (``solve_worker.mesh_read_bytes``); ``preconditioner`` its stored bytes
    (the ``memory`` of its description; PyAMG's level matrices A, P, R;
    SuperLU's 12 bytes per entry of L + U), plus for gmg what its level
    operators read of their meshes; ``n`` the length of CG's vectors.  A solve
    without iterations (plain SuperLU) counts one pass over the factor and
    16 n.  Assumptions as in ``test_bench_linear.precond_traffic``: each byte
    touched once per phase or apply, nothing held in cache.  It undercounts
    the bytes the code touches (triplet assembly, the setups, multigrid
    smoothing sweeps and IC(0)'s two sweeps all touch more), so the GB/s
    from it is a low figure, and its floor is this method's own, not the
    least any method needs.  None when a preconditioner's stored bytes are not known.
    """
    op, pc = rd.get("operator_read_bytes"), rd.get("preconditioner_read_bytes")
    if op is None or pc is None or rd.get("preconditioner_bytes") is None:
        return None
    n = rd["vector_length"]
    points = 8 * rd["n_points"]
    assemble = rd["fine_mesh_bytes"] + points + rd["operator_bytes"]
    setup = op + rd["preconditioner_bytes"]
    if rd["iterations"] is None:
        solve = pc + 16 * n
    else:
        solve = rd["iterations"] * (op + pc + 8 * CG_VECTORS.get(name, 13) * n)
    return assemble + setup + solve + points


@pytest.mark.parametrize("name, n_threads", CASES)
def test_solve(benchmark, machine, request, solve_cells, name, n_threads):
    n = solve_cells
    unknowns = (n - 1) ** 2
    limit = METHODS[name][2]
    if limit is not None and unknowns > limit:
        pytest.skip(f"{name}: {unknowns} unknowns is above the {limit} this suite runs it to")
    if n_threads == 1 and unknowns > 1_100_000:
        pytest.skip("1-thread solves are measured up to 1.1e6 unknowns")
    quick = size_mode(request.config) == "quick"
    # fresh-process runs have at least two rounds: the first cold, the later ones with
    # their memory touched just before (solve_worker.Runner.prepare); the benchmark's
    # time is the best round, the first one's is recorded as cold_s
    n_rounds = 3 if quick or (unknowns <= 300_000 and name not in SLOW) else 2
    fresh = not quick and not benchmark.disabled
    runner = FreshProcess(name, n, n_threads) if fresh else InProcess(name, n, n_threads)
    with threads(n_threads):
        first = {} if benchmark.disabled else runner.warm()
        benchmark.pedantic(runner.go, setup=runner.prepare, rounds=n_rounds)
    rounds = runner.result()
    t = best_time(benchmark)
    stats = getattr(benchmark, "stats", None)
    best = rounds[int(np.argmin(stats.stats.data))] if stats is not None else rounds[0]
    for rd in rounds:
        # a benchmark of a wrong answer is worthless: every round must really have solved
        assert rd["relative_residual"] < 100 * RTOL, f"{name}: residual {rd['relative_residual']}"
    peaks = [rd["peak_bytes"] for rd in rounds if rd["peak_bytes"] is not None]
    peak = max(peaks) if peaks else None
    best = dict(best, peak_bytes=peak)
    record(
        benchmark, machine, solve_traffic(name, best), kind="solve", traffic_model="one pass", operation="poisson", method=name,
        plain=METHODS[name][0], baseline=BASELINE.get(name), threads=n_threads,
        default=name == "amg", unknowns=int(unknowns),
        mesh="refined" if name == "gmg" else "rectangle", rtol=RTOL,
        peak_bytes_per_point=None if peak is None else peak / best["n_points"],
        seconds_per_unknown=None if t is None else t / unknowns,
        phases_total_s=best["assemble_s"] + best["setup_s"] + best["solve_s"],
        cold_s=rounds[0]["seconds"] if rounds[0].get("cold") else None,
        **best, **first,
    )


_FIRST = """
import json, time
t0 = time.perf_counter()
import hatkernels
t1 = time.perf_counter()
m = hatkernels.mesh.rectangle(64, 64)
hatkernels.solve_poisson(m, 1.0, rtol=1e-8)
t2 = time.perf_counter()
f = hatkernels.mesh.rectangle(16, 16).refine().refine()
hatkernels.solve_poisson(f, 1.0, preconditioner="gmg", rtol=1e-8)
t3 = time.perf_counter()
print(json.dumps({"import_s": t1 - t0, "amg_s": t2 - t1, "gmg_s": t3 - t2}))
"""


@pytest.mark.parametrize("cache", ["warm", "empty"], ids=lambda c: f"numba_cache={c}")
def test_first_solve(benchmark, machine, request, cache):
    """A fresh process: import, then a first small solve with amg and one with gmg.

    ``warm``: numba's cache as the suite left it (what a user sees after the
    first run); ``empty``: a new cache directory, every kernel compiled.
    """
    if cache == "empty" and size_mode(request.config) == "quick":
        pytest.skip("compiling every kernel takes about 20 s: --size full only")
    figures = {}

    def run(env):
        out = subprocess.run([sys.executable, "-c", _FIRST], env=env, capture_output=True,
                             text=True, check=True)
        figures.update(json.loads(out.stdout.strip().splitlines()[-1]))

    with tempfile.TemporaryDirectory() as tmp:
        env = dict(os.environ)
        if cache == "empty":
            env["NUMBA_CACHE_DIR"] = tmp
        benchmark.pedantic(run, args=(env,), rounds=1, iterations=1)
    record(benchmark, machine, kind="first-call", operation="first solve in a new process",
           method=f"numba cache {cache}", plain=False, baseline=None, **figures)
