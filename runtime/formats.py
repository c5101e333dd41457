"""Rendering rows of results as a terminal table, JSON, CSV or Markdown.

Every report (show, diff, replay, check) builds a list of plain dicts and one column list; this
module is the only place that turns them into text, so the four formats always agree on content.

A terminal table is fitted to a width: each report declares with a :class:`Fit` which columns it
must keep, which go first and which may wrap; a column added to a report's list later needs no
layout of its own (unless declared, it may be dropped, right to left). ``width=None`` is the wide
layout: every column, one line per row.
"""

from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass
from typing import Any, Sequence

from compiler.errors import printable

__all__ = ["FORMATS", "Fit", "render", "fmt_number"]

FORMATS = ("table", "json", "csv", "markdown")


def fmt_number(value: Any, digits: int = 4) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        if value != 0 and (abs(value) < 1e-3 or abs(value) >= 1e6):
            return f"{value:.{digits - 1}e}"
        return f"{value:.{digits}g}"
    return str(value)


def _json_safe(value):
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    return value


@dataclass(frozen=True)
class Fit:
    """How a report's table gives way when the terminal is narrower than the table.

    Columns whose cells are all empty go first, then ``drop`` in its order, then every other column
    not in ``keep`` from the right; ``wrap`` columns break at spaces (labels such as
    ``none · 0.15`` break between their parts) instead of being dropped; once the table fits, a
    droppable column still goes if that puts the rows on fewer lines.
    """

    keep: tuple[str, ...] = ()
    drop: tuple[str, ...] = ()
    wrap: tuple[str, ...] = ()


# Between two columns: a blank rule and one space of padding on its left.
_GAP = 2


def render(rows: Sequence[dict], columns: Sequence[str], fmt: str, *, title: str = "",
           headers: dict[str, str] | None = None, extra: dict | None = None,
           width: int | None = None, fit: Fit = Fit()) -> str:
    """``extra`` is carried whole into JSON (e.g. a spec diff) and as lines above the other formats;
    ``width`` and ``fit`` only shape the table format."""
    headers = headers or {}
    if fmt == "json":
        doc = {"title": title, **(extra or {}), "rows": [{c: _json_safe(r.get(c)) for c in columns} for r in rows]}
        return json.dumps(doc, indent=2, allow_nan=False)
    if fmt == "csv":
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        writer.writerow(columns)
        for r in rows:
            writer.writerow(["" if r.get(c) is None else r.get(c) for c in columns])
        return buf.getvalue().rstrip("\n")
    # The terminal formats: user text (labels, values) as one visible line each.
    cells = [[printable(fmt_number(r.get(c))) for c in columns] for r in rows]
    heads = [headers.get(c, c) for c in columns]
    title = printable(title)
    if fmt == "markdown":
        lines = [f"**{title}**", ""] if title else []
        lines.append("| " + " | ".join(heads) + " |")
        lines.append("|" + "|".join("---" if not _numeric(rows, c) else "---:" for c in columns) + "|")
        lines += ["| " + " | ".join(x.replace("|", "\\|") for x in row) + " |" for row in cells]
        return "\n".join(lines)
    if fmt == "table":
        return _table(rows, list(columns), cells, heads, title, width, fit)
    raise ValueError(f"unknown format {fmt!r} (expected one of {', '.join(FORMATS)})")


def _table(rows, columns, cells, heads, title, width, fit) -> str:
    import textwrap

    from rich import box
    from rich.cells import cell_len
    from rich.console import Console
    from rich.table import Table

    def longest(c: int, words: bool) -> int:
        texts = [heads[c]] + [row[c] for row in cells]
        return max(cell_len(w) for t in texts for w in (t.split() if words else [t]) or [""])

    def need(c: int) -> int:
        # Narrowest a column can be: its longest cell, or its longest word when it may wrap.
        return longest(c, width is not None and columns[c] in fit.wrap)

    def wrapped(c: int, w: int, text: str) -> list[str]:
        return textwrap.wrap(text, w, break_long_words=False) or [""] if columns[c] in fit.wrap else [text]

    def widths_of(shown: list[int]) -> dict[int, int]:
        # Widths are decided here, not by rich: it would squeeze any column, and the narrow layout
        # promises that only the wrapping ones give way (the widest first, never below a word;
        # kept ones last).
        widths = {i: longest(i, False) for i in shown}
        if width is None:
            return widths
        while sum(widths.values()) + _GAP * (len(shown) - 1) > width:
            give = [i for i in shown if columns[i] in fit.wrap and widths[i] > need(i)]
            if not give:
                break
            give = [i for i in give if columns[i] not in fit.keep] or give
            widths[max(give, key=widths.get)] -= 1
        # No wider than the longest line its cells actually wrap to.
        return {i: max(cell_len(line) for t in [heads[i]] + [row[i] for row in cells] for line in wrapped(i, w, t))
                for i, w in widths.items()}

    def height(shown: list[int]) -> int:
        widths = widths_of(shown)
        return sum(max(len(wrapped(i, widths[i], row[i])) for i in shown) for row in cells)

    shown = [i for i, c in enumerate(columns) if any(row[i] for row in cells) or not cells]
    dropped = []
    if width is not None:
        order = [c for c in fit.drop if c in columns] + [c for c in reversed(columns) if c not in fit.drop]
        order = [columns.index(c) for c in order if c not in fit.keep and columns.index(c) in shown]
        def fits(kept: list[int]) -> bool:
            return sum(map(need, kept)) + _GAP * (len(kept) - 1) <= width

        k = 0
        while not fits([i for i in shown if i not in order[:k]]) and k < len(order):
            k += 1
        # Then a column goes only if that shortens the rows: a row over three lines is harder to
        # read than a column named on the last line, but a column that saves no line stays ...
        lines = height([i for i in shown if i not in order[:k]])
        for more in range(k + 1, len(order) + 1):
            fewer = height([i for i in shown if i not in order[:more]])
            if fewer < lines:
                k, lines = more, fewer
        gone = order[:k]
        # ... and one dropped on the way comes back if it fits in the room the others leave.
        for i in reversed(gone):
            now = widths_of([j for j in shown if j not in gone])
            back = widths_of(sorted([*now, i]))
            if (all(back[j] == w for j, w in now.items()) and sum(back.values()) + _GAP * (len(back) - 1) <= width
                    and height(list(back)) <= lines):
                gone.remove(i)
        for i in gone:
            shown.remove(i)
            dropped.append(columns[i])
    widths = widths_of(shown)
    table = Table(box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False, padding=(0, 1, 0, 0), header_style="bold")
    for i in shown:
        table.add_column(heads[i], justify="right" if _numeric(rows, columns[i]) else "left",
                         no_wrap=columns[i] not in fit.wrap, overflow="fold", width=widths[i])
    for row in cells:
        table.add_row(*(row[i] for i in shown))
    # The wide layout is as wide as its longest row; a console wider than any table lets it be.
    console = Console(file=io.StringIO(), width=width or 100_000, color_system=None, force_terminal=False,
                      markup=False, highlight=False, emoji=False)
    console.print(table)
    lines = [x.rstrip() for x in console.file.getvalue().rstrip("\n").splitlines()]
    if title:
        lines[:0] = textwrap.wrap(title, width) if width else [title]
    if dropped:
        note = (f"not shown at {width} columns: {', '.join(sorted(dropped, key=columns.index))} "
                f"(--wide shows every column)")
        lines += textwrap.wrap(note, width)
    return "\n".join(lines)


def _numeric(rows, column) -> bool:
    vals = [r.get(column) for r in rows if r.get(column) is not None]
    return bool(vals) and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in vals)
