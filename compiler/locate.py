"""Where a key path is written in a TOML document: the line a problem is reported on.

``tomllib`` keeps no positions, so :func:`key_lines` finds them with a small scanner of its own.
It is best-effort: a path it cannot find falls back to the nearest enclosing key or table header
written in the file, else line 1; it never raises (an error report must not become a crash).
"""

from __future__ import annotations

import re
import tomllib
from bisect import bisect_right

__all__ = ["line_of", "key_lines", "lookup"]


def line_of(text: str, loc: tuple[str | int, ...]) -> int:
    """Line (1-based) where the key path ``loc`` is written in the TOML ``text``; for a path not
    written there (a missing key, a whole-section problem), the line of its nearest enclosing key
    or table header; else 1."""
    return lookup(key_lines(text), loc)


def lookup(lines: dict[tuple, int], loc: tuple) -> int:
    for n in range(len(loc), 0, -1):
        if tuple(loc[:n]) in lines:
            return lines[tuple(loc[:n])]
    return 1


def key_lines(text: str) -> dict[tuple[str | int, ...], int]:
    """Every key path written in ``text`` (tables, keys, array elements) -> its first line.
    Array-of-tables headers get their index (``('ablation', 'axis', 1)``). Best-effort: on text
    it cannot follow it returns what it found up to that point."""
    scanner = _Scanner(text)
    try:
        scanner.document()
    except Exception:  # noqa: BLE001 -- the locator must never turn an error report into a crash
        pass
    breaks = [i for i, c in enumerate(text) if c == "\n"]
    return {path: bisect_right(breaks, offset - 1) + 1 for path, offset in scanner.found.items()}


_BARE = re.compile(r"[A-Za-z0-9_-]+")
_SCALAR_END = re.compile(r"[,\]\}\n#]")


class _Scanner:
    """Just enough of TOML 1.0 to know where each key and array element starts. It runs only on
    text tomllib has accepted (or, in the worst case, gives up early)."""

    def __init__(self, text: str):
        self.s = text
        self.i = 0
        self.found: dict[tuple, int] = {}       # path -> character offset
        self.aot: dict[tuple, int] = {}         # array-of-tables path -> elements seen so far
        self.implicit: set[tuple] = set()       # tables only named as a prefix of a longer header

    # -- helpers --
    def _peek(self, k: int = 1) -> str:
        return self.s[self.i:self.i + k]

    def _skip_space(self, newlines: bool) -> None:
        while self.i < len(self.s):
            c = self.s[self.i]
            if c in " \t\r" or (newlines and c == "\n"):
                self.i += 1
            elif c == "#":
                end = self.s.find("\n", self.i)
                self.i = len(self.s) if end < 0 else end
            else:
                return

    def _mark(self, path: tuple, offset: int, implicit: bool = False) -> None:
        if path not in self.found or (path in self.implicit and not implicit):
            self.found[path] = offset
            (self.implicit.add if implicit else self.implicit.discard)(path)

    # -- grammar --
    def document(self) -> None:
        table: tuple = ()
        while True:
            self._skip_space(newlines=True)
            if self.i >= len(self.s):
                return
            start = self.i
            if self._peek(2) == "[[":
                self.i += 2
                table = self._header(self._key(), start, array=True)
                self._expect("]]")
            elif self._peek() == "[":
                self.i += 1
                table = self._header(self._key(), start, array=False)
                self._expect("]")
            else:
                self._keyval(table)

    def _header(self, parts: list[str], start: int, array: bool) -> tuple:
        path: tuple = ()
        for n, part in enumerate(parts):
            path += (part,)
            last = n == len(parts) - 1
            if last and array:
                index = self.aot.get(path, 0)
                self.aot[path] = index + 1
                self._mark(path, start)
                path += (index,)
            elif path in self.aot:
                # [a.b] after [[a]] belongs to the latest element of a.
                path += (self.aot[path] - 1,)
            # [a.b.c] only implies [a]: a later explicit [a] header is the better place to point at.
            self._mark(path, start, implicit=not last)
        return path

    def _expect(self, token: str) -> None:
        self._skip_space(newlines=False)
        if self._peek(len(token)) != token:
            raise ValueError(f"expected {token!r} at offset {self.i}")
        self.i += len(token)

    def _key(self) -> list[str]:
        parts = []
        while True:
            self._skip_space(newlines=False)
            c = self._peek()
            if c in ('"', "'"):
                begin = self.i
                self._string()
                parts.append(tomllib.loads("k = " + self.s[begin:self.i])["k"])
            else:
                m = _BARE.match(self.s, self.i)
                if not m:
                    raise ValueError(f"no key at offset {self.i}")
                parts.append(m.group())
                self.i = m.end()
            self._skip_space(newlines=False)
            if self._peek() != ".":
                return parts
            self.i += 1

    def _keyval(self, table: tuple) -> None:
        start = self.i
        path = table
        for part in self._key():
            path += (part,)
            self._mark(path, start)
        self._expect("=")
        self._skip_space(newlines=False)
        self._value(path)

    def _value(self, path: tuple) -> None:
        c = self._peek()
        if c == "{":
            self.i += 1
            while True:
                self._skip_space(newlines=True)
                if self._peek() == "}":
                    self.i += 1
                    return
                if self._peek() == ",":
                    self.i += 1
                    continue
                self._keyval(path)
        elif c == "[":
            self.i += 1
            index = 0
            while True:
                self._skip_space(newlines=True)
                if self._peek() == "]":
                    self.i += 1
                    return
                if self._peek() == ",":
                    self.i += 1
                    index += 1
                    continue
                self._mark(path + (index,), self.i)
                self._value(path + (index,))
        elif c in ('"', "'"):
            self._string()
        else:
            m = _SCALAR_END.search(self.s, self.i)
            end = len(self.s) if m is None else m.start()
            if end == self.i:
                raise ValueError(f"no value at offset {self.i}")
            self.i = end

    def _string(self) -> None:
        s, i = self.s, self.i
        quote = s[i]
        if s.startswith(quote * 3, i):
            # Multi-line: the closing triple may be followed by up to two more quotes of content.
            j = s.index(quote * 3, i + 3) if quote == "'" else self._basic_close(i + 3, quote * 3)
            while s.startswith(quote, j + 3):
                j += 1
            self.i = j + 3
            return
        j = s.index("'", i + 1) if quote == "'" else self._basic_close(i + 1, quote)
        self.i = j + 1

    def _basic_close(self, j: int, closer: str) -> int:
        s = self.s
        while True:
            if s[j] == "\\":
                j += 2
            elif s.startswith(closer, j):
                return j
            else:
                j += 1
