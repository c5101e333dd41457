"""How a variant is named: a value as a label writes it, and a label from a variant's changes.

Expansion names a variant with :func:`grid_label` (a grid cell: its values alone, in axis order,
``none · 0.15``) or :func:`axis_label` (one value at a time: the axis's short name and the value,
``lr 0.1``); a listed variant keeps the label its table gives. ``lesion check``, the pictures and
the comparisons spell values and changes the same way through this module, so a label printed
anywhere can be recognized as the one stored. Dotted keys appear only where a key itself is
addressed (:func:`label_parts`: ``key=value``, the ``changes`` of a variant).
"""

from __future__ import annotations

import json
from typing import Any, Callable, Sequence

__all__ = ["BASE_LABEL", "SEPARATOR", "format_value", "label_parts", "grid_label", "axis_label", "axis_names",
           "old_label"]

BASE_LABEL = "base"
SEPARATOR = " · "


def format_value(value: Any) -> str:
    if isinstance(value, str):
        return value
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    return json.dumps(value, separators=(",", ":"), sort_keys=True)


def label_parts(changes: dict[str, Any], name: Callable[[str], str] = str) -> list[str]:
    """``key=value`` per change, in order; ``name`` may shorten the keys (pictures do)."""
    return [f"{name(k)}={format_value(v)}" for k, v in changes.items()]


def grid_label(values: Sequence[Any]) -> str:
    """A grid cell's label: its values in axis order."""
    return SEPARATOR.join(format_value(v) for v in values)


def axis_label(name: str, value: Any) -> str:
    """A one-value-at-a-time variant's label: the axis's short name and its value."""
    return f"{name} {format_value(value)}"


# Leaf names that say nothing without their section (``rate`` of what?).
_GENERIC_LEAVES = {"kind", "rate", "delta", "momentum", "epsilon", "fraction", "value", "values", "size",
                   "neurons", "depth"}


def short_key(key: str, keys: Sequence[str]) -> str:
    """The shortest dotted suffix of ``key`` that is unique among ``keys`` and says what it is:
    ``normalization.kind`` → ``normalization``, ``regularization.dropout.rate`` → ``dropout.rate``."""
    parts = key.split(".")
    if len(parts) > 1 and parts[-1] == "kind":
        parts = parts[:-1]
    others = [k for k in keys if k != key]
    for n in range(1, len(parts) + 1):
        suffix = ".".join(parts[-n:])
        if n == 1 and parts[-1] in _GENERIC_LEAVES and len(parts) > 1:
            continue
        if not any(o == suffix or o.endswith("." + suffix) or o.removesuffix(".kind").endswith(suffix)
                   for o in others):
            return suffix
    return key


def axis_names(axes: Sequence[tuple[str, str | None]]) -> dict[str, str]:
    """Dotted key → short name of each ``(key, name)`` axis: the name the spec gives, else
    :func:`short_key` among the axes' keys."""
    keys = [k for k, _ in axes]
    return {key: name or short_key(key, keys) for key, name in axes}


def old_label(changes: dict[str, Any]) -> str:
    """The label result-set format 1 gave a generated variant (still accepted where a variant is
    named on the command line)."""
    return ", ".join(label_parts(changes)) or BASE_LABEL
