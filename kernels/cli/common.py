"""Pieces every subcommand shares: the program name, versions, record headers, threads."""

from __future__ import annotations

import datetime
import importlib.metadata
import platform
import shlex
import sys

from hatkernels.distributed.launch import rank_from_environment
from hatkernels.errors import InputError

__all__ = [
    "PROG",
    "OPTIONAL",
    "one_line",
    "error",
    "not_installed",
    "versions",
    "base_record",
    "command_line",
    "threads",
]

PROG = "hatkernels"
#: Optional libraries and the extra that installs each.
OPTIONAL = {"matplotlib": "plot", "meshio": "io"}


def one_line(text):
    """``text`` with its whitespace, newlines included, folded into single spaces."""
    return " ".join(str(text).split())


def error(text):
    """``hatkernels: error: text`` on stderr, one line.

    Under ``mpiexec`` only rank 0 writes it: every rank meets the same bad
    option or input, and one line is enough.
    """
    if rank_from_environment() != 0:
        return
    sys.stderr.write(f"{PROG}: error: {one_line(text)}\n")
    sys.stderr.flush()


def not_installed(what, library):
    """Why ``what`` was not written: the optional ``library`` is missing, and how to add it."""
    return f"{what} ({library} is not installed: pip install '{PROG}[{OPTIONAL[library]}]')"


def versions():
    """Versions of Python, the libraries (None when not installed) and hatkernels."""
    out = {"python": platform.python_version()}
    for dist in ("numpy", "scipy", "numba", "pyamg", *OPTIONAL):
        try:  # the installed distribution's version, without importing it
            out[dist] = importlib.metadata.version(dist)
        except importlib.metadata.PackageNotFoundError:
            out[dist] = None
    import hatkernels

    out["hatkernels"] = hatkernels.__version__
    return out


def base_record(command):
    """The head of every JSON record the command writes: who wrote it, when, from what."""
    import hatkernels

    return {
        "generator": f"{PROG} {hatkernels.__version__}",
        "created": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
        "command": command,
    }


def command_line(args):
    """The command as typed (``hatkernels solve --cells 48``), for the records."""
    return shlex.join([PROG, args.command] + args.argv)


class _NoThreads:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


def threads(n):
    """A context running numba with ``n`` threads (``--threads``); all of them for None.

    Raises InputError when ``n`` is above numba's maximum in this process.
    """
    if n is None:
        return _NoThreads()
    import numba

    from hatkernels._jit import threads as numba_threads

    top = numba.config.NUMBA_NUM_THREADS
    if not 1 <= n <= top:
        raise InputError(f"--threads {n}: numba has {top} threads here (1..{top}); set "
                         f"NUMBA_NUM_THREADS before starting to allow more")
    return numba_threads(n)
