"""The smallest eigenpairs of ``K x = lambda M x`` on the free unknowns, level by level.

:func:`hatkernels.eigen.eigenmodes` is the driver; this module holds its
pieces:

:class:`Level`
    the problem on one mesh: stiffness ``K`` and mass ``M`` assembled and
    reduced to the free points, and the exact zero modes (the constants of
    the connected parts that no held point touches, M-normalised);
:func:`shift_invert`
    scipy's ``eigsh`` in shift-invert mode (SuperLU of ``K - sigma M``), or
    a dense solve for tiny problems;
:func:`error_estimates`
    the estimate of each wanted eigenvalue's error that stops the block
    iteration (:mod:`hatkernels.eigenblock`);
:func:`coarser`, :func:`prolong`
    the problem one refinement down, and vectors interpolated one up (for
    the nested start: the eigenvectors of a coarse mesh, interpolated, are
    the first block on the next finer one).

Why an estimate and not a residual norm: a test that the 2-norm of every
residual ``K x - lambda M x`` is below one absolute number (scipy's
``lobpcg`` stops so) judges the eigenvalue badly.  That norm is dominated by the residual's
oscillating part, which hardly affects the eigenvalue: on the unit square
(65,025 unknowns, ten modes) the relative eigenvalue error was 1e-8 while
the relative residual was still 0.4.  Eigenvalues of a symmetric pencil
computed by Rayleigh-Ritz only decrease from one iteration to the next, so
the changes of the Ritz values measure what is left: with ``c_j`` the last
change and ``q = c_j / c_(j-1)`` (held in ``[0.25, 0.9]``) the remaining
error is about ``c_j q / (1 - q)``.  Only the ``k`` wanted values are
judged: the extra vectors of the block need not converge (a multiple
eigenvalue split by the end of the block would never let them).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import scipy.linalg
from scipy.sparse.linalg import eigsh

from hatkernels._jit import blocks as _kb
from hatkernels.assembly import StiffnessAssembler, assemble_mass, assemble_stiffness
from hatkernels.boundary import apply_dirichlet
from hatkernels.errors import ConvergenceError, InputError
from hatkernels.precond.gmg import coarsen_coefficient

__all__ = ["Level", "build_level", "coarser", "prolong", "shift_invert", "error_estimates",
           "LobpcgOutcome", "DENSE_LIMIT", "INTERMEDIATE",
           "SHIFT_INVERT_LIMIT"]

#: Below this many unknowns the small eigenproblem is solved densely (LAPACK).
DENSE_LIMIT = 600

#: ``method="auto"`` solves problems with at most this many unknowns by shift-invert, and
#: the nested lobpcg starts on the finest coarser level that has at most this many.
SHIFT_INVERT_LIMIT = 20_000

#: lobpcg iterations on each level between the start and the given mesh in the nested
#: iteration (docs/eigenmodes.md has the measurements).
INTERMEDIATE = 1

# the contraction factor assumed per iteration when the history cannot tell it
Q_MIN, Q_MAX = 0.25, 0.9


@dataclasses.dataclass(eq=False)
class Level:
    """The eigenproblem on one mesh.

    Attributes
    ----------
    mesh : Mesh
    K, M : scipy CSR, shape (n_free, n_free)
        Stiffness (with ``kappa``) and mass (with ``rho``) on the free points.
    free : ndarray
        Each unknown's point (sorted); held points and points in no cell are not unknowns.
    held : ndarray
        The held points (sorted).
    zero : ndarray, shape (n_free, z)
        One M-normalised constant per connected part that no held point
        touches: the exact eigenvectors of the eigenvalue 0 (``K`` annihilates
        constants, row by row).
    kappa, rho : Coefficient
    """

    mesh: object
    K: object
    M: object
    free: np.ndarray
    held: np.ndarray
    zero: np.ndarray
    kappa: object
    rho: object

    @property
    def unknowns(self):
        return self.K.shape[0]

    def expand(self, X):
        """``X`` (n_free, j) as values at all points (n_points, j), 0 where nothing is free."""
        out = np.zeros((self.mesh.n_points, X.shape[1]))
        out[self.free] = X
        return out

    def shift(self):
        """A positive number near the first nonzero eigenvalue when some part floats, else 0.

        The Rayleigh quotient of each coordinate function, made M-orthogonal
        to the zero modes, bounds the first nonzero eigenvalue from above
        (Courant's minimum-maximum principle) and is of its size; the
        smallest one is taken.  ``K + shift M`` is then positive definite
        and ``(K + shift M)^-1`` a fair preconditioner of ``K`` away from its
        zero modes.
        """
        Z = self.zero
        if Z.shape[1] == 0:
            return 0.0
        best = math.inf
        for axis in range(self.mesh.dim):
            v = np.array(self.mesh.points[self.free, axis], dtype=np.float64)
            v -= Z @ (Z.T @ (self.M @ v))
            mass = float(v @ (self.M @ v))
            if mass > 0:
                best = min(best, float(v @ (self.K @ v)) / mass)
        return best if math.isfinite(best) and best > 0 else 1.0


def build_level(mesh, held, kappa, rho, quadrature):
    """Assemble and reduce the problem on ``mesh`` (``kappa``, ``rho`` parsed Coefficients)."""
    if mesh.dim == 2:  # one symbolic phase (the pattern) for both matrices
        assembler = StiffnessAssembler(mesh, fused=True)
        K = assembler.plan.matrix(assembler.assemble_data(kappa, quadrature=quadrature))
        M = assembler.assemble_mass(rho, quadrature=quadrature)
        del assembler
    else:
        K = assemble_stiffness(mesh, kappa, quadrature=quadrature)
        M = assemble_mass(mesh, rho, quadrature=quadrature)
    rhs = np.zeros(mesh.n_points)
    k = apply_dirichlet(K, rhs, held)
    del K
    m = apply_dirichlet(M, rhs, held)  # the same pattern: the same free points
    return Level(mesh, k.A, m.A, k.free, held, _zero_modes(mesh, held, k.free, m.A), kappa, rho)


def _zero_modes(mesh, held, free, M):
    count, labels = mesh.components()
    held_parts = np.zeros(count, dtype=bool)
    touched = labels[held]
    held_parts[touched[touched >= 0]] = True
    loose = np.flatnonzero(~held_parts)
    Z = np.zeros((free.size, loose.size))
    on_free = labels[free]
    for j, part in enumerate(loose):
        Z[:, j] = on_free == part
        Z[:, j] /= math.sqrt(float(Z[:, j] @ (M @ Z[:, j])))
    return Z


def coarser(fine, held, kappa, rho):
    """``(coarse mesh, held points, kappa, rho)`` one refinement below ``fine``.

    A coarse point is held when its fine counterpart is; the coefficients go
    down as the multigrid takes them (per-cell values averaged over the
    children, per-point values kept at the coarse points).
    """
    r = fine.refinement
    is_held = np.zeros(fine.n_points, dtype=bool)
    is_held[held] = True
    return (r.coarse, np.flatnonzero(is_held[r.coarse_points]),
            coarsen_coefficient(kappa, fine, r.coarse), coarsen_coefficient(rho, fine, r.coarse))


def prolong(fine, X, rows=None):
    """Values ``X`` (n_coarse_points, j) interpolated linearly to the points of ``fine``, or
    to the points ``rows`` of it only (an (len(rows), j) block)."""
    r = fine.refinement
    a = np.empty(fine.n_points, dtype=np.int64)
    b = np.empty_like(a)
    a[r.coarse_points] = b[r.coarse_points] = np.arange(r.coarse_points.size)
    a[r.midpoints], b[r.midpoints] = r.edge_points[:, 0], r.edge_points[:, 1]
    if rows is not None:
        a, b = a[rows], b[rows]
    out = np.empty((a.size, X.shape[1]))
    _kb.interpolate_rows(np.ascontiguousarray(X, dtype=np.float64), a, b, out)
    return out


def shift_invert(level, count, seed):
    """The ``count`` smallest eigenpairs of ``(K, M)``, zero modes included: ``(values,
    vectors)`` ascending, the vectors M-orthonormal, ``method`` in words.

    Dense (LAPACK) up to :data:`DENSE_LIMIT` unknowns; else scipy's ``eigsh``
    in shift-invert mode about ``-shift`` (0 unless a part floats, when
    ``K`` itself is singular), started from a fixed random vector.
    """
    K, M = level.K, level.M
    n = K.shape[0]
    if n <= DENSE_LIMIT:
        values, vectors = scipy.linalg.eigh(K.toarray(), M.toarray(),
                                            subset_by_index=(0, count - 1))
        method = "dense"
    else:
        v0 = np.random.default_rng(seed).standard_normal(n)
        try:
            values, vectors = eigsh(K, count, M, sigma=-level.shift(), which="LM", v0=v0)
        except Exception as exc:  # ARPACK's own errors carry no library type
            raise ConvergenceError(f"eigenmodes: shift-invert (scipy's eigsh) failed on "
                                   f"{n} unknowns: {exc}") from exc
        method = "shift-invert"
    order = np.argsort(values, kind="stable")
    return values[order], vectors[:, order], method


def error_estimates(history, k):
    """Estimated relative errors of the ``k`` smallest Ritz values from their history.

    ``history`` is a list of arrays of Ritz values, one per iterate, oldest
    first.  See the module notes; ``inf`` when there is no change to judge by.
    """
    L = np.asarray(history)[:, :k]
    if len(L) < 2:
        return np.full(k, np.inf)
    c = np.abs(np.diff(L, axis=0))
    last = c[-1]
    q = np.full(k, Q_MAX)
    if len(c) >= 2:
        prev = c[-2]
        np.divide(last, prev, out=q, where=prev > 0)
        q = np.clip(q, Q_MIN, Q_MAX)
    return last * q / (1.0 - q) / np.maximum(np.abs(L[-1]), np.finfo(float).tiny)


@dataclasses.dataclass
class LobpcgOutcome:
    """What :func:`hatkernels.eigenblock.run` found: Ritz values and vectors of the whole
    block, the iterations done, the history of Ritz values and the estimated errors of the
    wanted ones."""

    values: np.ndarray
    vectors: np.ndarray
    iterations: int
    history: list
    errors: np.ndarray
    converged: bool


def check_block(level, m, z):
    """Refuse a block lobpcg cannot iterate with: it needs ``5 m`` unknowns beyond the ``z``
    constraints (its basis is 3 m wide; the rest keeps the small problem well inside the
    large one)."""
    if level.unknowns - z < 5 * m:
        raise InputError(f"method='lobpcg' needs at least 5 x {m} (the block) unknowns beyond "
                         f"the {z} zero modes, but the problem has {level.unknowns}; use "
                         f"method='shift-invert'")
