"""The Robin term of the eigenproblem: ``kappa du/dn + r u = 0`` on some sides.

A side cooled by convection with film coefficient ``r`` adds the boundary
mass ``R_ij = int r phi_i phi_j ds`` to the stiffness: the eigenproblem is
``(K + R) x = lambda M x``.  The load ``s`` of a Robin condition ``kappa
du/dn + r u = s`` (the film times the coolant's temperature) moves the
steady state, not the modes: a disturbance of the steady state obeys the
homogeneous condition, so :func:`hatkernels.eigen.eigenmodes` takes the
same ``robin`` argument as :func:`hatkernels.solve_poisson` and uses its
``r`` only.

A connected part of the mesh that no held point touches but a side with
``r > 0`` does is not a zero mode: ``K + R`` is positive definite on it.
The stiffness alone is still singular there, so a preconditioner built
from the mesh and ``kappa`` (the geometric multigrid, which has no Robin
term) cannot serve such a part; :func:`build` records it in
:attr:`RobinLevel.stiffness_floats`.

Down the levels of the nested start (:mod:`hatkernels.eigensolvers`) the
term is carried by Galerkin projection, ``R_c = P^T R P`` with ``P`` the
linear interpolation of :func:`prolongation`: coarse P1 functions are fine
P1 functions, so this is exactly the coarse boundary mass of the fine
sides' ``r`` (for ``r`` constant, per side or per point; for a callable
``r`` it is the fine mesh's quadrature of it).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse as sp

from hatkernels import eigensolvers as _es
from hatkernels.assembly.boundary_terms import side_mass

__all__ = ["RobinLevel", "robin_matrix", "build", "coarser_robin", "prolongation"]


@dataclasses.dataclass(eq=False)
class RobinLevel(_es.Level):
    """A :class:`~hatkernels.eigensolvers.Level` whose ``K`` may hold a Robin term.

    ``stiffness_floats`` is True when some connected part of the mesh holds
    no point (the stiffness alone is singular there) whether or not a Robin
    side makes ``K`` definite on it.
    """

    stiffness_floats: bool = False


def robin_matrix(mesh, robin, quadrature):
    """The boundary mass ``R`` (n_points, n_points) of a parsed
    :class:`~hatkernels.conditions.Robin` (its ``r``), or None when there is no term."""
    if robin is None or len(robin.sides) == 0:
        return None
    R = side_mass(mesh, robin.r, robin.sides, quadrature)
    R.eliminate_zeros()
    return R if R.nnz else None


def build(mesh, held, kappa, rho, R, quadrature):
    """:func:`hatkernels.eigensolvers.build_level` with the Robin term ``R`` (in the mesh's
    numbering, or None) added to ``K``; the zero modes are the parts that neither a held
    point nor a side with ``r > 0`` touches."""
    level = _es.build_level(mesh, held, kappa, rho, quadrature)
    fields = {f.name: getattr(level, f.name) for f in dataclasses.fields(level)}
    floats = level.zero.shape[1] > 0
    if R is not None:
        free = level.free
        K = (level.K + R[free][:, free]).tocsr()
        K.sort_indices()
        dtype = level.K.indices.dtype  # one index dtype for both arrays, as assembly gives
        K.indices, K.indptr = K.indices.astype(dtype), K.indptr.astype(dtype)
        anchored = np.union1d(held, np.flatnonzero(R.diagonal() > 0))
        fields["K"] = K
        fields["zero"] = _es._zero_modes(mesh, anchored, free, level.M)
    return RobinLevel(**fields, stiffness_floats=floats)


def prolongation(fine):
    """Linear interpolation from ``fine.refinement.coarse`` to ``fine`` as CSR
    (fine.n_points, coarse.n_points): a coarse point keeps its value, an edge midpoint
    takes the mean of the edge's two points."""
    r = fine.refinement
    n_coarse = r.coarse.n_points
    e = r.edge_points
    rows = np.concatenate([r.coarse_points, r.midpoints, r.midpoints]).astype(np.int64)
    cols = np.concatenate([np.arange(n_coarse), e[:, 0], e[:, 1]]).astype(np.int64)
    vals = np.concatenate([np.ones(n_coarse), np.full(2 * len(e), 0.5)])
    return sp.csr_matrix((vals, (rows, cols)), shape=(fine.n_points, n_coarse))


def coarser_robin(fine, R):
    """The Robin term one refinement below ``fine``: ``P^T R P`` (None stays None)."""
    if R is None:
        return None
    P = prolongation(fine)
    return (P.T @ (R @ P)).tocsr()
