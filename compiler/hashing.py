"""Identity of studies, variants and runs, and the split of a variant into program key and knobs.

- canonical JSON: RFC 8785 (JSON Canonicalization Scheme) of the normalized model, via the
  ``rfc8785`` package (ECMAScript number form, UTF-16 key order, NaN/±Inf refused);
- study hash: SHA-256 of the canonical JSON of the whole study, defaults filled in;
- variant hash: SHA-256 over what decides a run's numbers — every section but ``study`` (name,
  description, seeds, metric do not change a run) and ``ablation``;
- run id: ``<variant hash>-s<seed>``;
- every hash is taken over the dump in its identity form (:func:`compiler.vocabulary.identity_form`:
  the words of result-set format 1), so renaming a word of the spec language changes no hash;
- program key: the variant with every *knob* removed. Knobs are the continuous values the
  compiled program takes as traced inputs, so all variants with one program key share one
  XLA program. Each spec model names its knob fields (``knobs``, a class attribute); a variant's
  knobs are those of the models it is made of (:func:`knobs_of`), and :data:`KNOBS`, every knob
  path a variant can have, is derived from the schema.
"""

from __future__ import annotations

import hashlib
from typing import Any, Iterator

import rfc8785
from pydantic import BaseModel

from compiler.paths import models_in
from compiler.spec import Spec
from compiler.vocabulary import identity_form

__all__ = ["canonical_json", "sha256_hex", "study_json", "study_hash", "variant_hash", "run_id",
           "sections", "KNOBS", "knobs_of", "program_key", "identity", "variant_payload", "lookup"]

# Sections that do not decide a run's numbers (and have no knobs).
_NOT_RUN = {"study", "ablation"}


def _knob_paths(model: type[BaseModel], prefix: str) -> Iterator[str]:
    for name, info in model.model_fields.items():
        if name in model.knobs:
            yield prefix + name
        for sub in models_in(info.annotation):
            yield from _knob_paths(sub, f"{prefix}{name}.")


# Every knob path of any kind, in schema order; a variant has those of the kinds it uses.
KNOBS: tuple[str, ...] = tuple(dict.fromkeys(
    path for path in _knob_paths(Spec, "") if path.split(".")[0] not in _NOT_RUN))


def canonical_json(obj: Any, memo: dict | None = None) -> bytes:
    """RFC 8785 bytes of ``obj``. With ``memo`` (a dict kept across calls), every scalar and key is
    serialized by ``rfc8785`` once per distinct (type, value), and objects and arrays are joined
    here once per distinct value: the scheme writes them member by member (objects in UTF-16 key order) without
    whitespace, so the bytes are the same, and the variants of a study share almost all their
    values. Types tell 1 from 1.0 from true; 0.0 and -0.0 share a key and a form ("0")."""
    if memo is None:
        return rfc8785.dumps(obj)
    return _joined(obj, memo)


def _joined(obj: Any, memo: dict) -> bytes:
    kind = type(obj)
    if kind is dict or kind is list:
        # repr is exact enough for a key (1, 1.0 and True print apart) and cheap next to joining.
        form = memo.get(key := repr(obj))
        if form is None:
            if kind is dict:
                order = sorted(obj, key=lambda k: k.encode("utf-16-be"))
                form = b"{" + b",".join(_joined(k, memo) + b":" + _joined(obj[k], memo) for k in order) + b"}"
            else:
                form = b"[" + b",".join(_joined(x, memo) for x in obj) + b"]"
            memo[key] = form
        return form
    form = memo.get(key := (kind, obj))
    if form is None:
        form = memo[key] = rfc8785.dumps(obj)
    return form


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def study_json(spec: Spec) -> bytes:
    """The canonical JSON a study is identified by (and stored with), in its identity form."""
    return canonical_json(identity_form(spec.model_dump(mode="json")))


def study_hash(spec: Spec) -> str:
    return sha256_hex(study_json(spec))


def variant_payload(variant: Spec) -> dict:
    """The part of a resolved variant that decides its runs."""
    return variant.model_dump(mode="json", exclude={"study", "ablation"})


def variant_hash(variant: Spec) -> str:
    return sha256_hex(canonical_json(identity_form(variant_payload(variant))))


def run_id(vhash: str, seed: int) -> str:
    return f"{vhash[:16]}-s{seed}"


# Keys that dumps leave out at their default so older study hashes hold (compiler.spec.Standardize).
OMITTED_AT_DEFAULT = {"data.standardize": True, "data.test": 0.0}


def lookup(tree: dict, path: str):
    """The value at a dotted path of a spec's dump, or None where the path does not exist."""
    node = tree
    for part in path.split("."):
        if not isinstance(node, dict) or part not in node:
            return OMITTED_AT_DEFAULT.get(path)
        node = node[part]
    return node


def sections(model: BaseModel, prefix: str = "") -> Iterator[tuple[str, BaseModel]]:
    """``(dotted prefix, model)`` for a model and every model nested in it, parents first."""
    yield prefix, model
    for name in type(model).model_fields:
        value = getattr(model, name)
        if isinstance(value, BaseModel):
            yield from sections(value, f"{prefix}{name}.")


def knobs_of(variant: Spec) -> dict[str, float]:
    """Knob values of a variant (the knob fields of the models it is made of), as floats, in
    :data:`KNOBS` order."""
    found = {prefix + name: float(getattr(section, name))
             for prefix, section in sections(variant) if prefix.split(".")[0] not in _NOT_RUN
             for name in type(section).knobs}
    return {path: found[path] for path in KNOBS if path in found}


def program_key(variant: Spec) -> str:
    return identity(variant)[1]


def identity(variant: Spec, memo: dict[str, bytes] | None = None) -> tuple[str, str]:
    """(variant hash, program key) from one dump of the variant; ``memo`` as in
    :func:`canonical_json`, shared across the variants of a study."""
    tree = identity_form(variant_payload(variant))
    vhash = sha256_hex(canonical_json(tree, memo))
    for path in knobs_of(variant):
        *head, last = path.split(".")
        node = lookup(tree, ".".join(head)) if head else tree
        if isinstance(node, dict):
            node.pop(last, None)
    return vhash, sha256_hex(canonical_json(tree, memo))[:12]
