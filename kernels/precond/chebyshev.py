"""Jacobi-scaled Chebyshev smoothing on any operator: shared by AMG and geometric multigrid.

The smoother applies the same Chebyshev polynomial in ``D^-1 A`` each
time, so it is a symmetric operator and keeps a V-cycle symmetric.  It needs
only products with ``A`` (a CSR matrix through the parallel kernels, or a
matrix-free operator), ``1 / diag(A)`` and a bound on the largest eigenvalue
of ``D^-1 A``, estimated here by a few Lanczos steps.
"""

import numpy as np

from hatkernels._jit import sparse as _k

__all__ = ["ChebyshevSmoother", "PointDiagonal", "largest_eigenvalue", "LOWER", "UPPER"]

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


class PointDiagonal:
    """``1 / diag(A)`` kept per point, and the smoother's vector updates with it (the
    parallel kernels of :mod:`hatkernels._jit.sparse`).

    Any object with these four methods and ``nbytes`` can stand in for it (a diagonal
    constant on blocks of points: :class:`hatkernels.patches.tets.PiecewiseDiagonal`).
    """

    def __init__(self, values):
        self.values = values

    @property
    def nbytes(self):
        return self.values.nbytes

    def zero_start(self, c, b, x):
        """``x = c D^-1 b``."""
        _k.chebyshev_zero_start(c, self.values, b, x)

    def start(self, c, b, r, d, x, zero_guess):
        """``d = c D^-1 r``, ``x += d`` (from zero: ``r = b``, ``d = x = c D^-1 b``)."""
        _k.chebyshev_start(c, self.values, b, r, d, x, zero_guess)

    def step(self, q, c1, c2, r, d, x):
        """``r -= q``, ``d = c1 d + c2 D^-1 r``, ``x += d``."""
        _k.chebyshev_step(q, self.values, c1, c2, r, d, x)

    def last(self, q, c1, c2, r, d, x):
        """``x += c1 d + c2 D^-1 (r - q)`` (``r`` and ``d`` not written)."""
        _k.chebyshev_last(q, self.values, c1, c2, r, d, x)


class ChebyshevSmoother:
    """Chebyshev smoothing of ``A x = b`` with ``degree`` products per call.

    Parameters
    ----------
    product : callable
        ``product(x, out)``: ``out = A x``.
    residual : callable
        ``residual(x, b, out)``: ``out = b - A x``.
    dinv : ndarray or PointDiagonal-like
        ``1 / diag(A)``: a vector, or an object with the methods of
        :class:`PointDiagonal` (only a vector with ``estimate``).
    degree : int
    bound : float, optional
        A guaranteed upper bound on the spectrum of ``D^-1 A`` (Gershgorin's,
        say); the Lanczos estimate times ``UPPER`` (1.1) is capped by it.
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
        self.diagonal = PointDiagonal(dinv) if isinstance(dinv, np.ndarray) else dinv
        self.degree = int(degree)
        if estimate:
            if not isinstance(dinv, np.ndarray):
                raise ValueError("ChebyshevSmoother: the Lanczos estimate needs dinv as a vector")
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
        return self.diagonal.nbytes

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
            self.diagonal.zero_start(1.0 / self.theta, b, x)
            r, d = b, x
        else:
            if not zero_guess:
                self.residual(x, b, r)
            self.diagonal.start(1.0 / self.theta, b, r, d, x, zero_guess)
        for step in range(1, self.degree):
            self.product(d, q)
            rho_new = 1.0 / (2.0 * sigma - rho)
            c1, c2 = rho_new * rho, 2.0 * rho_new / self.delta
            if step == self.degree - 1:  # the last: r and d are not needed after it
                self.diagonal.last(q, c1, c2, r, d, x)
            else:
                self.diagonal.step(q, c1, c2, r, d, x)
            rho = rho_new
