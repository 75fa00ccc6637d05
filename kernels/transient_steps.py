"""One step of the theta scheme on assembled matrices, and the heat it moves.

With ``M`` the capacity mass (consistent, or lumped to its row sums) and ``K``
the stiffness with the reaction mass and the Robin boundary mass, a step from
``t_n`` to ``t_n + dt`` solves, for the change ``d = u^(n+1) - u^n`` of the free
unknowns,

    (M + tau K)_FF d_F = dt (b_theta - K u^n)_F - (M + tau K)_FD d_D,    tau = theta dt

with ``b_theta = theta b(t_n+1) + (1 - theta) b(t_n)`` and ``d_D`` the change of
the held values.  ``theta = 1`` is backward Euler, ``theta = 1/2`` Crank-Nicolson.
The system matrix depends on ``tau`` alone, so a backward Euler step of
``dt / 2`` uses the Crank-Nicolson matrix of ``dt`` (Rannacher's start-up, see
:mod:`hatkernels.transient`): :class:`System` is built once per ``tau``, with
its preconditioner.  Solving for the change keeps CG's relative tolerance on
the step's own scale; the first guess is the change's projection onto the last
changes of the same system (:class:`StartSpace`).

:class:`Blocks` holds what is assembled once: the free-free blocks of ``M``
and ``K``, the couplings to the held points, and the weights of the heat
balance.  Energy per step (:meth:`Blocks.heat`): what the discrete equations
of the held rows say flows out there (as :mod:`hatkernels.results` does for
the steady case), the Robin and reaction terms, and the sources and imposed
fluxes; the stored heat is ``1^T M u``.
"""

from __future__ import annotations

import math
import time

import numpy as np
import scipy.sparse as sp

from hatkernels import _cg
from hatkernels._jit import amg as _amg
from hatkernels._jit import sparse as _k
from hatkernels.assembly import StiffnessAssembler
from hatkernels.assembly.boundary_terms import side_mass
from hatkernels.boundary import apply_dirichlet_in_place
from hatkernels.errors import InputError
from hatkernels.krylov import _operator
from hatkernels.locality import Renumbering, should_renumber
from hatkernels.precond import PreconditionerContext, make_preconditioner
from hatkernels.precond.chebyshev import ChebyshevSmoother
from hatkernels.sparse import as_csr

__all__ = ["MAX_STEPS", "SCHEMES", "SMOOTHER_ITERATIONS", "Blocks", "StartSpace", "System",
           "measure_product", "smoother_first"]

#: CG iterations preconditioned by a Chebyshev smoother alone (the patch multigrid's finest
#: level, or degree 2 on the assembled system), tried first on a step whose start was
#: projected from past steps; the whole preconditioner only when they do not meet the
#: tolerance (docs/transient.md, "The smoother first").
SMOOTHER_ITERATIONS = 1


#: The schemes by name, and their theta.
SCHEMES = {"backward-euler": 1.0, "crank-nicolson": 0.5}

#: The most steps a solve takes (more is taken for a mistaken ``dt`` or ``times``).
MAX_STEPS = 10**7


def march_options(dt, times, scheme, startup, lumped):
    """``(dt, times, theta, startup)`` of a march, checked (InputError naming the bad one);
    ``times`` a new float64 array."""
    from hatkernels.checks import integer_option, real_option
    from hatkernels.transient_data import checked_times

    dt = real_option(dt, "dt", positive=True)
    times = checked_times(times)
    if not isinstance(scheme, str) or scheme not in SCHEMES:
        raise InputError(f"unknown scheme {scheme!r}; choose one of {list(SCHEMES)}")
    startup = integer_option(startup, "startup", minimum=0)
    if startup % 2:
        raise InputError(f"startup must be even (half steps come in pairs), got {startup}")
    if not isinstance(lumped, bool):
        raise InputError(f"lumped must be True or False, got {lumped!r}")
    return dt, times, SCHEMES[scheme], startup


def _schedule(times, dt, theta, startup):
    """The steps ``(t0, t1, theta, output index or -1)``: each output interval in equal
    steps of at most ``dt``; with Crank-Nicolson the first ``startup / 2`` steps as
    ``startup`` backward Euler half steps."""
    counts = np.ceil(np.diff(times, prepend=0.0) / dt * (1 - 1e-12))
    if counts.sum() > MAX_STEPS:
        raise InputError(f"dt = {dt!r} up to t = {times[-1]!r} takes {counts.sum():.3g} steps, "
                         f"more than {MAX_STEPS}; choose a longer dt")
    steps = []
    left = startup if theta != 1.0 else 0
    start = 0.0
    for k, end in enumerate(times):
        length = end - start
        m = max(1, math.ceil(length / dt * (1 - 1e-12))) if length > 0 else 0
        for j in range(m):
            t0 = start + length * j / m
            t1 = end if j == m - 1 else start + length * (j + 1) / m
            out = k if j == m - 1 else -1
            if left:
                mid = 0.5 * (t0 + t1)
                steps += [(t0, mid, 1.0, -1), (mid, t1, 1.0, out)]
                left -= 2
            else:
                steps.append((t0, t1, theta, out))
        start = end
    return steps


def _start(prev, h_prev, prev2, h_prev2, h, out):
    """CG's first guess for a step's change ``d``: from the last two changes, ``2 d' - d''``
    (u extrapolated quadratically) when the three steps are equal, else the last change
    scaled to the step (linearly), else nothing."""
    if prev is None:
        return None
    r = _ratio(h, h_prev)
    if prev2 is not None and r == 1.0 and _ratio(h, h_prev2) == 1.0:
        np.multiply(prev, 2.0, out=out)
        out -= prev2
        return out
    return prev * r if r != 1.0 else prev


def _ratio(h, reference):
    """``h / reference``, exactly 1 when they agree to 1e-12 (steps cut from one interval
    differ in the last bits: no rescaling pass for that)."""
    r = h / reference
    return 1.0 if abs(r - 1.0) <= 1e-12 else r


def _sparse_weights(w):
    """``(indices, values)`` of the nonzero entries of a weight vector."""
    idx = np.flatnonzero(w)
    return idx, w[idx]


def _rows_with_entries(C):
    """``(rows, C[rows])``: the rows of CSR ``C`` that hold entries, and those rows alone."""
    rows = np.flatnonzero(np.diff(C.indptr))
    return rows, C[rows]


class Blocks:
    """The matrices of a :class:`~hatkernels.transient_data.TransientProblem`, split by
    free and held points, assembled once.

    Attributes
    ----------
    free, held : ndarray
        The unknowns (points in a cell that are not held) and the held points.
        ``free`` is increasing, or in Z order when the unknowns were renumbered
        (``renumber``, :mod:`hatkernels.locality`); ``held`` is increasing.
    renumbered : bool
    renumber_seconds : float
        The time the renumbering took (0 without it).
    K_FF, M_FF : scipy CSR
    stored_bytes : int
        What the matrices hold.
    rows_capacity, rows_lower : ndarray or None
        Per point, the row sums of the capacity mass and of the reaction and
        Robin terms (None without them): ``gmg``'s lumped mass term
        ``rows_lower + rows_capacity / tau`` (:meth:`mass`).
    """

    def __init__(self, problem, lumped, renumber=False):
        mesh, q = problem.mesh, problem.quadrature
        n = mesh.n_points
        assembler = StiffnessAssembler(mesh)
        K = assembler.assemble(problem.coefficient, quadrature=q)
        ones = np.ones(n)
        w_reaction = w_robin = None
        if problem.reaction is not None:
            C = assembler.assemble_mass(problem.reaction, quadrature=q)
            w_reaction = C @ ones
            K = K + C
        if problem.robin is not None:
            R = side_mass(mesh, problem.robin.r, problem.robin.sides, q)
            w_robin = R @ ones
            K = K + R
        K = as_csr(sp.csr_matrix(K))
        M = as_csr(sp.csr_matrix(
            assembler.assemble_mass(problem.capacity, lumped=lumped, quadrature=q)))
        held = problem.dirichlet.points
        # what is read from K and M whole comes first: both are then reduced in their own
        # arrays (no second copy of either), and not used again
        K_D, M_D = K[held], M[held]
        w = M @ ones  # 1^T M: each point's capacity (stored heat = w . u)
        zeros = np.zeros(n)
        reduced = apply_dirichlet_in_place(K, zeros, held)
        self.free, self.held = free, held = reduced.free, held
        self.K_FF = reduced.A
        self.M_FF = apply_dirichlet_in_place(M, zeros, held).A
        del reduced, K, M
        self.renumbered, self.renumber_seconds = False, 0.0
        if should_renumber(self.K_FF, mesh.dim, renumber):
            # every later use indexes with self.free: the blocks below follow it
            order = Renumbering(mesh.points[free])
            self.K_FF, self.M_FF = order.matrix(self.K_FF), order.matrix(self.M_FF)
            self.free = free = free[order.order]
            self.renumbered, self.renumber_seconds = True, order.seconds
        if held.size:  # couplings to the held points: K_FD u_D^n and the lifting
            K_DF, M_DF = K_D[:, free], M_D[:, free]
            self.K_FD, self.M_FD = K_DF.T.tocsr(), M_DF.T.tocsr()
            self._coupling = _rows_with_entries(self.K_FD)
            # the held rows' column sums: the heat through the held points
            self.k_DF = _sparse_weights(np.asarray(K_DF.sum(axis=0)).ravel())
            self.m_DF = _sparse_weights(np.asarray(M_DF.sum(axis=0)).ravel())
            self.k_DD = np.asarray(K_D[:, held].sum(axis=0)).ravel()
            self.m_DD = np.asarray(M_D[:, held].sum(axis=0)).ravel()
        del K_D, M_D
        # Robin (sparse: boundary points) and reaction (dense) weights 1^T R, 1^T C
        self.robin = None if w_robin is None else (_sparse_weights(w_robin[free]),
                                                   w_robin[held])
        self.reaction = None if w_reaction is None else (w_reaction[free], w_reaction[held])
        self.w_F, self.w_D = w[free], w[held]
        self.rows_capacity = w
        lower = [v for v in (w_reaction, w_robin) if v is not None]
        self.rows_lower = sum(lower[1:], lower[0]) if lower else None
        self.stored_bytes = sum(int(C.data.nbytes + C.indices.nbytes + C.indptr.nbytes)
                                for C in (self.K_FF, self.M_FF))

    @property
    def unknowns(self):
        return int(self.free.size)

    def mass(self, tau):
        """The lumped mass term of ``M + tau K`` divided by ``tau``, per point: what the
        stiffness is to be augmented with in a preconditioner's own levels."""
        m = self.rows_capacity / tau
        return m if self.rows_lower is None else m + self.rows_lower

    def coupling(self, uD):
        """``K_FD uD`` as ``(rows, values)`` (the rows that touch a held point), or None."""
        if not self.held.size or not np.any(uD):
            return None
        rows, sub = self._coupling
        return rows, sub @ uD

    def stored(self, x, uD):
        """Stored heat ``1^T M u`` (capacity times temperature, integrated)."""
        return float(_k.dot(self.w_F, x)) + float(self.w_D @ uD)

    def heat(self, x, d, uD, dD, dt, theta, b_old, b_new):
        """Over one step: ``(held_out, robin_ru, reaction_cu)``, the heat out through the
        held points (from the held rows of the discrete equations) and the integrals
        over the step of ``int r u`` on the Robin sides and ``int c u`` (theta-weighted,
        as the scheme weighs them)."""
        held_out = 0.0
        if self.held.size:
            iM, vM = self.m_DF
            iK, vK = self.k_DF
            md = vM @ d[iM] + self.m_DD @ dD
            ku = vK @ (x[iK] + theta * d[iK]) + self.k_DD @ (uD + theta * dD)
            bD = theta * b_new[self.held].sum() + (1 - theta) * b_old[self.held].sum()
            held_out = -(md + dt * (ku - bD))
        robin = reaction = 0.0
        if self.robin is not None:
            (i, v), wD = self.robin
            robin = dt * (v @ (x[i] + theta * d[i]) + wD @ (uD + theta * dD))
        if self.reaction is not None:
            wF, wD = self.reaction
            reaction = dt * (_k.dot(wF, x) + theta * _k.dot(wF, d) + wD @ (uD + theta * dD))
        return float(held_out), float(robin), float(reaction)


def smoother_first(product, smoother, rhs, x0, rtol, atol, maxiter, work):
    """:data:`SMOOTHER_ITERATIONS` CG iterations from ``x0`` preconditioned by ``smoother``
    (``apply_into``; symmetric positive definite): ``(result, start, used)``, the converged
    :class:`~hatkernels._cg.CGResult` or None, the start for the whole preconditioner (the
    iterate when it improved on ``x0``, else ``x0``) and the iterations spent, which the
    caller takes off the whole preconditioner's ``maxiter``.  Not tried (``used`` 0) when
    ``maxiter`` would leave the whole preconditioner no iteration.

    A start projected from past steps leaves a residual near the tolerance, made of
    components a smoother removes 5 to 10 times over, where a V-cycle would remove them
    100 times over at several times the cost; CG's own checks (the true residual
    included) decide whether that is enough.
    """
    if maxiter <= SMOOTHER_ITERATIONS:
        return None, x0, 0
    result = _cg.run(product, rhs, x0, smoother, _cg.LOCAL, rtol=rtol, atol=atol,
                     maxiter=SMOOTHER_ITERATIONS, work=work)
    used = int(result.iterations)
    if result.info == 0:
        return result, x0, used
    return None, (result.x if result.info > 0 else x0), used


class _AssembledSmoother:
    """Chebyshev smoothing of degree 2 on ``D^-1 A`` from a zero guess, ``z = S r``, as a
    preconditioner: Gershgorin's bound on the spectrum, the interval's bottom a sixth of
    its top (the geometric multigrid's); symmetric positive definite."""

    def __init__(self, A):
        arrays = (A.indptr, A.indices, A.data)
        dinv = np.empty(A.shape[0])
        bound, row = _amg.diagonal_and_bound(*arrays, dinv)  # one pass, no copy of A
        if row >= 0:  # M + tau K has a positive diagonal; a failure here is a bug
            raise InputError(f"the step matrix M + tau K has diagonal {A.diagonal()[row]} "
                             f"in row {row}; it must be > 0")
        self._q = np.empty(A.shape[0])
        self._cheb = ChebyshevSmoother(lambda x, out: _k.spmv(*arrays, x, out),
                                       lambda x, b, out: _k.residual(*arrays, x, b, out),
                                       dinv, 2, bound=bound, estimate=False, lower=1.0 / 6.0)

    def apply_into(self, r, z):
        # degree 2 from zero reads r and writes z and the one work vector q only
        self._cheb.smooth(z, r, True, r, z, self._q)
        return z


class System:
    """``M + tau K`` on the free unknowns, its preconditioner and CG's product, built once
    per ``tau``; ``dt`` scales the stiffness of the right-hand side (``dt K_FF``)."""

    def __init__(self, blocks, tau, dt):
        A = (blocks.M_FF + tau * blocks.K_FF).tocsr()
        A.sum_duplicates()
        A.sort_indices()
        self.A = as_csr(A, "M + tau K")
        self.tau, self.dt = float(tau), float(dt)
        self.product, self._n = _operator(self.A)
        K = blocks.K_FF
        self.K_dt = (K.indptr, K.indices, dt * K.data)
        self.lift = None
        if blocks.held.size:
            rows, sub = _rows_with_entries(blocks.M_FD + tau * blocks.K_FD)
            self.lift = (rows, sub.tocsr())
        self.M, self.description, self.preconditioner_bytes = None, "", 0
        self.space = StartSpace(self._n, START_SPACE)
        self._smoother = None

    def precondition(self, preconditioner, context, options):
        """Build the preconditioner ``preconditioner`` (a registered name) of ``M + tau K``."""
        P = make_preconditioner(self.A, preconditioner, context=context, **options)
        self.description = P.description
        self.preconditioner_bytes = int(getattr(P, "nbytes", 0) or 0)
        self.M = _cg.as_preconditioner(P, self._n)

    @property
    def stored_bytes(self):
        A = self.A
        return int(A.data.nbytes + A.indices.nbytes + A.indptr.nbytes + self.K_dt[2].nbytes
                   + self.preconditioner_bytes + self.space.nbytes)

    def matvec(self, v, out):
        """``out = (M + tau K) v``."""
        A = self.A
        _k.spmv(A.indptr, A.indices, A.data, v, out)

    def rhs(self, x, c_dt, scale, dD, out):
        """``out = scale (c_dt - dt K_FF x) - (M + tau K)_FD dD`` (``c_dt`` is ``dt`` times
        the free rows of ``b_theta - K_FD u_D^n``)."""
        _k.residual(*self.K_dt, x, c_dt, out)
        if scale != 1.0:  # a half step of the start-up
            out *= scale
        if self.lift is not None and np.any(dD):
            rows, sub = self.lift
            out[rows] -= sub @ dD
        return out

    def solve(self, rhs, x0, rtol, atol, maxiter, work=None, projected=False):
        """CG on ``(M + tau K) d = rhs`` from ``x0``: ``(result, smoother iterations,
        iterations with the preconditioner)``, the :class:`~hatkernels._cg.CGResult` (its
        vectors ``work``'s, when given).  A
        ``projected`` start gets :func:`smoother_first`, with a Chebyshev smoother of
        degree 2 on the assembled system made on first use."""
        used = 0
        if projected and SMOOTHER_ITERATIONS:
            if self._smoother is None:
                self._smoother = _AssembledSmoother(self.A)
            result, x0, used = smoother_first(self.product, self._smoother, rhs, x0, rtol,
                                              atol, maxiter, work)
            if result is not None:
                return result, used, 0
        result = _cg.run(self.product, rhs, x0, self.M, _cg.LOCAL, rtol=rtol, atol=atol,
                         maxiter=maxiter - used, work=work)
        return result, used, result.iterations

    def remember(self, rhs, result):
        """Give the start space a solve's solution (with ``A d = rhs - r``, no product)."""
        if result.iterations:
            self.space.add(result.x, self.matvec, rhs, result.residual)


#: Directions :class:`StartSpace` keeps per system.
START_SPACE = 4


class StartSpace:
    """CG's first guess for the steps of one system ``A``: the projection of the step's
    solution, in ``A``'s energy norm, onto the span of the last ``size`` solutions
    that needed CG iterations.  P. F. Fischer, *Projection techniques for iterative
    solution of Ax = b with successive right-hand sides*, Computer Methods in Applied
    Mechanics and Engineering 163 (1998) 193-204, with a window of the latest
    solutions in place of his restarted orthonormal basis: no orthogonalisation
    passes, and no step loses the history.

    With the solutions ``X`` and their products ``AX`` kept, the guess for ``b`` is
    ``x0 = X a`` with ``G a = X^T b``, ``G = X^T A X`` (updated by one row per added
    solution).  The successive solutions are nearly parallel, so ``G`` is solved
    by its eigenvalues after scaling to a unit diagonal, dropping the directions
    below :attr:`DROP` of the largest (rounding, not information).  Memory:
    ``2 size`` vectors.
    """

    #: Eigenvalues of the scaled Gram matrix below this share of the largest are
    #: dropped from the solve.
    DROP = 1e-12

    def __init__(self, n, size):
        self.X = np.empty((size, n))
        self.AX = np.empty((size, n))
        self.G = np.zeros((size, size))
        self.count = 0
        self._next = 0
        self._a = np.empty(size)
        self._row = np.empty(size)

    @property
    def nbytes(self):
        return self.X.nbytes + self.AX.nbytes

    def guess(self, b, out):
        """The projection of ``A^-1 b`` into ``out`` (None while nothing is held)."""
        c = self.count
        if c == 0:
            return None
        a = self._a
        _k.row_dots(self.X, c, b, a)
        G = self.G[:c, :c]
        s = 1.0 / np.sqrt(np.diag(G))
        lam, V = np.linalg.eigh(G * s[:, None] * s[None, :])
        keep = lam > self.DROP * lam[-1]
        coeffs = np.zeros(self.X.shape[0])
        coeffs[:c] = s * (V[:, keep] @ ((V[:, keep].T @ (s * a[:c])) / lam[keep]))
        _k.combine_rows(coeffs, self.X, c, 0.0, out)
        return out

    def add(self, x, product, b=None, r=None):
        """Hold the solution ``x`` (copied) in place of the oldest; ``product(v, out)``
        writes ``A v``, unless the right-hand side ``b`` and the true residual ``r`` of
        a converged solve are given (``A x = b - r``, no product)."""
        size = self.X.shape[0]
        if size == 0 or not np.any(x):  # the zero solution adds nothing
            return
        i = self._next
        v, Av = self.X[i], self.AX[i]
        v[:] = x
        if r is None:
            product(v, Av)
        else:
            np.subtract(b, r, out=Av)
        count = min(self.count + 1, size)
        row = self._row
        _k.row_dots(self.X, count, Av, row)
        self.count, self._next = count, (i + 1) % size
        self.G[i, :count] = row[:count]
        self.G[:count, i] = row[:count]


def context_of(problem):
    """The :class:`PreconditionerContext` a step system passes: the serial solve's
    (mesh with its refinement history, coefficient, held points, quadrature)."""
    return PreconditionerContext(mesh=problem.mesh, coefficient=problem.coefficient,
                                 fixed=problem.dirichlet.points, quadrature=problem.quadrature)


def measure_product(A, repeats=5):
    """Seconds of one product with CSR ``A`` (the work unit), best of ``repeats`` after a
    warm-up, measured now."""
    x = np.ones(A.shape[0])
    y = np.empty(A.shape[0])
    arrays = (A.indptr, A.indices, A.data)
    _k.spmv(*arrays, x, y)
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        _k.spmv(*arrays, x, y)
        best = min(best, time.perf_counter() - start)
    return best
