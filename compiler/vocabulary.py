"""Words a spec used to spell differently, and the one translation between old and current words.

A spec file may still use an old word: :func:`respell` reads it as the current word (the loader
reports each as a notice). Identities never follow a rename: the study hash, the variant hash and
the program key are computed over :func:`identity_form`, the dump spelled with the words of
result-set format 1, so a study keeps its hash, its folder and its run ids when a word changes,
and result sets written before the rename stay replayable (``runtime.migrate`` renames their
columns and values the same way).
"""

from __future__ import annotations

from typing import Any

__all__ = ["VALUE_WORDS", "KEY_WORDS", "respell", "identity_form", "Respelling"]

# A value of a key that is now spelled differently: dotted key -> {old: current}.
VALUE_WORDS: dict[str, dict[str, str]] = {
    "regularization.dropout.kind": {"connect": "dropconnect"},
}
# A key of every [[ablation.variant]] table that is now spelled differently: old -> current.
KEY_WORDS: dict[str, str] = {"set": "changes"}

Respelling = tuple[tuple, str, str]      # (where, old word, current word)


def _words(forward: bool) -> tuple[dict[str, dict[str, str]], dict[str, str]]:
    if forward:
        return VALUE_WORDS, KEY_WORDS
    return ({k: {new: old for old, new in m.items()} for k, m in VALUE_WORDS.items()},
            {new: old for old, new in KEY_WORDS.items()})


def _below(value: Any, rest: list[str], words: dict[str, str], loc: tuple, found: list) -> Any:
    """``value`` with the word at the dotted path ``rest`` below it replaced (a copy when changed)."""
    if not rest:
        if isinstance(value, str) and value in words:
            found.append((loc, value, words[value]))
            return words[value]
        return value
    if isinstance(value, dict) and rest[0] in value:
        inner = _below(value[rest[0]], rest[1:], words, (*loc, rest[0]), found)
        if inner is not value[rest[0]]:
            return {**value, rest[0]: inner}
    return value


def _addressed(key: str, value: Any, values: dict, loc: tuple, found: list) -> Any:
    """A value given to the dotted ``key`` (an axis value, a listed change), respelled."""
    for path, words in values.items():
        if path == key:
            value = _below(value, [], words, loc, found)
        elif path.startswith(key + "."):
            value = _below(value, path[len(key) + 1:].split("."), words, loc, found)
    return value


def respell(tree: dict, forward: bool = True) -> tuple[dict, list[Respelling]]:
    """``tree`` (a spec as parsed TOML, or a spec's dump) with old words read as current ones
    (``forward``) or current words written as the old ones (not ``forward``: the identity form),
    and where each replaced word was. The input is never modified; unchanged parts are shared."""
    if not isinstance(tree, dict):
        return tree, []
    values, keys = _words(forward)
    found: list[Respelling] = []
    out = tree
    for path, words in values.items():
        out = _below(out, path.split("."), words, (), found)
    ablation = out.get("ablation")
    if isinstance(ablation, dict):
        ablation = dict(ablation)
        axes = ablation.get("axis")
        if isinstance(axes, list):
            ablation["axis"] = [_axis(a, i, values, found) for i, a in enumerate(axes)]
        listed = ablation.get("variant")
        if isinstance(listed, list):
            ablation["variant"] = [_listed(v, i, values, keys, found) for i, v in enumerate(listed)]
        if found:
            out = {**out, "ablation": ablation}
    return out, found


def _axis(axis: Any, i: int, values: dict, found: list) -> Any:
    if not (isinstance(axis, dict) and isinstance(axis.get("key"), str) and isinstance(axis.get("values"), list)):
        return axis
    before = len(found)
    new = [_addressed(axis["key"], x, values, ("ablation", "axis", i, "values", j), found)
           for j, x in enumerate(axis["values"])]
    return {**axis, "values": new} if len(found) > before else axis


def _listed(variant: Any, i: int, values: dict, keys: dict, found: list) -> Any:
    if not isinstance(variant, dict):
        return variant
    out = dict(variant)
    written = {}   # current key -> the key as written, so that a notice points at its line
    for old, new in keys.items():
        if old in out and new not in out:
            found.append((("ablation", "variant", i, old), old, new))
            out = {(new if k == old else k): v for k, v in out.items()}
            written[new] = old
    for name in (*keys.values(), *keys):
        changes = out.get(name)
        if isinstance(changes, dict):
            at = ("ablation", "variant", i, written.get(name, name))
            out[name] = {k: _addressed(k, v, values, (*at, k), found) if isinstance(k, str) else v
                         for k, v in changes.items()}
    return out


def identity_form(tree: dict) -> dict:
    """A spec's (or a variant's) dump spelled with the words identities are computed over."""
    return respell(tree, forward=False)[0]
