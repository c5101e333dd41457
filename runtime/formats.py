"""Rendering rows of results as a terminal table, JSON, CSV or Markdown.

Every report (show, diff, replay) builds a list of plain dicts and one column list; this module is
the only place that turns them into text, so the four formats always agree on content.
"""

from __future__ import annotations

import csv
import io
import json
import math
from typing import Any, Sequence

from compiler.errors import printable

__all__ = ["FORMATS", "render", "fmt_number"]

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


def render(rows: Sequence[dict], columns: Sequence[str], fmt: str, *, title: str = "",
           headers: dict[str, str] | None = None, extra: dict | None = None) -> str:
    """``extra`` is carried whole into JSON (e.g. a spec diff) and as lines above the other formats."""
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
        from rich.console import Console
        from rich.table import Table

        table = Table(title=title or None, show_lines=False, header_style="bold")
        for c, h in zip(columns, heads):
            table.add_column(h, justify="right" if _numeric(rows, c) else "left", overflow="fold")
        for row in cells:
            table.add_row(*row)
        # No markup: a label such as "[bold]x" is text to show, not a style to apply.
        console = Console(file=io.StringIO(), width=200, color_system=None, force_terminal=False, markup=False,
                          highlight=False, emoji=False)
        console.print(table)
        return console.file.getvalue().rstrip("\n")
    raise ValueError(f"unknown format {fmt!r} (expected one of {', '.join(FORMATS)})")


def _numeric(rows, column) -> bool:
    vals = [r.get(column) for r in rows if r.get(column) is not None]
    return bool(vals) and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in vals)
