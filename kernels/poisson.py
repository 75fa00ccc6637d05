"""The one-call solve: a mesh and data in, the P1 solution at the points out.

Solves ``-div(kappa grad u) + c u = f`` with ``u = g`` on the Dirichlet part
of the boundary, ``kappa du/dn = h`` (Neumann) and ``kappa du/dn + r u = s``
(Robin) on the rest.  A short driver over the layers: the data are checked
once into a :class:`~hatkernels.problem.PoissonProblem`,
:func:`~hatkernels.discretise.discretise` makes the linear system,
:func:`~hatkernels.solve` builds the preconditioner from the system's
context and runs CG.
"""

from __future__ import annotations

import time

import numba
import numpy as np

from hatkernels.checks import integer_option
from hatkernels.discretise import discretise
from hatkernels.errors import InputError
from hatkernels.locality import Renumbering, renumber_option, should_renumber
from hatkernels.memory import check_refine_memory, check_solve_memory
from hatkernels.mesh.core import Mesh
from hatkernels.precond import DEFAULT, capabilities
from hatkernels.problem import PoissonProblem
from hatkernels.solver import SolveResult, solve
from hatkernels.stats import PoissonSolution, SolveStats

__all__ = ["PoissonSolution", "solve_poisson"]


def refined(mesh, times, memory_check=False):
    """``mesh`` refined ``times`` times (checked: a Mesh, an integer >= 0); with
    ``memory_check``, refused first when the refined meshes would not fit."""
    if not isinstance(mesh, Mesh):
        raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
    times = integer_option(times, "refine", minimum=0)
    if memory_check and times:
        check_refine_memory(mesh, times, REFINE_ADVICE)
    for _ in range(times):
        mesh = mesh.refine()
    return mesh


#: What a refusal to build refined meshes advises.
REFINE_ADVICE = ("solve_poisson(mesh, f, refine=k) with the default preconditioner solves "
                 "on the refined patches without building them (docs/patches.md), where its "
                 "data allow; or refine fewer times, or pass memory_check=False "
                 "(--no-memory-check) to try anyway")


def matrix_free_default(preconditioner, problem):
    """The form :func:`solve_poisson` picks: matrix-free when the preconditioner prefers it
    and the problem has the stiffness term only."""
    return (isinstance(preconditioner, str) and capabilities(preconditioner).prefers_matrix_free
            and not problem.lower_order)


def solve_poisson(
    mesh,
    f=1.0,
    *,
    refine=0,
    dirichlet=0.0,
    dirichlet_on=None,
    coefficient=None,
    reaction=None,
    neumann=None,
    robin=None,
    preconditioner=None,
    rtol=1e-10,
    atol=0.0,
    maxiter=None,
    start=None,
    check=False,
    quadrature=2,
    matrix_free=None,
    variant=None,
    progress=None,
    monitor=None,
    zero_mean=False,
    memory_check=True,
    renumber=None,
    **preconditioner_options,
):
    """Solve ``-div(kappa grad u) + c u = f`` on a mesh in one call.

    Parameters
    ----------
    mesh : Mesh
    refine : int
        Solve on ``mesh`` refined this many times (:meth:`Mesh.refine`); ``.u``
        is then in the numbering of the refined mesh.  With the default
        preconditioner, triangles or tetrahedra and data the patch path takes
        (numbers or ``{region: number}`` for ``f`` and ``coefficient``, callable
        sources, a number or ``{tag: number}`` held on whole boundary sides and
        as a flux),
        the refined mesh is never stored: the solve runs patch by patch on the
        coarse mesh (:mod:`hatkernels.patches`, docs/patches.md) and returns a
        :class:`~hatkernels.patches.PatchSolution` (``.mesh`` is built only if
        asked for).  Otherwise, or with a preconditioner named, the refined
        mesh is built here and stored.
    f, dirichlet, dirichlet_on, coefficient, reaction, neumann, robin, quadrature, zero_mean
        The problem: see :class:`hatkernels.problem.PoissonProblem` (``zero_mean=True``
        solves a pure Neumann part for its solution with mean zero).
    preconditioner, rtol, atol, maxiter, start, check, **preconditioner_options
        As in :func:`hatkernels.solve`; ``preconditioner=None`` (the default) is
        the patch multigrid when ``refine`` takes the patch path, else
        :data:`hatkernels.precond.DEFAULT`.  With ``refine=k`` and ``gmg``,
        ``start="nested"`` begins CG from full multigrid (the coarse
        solution worked up the levels), and ``rtol=None`` returns that
        start alone: discretisation accuracy on smooth data for about one
        and a third cycles' work (docs/solvers.md).
    matrix_free : bool, optional
        Solve with the matrix-free :class:`~hatkernels.StiffnessOperator`
        instead of an assembled matrix.  Default: True when the
        preconditioner prefers it (``gmg``, which needs ``mesh`` made by
        :meth:`Mesh.refine`) and there is no reaction or Robin term, else
        False.  A matrix-free solve needs a preconditioner that works on an
        operator (:func:`hatkernels.precond.capabilities`) or an instance.
    variant : str, optional
        The matrix-free variant (``hatkernels.operators.VARIANTS``).
    progress : callable, optional
        ``progress(phase)`` is called as each phase starts ("boundary",
        "assemble", "solve"), for reporting.
    monitor : callable, optional
        ``monitor(iteration, residual_norm)`` after every CG iteration.
    memory_check : bool
        Before allocating, estimate the solve's peak memory from measured
        per-point figures and refuse (InputError, with the estimate and the
        memory available) when it does not fit; False skips the check.
    renumber : bool, optional
        Solve an assembled system in Z order (a space-filling curve through its
        points) when its numbering has no locality: at least 65,536 unknowns and
        more than half the matrix's entries far from its diagonal
        (:mod:`hatkernels.locality`).  None (default) decides so, False never
        renumbers, True always does where it may: with a preconditioner that
        needs no mesh and without the nested start.  ``.u`` is in the mesh's
        numbering either way; the time shows as ``stats.timings["renumber"]``,
        and the two matrices coexist while the copy is made (docs/solvers.md).

    Returns
    -------
    PoissonSolution (on the patch path its subclass
    :class:`~hatkernels.patches.PatchSolution`, whose ``u``, ``mesh`` and ``problem``
    are made on first use)

    Raises
    ------
    InputError
        Bad data (naming the point, cell or side), or a problem with no
        Dirichlet point, reaction or Robin term (the solution would not be
        unique).

    Examples
    --------
    >>> import hatkernels
    >>> sol = hatkernels.solve_poisson(hatkernels.mesh.rectangle(32, 32), 1.0)
    >>> sol.converged, round(float(sol.u.max()), 4)   # the centre value, about 0.0737 in the limit
    (True, 0.0736)
    """
    renumber_option(renumber)
    if preconditioner is None:
        if refine and not isinstance(refine, bool):
            from hatkernels.patches.solve import patch_path_reason, solve_on_patches

            if patch_path_reason(mesh, refine, f=f, dirichlet=dirichlet, dirichlet_on=dirichlet_on,
                                 coefficient=coefficient, reaction=reaction, neumann=neumann,
                                 robin=robin, zero_mean=zero_mean, matrix_free=matrix_free,
                                 variant=variant, options=preconditioner_options) is None:
                return solve_on_patches(
                    mesh, f, refine, dirichlet=dirichlet, dirichlet_on=dirichlet_on,
                    coefficient=coefficient, neumann=neumann, rtol=rtol, atol=atol, maxiter=maxiter, start=start,
                    check=check, monitor=monitor, quadrature=quadrature, progress=progress,
                    memory_check=memory_check)
        preconditioner = DEFAULT
    t0 = time.perf_counter()
    mesh = refined(mesh, refine, memory_check)
    refining = time.perf_counter() - t0
    problem = PoissonProblem(mesh, f, dirichlet=dirichlet, dirichlet_on=dirichlet_on,
                             coefficient=coefficient, reaction=reaction, neumann=neumann,
                             robin=robin, quadrature=quadrature, zero_mean=zero_mean)
    if rtol is None and np.any(problem.dirichlet.values != 0):
        raise InputError(
            "rtol=None (the nested start alone) reaches discretisation accuracy with zero held "
            "values only: with held values the system's lifting is not smooth on the coarser "
            f"levels ({int(np.count_nonzero(problem.dirichlet.values))} held points have a "
            "nonzero value); give a tolerance (start='nested' still shortens CG)")
    if memory_check:
        check_solve_memory(mesh, preconditioner, options=preconditioner_options)
    checked = time.perf_counter() - t0 - refining
    if matrix_free is None:
        matrix_free = matrix_free_default(preconditioner, problem)
    system = discretise(problem, matrix_free=matrix_free, variant=variant, progress=progress)
    system.timings["boundary"] += checked  # the checks of the data count as boundary work
    if progress is not None:
        progress("solve")
    if system.unknowns == 0 and not system.matrix_free:
        result = _all_held(system, preconditioner)  # u is the held values: nothing to solve
        renumbering = None
    else:
        A, b, renumbering = _renumbered(system, preconditioner, start, renumber)
        if renumbering is not None:
            system.drop_matrix()  # the renumbered copy serves from here
        context = (system.context() if isinstance(preconditioner, str) and renumbering is None
                   else None)
        result = solve(A, b, preconditioner=preconditioner, rtol=rtol, atol=atol,
                       maxiter=maxiter, start=start, check=check, monitor=monitor,
                       context=context, **preconditioner_options)
    x = result.x if renumbering is None else renumbering.back(result.x)
    u = system.expand(x)
    stats = result.stats
    # the refinement is a phase of its own (it was counted as boundary work)
    phases = {"refine": refining} if refine else {}
    if renumbering is not None:
        phases["renumber"] = renumbering.seconds
    stats.timings = {**phases, **system.timings, **stats.timings,
                     "total": time.perf_counter() - t0}
    stats.unknowns = system.unknowns
    stats.dirichlet_points = int(problem.dirichlet.points.size)
    return PoissonSolution(u=u, stats=stats, mesh=mesh, problem=problem)


def _renumbered(system, preconditioner, start, renumber=None):
    """``(A, b, renumbering)``: the system in Z order when ``renumber`` asks for it or, with
    None, when its numbering has no locality (:mod:`hatkernels.locality`); else as it is,
    with ``renumbering`` None.

    Only an assembled system with a named preconditioner that needs no mesh (the rows
    are no longer the mesh's points) and no nested start is renumbered.
    """
    if (system.matrix_free or not isinstance(preconditioner, str) or start == "nested"
            or capabilities(preconditioner).needs_mesh
            or not should_renumber(system.A, system.problem.mesh.dim, renumber)):
        return system.A, system.b, None
    renumbering = Renumbering(system.problem.mesh.points[system.points])
    return renumbering.matrix(system.A), renumbering.vector(system.b), renumbering


def _all_held(system, preconditioner):
    """The result of a problem whose every point is held (or in no cell): no unknown, so
    no CG and no preconditioner; the answer is the held values."""
    if isinstance(preconditioner, str):
        capabilities(preconditioner)  # a wrong name is still refused
    stats = SolveStats(iterations=0, converged=True, residuals=np.zeros(1),
                       timings={"setup": 0.0, "solve": 0.0}, unknowns=0,
                       preconditioner="none: every point is held, nothing to solve",
                       threads=numba.get_num_threads(), tolerance=0.0,
                       message="every point is held by a Dirichlet condition: u is the held "
                               "values")
    return SolveResult(x=np.zeros(0), stats=stats)
