"""Problems found in a spec, before any line of it is run.

A :class:`Problem` names where (a key path into the TOML document) and what; the loader turns the
path into a line number of the source file. :class:`SpecError` carries every problem of a file so
they are reported together, not one per attempt.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

__all__ = ["Problem", "SpecError", "dotted", "printable"]


@dataclass(frozen=True)
class Problem:
    loc: tuple[str | int, ...]
    message: str
    file: str | None = None
    line: int | None = None

    def render(self) -> str:
        where = f"{self.file or '<spec>'}:{self.line if self.line is not None else 1}"
        key = dotted(self.loc)
        return printable(f"{where}: {key}: {self.message}" if key else f"{where}: {self.message}")


@dataclass
class SpecError(Exception):
    problems: list[Problem] = field(default_factory=list)

    def __str__(self) -> str:
        return "\n".join(p.render() for p in self.problems)


# Control characters and line separators (what str.splitlines splits on) from a quoted key or a
# value: escaped, so that one problem stays one line. Bidirectional controls too (Unicode TR #9,
# the explicit embedding, override and isolate marks): a terminal would reorder the text around
# them, so what is printed would not read as what is written (CVE-2021-42574, "Trojan Source").
_BREAKS = re.compile(r"[\x00-\x08\x0a-\x1f\x7f-\x9f\u061c\u200e\u200f\u2028-\u202e\u2066-\u2069]")


def printable(text: str) -> str:
    """``text`` safe to print on a terminal as one line: control, line-separator and
    bidirectional-control characters as visible escapes (``\\n``, ``\\x1b``, ``\\u202e``).
    For labels and values written by users, wherever they reach a terminal."""
    return _BREAKS.sub(lambda m: m.group().encode("unicode_escape").decode("ascii"), text)



def dotted(loc: tuple[str | int, ...]) -> str:
    """('ablation', 'axis', 0, 'key') -> 'ablation.axis[0].key'."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else str(part)
    return out
