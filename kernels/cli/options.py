"""The command's option parsing, shared by every subcommand: the parser class, numeric
options with bounds checked after parsing, and ``--out``/``--force``.

Kept apart from :mod:`hatkernels.cli` so that a subcommand's module can add its own
options without importing the package that imports it.
"""

from __future__ import annotations

import argparse

__all__ = ["UsageError", "Parser", "converter", "number", "output"]


class UsageError(Exception):
    """Bad command-line usage (exit 2)."""


class Parser(argparse.ArgumentParser):
    """Usage errors raise instead of exiting; ``limits`` holds the numeric options' bounds."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.limits = {}

    def error(self, message):
        raise UsageError(f"{message} (see '{self.prog} --help')")


def converter(kind):
    what = "an integer" if kind is int else "a number"

    def convert(text):
        try:
            return kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"not {what}: {text!r}") from None

    convert.__name__ = "integer" if kind is int else "number"
    return convert


def number(parser, flag, kind, *, group=None, minimum=None, positive=False, **kwargs):
    """Add a numeric option (to ``group`` of ``parser`` if given); :func:`hatkernels.cli._check` checks its bounds."""
    action = (group or parser).add_argument(flag, type=converter(kind), **kwargs)
    limits = {"minimum": minimum}
    if kind is float:
        limits["positive"] = positive
    parser.limits[action.dest] = (flag, kind, limits)
    return action


def output(parser, default, later=False):
    """--out and --force, the same for every command that writes a directory (``later``: the
    default is filled after parsing, when no problem file gives one)."""
    parser.add_argument("--out", default=None if later else default, metavar="DIR",
                        help=f"output directory, written whole or not at all (default {default}"
                             f"{'; a problem file may name one' if later else ''})")
    parser.add_argument("--force", action="store_true",
                        help="replace an existing output directory written by hatkernels")
