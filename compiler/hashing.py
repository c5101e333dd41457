"""Identity of studies, variants and runs, and the split of a variant into structure and knobs.

- canonical JSON: RFC 8785 (JSON Canonicalization Scheme) of the normalized model, via the
  ``rfc8785`` package (ECMAScript number form, UTF-16 key order, NaN/±Inf refused);
- study hash: SHA-256 of the canonical JSON of the whole study, defaults filled in;
- variant hash: SHA-256 over what decides a run's numbers — every section but ``study`` (name,
  description, seeds, metric do not change a run) and ``ablation``;
- run id: ``<variant hash>-s<seed>``;
- structure key: the variant with every *knob* removed. Knobs are the continuous values the
  compiled program takes as traced inputs, so all variants with one structure key share one
  XLA program. :data:`KNOBS` is the single list of them: ``compiler.build`` reads knob values
  through :func:`knobs_of` and nowhere else.
"""

from __future__ import annotations

import hashlib
from typing import Any

import rfc8785

from compiler.spec import Spec

__all__ = ["canonical_json", "sha256_hex", "study_hash", "variant_hash", "run_id",
           "KNOBS", "knobs_of", "structure_key", "variant_payload", "lookup"]

# Dotted paths of traced scalars. A path missing in a variant (another kind) is simply absent.
KNOBS: tuple[str, ...] = (
    "optimizer.learning_rate", "optimizer.momentum", "optimizer.b1", "optimizer.b2",
    "optimizer.eps", "optimizer.decay", "optimizer.schedule.rate",
    "optimizer.schedule.final_fraction", "regularization.weight_decay",
    "regularization.dropout.rate", "divergence.label_smoothing", "divergence.delta",
    "normalization.momentum", "normalization.epsilon",
)


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


# Keys that dumps leave out at their default so older study hashes hold (compiler.spec.Standardize).
OMITTED_AT_DEFAULT = {"data.standardize": True}


def lookup(tree: dict, path: str):
    """The value at a dotted path of a spec's dump, or None where the path does not exist."""
    node = tree
    for part in path.split("."):
        if not isinstance(node, dict) or part not in node:
            return OMITTED_AT_DEFAULT.get(path)
        node = node[part]
    return node


def knobs_of(variant: Spec) -> dict[str, float]:
    """Knob values of a variant, as floats, in :data:`KNOBS` order."""
    tree = variant_payload(variant)
    out = {}
    for path in KNOBS:
        value = lookup(tree, path)
        if value is not None:
            out[path] = float(value)
    return out


def structure_key(variant: Spec) -> str:
    tree = variant_payload(variant)
    for path in KNOBS:
        *head, last = path.split(".")
        node = lookup(tree, ".".join(head)) if head else tree
        if isinstance(node, dict):
            node.pop(last, None)
    return sha256_hex(canonical_json(tree))[:12]
