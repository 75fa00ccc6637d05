"""The ``hatkernels`` command: solve, verify, bench and info, built on the library.

This module parses and checks the options and hands them to one module per
subcommand (:mod:`~hatkernels.cli.solve`, :mod:`~hatkernels.cli.verify`,
:mod:`~hatkernels.cli.bench`, :mod:`~hatkernels.cli.info`); it holds no
logic of its own.

Exit codes (:data:`EXIT`): 0 success; 2 bad usage or bad input (unknown
option, missing or invalid mesh file, a NaN, an output that exists without
``--force``, a missing parent directory); 1 when a solve does not converge
(or ``verify`` does not see the expected rates), out of memory, and internal
errors; 73 when the output cannot be created (its parent is a file, is not
writable, or is on a read-only file system; sysexits.h's EX_CANTCREAT);
74 when writing fails part way (disk full, a file-size limit; sysexits.h's
EX_IOERR); 130 on Ctrl-C (SIGINT), as shells report it.  Errors are one
line on stderr, ``hatkernels: error: ...``; ``--debug`` adds the traceback.
On every error the output (``--out``, ``bench --json``) is as it was
before: no partial directory, no temporary file.  SIGXFSZ is ignored, so
that a file-size limit (``ulimit -f``) is reported as an error rather than
killing the process.  Progress goes to stderr (``--quiet`` silences it);
results to stdout.
"""

from __future__ import annotations

import argparse
import contextlib
import errno
import signal
import sys
import textwrap
import threading
import traceback
import warnings

from hatkernels import PRECONDITIONERS
from hatkernels.checks import integer_option, real_option
from hatkernels.cli import bench, info, modes, solve, verify
from hatkernels.cli import transient as _transient
from hatkernels.cli.common import PROG, error
from hatkernels.cli.options import Parser as _Parser
from hatkernels.cli.options import UsageError
from hatkernels.cli.options import converter as _converter
from hatkernels.cli.options import number as _number
from hatkernels.cli.options import output as _output
from hatkernels.cli.outputs import identity as _identity
from hatkernels.cli.progress import Progress
from hatkernels.errors import ConvergenceError, InputError
from hatkernels.io import OutputNotWritable
from hatkernels.problemfile import CASES, case_file

__all__ = ["main", "build_parser", "UsageError", "EXIT"]

#: The exit codes, by what went wrong.
EXIT = {"ok": 0, "failed": 1, "usage": 2, "cannot-create": 73, "write-failed": 74,
        "interrupted": 130}
#: Why a write may fail part way, said in words a user can act on.
WRITE_HINTS = {errno.EFBIG: "a file-size limit, see ulimit -f",
               errno.ENOSPC: "the disk is full", errno.EDQUOT: "the disk quota is used up"}

SCENARIO_HELP = """\
The built-in scenario (invented demonstration data): a heat-spreader plate
120 mm x 80 mm, 2 mm thick, aluminium, conductivity 237 W/(m K) (pure
aluminium at 300 K; Incropera and DeWitt, Fundamentals of Heat and Mass
Transfer, table A.1; value from memory), under a 20 mm x 20 mm processor
dissipating 15 W centred at (40 mm, 45 mm) and a 15 mm x 10 mm voltage
regulator dissipating 5 W centred at (90 mm, 25 mm); all four edges held at
the coolant temperature 25 degC. Steady in-plane conduction
-div(k grad T) = q, q = P / (footprint area x thickness) in W/m^3, SI units.
The source is set per triangle and rescaled per component so that the
integrated power is exactly 15 W and 5 W on any mesh. The default mesh has
960 x 640 cells (0.125 mm, 1,228,800 triangles), which line up with the
footprints.

--scenario block (invented demonstration data): a copper heat-spreader block
64 mm x 48 mm x 8 mm, conductivity 401 W/(m K) (pure copper at 300 K;
Incropera and DeWitt, table A.1; value from memory), with three heat-source
regions embedded at z = 5..7 mm: a main die 12 mm x 12 mm (60 W), a second
die 8 mm x 8 mm (25 W) and a regulator 10 mm x 4 mm (10 W); the bottom face
cooled by convection, h = 5000 W/(m^2 K) to coolant at 25 degC (Robin), the
other faces insulated. The mesh: 16 x 12 x 2 cubes of 4 mm, six tetrahedra
each, refined --refine K times (default 4: 9,437,184 tetrahedra of 0.25 mm
cubes). --source replaces the regions by a uniform q, --film and --coolant
the cooling.

--scenario heated-insert (invented demonstration data, 2-D): an aluminium
mounting plate 100 mm x 20 mm in cross-section (k = 177 W/(m K)) with a
stainless steel insert 20 mm x 10 mm (k = 14.9 W/(m K)) carrying a heater of
1000 W per metre of length, its bottom face on a cold clamp at 20 degC from
x = 0 to 25 mm, its top face cooled by air (h = 10 W/(m^2 K), 25 degC), the
rest insulated; read from a problem file shipped with hatkernels (the report
says where, to copy it; conductivities from Incropera and DeWitt, table A.1,
values from memory).

PROBLEM.toml: a problem file (TOML): a mesh file with region and boundary
tags, a material per region, a condition per boundary tag (held temperature,
heat flux, or convection), solver and output settings; see
docs/problem-files.md. It excludes --mesh, --scenario and the options that
set a scenario's data (--cells, --source, --conductivity, --dirichlet,
--film, --coolant); --refine, --preconditioner, --rtol, --maxiter and --out
override the file.

With --mesh FILE the problem is -div(k grad u) = Q on that mesh (triangles,
or tetrahedra read through meshio) with u = G on its whole boundary
(constants --conductivity, --source, --dirichlet; default 1, 1, 0; units
those of the file).

CAUTION: results are engineering estimates and must be checked by a
qualified person against local codes and licensed practice."""

#: ``amg`` names another registered preconditioner: bench leaves it out by default.
ALIASES = ("amg",)


def _check(parser, args):
    """The checks of the options that parsing alone cannot make; UsageError on the first failing."""
    command = parser.commands[args.command]
    limits = {"threads": ("--threads", int, {"minimum": 1}), **command.limits}
    try:
        for dest, (flag, kind, bounds) in limits.items():
            value = getattr(args, dest)
            if value is not None:
                (integer_option if kind is int else real_option)(value, flag, **bounds)
    except InputError as exc:
        raise UsageError(f"{exc} (see '{command.prog} --help')") from None
    if args.command == "solve":
        _check_scenario(args, command.prog)
    if args.command == "bench":
        for name in args.preconditioners:
            if name not in PRECONDITIONERS:
                raise UsageError(f"unknown preconditioner {name!r}; choose from "
                                 f"{', '.join(PRECONDITIONERS)}")


#: Options that apply to one scenario only: option -> (dest, the scenario it belongs to).
SCENARIO_ONLY = {"--cells": ("cells", "plate"), "--dirichlet": ("dirichlet", "plate"),
                 "--film": ("film", "block"), "--coolant": ("coolant", "block")}


#: The solve settings a problem file may give, and their defaults when neither it nor the
#: command line does.
SOLVE_DEFAULTS = {"preconditioner": "amg", "rtol": 1e-10, "maxiter": None,
                  "out": "hatkernels-out"}
#: Options that set a scenario's mesh or data, which a problem file gives itself.
NOT_WITH_A_FILE = ("--mesh", "--cells", "--source", "--conductivity", "--dirichlet", "--film",
                   "--coolant")


def _check_problem_file(args, prog):
    """A problem file (PROBLEM.toml or a packaged one) excludes the options that set a
    scenario's mesh or data; the others' defaults wait until the file is read."""
    args.defaults = dict(SOLVE_DEFAULTS)
    args.given = {key for key in SOLVE_DEFAULTS if getattr(args, key, None) is not None}
    if args.problem is not None and args.scenario is not None:
        raise UsageError(f"PROBLEM.toml ({args.problem}) and --scenario both choose the "
                         f"problem; give one (see '{prog} --help')")
    what = (f"PROBLEM.toml ({args.problem})" if args.problem is not None
            else f"--scenario {args.scenario}" if args.scenario in CASES else None)
    if what is None:
        args.problem_file = None
        for key, value in SOLVE_DEFAULTS.items():
            if getattr(args, key) is None:
                setattr(args, key, value)
        return
    given = [flag for flag in NOT_WITH_A_FILE if getattr(args, flag[2:]) is not None]
    if given:
        raise UsageError(f"{' and '.join(given)} cannot be combined with {what}: the problem "
                         f"file gives the mesh and the data (see '{prog} --help')")
    args.problem_file = args.problem if args.problem is not None else case_file(args.scenario)


def _check_scenario(args, prog):
    """The solve options that do not go together; UsageError naming the option."""
    _check_problem_file(args, prog)
    _transient.check(args, prog)
    if args.problem_file is not None:
        return
    if args.cells is not None and args.refine is not None:
        raise UsageError(f"--cells and --refine both set the mesh size; give one "
                         f"(see '{prog} --help')")
    if args.mesh is not None and args.scenario is not None:
        raise UsageError(f"--mesh and --scenario both choose the problem; give one "
                         f"(see '{prog} --help')")
    scenario = "mesh" if args.mesh is not None else args.scenario or "plate"
    for flag, (dest, owner) in SCENARIO_ONLY.items():
        if getattr(args, dest) is None or owner == scenario:
            continue
        if scenario == "mesh" and flag == "--dirichlet":
            continue
        what = "--mesh" if scenario == "mesh" else f"--scenario {scenario}"
        raise UsageError(f"{flag} applies to --scenario {owner} only, not to {what} "
                         f"(see '{prog} --help')")


def _add_solve(sub, common, names):
    p = sub.add_parser(
        "solve", parents=[common], formatter_class=argparse.RawDescriptionHelpFormatter,
        help="solve a built-in heat-spreader scenario (or a mesh file) and write results",
        description=textwrap.fill(
            "Solve steady conduction on the built-in heat-spreader plate (default: 1,228,800 "
            "triangles), the heat-spreader block (--scenario block: 9,437,184 tetrahedra), "
            "a problem file (PROBLEM.toml) or a mesh file; print a summary and write "
            "solution.npz, summary.json, "
            "solution.png, residuals.png and solution.vtu (with meshio) into --out.", 79),
        epilog=SCENARIO_HELP,
    )
    p.add_argument("problem", nargs="?", metavar="PROBLEM.toml",
                   help="a problem file (TOML: mesh file, materials by region, conditions by "
                        "boundary tag); see below")
    p.add_argument("--scenario", choices=("plate", "block", *CASES),
                   help="the built-in scenario: plate (2-D, the default), block (3-D), or a "
                        "problem file shipped with hatkernels: " + ", ".join(CASES))
    size = p.add_mutually_exclusive_group()
    _number(p, "--cells", int, group=size, minimum=1, metavar="NX",
            help="plate: cells along the 120 mm side (the 80 mm side is scaled); "
                 "default 960 (0.125 mm cells)")
    _number(p, "--refine", int, minimum=0, metavar="K",
            help="refine a coarse mesh K times (the plate: 15 x 10 cells of 8 mm, K=6 gives "
                 "its default size; the block: 4 mm cubes, default K=4; with --mesh: the "
                 "file's mesh)")
    size.add_argument("--mesh", metavar="FILE",
                      help="solve on this mesh instead: .npz with arrays points and triangles "
                           "(or tetrahedra), or any format meshio reads (io extra; triangles "
                           "or tetrahedra); Dirichlet on the whole boundary, constant source")
    _number(p, "--source", float, metavar="Q",
            help="constant source instead of the components or heat sources (W/m^3 on "
                 "the plate and the block; default 1 with --mesh)")
    _number(p, "--conductivity", float, positive=True, metavar="K",
            help="constant conductivity (W/(m K): default 237 on the plate, 401 on the "
                 "block; default 1 with --mesh)")
    _number(p, "--dirichlet", float, metavar="G",
            help="value held on the boundary (coolant temperature in degC on the "
                 "plate, default 25; default 0 with --mesh)")
    _number(p, "--film", float, positive=True, metavar="H",
            help="block: film coefficient of the cooled bottom face, W/(m^2 K) (default 5000)")
    _number(p, "--coolant", float, metavar="T",
            help="block: coolant temperature, degC (default 25)")
    p.add_argument("--preconditioner", choices=names,
                   help="preconditioner for conjugate gradients (default: amg)")
    _number(p, "--rtol", float, positive=True,
            help="relative residual tolerance (default 1e-10)")
    p.add_argument("--no-memory-check", dest="memory_check", action="store_false",
                   help="solve even when the estimated peak memory exceeds what is available "
                        "(the estimate comes from measured bytes per point; by default such "
                        "a solve is refused before it starts)")
    _number(p, "--maxiter", int, minimum=1, metavar="N",
            help="at most N iterations (default 10 x unknowns); not converging exits 1")
    _output(p, "hatkernels-out", later=True)
    _transient.add_options(p)
    p.set_defaults(func=solve.run)
    return p


def _add_verify(sub, common, names):
    v = sub.add_parser(
        "verify", parents=[common],
        help="convergence study against a manufactured solution",
        description="Solve -lap u = 2 pi^2 sin(pi x) sin(pi y) on the unit square (u = 0 on the "
                    "boundary, exact u = sin(pi x) sin(pi y)) on successive uniform "
                    "refinements; print h, L2 and H1 errors and observed rates (expected 2 "
                    "and 1 for linear elements: Ciarlet, The Finite Element Method for "
                    "Elliptic Problems, 1978); write convergence.png and verify.json.",
        epilog="Exits 1 when the finest rates are not within 0.2 of 2 and 1.",
    )
    _number(v, "--levels", int, minimum=2, default=6, help="number of meshes (default 6)")
    _number(v, "--start", int, minimum=2, default=8, metavar="N",
            help="cells per side of the coarsest mesh (default 8)")
    v.add_argument("--preconditioner", choices=names, default="amg")
    _number(v, "--rtol", float, positive=True, default=1e-10)
    _output(v, "hatkernels-verify")
    v.set_defaults(func=verify.run)
    return v


def _add_bench(sub, common, names):
    b = sub.add_parser(
        "bench", parents=[common],
        help="compare assembly strategies and preconditioners on this machine",
        description="Assemble the stiffness matrix of the unit square with --cells cells per "
                    "side (or of the mesh of --mesh FILE) by each strategy (triplets, csr "
                    "first call, csr numeric) and solve -lap u = 1 with u = 0 on the "
                    "boundary with each preconditioner; print times, ratios and the "
                    "measured memory bandwidth. Speeds are for this machine and run only.",
    )
    size = b.add_mutually_exclusive_group()
    _number(b, "--cells", int, group=size, minimum=2, metavar="N",
            help=f"cells per side of the unit square (default {bench.DEFAULT_CELLS}: "
                 f"{2 * bench.DEFAULT_CELLS**2:,} triangles)")
    size.add_argument("--mesh", metavar="FILE",
                      help="run on this mesh instead: .npz with arrays points and triangles (or "
                           "tetrahedra), or any format meshio reads (io extra); the problem is "
                           "-div grad u = 1 with u = 0 on the whole boundary; preconditioners "
                           "that need a mesh made by refinement are skipped")
    _number(b, "--repeat", int, minimum=1, default=3, help="best of R (default 3)")
    b.add_argument("--preconditioners", type=lambda s: [x for x in s.split(",") if x],
                   metavar="A,B,...", default=[n for n in names if n not in ALIASES],
                   help=f"comma-separated names (default: all of {', '.join(names)} but amg, "
                        f"which is an alias)")
    _number(b, "--rtol", float, positive=True, default=1e-8)
    _number(b, "--bandwidth-mb", int, minimum=1, default=512, metavar="MB",
            help="array size for the bandwidth measurement (default 512 MiB)")
    b.add_argument("--json", metavar="FILE",
                   help="also write the results as JSON, whole or not at all")
    b.add_argument("--force", action="store_true", help="replace an existing --json file")
    b.set_defaults(func=bench.run)
    return b


def _add_info(sub, common, names):
    i = sub.add_parser(
        "info", parents=[common], help="versions, threads and the numba cache",
        description="Print the versions of Python and the libraries, the numba thread count "
                    "and threading layer, and where compiled kernels are cached.",
    )
    i.add_argument("--json", action="store_true", help="print JSON")
    i.set_defaults(func=info.run)
    return i


def build_parser():
    """The argument parser of the ``hatkernels`` command (``.commands``: its subparsers)."""
    common = _Parser(add_help=False)
    common.add_argument("--quiet", action="store_true", help="no progress on stderr")
    common.add_argument("--debug", action="store_true",
                        help="show tracebacks and library warnings in full")
    common.add_argument("--threads", type=_converter(int), metavar="N",
                        help="numba threads (default: all, NUMBA_NUM_THREADS)")
    names = tuple(PRECONDITIONERS)

    parser = _Parser(
        prog=PROG,
        description="Fast, verified linear (P1) finite elements on triangle and tetrahedron "
                    "meshes: solve the built-in heat-spreader scenarios or a mesh file, compute "
                    "their natural thermal modes, verify convergence, "
                    "benchmark this machine, show versions.",
        epilog="Run 'hatkernels COMMAND --help' for each command. Exit codes: 0 success, "
               "1 a solve that does not converge, 2 bad usage or input, 73 the output "
               "cannot be created, 74 writing failed (disk full, file-size limit), "
               "130 interrupted (Ctrl-C); on any error the output is left as it was.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    parser.commands = {name: add(sub, common, names) for name, add in (
        ("solve", _add_solve), ("modes", modes.add_parser), ("verify", _add_verify),
        ("bench", _add_bench), ("info", _add_info))}
    return parser


@contextlib.contextmanager
def _file_size_limit_as_error():
    """Ignore SIGXFSZ while the command runs, so that going over ``ulimit -f`` raises EFBIG.

    By default the signal kills the process, with no message and with the
    temporary files left behind.  Handlers can only be set from the main
    thread; elsewhere (a test calling :func:`main` from a thread) nothing changes.
    """
    if not hasattr(signal, "SIGXFSZ") or threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGXFSZ, previous)


def _target(args):
    """The output the command was asked to write (``--out`` or ``bench --json``), or None."""
    if args.command in ("solve", "verify", "modes"):
        return args.out
    return args.json if args.command == "bench" else None


def _left_as_it_was(args):
    target = _target(args)
    if target is None:
        return "nothing written"
    if _identity(target) != args.before:  # the interrupt came after the final rename
        return f"{target} was written whole before the interrupt"
    return f"{target} is as it was before" if args.before else f"nothing written to {target}"


def main(argv=None):
    """Run the command; return the exit code (see :data:`EXIT`)."""
    argv = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
        if args.command is None:
            raise UsageError("choose a command: solve, modes, verify, bench or info "
                             "(see 'hatkernels --help')")
        _check(parser, args)
    except UsageError as exc:
        error(exc)
        return EXIT["usage"]
    args.argv = argv[argv.index(args.command) + 1:] if args.command in argv else []
    args.before = None if _target(args) is None else _identity(_target(args))
    progress = Progress(quiet=args.quiet)

    def fail(code, text):
        progress.close()
        if args.debug:
            traceback.print_exc()
        error(text)
        return EXIT[code]

    with warnings.catch_warnings(), _file_size_limit_as_error():
        if not args.debug:
            warnings.showwarning = progress.warning
        try:
            return args.func(args, progress)
        except UsageError as exc:
            return fail("usage", exc)
        except ConvergenceError as exc:
            text = str(exc).removeprefix("solve: ").removeprefix("not converged: ")
            return fail("failed", f"the solve did not converge: {text}; try a larger "
                                  f"--maxiter, a looser --rtol or another --preconditioner")
        except OutputNotWritable as exc:
            return fail("cannot-create", exc)
        except InputError as exc:
            return fail("usage", exc)
        except KeyboardInterrupt:
            return fail("interrupted", f"interrupted; {_left_as_it_was(args)}")
        except MemoryError:
            return fail("failed", f"out of memory; try a smaller mesh (--cells, --refine); "
                                  f"{_left_as_it_was(args)}")
        except OSError as exc:
            why = exc.strerror or str(exc)
            if exc.errno in WRITE_HINTS:
                why = f"writing failed: {why} ({WRITE_HINTS[exc.errno]})"
            elif getattr(exc, "filename", None):
                why += f": {exc.filename}"
            return fail("write-failed", f"{why}; {_left_as_it_was(args)}")
        except Exception as exc:
            return fail("failed", f"internal error: {type(exc).__name__}: {exc}"
                        + ("" if args.debug else " (run with --debug for the traceback)"))
        finally:
            progress.close()
