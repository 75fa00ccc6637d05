"""The line on which each key of a TOML text is written (:mod:`tomllib` gives values only).

:func:`key_lines` scans a text that :func:`tomllib.loads` has already
accepted and returns, for every key path, the line (1-based) where it is
first written: a table header ``[a.b]`` defines ``("a", "b")`` (and ``("a",)``
if not defined before), ``key = value`` under it ``("a", "b", "key")``, the
keys of inline tables and the elements of arrays (by index) below their key.
Error messages about a file's content name the line this way.

Only valid TOML is scanned (the caller parses first), so the scanner
follows the grammar's structure without re-checking it: strings of the four
kinds (their content may hold ``=``, ``#``, brackets and newlines), comments,
arrays over several lines, inline tables, dotted and quoted keys, arrays of
tables (``[[a]]``: each entry is ``("a", k)``).

>>> lines = key_lines('# a comment\\n[regions.steel]\\nconductivity = [[1, 0],\\n  [0, 2]]\\n')
>>> lines[("regions", "steel")], lines[("regions", "steel", "conductivity")]
(2, 3)
>>> lines[("regions", "steel", "conductivity", 1, 0)]
4
"""

from __future__ import annotations

import bisect
import tomllib

__all__ = ["dotted", "key_lines", "line_of"]

_BARE = frozenset("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789_-")
_SCALAR_END = frozenset(",]}\n\r#")


def key_lines(text):
    """``{key path: line}`` for a TOML ``text`` that :func:`tomllib.loads` accepts.

    A path is a tuple of key strings and array indices.  Should the scan
    meet something it does not follow, what was found up to there is
    returned (:func:`line_of` then falls back to an enclosing key).
    """
    scan = _Scan(text)
    try:
        scan.document()
    except (IndexError, ValueError, tomllib.TOMLDecodeError):
        pass
    return scan.lines


def line_of(lines, path):
    """The line of ``path`` in ``lines`` (from :func:`key_lines`), or of the nearest enclosing
    key that has one, or 1."""
    path = tuple(path)
    while path:
        if path in lines:
            return lines[path]
        path = path[:-1]
    return 1


def dotted(path):
    """A key path as it would be written: ``regions."steel 304".conductivity[1][0]``.

    >>> dotted(("regions", "steel 304", "conductivity", 1, 0))
    'regions."steel 304".conductivity[1][0]'
    """
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            bare = part and all(c in _BARE for c in part)
            out += ("." if out else "") + (part if bare else f'"{part}"')
    return out


class _Scan:
    def __init__(self, text):
        self.text = text
        self.i = 0
        self.lines = {}
        self._newlines = [k for k, c in enumerate(text) if c == "\n"]

    # -- positions ---------------------------------------------------------------

    def line(self):
        return bisect.bisect_left(self._newlines, self.i) + 1

    def record(self, path):
        here = self.line()
        for k in range(1, len(path) + 1):
            self.lines.setdefault(tuple(path[:k]), here)

    def peek(self, n=1):
        return self.text[self.i:self.i + n]

    def blank(self, newlines=False):
        """Skip spaces and tabs (and newlines and comments if ``newlines``)."""
        t = self.text
        while self.i < len(t):
            c = t[self.i]
            if c in " \t" or (newlines and c in "\r\n"):
                self.i += 1
            elif newlines and c == "#":
                while self.i < len(t) and t[self.i] != "\n":
                    self.i += 1
            else:
                break

    def expect(self, token):
        if not self.text.startswith(token, self.i):
            raise ValueError(f"expected {token!r} at {self.i}")
        self.i += len(token)

    # -- the grammar -------------------------------------------------------------

    def document(self):
        table = ()
        entries = {}  # [[a]] headers seen so far, by path
        while True:
            self.blank(newlines=True)
            if self.i >= len(self.text):
                return
            if self.peek(2) == "[[":
                self.i += 2
                path = self.key()
                self.blank()
                self.expect("]]")
                k = entries.get(path, 0)
                entries[path] = k + 1
                table = path + (k,)
                self.record(table)
            elif self.peek() == "[":
                self.i += 1
                table = self.key()
                self.blank()
                self.expect("]")
                self.record(table)
            else:
                self.pair(table)

    def pair(self, table):
        path = table + self.key()
        self.record(path)
        self.blank()
        self.expect("=")
        self.value(path)

    def key(self):
        """A dotted key, its parts decoded."""
        parts = []
        while True:
            self.blank()
            c = self.peek()
            if c == '"':
                parts.append(self.basic_string())
            elif c == "'":
                end = self.text.index("'", self.i + 1)
                parts.append(self.text[self.i + 1:end])
                self.i = end + 1
            else:
                start = self.i
                while self.i < len(self.text) and self.text[self.i] in _BARE:
                    self.i += 1
                if self.i == start:
                    raise ValueError(f"no key at {start}")
                parts.append(self.text[start:self.i])
            self.blank()
            if self.peek() != ".":
                return tuple(parts)
            self.i += 1

    def basic_string(self):
        """A one-line "..." string at the cursor, decoded as TOML decodes it."""
        j = self.i + 1
        while self.text[j] != '"':
            j += 2 if self.text[j] == "\\" else 1
        raw = self.text[self.i:j + 1]
        self.i = j + 1
        return tomllib.loads(f"k = {raw}")["k"]

    def long_string(self, quote):
        """Skip a multi-line string opened by three ``quote`` characters at the cursor."""
        t = self.text
        j = self.i + 3
        while not t.startswith(quote * 3, j):
            j += 2 if quote == '"' and t[j] == "\\" else 1
        j += 3
        for _ in range(2):  # up to two quotes may end the content next to the delimiter
            if j < len(t) and t[j] == quote:
                j += 1
        self.i = j

    def value(self, path):
        self.blank()
        c = self.peek()
        if c == "{":
            self.i += 1
            while True:
                self.blank()
                if self.peek() == "}":
                    self.i += 1
                    return
                self.pair(path)
                self.blank()
                if self.peek() == ",":
                    self.i += 1
        elif c == "[":
            self.i += 1
            k = 0
            while True:
                self.blank(newlines=True)
                if self.peek() == "]":
                    self.i += 1
                    return
                self.record(path + (k,))
                self.value(path + (k,))
                k += 1
                self.blank(newlines=True)
                if self.peek() == ",":
                    self.i += 1
        elif self.peek(3) in ('"""', "'''"):
            self.long_string(c)
        elif c == '"':
            self.basic_string()
        elif c == "'":
            self.i = self.text.index("'", self.i + 1) + 1
        else:  # number, boolean, date or time: up to the next delimiter
            while self.i < len(self.text) and self.text[self.i] not in _SCALAR_END:
                self.i += 1
