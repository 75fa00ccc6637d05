"""``hatkernels bench``: assembly strategies and preconditioners, timed on this machine.

The floors come from :func:`hatkernels.traffic.assembly_floors`, the same
formulas the benchmark suite in ``bench/`` uses.  Preconditioners the
library refuses on the plain mesh (those that need a mesh made by
refinement) are run on the same triangulation built by refinement when
``--cells`` allows one; the command does not know them by name.
"""

from __future__ import annotations

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
from hatkernels.mesh import rectangle
from hatkernels.perf import memory_bandwidth, nested
from hatkernels.precond import PreconditionerContext
from hatkernels.traffic import assembly_floors

__all__ = ["run"]

#: The coarsest mesh a refined bench mesh starts from, in cells per side.
SMALLEST_COARSE = 4


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


def _solve_row(name, systems, args, refined_names):
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
        if not systems.has_refined:
            row["skipped"] += (f"; an even --cells of at least {2 * SMALLEST_COARSE} also tries "
                               f"the same mesh built by refinement")
    return row


def _refined_mesh(coarse, times):
    def make():
        mesh = rectangle(coarse, coarse)
        for _ in range(times):
            mesh = mesh.refine()
        return mesh

    return make


def run(args, progress):
    """Run ``hatkernels bench``; return the exit code."""
    names = args.preconditioners
    if args.json is not None:  # refused before the long part, and again when writing
        kio.check_output_file(args.json, force=args.force)
    results = {"assembly": [], "solve": []}
    with threads(args.threads):
        progress.phase("kernels: compiling or loading on a tiny mesh")
        with CompileNotice(progress) as notice:
            tiny = rectangle(4, 4).refine()
            StiffnessAssembler(tiny).assemble()
            assemble_stiffness(tiny, strategy="triplets")
            small = _Systems(tiny, refined=lambda: tiny)
            for n in names:
                try:
                    _first_accepted(n, small, args.rtol)
                except InputError:
                    pass
        progress.phase(f"mesh: rectangle {args.cells} x {args.cells} cells")
        mesh = rectangle(args.cells, args.cells)
        n, m = mesh.n_points, mesh.n_triangles
        progress.phase("assembly: triplets")
        t_trip, A = _best(lambda: assemble_stiffness(mesh, strategy="triplets"), args.repeat)
        nnz = A.nnz
        progress.phase("assembly: csr first call")
        t_first, _ = _best(assemble_stiffness, args.repeat,
                           setup=lambda: rectangle(args.cells, args.cells))
        progress.phase("assembly: csr numeric")
        assembler = StiffnessAssembler(mesh)
        t_num, _ = _best(assembler.assemble, args.repeat)
        progress.phase(f"bandwidth: NumPy copy of {args.bandwidth_mb} MiB")
        bw = memory_bandwidth(mbytes=args.bandwidth_mb, repeats=max(3, args.repeat))
        floors = assembly_floors(mesh, assembler.plan)
        for label, t, floor in (("triplets", t_trip, floors["first"]),
                                ("csr first call", t_first, floors["first"]),
                                ("csr numeric", t_num, floors["numeric"])):
            results["assembly"].append({
                "strategy": label, "seconds": t, "speedup_vs_triplets": t_trip / t,
                "floor_bytes": floor, "floor_seconds": floor / (bw["copy"] * 1e9),
            })
        # The same triangulation built by refinement (its points numbered differently),
        # when --cells is divisible by 2, for preconditioners that need the refinement history.
        coarse, times = nested(args.cells, smallest=SMALLEST_COARSE)
        systems = _Systems(mesh, _refined_mesh(coarse, times) if times else None)
        refined_names = []
        for name in names:
            progress.phase(f"solve: {name}")
            results["solve"].append(_solve_row(name, systems, args, refined_names))
    ran = [r for r in results["solve"] if "total_seconds" in r]
    fastest = min((r["total_seconds"] for r in ran), default=None)
    for r in ran:
        r["vs_fastest"] = r["total_seconds"] / fastest
    if args.json is not None:
        record = base_record(command_line(args))
        record.update({"cells": args.cells, "triangles": m, "points": n, "nnz": nnz,
                       "repeat": args.repeat, "bandwidth_GBs": bw, "threads": numba.get_num_threads(),
                       "kernels_seconds": notice.seconds, "versions": versions(), **results})
        progress.phase(f"write: {args.json}")
        kio.write_json(kio.check_output_file(args.json, force=args.force), record)
    progress.phase("done")
    progress.close()
    system = systems.plain[0]
    print(f"{PROG} bench: this machine, {numba.get_num_threads()} numba threads, "
          f"best of {args.repeat}")
    print(f"memory bandwidth (NumPy, {args.bandwidth_mb} MiB arrays): copy {bw['copy']:.1f} GB/s, "
          f"triad {bw['triad']:.1f} GB/s")
    print(f"kernels: compile or cache load {notice.seconds:.2f} s (not in the times below)")
    print()
    print(f"stiffness assembly, unit square {args.cells} x {args.cells} cells: {m:,} triangles, "
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
    print(f"solve of -lap u = 1, u = 0 on the boundary, same mesh: {system.A.shape[0]:,} "
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
        print(f"{', '.join(refined_names)}: on the same triangulation built as "
              f"rectangle({coarse}) refined {times} time{'s' if times != 1 else ''} "
              f"(its points numbered differently)")
    print("vs fastest: total (setup + solve) over the fastest total; setup is paid once per "
          "matrix, solve once per right-hand side")
    if args.json is not None:
        print(f"\nwrote {args.json}")
    return 0
