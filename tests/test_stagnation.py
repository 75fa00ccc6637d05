"""CG asked for more accuracy than float64 allows stops early and says what it reaches."""

import numpy as np
import pytest
import scipy.sparse.linalg as spla

import hatkernels
from hatkernels._cgstop import STALL_RESTARTS, Stagnation


def test_stagnation_counts_restarts_without_halving():
    s = Stagnation()
    assert not s.update(1.0)
    for _ in range(STALL_RESTARTS - 1):
        assert not s.update(0.9)  # not halved: stalled, but not yet long enough
    assert s.update(0.8)
    s = Stagnation()
    for k in range(3 * STALL_RESTARTS):  # halving at every restart never stops
        assert not s.update(0.4**k)


@pytest.mark.parametrize("preconditioner", ["gmg", "amg", "none"])
def test_an_unreachable_tolerance_stops_early_with_advice(preconditioner):
    m = hatkernels.mesh.rectangle(16, 16).refine().refine()
    with pytest.warns(RuntimeWarning, match="ask for rtol of at least"):
        sol = hatkernels.solve_poisson(m, 1.0, rtol=1e-17, preconditioner=preconditioner)
    assert not sol.stats.converged
    # before the rule, such a solve ran to maxiter (10 n iterations, about 4e4 here); with
    # it, a few restarts after the floor (unpreconditioned CG needs more iterations between
    # restarts, as its recursive residual must fall again each time)
    assert sol.stats.iterations < m.n_points / 2
    # what it returns is still the solution to the accuracy float64 allows: against
    # SuperLU on the same eliminated system (scipy, a reference library)
    problem = hatkernels.PoissonProblem(m, 1.0)
    system = hatkernels.discretise(problem)
    ref = system.expand(spla.spsolve(system.A.tocsc(), system.b))
    assert np.abs(sol.u - ref).max() <= 1e-10 * np.abs(ref).max()


def test_a_reachable_tolerance_is_not_cut_short():
    m = hatkernels.mesh.rectangle(16, 16).refine().refine()
    sol = hatkernels.solve_poisson(m, 1.0, rtol=1e-12, preconditioner="gmg")
    assert sol.stats.converged


def test_the_patch_path_stops_too():
    with pytest.warns(RuntimeWarning, match="ask for rtol of at least"):
        sol = hatkernels.solve_poisson(hatkernels.mesh.rectangle(4, 4), 1.0, refine=4,
                                       rtol=1e-17)
    assert not sol.stats.converged and sol.stats.iterations < 300
