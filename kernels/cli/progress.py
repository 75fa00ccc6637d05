"""What the command says on stderr while it works: phases, CG iterations, compiling.

Progress goes to stderr (``--quiet`` silences it, never warnings); results go
to stdout.

A private test hook, inert unless set: with the environment variable
``_HATKERNELS_TEST_PAUSE=PREFIX`` (or ``PREFIX@SECONDS``, default 60) the
command, on starting a phase whose text begins with ``PREFIX`` (such as
``write: solution.png``), writes ``hatkernels: test pause in "<phase>"`` on
stderr (even with ``--quiet``) and sleeps, so that a test can send a signal
while the command is in that phase (tests/test_cli.py does, for Ctrl-C).
"""

from __future__ import annotations

import os
import sys
import threading
import time

from hatkernels.cli import cache
from hatkernels.cli.common import PROG

__all__ = [
    "PAUSE_VARIABLE",
    "COMPILE_ESTIMATE",
    "ITERATION_REPORT_SECONDS",
    "SLOW_FIRST_CALL",
    "CompileNotice",
    "IterationReport",
    "Progress",
]

#: Seconds the first compiled call may take before it is announced as compiling.
SLOW_FIRST_CALL = 2.0
#: Cold compile of the kernels a solve uses, measured on the development machine (2 cores).
COMPILE_ESTIMATE = 15
#: At most one progress line per this many seconds during the CG iterations.
ITERATION_REPORT_SECONDS = 1.0
#: The private test hook (see the module docstring): pause on starting a named phase.
PAUSE_VARIABLE = "_HATKERNELS_TEST_PAUSE"


def _pause_setting():
    """(prefix, seconds) from :data:`PAUSE_VARIABLE`, or None when it is unset or empty."""
    text = os.environ.get(PAUSE_VARIABLE, "")
    if not text:
        return None
    prefix, _, seconds = text.partition("@")
    return prefix, float(seconds) if seconds else 60.0


class Progress:
    """Phase lines on stderr, with the time since the command started.

    On a terminal the current line shows a running clock (rewritten with a
    carriage return); elsewhere each phase is one plain line.  ``quiet``
    silences phases and notes, never warnings.
    """

    def __init__(self, quiet=False, stream=None):
        self.quiet = quiet
        self.stream = stream if stream is not None else sys.stderr
        try:
            self.tty = self.stream.isatty()
        except (AttributeError, ValueError):
            self.tty = False
        self.t0 = time.perf_counter()
        self._lock = threading.Lock()
        self._line = None
        self._started = 0.0
        self._stop = None
        self._pause = _pause_setting()

    def _stamp(self):
        return f"[{time.perf_counter() - self.t0:7.1f} s]"

    def _write(self, text):
        try:
            self.stream.write(text)
            self.stream.flush()
        except (OSError, ValueError):
            pass

    def _end_line(self):
        """Finish the live terminal line, if any (lock held)."""
        if self._line is not None and self.tty:
            elapsed = time.perf_counter() - self._started
            self._write(f"\r{self._line}  {elapsed:.1f} s\x1b[K\n")
        self._line = None

    def _tick(self, stop):
        while not stop.wait(0.25):
            with self._lock:
                if self._line is None or stop.is_set():
                    return
                elapsed = time.perf_counter() - self._started
                self._write(f"\r{self._line}  {elapsed:.1f} s\x1b[K")

    def phase(self, text):
        """Start a new phase: one line, stamped with the seconds since the start."""
        self._phase(text)
        if self._pause is not None and text.startswith(self._pause[0]):
            with self._lock:
                self._write(f'{PROG}: test pause in "{text}"\n')
            time.sleep(self._pause[1])

    def _phase(self, text):
        if self.quiet:
            return
        with self._lock:
            self._end_line()
            if self._stop is not None:
                self._stop.set()
                self._stop = None
            line = f"{self._stamp()} {text}"
            if self.tty:
                self._line = line
                self._started = time.perf_counter()
                self._write(line)
                self._stop = threading.Event()
                threading.Thread(target=self._tick, args=(self._stop,), daemon=True).start()
            else:
                self._write(line + "\n")

    def note(self, text, *, always=False):
        """A line ``hatkernels: text`` between phases; ``always`` shows it even when quiet."""
        if self.quiet and not always:
            return
        with self._lock:
            if self._line is not None and self.tty:
                self._write("\r\x1b[K")
            self._write(f"{PROG}: {text}\n")
            if self._line is not None and self.tty:
                self._write(self._line)

    def warning(self, message, category=None, filename=None, lineno=None, file=None, line=None):
        """A ``warnings.showwarning`` replacement: one line, always shown."""
        text = " ".join(str(message).split())
        self.note(f"warning: {text}", always=True)

    def close(self):
        """End the live line and its clock (safe to call more than once)."""
        with self._lock:
            self._end_line()
            if self._stop is not None:
                self._stop.set()
                self._stop = None


class IterationReport:
    """CG iterations with the current residual, at most one line every ``every`` seconds.

    ``every`` defaults to :data:`ITERATION_REPORT_SECONDS`, read when the report is made.
    """

    def __init__(self, progress, every=None):
        self.progress = progress
        self.every = ITERATION_REPORT_SECONDS if every is None else every
        self.last = time.perf_counter()

    def __call__(self, iteration, residual):
        now = time.perf_counter()
        if now - self.last >= self.every:
            self.last = now
            self.progress.phase(f"solve: iteration {iteration}, residual {residual:.3e}")


class CompileNotice:
    """Around the first call into the compiled kernels: say once if it compiles.

    When no kernel is cached at all the notice is printed at once; otherwise
    (some cached, or the cache cannot be inspected) it is printed if the call
    is still running after :data:`SLOW_FIRST_CALL` seconds.  ``seconds`` is
    the time the call took.
    """

    def __init__(self, progress, estimate=COMPILE_ESTIMATE):
        self.progress = progress
        self.estimate = estimate
        self.said = False
        self.seconds = None
        self._timer = None

    def _say(self):
        from hatkernels._jit import caching_enabled

        where = ("cached for next time" if caching_enabled()
                 else "not cached: no writable cache directory, set NUMBA_CACHE_DIR")
        self.progress.note(f"compiling kernels, about {self.estimate} s, {where}")
        self.said = True

    def __enter__(self):
        self._t0 = time.perf_counter()
        state = cache.kernel_cache_state()
        if state is not None and state["total"] and state["cached"] == 0:
            self._say()
        else:
            self._timer = threading.Timer(SLOW_FIRST_CALL, self._say)
            self._timer.daemon = True
            self._timer.start()
        return self

    def __exit__(self, *exc):
        if self._timer is not None:
            self._timer.cancel()
        self.seconds = time.perf_counter() - self._t0
        if self.said and exc[0] is None:
            self.progress.note(f"kernels ready after {self.seconds:.1f} s")
        return False
