"""Identity of studies, variants and runs, and the split of a variant into structure and knobs.

- canonical JSON: RFC 8785 (JSON Canonicalization Scheme) of the normalized model, via the
  ``rfc8785`` package (ECMAScript number form, UTF-16 key order, NaN/±Inf refused);
- study hash: SHA-256 of the canonical JSON of the whole study, defaults filled in;
- variant hash: SHA-256 over what decides a run's numbers — every section but ``study`` (name,
  description, seeds, metric do not change a run) and ``ablation``;
- run id: ``<variant hash>-s<seed>``;
- structure key: the variant with every *knob* removed. Knobs are the continuous values the
  compiled program takes as traced inputs, so all variants with one structure key share one
  XLA program. Each spec model names its knob fields (``knobs``, a class attribute); a variant's
  knobs are those of the models it is made of (:func:`knobs_of`), and :data:`KNOBS`, every knob
  path a variant can have, is derived from the schema.
"""

from __future__ import annotations

import hashlib
import types
import typing
from typing import Any, Iterator, Union

import rfc8785
from pydantic import BaseModel

from compiler.spec import Spec

__all__ = ["canonical_json", "sha256_hex", "study_hash", "variant_hash", "run_id", "models_in",
           "sections", "KNOBS", "knobs_of", "structure_key", "variant_payload", "lookup"]

# Sections that do not decide a run's numbers (and have no knobs).
_NOT_RUN = {"study", "ablation"}


def models_in(annotation) -> list[type[BaseModel]]:
    """The pydantic models an annotation may hold (through Annotated, Union, Optional)."""
    origin = typing.get_origin(annotation)
    if origin is typing.Annotated:
        return models_in(typing.get_args(annotation)[0])
    if origin in (Union, types.UnionType):
        return [m for a in typing.get_args(annotation) for m in models_in(a)]
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    return []


def _knob_paths(model: type[BaseModel], prefix: str) -> Iterator[str]:
    for name, info in model.model_fields.items():
        if name in model.knobs:
            yield prefix + name
        for sub in models_in(info.annotation):
            yield from _knob_paths(sub, f"{prefix}{name}.")


# Every knob path of any kind, in schema order; a variant has those of the kinds it uses.
KNOBS: tuple[str, ...] = tuple(dict.fromkeys(
    path for path in _knob_paths(Spec, "") if path.split(".")[0] not in _NOT_RUN))


def canonical_json(obj: Any) -> bytes:
    return rfc8785.dumps(obj)


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def study_hash(spec: Spec) -> str:
    return sha256_hex(canonical_json(spec.model_dump(mode="json")))


def variant_payload(variant: Spec) -> dict:
    """The part of a resolved variant that decides its runs."""
    return variant.model_dump(mode="json", exclude={"study", "ablation"})


def variant_hash(variant: Spec) -> str:
    return sha256_hex(canonical_json(variant_payload(variant)))


def run_id(vhash: str, seed: int) -> str:
    return f"{vhash[:16]}-s{seed}"


def lookup(tree: dict, path: str):
    """The value at a dotted path of a nested dict, or None where the path does not exist."""
    node = tree
    for part in path.split("."):
        if not isinstance(node, dict) or part not in node:
            return None
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


def structure_key(variant: Spec) -> str:
    tree = variant_payload(variant)
    for path in knobs_of(variant):
        *head, last = path.split(".")
        node = lookup(tree, ".".join(head)) if head else tree
        if isinstance(node, dict):
            node.pop(last, None)
    return sha256_hex(canonical_json(tree))[:12]
