"""``hatkernels bench``: assembly strategies and preconditioners, timed on this machine.

The floors come from :func:`hatkernels.traffic.assembly_floors`, the same
formulas the benchmark suite in ``bench/`` uses.  Preconditioners the
library refuses on the plain mesh (those that need a mesh made by
refinement) are run on the same triangulation built by refinement when
``--cells`` allows one; the command does not know them by name.

``--mesh FILE`` runs the same comparison on the user's mesh (triangles or
tetrahedra): ``-lap u = 1`` with ``u = 0`` on its whole boundary.  A mesh
read from a file has no refinement history, so a preconditioner that needs
one is shown as skipped, with the library's reason.
"""

from __future__ import annotations

import dataclasses
import math
import time
import warnings

import numba

from hatkernels import (
    StiffnessAssembler,
    apply_dirichlet,
    assemble_load,
    assemble_stiffness,
    solve,
)
from hatkernels import io as kio
from hatkernels.cli.common import PROG, base_record, command_line, one_line, threads, versions
from hatkernels.cli.progress import CompileNotice
from hatkernels.errors import InputError
from hatkernels.mesh import cuboid, rectangle
from hatkernels.perf import memory_bandwidth, nested
from hatkernels.precond import PreconditionerContext
from hatkernels.traffic import assembly_floors

__all__ = ["run"]

#: The coarsest mesh a refined bench mesh starts from, in cells per side.
SMALLEST_COARSE = 4
#: Cells per side of the unit square when neither --cells nor --mesh is given.
DEFAULT_CELLS = 300


def _best(fn, repeat, setup=None):
    best = math.inf
    result = None
    for _ in range(repeat):
        arg = setup() if setup is not None else None
        t0 = time.perf_counter()
        result = fn(arg) if setup is not None else fn()
        best = min(best, time.perf_counter() - t0)
    return best, result


def _bench_system(mesh):
    """``-lap u = 1``, ``u = 0`` on the boundary, reduced to the free points."""
    return apply_dirichlet(assemble_stiffness(mesh), assemble_load(mesh, 1.0),
                           mesh.boundary_points())


def _case(mesh):
    """The bench system on ``mesh`` and the context a preconditioner may build from."""
    fixed = mesh.boundary_points()
    return _bench_system(mesh), PreconditionerContext(mesh=mesh, fixed=fixed)


class _Systems:
    """The bench system on its mesh and, made on first need, on a mesh built by refinement.

    ``refined`` makes that mesh (None: there is none): the same
    triangulation with a refinement history, for the preconditioners that
    need one.
    """

    def __init__(self, mesh, refined=None):
        self.plain = _case(mesh)
        self._make = refined
        self._refined = None

    @property
    def has_refined(self):
        return self._make is not None

    def get(self, which):
        if which == "plain":
            return self.plain
        if self._refined is None:
            self._refined = _case(self._make())
        return self._refined


def _solve(name, systems, which, rtol):
    system, context = systems.get(which)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return solve(system.A, system.b, preconditioner=name, rtol=rtol, context=context)


def _first_accepted(name, systems, rtol):
    """``(which, result)``: the plain system, or the refined one if the library refused the plain.

    Raises the plain system's InputError when no system is accepted.
    """
    try:
        return "plain", _solve(name, systems, "plain", rtol)
    except InputError as exc:
        if not systems.has_refined:
            raise
        try:
            return "refined", _solve(name, systems, "refined", rtol)
        except InputError:
            raise exc from None


def _figures(result):
    """What the table shows of one solve: the one place that reads a solve's stats."""
    st = result.stats
    return {"setup_seconds": st.timings["setup"], "solve_seconds": st.timings["solve"],
            "total_seconds": st.timings["setup"] + st.timings["solve"],
            "iterations": st.iterations, "converged": bool(st.converged),
            "description": st.preconditioner}


def _solve_row(name, systems, args, refined_names, hint):
    """Best of ``--repeat`` solves with preconditioner ``name``, or why it was skipped."""
    row = {"preconditioner": name}
    try:
        which, r = _first_accepted(name, systems, args.rtol)
        best = _figures(r)
        for _ in range(args.repeat - 1):
            figures = _figures(_solve(name, systems, which, args.rtol))
            if figures["total_seconds"] < best["total_seconds"]:
                best = figures
        row.update(best)
        if which == "refined":
            refined_names.append(name)
    except InputError as exc:
        row["skipped"] = one_line(exc)
        if not systems.has_refined and hint:
            row["skipped"] += hint
    return row


def _refined_mesh(coarse, times):
    def make():
        mesh = rectangle(coarse, coarse)
        for _ in range(times):
            mesh = mesh.refine()
        return mesh

    return make


@dataclasses.dataclass
class _Target:
    """The mesh the bench runs on and what the report and the record say about it.

    ``fresh()`` gives the same mesh with nothing computed yet (for the csr
    first call); ``refined`` makes the same triangulation built by
    refinement, or is None; ``hint`` is added to a preconditioner's refusal
    when there is none.
    """

    mesh: object
    fresh: object
    title: str
    problem: str
    record: dict
    refined: object = None
    hint: str = ""
    note: str = ""


def _square(cells, progress):
    progress.phase(f"mesh: rectangle {cells} x {cells} cells")
    mesh = rectangle(cells, cells)
    # The same triangulation built by refinement (its points numbered differently),
    # when --cells is divisible by 2, for preconditioners that need the refinement history.
    coarse, times = nested(cells, smallest=SMALLEST_COARSE)
    return _Target(
        mesh, fresh=lambda: rectangle(cells, cells), title=f"unit square {cells} x {cells} cells",
        problem="u = 0 on the boundary", record={"cells": cells, "triangles": mesh.n_triangles},
        refined=_refined_mesh(coarse, times) if times else None,
        hint=f"; an even --cells of at least {2 * SMALLEST_COARSE} also tries the same mesh "
             f"built by refinement",
        note=f"on the same triangulation built as rectangle({coarse}) refined {times} "
             f"time{'s' if times != 1 else ''} (its points numbered differently)")


def _read(path, progress):
    """The mesh of ``--mesh``, refused (InputError naming the file) when it leaves nothing to solve."""
    progress.phase(f"mesh: reading {path}")
    mesh = kio.read_mesh(path)
    held = mesh.boundary_points().size
    if held == 0:
        raise InputError(f"mesh file {path}: the mesh has no boundary (every side is shared by "
                         f"two cells), so u = 0 on the boundary holds no point and the problem "
                         f"has no unique solution")
    if held == mesh.n_points - mesh.unused_points().size:
        raise InputError(f"mesh file {path}: every point of its {mesh.n_cells:,} cells is on "
                         f"the boundary, so u = 0 there leaves no unknown to solve for")
    return mesh


def _from_file(path, mesh):
    def fresh():  # the file's mesh with every derived array dropped, as a first call sees it
        mesh.forget(*mesh.cached())
        return mesh

    words = _cell_words(mesh)
    return _Target(
        mesh, fresh=fresh, title=f"mesh {path} ({mesh.dim}-D)",
        problem="u = 0 on the whole boundary",
        record={"cells": None, words: mesh.n_cells,
                "mesh": {"file": path, "dim": mesh.dim, "points": mesh.n_points,
                         "cells": mesh.n_cells,
                         "boundary_points": int(mesh.boundary_points().size)}})


def _cell_words(mesh):
    return "triangles" if mesh.dim == 2 else "tetrahedra"


def _compile(dim, names, rtol, progress):
    """Run every kernel once on a tiny mesh of dimension ``dim``; the seconds it took."""
    progress.phase("kernels: compiling or loading on a tiny mesh")
    with CompileNotice(progress) as notice:
        tiny = (rectangle(4, 4) if dim == 2 else cuboid(2, 2, 2)).refine()
        StiffnessAssembler(tiny).assemble()
        assemble_stiffness(tiny, strategy="triplets")
        small = _Systems(tiny, refined=lambda: tiny)
        for n in names:
            try:
                _first_accepted(n, small, rtol)
            except InputError:
                pass
    return notice.seconds


def _pattern(assembler, mesh):
    """What the floors read of the csr pattern (its ``nnz`` and ``indices``)."""
    return assembler.plan if mesh.dim == 2 else assembler.plan.plan


def run(args, progress):
    """Run ``hatkernels bench``; return the exit code."""
    names = args.preconditioners
    if args.json is not None:  # refused before the long part, and again when writing
        kio.check_output_file(args.json, force=args.force)
    results = {"assembly": [], "solve": []}
    # a missing or invalid mesh file fails before any compiling
    from_file = None if args.mesh is None else _read(args.mesh, progress)
    with threads(args.threads):
        kernels_seconds = _compile(2 if from_file is None else from_file.dim, names, args.rtol,
                                   progress)
        target = (_square(DEFAULT_CELLS if args.cells is None else args.cells, progress)
                  if from_file is None else _from_file(args.mesh, from_file))
        mesh = target.mesh
        n, m = mesh.n_points, mesh.n_cells
        progress.phase("assembly: triplets")
        t_trip, A = _best(lambda: assemble_stiffness(mesh, strategy="triplets"), args.repeat)
        nnz = A.nnz
        progress.phase("assembly: csr first call")
        t_first, _ = _best(assemble_stiffness, args.repeat, setup=target.fresh)
        progress.phase("assembly: csr numeric")
        assembler = StiffnessAssembler(mesh)
        t_num, _ = _best(assembler.assemble, args.repeat)
        progress.phase(f"bandwidth: NumPy copy of {args.bandwidth_mb} MiB")
        bw = memory_bandwidth(mbytes=args.bandwidth_mb, repeats=max(3, args.repeat))
        floors = assembly_floors(mesh, _pattern(assembler, mesh))
        for label, t, floor in (("triplets", t_trip, floors["first"]),
                                ("csr first call", t_first, floors["first"]),
                                ("csr numeric", t_num, floors["numeric"])):
            results["assembly"].append({
                "strategy": label, "seconds": t, "speedup_vs_triplets": t_trip / t,
                "floor_bytes": floor, "floor_seconds": floor / (bw["copy"] * 1e9),
            })
        systems = _Systems(mesh, target.refined)
        refined_names = []
        for name in names:
            progress.phase(f"solve: {name}")
            results["solve"].append(_solve_row(name, systems, args, refined_names, target.hint))
    ran = [r for r in results["solve"] if "total_seconds" in r]
    fastest = min((r["total_seconds"] for r in ran), default=None)
    for r in ran:
        r["vs_fastest"] = r["total_seconds"] / fastest
    system = systems.plain[0]
    if args.mesh is not None:
        target.record["mesh"]["unknowns"] = system.A.shape[0]
    if args.json is not None:
        record = base_record(command_line(args))
        record.update({**target.record, "points": n, "nnz": nnz,
                       "repeat": args.repeat, "bandwidth_GBs": bw, "threads": numba.get_num_threads(),
                       "kernels_seconds": kernels_seconds, "versions": versions(), **results})
        progress.phase(f"write: {args.json}")
        kio.write_json(kio.check_output_file(args.json, force=args.force), record)
    progress.phase("done")
    progress.close()
    print(f"{PROG} bench: this machine, {numba.get_num_threads()} numba threads, "
          f"best of {args.repeat}")
    print(f"memory bandwidth (NumPy, {args.bandwidth_mb} MiB arrays): copy {bw['copy']:.1f} GB/s, "
          f"triad {bw['triad']:.1f} GB/s")
    print(f"kernels: compile or cache load {kernels_seconds:.2f} s (not in the times below)")
    if args.mesh is not None:
        print(f"mesh {args.mesh}: {mesh.dim}-D, {n:,} points, {m:,} {_cell_words(mesh)}, "
              f"{target.record['mesh']['boundary_points']:,} on the boundary; problem "
              f"-div grad u = 1 with u = 0 on the whole boundary")
    print()
    print(f"stiffness assembly, {target.title}: {m:,} {_cell_words(mesh)}, "
          f"{n:,} points, {nnz:,} entries")
    print(f"{'strategy':<16}{'time':>11}{'vs triplets':>13}{'floor':>11}{'x floor':>9}")
    for r in results["assembly"]:
        print(f"{r['strategy']:<16}{r['seconds'] * 1e3:>8.2f} ms{r['speedup_vs_triplets']:>12.2f}x"
              f"{r['floor_seconds'] * 1e3:>8.2f} ms{r['seconds'] / r['floor_seconds']:>8.1f}x")
    print("vs triplets: times faster than the triplets baseline (NumPy element matrices, "
          "scipy COO to CSR)")
    print("floor: the bytes that must move (read the mesh, write the matrix) at the measured "
          "copy bandwidth; x floor: time over floor")
    print()
    print(f"solve of -lap u = 1, {target.problem}, same mesh: {system.A.shape[0]:,} "
          f"unknowns, rtol {args.rtol:g}")
    print(f"{'preconditioner':<16}{'setup':>11}{'solve':>11}{'total':>11}{'iterations':>12}"
          f"{'vs fastest':>12}")
    for r in results["solve"]:
        if "skipped" in r:
            print(f"{r['preconditioner']:<16}  skipped: {r['skipped']}")
            continue
        flag = "" if r["converged"] else "  (not converged)"
        print(f"{r['preconditioner']:<16}{r['setup_seconds'] * 1e3:>8.1f} ms"
              f"{r['solve_seconds'] * 1e3:>8.1f} ms{r['total_seconds'] * 1e3:>8.1f} ms"
              f"{r['iterations']:>12d}{r['vs_fastest']:>11.2f}x{flag}")
    if refined_names:
        print(f"{', '.join(refined_names)}: {target.note}")
    print("vs fastest: total (setup + solve) over the fastest total; setup is paid once per "
          "matrix, solve once per right-hand side")
    if args.json is not None:
        print(f"\nwrote {args.json}")
    return 0
