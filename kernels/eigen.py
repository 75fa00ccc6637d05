"""Eigenmodes: the smallest eigenpairs of ``-div(kappa grad u) = lambda rho u``.

With P1 elements the problem is the generalised matrix eigenproblem
``K x = lambda M x`` (stiffness with ``kappa``, mass with ``rho``) on the
points not held at 0.  :func:`eigenmodes` is the driver: the data are parsed
once, then either

shift-invert
    scipy's ``eigsh`` about 0 (SuperLU of ``K``; a dense solve below
    :data:`~hatkernels.eigensolvers.DENSE_LIMIT` unknowns), for problems up to
    :data:`SHIFT_INVERT_LIMIT` unknowns, or
lobpcg
    LOBPCG (:mod:`hatkernels.eigenblock`) preconditioned by this library's multigrid: ``gmg`` on
    a mesh made by :meth:`Mesh.refine` (each level's own), else ``amg``.  On
    a refined mesh the iteration is nested: the eigenvectors of the finest
    coarse level with at most :data:`SHIFT_INVERT_LIMIT` unknowns (by shift-invert)
    are interpolated to the next level as its first block, a few iterations
    are done there, and so on up to the given mesh, where the iteration runs
    until every wanted eigenvalue is converged to ``rtol`` (see
    :mod:`hatkernels.eigensolvers` for the estimate).  Without a refinement
    history the block starts random (fixed seed).

Sides cooled by convection (``robin``, ``kappa du/dn + r u = 0``) add the
boundary mass of ``r`` to ``K`` (:mod:`hatkernels.eigenrobin`).

A connected part of the mesh that neither a held point nor a side with
``r > 0`` touches (a Neumann part) has the eigenvalue 0 with the constant
on that part as eigenvector; these
*zero modes* are computed exactly, not iterated: they are reported with the
value 0.0 and flagged in :attr:`Eigenmodes.zero_modes`, and the other modes
are kept M-orthogonal to them (lobpcg's constraints), so that ``K``'s
singularity never reaches a solver.  The preconditioner of a problem with
zero modes is that of ``K + s M``, ``s > 0`` of the size of the first
nonzero eigenvalue.
"""

from __future__ import annotations

import dataclasses
import math
import time

import numba
import numpy as np

from hatkernels import eigenblock as _eb
from hatkernels import eigenrobin as _er
from hatkernels import eigensolvers as _es
from hatkernels._jit import sparse as _k
from hatkernels.checks import integer_option, real_option
from hatkernels.coefficients import parse_coefficient
from hatkernels.conditions import parse_conditions
from hatkernels.eigen_patches import eigen_patch_reason, eigenmodes_on_patches
from hatkernels.eigenresults import Eigenmodes, EigenStats
from hatkernels.eigensolvers import SHIFT_INVERT_LIMIT
from hatkernels.errors import InputError
from hatkernels.locality import Renumbering, renumber_option, should_renumber
from hatkernels.memory import check_eigen_memory
from hatkernels.mesh.core import Mesh
from hatkernels.perf import peak_rss_bytes
from hatkernels.poisson import refined
from hatkernels.precond import (
    DEFAULT,
    PRECONDITIONERS,
    PreconditionerContext,
    capabilities,
    make_preconditioner,
)

__all__ = ["eigenmodes", "Eigenmodes", "EigenStats", "SHIFT_INVERT_LIMIT", "METHODS"]

METHODS = ("auto", "shift-invert", "lobpcg")
# the matrix-free operators of a multigrid built here: lobpcg applies it to every vector
# of the block at every iteration, so the fastest product is worth its memory: on triangles
# with a constant or per-cell scalar coefficient the multigrid's own choice (``inherited``,
# 7.8 against 11.4 WU per V-cycle at 1e6 unknowns, docs/eigenmodes.md), else ``edges``
# (docs/matrix-free.md; DEFAULT_VARIANT favours memory for one solve)
_VARIANT = "edges"


def _variant(level):
    if level.mesh.dim == 2 and level.kappa.kind in ("constant", "cell"):
        return None
    return _VARIANT


def _checked(mesh, k, method, rtol, maxiter, extra, seed, preconditioner, quadrature):
    if not isinstance(mesh, Mesh):
        raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
    k = integer_option(k, "k", minimum=1)
    if method not in METHODS:
        raise InputError(f"method must be one of {METHODS}, got {method!r}")
    rtol = real_option(rtol, "rtol", between=(0.0, 1.0))
    maxiter = integer_option(maxiter, "maxiter", minimum=1)
    extra = integer_option(extra, "extra", minimum=0, allow_none=True)
    seed = integer_option(seed, "seed", minimum=0)
    integer_option(quadrature, "quadrature", minimum=1)
    if preconditioner is not None:
        capabilities(preconditioner)  # an InputError naming the valid ones when unknown
    return k, rtol, maxiter, extra, seed


def eigenmodes(mesh, k, *, coefficient=None, density=1.0, dirichlet_on=None, robin=None,
               method="auto", rtol=1e-8, maxiter=100, extra=None, preconditioner=None, seed=0,
               quadrature=2, memory_check=True, refine=0, renumber=None,
               **preconditioner_options):
    """The ``k`` smallest eigenpairs of ``-div(kappa grad u) = lambda rho u`` (P1).

    Parameters
    ----------
    mesh : Mesh
        Triangles or tetrahedra.
    k : int
        How many eigenpairs, ``1 <= k <`` the number of unknowns.
    coefficient : kappa, optional
        Anything :func:`hatkernels.solve_poisson` takes (a number, one value
        per cell or per point, ``d x d`` tensors, a callable, ``{region:
        value}``); positive.  Default 1.
    density : rho
        The same kinds, scalar, positive.  Default 1.
    dirichlet_on : optional
        Where ``u = 0``, as in :func:`hatkernels.solve_poisson`: None (the
        default) or "boundary" for the whole boundary; point indices; sides
        ((j, 2) edges, (j, 3) faces); boundary tag names or
        :func:`hatkernels.conditions.tagged` tags.  The rest of the boundary
        is natural (``kappa du/dn = 0``) where ``robin`` does not say
        otherwise.  ``dirichlet_on=()`` holds nothing: the pure Neumann
        problem, whose eigenvalue 0 is reported as a zero mode.  With
        ``robin`` given, None holds nothing either (as in ``solve_poisson``).
    robin : optional
        ``kappa du/dn + r u = 0`` on some sides, in every form
        :func:`hatkernels.solve_poisson` takes: ``(r, s)`` on every boundary
        side not held, ``(sides, r, s)``, or ``{tag: (r, s)}``; ``r >= 0`` a
        number, per point, per side or callable.  Only ``r`` enters the
        eigenproblem (``(K + R) x = lambda M x``); ``s`` is checked and
        ignored: it moves the steady state, and a disturbance of the steady
        state obeys the homogeneous condition.  A part of the mesh that a
        side with ``r > 0`` touches has no zero mode.
    method : {"auto", "shift-invert", "lobpcg"}
        "auto": shift-invert up to :data:`SHIFT_INVERT_LIMIT` unknowns, lobpcg above.
    rtol : float
        lobpcg stops when the estimated relative error of each wanted
        eigenvalue (against the exact eigenvalue of this discrete problem) is
        below ``rtol``.  Below about 1e-10 the estimates reach lobpcg's own
        round-off.
    maxiter : int
        lobpcg iterations allowed on the given mesh.
    extra : int, optional
        Vectors in lobpcg's block beyond the wanted ones; default ``max(2, ceil(k / 4))``.
    preconditioner : str, optional
        A name from :data:`hatkernels.PRECONDITIONERS` for lobpcg.  Default:
        geometric multigrid on a mesh with a refinement history where every
        part holds a point, else ``amg`` (on ``K + R``, the Robin term
        included).  ``**preconditioner_options`` go to it.
    seed : int
        Seed of the random start (lobpcg without refinement history, ARPACK's start vector).
    quadrature : int
        Degree of the rule for callable coefficients.
    refine : int
        Find the modes of ``mesh`` refined this many times (:meth:`Mesh.refine`);
        the vectors are then in the numbering of the refined mesh.  With no
        preconditioner named and data the patch path takes
        (:func:`hatkernels.eigen_patches.eigen_patch_reason`), the refined mesh
        is never stored: lobpcg runs on stencils patch by patch
        (:mod:`hatkernels.eigen_patches`), its result a
        :class:`~hatkernels.eigen_patches.PatchEigenmodes`.  Otherwise the
        refined mesh is built and solved on as given.
    memory_check : bool
        Refuse, before assembling anything, a call whose estimated peak does
        not fit in the available memory (shift-invert: the sparse factorisation's
        measured bytes per point; lobpcg: per point and per vector of its block,
        ``hatkernels.memory.eigen_bytes``).
    renumber : bool, optional
        As in :func:`hatkernels.solve_poisson`, for lobpcg on a mesh with no
        refinement history (no nested start) and a preconditioner that needs no
        mesh: the unknowns in Z order when their numbering has no locality
        (None), never (False) or always (True).  The vectors are in the mesh's
        numbering either way, the time in ``stats.timings["renumber"]``.

    Returns
    -------
    Eigenmodes
        ``(values (k,), vectors (n_points, k))``, with ``.zero_modes`` and ``.stats``.

    Raises
    ------
    InputError
        Bad data (naming the cell, point or value), ``k`` out of range,
        unknown options.
    ConvergenceError
        lobpcg did not converge within ``maxiter`` (the message says how many
        of the ``k`` did), or shift-invert failed.

    Examples
    --------
    >>> import numpy as np, hatkernels
    >>> from hatkernels.eigen import eigenmodes
    >>> values, vectors = eigenmodes(hatkernels.mesh.rectangle(32, 32), 3)
    >>> np.round(values / np.pi**2, 3)     # 2, 5, 5 in the limit, approached from above
    array([2.005, 5.021, 5.032])
    >>> vectors.shape
    (1089, 3)
    >>> modes = eigenmodes(hatkernels.mesh.rectangle(8, 8), 2, dirichlet_on=())
    >>> modes.zero_modes, float(modes.values[0])
    (array([ True, False]), 0.0)
    """
    if refine and not isinstance(refine, bool) and eigen_patch_reason(
            mesh, refine, k=k, extra=extra, coefficient=coefficient, density=density,
            dirichlet_on=dirichlet_on,
            robin=robin, method=method, preconditioner=preconditioner,
            options=preconditioner_options) is None:
        return eigenmodes_on_patches(
            mesh, k, refine=refine, coefficient=coefficient, density=density,
            dirichlet_on=dirichlet_on, rtol=rtol, maxiter=maxiter, extra=extra, seed=seed,
            quadrature=quadrature, memory_check=memory_check)
    t0 = time.perf_counter()
    renumber_option(renumber)
    mesh = refined(mesh, refine, memory_check)
    k, rtol, maxiter, extra, seed = _checked(mesh, k, method, rtol, maxiter, extra, seed,
                                             preconditioner, quadrature)
    kappa = parse_coefficient(coefficient, mesh, name="coefficient", tensor=True)
    rho = parse_coefficient(density, mesh, name="density", sign="positive")
    fixed, _, convection, _ = parse_conditions(mesh, dirichlet_on=dirichlet_on, robin=robin)
    held = fixed.points
    if memory_check:  # before anything is assembled; the unknowns are at most the points
        guess = method if method != "auto" else (
            "shift-invert" if mesh.n_points <= SHIFT_INVERT_LIMIT else "lobpcg")
        check_eigen_memory(mesh, guess, k + (max(2, math.ceil(k / 4)) if extra is None
                                             else extra))
    timings = {"assemble": 0.0, "setup": 0.0, "solve": 0.0}
    t = time.perf_counter()
    R = _er.robin_matrix(mesh, convection, quadrature)
    fine = _er.build(mesh, held, kappa, rho, R, quadrature)
    timings["assemble"] += time.perf_counter() - t
    n, z = fine.unknowns, fine.zero.shape[1]
    if k >= n:
        raise InputError(f"k = {k} eigenpairs asked for, but the problem has {n} unknowns "
                         f"(points not held and in some cell); k must be below {n}")
    if method == "auto":
        method = "shift-invert" if n <= SHIFT_INVERT_LIMIT else "lobpcg"
    stats = EigenStats(method=method, unknowns=n, rtol=rtol, threads=numba.get_num_threads())
    if k <= z:  # zero modes only: nothing to iterate
        values, X, stats.method = np.zeros(0), np.zeros((n, 0)), "zero modes"
        stats.errors = np.zeros(k)
    elif method == "shift-invert":
        t = time.perf_counter()
        values, X, stats.method = _es.shift_invert(fine, k, seed)
        timings["solve"] += time.perf_counter() - t
        values, X = values[z:], X[:, z:]
        stats.errors = np.full(k, np.nan)
    else:
        m = k - z + (max(2, math.ceil(k / 4)) if extra is None else extra)
        values, X = _lobpcg(fine, R, m, k - z, rtol, maxiter, seed, preconditioner,
                            preconditioner_options, quadrature, stats, timings, renumber)
        values, X = values[: k - z], X[:, : k - z]
    values, vectors, zero_modes, stats.errors = _assembled(fine, values, X, k, stats.errors)
    timings["total"] = time.perf_counter() - t0
    stats.timings = timings
    stats.product_seconds = _product_seconds(fine)
    stats.work_units = timings["total"] / stats.product_seconds
    stats.peak_rss_bytes = peak_rss_bytes()
    return Eigenmodes(values, vectors, zero_modes, stats, mesh)


def _assembled(fine, values, X, k, errors):
    """The zero modes first, then the others made M-orthogonal to them, normalised and
    signed; all as values at the points."""
    Z = fine.zero[:, : min(k, fine.zero.shape[1])]
    if Z.shape[1]:
        X = X - Z @ (Z.T @ (fine.M @ X))  # round-off of the solvers' constraints
    X = X / np.sqrt(np.einsum("ij,ij->j", X, fine.M @ X))
    X = np.hstack([Z, X])
    biggest = np.argmax(np.abs(X), axis=0)
    X = X * np.where(X[biggest, np.arange(X.shape[1])] < 0, -1.0, 1.0)
    zero_modes = np.arange(k) < Z.shape[1]
    values = np.concatenate([np.zeros(Z.shape[1]), values])
    errors = np.asarray(errors, dtype=np.float64).copy()
    errors[zero_modes] = 0.0
    return values, fine.expand(X), zero_modes, errors


def _product_seconds(level):
    """One product with the given mesh's assembled stiffness matrix: the faster of the
    parallel CSR kernel and scipy's one-thread product, best of three each (on a busy
    machine every parallel region waits for a time slice, and small products then pay
    more for that than for the work)."""
    K = level.K
    x = np.ones(K.shape[0])
    y = np.empty_like(x)
    best = math.inf
    for product in (lambda: _k.spmv(K.indptr, K.indices, K.data, x, y), lambda: K @ x):
        for _ in range(3):
            t = time.perf_counter()
            product()
            best = min(best, time.perf_counter() - t)
    return best


def _default_preconditioner(mesh, floating):
    """Multigrid on the mesh's own refinement history when it has one and nothing floats
    (the registered preconditioner that needs the mesh and no matrix), else the default."""
    if not floating and mesh.refinement is not None:
        for name in PRECONDITIONERS:
            caps = capabilities(name)
            if caps.needs_mesh and not caps.needs_matrix:
                return name
    return DEFAULT


def _preconditioner(level, name, options, quadrature):
    floating = level.zero.shape[1] > 0
    chosen = name or _default_preconditioner(level.mesh, level.stiffness_floats)
    if level.stiffness_floats:
        shift = level.shift() if floating else 0.0
        A = (level.K + shift * level.M).tocsr() if floating else level.K
        if capabilities(chosen).needs_mesh:
            if not floating:
                raise InputError(f"preconditioner {chosen!r} builds its levels from the mesh, "
                                 "whose stiffness is singular here: a part of the mesh holds "
                                 "no point, only a Robin side; use one that takes a matrix")
            # its levels carry the stiffness and the shift's lumped mass: K + shift M
            mass = level.expand(shift * level.M.sum(axis=1).reshape(-1, 1))[:, 0]
            context = PreconditionerContext(mesh=level.mesh, coefficient=level.kappa,
                                            fixed=level.held, variant=_variant(level),
                                            quadrature=quadrature, mass=np.asarray(mass))
            return make_preconditioner(A, chosen, context=context, **options)
        return make_preconditioner(A, chosen, **options)
    context = PreconditionerContext(mesh=level.mesh, coefficient=level.kappa, fixed=level.held,
                                    variant=_variant(level), quadrature=quadrature)
    try:
        return make_preconditioner(level.K, chosen, context=context, **options)
    except InputError:
        if name is not None or chosen == DEFAULT:
            raise
        # the multigrid chosen by default cannot serve this mesh (say, every point of its
        # coarsest level is held): the default preconditioner can
        return make_preconditioner(level.K, DEFAULT, context=context, **options)


def _chain(fine, R, m, quadrature):
    """The nested start: ``(start level, [(mesh, held, kappa, rho, R) of each level above
    it and below the given mesh])``, coarsest first; ``(None, [])`` when no coarser level
    fits (at most :data:`SHIFT_INVERT_LIMIT` unknowns, and twice the block beyond its zero
    modes).  The Robin term ``R`` goes down by Galerkin projection (:mod:`hatkernels.eigenrobin`).
    """
    chain = []
    mesh, held, kappa, rho = fine.mesh, fine.held, fine.kappa, fine.rho
    while mesh.refinement is not None:
        R = _er.coarser_robin(mesh, R)
        mesh, held, kappa, rho = _es.coarser(mesh, held, kappa, rho)
        chain.append((mesh, held, kappa, rho, R))
        if mesh.n_points - held.size <= SHIFT_INVERT_LIMIT:
            break
    if not chain:
        return None, []
    start = _er.build(*chain[-1], quadrature)
    if start.unknowns > SHIFT_INVERT_LIMIT or start.unknowns - start.zero.shape[1] < 2 * m:
        return None, []
    return start, chain[-2::-1]


def _lobpcg(fine, R, m, wanted, rtol, maxiter, seed, name, options, quadrature, stats, timings,
            renumber=None):
    """Ritz values and vectors (on the free points of ``fine``) of the nested or the plain
    lobpcg iteration; fills ``stats``."""
    n, z = fine.unknowns, fine.zero.shape[1]
    t = time.perf_counter()
    start, between = _chain(fine, R, m, quadrature)
    timings["assemble"] += time.perf_counter() - t
    order = None
    chosen = name or _default_preconditioner(fine.mesh, fine.stiffness_floats)
    if (start is None and not between and not capabilities(chosen).needs_mesh
            and should_renumber(fine.K, fine.mesh.dim, renumber)):
        # the plain iteration on the one level: its rows in Z order (hatkernels.locality)
        order = Renumbering(fine.mesh.points[fine.free])
        fine = dataclasses.replace(fine, K=order.matrix(fine.K), M=order.matrix(fine.M),
                                   zero=fine.zero[order.order], free=fine.free[order.order])
        timings["renumber"] = order.seconds
    used = {"stiffness": 0.0, "mass": 0.0, "preconditioner": 0.0}
    stats.block = m
    X = None
    if start is not None:
        t = time.perf_counter()
        z0 = start.zero.shape[1]
        V = _es.shift_invert(start, z0 + m, seed)[1]
        timings["solve"] += time.perf_counter() - t
        stats.levels.append((start.unknowns, 0))
        X = start.expand(V[:, z0:])
        del start, V
    for problem in between + [None]:
        t = time.perf_counter()
        level = fine if problem is None else _er.build(*problem, quadrature)
        timings["assemble"] += time.perf_counter() - t
        _es.check_block(level, m, level.zero.shape[1])
        if X is None:
            X0 = np.random.default_rng(seed).standard_normal((level.unknowns, m))
        else:
            X0 = _es.prolong(level.mesh, X, level.free)
        out = None  # the level below's vectors are a view of its whole block pool
        t = time.perf_counter()
        T = _preconditioner(level, name, options, quadrature)
        timings["setup"] += time.perf_counter() - t
        blocks = _eb.PencilBlocks(level.K, level.M, T)
        Y = level.zero if level.zero.shape[1] else None
        t = time.perf_counter()
        out = _eb.run(blocks, X0, Y, k=wanted, rtol=rtol, maxiter=maxiter,
                      iterations=None if problem is None else _es.INTERMEDIATE)
        timings["solve"] += time.perf_counter() - t
        for key, count in blocks.counts.items():
            used[key] += count * level.unknowns / n
        for key, seconds in blocks.seconds.items():
            timings[key] = timings.get(key, 0.0) + seconds
        stats.levels.append((level.unknowns, out.iterations))
        X = None if problem is None else level.expand(out.vectors)
    stats.iterations = out.iterations
    stats.converged = out.converged
    stats.products = used
    stats.preconditioner = getattr(T, "description", repr(T))
    stats.shift = fine.shift()
    stats.errors = np.concatenate([np.zeros(z), out.errors])
    if not out.converged:
        raise _eb.not_converged(out, rtol, wanted + z, n, z,
                                ", loosen rtol or use method='shift-invert'")
    return out.values, out.vectors if order is None else out.vectors[order.inverse]
