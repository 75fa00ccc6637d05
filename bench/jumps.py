"""Iterations of every preconditioner on coefficient jumps and anisotropy (docs/solvers.md).

python bench/jumps.py
"""

import warnings

import numpy as np

import hatkernels


def main():
    warnings.simplefilter("ignore")
    m = hatkernels.mesh.rectangle(32, 32).refine().refine()  # 128 x 128 cells, with history
    c = m.points[m.triangles].mean(axis=1)
    cases = {
        "kappa = 1": None,
        "jump 1e6 along x = 0.5 (on coarse lines)": np.where(c[:, 0] > 0.5, 1e6, 1.0),
        "jump 1e6 in a checkerboard of 1/8 squares": np.where(
            ((c[:, 0] * 8).astype(int) + (c[:, 1] * 8).astype(int)) % 2 == 0, 1e6, 1.0
        ),
        "jump 1e6 inside coarse cells (x > 0.51)": np.where(c[:, 0] > 0.51, 1e6, 1.0),
        "anisotropy 100:1 (tensor)": np.array([[100.0, 0.0], [0.0, 1.0]]),
    }
    for name, coef in cases.items():
        row = []
        for pc in ["jacobi", "ic0", "amg-sa", "amg-rs", "amg-native", "gmg"]:
            s = hatkernels.solve_poisson(
                m, 1.0, coefficient=coef, preconditioner=pc, rtol=1e-8, maxiter=5000
            )
            row.append(f"{pc} {s.stats.iterations if s.converged else 'no'}")
        print(name, "|", ", ".join(row))


if __name__ == "__main__":
    main()
