"""CG iterations per step of solve_transient with and without the start space.

    python bench/transient_starts.py --out bench/results/transient_starts.json

Five marches on ``rectangle(n, n)`` (default 200: 40,401 points), 40 steps of 1e-3,
rtol 1e-6, with the start space holding 0 (the extrapolated start alone), 4 (the
default) or 8 changes (``hatkernels.transient_steps.START_SPACE``): the cooling
square from ``sin(pi x) sin(pi y)`` (Crank-Nicolson), heating from 0 by a unit source
(backward Euler), a source pulsing in time (Crank-Nicolson), a hot disc in a cold body
(a jump, Crank-Nicolson) and held values moving in time (backward Euler).  Counts,
not times: one process is enough.
"""

from __future__ import annotations

import argparse


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells", type=int, default=200)
    ap.add_argument("--sizes", type=int, nargs="+", default=[0, 4, 8],
                    help="changes the start space keeps (0: the extrapolated start alone)")
    ap.add_argument("--out")
    args = ap.parse_args()

    import numpy as np

    from hatkernels import transient_steps
    from hatkernels.mesh import rectangle
    from hatkernels.transient import in_time, solve_transient

    mesh = rectangle(args.cells, args.cells)
    x, y = mesh.points.T
    zero = np.zeros(mesh.n_points)
    cases = {
        "cooling, Crank-Nicolson": (np.sin(np.pi * x) * np.sin(np.pi * y), {}),
        "heating by a unit source, backward Euler": (zero, {"f": 1.0,
                                                           "scheme": "backward-euler"}),
        "a source pulsing in time, Crank-Nicolson": (zero, {"f": in_time(
            lambda x, y, t: np.sin(2 * np.pi * t / 0.01)
            * np.exp(-50 * ((x - 0.3) ** 2 + (y - 0.6) ** 2)))}),
        "a hot disc in a cold body, Crank-Nicolson": (
            (((x - 0.5) ** 2 + (y - 0.5) ** 2) < 0.1).astype(float), {}),
        "held values moving in time, backward Euler": (zero, {
            "dirichlet": in_time(lambda x, y, t: np.sin(50 * t) + 0 * x),
            "scheme": "backward-euler"}),
    }
    records = []
    for size in args.sizes:
        transient_steps.START_SPACE = size
        for name, (u0, kw) in cases.items():
            sol = solve_transient(mesh, u0, [0.04], dt=1e-3, rtol=1e-6, **kw)
            it, sm = sol.stats.iterations, sol.stats.smoother_iterations
            records.append({"case": name, "start_space": size, "steps": int(it.size),
                            "iterations": it.tolist(), "mean": float(it.mean()),
                            "smoother_iterations": sm.tolist(),
                            "smoother_mean": float(sm.mean()),
                            "u_max": float(sol.u[-1].max())})
            print(f"start space {size}: {name:45s} {it.mean():.2f} iterations per step "
                  f"(and {sm.mean():.2f} with the smoother alone)", flush=True)
    if args.out:
        from hatkernels._output import write_json

        write_json(args.out, {"cells": args.cells, "points": mesh.n_points, "dt": 1e-3,
                              "steps_to": 0.04, "rtol": 1e-6, "records": records})


if __name__ == "__main__":
    main()
