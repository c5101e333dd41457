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
- each problem carries the line of its key path in the source (:mod:`compiler.locate`).
- an old word of the spec language (:mod:`compiler.vocabulary`) is read as the current one and
  reported in :attr:`LoadedStudy.notices`, one line each (``FILE:LINE: key: ...``): a stored
  source written with the old words still loads to the same study hash.

This module never imports jax.
"""

from __future__ import annotations

import dataclasses
import os
import re
import stat
import tomllib
from dataclasses import dataclass

from pydantic import ValidationError

from compiler.errors import Problem, SpecError, dotted
from compiler.expand import Variant, expand
from compiler.hashing import study_hash
from compiler.locate import key_lines, lookup
from compiler.problems import pydantic_problems
from compiler.spec import Spec
from compiler.vocabulary import respell

__all__ = ["LoadedStudy", "load_study", "load_text", "MAX_SPEC_BYTES", "MAX_KEY_PARTS"]

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
    notices: tuple[str, ...] = ()   # old words read as current ones, one line each

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
    doc, old_words = respell(doc)
    try:
        spec = Spec.model_validate(doc)
    except ValidationError as err:
        raise _located(pydantic_problems(err), text, name) from None
    try:
        variants = expand(spec)
    except SpecError as err:
        raise _located(err.problems, text, name) from None
    return LoadedStudy(name, text, spec, study_hash(spec), tuple(variants), _notices(old_words, text, name))


def _notices(old_words, text: str, name: str) -> tuple[str, ...]:
    lines = key_lines(text)
    out = []
    for loc, old, new in old_words:
        out.append(f"{name}:{lookup(lines, loc)}: {dotted(loc)}: '{old}' is now '{new}' (read as such; "
                   "rename it to silence this notice)")
    return tuple(out)


def _located(problems: list[Problem], text: str, name: str) -> SpecError:
    lines = key_lines(text)
    return SpecError([dataclasses.replace(p, file=name, line=lookup(lines, p.loc)) for p in problems])
