"""JSON Schema (draft 2020-12) of a spec file, for editors that complete and check TOML keys.

Contract: :func:`spec_schema` returns a schema that every spec ``lesion check`` accepts validates
against (the tests hold ``specs/*.toml`` to it). It is pydantic's schema of :class:`Spec` with
what pydantic cannot know from the types added:

- ``$schema``, ``$id``, a title and a description (every key's description comes from the
  attribute docstrings in ``compiler.spec``);
- each table selected by ``kind`` as ``if``/``then`` on ``kind`` instead of pydantic's ``oneOf``
  with an OpenAPI ``discriminator`` (not a 2020-12 keyword): under ``oneOf`` a typo inside the
  table only yields "not valid under any of the given schemas", under ``if``/``then`` the
  validator names the bad key;
- ``study.metric`` as an enum of the known metrics or a per-class metric's pattern (the model
  checks it in a validator, the class index against the class count);
- axis keys and ``[[ablation.variant]]`` ``set`` keys as enums of the dotted keys an ablation may
  change (expand checks them), so an editor offers them;
- no ``null`` for ``[ablation]``: TOML has no null, the table is simply left out.

The schema is a convenience for authors; ``compiler.loader`` stays the judge of validity.
"""

from __future__ import annotations

from typing import Any

from compiler.paths import field_paths
from compiler.spec import METRICS, PER_CLASS_METRICS, Spec

__all__ = ["spec_schema", "DRAFT", "SCHEMA_ID"]

DRAFT = "https://json-schema.org/draft/2020-12/schema"
# A name, not a place to fetch from: the schema is written by `lesion schema` next to the specs.
SCHEMA_ID = "urn:lesion:study-spec"


def spec_schema() -> dict[str, Any]:
    schema = Spec.model_json_schema()
    defs = schema["$defs"]
    settable = sorted(p for p in field_paths() if "." in p and not p.startswith(("ablation", "study")))
    # A per-class metric is its prefix and a class index; the spec's check compares the index with
    # the class count, which a schema cannot see.
    defs["Study"]["properties"]["metric"]["anyOf"] = [
        {"enum": list(METRICS)},
        *({"pattern": f"^{prefix}(0|[1-9][0-9]*)$"} for prefix in PER_CLASS_METRICS)]
    defs["Axis"]["properties"]["key"]["enum"] = settable
    defs["ListedVariant"]["properties"]["set"]["propertyNames"] = {"enum": settable}
    schema["properties"]["ablation"] = {"$ref": "#/$defs/Ablation", "description": defs["Ablation"]["description"]}
    schema = _tagged(schema, defs)
    return {
        "$schema": DRAFT,
        "$id": SCHEMA_ID,
        "title": "lesion study spec",
        "description": "One study: a base configuration and an [ablation] that derives variants from it, "
                       "each run once per seed. Written in TOML; this schema describes the parsed document.",
        **{k: v for k, v in schema.items() if k != "title"},
    }


def _kind_of(definition: dict) -> tuple[str, bool] | None:
    """(its kind, whether ``kind`` may be left out) of a model tagged by ``kind``, else None."""
    kind = definition.get("properties", {}).get("kind", {})
    return (kind["const"], "default" in kind) if "const" in kind else None


def _tagged(node: Any, defs: dict) -> Any:
    """Every ``oneOf`` whose branches are all models tagged by ``kind`` becomes ``kind`` as an enum
    plus one ``if``/``then`` per kind."""
    if isinstance(node, list):
        return [_tagged(x, defs) for x in node]
    if not isinstance(node, dict):
        return node
    node = {k: _tagged(v, defs) for k, v in node.items()}
    refs = [b.get("$ref", "") for b in node.get("oneOf", [])]
    kinds = [_kind_of(defs[r.rsplit("/", 1)[-1]]) if r.startswith("#/$defs/") else None for r in refs]
    if not refs or None in kinds:
        return node
    node.pop("discriminator", None)
    del node["oneOf"]
    node["type"] = "object"
    node["properties"] = {"kind": {"enum": [k for k, _ in kinds],
                                   "description": "Selects the form of this table; the other keys depend on it."}}
    node["allOf"] = [{"if": {"required": ["kind"], "properties": {"kind": {"const": k}}}, "then": {"$ref": r}}
                     for (k, _), r in zip(kinds, refs)]
    optional = [r for (_, default), r in zip(kinds, refs) if default]
    if optional:
        node["allOf"].append({"if": {"not": {"required": ["kind"]}}, "then": {"$ref": optional[0]}})
    else:
        node["required"] = ["kind"]
    return node
