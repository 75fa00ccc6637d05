"""``hatkernels modes``: the natural thermal modes (decay modes) of the problems ``solve`` takes.

    -div(k grad T) = lambda (rho c) T     held boundaries T = 0, convection
                                          k dT/dn + h T = 0, the rest insulated

A temperature disturbance shaped like mode ``j`` decays as ``exp(-t /
tau_j)``, ``tau_j = 1 / lambda_j``.  The problem is built as ``solve``
builds it (:mod:`hatkernels.cli.problem`, problem files through
:func:`hatkernels.problemfile.read_problem`); :mod:`hatkernels.cli.modes_problem`
turns it into :func:`hatkernels.eigen.eigenmodes`' arguments and
:mod:`hatkernels.cli.modes_report` writes and prints the results.
"""

from __future__ import annotations

import argparse
import inspect
import textwrap
import time
import warnings

from hatkernels import io as kio
from hatkernels import problemfile
from hatkernels.block import BLOCK
from hatkernels.cli import modes_problem, modes_report
from hatkernels.cli.common import command_line, threads
from hatkernels.cli.options import UsageError, number, output
from hatkernels.cli.problem import REFINE_HINT, needs_refinement, read_mesh_option
from hatkernels.cli.progress import CompileNotice
from hatkernels.distributed.launch import ranks_from_environment
from hatkernels.eigen import METHODS, eigenmodes
from hatkernels.errors import ConvergenceError, InputError
from hatkernels.mesh import cuboid, rectangle
from hatkernels.scenarios import PLATE

__all__ = ["add_parser", "check", "run", "DEFAULT_COUNT", "DEFAULT_OUT"]

DEFAULT_COUNT = 6
DEFAULT_OUT = "hatkernels-modes"
#: How many mode pictures at most by default.
PICTURES = 6
_DEFAULTS = {name: p.default for name, p in inspect.signature(eigenmodes).parameters.items()}

EPILOG = f"""\
The problems are those of 'hatkernels solve' (see 'hatkernels solve --help'):

  the plate (default): aluminium 120 mm x 80 mm, k = {PLATE.conductivity:g} W/(m K),
    rho c = {PLATE.density:g} kg/m^3 x {PLATE.specific_heat:g} J/(kg K), all four edges held.
    Default mesh: the plate's coarse 15 x 10 cells of 8 mm refined
    {modes_problem.PLATE_REFINE} times ({modes_problem.PLATE_CELLS:,} triangles; a few seconds on 2 cores);
    --refine K or --cells N choose another.
  --scenario block: copper 64 mm x 48 mm x 8 mm, k = {BLOCK.conductivity:g} W/(m K),
    rho c = {BLOCK.density:g} kg/m^3 x {BLOCK.specific_heat:g} J/(kg K), the bottom face
    cooled by convection (h = {BLOCK.film:g} W/(m^2 K)), the rest insulated. Default: the
    4 mm cubes refined {modes_problem.BLOCK_REFINE} times ({modes_problem.BLOCK_CELLS:,} tetrahedra; about
    ten seconds on 2 cores).
  --scenario heated-insert, or PROBLEM.toml: a problem file; its materials need
    density and specific_heat. Held tags keep T = 0 in the modes, convection
    tags k dT/dn + h T = 0, flux tags and the rest are insulated. The file's
    [solver] and [output] tables are for 'solve' and are not used here;
    --refine overrides the file's refine.
  --mesh FILE: u = 0 on the whole boundary, constants --conductivity and
    --capacity (default 1 and 1); eigenvalues in the file's units
    (k / (capacity length^2)).

Sources, held temperatures and the coolant's temperature set the steady
state; they do not enter the modes. Writes modes.npz (values, decay times,
vectors (count, n_points), 0 at held points), summary.json, modes.png (the
first --pictures modes, 2-D meshes; matplotlib) and modes.vtu (meshio) into
--out, whole or not at all. Runs in one process (not under mpiexec).

CAUTION: results are engineering estimates and must be checked by a
qualified person against local codes and licensed practice."""


def add_parser(sub, common, names):
    """The ``modes`` subcommand's parser (``names``: the registered preconditioners)."""
    p = sub.add_parser(
        "modes", parents=[common], formatter_class=argparse.RawDescriptionHelpFormatter,
        help="natural thermal modes (decay rates and times) of the solve's problems",
        description=textwrap.fill(
            "Compute the slowest natural thermal modes of the heat-spreader plate (default), "
            "the block (--scenario block), a problem file (PROBLEM.toml, --scenario "
            "heated-insert) or a mesh file: -div(k grad T) = lambda (rho c) T; print each "
            "mode's decay rate lambda (1/s) and decay time tau = 1/lambda (s) and write "
            "modes.npz, summary.json, modes.png and modes.vtu into --out.", 79),
        epilog=EPILOG,
    )
    p.add_argument("problem", nargs="?", metavar="PROBLEM.toml",
                   help="a problem file (TOML); its materials need density and specific_heat")
    p.add_argument("--scenario", choices=("plate", "block", *problemfile.CASES),
                   help="the built-in problem: plate (2-D, the default), block (3-D), or a "
                        "packaged problem file: " + ", ".join(problemfile.CASES))
    size = p.add_mutually_exclusive_group()
    number(p, "--cells", int, group=size, minimum=1, metavar="NX",
           help="plate: cells along the 120 mm side instead of the refined coarse mesh (no "
                "refinement history: the multigrid is not available)")
    number(p, "--refine", int, minimum=0, metavar="K",
           help=f"refine a coarse mesh K times (plate: 8 mm cells, default "
                f"{modes_problem.PLATE_REFINE}; block: 4 mm cubes, default "
                f"{modes_problem.BLOCK_REFINE}; a mesh or problem file: its mesh, default 0 or "
                f"the file's)")
    size.add_argument("--mesh", metavar="FILE",
                      help="the modes of this mesh (.npz or a format meshio reads) with u = 0 "
                           "on its whole boundary")
    number(p, "--conductivity", float, positive=True, metavar="K",
           help="constant conductivity (W/(m K) on the plate and block; default 1 with --mesh)")
    number(p, "--capacity", float, positive=True, metavar="C",
           help="constant volumetric heat capacity rho c (J/(m^3 K) on the plate and block; "
                "default 1 with --mesh)")
    number(p, "--count", int, minimum=1, default=DEFAULT_COUNT, metavar="K",
           help=f"how many modes, slowest first (default {DEFAULT_COUNT})")
    number(p, "--pictures", int, minimum=0, metavar="N",
           help=f"modes drawn in modes.png (default: --count, at most {PICTURES})")
    p.add_argument("--method", choices=METHODS, default=_DEFAULTS["method"],
                   help=f"eigensolver (default {_DEFAULTS['method']}: shift-invert on small "
                        f"problems, lobpcg with multigrid on large ones)")
    p.add_argument("--preconditioner", choices=names,
                   help="preconditioner of lobpcg (default: multigrid on a refined mesh where "
                        "every part holds a point, else algebraic multigrid)")
    number(p, "--rtol", float, positive=True,
           help=f"estimated relative error of each eigenvalue at which lobpcg stops (default "
                f"{_DEFAULTS['rtol']:g})")
    number(p, "--maxiter", int, minimum=1, metavar="N",
           help=f"lobpcg iterations allowed (default {_DEFAULTS['maxiter']})")
    output(p, DEFAULT_OUT)
    p.set_defaults(func=run, source=None, dirichlet=None, film=None, coolant=None)
    return p


#: Options that apply to the plate only, and those a problem file replaces.
PLATE_ONLY = ("--cells",)
NOT_WITH_A_FILE = ("--mesh", "--cells", "--conductivity", "--capacity")


def check(args):
    """The options that do not go together; UsageError naming them."""
    prog = "hatkernels modes"
    see = f" (see '{prog} --help')"
    if args.problem is not None and args.scenario is not None:
        raise UsageError(f"PROBLEM.toml ({args.problem}) and --scenario both choose the "
                         f"problem; give one{see}")
    if args.mesh is not None and args.scenario is not None:
        raise UsageError(f"--mesh and --scenario both choose the problem; give one{see}")
    args.problem_file = (args.problem if args.problem is not None
                         else problemfile.case_file(args.scenario)
                         if args.scenario in problemfile.CASES else None)
    if args.problem_file is not None:
        what = (f"PROBLEM.toml ({args.problem})" if args.problem is not None
                else f"--scenario {args.scenario}")
        given = [f for f in NOT_WITH_A_FILE if getattr(args, f[2:]) is not None]
        if given:
            raise UsageError(f"{' and '.join(given)} cannot be combined with {what}: the "
                             f"problem file gives the mesh and the materials{see}")
    else:
        if args.mesh is None and args.cells is None and args.refine is None:
            args.refine = (modes_problem.BLOCK_REFINE if args.scenario == "block"
                           else modes_problem.PLATE_REFINE)
        if args.cells is not None and args.refine is not None:
            raise UsageError(f"--cells and --refine both set the mesh size; give one{see}")
        if args.cells is not None and (args.mesh is not None or args.scenario == "block"):
            where = "--mesh" if args.mesh is not None else "--scenario block"
            raise UsageError(f"--cells applies to the plate only, not to {where}{see}")
    pictures = min(args.count, PICTURES) if args.pictures is None else args.pictures
    if pictures > args.count:
        raise UsageError(f"--pictures {pictures} is more than the {args.count} modes asked "
                         f"for (--count){see}")
    args.pictures = pictures
    args.rtol = _DEFAULTS["rtol"] if args.rtol is None else args.rtol
    args.maxiter = _DEFAULTS["maxiter"] if args.maxiter is None else args.maxiter


def _warm_up(args, dim, cooled):
    """The same kind of eigenproblem on a tiny mesh, so that the kernels compile (or load)
    before the phases are timed: lobpcg unless shift-invert is asked for, in ``dim``
    dimensions, held or cooled (``cooled``) and refined or not as the real problem is (the
    default preconditioners differ)."""
    if args.refine:
        grid = (rectangle(4, 4) if dim == 2 else cuboid(2, 2, 2)).refine().refine()
    else:
        grid = rectangle(16, 16) if dim == 2 else cuboid(4, 4, 4)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            eigenmodes(grid, 2, method="shift-invert" if args.method == "shift-invert"
                       else "lobpcg", preconditioner=args.preconditioner, rtol=1e-6,
                       **({"dirichlet_on": (), "robin": (1.0, 0.0)} if cooled else {}))
    except (InputError, ConvergenceError):
        pass  # the real problem reports its own errors


def _solve(args, modal, progress):
    """The library's eigenmodes of ``modal``; a refusal for want of refinement says what to do."""
    progress.phase(f"modes: {args.count} slowest modes ({args.method})")
    try:
        return eigenmodes(modal.mesh, args.count, **modal.arguments, method=args.method,
                          rtol=args.rtol, maxiter=args.maxiter,
                          preconditioner=args.preconditioner,
                          memory_check=getattr(args, "memory_check", True))
    except InputError as exc:
        if (modal.mesh.refinement is None and args.preconditioner is not None
                and needs_refinement(args)):
            raise InputError(f"{exc}{REFINE_HINT}") from exc
        raise


def run(args, progress):
    """Run ``hatkernels modes``; return the exit code."""
    if ranks_from_environment() > 1:
        raise InputError("hatkernels modes runs in one process; run it without mpiexec")
    check(args)
    pf = None
    if args.problem_file is not None:  # a bad file fails before any compiling
        progress.phase(f"problem: reading {args.problem_file}")
        pf = problemfile.read_problem(args.problem_file, insulated=True)
        if args.refine is None:
            args.refine = pf.refine or 0
    command = command_line(args)
    timings = {}
    with kio.output_directory(args.out, force=args.force) as tmp, threads(args.threads):
        dim, cooled = modes_problem.kind(args, pf)
        arrays, file_dim = read_mesh_option(args, progress)
        dim = file_dim or dim
        progress.phase("kernels: loading compiled kernels (or compiling them)")
        with CompileNotice(progress) as notice:
            _warm_up(args, dim, cooled)
        timings["kernels"] = notice.seconds
        t0 = time.perf_counter()
        modal = (modes_problem.from_file(args, pf, progress) if pf is not None
                 else modes_problem.from_options(args, progress, arrays))
        timings["mesh"] = time.perf_counter() - t0
        modes = _solve(args, modal, progress)
        summary = modes_report.summary(args, modal, modes, timings, command)
        modes_report.write(tmp, modal, modes, summary, args.pictures, progress, args.out)
    progress.phase("done")
    progress.close()
    print(modes_report.report(modal, summary, args.out))
    return 0
