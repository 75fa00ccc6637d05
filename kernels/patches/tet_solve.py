"""``solve_poisson(mesh, f, refine=k)`` on tetrahedra without storing the refined mesh.

The 3-D branch of :func:`hatkernels.patches.solve.solve_on_patches`: the coarse data are
parsed once (a :class:`~hatkernels.problem.PoissonProblem` on the coarse mesh), the
layout and multigrid are :mod:`hatkernels.patches.tets`, CG is the four-vector one of
:mod:`hatkernels.patches.cg`.  The path takes a coefficient and a source that are
numbers or ``{region: number}`` (the source also a callable ``f(x, y, z)`` or
``{region: number or callable}``, evaluated on the fly), and held values that are a number or
``{tag: number}`` on whole coarse boundary faces, and a flux that is a number (on every
face not held) or ``{tag: number}``; anything else takes the stored path
(:func:`hatkernels.patches.solve.patch_path_reason` says why).
"""

from __future__ import annotations

import time

import numba
import numpy as np

from hatkernels._cg import fresh_copy
from hatkernels.errors import InputError
from hatkernels.patches.cg import lean_cg
from hatkernels.patches.solution import (
    FIXED_BYTES,
    MARGIN,
    PatchSolution,
    check_memory,
    flux_sides,
    per_coarse_cell,
)
from hatkernels.patches.tet_load import callable_tet_load
from hatkernels.patches.tet_multigrid import TetMultigrid
from hatkernels.patches.tets import CLASS_CELLS, TetLayout, TetOperator
from hatkernels.perf import peak_rss_bytes

__all__ = ["solve_on_tets", "tet_bytes_per_point"]


def tet_bytes_per_point(k, keeps_b=False):
    """Peak bytes per fine point beyond the coarse mesh with ``k`` refinements: CG's four
    vectors (five when the right-hand side is kept), the multigrid's three shared work
    vectors, each coarser level's ``x`` and ``b`` (an eighth as many points per level: a
    seventh in all), and the per-cell buffers of the shared points' parts (``4 C(n-1, 2)``
    per cell against ``n^3 / 6`` points).  The inverse diagonals are one number per block
    of points (:class:`~hatkernels.patches.tets.PiecewiseDiagonal`), not per point."""
    n = 2**k
    return 8 * (4 + bool(keeps_b)) + 8 * 3 + 8 * 2 / 7.0 + 8 * 12.0 / n


def _held_faces(coarse, problem, dirichlet):
    """``(faces, values, rank)``: the held coarse faces, the value on each and the place of
    its tag in ``dirichlet`` (the first listed tag wins where held faces meet)."""
    pieces = [p for p in problem.pieces if p.kind == "held"]
    if pieces:
        faces = np.concatenate([p.sides for p in pieces]).astype(np.int64)
    elif problem.dirichlet.whole_boundary:
        faces = np.asarray(coarse.boundary_faces(), dtype=np.int64)
    else:  # pragma: no cover - patch_path_reason admits nothing else
        raise InputError("the patch path needs held values on whole boundary faces")
    values = np.full(len(faces), np.nan)
    rank = np.zeros(len(faces), dtype=np.int64)
    if isinstance(dirichlet, dict):
        keyed = {tuple(s): i for i, s in enumerate(np.sort(faces, axis=1).tolist())}
        items = list(dirichlet.items())
        for r in range(len(items) - 1, -1, -1):  # the first listed tag written last
            key, v = items[r]
            t = coarse.tags.side_tag(key, what="dirichlet: boundary tag")
            for s in np.sort(coarse.tags.sides_of([t]), axis=1).tolist():
                if tuple(s) in keyed:
                    values[keyed[tuple(s)]] = float(v)
                    rank[keyed[tuple(s)]] = r
        missing = np.flatnonzero(np.isnan(values))
        if missing.size:
            a, b, c = faces[missing[0]]
            raise InputError(f"dirichlet gives no value for held face ({a}, {b}, {c})")
    else:
        values[:] = float(dirichlet)
    return faces, values, rank


def _lifting(layout, faces, values, rank, problem):
    """The held values on the finest level (0 elsewhere), or None when all are 0."""
    if not np.any(values):
        return None
    n = 2**layout.k
    m, nf, ne = layout.n_cells, layout.n_faces, layout.n_edges
    inner, face = (n - 1) * (n - 2) * (n - 3) // 6, (n - 1) * (n - 2) // 2
    g = np.zeros(layout.size(layout.k))
    fbase = m * inner
    ebase = fbase + nf * face
    vbase = ebase + ne * (n - 1)
    f = layout.face_index(faces)
    g[fbase:ebase].reshape(nf, face)[f] = values[:, None]
    # an edge takes the value of the first-listed tag among its held faces
    EV = layout.topo[5]
    pairs = [layout._edge_index(EV, layout.n_vertices, faces[:, [a, b]])
             for a, b in ((0, 1), (0, 2), (1, 2))]
    best = np.full(ne, np.iinfo(np.int64).max)
    for e in pairs:
        np.minimum.at(best, e, rank)
    edge_value = np.zeros(ne)
    for e in pairs:
        first = rank == best[e]  # faces of one rank have one tag, so one value
        edge_value[e[first]] = values[first]
    g[ebase:vbase].reshape(ne, n - 1)[layout.held_e] = edge_value[layout.held_e, None]
    g[vbase:][problem.dirichlet.points] = problem.dirichlet.values
    return g


def _flux(layout, problem, neumann):
    """``(faces, points, h A)``: the coarse faces with an imposed flux, their points and the
    flux times their area (None without a flux); as the 2-D path's sides."""
    def free_faces():
        # a number goes on every boundary face not held (a fine face inside a coarse face
        # that is not held has a free point, whatever its edges)
        boundary = np.asarray(layout.coarse.boundary_faces(), dtype=np.int64)
        return boundary[~layout.held_f[layout.face_index(boundary)]]

    found = flux_sides(problem, neumann, free_faces)
    if found is None:
        return None
    faces, h = found
    p = layout.coarse.points
    area = 0.5 * np.linalg.norm(np.cross(p[faces[:, 1]] - p[faces[:, 0]],
                                         p[faces[:, 2]] - p[faces[:, 0]]), axis=1)
    return layout.face_index(faces, "flux face"), faces, h * area


def _add_flux(layout, flux, out):
    """``out`` += the boundary load of the flux on the finest level: each fine triangle of
    area ``A / n^2`` gives a third of ``h A / n^2`` to each of its points (6 triangles at
    a point inside a face, 3 inside its edges, 1 at its corners)."""
    f, faces, ha = flux
    n = 2**layout.k
    m, nf, ne = layout.n_cells, layout.n_faces, layout.n_edges
    inner, face = (n - 1) * (n - 2) * (n - 3) // 6, (n - 1) * (n - 2) // 2
    fbase = m * inner
    ebase = fbase + nf * face
    vbase = ebase + ne * (n - 1)
    fine = ha / n**2  # h times one fine triangle's area, per coarse face
    np.add.at(out[fbase:ebase].reshape(nf, face), f, (2.0 * fine)[:, None])
    EV = layout.topo[5]
    for a, b in ((0, 1), (0, 2), (1, 2)):
        e = layout._edge_index(EV, layout.n_vertices, faces[:, [a, b]])
        np.add.at(out[ebase:vbase].reshape(ne, n - 1), e, fine[:, None])
    for a in range(3):
        np.add.at(out[vbase:], faces[:, a], fine / 3.0)


def solve_on_tets(coarse, problem, dirichlet, refine, *, rtol, atol, maxiter, start, check,
                  monitor, note, memory_check, degree, nested_cycles, t0, args, quadrature=2):
    """The 3-D solve of :func:`hatkernels.patches.solve.solve_on_patches` (arguments
    checked there); returns a :class:`~hatkernels.patches.PatchSolution`."""
    from hatkernels.memory import available_bytes
    from hatkernels.solver import report_convergence
    from hatkernels.stats import SolveStats

    m = coarse.n_cells
    kappa = per_coarse_cell(problem.coefficient, m, "coefficient")
    callable_f = problem.source.kind == "callable"
    source = None if callable_f else per_coarse_cell(problem.source, m, "f")
    faces, values, rank = _held_faces(coarse, problem, dirichlet)
    lifted = bool(np.any(values != 0))
    if rtol is None and lifted:
        raise InputError("rtol=None (the nested start alone) reaches discretisation accuracy "
                         "with zero held values only; give a tolerance")
    layout = TetLayout(coarse, refine, held_faces=faces)
    k, n = refine, 2**refine
    size = layout.size(k)
    keeps_b = lifted or callable_f
    need = tet_bytes_per_point(refine, keeps_b) * size * MARGIN + FIXED_BYTES
    check_memory(size, need, available_bytes() if memory_check else None)
    timings = {"boundary": time.perf_counter() - t0}

    note("assemble")
    t1 = time.perf_counter()
    M = TetMultigrid(layout, kappa, degree=degree, nested_cycles=nested_cycles)
    A = TetOperator(layout, M.W, k)
    timings["setup"] = time.perf_counter() - t1
    t2 = time.perf_counter()
    # the load of a source constant on each coarse cell: f times the fine cells' volume
    # over 4 for each fine cell at the point
    flux = _flux(layout, problem, args.get("neumann"))
    if callable_f:  # evaluated on the fly, with the stored path's rule
        r = callable_tet_load(layout, problem.source, quadrature, M.volumes,
                              np.empty(size))
    else:
        unit = source * M.volumes / (4.0 * n**3)
        C = unit[:, None] * CLASS_CELLS[None, :]
        r = layout.class_sum(C, unit * CLASS_CELLS[0], k, masked=False)
    if flux is not None:
        _add_flux(layout, flux, r)
    if lifted:  # made again after the solve: not kept beside CG's vectors
        r -= TetOperator(layout, M.W, k, masked=False) @ _lifting(layout, faces, values, rank,
                                                                  problem)
    layout.zero_held(r)
    kept = fresh_copy(r) if keeps_b else None  # a callable is not evaluated twice

    def remake_b(out):
        if kept is not None:
            out[:] = kept
        else:
            layout.class_sum(C, unit * CLASS_CELLS[0], k, masked=True, out=out)
            if flux is not None:
                _add_flux(layout, flux, out)
                layout.zero_held(out)

    timings["assemble"] = time.perf_counter() - t2
    note("solve")
    t3 = time.perf_counter()
    result = lean_cg(A, M, r, remake_b, rtol=rtol, atol=atol, maxiter=maxiter,
                     nested=start == "nested", monitor=monitor)
    timings["solve"] = time.perf_counter() - t3
    del r
    kept = None  # noqa: F841  (frees the kept right-hand side)
    x = result.x
    if lifted:
        x += _lifting(layout, faces, values, rank, problem)
    stats = SolveStats(
        iterations=result.iterations, converged=result.converged,
        residuals=result.residuals, timings={**timings, "total": time.perf_counter() - t0},
        unknowns=size, preconditioner=M.description, stored_bytes=0,
        peak_rss_bytes=peak_rss_bytes(), threads=numba.get_num_threads(), info=result.info,
        message=result.message, tolerance=result.tolerance,
        condition_estimate=result.condition_estimate, nnz=0, matrix_free=True)
    stats.dirichlet_points = layout.held_count()
    report_convergence(stats, check, stacklevel=4)
    return PatchSolution(x, layout, stats, args)
