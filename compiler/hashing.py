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
           "KNOBS", "knobs_of", "structure_key", "identity", "variant_payload", "lookup"]

# Dotted paths of traced scalars. A path missing in a variant (another kind) is simply absent.
KNOBS: tuple[str, ...] = (
    "optimizer.learning_rate", "optimizer.momentum", "optimizer.b1", "optimizer.b2",
    "optimizer.eps", "optimizer.decay", "optimizer.schedule.rate",
    "optimizer.schedule.final_fraction", "regularization.weight_decay",
    "regularization.dropout.rate", "divergence.label_smoothing", "divergence.delta",
    "normalization.momentum", "normalization.epsilon",
)


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
