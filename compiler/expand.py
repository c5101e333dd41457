"""Ablation expansion: a study becomes its variants, each a complete, validated spec.

Modes:
- ``grid``: the cartesian product of the axes;
- ``one_at_a_time``: the base, then each value of each axis changed alone (a value equal to the
  base's is the base and is not repeated);
- ``list``: the explicit ``[[ablation.variant]]`` tables (the base first unless
  ``include_base = false``).

An axis key addresses any field by its dotted path, inside tagged unions too. Changes are applied
to what the user wrote (defaults are not copied in), so switching ``optimizer.kind`` from ``sgd``
to ``adam`` drops sgd's defaults, while a key the user set that the new kind lacks is an error.
"""

from __future__ import annotations

import collections
import copy
import difflib
import itertools
import json
import math
import os
import types
import typing
from dataclasses import dataclass, field
from typing import Any, Union

from pydantic import BaseModel, ValidationError

from compiler.errors import Problem, SpecError, dotted
from compiler.hashing import identity
from compiler.spec import NeuronBudget, Spec

__all__ = ["Variant", "expand", "max_variants", "MAX_VARIANTS", "field_paths", "format_value", "pydantic_problems"]

BASE_LABEL = "base"
# Expansion costs about 0.1 ms per variant and every variant runs for seconds to minutes, so a
# study beyond this is almost always a typo (one axis too many); $LESION_MAX_VARIANTS raises it.
MAX_VARIANTS = 10_000


@dataclass(frozen=True)
class Variant:
    index: int
    label: str
    changes: dict[str, Any]      # dotted key -> value, empty for the base
    spec: Spec                   # resolved: no ablation, model.hidden an explicit list
    hash: str = field(default="")
    structure: str = field(default="")


def format_value(value: Any) -> str:
    if isinstance(value, str):
        return value
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    return json.dumps(value, separators=(",", ":"), sort_keys=True)


def _label(changes: dict[str, Any]) -> str:
    return ", ".join(f"{k}={format_value(v)}" for k, v in changes.items()) or BASE_LABEL


# ── key paths ───────────────────────────────────────────────────────────────────────────────────
def _models_in(annotation) -> list[type[BaseModel]]:
    """The pydantic models an annotation may hold (through Annotated, Union, Optional)."""
    origin = typing.get_origin(annotation)
    if origin is typing.Annotated:
        return _models_in(typing.get_args(annotation)[0])
    if origin in (Union, types.UnionType):
        return [m for a in typing.get_args(annotation) for m in _models_in(a)]
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    return []


def field_paths(model: type[BaseModel] = Spec, prefix: str = "") -> set[str]:
    """Every dotted key a spec can contain (union members' fields together)."""
    out = set()
    for name, info in model.model_fields.items():
        path = f"{prefix}{name}"
        out.add(path)
        for sub in _models_in(info.annotation):
            out |= field_paths(sub, path + ".")
    return out


_SETTABLE = {p for p in field_paths() if not p.startswith(("ablation", "study"))}


def _check_key(key: str) -> str | None:
    if key in _SETTABLE:
        return None
    if key.startswith("ablation"):
        return "an axis cannot change the ablation itself"
    if key.startswith("study"):
        return "an axis cannot change the study section (name, seeds, metric are the same for every variant)"
    close = difflib.get_close_matches(key, sorted(_SETTABLE), n=1, cutoff=0.6)
    hint = f"; did you mean '{close[0]}'?" if close else ""
    return f"no such key in a spec{hint}"


# ── applying changes ────────────────────────────────────────────────────────────────────────────
def _deep_set(tree: dict, key: str, value: Any) -> None:
    """Set a dotted key in ``tree``, copying the tables on its path: the rest of the tree is
    shared with the base (validation only reads it), which saves copying it whole per variant."""
    *head, last = key.split(".")
    node = tree
    for part in head:
        nxt = node.get(part)
        # A nested model given in a shorter form (e.g. hidden as a list) is replaced whole.
        nxt = dict(nxt) if isinstance(nxt, dict) else {}
        node[part] = nxt
        node = nxt
    node[last] = copy.deepcopy(value)


def pydantic_problems(err: ValidationError, prefix: tuple = ()) -> list[Problem]:
    """One Problem per pydantic error, with the tagged-union member names taken out of the path."""
    problems = []
    for e in err.errors(include_url=False):
        _, loc = _walk(e["loc"])
        message = _message(e, loc)
        if e["type"] == "union_tag_invalid":
            loc += ("kind",)  # the wrong value is written on the kind line, not on the table
        if message.startswith("@"):
            for line in message.splitlines():
                key, _, text = line[1:].partition(": ")
                problems.append(Problem(prefix + loc + tuple(key.split(".")), text))
        else:
            problems.append(Problem(prefix + loc, message))
    return problems


def _walk(raw_loc) -> tuple[list[type[BaseModel]], tuple]:
    """Follow a pydantic error location through the spec models: the models it ends in and the
    location as the user wrote it (union tags such as 'sgd' or 'widths' removed)."""
    models: list[type[BaseModel]] = [Spec]
    loc: list = []
    for part in raw_loc:
        if isinstance(part, int):
            loc.append(part)
            continue
        fields = [m.model_fields[part] for m in models if part in m.model_fields]
        if fields:
            loc.append(part)
            models = [x for f in fields for x in (_models_in(f.annotation) or _list_models(f.annotation))]
            continue
        tagged = [m for m in models if part in _tags_of(m)]
        if tagged:
            models = tagged
        elif not part.startswith(("list[", "constrained-", "function-", "widths", "budget", "dict[")):
            loc.append(part)
    return models, tuple(loc)


def _tags_of(model: type[BaseModel]) -> set[str]:
    kind = model.model_fields.get("kind")
    tags = set(typing.get_args(kind.annotation)) if kind is not None else set()
    return tags | {model.__name__}


def _message(e: dict, loc: tuple) -> str:
    kind = e["type"]
    got = e.get("input")
    if kind == "extra_forbidden":
        name = loc[-1] if loc else "?"
        parent = _walk(e["loc"][:-1])[0]
        choices = sorted({f for m in parent for f in m.model_fields})
        close = difflib.get_close_matches(str(name), choices, n=1, cutoff=0.5)
        hint = f"; did you mean '{close[0]}'?" if close else (f" (expected one of: {', '.join(choices)})" if choices else "")
        return f"unknown key '{name}'{hint}"
    if kind == "missing":
        return "required key is missing"
    if kind == "union_tag_invalid":
        ctx = e.get("ctx", {})
        return f"unknown kind {ctx.get('tag')!r} (expected one of {ctx.get('expected_tags')})"
    if kind == "union_tag_not_found":
        return "a 'kind' key is required here (it selects which variant of this section you mean)"
    msg = e["msg"]
    if msg.startswith("Value error, "):
        msg = msg[len("Value error, "):]
    if kind.endswith("_type") or kind in ("literal_error", "model_type", "model_attributes_type"):
        return f"{msg[0].lower() + msg[1:]} (got {_short(got)})"
    if kind in ("greater_than", "greater_than_equal", "less_than", "less_than_equal", "finite_number",
                "string_pattern_mismatch", "too_short", "too_long", "string_too_long", "string_too_short"):
        return f"{msg[0].lower() + msg[1:]} (got {_short(got)})"
    return msg[0].lower() + msg[1:] if msg else kind


def _short(value: Any) -> str:
    text = repr(value) if not isinstance(value, (dict, list)) else json.dumps(value, default=str)[:60]
    return text if len(text) <= 60 else text[:57] + "..."


def _list_models(annotation) -> list[type[BaseModel]]:
    origin = typing.get_origin(annotation)
    if origin is typing.Annotated:
        return _list_models(typing.get_args(annotation)[0])
    if origin is list:
        return _models_in(typing.get_args(annotation)[0])
    return []


# ── expansion ───────────────────────────────────────────────────────────────────────────────────
def _resolve(raw: dict) -> Spec:
    spec = Spec.model_validate(raw)
    hidden = spec.model.hidden
    if isinstance(hidden, NeuronBudget):
        spec = spec.model_copy(update={"model": spec.model.model_copy(update={"hidden": hidden.widths})})
    return spec


def max_variants() -> int:
    """The most variants a study may expand to: ``$LESION_MAX_VARIANTS``, else
    :data:`MAX_VARIANTS`. Raises SpecError when the setting is not a positive whole number."""
    text = os.environ.get("LESION_MAX_VARIANTS", "").strip()
    if not text:
        return MAX_VARIANTS
    if not text.isdigit() or int(text) < 1:
        raise SpecError([Problem(("ablation",), f"LESION_MAX_VARIANTS={text!r}: expected a positive whole number "
                                                f"of variants (the default is {MAX_VARIANTS:,}), or leave it unset")])
    return int(text)


def _count(abl) -> tuple[int, str]:
    """How many variants an ablation asks for, and how (for the message), before building any."""
    if abl is None:
        return 1, "the study"
    if abl.mode == "list":
        return len(abl.variant) + abl.include_base, "the list"
    sizes = [len(a.values) for a in abl.axis]
    if abl.mode == "grid":
        return math.prod(sizes), f"the grid ({' × '.join(map(str, sizes))})"
    return 1 + sum(sizes), "one value at a time (the base + " + " + ".join(map(str, sizes)) + ")"


def expand(spec: Spec) -> list[Variant]:
    """The variants of a study, in a fixed order. Raises SpecError listing every problem."""
    count, how = _count(spec.ablation)
    limit = max_variants()
    if count > limit:
        # Counted, not built: a grid of three 200-value axes is 8 million variants, hours of
        # expansion before any message.
        raise SpecError([Problem(("ablation",), f"{how} makes {count:,} variants, above the limit of {limit:,}; "
                                                "drop values or axes, or split the study (to go beyond, set "
                                                f"LESION_MAX_VARIANTS={count} in the environment)")])
    raw = spec.model_dump(mode="python", exclude_unset=True, exclude={"ablation"}, round_trip=True)
    raw = json.loads(json.dumps(_plain(raw)))
    _with_kinds(raw, spec)
    abl = spec.ablation
    # Each candidate: (label, changes, where it is written in the TOML document, where each
    # changed key is written)
    candidates: list[tuple[str | None, dict, tuple, dict[str, tuple]]] = []
    problems: list[Problem] = []

    if abl is None:
        candidates.append((BASE_LABEL, {}, (), {}))
    elif abl.mode == "list":
        if abl.include_base:
            candidates.append((BASE_LABEL, {}, ("ablation",), {}))
        for i, v in enumerate(abl.variant):
            for key in v.set:
                why = _check_key(key)
                if why:
                    problems.append(Problem(("ablation", "variant", i, "set", key), why))
            candidates.append((v.label, dict(v.set), ("ablation", "variant", i),
                               {k: ("ablation", "variant", i, "set", k) for k in v.set}))
    else:
        for i, axis in enumerate(abl.axis):
            why = _check_key(axis.key)
            if why:
                problems.append(Problem(("ablation", "axis", i, "key"), f"{axis.key!r}: {why}"))
        if abl.mode == "grid":
            for combo in itertools.product(*[list(enumerate(a.values)) for a in abl.axis]):
                changes = {a.key: v for a, (_, v) in zip(abl.axis, combo)}
                # The last axis stands for the whole combination; _blame narrows a problem down
                # to the axis whose key it concerns.
                where = ("ablation", "axis", len(abl.axis) - 1, "values", combo[-1][0])
                origins = {a.key: ("ablation", "axis", k, "values", j) for k, (a, (j, _)) in enumerate(zip(abl.axis, combo))}
                candidates.append((None, changes, where, origins))
        else:
            candidates.append((BASE_LABEL, {}, ("ablation",), {}))
            for i, axis in enumerate(abl.axis):
                for j, value in enumerate(axis.values):
                    here = ("ablation", "axis", i, "values", j)
                    candidates.append((None, {axis.key: value}, here, {axis.key: here}))
    if problems:
        raise SpecError(problems)

    variants: list[Variant] = []
    by_hash: dict[str, Variant] = {}
    memo: dict[str, bytes] = {}
    for label, changes, where, origins in candidates:
        tree = dict(raw)
        for key, value in changes.items():
            _deep_set(tree, key, value)
        label = label or _label(changes)
        try:
            resolved = _resolve(tree)
        except ValidationError as err:
            for p in pydantic_problems(err):
                cause = _blame(origins, p.loc)
                message = f"variant '{label}' is invalid: {dotted(p.loc)}: {p.message}"
                if cause and p.message.startswith("unknown key") and _written(raw, p.loc):
                    message += (f"; the base spec sets {dotted(p.loc)}, which {cause}={format_value(changes[cause])} "
                                "does not have: remove it from the base or set it only in the variants that use it")
                problems.append(Problem(origins.get(cause, where), message))
            continue
        vhash, structure = identity(resolved, memo)
        if vhash in by_hash:
            first = by_hash[vhash]
            if abl is not None and abl.mode == "one_at_a_time" and first.label == BASE_LABEL:
                continue  # the axis lists the base value itself: the base already runs it
            problems.append(Problem(where, f"variant '{label}' is the same configuration as '{first.label}' "
                                           "(remove one of them)"))
            continue
        v = Variant(len(variants), label, changes, resolved, vhash, structure)
        by_hash[vhash] = v
        variants.append(v)
    counts = collections.Counter(v.label for v in variants)
    for lab in sorted(x for x, n in counts.items() if n > 1):
        problems.append(Problem(("ablation",), f"two variants have the label '{lab}'"))
    if problems:
        raise SpecError(problems)
    return variants


def _with_kinds(raw: dict, model: BaseModel) -> None:
    """Write down the ``kind`` of every tagged section, defaults included: a change such as
    ``optimizer.learning_rate`` to a study that leaves ``[optimizer]`` at its default must stay
    inside the default's kind (sgd), not create a section without one."""
    for name in type(model).model_fields:
        value = getattr(model, name)
        if isinstance(value, BaseModel) and "kind" in type(value).model_fields:
            node = raw.setdefault(name, {})
            if isinstance(node, dict):
                node.setdefault("kind", value.kind)
                _with_kinds(node, value)


def _blame(origins: dict[str, tuple], loc: tuple) -> str | None:
    """The changed key a problem at ``loc`` most likely comes from: the one sharing the longest
    dotted prefix with it (the later one on a tie); None when no change touches its section."""
    path = [p for p in loc if isinstance(p, str)]
    best, best_score = None, 0
    for key in origins:
        parts = key.split(".")
        score = next((n for n, (a, b) in enumerate(zip(parts, path)) if a != b), min(len(parts), len(path)))
        if score >= best_score and score > 0:
            best, best_score = key, score
    return best


def _written(tree: dict, loc: tuple) -> bool:
    node: Any = tree
    for part in loc:
        if not isinstance(node, dict) or part not in node:
            return False
        node = node[part]
    return True


def _plain(obj):
    if isinstance(obj, BaseModel):
        return _plain(obj.model_dump(mode="python", exclude_unset=True))
    if isinstance(obj, dict):
        return {k: _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    return obj
