"""Problems found in a spec, before any line of it is run.

A :class:`Problem` names where (a key path into the TOML document) and what; the loader turns the
path into a line number of the source file. :class:`SpecError` carries every problem of a file so
they are reported together, not one per attempt.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["Problem", "SpecError", "dotted"]


@dataclass(frozen=True)
class Problem:
    loc: tuple[str | int, ...]
    message: str
    file: str | None = None
    line: int | None = None

    def render(self) -> str:
        where = f"{self.file or '<spec>'}:{self.line if self.line is not None else 1}"
        key = dotted(self.loc)
        return f"{where}: {key}: {self.message}" if key else f"{where}: {self.message}"


@dataclass
class SpecError(Exception):
    problems: list[Problem] = field(default_factory=list)

    def __str__(self) -> str:
        return "\n".join(p.render() for p in self.problems)


def dotted(loc: tuple[str | int, ...]) -> str:
    """('ablation', 'axis', 0, 'key') -> 'ablation.axis[0].key'."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else str(part)
    return out
