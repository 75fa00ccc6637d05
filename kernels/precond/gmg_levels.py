"""The levels of the geometric multigrid (:mod:`hatkernels.precond.gmg`): coefficients
and lumped masses taken down the refinement history, the damped Jacobi smoother, and one
level's operator, smoother, work vectors and transfer indices.
"""

from __future__ import annotations

import numpy as np

from hatkernels._jit import multigrid as _mg
from hatkernels._jit import sparse as _k
from hatkernels.coefficients import Coefficient
from hatkernels.operators import StiffnessOperator
from hatkernels.precond.chebyshev import ChebyshevSmoother

__all__ = ["Level", "JacobiSmoother", "coarsen_coefficient", "transfer_indices", "restrict_mass"]


def coarsen_coefficient(coef, fine, coarse):
    """The coefficient of the coarse mesh that ``fine`` was refined from.

    Uniform refinement splits a cell into ``2**dim`` children, numbered
    consecutively: per-cell values and tensors are averaged over them.
    """
    if coef.kind in ("constant", "callable"):
        return coef
    children = 2 ** fine.dim
    if coef.kind == "cell":
        return Coefficient(
            "cell", coef.value.reshape(-1, children).mean(axis=1), coef.name, coef.sign
        )
    if coef.kind == "point":
        return Coefficient(
            "point", coef.value[fine.refinement.coarse_points], coef.name, coef.sign
        )
    if coef.value.ndim == 2:
        return coef
    return Coefficient(
        "tensor", coef.value.reshape(-1, children, fine.dim, fine.dim).mean(axis=1), coef.name,
        coef.sign
    )


class JacobiSmoother:
    """``steps`` damped Jacobi sweeps ``x += omega D^-1 (b - A x)``; symmetric."""

    def __init__(self, product, residual, dinv, steps, omega):
        self.residual = residual
        self.scaled = omega * dinv
        self.steps = steps

    @property
    def nbytes(self):
        return self.scaled.nbytes

    def smooth(self, x, b, zero_guess, r, d, q):
        for step in range(self.steps):
            if zero_guess and step == 0:
                _k.jacobi_apply(self.scaled, b, x)  # from x = 0: x is the first update
                continue
            self.residual(x, b, r)
            _k.jacobi_apply(self.scaled, r, d)
            _k.xpby(d, 1.0, x)


def transfer_indices(refinement):
    """Index arrays for prolongation from and restriction to the coarser mesh of ``refinement``."""
    e = refinement.edge_points
    nc = refinement.coarse.n_points
    dt = e.dtype
    first_low = np.zeros(nc + 1, dtype=dt)
    np.cumsum(np.bincount(e[:, 0], minlength=nc), out=first_low[1:])
    by_high = np.argsort(e[:, 1], kind="stable").astype(dt)
    by_high_ptr = np.zeros(nc + 1, dtype=dt)
    np.cumsum(np.bincount(e[:, 1], minlength=nc), out=by_high_ptr[1:])
    return (refinement.coarse_points, e, refinement.midpoints, first_low, by_high_ptr, by_high)


def restrict_mass(mass, transfer):
    """The coarse level's lumped mass from the fine one's: ``P^T m``.

    A lumped mass is ``m_i = int c phi_i`` and a coarse hat function is the
    combination of fine ones that interpolation gives, so the restriction is
    the coarse mesh's own lumped mass, for any coefficient (up to quadrature).
    """
    cp, e, mid, first_low, by_high_ptr, by_high = transfer
    coarse = np.empty(first_low.shape[0] - 1)
    _mg.restrict(cp, mid, first_low, by_high_ptr, by_high, mass, coarse)
    return coarse


class Level:
    """One level: operator, smoother, work vectors, and the transfer to the next coarser one.

    ``mass``: a lumped mass (reaction) term of the level's operator, one
    nonnegative value per point (zero at the held points), or None.
    """

    def __init__(self, mesh, coef, fixed, variant, smoother, degree, omega, quadrature, op=None,
                 own_x=True, lower=None, mass=None, scratch=None):
        self.mesh = mesh
        self.fixed = fixed
        if op is None:
            op = StiffnessOperator(
                mesh, coef, variant=variant, dirichlet=fixed, quadrature=quadrature
            )
        self.op = op
        if mass is not None:
            mass = np.array(mass, dtype=np.float64)  # a copy: the held points are zeroed
            mass[fixed] = 0.0
        self.mass = mass
        self._bind()
        n = mesh.n_points
        # the smoother's work vectors and the residual: dead while a coarser level
        # works, so all levels may share one set (``scratch``: three vectors of at
        # least n entries, the finest level's size); their bytes count with their owner
        self._owns_scratch = scratch is None
        if scratch is None:
            scratch = (np.empty(n), np.empty(n), np.empty(n))
        self.r, self.d, self.q = (v[:n] for v in scratch)
        # the cycle's solution and right-hand side on this level: a finer level
        # restricts into them; on the finest level the preconditioner's input
        # goes into b and x is the caller's output (or a full-size buffer
        # when the caller's vectors hold the free points only)
        self.x = np.empty(n) if own_x else None
        self.b = np.empty(n)
        # Gershgorin's bound: guaranteed, one pass with the diagonal, and tight (2)
        # on meshes without obtuse angle pairs; a Lanczos estimate would cost ten
        # products.  The diagonal is inverted in place: one vector per level.
        # With a mass term each row gains m_i on its diagonal and in its absolute sum,
        # which only lowers its Gershgorin ratio: the stiffness's bound stays a bound.
        diag, bound = self.op.diagonal_and_bound()
        if mass is not None:
            diag += mass
        dinv = np.reciprocal(diag, out=diag)
        if smoother == "chebyshev":
            self.smoother = ChebyshevSmoother(
                self.product, self.residual, dinv, degree, bound=bound, estimate=False,
                lower=lower,
            )
        else:
            self.smoother = JacobiSmoother(
                self.product, self.residual, dinv, degree, omega
            )
        self.transfer = None

    def product(self, x, out):
        self.op.matvec_into(x, out)
        if self.mass is not None:
            _mg.add_diagonal(self.mass, x, out, 1.0)

    def residual(self, x, b, out):
        self.op.residual_into(x, b, out)
        if self.mass is not None:
            _mg.add_diagonal(self.mass, x, out, -1.0)

    def _bind(self):
        """Without a mass term the smoother and the cycle call the operator itself (no
        wrapper on the hot path)."""
        if self.mass is None:
            self.product, self.residual = self.op.matvec_into, self.op.residual_into

    def smooth(self, x, b, zero_guess):
        self.smoother.smooth(x, b, zero_guess, self.r, self.d, self.q)

    def set_transfer(self, transfer):
        """Index arrays for prolongation from and restriction to the coarser mesh
        (:func:`transfer_indices`)."""
        self.transfer = transfer

    @property
    def nbytes(self):
        vectors = (1 + 3 * self._owns_scratch + (self.x is not None)
                   + (self.mass is not None)) * self.r.nbytes
        transfer = sum(a.nbytes for a in self.transfer) if self.transfer else 0
        return vectors + transfer + self.op.nbytes + self.smoother.nbytes + self.fixed.nbytes
