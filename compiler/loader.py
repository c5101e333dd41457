"""Loading a spec file: bytes -> TOML -> validated :class:`Spec` -> study hash -> variants.

Contract:

- :func:`load_study` reads a file, :func:`load_text` takes the source itself (replay re-loads the
  stored source); both return a :class:`LoadedStudy` or raise :class:`SpecError` carrying *every*
  problem of the file (all field errors at once, then, if the fields are valid, every expansion
  problem), each rendered ``FILE:LINE: dotted.key: what is wrong``.
- Bad files (missing, a directory, not a regular file (a FIFO, device or socket: refused
  without opening it), over :data:`MAX_SPEC_BYTES`, binary, not UTF-8) are problems too, never
  tracebacks; so are key paths of more than :data:`MAX_KEY_PARTS` parts and values
  nested deeper than Python's stack allows.
- ``tomllib`` keeps no positions, so :func:`line_of` finds the line of a key path in the source
  with a small scanner of its own. It is best-effort: a path it cannot find falls back to the
  nearest enclosing key or table header written in the file, else line 1; it never raises.

This module never imports jax.
"""

from __future__ import annotations

import dataclasses
import os
import re
import stat
import tomllib
from bisect import bisect_right
from dataclasses import dataclass

from pydantic import ValidationError

from compiler.errors import Problem, SpecError
from compiler.expand import Variant, expand, pydantic_problems
from compiler.hashing import study_hash
from compiler.spec import Spec

__all__ = ["LoadedStudy", "load_study", "load_text", "line_of", "key_lines", "MAX_SPEC_BYTES", "MAX_KEY_PARTS"]

# A spec is a page of settings; anything this large is a wrong path (a data file, a log).
MAX_SPEC_BYTES = 1 << 20
# A spec's keys are a few levels deep. tomllib's cost grows with the square of a dotted key's
# length (a 120 KB key took 22 s here) and so does the locator's, so longer keys are refused
# before parsing.
MAX_KEY_PARTS = 32
# Possessive and anchored at a word start, so the search stays linear on any text.
_KEY_PART = r"(?:(?<![A-Za-z0-9_-])[A-Za-z0-9_-]++|\"(?:[^\"\\\n]|\\.)*+\"|'[^'\n]*+')"
_DEEP_KEY = re.compile(rf"(?>{_KEY_PART}[ \t]*+\.[ \t]*+){{{MAX_KEY_PARTS}}}{_KEY_PART}")
_KINDS = {stat.S_IFIFO: "named pipe (FIFO)", stat.S_IFCHR: "character device", stat.S_IFBLK: "block device",
          stat.S_IFSOCK: "socket"}


@dataclass(frozen=True)
class LoadedStudy:
    path: str                   # as given by the caller; the name used in error messages
    source: str                 # the exact text, for storing beside results and for replay
    spec: Spec
    study_hash: str
    variants: tuple[Variant, ...]

    @property
    def result_set(self) -> str:
        """Folder name of this study's results: ``<study name>-<first 12 hex of the study hash>``."""
        return f"{self.spec.study.name}-{self.study_hash[:12]}"

    @property
    def seeds(self) -> list[int]:
        return self.spec.study.seed_list

    @property
    def runs(self) -> int:
        return len(self.variants) * len(self.seeds)


def _fail(name: str, message: str, line: int = 1, loc: tuple = ()) -> SpecError:
    return SpecError([Problem(loc, message, file=name, line=line)])


def load_study(path: str | os.PathLike) -> LoadedStudy:
    """Read and load the spec file at ``path`` (see the module contract)."""
    name = os.fspath(path)
    try:
        # Judged before opening: opening a FIFO for reading blocks until a writer comes, and a
        # device or a pipe may never end.
        mode = os.stat(name).st_mode
    except FileNotFoundError:
        raise _fail(name, "no such file; check the path (spec files end in .toml)") from None
    except OSError as err:
        raise _fail(name, f"cannot read the file: {err.strerror or err}") from None
    if stat.S_ISDIR(mode):
        raise _fail(name, "is a directory; expected a .toml spec file")
    if not stat.S_ISREG(mode):
        raise _fail(name, f"is a {_KINDS.get(stat.S_IFMT(mode), 'special file')}, not a regular file; "
                          "save the spec to a .toml file and pass its path")
    try:
        with open(name, "rb") as fh:
            # Bounded read: the file may have grown since it was judged.
            data = fh.read(MAX_SPEC_BYTES + 1)
    except FileNotFoundError:
        raise _fail(name, "no such file; check the path (spec files end in .toml)") from None
    except OSError as err:
        raise _fail(name, f"cannot read the file: {err.strerror or err}") from None
    if len(data) > MAX_SPEC_BYTES:
        raise _fail(name, f"larger than {MAX_SPEC_BYTES // 1024} KiB; a spec is a short TOML file "
                          "(is this a data file? data goes in [data] path = ...)")
    if b"\x00" in data:
        line = data[:data.index(b"\x00")].count(b"\n") + 1
        raise _fail(name, "binary file (contains NUL bytes); expected a UTF-8 TOML spec", line)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as err:
        line = data[:err.start].count(b"\n") + 1
        raise _fail(name, f"not UTF-8 text (byte 0x{data[err.start]:02x} cannot be decoded); "
                          "save the file as UTF-8", line) from None
    return load_text(text.removeprefix("\ufeff"), name)


_TOML_AT = re.compile(r"\s*\(at line (\d+), column (\d+)\)$")
_TOML_END = re.compile(r"\s*\(at end of document\)$")


def load_text(text: str, name: str = "<spec>") -> LoadedStudy:
    """Load a spec from its source text; ``name`` is used in error messages."""
    if m := _DEEP_KEY.search(text):
        raise _fail(name, f"a key path of more than {MAX_KEY_PARTS} parts; spec keys are a few levels deep "
                          "(such as optimizer.schedule.kind)", text.count("\n", 0, m.start()) + 1)
    try:
        return _load(text, name)
    except RecursionError:
        raise _fail(name, "values nested too deeply (arrays or inline tables inside each other hundreds of "
                          "levels down); a spec's values are numbers, strings and short lists",
                    _deepest_line(text)) from None


def _deepest_line(text: str) -> int:
    # Brackets inside strings count too: this only points at a line, it decides nothing.
    depth = best = where = 0
    for i, c in enumerate(text):
        if c in "[{":
            depth += 1
            if depth > best:
                best, where = depth, i
        elif c in "]}":
            depth -= 1
    return text.count("\n", 0, where) + 1


def _load(text: str, name: str) -> LoadedStudy:
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        msg = str(err)
        line = 1
        if m := _TOML_AT.search(msg):
            line, msg = int(m.group(1)), f"{msg[:m.start()]} (column {m.group(2)})"
        elif m := _TOML_END.search(msg):
            line, msg = max(1, len(text.rstrip("\n").split("\n"))), f"{msg[:m.start()]} (at the end of the file)"
        raise _fail(name, f"invalid TOML: {msg[0].lower() + msg[1:]}", line) from None
    try:
        spec = Spec.model_validate(doc)
    except ValidationError as err:
        raise _located(pydantic_problems(err), text, name) from None
    try:
        variants = expand(spec)
    except SpecError as err:
        raise _located(err.problems, text, name) from None
    return LoadedStudy(name, text, spec, study_hash(spec), tuple(variants))


def _located(problems: list[Problem], text: str, name: str) -> SpecError:
    lines = key_lines(text)
    return SpecError([dataclasses.replace(p, file=name, line=_lookup(lines, p.loc)) for p in problems])


# ── the locator ─────────────────────────────────────────────────────────────────────────────────
def line_of(text: str, loc: tuple[str | int, ...]) -> int:
    """Line (1-based) where the key path ``loc`` is written in the TOML ``text``; for a path not
    written there (a missing key, a whole-section problem), the line of its nearest enclosing key
    or table header; else 1."""
    return _lookup(key_lines(text), loc)


def _lookup(lines: dict[tuple, int], loc: tuple) -> int:
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
