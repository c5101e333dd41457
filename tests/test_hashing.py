"""Identity: canonical JSON against RFC 8785's published examples, and the study hash's
invariances (layout, comments, spelled-out defaults) and sensitivities (any value)."""

from __future__ import annotations

import copy
import math
import random
import struct
import sys
import tomllib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

sys.path.insert(0, str(Path(__file__).parent))  # the suite imports in importlib mode
import toml_layout  # noqa: E402
from compiler.errors import SpecError
from compiler.hashing import canonical_json, run_id, sha256_hex, study_hash, variant_hash
from compiler.loader import load_text

SPECS = sorted((Path(__file__).parent.parent / "specs").glob("*.toml"))
DOCS = {p.name: tomllib.loads(p.read_text()) for p in SPECS}
BASELINE = {p.name: load_text(p.read_text(), p.name).study_hash for p in SPECS}


# ── RFC 8785 ────────────────────────────────────────────────────────────────────────────────────
def _double(hex_bits: str) -> float:
    return struct.unpack(">d", bytes.fromhex(hex_bits))[0]


# RFC 8785 Appendix B, "Number Serialization Samples" (IEEE 754 bits -> JSON text), rows written
# down from memory of the RFC's table (not copied from the text); the NaN and Infinity rows are
# the refusal test below.
APPENDIX_B = [
    ("0000000000000000", "0"),
    ("8000000000000000", "0"),                       # minus zero
    ("0000000000000001", "5e-324"),
    ("8000000000000001", "-5e-324"),
    ("7fefffffffffffff", "1.7976931348623157e+308"),
    ("ffefffffffffffff", "-1.7976931348623157e+308"),
    ("4340000000000000", "9007199254740992"),
    ("c340000000000000", "-9007199254740992"),
    ("4430000000000000", "295147905179352830000"),
    ("44b52d02c7e14af5", "9.999999999999997e+22"),
    ("44b52d02c7e14af6", "1e+23"),
    ("44b52d02c7e14af7", "1.0000000000000001e+23"),
    ("444b1ae4d6e2ef4e", "999999999999999700000"),
    ("444b1ae4d6e2ef4f", "999999999999999900000"),
    ("444b1ae4d6e2ef50", "1e+21"),
    ("3eb0c6f7a0b5ed8c", "9.999999999999997e-7"),
    ("3eb0c6f7a0b5ed8d", "0.000001"),
    ("41b3de4355555553", "333333333.3333332"),
    ("41b3de4355555554", "333333333.33333325"),
    ("41b3de4355555555", "333333333.3333333"),
    ("41b3de4355555556", "333333333.3333334"),
    ("41b3de4355555557", "333333333.33333343"),
    ("becbf647612f3696", "-0.0000033333333333333333"),
    ("43143ff3c1cb0959", "1424953923781206.2"),
]


@pytest.mark.parametrize("bits, text", APPENDIX_B)
def test_number_form_matches_rfc8785_appendix_b(bits, text):
    assert canonical_json(_double(bits)) == text.encode()


def test_small_exponents_follow_ecmascript():
    # ECMA-262 Number::toString, which RFC 8785 §3.2.2.3 adopts: exponent form below 1e-6.
    assert canonical_json(1e-7) == b"1e-7"
    assert canonical_json(1e21) == b"1e+21"
    assert canonical_json(1e20) == b"100000000000000000000"


def test_key_order_is_utf16_code_units_rfc8785_3_2_3():
    # RFC 8785 §3.2.3, the sorting example: U+1F600 (surrogates D83D DE00) sorts before U+FB33,
    # though it is the larger code point.
    obj = {"\u20ac": "Euro Sign", "\r": "Carriage Return", "\ufb33": "Hebrew Letter Dalet With Dagesh",
           "1": "One", "\U0001f600": "Emoji: Grinning Face", "\u0080": "Control",
           "\u00f6": "Latin Small Letter O With Diaeresis"}
    expected = ('{"\\r":"Carriage Return","1":"One","\u0080":"Control",'
                '"\u00f6":"Latin Small Letter O With Diaeresis","\u20ac":"Euro Sign",'
                '"\U0001f600":"Emoji: Grinning Face","\ufb33":"Hebrew Letter Dalet With Dagesh"}')
    assert canonical_json(obj) == expected.encode("utf-8")


def test_rfc8785_3_2_2_example():
    # RFC 8785 §3.2.2 (from memory of the RFC's example): numbers, string escapes, literals.
    obj = {"numbers": [333333333.33333329, 1e30, 4.50, 2e-3, 0.000000000000000000000000001],
           "string": "\u20ac$\u000f\u000aA'\u0042\u0022\u005c\\\"/", "literals": [None, True, False]}
    expected = ('{"literals":[null,true,false],"numbers":[333333333.3333333,1e+30,4.5,0.002,1e-27],'
                '"string":"\u20ac$\\u000f\\nA\'B\\"\\\\\\\\\\"/"}')
    assert canonical_json(obj) == expected.encode("utf-8")


def test_members_canonicalized_once_give_the_same_bytes():
    # RFC 8785 §3.2.3 and §3.2.2 objects above, through one shared memo: an object is serialized
    # member by member in UTF-16 key order, so cached members must join into the same bytes; 1,
    # 1.0 and true are different members (§3.2.2.3 writes 1.0 as 1, so only the memo key differs).
    memo: dict = {}
    docs = [{"\u20ac": 1, "\r": 1.0, "\ufb33": True, "\U0001f600": [1.5, "x"], "1": {"b": 2e-3, "a": None}},
            {"numbers": [333333333.33333329, 1e30, 4.50, 2e-3], "literals": [None, True, False], "\r": True},
            {"\u20ac": True, "\r": 1, "\ufb33": 1.0}]
    for doc in docs * 2:
        assert canonical_json(doc, memo) == canonical_json(doc)
    assert canonical_json(docs[0], memo) == ('{"\\r":1,"1":{"a":null,"b":0.002},"\u20ac":1,'
                                             '"\U0001f600":[1.5,"x"],"\ufb33":true}').encode("utf-8")


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_nan_and_infinity_are_refused(bad):
    # RFC 8785 §3.2.2.2 / Appendix B: NaN and Infinity have no JSON form; they must not hash.
    with pytest.raises(ValueError):
        canonical_json({"x": bad})


def test_sha256_known_answer():
    # FIPS 180-2 Appendix B.1 test vector, "abc".
    assert sha256_hex(b"abc") == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_run_id_is_variant_and_seed():
    assert run_id("ab" * 32, 7) == "abababababababab-s7"


# ── study hash properties ───────────────────────────────────────────────────────────────────────
PROPERTY = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])


@PROPERTY
@given(name=st.sampled_from(sorted(DOCS)), layout=st.randoms(use_true_random=False))
def test_layout_and_comments_do_not_change_the_study_hash(name, layout):
    text = toml_layout.dump(DOCS[name], layout)
    assert tomllib.loads(text) == DOCS[name]
    assert load_text(text, name).study_hash == BASELINE[name]


def _set(doc: dict, path: tuple, value) -> None:
    node = doc
    for part in path[:-1]:
        node = node.setdefault(part, {}) if isinstance(part, str) else node[part]
    node[path[-1]] = value


@PROPERTY
@given(name=st.sampled_from(sorted(DOCS)), data=st.data(), layout=st.randoms(use_true_random=False))
def test_spelling_out_a_default_does_not_change_the_study_hash(name, data, layout):
    doc = DOCS[name]
    spec = load_text(toml_layout.dump(doc, random.Random(0)), name).spec
    written = {p for p, _ in toml_layout.leaves(doc)}
    full = dict(toml_layout.leaves(spec.model_dump(mode="json", exclude={"ablation"})))
    defaults = sorted((p for p in full if p not in written and not isinstance(p[-1], int)
                       and not any(p[:n] in written for n in range(1, len(p)))), key=str)
    path = data.draw(st.sampled_from(defaults))
    doc = copy.deepcopy(doc)
    _set(doc, path, full[path])
    try:
        again = load_text(toml_layout.dump(doc, layout), name)
    except SpecError:
        # Spelling out a key of a kind the ablation switches away from is an error by design
        # (the other kind lacks it); that is not a hash question.
        assume(False)
    assert again.study_hash == BASELINE[name]


@PROPERTY
@given(name=st.sampled_from(sorted(DOCS)), data=st.data())
def test_changing_any_numeric_value_changes_the_study_hash(name, data):
    doc = DOCS[name]
    numeric = sorted((p for p, v in toml_layout.leaves(doc) if isinstance(v, (int, float)) and not isinstance(v, bool)),
                     key=str)
    path = data.draw(st.sampled_from(numeric))
    old = dict(toml_layout.leaves(doc))[path]
    if isinstance(old, int):
        new = old + data.draw(st.sampled_from([-2, -1, 1, 2, 7]))
    else:
        new = old + data.draw(st.floats(min_value=-0.5, max_value=0.5, allow_nan=False).filter(lambda d: old + d != old))
    doc = copy.deepcopy(doc)
    _set(doc, path, new)
    try:
        changed = load_text(toml_layout.dump(doc, random.Random(1)), name)
    except SpecError:
        assume(False)  # out of range or an invalid variant: refused, never hashed
    assert changed.study_hash != BASELINE[name]


def test_int_and_float_spellings_of_one_number_hash_alike():
    # common practice (RFC 8785 §3.2.2.3): 1 and 1.0 are the same JSON number.
    base = '[study]\nname = "x"\n[optimizer]\nkind = "sgd"\nlearning_rate = {}\n'
    assert load_text(base.format("1")).study_hash == load_text(base.format("1.0")).study_hash


def test_variant_hash_ignores_the_study_section():
    a = load_text('[study]\nname = "one"\nseeds = 2\n').variants[0]
    b = load_text('[study]\nname = "two"\nseeds = 9\ndescription = "other words"\n').variants[0]
    assert variant_hash(a.spec) == variant_hash(b.spec) == a.hash
    assert study_hash(a.spec) != study_hash(b.spec)


@pytest.mark.parametrize("name", sorted(n for n, doc in DOCS.items() if doc.get("model", {}).get("kind", "mlp") == "mlp"))
def test_writing_the_default_model_family_keeps_the_study_hash(name):
    # Specs written before [model] had a kind are MLPs and must keep their hashes (their stored
    # result sets carry them).
    doc = copy.deepcopy(DOCS[name])
    doc.setdefault("model", {})["kind"] = "mlp"
    assert load_text(toml_layout.dump(doc, random.Random(0)), name).study_hash == BASELINE[name]
