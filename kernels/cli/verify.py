"""``hatkernels verify``: a convergence study against a manufactured solution.

``-lap u = 2 pi^2 sin(pi x) sin(pi y)`` on the unit square with ``u = 0`` on
the boundary has the exact solution ``u = sin(pi x) sin(pi y)``; on uniform
refinements linear elements converge at rate 2 in L2 and 1 in H1 (P. G.
Ciarlet, The Finite Element Method for Elliptic Problems, 1978).  Exits 1
when the finest rates are not within :data:`RATE_TOLERANCE` of those.
"""

from __future__ import annotations

import contextlib
import math
import os
import time

import numpy as np

from hatkernels import io as kio
from hatkernels import plot, solve_poisson
from hatkernels.cli.common import (
    PROG,
    base_record,
    command_line,
    error,
    not_installed,
    threads,
    versions,
)
from hatkernels.cli.progress import CompileNotice
from hatkernels.mesh import rectangle
from hatkernels.norms import convergence_study

__all__ = ["run", "RATE_TOLERANCE"]

#: Observed rates within this distance of 2 (L2) and 1 (H1) on the finest level pass.
RATE_TOLERANCE = 0.2


def _manufactured():
    pi = math.pi

    def exact(x, y):
        return np.sin(pi * x) * np.sin(pi * y)

    def grad(x, y):
        return (pi * np.cos(pi * x) * np.sin(pi * y), pi * np.sin(pi * x) * np.cos(pi * y))

    def source(x, y):
        return 2 * pi * pi * np.sin(pi * x) * np.sin(pi * y)

    return exact, grad, source


def run(args, progress):
    """Run ``hatkernels verify``; return the exit code (1 when the rates are off)."""
    # The temporary output directory is made first: an output that cannot be created
    # fails before the solves, and every later failure removes it.
    with kio.output_directory(args.out, force=args.force) as tmp:
        command = command_line(args)
        exact, grad, source = _manufactured()
        notice = CompileNotice(progress)
        level = [0]
        solve_seconds = []

        def solver(mesh):
            level[0] += 1
            progress.phase(f"level {level[0]} of {args.levels}: {mesh.n_triangles:,} triangles")
            t0 = time.perf_counter()
            with notice if level[0] == 1 else contextlib.nullcontext():  # the first compiles
                sol = solve_poisson(mesh, source, dirichlet=0.0, preconditioner=args.preconditioner,
                                    rtol=args.rtol, check=True)
            solve_seconds.append(time.perf_counter() - t0)
            return sol.u

        with threads(args.threads):
            study = convergence_study(rectangle(args.start), solver, exact, grad, levels=args.levels)
        l2, h1 = float(study.rates["L2"][-1]), float(study.rates["H1"][-1])
        passed = abs(l2 - 2) <= RATE_TOLERANCE and abs(h1 - 1) <= RATE_TOLERANCE
        record = base_record(command)
        record.update({
            "problem": "-lap u = 2 pi^2 sin(pi x) sin(pi y) on the unit square, u = 0 on the "
                       "boundary; exact u = sin(pi x) sin(pi y)",
            "meshes": f"rectangle({args.start}) and {args.levels - 1} uniform refinements",
            "preconditioner": args.preconditioner,
            "rtol": args.rtol,
            "h": study.h.tolist(),
            "n_points": study.n_points.tolist(),
            "errors": {k: v.tolist() for k, v in study.errors.items()},
            "rates": {k: v.tolist() for k, v in study.rates.items()},
            "expected_rates": {"L2": 2, "H1": 1},
            "rate_tolerance": RATE_TOLERANCE,
            "passed": passed,
            "solve_seconds": solve_seconds,
            "versions": versions(),
        })
        files = ["verify.json"]
        progress.phase(f"write: {args.out}")
        if plot.available():
            progress.phase("write: convergence.png")
            plot.convergence_figure(study.h, study.errors, os.path.join(tmp, "convergence.png"),
                                    title="P1 on the unit square, u = sin(pi x) sin(pi y)")
            files.append("convergence.png")
        record["files"] = files
        kio.write_json(os.path.join(tmp, "verify.json"), record)
    progress.phase("done")
    progress.close()
    print(f"{PROG} verify: manufactured solution u = sin(pi x) sin(pi y) on the unit square, "
          f"-lap u = 2 pi^2 u, u = 0 on the boundary")
    times = args.levels - 1
    print(f"meshes: rectangle({args.start}) refined {times} time{'s' if times != 1 else ''}; "
          f"preconditioner {args.preconditioner}, rtol {args.rtol:g}")
    print()
    print(study.table())
    print()
    print(f"observed rates on the finest level: L2 {l2:.3f} (expected 2), H1 {h1:.3f} "
          f"(expected 1)")
    print("expected rates for linear elements and a smooth solution: P. G. Ciarlet, "
          "The Finite Element Method for Elliptic Problems, 1978")
    if not plot.available():
        print(f"not written: {not_installed('convergence.png', 'matplotlib')}")
    print(f"output: {args.out}: {', '.join(files)}")
    if not passed:
        error(f"verification failed: the observed rates L2 {l2:.3f} and H1 {h1:.3f} are not "
              f"within {RATE_TOLERANCE} of 2 and 1 (too coarse a start, or a defect)")
        return 1
    print(f"verification passed (rates within {RATE_TOLERANCE} of the expected)")
    return 0
