"""When CG stops short of its tolerance: breakdowns, and a true residual that no longer falls.

CG checks the true residual ``b - A x`` whenever the recursively updated one
meets the tolerance, and goes on from the true one when it does not (a
restart).  Below the accuracy float64 allows for the system (rounding in
each product is about ``eps |A| |x|``), the recursive residual keeps falling
while the true one stays put: without a rule, such a solve would restart
until ``maxiter``.  :class:`Stagnation` stops it once the true residual has
not halved over :data:`STALL_RESTARTS` restarts in a row, and says what
tolerance the system does reach.  Every decision depends on reduced values
only, so all ranks of a distributed solve stop together.
"""

from __future__ import annotations

import math

__all__ = ["BREAKDOWN_MATRIX", "BREAKDOWN_PRECONDITIONER", "STALL_RESTARTS", "Stagnation",
           "breakdown_preconditioner"]

#: ``info`` when ``p . A p <= 0``: the matrix is not positive definite.
BREAKDOWN_MATRIX = -1
#: ``info`` when ``r . z <= 0`` with ``r != 0``: the preconditioner is not positive definite.
BREAKDOWN_PRECONDITIONER = -2

#: Restarts in a row without the true residual halving before CG gives up.  A restart
#: happens only when the recursive residual claims convergence and the true one denies
#: it, which away from rounding's floor is rare: five in a row mean the floor.
STALL_RESTARTS = 5


def breakdown_matrix(pq, iteration):
    """``(info, message)`` for ``p . A p = pq <= 0`` (or not finite) in ``iteration``.  The
    loop's inputs are checked finite and ``p`` is (``r . z`` was), so a value that is not
    finite is an overflow inside the product (entries near float64's largest number),
    named as such, not as a matrix that is not positive definite."""
    if not math.isfinite(pq):
        why = ("is not finite: the product overflows float64 (A's entries or the iterates "
               "are too near its largest number); rescale the problem (another unit)")
    else:
        why = "<= 0, so A is not positive definite"
    return BREAKDOWN_MATRIX, (f"breakdown in iteration {iteration}: p.Ap = {pq:.3e} {why} "
                              f"(info = {BREAKDOWN_MATRIX})")


def breakdown_preconditioner(rz, iteration):
    """``(info, message)`` for ``r . z = rz <= 0`` (or not finite) after ``iteration``."""
    return BREAKDOWN_PRECONDITIONER, (
        f"breakdown after iteration {iteration}: r.z = {rz:.3e} <= 0 (or not finite) with "
        f"r != 0, so the preconditioner M is not positive definite "
        f"(info = {BREAKDOWN_PRECONDITIONER})")


class Stagnation:
    """The true residuals at restarts; :meth:`update` says when to stop."""

    def __init__(self):
        self.best = math.inf
        self.stalled = 0

    def update(self, true_norm):
        """Record a restart's true residual norm; True when CG should stop."""
        if true_norm <= 0.5 * self.best:
            self.best, self.stalled = true_norm, 0
        else:
            self.stalled += 1
        return self.stalled >= STALL_RESTARTS

    def message(self, iteration, tolerance, bnorm):
        """Why CG stopped, with the relative residual the system does reach."""
        reached = self.best / bnorm if bnorm > 0 else math.nan
        return (f"stopped after {iteration} iterations: the true residual has not halved over "
                f"{STALL_RESTARTS} restarts (best {self.best:.3e} against the tolerance "
                f"{tolerance:.3e}); rounding in float64 holds it near a relative residual of "
                f"{reached:.1e} for this system: ask for rtol of at least "
                f"{min(1.0, 10 * reached):.0e}")
