"""JSON Schema (draft 2020-12) of a spec file, for editors that complete and check TOML keys.

Contract: :func:`spec_schema` returns a schema that every spec ``lesion check`` accepts validates
against (the tests hold ``specs/*.toml`` to it). It is pydantic's schema of :class:`Spec` with
what pydantic cannot know from the types added:

- ``$schema``, a title and a description;
- ``study.metric`` as an enum of the known metrics (the model checks it in a validator);
- axis keys and ``[[ablation.variant]]`` ``set`` keys as enums of the dotted keys an ablation may
  change (expand checks them), so an editor offers them;
- no ``null`` for ``[ablation]``: TOML has no null, the table is simply left out.

The schema is a convenience for authors; ``compiler.loader`` stays the judge of validity.
"""

from __future__ import annotations

from typing import Any

from compiler.expand import field_paths
from compiler.spec import METRICS, Spec

__all__ = ["spec_schema", "DRAFT"]

DRAFT = "https://json-schema.org/draft/2020-12/schema"


def spec_schema() -> dict[str, Any]:
    schema = Spec.model_json_schema()
    defs = schema["$defs"]
    settable = sorted(p for p in field_paths() if "." in p and not p.startswith(("ablation", "study")))
    defs["Study"]["properties"]["metric"]["enum"] = list(METRICS)
    defs["Axis"]["properties"]["key"]["enum"] = settable
    defs["ListedVariant"]["properties"]["set"]["propertyNames"] = {"enum": settable}
    schema["properties"]["ablation"] = {"$ref": "#/$defs/Ablation"}
    return {
        "$schema": DRAFT,
        "title": "lesion study spec",
        "description": "One study: a base configuration and an [ablation] that derives variants from it, "
                       "each run once per seed. Written in TOML; this schema describes the parsed document.",
        **{k: v for k, v in schema.items() if k != "title"},
    }
