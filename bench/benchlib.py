"""Helpers shared by the benchmark suite and its solve worker: peak memory, nested meshes.

Importable without pytest (bench/solve_worker.py runs in a fresh process).
"""

from __future__ import annotations

import ctypes
import gc
import re

import numpy as np

from hatkernels.mesh import rectangle
from hatkernels.perf import PeakMemory, nested, rss_bytes

__all__ = ["HWM", "ProcessPeak", "copy_floor", "round_peak", "nested", "refined_rectangle"]

try:
    _libc = ctypes.CDLL("libc.so.6")
except OSError:  # not glibc
    _libc = None


def _vm_hwm():
    with open("/proc/self/status") as f:
        m = re.search(r"VmHWM:\s+(\d+) kB", f.read())
    return int(m.group(1)) * 1024


def _reset_hwm():
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")


def _hwm_available():
    try:
        _reset_hwm()
        _vm_hwm()
        return True
    except OSError:
        return False


HWM = _hwm_available()


class ProcessPeak:
    """Peak resident memory of this process over a region, above what was resident before.

    Linux: the kernel's high-water mark (``VmHWM``) is reset on entry
    (``/proc/self/clear_refs``) after a garbage collection and
    ``malloc_trim``, so that memory freed earlier and still held by the
    allocator is not counted as free room.  It sees every allocation: NumPy,
    scipy's and PyAMG's C code, SuperLU, numba.  Where the high-water mark
    cannot be reset, :class:`hatkernels.perf.PeakMemory` (tracemalloc: NumPy and
    Python allocations only) is used instead and ``source`` says so.

    ``trim=False`` skips the ``malloc_trim``: memory the allocator still holds
    is then reused without being counted, so the peak can come out low, but
    the region does not pay for touching that memory again (a whole solve's
    heap on the development machine: 30 to 80 ms at 2.5e5 unknowns).  The
    solve benchmarks time their warm rounds so and take the peak from the
    cold first round, which trims.
    """

    def __init__(self, trim=True):
        self.source = "rss-hwm" if HWM else "tracemalloc"
        self.peak = None
        self.trim = trim

    def __enter__(self):
        gc.collect()
        if HWM:
            if _libc is not None and self.trim:
                _libc.malloc_trim(0)
            self._start = rss_bytes()
            _reset_hwm()
        else:
            self._traced = PeakMemory().__enter__()
        return self

    def __exit__(self, *exc):
        if HWM:
            self.peak = max(0, _vm_hwm() - self._start)
        else:
            self._traced.__exit__(*exc)
            self.peak = self._traced.peak
        return False



def round_peak(peaks):
    """``(entered ProcessPeak, bytes touched)`` for the next round of a benchmark.

    ``peaks``: the peaks of its earlier rounds.  The first round (no peaks)
    trims and measures exactly.  The development machine's host takes back
    memory the guest has freed within about two seconds, and touching it
    again then costs about 3 s per GiB (docs/performance.md); so before a
    later round 1.1 times the largest peak so far is touched here, untimed,
    and nothing is trimmed: the round stands as in a process that has run
    before, on a machine with an ordinary first touch.  Its peak can then
    read low; report the largest.
    """
    touched = int(1.1 * max((p or 0 for p in peaks), default=0))
    if touched:
        block = np.ones(touched // 8)
        del block
    return ProcessPeak(trim=touched == 0).__enter__(), touched


# -- the floor of a product ---------------------------------------------------------------
def copy_floor(x, y, rounds=11):
    """The least time this machine takes to read ``x`` and write ``y`` on all threads: the
    best of a plain copy and a negated copy, ``rounds`` each, taken in turn.

    A plain copy becomes ``memcpy``, whose large copies write with non-temporal
    stores; a negated copy writes with ordinary ones.  On the benchmark machine
    (AMD EPYC, Zen 4) the negated copy is 15-20 % faster (16.2 against 19.4 ms for
    6.4e7 values on 2026-12-05), so a floor made of the plain copy alone would
    flatter every kernel measured against it.  Returns the seconds of both and
    ``floor_seconds``, the smaller.
    """
    import math
    import time

    copy, negated = _floor_kernels()
    best = {"copy_seconds": math.inf, "negated_copy_seconds": math.inf}
    copy(x, y)
    negated(x, y)
    for _ in range(rounds):
        for key, kernel in (("copy_seconds", copy), ("negated_copy_seconds", negated)):
            t = time.perf_counter()
            kernel(x, y)
            best[key] = min(best[key], time.perf_counter() - t)
    best["floor_seconds"] = min(best.values())
    return best


def _floor_kernels():
    import numba

    @numba.njit(parallel=True, cache=False)
    def copy(x, y):
        for i in numba.prange(x.shape[0]):
            y[i] = x[i]

    @numba.njit(parallel=True, cache=False)
    def negated(x, y):
        for i in numba.prange(x.shape[0]):
            y[i] = -x[i]

    return copy, negated


# -- meshes -------------------------------------------------------------------------------
def refined_rectangle(n):
    """The ``n x n`` unit-square mesh made by refinement (it carries its levels for gmg)."""
    coarse, levels = nested(n)
    mesh = rectangle(coarse, coarse)
    for _ in range(levels):
        mesh = mesh.refine()
    return mesh


def worker_result(run, *args):
    """In a worker process: ``run(*args)``, printed as one ``RESULT`` line of JSON (an
    error is reported, not hidden: the table says why a case is missing)."""
    import json

    try:
        result = run(*args)
    except MemoryError:
        result = {"error": "does not fit in memory"}
    except Exception as exc:
        result = {"error": f"{type(exc).__name__}: {exc}"}
    print("RESULT " + json.dumps(result), flush=True)


def run_worker(script, *args):
    """Run ``script --worker *args`` in a fresh process and return its ``RESULT``."""
    import json
    import subprocess
    import sys

    run = subprocess.run([sys.executable, script, "--worker", *map(str, args)],
                         capture_output=True, text=True)
    for line in run.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    tail = (run.stderr or run.stdout)[-300:]
    return {"error": f"the worker stopped (code {run.returncode}, killed if -9: out of "
                     f"memory): {tail}"}


def run_alternating(script, cases, variants, rounds, report, keys):
    """Every case with every variant, each in a fresh process (:func:`run_worker` with
    ``(case, variant)``), ``rounds`` times, the variants in turn reversed from round to
    round (the machine's speed drifts).  Returns the rows: ``keys`` name the case and
    the variant, ``round`` the round, the rest is the worker's result; ``report(row)``
    prints a row that has no error (an error is printed as it is)."""
    rows = []
    for case in cases:
        for rnd in range(rounds):
            for variant in variants if rnd % 2 == 0 else variants[::-1]:
                row = {keys[0]: case, keys[1]: variant, "round": rnd,
                       **run_worker(script, case, variant)}
                rows.append(row)
                if "error" in row:
                    print(case, variant, row["error"], flush=True)
                else:
                    report(row)
    return rows


def alternating_main(script, doc, run_case, option, cases, variants, keys, report, argv=None):
    """The command line of a script that compares ``variants`` on ``cases``: ``--<option>``
    picks cases, ``--rounds`` and ``--out`` (JSON), and the hidden ``--worker case
    variant`` runs ``run_case`` in a worker (:func:`run_alternating`)."""
    import argparse

    from hatkernels._output import write_json

    parser = argparse.ArgumentParser(description=doc.splitlines()[0])
    parser.add_argument(f"--{option}", nargs="+", default=list(cases), choices=cases)
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--out")
    parser.add_argument("--worker", nargs=2, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        worker_result(run_case, *args.worker)
        return
    results = run_alternating(script, getattr(args, option), variants, args.rounds, report,
                              keys)
    if args.out:
        write_json(args.out, results)
