"""The spec language: the shipped specs validate, and the editor schema (JSON Schema draft
2020-12) is a valid schema that accepts them."""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import jsonschema
import pytest
from pydantic import ValidationError

from compiler.loader import load_study
from compiler.schema import spec_schema
from compiler.spec import BatchNorm, Spec

ROOT = Path(__file__).parent.parent
SPECS = sorted((ROOT / "specs").glob("*.toml"))


@pytest.fixture(scope="module")
def schema() -> dict:
    out = subprocess.run([sys.executable, "-m", "runtime.cli", "schema"], cwd=ROOT, capture_output=True,
                         text=True, check=True)
    return json.loads(out.stdout)


def test_there_are_demo_specs():
    assert {p.name for p in SPECS} >= {"cold-chain.toml", "kiln-drift.toml", "gearbox-budget.toml"}


@pytest.mark.parametrize("path", SPECS, ids=lambda p: p.name)
def test_every_demo_spec_loads(path):
    study = load_study(path)
    # the demos must stay quick: runs share compiled programs, so programs cost more than runs
    assert study.variants and study.runs <= 64 and len({v.program for v in study.variants}) <= 5


def test_schema_is_a_valid_draft_2020_12_schema(schema):
    # JSON Schema 2020-12 meta-schema, as jsonschema's validator implements it.
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    jsonschema.Draft202012Validator.check_schema(schema)
    assert schema == spec_schema()


@pytest.mark.parametrize("path", SPECS, ids=lambda p: p.name)
def test_every_demo_spec_validates_against_the_schema(schema, path):
    jsonschema.Draft202012Validator(schema).validate(tomllib.loads(path.read_text()))


@pytest.mark.parametrize("doc", [
    {"study": {"name": "x"}, "optimiser": {}},                                  # unknown section
    {"study": {"name": "x"}, "ablation": {"axis": [{"key": "optimizer.lr", "values": [1]}]}},
    {"study": {"name": "x", "metric": "accuracy"}},
])
def test_schema_refuses_what_the_loader_refuses(schema, doc):
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.Draft202012Validator(schema).validate(doc)


def test_spec_models_are_frozen_and_closed():
    spec = Spec.model_validate({"study": {"name": "x"}})
    with pytest.raises(ValidationError):
        spec.study.name = "y"
    with pytest.raises(ValidationError):
        BatchNorm(kind="batch", epsilon=1e-5, moment=0.9)


def test_batch_norm_defaults():
    # Ioffe & Szegedy 2015 use ε for numerical stability; 1e-5 and a running-average momentum of
    # 0.9 are common practice defaults.
    bn = BatchNorm(kind="batch")
    assert (bn.epsilon, bn.momentum) == (1e-5, 0.9)


def test_study_margin_unset_keeps_the_study_hash_and_a_set_one_is_part_of_it(tmp_path):
    # the demo's study hash as `lesion check specs/cold-chain.toml` printed it before study.margin
    # existed (and as the README's result-set folder cold-chain-af23c1abfa5f names it)
    before = "af23c1abfa5f27de7b8464fe176c40243391c65706e9176e639811ce1ca85fcf"
    assert load_study(ROOT / "specs" / "cold-chain.toml").study_hash == before
    text = (ROOT / "specs" / "cold-chain.toml").read_text()
    spec = tmp_path / "cold-chain.toml"
    spec.write_text(text.replace('metric = "val_accuracy"', 'metric = "val_accuracy"\nmargin = 0.01', 1))
    margined = load_study(spec)
    assert margined.spec.study.margin == 0.01 and margined.study_hash != before
    # a run's identity does not depend on it: same variants, same hashes
    assert [v.hash for v in margined.variants] == [v.hash for v in load_study(ROOT / "specs" / "cold-chain.toml").variants]

def test_schema_has_an_id_and_every_key_a_description(schema):
    # JSON Schema 2020-12 Core §8.2.1: "$id" identifies a schema resource with an absolute URI
    # (RFC 3986 §4.3: a scheme, then ":"); §9.1 (Validation): "description" annotates an instance.
    assert schema["$id"].split(":", 1)[0] == "urn"
    missing = []

    def walk(node, path):
        if isinstance(node, dict):
            for key, sub in node.get("properties", {}).items():
                if "description" not in sub and not path.endswith("/if"):
                    missing.append(f"{path}/{key}")
            for key, sub in node.items():
                walk(sub, f"{path}/{key}")
        elif isinstance(node, list):
            for sub in node:
                walk(sub, path)

    walk(schema, "")
    assert missing == []


def _precise_error(schema, doc):
    # jsonschema's best_match picks the most relevant error, as an editor would show it.
    return jsonschema.exceptions.best_match(jsonschema.Draft202012Validator(schema).iter_errors(doc))


@pytest.mark.parametrize("table, key, where", [
    ({"normalization": {"kind": "batch", "epsilom": 1e-3}}, "epsilom", ["normalization"]),
    ({"optimizer": {"kind": "adam", "schedule": {"kind": "cosine", "final_fraktion": 0.1}}}, "final_fraktion",
     ["optimizer", "schedule"]),
    ({"divergence": {"kind": "huber", "delt": 0.5}}, "delt", ["divergence"]),
    ({"data": {"generater": "rings"}}, "generater", ["data"]),                # kind left out: the generators
])
def test_a_typo_inside_a_tagged_table_names_the_bad_key(schema, table, key, where):
    error = _precise_error(schema, {"study": {"name": "x"}, **table})
    assert error.validator == "additionalProperties" and repr(key) in error.message
    assert list(error.absolute_path) == where


def test_a_wrong_kind_lists_the_kinds(schema):
    error = _precise_error(schema, {"study": {"name": "x"}, "normalization": {"kind": "bach"}})
    assert list(error.absolute_path) == ["normalization", "kind"] and "'batch'" in error.message

