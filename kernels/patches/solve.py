"""``solve_poisson(mesh, f, refine=k)`` without storing the refined mesh.

The data are parsed and checked once on the coarse mesh (a
:class:`~hatkernels.problem.PoissonProblem`, so the errors are the serial
ones).  The path takes: a coefficient that is a number or ``{region: number}``
(constant on each coarse cell), a source that is a number, a callable or
``{region: number or callable}`` (callables evaluated on the fly,
:mod:`hatkernels.patches.load`), held values that are a number or
``{tag: number}`` on whole boundary sides (the whole boundary or boundary
tags), a flux that is a number or ``{tag: number}``.  Tetrahedra run in
:mod:`hatkernels.patches.tet_solve`.  Anything else (callable coefficients or fluxes,
arrays, reactions, convection, zero mean) takes the stored refinement, and
:func:`patch_path_reason` says why.
"""

from __future__ import annotations

import numbers
import time

import numba
import numpy as np

from hatkernels._cg import fresh_copy
from hatkernels._jit import patches as _p
from hatkernels.errors import InputError
from hatkernels.patches.cg import lean_cg
from hatkernels.patches.layout import PatchLayout
from hatkernels.patches.load import callable_load
from hatkernels.patches.multigrid import PatchMultigrid, PatchOperator
from hatkernels.patches.solution import (
    FIXED_BYTES,
    MARGIN,
    PatchSolution,
    check_memory,
    flux_sides,
    per_coarse_cell,
)
from hatkernels.patches.tet_solve import solve_on_tets
from hatkernels.perf import peak_rss_bytes
from hatkernels.problem import PoissonProblem

__all__ = ["PatchSolution", "bytes_per_point", "patch_path_reason", "solve_on_patches"]

# Bytes per fine point of solve_on_patches: see bytes_per_point; checked against the
# measured peak in bench/patches.py (docs/patches.md).
CG_BYTES = 4 * 8


def bytes_per_point(single, keeps_b=False):
    """Peak bytes per fine point of the patch path beyond the coarse mesh: CG's four
    vectors (five when the right-hand side is kept: nonzero held values or a callable
    source), the multigrid's two shared work vectors and its coarser levels' ``x`` and
    ``b`` (a third as many points)."""
    word = 4 if single else 8
    return CG_BYTES + 8 * bool(keeps_b) + 2 * word + 2 * word / 3.0




def _need(single, keeps_b, size):
    return bytes_per_point(single, keeps_b) * size * MARGIN + FIXED_BYTES


def _is_number(v):
    return isinstance(v, numbers.Real) and not isinstance(v, bool)


def _numbers_by_key(v, callables=False):
    return isinstance(v, dict) and bool(v) and all(
        _is_number(x) or (callables and callable(x)) for x in v.values())


def patch_path_reason(mesh, refine, *, f=1.0, dirichlet=0.0, dirichlet_on=None,
                      coefficient=None, reaction=None, neumann=None, robin=None,
                      zero_mean=False, matrix_free=None, variant=None, options=None):
    """None when ``solve_poisson(mesh, f, refine=refine, ...)`` can take the patch path,
    else the reason it cannot (one sentence)."""
    if getattr(mesh, "dim", None) not in (2, 3):
        return "the patch path takes triangle and tetrahedral meshes"
    if isinstance(refine, bool) or not isinstance(refine, numbers.Integral):
        return f"refine must be a whole number of refinements, got {refine!r}"
    if refine < 1:
        return f"the patch path needs refine >= 1, got {int(refine)}"
    if len(mesh.unused_points()):
        return "the mesh has points in no cell (the refined numbering leaves them out)"
    if reaction is not None or robin is not None:
        return "the patch path takes no reaction or convection term"
    if not (neumann is None or _is_number(neumann) or _numbers_by_key(neumann)):
        return "neumann is not a number or {tag: number}"
    if zero_mean:
        return "the patch path takes no zero_mean"
    if matrix_free is False or variant is not None:
        return "matrix_free=False and variant belong to the stored path"
    if options:
        return f"preconditioner options ({', '.join(sorted(options))}) belong to the stored path"
    if not (coefficient is None or _is_number(coefficient) or _numbers_by_key(coefficient)):
        return "coefficient is not a number or {region: number}"
    if not (f is None or _is_number(f) or callable(f) or _numbers_by_key(f, callables=True)):
        return "f is not a number, a callable or {region: number or callable}"
    if not (_is_number(dirichlet) or _numbers_by_key(dirichlet)):
        return "dirichlet is not a number or {tag: number}"
    if not (dirichlet_on is None or isinstance(dirichlet_on, str) or (
            isinstance(dirichlet_on, (list, tuple)) and dirichlet_on
            and all(isinstance(k, str) for k in dirichlet_on))):
        return "dirichlet_on is not 'boundary' or boundary tags"
    return None


def _held(coarse, problem, dirichlet):
    """``(held_sides, side_values)``: the held coarse sides and the value on each."""
    pieces = [p for p in problem.pieces if p.kind == "held"]
    if pieces:
        sides = np.concatenate([p.sides for p in pieces])
    elif problem.dirichlet.whole_boundary:
        sides = coarse.boundary_edges().astype(np.int64)
    else:  # pragma: no cover - patch_path_reason admits nothing else
        raise InputError("the patch path needs held values on whole boundary sides")
    if isinstance(dirichlet, dict):
        values = np.full(len(sides), np.nan)
        keyed = {tuple(s): i for i, s in enumerate(np.sort(sides, axis=1).tolist())}
        for key, v in reversed(list(dirichlet.items())):  # the first listed tag wins
            t = coarse.tags.side_tag(key, what="dirichlet: boundary tag")
            for s in np.sort(coarse.tags.sides_of([t]), axis=1).tolist():
                if tuple(s) in keyed:
                    values[keyed[tuple(s)]] = float(v)
        missing = np.flatnonzero(np.isnan(values))
        if missing.size:
            s = sides[missing[0]]
            raise InputError(f"dirichlet gives no value for held side ({s[0]}, {s[1]})")
    else:
        values = np.full(len(sides), float(dirichlet))
    return sides, values


def solve_on_patches(coarse, f=1.0, refine=1, *, dirichlet=0.0, dirichlet_on=None,
                     coefficient=None, neumann=None, reaction=None, robin=None,
                     zero_mean=False, rtol=1e-10, atol=0.0, maxiter=None, start=None,
                     check=False, monitor=None, quadrature=2, progress=None,
                     memory_check=True, degree=2, nested_cycles=1, single=None):
    """Solve ``-div(kappa grad u) = f`` on ``coarse`` refined ``refine`` times, patch by patch.

    The arguments are those of :func:`hatkernels.solve_poisson` (the data the path
    takes: see the module notes).  CG in four vectors (:mod:`hatkernels.patches.cg`) with the
    patch multigrid (:class:`PatchMultigrid`) as preconditioner; ``start="nested"``
    begins from full multigrid, ``rtol=None`` returns that start alone.  ``single``:
    the multigrid's vectors in single precision; default (None) only when double
    precision would not fit in the memory available.  Returns a
    :class:`PatchSolution`.
    """
    from hatkernels.krylov import _check_scalars
    from hatkernels.memory import available_bytes
    from hatkernels.solver import STARTS, report_convergence
    from hatkernels.stats import SolveStats

    t0 = time.perf_counter()
    note = progress or (lambda phase: None)
    note("boundary")
    reason = patch_path_reason(coarse, refine, f=f, dirichlet=dirichlet,
                               dirichlet_on=dirichlet_on, coefficient=coefficient,
                               neumann=neumann, reaction=reaction, robin=robin,
                               zero_mean=zero_mean)
    if reason is not None:
        raise InputError(f"the patch path cannot take this problem: {reason}")
    _check_scalars(0.0 if rtol is None else rtol, atol, maxiter, 1, None)  # before any work
    if monitor is not None and not callable(monitor):
        raise InputError(f"monitor must be callable or None, got {type(monitor).__name__}")
    if start is None:
        start = "nested" if rtol is None else "zero"
    if start not in STARTS:
        raise InputError(f"start must be one of {STARTS}, got {start!r}")
    if rtol is None and start != "nested":
        raise InputError("rtol=None asks for the nested start alone, but start='zero'")
    args = dict(f=f, dirichlet=dirichlet, dirichlet_on=dirichlet_on, coefficient=coefficient,
                neumann=neumann, quadrature=quadrature)
    problem = PoissonProblem(coarse, **args)
    if coarse.dim == 3:
        if single not in (None, False):
            raise InputError("single-precision levels are for triangle meshes; the patch "
                             "path on tetrahedra keeps double precision")
        return solve_on_tets(coarse, problem, dirichlet, refine, rtol=rtol, atol=atol,
                             maxiter=maxiter, start=start, check=check, monitor=monitor,
                             note=note, memory_check=memory_check, degree=degree,
                             nested_cycles=nested_cycles, t0=t0, args=args,
                             quadrature=quadrature)
    m = coarse.n_triangles
    kappa = per_coarse_cell(problem.coefficient, m, "coefficient")
    source = None if problem.source.kind == "callable" else per_coarse_cell(problem.source, m, "f")
    sides, side_values = _held(coarse, problem, dirichlet)
    lifted = bool(np.any(side_values != 0))
    keeps_b = lifted or problem.source.kind == "callable"
    if rtol is None and lifted:
        raise InputError("rtol=None (the nested start alone) reaches discretisation accuracy "
                         "with zero held values only; give a tolerance")
    layout = PatchLayout(coarse, refine, held_sides=sides)
    k, n = refine, 2**refine
    size = layout.size(k)
    have = available_bytes() if (memory_check or single is None) else None
    if single is None:
        single = have is not None and _need(False, keeps_b, size) > have
    need = _need(single, keeps_b, size)
    check_memory(size, need, have if memory_check else None)
    timings = {"boundary": time.perf_counter() - t0}

    note("assemble")
    t1 = time.perf_counter()
    M = PatchMultigrid(layout, kappa, degree=degree, nested_cycles=nested_cycles,
                       single=single)
    A = PatchOperator(layout, M.K, k)
    timings["setup"] = time.perf_counter() - t1
    t2 = time.perf_counter()
    corner = coarse.points[coarse.triangles]
    d1, d2 = corner[:, 1] - corner[:, 0], corner[:, 2] - corner[:, 0]
    area = 0.5 * np.abs(d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0])
    del corner, d1, d2
    pe, pv = layout.buffers(k)

    flux = _flux(layout, problem, neumann)

    def load(out):
        if source is None:
            callable_load(layout, problem.source, quadrature, out)
        else:
            _p.load(source * area / (3.0 * n * n), out, n, layout.topo, pe, pv)
        if flux is not None:
            _add_flux(layout, flux, out)

    r = np.empty(size)
    load(r)
    kept = None
    if lifted:
        g = _lifting(layout, sides, side_values, problem)
        r -= PatchOperator(layout, M.K, k, masked=False) @ g
        del g
    layout.zero_held(r)
    if lifted or source is None:  # kept, not made again: a callable costs its evaluations
        kept = fresh_copy(r)

    def remake_b(out):
        if kept is not None:
            out[:] = kept
        else:
            load(out)
            layout.zero_held(out)

    timings["assemble"] = time.perf_counter() - t2
    note("solve")
    t3 = time.perf_counter()
    result = lean_cg(A, M, r, remake_b, rtol=rtol, atol=atol, maxiter=maxiter,
                     nested=start == "nested", monitor=monitor)
    timings["solve"] = time.perf_counter() - t3
    del r
    kept = None  # noqa: F841  (frees the kept right-hand side before u is made)
    x = result.x
    if lifted:
        x += _lifting(layout, sides, side_values, problem)
    stats = SolveStats(
        iterations=result.iterations, converged=result.converged,
        residuals=result.residuals, timings={**timings, "total": time.perf_counter() - t0},
        unknowns=size, preconditioner=M.description, stored_bytes=0,
        peak_rss_bytes=peak_rss_bytes(), threads=numba.get_num_threads(), info=result.info,
        message=result.message, tolerance=result.tolerance,
        condition_estimate=result.condition_estimate, nnz=0, matrix_free=True)
    stats.dirichlet_points = _held_count(layout, n)
    report_convergence(stats, check, stacklevel=3)
    return PatchSolution(x, layout, stats, args)


def _held_count(layout, n):
    return int(layout.held_e.sum()) * (n - 1) + int(layout.held_v.sum())


def _lifting(layout, sides, side_values, problem):
    """The held values on the finest level (zero elsewhere), or None when all are 0."""
    if not np.any(side_values):
        return None
    edge_value = np.zeros(layout.n_edges)
    edge_value[layout.edge_index(sides)] = side_values
    g = np.zeros(layout.size(layout.k))
    layout.edge_points(g)[:] = edge_value[:, None]
    # where sides of different values meet, the vertex takes the parsed problem's value
    # (the first listed tag's), as on the stored fine mesh
    layout.vertex_points(g)[problem.dirichlet.points] = problem.dirichlet.values
    layout.zero_held(g, others=True)  # the held points' values only
    return g


def _flux(layout, problem, neumann):
    """``(edges, sides, h L)``: the coarse edges with an imposed flux, their points and the
    flux times their length (None without a flux)."""
    p = layout.coarse.points

    def free_sides():
        # a number goes on every side not held.  On the coarse mesh a side counts as held
        # when both its ends are, but a fine side inside a coarse side that is not held
        # has a free point: so the sides are taken edge by edge, as the fine mesh has them
        boundary = np.asarray(layout.coarse.boundary_edges(), dtype=np.int64)
        return boundary[~layout.held_e[layout.edge_index(boundary)]]

    found = flux_sides(problem, neumann, free_sides)
    if found is None:
        return None
    sides, h = found
    length = np.linalg.norm(p[sides[:, 1]] - p[sides[:, 0]], axis=1)
    return layout.edge_index(sides, "flux side"), sides, h * length


def _add_flux(layout, flux, out):
    """``out`` += the boundary load of the flux on the finest level: each fine side of
    length L/n gives h L/(2n) to each of its two points."""
    edges, sides, hl = flux
    n = 2**layout.k
    layout.edge_points(out)[edges] += (hl / n)[:, None]
    vertices = layout.vertex_points(out)
    np.add.at(vertices, sides[:, 0], hl / (2 * n))
    np.add.at(vertices, sides[:, 1], hl / (2 * n))
