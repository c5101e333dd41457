"""Test helper: write a parsed TOML document back as TOML in many equivalent layouts.

Key order, table style (``[a.b]`` sub-table, inline table, dotted keys) and comments are drawn
from a :class:`random.Random`; array order is kept (it means something). tomllib must read the
result back to the same document, which the tests check first.
"""

from __future__ import annotations

import json
import random
import re

_BARE = re.compile(r"^[A-Za-z0-9_-]+$")
_COMMENTS = ["# a note", "# key = value [not a table]", "#", "# 'quoted' and \"double\" # twice"]


def key(k: str) -> str:
    return k if _BARE.match(k) else json.dumps(k, ensure_ascii=False)


def value(v, rng: random.Random) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, list):
        sep = ",\n  " if rng.random() < 0.3 else ", "
        return "[" + sep.join(value(x, rng) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{key(k)} = {value(x, rng)}" for k, x in _shuffled(v, rng)) + " }"
    raise TypeError(type(v))


def _shuffled(d: dict, rng: random.Random) -> list:
    items = list(d.items())
    rng.shuffle(items)
    return items


def _comment(rng: random.Random) -> str:
    return rng.choice(_COMMENTS)


def dump(doc: dict, rng: random.Random) -> str:
    lines: list[str] = []
    _table(doc, (), lines, rng)
    return "\n".join(lines) + "\n"


def _is_table_array(v) -> bool:
    return isinstance(v, list) and v and all(isinstance(x, dict) for x in v)


def _table(node: dict, path: tuple, lines: list[str], rng: random.Random) -> None:
    plain, tables, arrays = [], [], []
    for k, v in _shuffled(node, rng):
        if isinstance(v, dict) and path and rng.random() < 0.5:
            plain.append((k, v))                       # inline table or dotted keys
        elif isinstance(v, dict):
            tables.append((k, v))
        elif _is_table_array(v) and rng.random() < 0.8:
            arrays.append((k, v))
        else:
            plain.append((k, v))
    for k, v in plain:
        if rng.random() < 0.15:
            lines.append(_comment(rng))
        if isinstance(v, dict) and v and rng.random() < 0.5:
            for k2, v2 in _shuffled(v, rng):
                lines.append(f"{key(k)}.{key(k2)} = {value(v2, rng)}")
        else:
            trailer = f"  {_comment(rng)}" if rng.random() < 0.2 else ""
            lines.append(f"{key(k)} = {value(v, rng)}{trailer}")
    for k, v in tables:
        sub = path + (k,)
        lines += ["", f"[{'.'.join(map(key, sub))}]"]
        _table(v, sub, lines, rng)
    for k, v in arrays:
        sub = path + (k,)
        for element in v:
            lines += ["", f"[[{'.'.join(map(key, sub))}]]"]
            _table(element, sub, lines, rng)


def leaves(node, path: tuple = ()):
    """(path, value) of every scalar in a parsed document; list indices are ints."""
    if isinstance(node, dict):
        for k, v in node.items():
            yield from leaves(v, path + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield from leaves(v, path + (i,))
    else:
        yield path, node
