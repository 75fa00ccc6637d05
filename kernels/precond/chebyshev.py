"""Jacobi-scaled Chebyshev smoothing on any operator: shared by AMG and geometric multigrid.

The smoother applies the same Chebyshev polynomial in ``D^-1 A`` each
time, so it is a symmetric operator and keeps a V-cycle symmetric.  It needs
only products with ``A`` (a CSR matrix through the parallel kernels, or a
matrix-free operator), ``1 / diag(A)`` and a bound on the largest eigenvalue
of ``D^-1 A``, estimated here by a few Lanczos steps.
"""

import numpy as np

from hatkernels._jit import sparse as _k

__all__ = ["ChebyshevSmoother", "largest_eigenvalue", "LOWER", "UPPER"]

# The interval as fractions of the estimated largest eigenvalue of D^-1 A:
# PyAMG's defaults for its own Chebyshev smoother (reference library:
# pyamg.relaxation.smoothing.setup_chebyshev, lower 1/30, upper 1.1).
LOWER = 1.0 / 30.0
UPPER = 1.1


def largest_eigenvalue(product, dinv, steps=10):
    """Largest Ritz value of ``D^-1/2 A D^-1/2`` after ``steps`` Lanczos steps.

    ``product(x, out)`` computes ``out = A x``.  The start vector comes from a
    fixed seed, so the setup is reproducible.
    """
    n = dinv.shape[0]
    s = np.sqrt(dinv)
    v = np.random.default_rng(12345).standard_normal(n)
    v /= np.sqrt(_k.dot(v, v))
    v_prev = np.zeros(n)
    w = np.empty(n)
    alphas, betas = [], []
    beta = 0.0
    for _ in range(min(steps, n)):
        product(s * v, w)
        w *= s
        alpha = _k.dot(w, v)
        alphas.append(alpha)
        w -= alpha * v
        w -= beta * v_prev
        beta = np.sqrt(_k.dot(w, w))
        if beta <= 1e-12 * abs(alpha):
            break
        betas.append(beta)
        v_prev, v = v, w / beta
    k = len(alphas)
    T = np.diag(alphas) + np.diag(betas[: k - 1], 1) + np.diag(betas[: k - 1], -1)
    return float(np.linalg.eigvalsh(T)[-1])


class ChebyshevSmoother:
    """Chebyshev smoothing of ``A x = b`` with ``degree`` products per call.

    Parameters
    ----------
    product : callable
        ``product(x, out)``: ``out = A x``.
    residual : callable
        ``residual(x, b, out)``: ``out = b - A x``.
    dinv : ndarray
        ``1 / diag(A)``.
    degree : int
    bound : float, optional
        A guaranteed upper bound on the spectrum of ``D^-1 A`` (Gershgorin's,
        say); the Lanczos estimate times :data:`UPPER` is capped by it.
    estimate : bool
        Run the Lanczos estimate; with ``False`` the interval's top is
        ``bound`` itself (which must then be given).
    lower : float, optional
        The interval's bottom as a fraction of its top (default
        ``LOWER / UPPER``, PyAMG's choice).  Geometric multigrid, whose coarse
        level resolves the lower part of the spectrum, smooths a narrower
        interval.
    """

    def __init__(self, product, residual, dinv, degree, bound=None, estimate=True, lower=None):
        self.product = product
        self.residual = residual
        self.dinv = dinv
        self.degree = int(degree)
        if estimate:
            upper = UPPER * largest_eigenvalue(product, dinv)
            if bound is not None:
                upper = min(upper, bound)
        elif bound is None:
            raise ValueError("ChebyshevSmoother needs a bound when estimate=False")
        else:
            upper = bound
        lower = (LOWER / UPPER if lower is None else float(lower)) * upper
        self.theta = 0.5 * (upper + lower)
        self.delta = 0.5 * (upper - lower)

    @property
    def nbytes(self):
        return self.dinv.nbytes

    def smooth(self, x, b, zero_guess, r, d, q):
        """Smooth ``x`` in place; ``r``, ``d``, ``q`` are work vectors of the same length.

        With ``zero_guess`` the initial ``x`` is zero whatever ``x`` holds (it
        is overwritten, not read).  On return the work vectors hold nothing the
        caller may use (the last step does not update ``r`` and ``d``).
        """
        sigma = self.theta / self.delta
        rho = 1.0 / sigma
        if zero_guess and self.degree <= 2:
            # from zero, the first direction is x itself and the residual b: neither
            # is copied (5 vector passes of 13 saved at degree 2)
            _k.chebyshev_zero_start(1.0 / self.theta, self.dinv, b, x)
            r, d = b, x
        else:
            if not zero_guess:
                self.residual(x, b, r)
            _k.chebyshev_start(1.0 / self.theta, self.dinv, b, r, d, x, zero_guess)
        for step in range(1, self.degree):
            self.product(d, q)
            rho_new = 1.0 / (2.0 * sigma - rho)
            c1, c2 = rho_new * rho, 2.0 * rho_new / self.delta
            if step == self.degree - 1:  # the last: r and d are not needed after it
                _k.chebyshev_last(q, self.dinv, c1, c2, r, d, x)
            else:
                _k.chebyshev_step(q, self.dinv, c1, c2, r, d, x)
            rho = rho_new
