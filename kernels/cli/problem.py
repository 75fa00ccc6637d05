"""From the options of ``hatkernels solve`` to a mesh and a problem (serial and MPI alike)."""

from __future__ import annotations

import warnings

from hatkernels import block, scenarios
from hatkernels import io as kio
from hatkernels.errors import ConvergenceError, InputError
from hatkernels.memory import check_refine_memory
from hatkernels.mesh import Mesh, cuboid, rectangle
from hatkernels.scenarios import COARSE_CELLS, DEFAULT_CELLS, PLATE

__all__ = ["REFINE_HINT", "build_mesh", "make_problem", "needs_refinement", "read_mesh_option",
           "refined", "tiny_problem"]

#: Added to the library's refusal of a preconditioner that needs a mesh made by refinement.
REFINE_HINT = "; in this command --refine K builds the mesh by refinement"


def _times(k):
    return f"{k} time{'s' if k != 1 else ''}"


def _is_block(args):
    return args.mesh is None and args.scenario == "block"


def read_mesh_option(args, progress):
    """``(arrays, dim)`` of the ``--mesh`` file, or ``(None, None)`` without one.

    Read before any compiling, so that a missing or unreadable file fails first.
    """
    if args.mesh is None:
        return None, None
    progress.phase(f"mesh: reading {args.mesh}")
    arrays = kio.read_mesh_arrays(args.mesh)
    return arrays, 3 if arrays[0].ndim == 2 and arrays[0].shape[1] == 3 else 2


def build_mesh(args, progress, arrays=None):
    """The mesh the options ask for, and its description for the report.

    ``arrays`` are what :func:`hatkernels.io.read_mesh_arrays` read from
    ``--mesh`` (read before the kernels compile, so that a bad file fails
    first); the mesh checks run here.  ``--refine K`` refines the file's mesh,
    the plate's coarse 8 mm mesh or the block's 4 mm cubes K times (the block
    by default 4 times).
    """
    if _is_block(args):
        return block.block_mesh(block.BLOCK_REFINE if args.refine is None else args.refine,
                                progress=progress.phase)
    if args.mesh is not None:
        progress.phase(f"mesh: checking {args.mesh}")
        mesh = kio.mesh_from_arrays(*arrays, args.mesh)
        description = f"from {args.mesh}"
    elif args.refine is not None:
        nx, ny = PLATE.cells(COARSE_CELLS)
        progress.phase(f"mesh: rectangle {nx} x {ny} cells")
        mesh = rectangle(nx, ny, bounds=PLATE.bounds)
        description = f"rectangle {nx} x {ny} cells of 8 mm refined {_times(args.refine)}"
    else:
        nx, ny = PLATE.cells(DEFAULT_CELLS if args.cells is None else args.cells)
        progress.phase(f"mesh: rectangle {nx} x {ny} cells")
        mesh = rectangle(nx, ny, bounds=PLATE.bounds)
        description = (f"rectangle {nx} x {ny} cells of {PLATE.length / nx * 1e3:.4g} mm x "
                       f"{PLATE.width / ny * 1e3:.4g} mm")
    if args.refine and args.mesh is not None:
        description += f", refined {_times(args.refine)}"
    return refined(mesh, args.refine or 0, progress,
                   getattr(args, "memory_check", True)), description


def refined(mesh, times, progress, memory_check=True):
    """``mesh`` refined ``times`` times, each refinement announced; with ``memory_check``
    refused first when the refined meshes would not fit."""
    if memory_check and times:
        check_refine_memory(mesh, times, "use --refine with fewer times, or "
                            "--no-memory-check to try anyway")
    for k in range(times):
        words = "triangles" if mesh.dim == 2 else "tetrahedra"
        progress.phase(f"mesh: refinement {k + 1} of {times} "
                       f"({2**mesh.dim * mesh.n_cells:,} {words})")
        mesh = mesh.refine()
    return mesh


def needs_refinement(args):
    """Whether the preconditioner refuses a mesh without a refinement history but takes one with it.

    Asked of the library, on the same tiny triangulation with and without
    the history, only after it refused a solve: the command knows no
    preconditioner by name.
    """
    def accepted(mesh):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                scenarios.solve_problem(scenarios.mesh_problem(mesh),
                                        preconditioner=args.preconditioner, rtol=args.rtol)
        except (InputError, ConvergenceError):
            return False
        return True

    return accepted(rectangle(4, 4).refine()) and not accepted(rectangle(8, 8))


def make_problem(args, mesh, description):
    """The plate or block scenario on ``mesh``, or the generic problem of a ``--mesh`` file."""
    if _is_block(args):
        return block.heat_spreader_block(mesh, source=args.source, conductivity=args.conductivity,
                                         film=args.film, coolant=args.coolant,
                                         mesh_description=description)
    if args.mesh is not None:
        return scenarios.mesh_problem(mesh, source=args.source, conductivity=args.conductivity,
                                      dirichlet=args.dirichlet, name=args.mesh,
                                      mesh_description=description)
    return scenarios.heat_spreader(mesh, source=args.source, conductivity=args.conductivity,
                                   coolant=args.dirichlet, mesh_description=description)


def tiny_problem(args, refinements=1, dim=2):
    """The same kind of problem on a tiny mesh: run it first so that the kernels compile.

    A ``--mesh`` run gets a 4 x 4 square (a 2 x 2 x 2 cube of tetrahedra for
    ``dim`` 3) through the checks a mesh file goes through; the plate and the
    block their coarse meshes.  Either is refined ``refinements`` times, which
    compiles the refinement kernels and makes the scenarios' meshes fine
    enough for their heat sources.
    """
    if args.mesh is not None:
        grid = rectangle(4, 4) if dim == 2 else cuboid(2, 2, 2)
        tiny = Mesh(grid.points, grid.cells)
    elif _is_block(args):
        tiny = block.coarse_mesh()
    else:
        tiny = rectangle(*PLATE.cells(COARSE_CELLS), bounds=PLATE.bounds)
    for _ in range(refinements):
        tiny = tiny.refine()
    if args.mesh is not None:
        return scenarios.mesh_problem(tiny, source=args.source, conductivity=args.conductivity)
    if _is_block(args):
        return block.heat_spreader_block(tiny, source=args.source, conductivity=args.conductivity,
                                         film=args.film, coolant=args.coolant)
    return scenarios.heat_spreader(tiny, source=args.source, conductivity=args.conductivity)
