"""runtime.specdiff: dotted keys read back by a TOML parser, study diffs, variant matching."""

import copy
import json
import pathlib
import tomllib

from compiler.hashing import canonical_json, variant_payload
from compiler.loader import load_text
from runtime.specdiff import ABSENT, Change, flatten, match_variants, spec_diff

SPECS = pathlib.Path(__file__).resolve().parents[1] / "specs"

# Our own scenario: sorting damaged parcels from conveyor camera features.
PARCELS = """
[study]
name = "parcel-sort"
seeds = 3

[data]
generator = "blobs"
samples = 600
features = 5
classes = 4

[model]
hidden = [24]

[optimizer]
kind = "sgd"
learning_rate = 0.05
momentum = 0.9

[training]
epochs = 3

[ablation]
mode = "grid"

[[ablation.axis]]
key = "normalization.kind"
values = ["none", "batch"]
"""

LOWER_RATE_MORE_DROPOUT = PARCELS.replace("learning_rate = 0.05", "learning_rate = 0.02") + """
[[ablation.axis]]
key = "regularization.dropout.rate"
values = [0.0, 0.3]
"""


def _study_tree(text: str) -> str:
    """The study as a result set stores it: canonical JSON text (RFC 8785)."""
    return canonical_json(load_text(text).spec.model_dump(mode="json")).decode()


def _variants(text: str) -> list[dict]:
    return [{"label": v.label, "payload": variant_payload(v.spec)} for v in load_text(text).variants]


def _toml_value(value) -> str:
    # JSON strings, numbers, booleans and arrays of them are valid TOML values (TOML v1.0.0)
    return json.dumps(value)


def test_flattened_keys_are_toml_dotted_keys():
    # TOML v1.0.0, "Keys": `a.b.c = v` lines rebuild the nested tables; a key with a dot in it is
    # quoted. Python's tomllib is the oracle.
    doc = tomllib.loads((SPECS / "kiln-drift.toml").read_text())
    doc.pop("ablation")                                    # arrays of tables are indexed instead
    doc["extra"] = {"set": {"optimizer.learning_rate": 0.1, "plain": [1, 2]}, "flag": True}
    lines = [f"{k} = {_toml_value(v)}" for k, v in flatten(doc).items()]
    assert tomllib.loads("\n".join(lines)) == doc
    assert flatten(doc)['extra.set."optimizer.learning_rate"'] == 0.1


def test_lists_of_tables_are_indexed_and_lists_of_values_are_leaves():
    tree = {"ablation": {"axis": [{"key": "model.hidden", "values": [[8], [16, 16]]}]},
            "model": {"hidden": [24, 24]}, "empty": {}}
    assert flatten(tree) == {
        "ablation.axis[0].key": "model.hidden",
        "ablation.axis[0].values": [[8], [16, 16]],
        "model.hidden": [24, 24],
        "empty": {},
    }
    assert flatten(json.dumps(tree)) == flatten(tree)      # canonical JSON text is accepted too


def test_identical_studies_have_no_changes_and_all_variants_pair():
    a, b = _study_tree(PARCELS), _study_tree(PARCELS)
    assert spec_diff(a, b) == []
    pairs, only_a, only_b = match_variants(_variants(PARCELS), _variants(PARCELS), [])
    assert [(p.a["label"], p.b["label"], p.by) for p in pairs] == [
        ("none", "none", "payload"),
        ("batch", "batch", "payload"),
    ]
    assert only_a == only_b == []


def test_changed_rate_and_added_axis_show_as_changes():
    changes = spec_diff(_study_tree(PARCELS), _study_tree(LOWER_RATE_MORE_DROPOUT))
    assert changes == [
        Change("ablation.axis[1].key", ABSENT, "regularization.dropout.rate"),
        Change("ablation.axis[1].values", ABSENT, [0.0, 0.3]),
        Change("optimizer.learning_rate", 0.05, 0.02),
    ]
    assert changes[2].render() == "optimizer.learning_rate: 0.05 → 0.02"
    assert changes[0].render() == 'ablation.axis[1].key: (absent) → "regularization.dropout.rate"'
    assert changes[0].as_dict() == {"key": "ablation.axis[1].key", "kind": "added", "old": None,
                                    "new": "regularization.dropout.rate"}
    removed = spec_diff(_study_tree(LOWER_RATE_MORE_DROPOUT), _study_tree(PARCELS))
    assert [c.kind for c in removed] == ["removed", "removed", "changed"]


def test_numbers_compare_by_value_booleans_by_type():
    # RFC 8785 writes 1.0 and 1 alike; JSON true is not the number 1 (RFC 8259 §3)
    assert spec_diff({"x": 1.0}, {"x": 1}) == []
    assert spec_diff({"x": 1}, {"x": True}) == [Change("x", 1, True)]
    assert spec_diff({"x": [1, 2.0]}, {"x": [1.0, 2]}) == []


def test_matching_pairs_variants_that_differ_only_in_the_changed_key():
    changes = spec_diff(_study_tree(PARCELS), _study_tree(LOWER_RATE_MORE_DROPOUT))
    a, b = _variants(PARCELS), _variants(LOWER_RATE_MORE_DROPOUT)
    pairs, only_a, only_b = match_variants(a, b, [c.key for c in changes])
    # default dropout rate is 0.0, so A's arms are B's dropout-0.0 arms at the new learning rate
    assert [(p.a["label"], p.b["label"], p.by) for p in pairs] == [
        ("none", "none · 0.0", "payload"),
        ("batch", "batch · 0.0", "payload"),
    ]
    assert only_a == []
    assert [v["label"] for v in only_b] == ["none · 0.3", "batch · 0.3"]
    # without removing the changed key, nothing pairs by payload (the learning rate differs)
    pairs, only_a, only_b = match_variants(a, b, [])
    assert pairs == [] and len(only_a) == 2 and len(only_b) == 4


def test_ambiguous_payloads_fall_back_to_labels_then_stay_unmatched():
    base = {"optimizer": {"learning_rate": 0.1}, "model": {"hidden": [8]}}

    def arm(label, rate, hidden=(8,)):
        p = copy.deepcopy(base)
        p["optimizer"]["learning_rate"], p["model"]["hidden"] = rate, list(hidden)
        return {"label": label, "payload": p}

    a = [arm("slow", 0.01), arm("fast", 0.1), arm("wide", 0.1, (32,))]
    b = [arm("fast", 0.3), arm("slow", 0.03), arm("narrow", 0.03, (4,))]
    pairs, only_a, only_b = match_variants(a, b, ["optimizer.learning_rate"])
    # with the rate removed "slow" and "fast" look alike on each side: labels decide; "wide" and
    # "narrow" differ in model.hidden, which did not change in the study, so they stay apart
    assert [(p.a["label"], p.b["label"], p.by) for p in pairs] == [("slow", "slow", "label"),
                                                                   ("fast", "fast", "label")]
    assert [v["label"] for v in only_a] == ["wide"] and [v["label"] for v in only_b] == ["narrow"]
