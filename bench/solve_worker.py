"""Whole-solve pipelines for bench/test_bench_solve.py, and the fresh process that times them.

    python bench/solve_worker.py METHOD N THREADS

runs one benchmark's rounds in a new process, driven line by line over
stdin and stdout by test_bench_solve.py (``--size full``): so that the peak
memory of a solve is measured in a process that has done nothing else (no
earlier benchmark's freed memory to reuse), while the parent's
pytest-benchmark times each round.  Protocol (one line each way):

    child   "warm {json}"       after a small solve run twice (compile time)
    parent  "prepare"  child "ready"    fresh mesh built, memory touched (rounds after
                                        the first: Runner.prepare), memory baseline taken
    parent  "go"       child "done"     the timed solve (the parent times this exchange)
    parent  "result"   child "result {json}"   figures of every round
    parent  "quit"

Only protocol lines go to stdout; anything the libraries print goes to stderr.
"""

from __future__ import annotations

import json
import os
import re
import sys
import time

import numpy as np
import pyamg
import scipy.sparse.linalg as sla
from benchlib import refined_rectangle, round_peak

from hatkernels import apply_dirichlet, assemble_load, assemble_stiffness, solve_poisson, threads
from hatkernels.mesh import rectangle
from hatkernels.operators import DEFAULT_VARIANT
from hatkernels.precond import AMG_DEFAULT

RTOL = 1e-8
UNLIMITED = None
_LIMITED = 1_100_000  # the Chebyshev setup's Lanczos estimate per level grows with n
# method: (plain?, solve_poisson options, most unknowns it runs to (None: every size))
METHODS = {
    "amg": (False, {}, UNLIMITED),
    "amg-rs": (False, {"preconditioner": "amg-rs"}, UNLIMITED),
    "amg-sa": (False, {"preconditioner": "amg-sa"}, UNLIMITED),
    "amg-sa-chebyshev": (False, {"preconditioner": "amg-sa", "smoother": "chebyshev"}, _LIMITED),
    "gmg": (False, {"preconditioner": "gmg"}, UNLIMITED),
    "ic0": (False, {"preconditioner": "ic0"}, 300_000),
    "ic0-modified": (False, {"preconditioner": "ic0", "modified": True}, 1_100_000),
    "jacobi": (False, {"preconditioner": "jacobi"}, 300_000),
    "none": (False, {"preconditioner": "none"}, 300_000),
    "direct": (False, {"preconditioner": "direct", "max_unknowns": 1_100_000}, 1_100_000),
    "scipy-cg": (True, None, 300_000),
    "superlu": (True, None, 1_100_000),
    "pyamg-rs": (True, None, UNLIMITED),
    "pyamg-sa": (True, None, UNLIMITED),
}
# their time grows faster than the unknowns: one round in the full set
SLOW = {"ic0", "ic0-modified", "jacobi", "none", "direct", "scipy-cg", "superlu"}
# the PyAMG solver of the same kind as the default AMG (classical, or smoothed aggregation)
_PYAMG_DEFAULT = "pyamg-sa" if AMG_DEFAULT == "amg-sa" else "pyamg-rs"
# the plain alternative each method is compared with
BASELINE = {"amg": _PYAMG_DEFAULT, "amg-rs": "pyamg-rs", "amg-native": "pyamg-rs",
            "amg-sa": "pyamg-sa", "amg-sa-chebyshev": "pyamg-sa",
            "gmg": _PYAMG_DEFAULT, "none": "scipy-cg", "jacobi": "scipy-cg",
            "ic0": "scipy-cg", "ic0-modified": "scipy-cg", "direct": "superlu"}


def plain_system(mesh):
    """What a user writes without this project: NumPy triplets, scipy slicing for Dirichlet.

    The stiffness matrix by the ``triplets`` strategy (vectorised NumPy element
    matrices, scipy COO -> CSR: the plain alternative of the assembly
    benchmarks), the load of f = 1 as a third of each triangle's area per
    corner, and the boundary rows and columns sliced away.
    """
    A = assemble_stiffness(mesh, strategy="triplets")
    p, t = mesh.points, mesh.triangles
    e1, e2 = p[t[:, 1]] - p[t[:, 0]], p[t[:, 2]] - p[t[:, 0]]
    area = 0.5 * np.abs(e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0])
    b = np.bincount(t.ravel(), weights=np.repeat(area / 3.0, 3), minlength=mesh.n_points)
    free = np.setdiff1d(np.arange(mesh.n_points), mesh.boundary_points())
    return A[free][:, free], b[free], free


def csr_nbytes(A):
    return int(A.data.nbytes + A.indices.nbytes + A.indptr.nbytes)


def mesh_read_bytes(mesh, variant):
    """Mesh bytes a matrix-free product of ``variant`` reads besides the operator's own arrays.

    As in test_bench_matrix_free.py: ``geometry`` reads points and triangles,
    ``factors`` and ``inherited`` the triangles, ``edges`` nothing of the mesh.
    """
    return {"geometry": mesh.triangles.nbytes + mesh.points.nbytes,
            "factors": mesh.triangles.nbytes, "inherited": mesh.triangles.nbytes,
            "edges": 0}[variant]


def _plain(mesh, name):
    """A plain pipeline end to end: plain assembly, then the solver as its documentation shows."""
    t0 = time.perf_counter()
    A, b, free = plain_system(mesh)
    t1 = time.perf_counter()
    iterations = None
    if name == "scipy-cg":
        count = []
        x, info = sla.cg(A, b, rtol=RTOL, callback=lambda xk: count.append(1))
        iterations = len(count)
        t2 = t1
    elif name == "superlu":
        lu = sla.splu(A.tocsc())
        t2 = time.perf_counter()
        x = lu.solve(b)
    else:
        build = (pyamg.ruge_stuben_solver if name == "pyamg-rs"
                 else pyamg.smoothed_aggregation_solver)
        ml = build(A)
        t2 = time.perf_counter()
        residuals = []
        x = ml.solve(b, tol=RTOL, accel="cg", residuals=residuals)
        iterations = len(residuals) - 1
    u = np.zeros(mesh.n_points)
    u[free] = x
    t3 = time.perf_counter()
    # for the traffic model (test_bench_solve.py): sums of array sizes, microseconds
    if name == "scipy-cg":
        pc_bytes = 0
    elif name == "superlu":
        pc_bytes = 12 * int(lu.nnz)  # float64 value and int32 row index per entry of L + U
    else:
        pc_bytes = sum(csr_nbytes(getattr(lv, k)) for lv in ml.levels for k in ("A", "P", "R")
                       if getattr(lv, k, None) is not None)
    return u, {"assemble_s": t1 - t0, "setup_s": t2 - t1, "solve_s": t3 - t2,
               "iterations": iterations, "operator_bytes": csr_nbytes(A),
               "operator_read_bytes": csr_nbytes(A), "preconditioner_bytes": pc_bytes,
               "preconditioner_read_bytes": pc_bytes, "vector_length": int(A.shape[0])}


def _ours(mesh, name):
    sol = solve_poisson(mesh, 1.0, rtol=RTOL, **METHODS[name][1])
    st = sol.stats
    t = st.timings
    # for the traffic model (test_bench_solve.py).  The preconditioner's stored bytes are
    # read from its description ("..., memory N bytes, ..."): solve_poisson keeps no
    # handle on it; None when the description does not say
    found = re.search(r"memory (\d+) bytes", st.preconditioner)
    pc_bytes = None if found is None else int(found.group(1))
    pc_read = pc_bytes
    op_read = st.stored_bytes
    if st.matrix_free:  # the products read the mesh besides the operator's arrays
        op_read += mesh_read_bytes(mesh, DEFAULT_VARIANT)
        if pc_read is not None and name == "gmg":  # so do gmg's level operators
            pc_read += sum(mesh_read_bytes(m, DEFAULT_VARIANT) for m in mesh.levels()[1:])
    return sol.u, {"assemble_s": t["boundary"] + t["assemble"], "setup_s": t["setup"],
                   "solve_s": t["solve"], "iterations": st.iterations,
                   "converged": bool(sol.converged), "description": st.preconditioner,
                   "matrix_free": st.matrix_free, "operator_bytes": st.stored_bytes,
                   "operator_read_bytes": int(op_read), "preconditioner_bytes": pc_bytes,
                   "preconditioner_read_bytes": pc_read,
                   "vector_length": int(mesh.n_points if st.matrix_free else st.unknowns)}


def run(name, mesh):
    """Mesh in, nodal values and the phase times out."""
    return _plain(mesh, name) if METHODS[name][0] else _ours(mesh, name)


def make_mesh(name, n):
    """The mesh a user starts from: ``rectangle(n, n)``, or the same made by refinement (gmg)."""
    return refined_rectangle(n) if name == "gmg" else rectangle(n, n)


def check(mesh, u):
    """``(|b - A u| / |b|, nnz)`` on the free points, assembled independently of the solve."""
    A = assemble_stiffness(mesh)
    b = assemble_load(mesh, 1.0)
    system = apply_dirichlet(A, b, mesh.boundary_points())
    x = system.restrict(u)
    residual = float(np.linalg.norm(system.b - system.A @ x) / np.linalg.norm(system.b))
    return residual, int(system.A.nnz)


class Runner:
    """One benchmark's rounds: warm up, then per round prepare (untimed) and go (timed)."""

    def __init__(self, name, n, n_threads):
        self.name, self.n, self.n_threads = name, n, n_threads
        self.rounds = []
        self._mesh = self._out = self._peak = None
        self._touched = 0

    def warm(self):
        """A small solve twice: the first compiles or loads every kernel; report the excess."""
        times = []
        with threads(self.n_threads):
            for _ in range(2):
                mesh = make_mesh(self.name, 16)
                t0 = time.perf_counter()
                run(self.name, mesh)
                times.append(time.perf_counter() - t0)
        return {"compile_s": max(0.0, times[0] - times[1]), "compile_probe": "small problem"}

    def prepare(self, touch=False):
        """Build the round's mesh; with ``touch``, warm the round (benchlib.round_peak).

        The first round pays the development machine's slow first touch of
        memory in full ("cold"); later rounds of a fresh-process benchmark get
        the largest peak so far touched just before them, untimed.
        """
        self.finish()
        self._mesh = make_mesh(self.name, self.n)
        peaks = [rd["peak_bytes"] for rd in self.rounds] if touch else []
        self._peak, self._touched = round_peak(peaks)

    def go(self):
        with threads(self.n_threads):
            t0 = time.perf_counter()
            self._out = run(self.name, self._mesh)
            self._seconds = time.perf_counter() - t0
        self._peak.__exit__(None, None, None)

    def finish(self):
        """Check the last round's answer and keep its figures (outside the timed part)."""
        if self._out is None:
            return
        u, phases = self._out
        mesh = self._mesh
        self._out = self._mesh = None
        levels = mesh.levels()
        residual, nnz = check(mesh, u)
        self.rounds.append(dict(
            phases, seconds=self._seconds, peak_bytes=self._peak.peak,
            touched_bytes=self._touched, cold=self._touched == 0,
            peak_source=self._peak.source, relative_residual=residual, nnz=nnz,
            u_max=float(u.max()), n_triangles=int(mesh.n_triangles),
            n_points=int(mesh.n_points),
            mesh_bytes=int(sum(m.points.nbytes + m.triangles.nbytes for m in levels)),
            fine_mesh_bytes=int(mesh.points.nbytes + mesh.triangles.nbytes),
        ))


def worker(argv):
    name, n, n_threads = argv[0], int(argv[1]), int(argv[2])
    protocol = os.fdopen(os.dup(sys.stdout.fileno()), "w", buffering=1)
    # library output, from Python or from C, must not corrupt the protocol
    sys.stdout.flush()
    os.dup2(sys.stderr.fileno(), sys.stdout.fileno())
    sys.stdout = sys.stderr

    def say(*words):
        protocol.write(" ".join(words) + "\n")
        protocol.flush()

    r = Runner(name, n, n_threads)
    say("warm", json.dumps(r.warm()))
    for line in sys.stdin:
        word = line.strip()
        if word == "prepare":
            r.prepare(touch=True)
            say("ready")
        elif word == "go":
            r.go()
            say("done")
        elif word == "result":
            r.finish()
            for rd in r.rounds:
                rd["peak_source"] = "fresh process, " + rd["peak_source"]
            say("result", json.dumps(r.rounds))
        elif word == "quit":
            return 0
        else:
            raise SystemExit(f"solve_worker: unknown command {word!r}")
    return 0


if __name__ == "__main__":
    sys.exit(worker(sys.argv[1:]))
