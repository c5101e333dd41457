"""What changed between two studies, and which of their variants correspond.

Contract: pure Python over JSON-shaped trees (canonical JSON text, or the dicts it parses to).

- :func:`flatten` — a tree as ``{dotted key: leaf}``. Tables nest with dots, as TOML dotted keys
  do (a key that is not a bare TOML key is quoted: ``set."optimizer.learning_rate"``); a list of
  tables is indexed (``ablation.axis[0].key``); any other list (of scalars, of lists) is one leaf.
- :func:`spec_diff` — the leaves that differ, as :class:`Change` with :data:`ABSENT` for a key
  only one side has. Numbers compare by value (``1`` and ``1.0`` are the same JSON number, as in
  RFC 8785), booleans by identity (``true`` is not ``1``).
- :func:`match_variants` — pairs each variant of study A with its counterpart in study B: first
  by identical payload, then by payload with the changed keys removed, then by equal label;
  a payload that stays ambiguous is matched by label or left unmatched, never guessed.
"""

from __future__ import annotations

import enum
import json
import re
from collections import Counter
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Any, NamedTuple

from compiler.errors import dotted

__all__ = ["ABSENT", "Change", "Pair", "flatten", "spec_diff", "match_variants", "format_leaf", "canonical_leaf"]

_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")   # TOML v1.0.0, "Keys": bare keys


class _Absent(enum.Enum):
    """A key the other side does not have (an enum member stays one object through copy and pickle)."""

    ABSENT = "absent"


ABSENT = _Absent.ABSENT


def format_leaf(value: Any) -> str:
    """A leaf as it reads in JSON (strings quoted, so ``"none"`` is not mistaken for absence)."""
    return "(absent)" if value is ABSENT else json.dumps(value, ensure_ascii=False, sort_keys=True)


@dataclass(frozen=True)
class Change:
    key: str
    old: Any
    new: Any

    @property
    def kind(self) -> str:
        return "added" if self.old is ABSENT else "removed" if self.new is ABSENT else "changed"

    def render(self) -> str:
        return f"{self.key}: {format_leaf(self.old)} → {format_leaf(self.new)}"

    def as_dict(self) -> dict:
        return {"key": self.key, "kind": self.kind,
                "old": None if self.old is ABSENT else self.old,
                "new": None if self.new is ABSENT else self.new}


class Pair(NamedTuple):
    a: dict
    b: dict
    by: str   # "payload": equal apart from the study's changes; "label": only the label agrees


def _tree(tree: dict | str | bytes) -> dict:
    return json.loads(tree) if isinstance(tree, (str, bytes)) else tree


def _part(name: str) -> str:
    return name if _BARE_KEY.match(name) else json.dumps(name, ensure_ascii=False)


def _leaves(node: Any, loc: tuple = ()) -> Iterator[tuple[tuple, Any]]:
    if isinstance(node, dict) and node:
        for k, v in node.items():
            yield from _leaves(v, loc + (_part(k),))
    elif isinstance(node, list) and any(isinstance(x, dict) for x in node):
        for i, v in enumerate(node):
            yield from _leaves(v, loc + (i,))
    else:
        yield loc, node


def flatten(tree: dict | str | bytes) -> dict[str, Any]:
    """``{"a": {"b": 1}, "t": [{"k": 2}]}`` → ``{"a.b": 1, "t[0].k": 2}``."""
    return {dotted(loc): v for loc, v in _leaves(_tree(tree))}


def canonical_leaf(value: Any) -> str:
    return json.dumps(_number_form(value), sort_keys=True, ensure_ascii=False)


def _number_form(value: Any) -> Any:
    # An integral float is the integer it equals (RFC 8785 writes both the same way); a bool is not.
    if isinstance(value, float) and value.is_integer():
        return int(value)
    if isinstance(value, list):
        return [_number_form(v) for v in value]
    if isinstance(value, dict):
        return {k: _number_form(v) for k, v in value.items()}
    return value


def _order(loc: tuple) -> tuple:
    # Indices sort as numbers (axis[2] before axis[10]); a name and an index never share a slot
    # in one valid tree, but the tag keeps the comparison total if they do.
    return tuple((0, p, "") if isinstance(p, int) else (1, 0, p) for p in loc)


def spec_diff(a_tree: dict | str | bytes, b_tree: dict | str | bytes) -> list[Change]:
    """Every leaf that differs between A and B, in key order."""
    a = dict(_leaves(_tree(a_tree)))
    b = dict(_leaves(_tree(b_tree)))
    changes = []
    for loc in sorted(a.keys() | b.keys(), key=_order):
        old, new = a.get(loc, ABSENT), b.get(loc, ABSENT)
        if old is ABSENT or new is ABSENT or canonical_leaf(old) != canonical_leaf(new):
            changes.append(Change(dotted(loc), old, new))
    return changes


def _covered(key: str, removed: frozenset[str]) -> bool:
    return any(key == r or key.startswith((r + ".", r + "[")) for r in removed)


def _reduced(payload: dict, removed: frozenset[str]) -> str:
    return canonical_leaf({k: v for k, v in flatten(payload).items() if not _covered(k, removed)})


def match_variants(a_variants: list[dict], b_variants: list[dict],
                   changed_keys: Iterable[str]) -> tuple[list[Pair], list[dict], list[dict]]:
    """Pair variants ``{"label", "payload"}`` of two studies; returns (pairs, only_a, only_b).

    Rounds, each over what is still unmatched: (1) identical payloads; (2) payloads equal once
    the changed keys are removed — ``ablation.*`` and ``study.*`` keys remove nothing, as a
    payload holds neither section (:func:`compiler.hashing.variant_payload`); (3) equal labels. In
    rounds 1–2 a payload shared by several variants on a side is ambiguous and waits for round 3.
    Pairs follow A's order, the unmatched each side's own order.
    """
    removed = frozenset(changed_keys)
    left_a = list(range(len(a_variants)))
    left_b = list(range(len(b_variants)))
    matched: dict[int, tuple[int, str]] = {}

    def pair_unique(key, by: str) -> None:
        ka = {i: key(a_variants[i]) for i in left_a}
        kb = {j: key(b_variants[j]) for j in left_b}
        count_a, count_b = Counter(ka.values()), Counter(kb.values())
        only_b = {k: j for j, k in kb.items() if count_b[k] == 1}
        for i, k in ka.items():
            if count_a[k] == 1 and k in only_b:
                matched[i] = (only_b[k], by)
        taken = {j for j, _ in matched.values()}
        left_a[:] = [i for i in left_a if i not in matched]
        left_b[:] = [j for j in left_b if j not in taken]

    for stage in (frozenset(), removed):
        pair_unique(lambda v, stage=stage: _reduced(v["payload"], stage), "payload")
    pair_unique(lambda v: v["label"], "label")

    pairs = [Pair(a_variants[i], b_variants[j], by) for i, (j, by) in sorted(matched.items())]
    return pairs, [a_variants[i] for i in left_a], [b_variants[j] for j in left_b]
