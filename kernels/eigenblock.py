"""A preconditioned block eigensolver (LOBPCG) on this library's kernels.

The smallest eigenpairs of ``K x = lambda M x`` (``K`` symmetric, ``M``
symmetric positive definite, both CSR on the free unknowns), from a start
block ``X`` of ``m`` vectors, with a preconditioner ``T`` of ``K``.  Each
iteration:

1. the residuals ``r_j = K x_j - theta_j M x_j`` of the Ritz pairs, and
   ``w_j = T r_j``;
2. Rayleigh-Ritz on the basis ``S = [X, W, P]`` (``P``: the last step's
   direction, absent in the first iteration): the Gram matrices
   ``S^T K S`` and ``S^T M S`` and the ``m`` smallest eigenpairs of that
   small pencil;
3. the new Ritz vectors ``X = S C`` and the new direction ``P = [W, P] C_WP``
   (the implicit form of A. V. Knyazev, Toward the optimal preconditioned
   eigensolver: locally optimal block preconditioned conjugate gradient
   method, SIAM J. Sci. Comput. 23, 2001, as U. Hetmaniuk and R. Lehoucq,
   Basis selection in LOBPCG, J. Comput. Phys. 218, 2006, discuss it).

The small pencil is solved without assuming the basis is independent:
``S^T M S`` is scaled to a unit diagonal and its eigenvectors with
eigenvalues below ``DROP`` times the largest are dropped before ``K``'s
Gram matrix is reduced to the rest (the singular-value form of A.
Stathopoulos and K. Wu, A block orthogonalization procedure with constant
synchronization requirements, SIAM J. Sci. Comput. 23, 2002).  A ``W`` that
has converged into the span of ``X`` and ``P`` is thus left out instead of
breaking a Cholesky factorisation, and no restart is ever needed.

Why not scipy's ``lobpcg``: at 1,046,529 unknowns and 13 vectors its dense
block algebra took 9.7 of the 17.5 seconds of a ten-mode solve
(cProfile, docs/eigenmodes.md), and its blocks are stored so that each
preconditioner application needs a transposed copy.  Here the sparse
products take the whole block in one pass over the matrices
(:func:`hatkernels._jit.blocks.pair_product`), all Gram blocks of a
Rayleigh-Ritz step are formed in one pass over the block
(:func:`hatkernels._jit.blocks.gram_pairs`), the updates are BLAS, and the
preconditioner reads and writes contiguous rows.

Stopping is the caller's: :func:`run` records the Ritz values of every
iterate and stops when the estimate of
:func:`hatkernels.eigensolvers.error_estimates` is below ``rtol`` for the
``k`` wanted ones (or after ``iterations``).

Memory: the basis and its two products, ``3 x 3 m`` vectors, and ``2 m`` more
for the residuals and their preconditioned rows (which also hold the
updates): ``88 m`` bytes per unknown.
"""

from __future__ import annotations

import time

import numpy as np
import scipy.linalg

from hatkernels._jit import blocks as _kb
from hatkernels.eigensolvers import LobpcgOutcome, error_estimates
from hatkernels.errors import ConvergenceError

__all__ = ["BlockOperators", "PencilBlocks", "run", "ritz", "shared_pattern", "DROP",
           "not_converged"]

#: Relative eigenvalue of the scaled mass Gram matrix below which a basis
#: direction counts as dependent on the others and is dropped.
DROP = 1e-10


def shared_pattern(A, B):
    """``(indptr, indices, a, b)``: CSR matrices ``A`` and ``B`` (the same shape, sorted
    indices) on one pattern, the union of theirs, with explicit zeros where one has no entry."""
    if (A.indptr.shape == B.indptr.shape and A.indices.shape == B.indices.shape
            and np.array_equal(A.indptr, B.indptr) and np.array_equal(A.indices, B.indices)):
        return A.indptr, A.indices, A.data, B.data
    n = A.shape[1]
    union = (abs(A) + abs(B)).tocsr()  # no cancellation: the pattern is exactly the union
    union.sort_indices()

    def keys(C):
        rows = np.repeat(np.arange(C.shape[0], dtype=np.int64), np.diff(C.indptr))
        return rows * n + C.indices

    where = keys(union)
    values = []
    for C in (A, B):
        v = np.zeros(union.nnz)
        v[np.searchsorted(where, keys(C))] = C.data
        values.append(v)
    return union.indptr, union.indices, values[0], values[1]


class BlockOperators:
    """What every block operator of :func:`run` shares: the preconditioner ``T`` (an
    object with ``apply_into(r, out)``) applied to rows, and the counters.

    ``counts``: products with ``K``, with ``M``, and preconditioner applications, per
    vector; ``seconds``: time in the products, in the preconditioner and in the
    dense block algebra of :func:`run`.  Subclasses give ``products(X, KX, MX)``,
    ``M`` (for constraints) and ``by_rows``.
    """

    by_rows = False

    def __init__(self, preconditioner):
        self._T = preconditioner
        self.counts = {"stiffness": 0, "mass": 0, "preconditioner": 0}
        self.seconds = {"products": 0.0, "preconditioner": 0.0, "dense": 0.0}

    def _counted(self, vectors, seconds):
        self.counts["stiffness"] += vectors
        self.counts["mass"] += vectors
        self.seconds["products"] += seconds

    def precondition(self, rows, out):
        """``out[j] = T rows[j]`` for each row."""
        t = time.perf_counter()
        for j in range(rows.shape[0]):
            self._T.apply_into(rows[j], out[j])
        self.counts["preconditioner"] += rows.shape[0]
        self.seconds["preconditioner"] += time.perf_counter() - t


class PencilBlocks(BlockOperators):
    """``K`` and ``M`` (CSR) applied to the columns of a block in one pass; the
    preconditioner to rows (:class:`BlockOperators`)."""

    def __init__(self, K, M, preconditioner):
        super().__init__(preconditioner)
        self.n = K.shape[0]
        self.M = M
        self._pattern = shared_pattern(K, M)

    def products(self, X, KX, MX):
        """``KX = K X`` and ``MX = M X`` for a block ``X`` (n, r)."""
        t = time.perf_counter()
        indptr, indices, k, m = self._pattern
        _kb.pair_product(indptr, indices, k, m, X, KX, MX)
        self._counted(X.shape[1], time.perf_counter() - t)


def ritz(GK, GM, m):
    """The ``m`` smallest eigenpairs ``(theta, C)`` of the pencil ``(GK, GM)`` of Gram
    matrices of a basis, with the directions that the basis does not resolve dropped
    (module notes); ``C`` gives the Ritz vectors as combinations of the basis."""
    GK = 0.5 * (GK + GK.T)
    GM = 0.5 * (GM + GM.T)
    d = np.sqrt(np.clip(np.diag(GM), 0.0, None))
    scale = np.divide(1.0, d, out=np.ones_like(d), where=d > 0)
    A = GK * np.outer(scale, scale)
    B = GM * np.outer(scale, scale)
    if not (np.isfinite(A).all() and np.isfinite(B).all()):
        raise ConvergenceError("eigenmodes: lobpcg's Gram matrices are not finite (a "
                               "product or the preconditioner gave NaN or infinity)")
    w, V = scipy.linalg.eigh(B)
    keep = w > DROP * w[-1]
    if keep.sum() < m:
        raise ConvergenceError(f"eigenmodes: lobpcg's basis has only {int(keep.sum())} "
                               f"independent directions for {m} wanted; the start block is "
                               "(nearly) dependent")
    Q = V[:, keep] / np.sqrt(w[keep])
    H = Q.T @ A @ Q
    theta, Y = scipy.linalg.eigh(0.5 * (H + H.T), subset_by_index=(0, m - 1))
    return theta, scale[:, None] * (Q @ Y)


class _Constraints:
    """Keeps blocks M-orthogonal to the columns of ``Y`` (n, z), which are M-orthonormal;
    the blocks are (n, m), or (m, n) when ``by_rows``."""

    def __init__(self, Y, M, by_rows=False):
        self.Y, self.by_rows = Y, by_rows
        self.MY = None if Y is None else np.asarray(M @ Y)

    def apply(self, B):
        if self.Y is None:
            return
        if self.by_rows:
            B -= (B @ self.MY) @ self.Y.T
        else:
            B -= self.Y @ (self.MY.T @ B)


def run(blocks, X0, Y, *, k, rtol, maxiter, iterations=None):
    """LOBPCG from the start block ``X0`` (n, m), not modified; (m, n), one vector per
    row, when ``blocks.by_rows`` is True (products and preconditioner then take and give
    blocks by rows, and so do the outcome's vectors).

    ``Y`` (n, z) or None: constraints (zero modes), orthonormal in the mass
    matrix of ``blocks``.  Stops when the ``k`` smallest
    Ritz values' estimated relative errors are at most ``rtol``, or after
    ``iterations`` iterations when given (``rtol`` then unused), or after
    ``maxiter``.  Returns a :class:`hatkernels.eigensolvers.LobpcgOutcome`
    with the vectors as an (n, m) array ((m, n) by rows), M-orthonormal.
    """
    by_rows = getattr(blocks, "by_rows", False)  # blocks stored one vector per row
    m, n = X0.shape if by_rows else X0.shape[::-1]
    constraints = _Constraints(Y, blocks.M, by_rows)
    # eleven buffers of n x m doubles, allocated (and first touched) once: X, W, P and
    # their products with K and M, the residuals as rows and the preconditioned rows, and
    # one for the new Ritz vectors (the new direction is made in the preconditioned rows')
    pool = np.empty((11, m, n) if by_rows else (11, n, m))
    X, W, P, KX, KW, KP, MX, MW, MP = pool[:9]
    if by_rows:
        rows, done = pool[9], pool[10]
    else:
        rows, done = pool[9].reshape(m, n), pool[10].reshape(m, n)
    new_x, new_p = pool[9], pool[10]

    def times(S, C, out):  # out = S C, the block S's vectors combined by the columns of C
        if by_rows:
            np.matmul(C.T, S, out=out)
        else:
            np.matmul(S, C, out=out)

    X[:] = X0
    constraints.apply(X)
    blocks.products(X, KX, MX)
    theta, C = _rayleigh_ritz(blocks, pool, [0], [3], [6], m, by_rows)
    times(X, C, new_x)
    X[:] = new_x
    blocks.products(X, KX, MX)
    history = [theta]
    errors = np.full(k, np.inf)
    steps = 0
    while steps < (maxiter if iterations is None else min(iterations, maxiter)):
        if by_rows:
            np.multiply(MX, -theta[:, None], out=rows)
            rows += KX
        else:
            _kb.residual_rows(KX, MX, theta, rows)
        blocks.precondition(rows, done)
        if by_rows:
            W[:] = done
        else:
            _kb.from_rows(done, W)
        constraints.apply(W)
        blocks.products(W, KW, MW)
        if steps == 0:  # no direction yet
            theta, C = _rayleigh_ritz(blocks, pool, [0, 1], [3, 4], [6, 7], m, by_rows)
        else:
            theta, C = _rayleigh_ritz(blocks, pool, [0, 1, 2], [3, 4, 5], [6, 7, 8], m,
                                      by_rows)
        t = time.perf_counter()
        # P = W C_W + P C_P, then X = X C_X + P (rows and done are free again)
        times(W, C[m:2 * m], new_p)
        if steps:
            times(P, C[2 * m:], new_x)
            new_p += new_x
        times(X, C[:m], new_x)
        new_x += new_p
        X[:] = new_x
        P[:] = new_p
        blocks.seconds["dense"] += time.perf_counter() - t
        blocks.products(X, KX, MX)
        blocks.products(P, KP, MP)
        steps += 1
        history.append(theta)
        errors = error_estimates(history, k)
        if iterations is None and (errors <= rtol).all():
            break
    converged = iterations is not None or bool((errors <= rtol).all())
    return LobpcgOutcome(theta, X, steps, history, errors, converged)


def _rayleigh_ritz(blocks, pool, basis, kb, mb, m, by_rows=False):
    """Ritz pairs of the basis ``pool[basis]`` from its products ``pool[kb]``, ``pool[mb]``
    (lists of block numbers): both Gram matrices' upper blocks in one pass."""
    t = time.perf_counter()
    q = len(basis)
    pairs = [(i, j) for i in range(q) for j in range(i, q)]
    left = np.array([basis[i] for i, _ in pairs] * 2, dtype=np.int64)
    right = np.array([kb[j] for _, j in pairs] + [mb[j] for _, j in pairs], dtype=np.int64)
    parts = np.empty((len(left), m, m))
    if by_rows:
        used = np.unique(np.concatenate([left, right]))
        _kb.gram_pairs_by_rows(pool, used, np.searchsorted(used, left),
                               np.searchsorted(used, right), parts)
    else:
        _kb.gram_pairs(pool, left, right, parts)
    GK = np.empty((q * m, q * m))
    GM = np.empty_like(GK)
    for p, (i, j) in enumerate(pairs):
        rows, cols = slice(i * m, (i + 1) * m), slice(j * m, (j + 1) * m)
        for G, part in ((GK, parts[p]), (GM, parts[len(pairs) + p])):
            G[rows, cols] = part
            G[cols, rows] = part.T
    out = ritz(GK, GM, m)
    blocks.seconds["dense"] += time.perf_counter() - t
    return out


def not_converged(outcome, rtol, wanted, unknowns, converged_before=0, hint=""):
    """The :class:`~hatkernels.errors.ConvergenceError` of an iteration that did not meet
    ``rtol``: how many of the ``wanted`` converged (``converged_before`` counted in front,
    the zero modes), after how many iterations, the errors, and what to try (``hint``)."""
    good = int((outcome.errors <= rtol).sum()) + converged_before
    return ConvergenceError(
        f"eigenmodes: lobpcg converged {good} of the {wanted} eigenpairs asked for after "
        f"{outcome.iterations} iterations on {unknowns} unknowns (estimated relative errors "
        f"up to {float(np.max(outcome.errors)):.2e} against rtol {rtol:g}); raise maxiter"
        f"{hint or ' or loosen rtol'}")

