"""The one-call solve: a mesh and data in, nodal values of the P1 solution out.

Solves ``-div(kappa grad u) + c u = f`` with ``u = g`` on the Dirichlet part
of the boundary, ``kappa du/dn = h`` (Neumann) and ``kappa du/dn + r u = s``
(Robin) on the rest.
"""

from __future__ import annotations

import dataclasses
import resource
import sys
import time

import numba
import numpy as np

from hatkernels._sets import index_union
from hatkernels.assembly import (
    StiffnessAssembler,
    assemble_boundary_load,
    assemble_boundary_mass,
    assemble_load,
)
from hatkernels.assembly.boundary_terms import check_edges
from hatkernels.boundary import apply_dirichlet
from hatkernels.coefficients import parse_coefficient
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh
from hatkernels.operators import DEFAULT_VARIANT, StiffnessOperator
from hatkernels.solve import solve

__all__ = ["PoissonSolution", "solve_poisson"]


@dataclasses.dataclass
class PoissonSolution:
    """What :func:`solve_poisson` found.

    Attributes
    ----------
    u : ndarray, shape (n_points,)
        Nodal values (points in no triangle get 0).
    converged : bool
    stats : dict
        ``timings`` per phase (``assemble``, ``boundary``, ``setup``,
        ``solve``, ``total``, seconds), ``iterations``, ``residuals`` (initial
        first), ``unknowns``, ``matrix_free``, ``operator_bytes`` (what the
        system operator stores), ``preconditioner`` (its description),
        ``threads`` and ``peak_rss_bytes`` (the process's high-water mark).
    mesh : Mesh
    """

    u: np.ndarray
    converged: bool
    stats: dict
    mesh: Mesh

    def __repr__(self):
        s = self.stats
        return (
            f"PoissonSolution({s['unknowns']} unknowns, {s['iterations']} iterations, "
            f"converged={self.converged}, {s['timings']['total']:.3g} s)"
        )


def _peak_rss():
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak if sys.platform == "darwin" else peak * 1024)


def _dirichlet_nodes(mesh, where):
    """Points named by ``where``: "boundary", point indices (k,) or edges (k, 2)."""
    if isinstance(where, str):
        if where != "boundary":
            raise InputError(f"dirichlet_on must be 'boundary', point indices or edges, got {where!r}")
        return mesh.boundary_points().astype(np.int64)
    w = np.asarray(where)
    if w.ndim == 2:
        return index_union(mesh.n_points, check_edges(mesh, w).ravel())
    if w.ndim != 1 or (w.size and w.dtype.kind not in "iu"):
        raise InputError(
            f"dirichlet_on must be point indices or (k, 2) edges, got {w.dtype} {w.shape}"
        )
    w = w.astype(np.int64)
    if w.size and (w.min() < 0 or w.max() >= mesh.n_points):
        k = int(np.flatnonzero((w < 0) | (w >= mesh.n_points))[0])
        raise InputError(f"dirichlet_on[{k}] = {w[k]} is outside 0..{mesh.n_points - 1}")
    return index_union(mesh.n_points, w)


def _dirichlet_values(mesh, nodes, g):
    if callable(g):
        x, y = mesh.points[nodes].T
        v = np.asarray(g(x, y), dtype=np.float64)
        v = np.broadcast_to(v, nodes.shape) if v.ndim == 0 else v
        if v.shape != nodes.shape:
            raise InputError(f"dirichlet(x, y) returned shape {v.shape} for {nodes.size} points")
        bad = ~np.isfinite(v)
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise InputError(
                f"dirichlet(x, y) is {float(v[k])!r} at point {nodes[k]} ({x[k]!r}, {y[k]!r})"
            )
        return v
    v = np.asarray(g)
    if v.ndim == 0:
        return np.full(nodes.shape, float(v))
    if v.shape != (mesh.n_points,):
        raise InputError(
            f"dirichlet must be a number, a callable or one value per point ({mesh.n_points},), "
            f"got shape {v.shape}"
        )
    return v[nodes].astype(np.float64)


def _free_edges(mesh, fixed):
    """Boundary edges not on the Dirichlet part (both ends fixed means Dirichlet)."""
    b = mesh.boundary_edges()
    is_fixed = np.zeros(mesh.n_points, dtype=bool)
    is_fixed[fixed] = True
    return b[~(is_fixed[b[:, 0]] & is_fixed[b[:, 1]])]


def solve_poisson(
    mesh,
    f=1.0,
    *,
    dirichlet=0.0,
    dirichlet_on=None,
    coefficient=None,
    reaction=None,
    neumann=None,
    robin=None,
    preconditioner="amg",
    rtol=1e-10,
    atol=0.0,
    maxiter=None,
    check=False,
    quadrature=2,
    matrix_free=None,
    variant=None,
    progress=None,
    monitor=None,
    **preconditioner_options,
):
    """Solve ``-div(kappa grad u) + c u = f`` on a mesh in one call.

    Parameters
    ----------
    mesh : Mesh
    f : number, array or callable
        The source (see :mod:`hatkernels.coefficients`).
    dirichlet : number, (n_points,) array or callable ``g(x, y)``
        The prescribed value on the Dirichlet points.
    dirichlet_on : "boundary", point indices or (k, 2) edges, optional
        Where ``u = g``.  By default the whole boundary, unless ``neumann`` or
        ``robin`` is given, in which case there are no Dirichlet points
        unless named here.
    coefficient : kappa, any kind (tensors allowed); positive.
    reaction : c, scalar kind, non-negative.
    neumann : h, or ``(edges, h)``
        ``kappa du/dn = h``.  Plain ``h`` applies on every boundary edge
        that is not Dirichlet (an edge is Dirichlet when both its ends are).
    robin : ``(r, s)`` or ``(edges, r, s)``
        ``kappa du/dn + r u = s`` with ``r >= 0``.
    preconditioner, rtol, atol, maxiter, check, **preconditioner_options
        As in :func:`hatkernels.solve.solve`.
    quadrature : int
        Degree of the rule for callable data.
    matrix_free : bool, optional
        Solve with the matrix-free :class:`~hatkernels.StiffnessOperator`
        instead of an assembled matrix.  Default: True with
        ``preconditioner="gmg"`` (which needs ``mesh`` made by
        :meth:`Mesh.refine`) when there is no reaction or Robin term, else
        False.  Matrix-free solves accept ``"gmg"``, ``"none"`` or an
        operator as preconditioner.
    variant : str, optional
        The matrix-free variant (``hatkernels.operators.VARIANTS``), for the
        solve's operator and gmg's levels.
    progress : callable, optional
        ``progress(phase)`` is called as each phase starts ("boundary",
        "assemble", "solve"), for reporting.
    monitor : callable, optional
        ``monitor(iteration, residual_norm)`` after every CG iteration.

    Returns
    -------
    PoissonSolution

    Raises
    ------
    InputError
        Bad data (naming the point, triangle or edge), or a problem with no
        Dirichlet point, reaction or Robin term (the solution would not be
        unique).

    Examples
    --------
    >>> import hatkernels
    >>> sol = hatkernels.solve_poisson(hatkernels.mesh.rectangle(32, 32), 1.0)
    >>> sol.converged, round(float(sol.u.max()), 4)   # the centre value, about 0.0737 in the limit
    (True, 0.0736)
    """
    if not isinstance(mesh, Mesh):
        raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
    note = progress or (lambda phase: None)
    t0 = time.perf_counter()
    timings = {}

    kappa = parse_coefficient(coefficient, mesh, name="coefficient", tensor=True)
    if matrix_free is None:
        matrix_free = preconditioner == "gmg" and reaction is None and robin is None
    if matrix_free and (reaction is not None or robin is not None):
        raise InputError(
            "matrix_free=True supports the stiffness term only (no reaction or robin)"
        )
    if matrix_free and isinstance(preconditioner, str) and preconditioner not in ("gmg", "none"):
        raise InputError(
            f"preconditioner {preconditioner!r} needs an assembled matrix; with matrix_free=True "
            "use 'gmg' or 'none'"
        )

    note("boundary")
    t1 = time.perf_counter()
    if dirichlet_on is None:
        dirichlet_on = "boundary" if neumann is None and robin is None else np.empty(0, np.int64)
    fixed = _dirichlet_nodes(mesh, dirichlet_on)
    values = _dirichlet_values(mesh, fixed, dirichlet)
    b = np.zeros(mesh.n_points)
    if neumann is not None:
        edges, h = neumann if isinstance(neumann, tuple) else (_free_edges(mesh, fixed), neumann)
        b += assemble_boundary_load(mesh, h, edges, quadrature=quadrature)
    has_robin = False
    R = None
    if robin is not None:
        if not isinstance(robin, tuple) or len(robin) not in (2, 3):
            raise InputError("robin must be (r, s) or (edges, r, s)")
        edges, r, s = robin if len(robin) == 3 else (_free_edges(mesh, fixed),) + robin
        R = assemble_boundary_mass(mesh, r, edges, quadrature=quadrature)
        has_robin = R.nnz > 0 and R.max() > 0
        b += assemble_boundary_load(mesh, s, edges, quadrature=quadrature)
    if fixed.size == 0 and reaction is None and not has_robin:
        raise InputError(
            "no Dirichlet points, reaction or Robin term: the solution is defined only up to "
            "a constant; fix u somewhere with dirichlet_on=..."
        )
    timings["boundary"] = time.perf_counter() - t1

    note("assemble")
    t2 = time.perf_counter()
    b += assemble_load(mesh, f, quadrature=quadrature)
    if matrix_free:
        op = StiffnessOperator(
            mesh, kappa, dirichlet=fixed, quadrature=quadrature,
            variant=DEFAULT_VARIANT if variant is None else variant,
        )
        g = np.zeros(mesh.n_points)
        g[fixed] = values
        b -= op.unmasked_matvec(g)  # lifting: move the known values to the right
        b[op.fixed] = g[op.fixed]
        del g  # a vector less during the solve (b is this function's own array)
        system_A, system_b, expand = op, b, (lambda x: x)
        stored = op.nbytes
    else:
        assembler = StiffnessAssembler(mesh)
        A = assembler.assemble(kappa, quadrature=quadrature)
        if reaction is not None:
            c = parse_coefficient(reaction, mesh, name="reaction", sign="nonnegative")
            A = A + assembler.assemble_mass(c, quadrature=quadrature)
        if R is not None:
            A = A + R
        system = apply_dirichlet(A, b, fixed, values)
        system_A, system_b, expand = system.A, system.b, system.expand
        stored = system.A.data.nbytes + system.A.indices.nbytes + system.A.indptr.nbytes
        if preconditioner == "gmg":
            if variant is not None:
                preconditioner_options.setdefault("variant", variant)
            preconditioner_options.setdefault("mesh", mesh)
            preconditioner_options.setdefault("coefficient", kappa)
            preconditioner_options.setdefault("dirichlet", fixed)
    timings["assemble"] = time.perf_counter() - t2

    note("solve")
    result = solve(
        system_A,
        system_b,
        preconditioner=preconditioner,
        rtol=rtol,
        atol=atol,
        maxiter=maxiter,
        check=check,
        monitor=monitor,
        **preconditioner_options,
    )
    timings["setup"] = result.timings["setup"]
    timings["solve"] = result.timings["solve"]
    u = expand(result.x)
    timings["total"] = time.perf_counter() - t0
    stats = {
        "timings": timings,
        "iterations": result.iterations,
        "residuals": result.residuals,
        "unknowns": int(system_A.shape[0] - (len(op.fixed) if matrix_free else 0)),
        "nnz": 0 if matrix_free else int(system_A.nnz),
        "matrix_free": bool(matrix_free),
        "operator_bytes": int(stored),
        "dirichlet_points": int(fixed.size),
        "preconditioner": result.preconditioner,
        "threads": numba.get_num_threads(),
        "peak_rss_bytes": _peak_rss(),
    }
    return PoissonSolution(u=u, converged=result.converged, stats=stats, mesh=mesh)
