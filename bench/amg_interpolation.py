"""amg-native with classical against extended interpolation, at about 1e6 unknowns.

    flock /tmp/hk-bench.lock python bench/amg_interpolation.py \
        --out bench/results/amg_interpolation_2026-12-04.json

``-lap u = 1`` with ``u = 0`` on the boundary, assembled and reduced once per mesh;
then, in a fresh process per case (its own peak memory), the preconditioner's setup
and CG to rtol 1e-10, twice, the two interpolations alternating (in turn reversed) (the machine's speed
drifts; docs/performance.md).  Meshes: ``disk(600)``, a Delaunay mesh of a 1000 x 1000
grid of points each moved by up to 0.3 cells (``tests/conftest.py``) in its natural
numbering and shuffled, ``l_shape(400)``, ``rectangle(1000, 1000)`` and ``ball(30)``.
"""

from __future__ import annotations

import os
import sys
import time

import numpy as np
from benchlib import ProcessPeak, alternating_main

MESHES = ("disk", "jittered", "shuffled", "lshape", "rectangle", "ball")


def _mesh(name):
    import hatkernels

    sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))
    from conftest import jittered_mesh

    return {
        "disk": lambda: hatkernels.mesh.disk(600),
        "jittered": lambda: jittered_mesh(1000, 7, shuffle=False),
        "shuffled": lambda: jittered_mesh(1000, 7),
        "lshape": lambda: hatkernels.mesh.l_shape(400),
        "rectangle": lambda: hatkernels.mesh.rectangle(1000, 1000),
        "ball": lambda: hatkernels.mesh.ball(30),
    }[name]()


def run_case(name, interpolation):
    import hatkernels
    from hatkernels.krylov import cg_with_history
    from hatkernels.precond import make_preconditioner

    m = _mesh(name)
    s = hatkernels.apply_dirichlet(hatkernels.assemble_stiffness(m),
                                   hatkernels.assemble_load(m, 1.0), m.boundary_points())
    # warm-up on a small system: no compile time in the figures
    small = hatkernels.mesh.rectangle(8, 8)
    w = hatkernels.apply_dirichlet(hatkernels.assemble_stiffness(small), np.ones(81),
                                   small.boundary_points())
    cg_with_history(w.A, w.b, rtol=1e-10,
                    M=make_preconditioner(w.A, "amg-native", interpolation=interpolation))
    with ProcessPeak() as peak:
        t0 = time.perf_counter()
        M = make_preconditioner(s.A, "amg-native", interpolation=interpolation)
        t1 = time.perf_counter()
        r = cg_with_history(s.A, s.b, rtol=1e-10, M=M)
        t2 = time.perf_counter()
    return {"unknowns": int(s.A.shape[0]), "setup": t1 - t0, "solve": t2 - t1,
            "total": t2 - t0, "iterations": int(r.iterations), "converged": r.info == 0,
            "complexity": M.ml.operator_complexity(), "peak_MiB": peak.peak / 2**20,
            "peak_source": peak.source}


def report(row):
    print(f"{row['mesh']:9s} {row['unknowns']:>9,} {row['interpolation']:9s} setup "
          f"{row['setup']:5.2f} s solve {row['solve']:5.2f} s total "
          f"{row['total']:5.2f} s its {row['iterations']:3d} complexity "
          f"{row['complexity']:.2f} peak {row['peak_MiB']:6.0f} MiB", flush=True)


def main(argv=None):
    alternating_main(__file__, __doc__, run_case, "meshes", MESHES, ("classical", "extended"),
                     ("mesh", "interpolation"), report, argv)


if __name__ == "__main__":
    main()
