"""Solve -lap u = 1 on about 1.3e8 triangles (or 1e8 tetrahedra) with CG + matrix-free gmg.

    python bench/huge_solve.py                  # rectangle(125, 125) refined 6 times
    python bench/huge_solve.py --coarse 64 --refinements 5    # a smaller check
    python bench/huge_solve.py --dim 3          # cuboid(32, 32, 32) refined 3 times: 1.0e8 tetrahedra

Prints the time of each phase, the iterations and the peak memory (the
process's resident high-water mark).  Not part of the test run: it needs
about 15 GiB and a few minutes on a 2-core machine.  The exact solution of
the unit square problem has its maximum 0.0736713... at the centre
(series solution of the Poisson problem on a square; value from memory),
which the printed maximum should approach; for the unit cube it is
0.0562 (value from memory).
"""

import argparse
import resource
import sys
import time

import numba

import hatkernels
from hatkernels._output import write_json


def rss_gib():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 2**30


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--dim", type=int, choices=(2, 3), default=2,
                   help="2: the unit square in triangles; 3: the unit cube in tetrahedra")
    p.add_argument("--coarse", type=int, help="cells per side of the coarse mesh "
                   "(default 125 in 2-D, 32 in 3-D)")
    p.add_argument("--refinements", type=int, help="default 6 in 2-D, 3 in 3-D")
    p.add_argument("--rtol", type=float, default=1e-8)
    p.add_argument("--json", help="also write the figures to this file")
    args = p.parse_args(argv)
    three = args.dim == 3
    if args.coarse is None:
        args.coarse = 32 if three else 125
    if args.refinements is None:
        args.refinements = 3 if three else 6
    cells = "tetrahedra" if three else "triangles"
    cell = "tetrahedron" if three else "triangle"

    report = {"threads": numba.get_num_threads(), "phases": {}}
    t = time.perf_counter()
    c = args.coarse
    mesh = hatkernels.mesh.cuboid(c, c, c) if three else hatkernels.mesh.rectangle(c, c)
    for k in range(args.refinements):
        t1 = time.perf_counter()
        mesh = mesh.refine()
        print(f"refinement {k + 1}: {mesh.n_cells:,} {cells} in "
              f"{time.perf_counter() - t1:.1f} s (peak {rss_gib():.1f} GiB)", flush=True)
    report["phases"]["mesh"] = time.perf_counter() - t
    report["dim"] = args.dim
    report[cells] = mesh.n_cells
    report["points"] = mesh.n_points

    def progress(phase):
        print(f"  {phase} ... (peak so far {rss_gib():.1f} GiB)", flush=True)

    sol = hatkernels.solve_poisson(mesh, 1.0, preconditioner="gmg", rtol=args.rtol, progress=progress)
    st = sol.stats
    report["phases"].update(st.timings)
    report.update(
        iterations=st.iterations,
        converged=sol.converged,
        final_relative_residual=float(st.residuals[-1] / st.residuals[0]),
        u_max=float(sol.u.max()),
        peak_rss_GiB=st.peak_rss_bytes / 2**30,
        **{f"peak_rss_bytes_per_{cell}": st.peak_rss_bytes / mesh.n_cells},
        peak_rss_bytes_per_point=st.peak_rss_bytes / mesh.n_points,
        preconditioner=st.preconditioner,
    )
    print(f"{mesh.n_cells:,} {cells}, {mesh.n_points:,} points, {report['threads']} threads")
    for name, secs in report["phases"].items():
        print(f"  {name:>9}: {secs:8.1f} s")
    print(f"  CG + gmg: {st.iterations} iterations, converged={sol.converged}, "
          f"relative residual {report['final_relative_residual']:.2e}")
    exact = "0.0562 for the unit cube" if three else "0.0736713 for the unit square"
    print(f"  max u = {report['u_max']:.7f} (exact {exact})")
    print(f"  peak memory {report['peak_rss_GiB']:.1f} GiB "
          f"({st.peak_rss_bytes / mesh.n_cells:.0f} bytes per {cell}, "
          f"{report['peak_rss_bytes_per_point']:.0f} per point)")
    if args.json:
        write_json(args.json, report)  # whole or not at all
    return 0 if sol.converged else 1


if __name__ == "__main__":
    sys.exit(main())
