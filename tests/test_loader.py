"""The loader: every file-level failure is a located problem, and the key locator agrees with
tomllib (the reference TOML 1.0 reader) about what is written where."""

from __future__ import annotations

import random
import sys
import tomllib
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

sys.path.insert(0, str(Path(__file__).parent))  # the suite imports in importlib mode
import toml_layout  # noqa: E402
from compiler.errors import SpecError  # noqa: E402
from compiler.hashing import study_hash  # noqa: E402
from compiler.loader import MAX_SPEC_BYTES, load_study, load_text  # noqa: E402
from compiler.locate import key_lines, line_of  # noqa: E402

ROOT = Path(__file__).parent.parent
SPECS = sorted((ROOT / "specs").glob("*.toml"))
FIXTURES = sorted((ROOT / "tests" / "fixtures" / "bad_specs").glob("*.toml"))


def _problems(fn, *args) -> list[str]:
    with pytest.raises(SpecError) as info:
        fn(*args)
    return [p.render() for p in info.value.problems]


# ── the locator ─────────────────────────────────────────────────────────────────────────────────
# TOML v1.0.0 specification, "Array of Tables": the nested example with a sub-table and a nested
# array of tables (copied from the specification text).
TOML_SPEC_FRUITS = """\
[[fruits]]
name = "apple"

[fruits.physical]  # subtable
color = "red"
shape = "round"

[[fruits.varieties]]  # nested array of tables
name = "red delicious"

[[fruits.varieties]]
name = "granny smith"


[[fruits]]
name = "banana"

[[fruits.varieties]]
name = "plantain"
"""


def test_locator_on_the_toml_spec_array_of_tables_example():
    doc = tomllib.loads(TOML_SPEC_FRUITS)
    assert doc["fruits"][1]["varieties"][0]["name"] == "plantain"
    where = key_lines(TOML_SPEC_FRUITS)
    assert where[("fruits", 0, "physical", "shape")] == 6
    assert where[("fruits", 0, "varieties", 1, "name")] == 12
    assert where[("fruits", 1)] == 15
    assert where[("fruits", 1, "varieties", 0, "name")] == 19


def test_locator_keys_from_the_toml_spec_key_examples():
    # TOML v1.0.0 specification, "Keys": quoted keys, dotted keys, whitespace around dots.
    text = ('"127.0.0.1" = "value"\n'
            'site."google.com" = true\n'
            'fruit. color = "yellow"\n'
            "'quoted \"value\"' = \"value\"\n"
            '3.14159 = "pi"\n')
    doc = tomllib.loads(text)
    assert doc["3"]["14159"] == "pi"
    where = key_lines(text)
    assert where[("127.0.0.1",)] == 1
    assert where[("site", "google.com")] == 2
    assert where[("fruit", "color")] == 3
    assert where[('quoted "value"',)] == 4
    assert where[("3", "14159")] == 5


def test_locator_multiline_arrays_inline_tables_and_tricky_strings():
    text = ('[a]\n'
            'note = "x = 1 # not a comment"\n'
            "lit = 'C:\\path\\#'\n"
            'long = """\n[b]\nkey = "v" """\n'
            'arr = [\n  1,   # first\n  "two, ]",\n  { c = 3 },\n]\n'
            'sub = { rate = 0.2, inner = { k = [1,\n 2] } }\n')
    tomllib.loads(text)
    assert line_of(text, ("a", "arr", 1)) == 9
    assert line_of(text, ("a", "arr", 2, "c")) == 10
    assert line_of(text, ("a", "sub", "inner", "k", 1)) == 13
    assert line_of(text, ("b",)) == 1              # inside a string: no such table; falls back
    assert line_of(text, ("a", "missing")) == 1    # the enclosing [a]
    assert line_of(text, ("a", "sub", "missing")) == 12


def test_locator_never_raises_on_text_it_cannot_follow():
    for text in ["[unclosed\nx = 1", "= = =", '"""', "a = [1, 2", "\x00\x01", ""]:
        assert line_of(text, ("a", 0, "b")) >= 1


@settings(max_examples=30, deadline=None)
@given(spec=st.sampled_from(SPECS + [f for f in FIXTURES if f.name.startswith(("axis", "grid", "kind", "duplicate"))]),
       layout=st.randoms(use_true_random=False))
def test_locator_finds_every_value_tomllib_reads_on_its_own_line(spec, layout):
    # tomllib is the reference reader: every leaf it reads must be located, on a line that
    # holds that leaf's key (or, for an array element, its value).
    text = toml_layout.dump(tomllib.loads(spec.read_text()), layout)
    lines = text.split("\n")
    where = key_lines(text)
    for path, value in toml_layout.leaves(tomllib.loads(text)):
        assert path in where, path
        line = lines[where[path] - 1]
        last = path[-1]
        needle = toml_layout.value(value, random.Random(0)) if isinstance(last, int) else toml_layout.key(last)
        assert needle in line, (path, line)


# ── files ───────────────────────────────────────────────────────────────────────────────────────
def test_good_spec_loads_with_source_hash_and_variants():
    path = ROOT / "specs" / "cold-chain.toml"
    study = load_study(path)
    assert study.source == path.read_text()
    assert study.study_hash == study_hash(study.spec)
    assert len(study.variants) == 9 and study.runs == 45
    assert study.result_set == f"cold-chain-{study.study_hash[:12]}"
    assert load_text(study.source, "replayed").study_hash == study.study_hash


@pytest.mark.parametrize("make, fragment", [
    (lambda d: d / "nope.toml", ":1: no such file"),
    (lambda d: d, ":1: is a directory"),
])
def test_paths_that_are_not_spec_files(tmp_path, make, fragment):
    (problem,) = _problems(load_study, make(tmp_path))
    assert fragment in problem


def test_huge_files_are_refused(tmp_path):
    path = tmp_path / "huge.toml"
    path.write_text('[study]\nname = "x"\n' + "# padding\n" * (MAX_SPEC_BYTES // 10 + 1))
    (problem,) = _problems(load_study, path)
    assert "larger than 1024 KiB" in problem


def test_a_byte_order_mark_is_accepted(tmp_path):
    # common practice: some editors save UTF-8 with a leading BOM.
    path = tmp_path / "bom.toml"
    path.write_bytes(b'\xef\xbb\xbf[study]\nname = "x"\n')
    assert load_study(path).spec.study.name == "x"


def test_all_problems_of_a_file_are_reported_at_once():
    text = '[study]\nname = "x"\n[training]\nepochs = 0\nbatch_size = 0\n[model]\nactivation = "swish"\n'
    problems = _problems(load_text, text, "s.toml")
    assert sorted(p.split(":")[1] for p in problems) == ["4", "5", "7"]


def test_expansion_problems_come_after_fields_are_valid_and_name_the_variant():
    text = ('[study]\nname = "x"\n[data]\nclasses = 3\n'
            '[ablation]\nmode = "one_at_a_time"\n[[ablation.axis]]\nkey = "divergence.kind"\nvalues = ["bce", "kl"]\n')
    (problem,) = _problems(load_text, text, "s.toml")
    assert problem.startswith("s.toml:9: ablation.axis[0].values[0]: variant 'divergence bce' (divergence.kind=bce) is invalid")
