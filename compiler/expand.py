"""Ablation expansion: a study becomes its variants, each a complete, validated spec.

Modes:
- ``grid``: the cartesian product of the axes;
- ``one_at_a_time``: the base, then each value of each axis changed alone (a value equal to the
  base's is the base and is not repeated);
- ``list``: the explicit ``[[ablation.variant]]`` tables (the base first unless
  ``include_base = false``).

With ``[ablation.tune]`` the variants those modes make are *arms*: each arm runs once per
combination of the tuned knobs' values (the same settings, hence the same budget, for every arm),
and every such run's variant records its ``arm`` and ``setting``. Tuned keys must be knobs of
every arm (traced inputs: tuning adds lanes, never programs) and not keys the ablation varies.

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
from dataclasses import dataclass, field
from typing import Any

from pydantic import BaseModel, ValidationError

from compiler.errors import Problem, SpecError, dotted
from compiler.hashing import identity, knobs_of
from compiler.labels import BASE_LABEL, axis_label, axis_names, format_value, grid_label, label_parts
from compiler.paths import field_paths
from compiler.problems import pydantic_problems
from compiler.spec import ChannelBudget, NeuronBudget, Spec

__all__ = ["Variant", "expand", "arms", "max_variants", "MAX_VARIANTS"]

# Expansion costs about 0.1 ms per variant and every variant runs for seconds to minutes, so a
# study beyond this is almost always a typo (one axis too many); $LESION_MAX_VARIANTS raises it.
MAX_VARIANTS = 10_000


@dataclass(frozen=True)
class Variant:
    index: int
    label: str
    changes: dict[str, Any]      # dotted key -> value, empty for the base
    spec: Spec                   # resolved: no ablation, model.hidden and model.blocks explicit lists
    hash: str = field(default="")
    program: str = field(default="")      # the program key (compiler.hashing.program_key)
    # With [ablation.tune]: the arm this run of the tuning belongs to (an untuned variant) and the
    # tuned knobs' values; None and {} otherwise.
    arm: "Variant | None" = field(default=None, compare=False)
    setting: dict[str, float] = field(default_factory=dict)
    # (metric, "last" | "best"): the epoch a run is judged and its test split scored at
    # (compiler.spec.Spec.selection); the metric only matters for "best".
    judge: tuple[str, str] = ("", "last")


# ── axis keys ───────────────────────────────────────────────────────────────────────────────────
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


# ── expansion ───────────────────────────────────────────────────────────────────────────────────
def _resolve(raw: dict) -> Spec:
    spec = Spec.model_validate(raw)
    net = spec.model
    if isinstance(getattr(net, "hidden", None), NeuronBudget):
        spec = spec.model_copy(update={"model": net.model_copy(update={"hidden": net.hidden.widths})})
    if isinstance(getattr(net, "blocks", None), ChannelBudget):
        spec = spec.model_copy(update={"model": net.model_copy(update={"blocks": net.blocks.blocks})})
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
    if abl.tune is not None:
        arms, how = _count(abl.model_copy(update={"tune": None}))
        settings = math.prod(len(k.grid) for k in abl.tune.knob)
        return arms * settings, f"{how} × {settings} tuned settings per arm"
    if abl.mode == "list":
        return len(abl.variant) + abl.include_base, "the list"
    sizes = [len(a.values) for a in abl.axis]
    if abl.mode == "grid":
        return math.prod(sizes), f"the grid ({' × '.join(map(str, sizes))})"
    return 1 + sum(sizes), "one value at a time (the base + " + " + ".join(map(str, sizes)) + ")"


def expand(spec: Spec) -> list[Variant]:
    """The variants of a study, in a fixed order (with ``[ablation.tune]``: each arm's settings
    in turn). Raises SpecError listing every problem."""
    tune = spec.ablation.tune if spec.ablation is not None else None
    if tune is None:
        return _expand(spec)
    count, how = _count(spec.ablation)
    limit = max_variants()
    if count > limit:
        raise SpecError([Problem(("ablation",), f"{how} makes {count:,} variants, above the limit of {limit:,}; "
                                                "tune fewer values, or set LESION_MAX_VARIANTS in the environment")])
    arm_list = _expand(spec.model_copy(update={"ablation": spec.ablation.model_copy(update={"tune": None})}))
    return _tuned(spec, arm_list)


def arms(variants: list[Variant]) -> list[Variant]:
    """The arms of a study's variants in order: each variant itself when nothing is tuned."""
    out: dict[str, Variant] = {}
    for v in variants:
        arm = v.arm or v
        out.setdefault(arm.hash, arm)
    return list(out.values())


def _tuned(spec: Spec, arm_list: list[Variant]) -> list[Variant]:
    tune = spec.ablation.tune
    varied = {k for arm in arm_list for k in arm.changes}
    problems = []
    for i, knob in enumerate(tune.knob):
        where = ("ablation", "tune", "knob", i, "key")
        if knob.key in varied:
            problems.append(Problem(where, f"{knob.key!r} is varied by the ablation itself; an arm cannot both fix "
                                           "and tune it (tune another knob, or drop it from the arms)"))
            continue
        lacking = [arm.label for arm in arm_list if knob.key not in knobs_of(arm.spec)]
        if lacking:
            known = sorted(set.intersection(*(set(knobs_of(a.spec)) for a in arm_list)) - varied)
            problems.append(Problem(where, f"{knob.key!r} is not a knob of {_some(lacking)}: only knobs (values the "
                                           "compiled program takes as inputs, so tuning adds lanes, not programs) "
                                           f"can be tuned; knobs of every arm: {', '.join(known)}"))
    if problems:
        raise SpecError(problems)
    raw = spec.model_dump(mode="python", exclude_unset=True, exclude={"ablation"}, round_trip=True)
    raw = json.loads(json.dumps(_plain(raw)))
    _with_kinds(raw, spec)
    out: list[Variant] = []
    memo: dict[str, bytes] = {}
    for arm in arm_list:
        for setting in tune.settings:
            tree = dict(raw)
            for key, value in {**arm.changes, **setting}.items():
                _deep_set(tree, key, value)
            label = ", ".join([arm.label, *label_parts(setting)])
            try:
                resolved = _resolve(tree)
            except ValidationError as err:
                for p in pydantic_problems(err):
                    key = next((k for k in setting if dotted(p.loc) == k), None)
                    at = ("ablation", "tune", "knob", [k.key for k in tune.knob].index(key)) if key else ("ablation",)
                    problems.append(Problem(at, f"variant '{label}' is invalid: {dotted(p.loc)}: {p.message}"))
                continue
            vhash, program = identity(resolved, memo)
            out.append(Variant(len(out), label, {**arm.changes, **setting}, resolved, vhash, program, arm, setting,
                               spec.selection))
    if problems:
        raise SpecError(problems[:20])
    return out


def _some(labels: list[str]) -> str:
    return "arm " + repr(labels[0]) + (f" and {len(labels) - 1} more" if len(labels) > 1 else "")


def _expand(spec: Spec) -> list[Variant]:
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
    candidates: list[tuple[str, dict, tuple, dict[str, tuple]]] = []
    problems: list[Problem] = []

    if abl is None:
        candidates.append((BASE_LABEL, {}, (), {}))
    elif abl.mode == "list":
        if abl.include_base:
            candidates.append((BASE_LABEL, {}, ("ablation",), {}))
        for i, v in enumerate(abl.variant):
            for key in v.changes:
                why = _check_key(key)
                if why:
                    problems.append(Problem(("ablation", "variant", i, "changes", key), why))
            candidates.append((v.label, dict(v.changes), ("ablation", "variant", i),
                               {k: ("ablation", "variant", i, "changes", k) for k in v.changes}))
    else:
        for i, axis in enumerate(abl.axis):
            why = _check_key(axis.key)
            if why:
                problems.append(Problem(("ablation", "axis", i, "key"), f"{axis.key!r}: {why}"))
        if abl.mode == "grid":
            for combo in itertools.product(*[list(enumerate(a.values)) for a in abl.axis]):
                changes = {a.key: v for a, (_, v) in zip(abl.axis, combo)}
                label = grid_label([v for _, v in combo])
                # The last axis stands for the whole combination; _blame narrows a problem down
                # to the axis whose key it concerns.
                where = ("ablation", "axis", len(abl.axis) - 1, "values", combo[-1][0])
                origins = {a.key: ("ablation", "axis", k, "values", j) for k, (a, (j, _)) in enumerate(zip(abl.axis, combo))}
                candidates.append((label, changes, where, origins))
        else:
            candidates.append((BASE_LABEL, {}, ("ablation",), {}))
            names = axis_names([(a.key, a.name) for a in abl.axis])
            for i, axis in enumerate(abl.axis):
                for j, value in enumerate(axis.values):
                    here = ("ablation", "axis", i, "values", j)
                    candidates.append((axis_label(names[axis.key], value), {axis.key: value}, here, {axis.key: here}))
    if problems:
        raise SpecError(problems)

    variants: list[Variant] = []
    by_hash: dict[str, Variant] = {}
    memo: dict[str, bytes] = {}
    for label, changes, where, origins in candidates:
        tree = dict(raw)
        for key, value in changes.items():
            _deep_set(tree, key, value)
        try:
            resolved = _resolve(tree)
        except ValidationError as err:
            for p in pydantic_problems(err):
                cause = _blame(origins, p.loc)
                message = f"variant {_named(label, changes, abl)} is invalid: {dotted(p.loc)}: {p.message}"
                if cause and p.message.startswith("unknown key") and _written(raw, p.loc):
                    message += (f"; the base spec sets {dotted(p.loc)}, which {cause}={format_value(changes[cause])} "
                                "does not have: remove it from the base or set it only in the variants that use it")
                problems.append(Problem(origins.get(cause, where), message))
            continue
        vhash, program = identity(resolved, memo)
        if vhash in by_hash:
            first = by_hash[vhash]
            if abl is not None and abl.mode == "one_at_a_time" and first.label == BASE_LABEL:
                continue  # the axis lists the base value itself: the base already runs it
            problems.append(Problem(where, f"variant {_named(label, changes, abl)} is the same configuration as '{first.label}' "
                                           "(remove one of them)"))
            continue
        v = Variant(len(variants), label, changes, resolved, vhash, program)
        by_hash[vhash] = v
        variants.append(v)
    counts = collections.Counter(v.label for v in variants)
    for lab in sorted(x for x, n in counts.items() if n > 1):
        problems.append(Problem(("ablation",), f"two variants have the label '{lab}'"))
    if problems:
        raise SpecError(problems)
    return variants


def _named(label: str, changes: dict, abl) -> str:
    """A variant as a message names it: a generated label gives values alone, so the keys follow."""
    if abl is None or abl.mode == "list" or not changes:
        return f"'{label}'"
    return f"'{label}' ({', '.join(label_parts(changes))})"


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
