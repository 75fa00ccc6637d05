"""Writing files whole or not at all: one file, a JSON record, a directory of outputs.

Every writer goes through :func:`atomic_file` (a temporary file in the same
directory, then :func:`os.replace`), and a command's set of output files
through :func:`output_directory` (a temporary directory next to the target,
renamed into place), so that a failure or an interrupt never leaves a
half-written file, a partial directory or a temporary behind.  The public
names are re-exported by :mod:`hatkernels.io`.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import tempfile
import threading

from hatkernels.errors import InputError

__all__ = [
    "MARKER_FILES",
    "OutputError",
    "OutputNotWritable",
    "atomic_file",
    "check_output_directory",
    "check_output_file",
    "output_directory",
    "write_json",
]

#: Files that mark a directory as a hatkernels output (``--force`` replaces only those).
MARKER_FILES = ("summary.json", "verify.json")
GENERATOR = "hatkernels"


class OutputError(InputError):
    """An output path cannot be used: it exists, or its parent directory is missing."""


class OutputNotWritable(OutputError):
    """An output cannot be created where asked: the parent is not a writable directory.

    Raised before anything is written (from the checks, or when creating the
    temporary file or directory fails), so nothing is left behind.
    """


def _umask():
    mask = os.umask(0)
    os.umask(mask)
    return mask


class _InterruptsHeld:
    """Hold SIGINT for the length of a block; an interrupt that came meanwhile is raised after.

    A pair of renames or the removal of a temporary must not be cut in half
    by Ctrl-C, or a partial output or a temporary would be left behind.
    Blocking the signal (``pthread_sigmask``) is not enough: any thread
    (numba's, the progress clock) may receive it and Python then runs the
    handler in the main thread anyway; so the Python-level handler is
    swapped for one that only records the signal.  When the block raises,
    that exception goes on and a held interrupt is dropped (the command is
    failing already); otherwise a held interrupt is delivered at the end.
    Outside the main thread (where handlers cannot be set) this does nothing.
    """

    def __enter__(self):
        self.pending = []
        self.previous = None
        if threading.current_thread() is threading.main_thread():
            self.previous = signal.getsignal(signal.SIGINT)
            if callable(self.previous):  # SIG_IGN or SIG_DFL: nothing to defer
                signal.signal(signal.SIGINT, lambda signum, frame: self.pending.append(frame))
            else:
                self.previous = None
        return self

    def __exit__(self, kind, value, tb):
        if self.previous is not None:
            signal.signal(signal.SIGINT, self.previous)
            if self.pending and kind is None:
                self.previous(signal.SIGINT, self.pending[0])
        return False


def _temporary(make, what, directory):
    """Create a temporary with ``make()``; a failure is an :class:`OutputNotWritable` naming it."""
    try:
        return make()
    except OSError as exc:
        raise OutputNotWritable(f"cannot write {what}: cannot create a file in {directory} "
                                f"({exc.strerror or exc})") from None


@contextlib.contextmanager
def atomic_file(path, suffix=""):
    """Yield a temporary path next to ``path``; on success move it onto ``path``.

    The temporary file is removed when the body raises (anything, including
    KeyboardInterrupt), so ``path`` is either the complete new file or
    untouched; an interrupt during the final rename or the removal is held
    until they are done.  ``suffix`` is appended to the temporary name, for
    writers that choose a format by extension.

    Raises
    ------
    OutputNotWritable
        The temporary file cannot be created next to ``path``.
    """
    path = os.fspath(path)
    directory = os.path.dirname(os.path.abspath(path))
    tmp = None
    try:
        with _InterruptsHeld():
            fd, tmp = _temporary(
                lambda: tempfile.mkstemp(prefix=f".{os.path.basename(path)}.tmp-",
                                         suffix=suffix, dir=directory), path, directory)
            os.close(fd)
        yield tmp
        with _InterruptsHeld():
            os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the usual mode
            os.replace(tmp, path)
    except BaseException:
        if tmp is not None:
            with _InterruptsHeld(), contextlib.suppress(OSError):
                os.unlink(tmp)
        raise


def write_json(path, data):
    """Write ``data`` as indented JSON, atomically; return ``path``."""
    text = json.dumps(data, indent=2, sort_keys=False, allow_nan=False) + "\n"
    with atomic_file(path) as tmp, open(tmp, "w", encoding="utf-8") as f:
        f.write(text)
    return path


def _is_hatkernels_output(directory):
    try:
        names = os.listdir(directory)
    except OSError:
        return False
    if not names:
        return True
    for marker in MARKER_FILES:
        if marker in names:
            try:
                with open(os.path.join(directory, marker), encoding="utf-8") as f:
                    data = json.load(f)
            except (OSError, ValueError):
                continue
            if isinstance(data, dict) and str(data.get("generator", "")).startswith(GENERATOR):
                return True
    return False


def _check_parent(path):
    parent = os.path.dirname(path)
    if not os.path.lexists(parent):
        raise OutputError(f"cannot write {path}: directory {parent} does not exist")
    if not os.path.isdir(parent):
        raise OutputNotWritable(f"cannot write {path}: {parent} is not a directory")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputNotWritable(f"cannot write {path}: directory {parent} is not writable")


def check_output_directory(path, *, force=False):
    """Check that ``path`` can receive a command's output; return it as an absolute path.

    Raises
    ------
    OutputError
        ``path`` exists and ``force`` is false; it exists and is not a
        directory; it exists but does not look like hatkernels output (not
        empty and without a ``summary.json`` or ``verify.json`` written by
        hatkernels), which ``force`` never replaces; or its parent directory
        is missing.
    OutputNotWritable
        The parent exists but is not a directory, or is not writable (as
        far as :func:`os.access` can tell: for root it says yes, and the
        failure comes when the directory is created).
    """
    path = os.path.abspath(os.fspath(path))
    if os.path.lexists(path):
        if not os.path.isdir(path) or os.path.islink(path):
            raise OutputError(f"output {path} exists and is not a directory; choose another --out")
        if not force:
            raise OutputError(f"output directory {path} exists; use --force to replace it "
                              f"or choose another --out")
        if not _is_hatkernels_output(path):
            raise OutputError(f"refusing to replace {path}: it is not empty and does not "
                              f"look like hatkernels output (no summary.json or verify.json "
                              f"written by hatkernels)")
    _check_parent(path)
    return path


def check_output_file(path, *, force=False, option="--json"):
    """Check that the file ``path`` may be written (replaced only with ``force``); return it.

    Raises
    ------
    OutputError
        ``path`` exists and ``force`` is false, or it is a directory; or its
        parent directory is missing.
    OutputNotWritable
        The parent exists but is not a writable directory.
    """
    path = os.path.abspath(os.fspath(path))
    if os.path.isdir(path):
        raise OutputError(f"{option} {path} is a directory; give a file name")
    if os.path.lexists(path) and not force:
        raise OutputError(f"{option} {path} exists; use --force to replace it or choose "
                          f"another file")
    _check_parent(path)
    return path


@contextlib.contextmanager
def output_directory(path, *, force=False):
    """Yield a temporary directory; on success it becomes ``path``, complete.

    The temporary directory is created next to ``path`` (same file system,
    so the final rename is atomic).  On any exception, KeyboardInterrupt
    included, it is removed and ``path`` is left as it was; an interrupt
    during the final renames or the removal is held until they are done.
    With ``force`` an existing hatkernels output at ``path`` is replaced: it
    is renamed aside, the new directory renamed into place, then the old one
    deleted; between the two renames ``path`` briefly does not exist (POSIX
    has no portable atomic swap of directories), and if the second rename
    fails the old directory is put back.

    Raises
    ------
    OutputError, OutputNotWritable
        As :func:`check_output_directory`; OutputNotWritable also when the
        temporary directory cannot be created.
    """
    path = check_output_directory(path, force=force)
    parent, name = os.path.split(path)
    tmp = None
    try:
        with _InterruptsHeld():
            tmp = _temporary(lambda: tempfile.mkdtemp(prefix=f".{name}.tmp-", dir=parent),
                             path, parent)
        os.chmod(tmp, 0o777 & ~_umask())
        yield tmp
        with _InterruptsHeld():
            check_output_directory(path, force=force)  # it may have appeared meanwhile
            if os.path.lexists(path):
                old = tempfile.mkdtemp(prefix=f".{name}.old-", dir=parent)
                os.rmdir(old)
                os.rename(path, old)
                try:
                    os.rename(tmp, path)
                except BaseException:
                    os.rename(old, path)
                    raise
                shutil.rmtree(old, ignore_errors=True)
            else:
                os.rename(tmp, path)
    except BaseException:
        if tmp is not None:
            with _InterruptsHeld():
                shutil.rmtree(tmp, ignore_errors=True)
        raise
