"""Transient: per-step time and work units of solve_transient against a plain scipy loop.

    python bench/transient.py --sizes 316 1000 1414 2000 --out bench/results/transient.json
    python bench/transient.py --sizes 1000 --refine 3 --preconditioner gmg --orderings COLAMD

For each size ``n`` the cooling unit square (``rectangle(n, n)``, ``(n + 1)^2``
points; ``u0 = sin(pi x) sin(pi y)``, ``u = 0`` on the boundary, Crank-Nicolson,
``dt`` fixed, ``--steps`` steps; ``--case`` heating: from ``u0 = 0`` with a unit
source, jump: from 1 on a disc and 0 elsewhere) is marched twice, each in a
fresh process:

``hatkernels``
    :func:`hatkernels.transient.solve_transient` with its defaults (the matrix
    ``M + dt/2 K`` and its preconditioner once, CG warm-started per step) but
    ``startup=0``, so that both march the same plain Crank-Nicolson steps and the
    final fields differ by the solver's tolerance only.
``superlu``
    what a user would write with scipy: the same matrices (assembled by
    hatkernels, Dirichlet rows removed), ``splu`` of ``M + dt/2 K`` once (column
    ordering ``--ordering``, default ``MMD_AT_PLUS_A``, the better of SuperLU's
    orderings for these symmetric matrices: about 40 % less fill than its
    default ``COLAMD`` and half the solve time at 10^5 unknowns), then per step
    ``u = lu.solve((M - dt/2 K) @ u)``.

Per step: the median and the mean wall time over the steps after the first
(which has no previous step to start from; the mean counts the steps that need
no CG iteration and those that need one alike), and the same in work units (WU: one product with the
assembled ``M + dt/2 K`` by the library's parallel CSR kernel, measured in the
same process).  Also: setup times (assembly; preconditioner or factorisation),
iterations, peak resident memory above the process's baseline (after a small
warm-up march) per point, the largest difference between the two final fields
relative to their maximum, the machine's copy bandwidth and the load average
around each run (other processes on the two cores slow every parallel region:
compare runs made on a quiet machine; ``--quiet-load`` waits for one).  A size whose
factorisation is predicted not to fit in memory (``--memory-gb``: the peak per point
measured at the previous size, times 1.2) is skipped for ``superlu`` and recorded as
such.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time


def _problem(n, dim, refine=0, case="cooling"):
    """The mesh (``n`` cells per side; with ``refine`` the coarse mesh of ``n / 2^refine``
    cells per side refined that many times: the same points), u0 and the source."""
    import numpy as np

    from hatkernels.mesh import cuboid, rectangle

    c = n >> refine
    if c << refine != n:
        raise SystemExit(f"--refine {refine} needs sizes divisible by {2 ** refine}, got {n}")
    mesh = rectangle(c, c) if dim == 2 else cuboid(c, c, c)
    for _ in range(refine):
        mesh = mesh.refine()
    if case == "cooling":
        return mesh, np.prod(np.sin(np.pi * mesh.points), axis=1), 0.0
    if case == "heating":
        return mesh, np.zeros(mesh.n_points), 1.0
    r2 = ((mesh.points - 0.5) ** 2).sum(axis=1)  # "jump": a hot disc in a cold body
    return mesh, (r2 < 0.1).astype(float), 0.0


def worker(args):
    import numpy as np

    from hatkernels.perf import PeakMemory
    from hatkernels.transient import solve_transient

    if args.method == "patches":
        return patch_worker(args)
    small, u_small, f = _problem(32, args.dim, min(args.refine, 3), args.case)
    solve_transient(small, u_small, [0.01], dt=0.001, f=f,  # the kernels loaded first
                    preconditioner=args.preconditioner)
    mesh, u0, f = _problem(args.n, args.dim, args.refine, args.case)
    dt, steps = args.dt, args.steps
    rec = {"method": args.method, "dim": args.dim, "n": args.n, "points": mesh.n_points,
           "dt": dt, "steps": steps}
    peak = PeakMemory("rss")
    if args.method == "hatkernels":
        t = time.perf_counter()
        with peak:
            sol = solve_transient(mesh, u0, [steps * dt], dt=dt, startup=0, f=f,
                                  preconditioner=args.preconditioner)
        s = sol.stats
        later = slice(1, None)
        rec.update(total_s=time.perf_counter() - t, unknowns=s.unknowns, nnz=s.nnz,
                   assemble_s=s.timings["assemble"], setup_s=s.timings["setup"],
                   product_s=s.product_seconds,
                   step_s=float(np.median(s.step_seconds[later])),
                   step_wu=float(np.median(s.work_units[later])),
                   step_mean_s=float(np.mean(s.step_seconds[later])),
                   step_mean_wu=float(np.mean(s.work_units[later])),
                   iterations=s.iterations.tolist(), rtol=s.rtol,
                   smoother_iterations=s.smoother_iterations.tolist(),
                   preconditioner=s.preconditioner, converged=s.converged, threads=s.threads)
        u = sol.u[-1]
    else:
        import scipy.sparse.linalg as sla

        from hatkernels.assembly import StiffnessAssembler, assemble_load
        from hatkernels.boundary import apply_dirichlet
        from hatkernels.transient_steps import measure_product

        with peak:
            t = time.perf_counter()
            assembler = StiffnessAssembler(mesh)
            K = assembler.assemble()
            M = assembler.assemble_mass()
            held = mesh.boundary_points()
            A = apply_dirichlet(M + 0.5 * dt * K, np.zeros(mesh.n_points), held)
            B = (M - 0.5 * dt * K).tocsr()[A.free][:, A.free]  # not definite: scipy slices
            load = dt * assemble_load(mesh, f)[A.free] if f else 0.0
            del K, M
            assemble = time.perf_counter() - t
            product = measure_product(A.A)
            t = time.perf_counter()
            lu = sla.splu(A.A.tocsc(), permc_spec=args.ordering)
            factor = time.perf_counter() - t
            x = u0[A.free]
            times = []
            for _ in range(steps):
                t = time.perf_counter()
                x = lu.solve(B @ x + load)
                times.append(time.perf_counter() - t)
        later = times[1:]
        rec.update(unknowns=int(A.A.shape[0]), nnz=int(A.A.nnz), assemble_s=assemble,
                   setup_s=factor, product_s=product, step_s=float(np.median(later)),
                   step_wu=float(np.median(later)) / product, ordering=args.ordering,
                   step_mean_s=float(np.mean(later)), step_mean_wu=float(np.mean(later)) / product,
                   fill_per_unknown=(lu.L.nnz + lu.U.nnz) / A.A.shape[0])
        u = A.expand(x)
    rec.update(peak_bytes=peak.peak, bytes_per_point=peak.peak / mesh.n_points,
               u_max=float(u.max()))
    np.save(args.field, u)
    print(json.dumps(rec), flush=True)


def patch_worker(args):
    """The same march by :func:`hatkernels.solve_transient` with ``refine`` and no
    preconditioner named on ``rectangle(n / 2^refine)``: the never-stored refinement
    (:func:`hatkernels.transient_patches.march_on_patches`)."""
    import numpy as np

    from hatkernels.mesh import rectangle
    from hatkernels.perf import PeakMemory
    from hatkernels.transient import solve_transient

    def sine(x, y):
        return np.sin(np.pi * x) * np.sin(np.pi * y)

    def disc(x, y):
        return (((x - 0.5) ** 2 + (y - 0.5) ** 2) < 0.1).astype(float)

    u0, f = {"cooling": (sine, 0.0), "heating": (0.0, 1.0), "jump": (disc, 0.0)}[args.case]
    solve_transient(rectangle(4, 4), u0, [0.01], dt=0.001, refine=3, f=f)  # kernels loaded
    c = args.n >> args.refine
    if args.dim != 2 or args.refine < 1 or c << args.refine != args.n:
        raise SystemExit("the patch march needs --dim 2 and --refine >= 1 dividing the size")
    dt, steps = args.dt, args.steps
    peak = PeakMemory("rss")
    t = time.perf_counter()
    with peak:
        sol = solve_transient(rectangle(c, c), u0, [steps * dt], dt=dt, refine=args.refine,
                              startup=0, f=f)
    s = sol.stats
    if "patch" not in s.preconditioner:
        raise SystemExit(f"solve_transient did not take the patch path: {s.preconditioner}")
    later = slice(1, None)
    rec = {"method": "patches", "dim": 2, "n": args.n, "points": s.unknowns, "dt": dt,
           "steps": steps, "total_s": time.perf_counter() - t, "unknowns": s.unknowns,
           "assemble_s": s.timings["assemble"], "setup_s": s.timings["setup"],
           "step_s": float(np.median(s.step_seconds[later])),
           "step_mean_s": float(np.mean(s.step_seconds[later])),
           "iterations": s.iterations.tolist(), "rtol": s.rtol,
           "smoother_iterations": s.smoother_iterations.tolist(),
           "preconditioner": s.preconditioner, "converged": s.converged, "threads": s.threads,
           "peak_bytes": peak.peak, "bytes_per_point": peak.peak / s.unknowns}
    u = sol.u[-1]
    rec["u_max"] = float(u.max())
    np.save(args.field, u)
    print(json.dumps(rec), flush=True)


def _wait_for_quiet(limit, most=1800):
    """Wait (up to ``most`` seconds) until the 1-minute load average is below ``limit``."""
    start = time.time()
    while limit is not None and os.getloadavg()[0] >= limit and time.time() - start < most:
        time.sleep(15)


def _run(method, n, args, field, ordering):
    _wait_for_quiet(args.quiet_load)
    cmd = [sys.executable, os.path.abspath(__file__), "--worker", "--method", method,
           "--n", str(n), "--dim", str(args.dim), "--dt", str(args.dt), "--steps",
           str(args.steps), "--ordering", ordering, "--field", field,
           "--refine", str(args.refine), "--preconditioner", args.preconditioner,
           "--case", args.case]
    load = os.getloadavg()[0]
    # OpenBLAS's threads (the dense coarsest solves) would compete with numba's
    # (DEVELOPERS.md, Benchmarks); SuperLU does not use them
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
    out = subprocess.run(cmd, capture_output=True, text=True, check=True, env=env).stdout
    rec = json.loads(out.strip().splitlines()[-1])
    rec["load_average_before_after"] = [load, os.getloadavg()[0]]
    return rec


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--method", default="hatkernels", help=argparse.SUPPRESS)
    ap.add_argument("--n", type=int, default=100, help=argparse.SUPPRESS)
    ap.add_argument("--field", help=argparse.SUPPRESS)
    ap.add_argument("--ordering", default="COLAMD", help=argparse.SUPPRESS)
    ap.add_argument("--dim", type=int, choices=(2, 3), default=2)
    ap.add_argument("--sizes", type=int, nargs="+", default=[316, 1000],
                    help="cells per side: rectangle(n, n), or cuboid(n, n, n) with --dim 3")
    ap.add_argument("--dt", type=float, default=1e-3)
    ap.add_argument("--refine", type=int, default=0,
                    help="build each mesh by refining a coarse one this many times (the "
                         "same points), so that gmg has levels")
    ap.add_argument("--preconditioner", default="amg",
                    help="hatkernels' preconditioner (gmg needs --refine)")
    ap.add_argument("--steps", type=int, default=20)
    ap.add_argument("--patches", action="store_true",
                    help="also march by solve_transient with no preconditioner named, which "
                         "keeps the refinement as patches (needs --refine)")
    ap.add_argument("--case", choices=("cooling", "heating", "jump"), default="cooling",
                    help="cooling: u0 = sin(pi x) sin(pi y) (the default); heating: u0 = 0 "
                         "and a unit source; jump: u0 = 1 on a disc, 0 elsewhere")
    ap.add_argument("--orderings", nargs="*", default=["COLAMD", "MMD_AT_PLUS_A"],
                    help="SuperLU column orderings (permc_spec) of the baseline; COLAMD is "
                         "scipy's default")
    ap.add_argument("--memory-gb", type=float, default=16.0,
                    help="skip a baseline whose factor is predicted to exceed this")
    ap.add_argument("--quiet-load", type=float,
                    help="before each run, wait (at most 30 min) for the 1-minute load "
                         "average to fall below this")
    ap.add_argument("--out")
    args = ap.parse_args()
    if args.worker:
        worker(args)
        return
    import numpy as np

    from hatkernels.perf import memory_bandwidth

    records = []
    fill = {}
    machine = {"bandwidth_GBs": memory_bandwidth(), "cpus": os.cpu_count()}
    for n in args.sizes:
        points = (n + 1) ** args.dim
        field = f"/tmp/transient-bench-{os.getpid()}.npy"
        ours = _run("hatkernels", n, args, field, "")
        ours_u = np.load(field)
        records.append(ours)
        patches = None
        if args.patches:
            rec = patches = _run("patches", n, args, field, "")
            rec["relative_difference"] = float(np.abs(np.load(field) - ours_u).max()
                                               / np.abs(ours_u).max())
            rec["step_wu"] = rec["step_s"] / ours["product_s"]  # the stored run's unit
            rec["step_mean_wu"] = rec["step_mean_s"] / ours["product_s"]
            records.append(rec)
            print(f"{args.dim}-D n={n} patches: step {rec['step_s'] * 1e3:.1f} ms (mean "
                  f"{rec['step_mean_s'] * 1e3:.1f} ms = {rec['step_mean_wu']:.1f} WU of the "
                  f"stored run) ({np.mean(rec['iterations'][1:]):.1f} iterations, "
                  f"{np.mean(rec['smoother_iterations'][1:]):.1f} with the smoother), setup "
                  f"{rec['setup_s']:.2f} s, {rec['bytes_per_point']:.0f} B/point, fields "
                  f"differ by {rec['relative_difference']:.1e}", flush=True)
        print(f"{args.dim}-D n={n} hatkernels: {points:,} points, step "
              f"{ours['step_s'] * 1e3:.1f} ms = {ours['step_wu']:.1f} WU (mean "
              f"{ours['step_mean_s'] * 1e3:.1f} ms = {ours['step_mean_wu']:.1f} WU) "
              f"({np.mean(ours['iterations'][1:]):.1f} iterations, "
              f"{np.mean(ours['smoother_iterations'][1:]):.1f} with the smoother), setup "
              f"{ours['setup_s']:.2f} s, {ours['bytes_per_point']:.0f} B/point", flush=True)
        for ordering in args.orderings:
            if ordering in fill:  # the peak per point measured at the last size, grown
                predicted = fill[ordering] * 1.2 * points / 2**30
                if predicted > args.memory_gb:
                    records.append({"method": "superlu", "ordering": ordering, "dim": args.dim,
                                    "n": n, "points": points,
                                    "skipped": f"factor predicted {predicted:.1f} GiB"})
                    print(f"  superlu {ordering}: skipped (predicted {predicted:.1f} GiB)",
                          flush=True)
                    continue
            rec = _run("superlu", n, args, field, ordering)
            base_u = np.load(field)
            fill[ordering] = rec["bytes_per_point"]
            rec["speedup_per_step"] = rec["step_s"] / ours["step_s"]
            rec["speedup_per_step_mean"] = rec["step_mean_s"] / ours["step_mean_s"]
            rec["relative_difference"] = float(np.abs(ours_u - base_u).max()
                                               / np.abs(base_u).max())
            records.append(rec)
            print(f"  superlu {ordering}: step {rec['step_s'] * 1e3:.1f} ms = "
                  f"{rec['step_wu']:.1f} WU, factor {rec['setup_s']:.1f} s, "
                  f"{rec['bytes_per_point']:.0f} B/point; hatkernels is "
                  f"{rec['speedup_per_step']:.1f}x faster per step (median; mean "
                  f"{rec['speedup_per_step_mean']:.1f}x), fields differ by "
                  f"{rec['relative_difference']:.1e}", flush=True)
            if patches is not None:
                rec["patches_speedup_per_step"] = rec["step_s"] / patches["step_s"]
                rec["patches_speedup_per_step_mean"] = rec["step_mean_s"] / patches["step_mean_s"]
                print(f"  superlu {ordering}: the patch path is "
                      f"{rec['patches_speedup_per_step']:.1f}x faster per step (median; mean "
                      f"{rec['patches_speedup_per_step_mean']:.1f}x)", flush=True)
        os.unlink(field)
    if args.out:
        from hatkernels._output import write_json

        write_json(args.out, {"machine": machine, "dim": args.dim, "dt": args.dt,
                              "case": args.case,
                              "steps": args.steps, "refine": args.refine,
                              "preconditioner": args.preconditioner, "records": records})


if __name__ == "__main__":
    main()
