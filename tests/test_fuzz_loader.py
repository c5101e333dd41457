"""Fuzzing the loader: whatever text it is given, :func:`compiler.loader.load_text` returns a
:class:`LoadedStudy` or raises a :class:`SpecError` whose every problem renders as one line
``NAME:LINE: ...`` with LINE inside the file; nothing else (no other exception, no traceback).

Two sources of input: TOML documents generated from the spec vocabulary (the key names and
literal values of the editor schema, mixed with foreign keys and hostile values: NaN, infinities,
huge integers, wrong types, deep nesting), and the shipped specs/*.toml mutated line by line and
byte by byte. The normal suite runs a few hundred examples; ``make test-long`` (``-m slow``) runs
at least 10,000 of each kind.
"""

from __future__ import annotations

import random
import re
import sys
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

sys.path.insert(0, str(Path(__file__).parent))  # the suite imports in importlib mode
import toml_layout  # noqa: E402
from compiler.errors import SpecError  # noqa: E402
from compiler.loader import LoadedStudy, load_study, load_text  # noqa: E402
from compiler.schema import spec_schema  # noqa: E402

ROOT = Path(__file__).parent.parent
SPEC_TEXTS = [p.read_text() for p in sorted((ROOT / "specs").glob("*.toml"))]
NAME = "fuzz.toml"
RENDERED = re.compile(rf"^{re.escape(NAME)}:(\d+): \S")


def _vocabulary() -> tuple[list[str], list[str]]:
    keys, literals = set(), set()

    def walk(node):
        if isinstance(node, dict):
            for k, v in node.items():
                if k == "properties" and isinstance(v, dict):
                    keys.update(v)
                elif k == "enum":
                    literals.update(x for x in v if isinstance(x, str))
                elif k == "const" and isinstance(v, str):
                    literals.add(v)
                walk(v)
        elif isinstance(node, list):
            for x in node:
                walk(x)

    walk(spec_schema())
    return sorted(keys), sorted(literals)


KEYS, LITERALS = _vocabulary()
SECTIONS = ["study", "data", "model", "divergence", "normalization", "regularization", "optimizer",
            "training", "ablation"]

# Scalars a spec might hold, and the edges of each type.
_ints = st.one_of(st.integers(-3, 70), st.sampled_from([0, 1, 2**31, 2**53, 2**63 - 1, -(2**63)]))
_floats = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.sampled_from([0.0, 1e-300, 1e308, 0.5]))
_strings = st.one_of(st.sampled_from(LITERALS + KEYS), st.text(max_size=12),
                     st.sampled_from(["os.system", "__import__('os')", "../../etc/passwd", "/etc/passwd",
                                      "a\nb", "", "x" * 300]))
_scalars = st.one_of(st.booleans(), _ints, _floats, _strings)
_key = st.one_of(st.sampled_from(KEYS), st.sampled_from(LITERALS), st.text(min_size=1, max_size=8))
_values = st.recursive(_scalars, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                         st.dictionaries(_key, inner, max_size=4)),
                       max_leaves=12)
_section = st.dictionaries(_key, _values, max_size=6)
_axis = st.fixed_dictionaries({"key": st.one_of(st.sampled_from([x for x in LITERALS if "." in x]), _strings),
                               "values": st.lists(_values, max_size=4)})
_ablation = st.fixed_dictionaries({}, optional={
    "mode": st.one_of(st.sampled_from(["grid", "one_at_a_time", "list"]), _strings),
    "axis": st.lists(_axis, max_size=3),
    "variant": st.lists(st.fixed_dictionaries({"label": _strings, "changes": st.dictionaries(_strings, _values, max_size=3)}),
                        max_size=3),
    "include_base": _values,
})
_study = st.fixed_dictionaries({"name": st.one_of(st.sampled_from(["fuzz", "a/b", "..", "x" * 100]), _strings)},
                               optional={"seeds": st.one_of(st.integers(-2, 6), st.lists(_ints, max_size=4)),
                                         "metric": _strings})
documents = st.fixed_dictionaries(
    {"study": st.one_of(_study, _section)},
    optional={**{s: _section for s in SECTIONS[1:-1]}, "ablation": st.one_of(_ablation, _section),
              "extra": _section})


def _check(text: str) -> str:
    """The property; returns which outcome it was."""
    try:
        study = load_text(text, NAME)
    except SpecError as err:
        return _check_problems(err, text)
    assert isinstance(study, LoadedStudy)
    assert re.fullmatch(r"[0-9a-f]{64}", study.study_hash) and study.variants
    return "loaded"


def _check_problems(err: SpecError, text: str) -> str:
    assert err.problems
    lines = text.count("\n") + 1
    for p in err.problems:
        rendered = p.render()
        m = RENDERED.match(rendered)
        assert m, rendered
        assert "\n" not in rendered and "\r" not in rendered, rendered
        assert 1 <= int(m.group(1)) <= lines, (rendered, lines)
    return "refused"


def _mutate(text: str, rng: random.Random) -> str:
    lines = text.split("\n")
    for _ in range(rng.randint(1, 4)):
        op = rng.randrange(7)
        i, j = rng.randrange(len(lines)), rng.randrange(len(lines))
        if op == 0 and len(lines) > 1:
            del lines[i]
        elif op == 1:
            lines.insert(j, lines[i])
        elif op == 2:
            lines[i], lines[j] = lines[j], lines[i]
        elif op == 3 and "=" in lines[i] and "=" in lines[j]:
            # swap the values of two assignments
            a, b = lines[i].split("=", 1), lines[j].split("=", 1)
            lines[i], lines[j] = f"{a[0]}={b[1]}", f"{b[0]}={a[1]}"
        elif op == 4 and "=" in lines[i]:
            lines[i] = lines[i].split("=", 1)[0] + "= " + rng.choice(
                ["nan", "inf", "-inf", "1e999", "9223372036854775807", '"x"', "[]", "{}", "true", "-1", "0",
                 "[1, [2, [3]]]", '{kind = "os.system"}', "1979-05-27", "'''", '"\\u0000"'])
        elif op == 5:
            k = rng.randrange(len(lines[i]) + 1)
            junk = "".join(chr(rng.choice([0, 9, 10, 13, 34, 35, 39, 44, 46, 61, 91, 93, 123, 125, 0xFEFF, 0x1F600,
                                           rng.randrange(32, 0x3000)])) for _ in range(rng.randint(1, 6)))
            lines[i] = lines[i][:k] + junk + lines[i][k:]
        else:
            lines[i] = lines[i][:rng.randrange(len(lines[i]) + 1)]
    return "\n".join(lines)


def _fuzz_generated(examples: int, counts: dict) -> None:
    @settings(max_examples=examples, deadline=None, database=None,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
    @given(doc=documents, layout=st.randoms(use_true_random=False))
    def prop(doc, layout):
        try:
            text = toml_layout.dump(doc, layout)
        except TypeError:  # a value toml_layout cannot write (none are expected); not the loader's fault
            return
        outcome = _check(text)
        counts[outcome] = counts.get(outcome, 0) + 1

    prop()


def _fuzz_mutated(examples: int, counts: dict) -> None:
    @settings(max_examples=examples, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow])
    @given(which=st.sampled_from(range(len(SPEC_TEXTS))), rng=st.randoms(use_true_random=False))
    def prop(which, rng):
        outcome = _check(_mutate(SPEC_TEXTS[which], rng))
        counts[outcome] = counts.get(outcome, 0) + 1

    prop()


def _fuzz_bytes(examples: int, counts: dict, folder: Path) -> None:
    """Random bytes spliced into a spec file, read through load_study (UTF-8, NUL and size checks)."""
    path = folder / NAME

    @settings(max_examples=examples, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow])
    @given(which=st.sampled_from(range(len(SPEC_TEXTS))), at=st.floats(0, 1), junk=st.binary(min_size=1, max_size=16))
    def prop(which, at, junk):
        data = SPEC_TEXTS[which].encode()
        k = int(at * len(data))
        path.write_bytes(data[:k] + junk + data[k:])
        try:
            study = load_study(path)
        except SpecError as err:
            assert err.problems
            for p in err.problems:
                rendered = p.render()
                assert rendered.startswith(f"{path}:") and re.match(r"\d+: \S", rendered[len(str(path)) + 1:]), rendered
                assert "\n" not in rendered
            counts["refused"] = counts.get("refused", 0) + 1
        else:
            assert isinstance(study, LoadedStudy)
            counts["loaded"] = counts.get("loaded", 0) + 1

    prop()


def test_the_vocabulary_comes_from_the_schema():
    # The generator is only as good as its vocabulary: it must know the real keys and kinds.
    assert {"learning_rate", "batch_size", "axis", "schedule"} <= set(KEYS)
    assert {"sgd", "batch", "grid", "val_accuracy"} <= set(LITERALS)


def test_the_shipped_specs_load_unmutated():
    for text in SPEC_TEXTS:
        assert _check(text) == "loaded"


def test_generated_documents_load_or_are_refused_cleanly():
    counts: dict = {}
    _fuzz_generated(200, counts)
    assert counts.get("refused", 0) > 0


def test_mutated_specs_load_or_are_refused_cleanly():
    counts: dict = {}
    _fuzz_mutated(200, counts)
    # Both outcomes occur: the mutations are neither all harmless nor all fatal.
    assert counts.get("refused", 0) > 0 and counts.get("loaded", 0) > 0, counts


def test_random_bytes_in_a_spec_file_are_refused_cleanly(tmp_path):
    counts: dict = {}
    _fuzz_bytes(60, counts, tmp_path)
    assert counts.get("refused", 0) > 0


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["generated", "mutated", "bytes"])
def test_long_fuzz(kind):
    counts: dict = {}
    with tempfile.TemporaryDirectory() as folder:
        {"generated": lambda: _fuzz_generated(10_000, counts),
         "mutated": lambda: _fuzz_mutated(10_000, counts),
         "bytes": lambda: _fuzz_bytes(10_000, counts, Path(folder))}[kind]()
    total = sum(counts.values())
    print(f"\nfuzz {kind}: {total} documents, {counts}")
    assert total >= 9_000, counts  # hypothesis may stop early only when the space is exhausted
