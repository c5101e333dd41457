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
import json
from typing import Any

import rfc8785

from compiler.spec import Spec

__all__ = ["canonical_json", "sha256_hex", "study_hash", "variant_hash", "run_id",
           "KNOBS", "knobs_of", "structure_key", "identity", "variant_payload", "lookup"]

# Dotted paths of traced scalars. A path missing in a variant (another kind) is simply absent.
KNOBS: tuple[str, ...] = (
    "optimizer.learning_rate", "optimizer.momentum", "optimizer.b1", "optimizer.b2",
    "optimizer.eps", "optimizer.decay", "optimizer.schedule.rate",
    "optimizer.schedule.final_fraction", "regularization.weight_decay",
    "regularization.dropout.rate", "divergence.label_smoothing", "divergence.delta",
    "normalization.momentum", "normalization.epsilon",
)


def canonical_json(obj: Any, memo: dict[str, bytes] | None = None) -> bytes:
    """RFC 8785 bytes of ``obj``. With ``memo``, the members of a top-level object are
    canonicalized once per distinct value (keyed by their plain JSON text, which tells 1 from
    1.0 and true): the scheme writes an object member by member in UTF-16 key order, so the
    joined members are the same bytes, and the variants of a study share most of their sections."""
    if memo is None or not isinstance(obj, dict):
        return rfc8785.dumps(obj)
    members = []
    for key in sorted(obj, key=lambda k: k.encode("utf-16-be")):
        text = json.dumps(obj[key], sort_keys=True)
        if text not in memo:
            memo[text] = rfc8785.dumps(obj[key])
        members.append(rfc8785.dumps(key) + b":" + memo[text])
    return b"{" + b",".join(members) + b"}"


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
    return identity(variant)[1]


def identity(variant: Spec, memo: dict[str, bytes] | None = None) -> tuple[str, str]:
    """(variant hash, structure key) from one dump of the variant; ``memo`` as in
    :func:`canonical_json`, shared across the variants of a study."""
    tree = variant_payload(variant)
    vhash = sha256_hex(canonical_json(tree, memo))
    for path in KNOBS:
        *head, last = path.split(".")
        node = lookup(tree, ".".join(head)) if head else tree
        if isinstance(node, dict):
            node.pop(last, None)
    return vhash, sha256_hex(canonical_json(tree, memo))[:12]
