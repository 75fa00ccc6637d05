"""amg-native's two C/F splittings, point order against Ruge-Stueben, through ``solve_poisson``.

    flock /tmp/hk-bench.lock python bench/amg_splitting.py \
        --out bench/results/amg_splitting_2026-12-04.json

``solve_poisson(mesh, 1.0, rtol=1e-8, preconditioner="amg-native", splitting=...)``,
``u = 0`` on the boundary, in a fresh process per case after a warm-up solve (no
compile time in the figures), the two splittings alternating for ``--rounds`` rounds
(the machine's speed drifts; docs/performance.md).  The cases: ``rectangle(1000,
1000)``, ``disk(600)``, ``l_shape(500)``, a Delaunay mesh of a 700 x 700 grid of points
each moved by up to 0.3 cells (``tests/conftest.py``), and on ``rectangle(600, 600)``
an anisotropic coefficient ``diag(1, 1e-3)``, the same turned by 45 degrees
(``diag(1, 1e-2)``), a checkerboard of 8 x 8 squares with coefficients 1 and 1000, and
the mesh's points shuffled and solved without renumbering; ``cuboid(60, 60, 60)``.
"""

from __future__ import annotations

import os
import sys
import time

import numpy as np
from benchlib import alternating_main

CASES = ("rectangle", "disk", "lshape", "jittered", "anisotropic", "rotated", "checkerboard",
         "shuffled", "cube")
SPLITTINGS = ("ruge-stuben", "point-order")


def _case(name):
    """``(mesh, keyword arguments of solve_poisson)``."""
    import hatkernels

    sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))
    from conftest import jittered_mesh

    mesh = hatkernels.mesh
    if name in ("rectangle", "disk", "lshape", "jittered", "cube"):
        return {"rectangle": lambda: mesh.rectangle(1000, 1000), "disk": lambda: mesh.disk(600),
                "lshape": lambda: mesh.l_shape(500),
                "jittered": lambda: jittered_mesh(700, 3, shuffle=False),
                "cube": lambda: mesh.cuboid(60, 60, 60)}[name](), {}
    square = mesh.rectangle(600, 600)
    if name == "anisotropic":
        return square, {"coefficient": np.diag([1.0, 1e-3])}
    if name == "rotated":
        a, b = 0.5 * (1 + 1e-2), 0.5 * (1 - 1e-2)
        return square, {"coefficient": np.array([[a, b], [b, a]])}
    if name == "checkerboard":
        centre = square.points[square.triangles].mean(axis=1)
        cell = np.floor(centre[:, 0] * 8) + np.floor(centre[:, 1] * 8)
        return square, {"coefficient": np.where(cell % 2 == 0, 1.0, 1e3)}
    order = np.random.default_rng(0).permutation(square.n_points)  # shuffled
    new = np.empty_like(order)
    new[order] = np.arange(order.size)
    return hatkernels.Mesh(square.points[order], new[square.triangles]), {"renumber": False}


def run_case(name, splitting):
    import hatkernels

    mesh, options = _case(name)
    small = hatkernels.mesh.cuboid(4, 4, 4) if name == "cube" else hatkernels.mesh.rectangle(8, 8)
    hatkernels.solve_poisson(small, 1.0, preconditioner="amg-native", splitting=splitting)
    t = time.perf_counter()
    sol = hatkernels.solve_poisson(mesh, 1.0, rtol=1e-8, preconditioner="amg-native",
                                   splitting=splitting, **options)
    seconds = time.perf_counter() - t
    description = sol.stats.preconditioner
    complexity = float(description.split("operator complexity ")[1].split(",")[0])
    return {"unknowns": int(sol.stats.unknowns), "seconds": seconds,
            "phases": {k: float(v) for k, v in sol.stats.timings.items()},
            "iterations": int(sol.stats.iterations), "converged": bool(sol.stats.converged),
            "complexity": complexity}


def report(row):
    phases = row["phases"]
    print(f"{row['case']:12s} {row['unknowns']:>9,} {row['splitting']:11s} setup "
          f"{phases['setup']:5.2f} s solve {phases['solve']:5.2f} s total "
          f"{row['seconds']:5.2f} s its {row['iterations']:3d} complexity "
          f"{row['complexity']:.2f}", flush=True)


def main(argv=None):
    alternating_main(__file__, __doc__, run_case, "cases", CASES, SPLITTINGS,
                     ("case", "splitting"), report, argv)


if __name__ == "__main__":
    main()
