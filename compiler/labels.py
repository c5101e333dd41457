"""How a variant is named: a value as a label writes it, and a label from a variant's changes.

Expansion names a variant with :func:`variant_label`; ``lesion check``, the pictures and the
comparisons spell values and changes the same way through this module, so a label printed
anywhere can be recognized as the one stored.
"""

from __future__ import annotations

import json
from typing import Any, Callable

__all__ = ["BASE_LABEL", "format_value", "label_parts", "variant_label"]

BASE_LABEL = "base"


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


def variant_label(changes: dict[str, Any]) -> str:
    """The label expansion gives a variant the user did not name: its changes, or ``base``."""
    return ", ".join(label_parts(changes)) or BASE_LABEL
