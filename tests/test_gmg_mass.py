"""gmg with a lumped mass term in its levels: reaction, Robin sides and time steps.

The outside checks are scipy's direct solves of the same assembled systems
(reference library); the iteration bounds are this project's measurements
(docs/transient.md), not a source.
"""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla

import hatkernels
from hatkernels import InputError
from hatkernels.mesh import rectangle
from hatkernels.precond import make_preconditioner
from hatkernels.precond.gmg_levels import restrict_mass, transfer_indices
from hatkernels.transient import solve_transient


def refined(n=8, k=3):
    m = rectangle(n, n)
    for _ in range(k):
        m = m.refine()
    return m


def sine(x, y):
    return np.sin(np.pi * x) * np.sin(np.pi * y)


def test_restricted_mass_is_the_coarse_meshs_lumped_mass():
    # a coarse hat function is the interpolated combination of fine ones, so P^T of the
    # fine lumped mass is the coarse lumped mass, for any coefficient that the coarse
    # cells resolve (common practice, no source): per-cell values constant on each
    # coarse cell, here two materials
    coarse = rectangle(6, 5)
    fine = coarse.refine()
    c_coarse = np.where(coarse.cells.mean(axis=1) % 2 < 1, 1.0, 3.5)[: coarse.n_cells]
    c_fine = np.repeat(c_coarse, 4)
    m_fine = hatkernels.assemble_mass(fine, c_fine, lumped=True).diagonal()
    m_coarse = hatkernels.assemble_mass(coarse, c_coarse, lumped=True).diagonal()
    got = restrict_mass(m_fine, transfer_indices(fine.refinement))
    assert np.allclose(got, m_coarse, rtol=1e-13, atol=1e-16)


def test_short_time_steps_keep_few_iterations_and_the_direct_solution():
    # before the mass term was in gmg's levels a step of 1e-6 took 141 CG iterations
    # where amg took 3 (rtol 1e-6); the levels' mass is lumped while the system's is
    # consistent, so at rtol 1e-10 gmg needs 13 where amg needs 7. One backward Euler
    # step against scipy's direct solve of (M + dt K) u1 = M u0 on the free points
    # (reference library: scipy)
    mesh = refined()
    dt = 1e-6
    sol = solve_transient(mesh, sine, [dt], dt=dt, scheme="backward-euler",
                          preconditioner="gmg", dirichlet_on="boundary", rtol=1e-10)
    assert max(sol.stats.iterations) <= 16
    K = hatkernels.assemble_stiffness(mesh)
    M = hatkernels.assemble_mass(mesh)
    free = np.setdiff1d(np.arange(mesh.n_points), mesh.boundary_points())
    u0 = sine(*mesh.points.T)
    A = (M + dt * K).tocsc()[free][:, free]
    u1 = sla.spsolve(A, (M @ u0)[free])
    assert np.allclose(sol.u[-1][free], u1, rtol=1e-8, atol=1e-12)
    for dt in (1e-6, 1e-4, 1e-2):
        sol = solve_transient(mesh, sine, [5 * dt], dt=dt, preconditioner="gmg",
                              dirichlet_on="boundary")
        assert max(sol.stats.iterations) <= 8, (dt, sol.stats.iterations)


def test_reaction_and_robin_reach_gmgs_levels():
    # -lap u + c u = 1 with a large reaction (mass-dominated: 170 iterations with the
    # stiffness alone in the levels, 16 with the lumped mass, amg 8), and a Robin-only
    # problem (no Dirichlet point: gmg refused it before; now 9, amg 8), against scipy's
    # direct solve (reference library: SuperLU through preconditioner="direct")
    mesh = refined()
    for kwargs in ({"reaction": 1e5}, {"robin": (10.0, 0.0), "dirichlet_on": []}):
        sol = hatkernels.solve_poisson(mesh, 1.0, preconditioner="gmg", rtol=1e-10, **kwargs)
        ref = hatkernels.solve_poisson(mesh, 1.0, preconditioner="direct", **kwargs)
        assert sol.converged and sol.stats.iterations <= 20, sol.stats.iterations
        assert np.allclose(sol.u, ref.u, rtol=1e-8, atol=1e-10 * np.abs(ref.u).max())


def test_bad_mass_is_named():
    mesh = refined(4, 2)
    A = hatkernels.assemble_stiffness(mesh)
    n = mesh.n_points
    bad = np.ones(n)
    bad[7] = -1.0
    with pytest.raises(InputError, match=r"mass\[7\]"):
        make_preconditioner(A, "gmg", mesh=mesh, mass=bad)
    bad[7] = np.nan
    with pytest.raises(InputError, match=r"mass\[7\]"):
        make_preconditioner(A, "gmg", mesh=mesh, mass=bad)
    with pytest.raises(InputError, match="one per point"):
        make_preconditioner(A, "gmg", mesh=mesh, mass=np.ones(n - 1))
    good = np.ones(n)
    make_preconditioner(sp.csr_array(A), "gmg", mesh=mesh, mass=good)
    assert np.array_equal(good, np.ones(n))  # not modified
