"""Matrices shared by the linear-solver tests (imported by test_krylov, test_precond,
test_solve_linear)."""

import numpy as np
import scipy.sparse as sp


def random_spd(n, seed, density):
    """Random sparse symmetric matrix, strictly diagonally dominant with a positive
    diagonal, hence SPD (Gershgorin circle theorem; common practice, no source)."""
    rng = np.random.default_rng(seed)
    B = sp.random_array((n, n), density=density, rng=rng, data_sampler=rng.standard_normal)
    S = sp.csr_array(B + B.T)
    S.setdiag(0.0)
    S.eliminate_zeros()
    d = np.abs(S).sum(axis=1) + rng.uniform(0.5, 1.5, n)
    return sp.csr_array(S + sp.diags_array(d))
