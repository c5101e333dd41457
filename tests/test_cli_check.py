"""`lesion check` and `lesion schema` through the real command line: every malformed spec in
tests/fixtures/bad_specs/ is refused with exit code 2 and the located problems its sidecar
NAME.expect lists; good specs print the study hash compiler.hashing computes."""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest
from typer.testing import CliRunner

from compiler.hashing import study_hash
from compiler.loader import load_study
from runtime.cli import app

ROOT = Path(__file__).parent.parent
BAD = ROOT / "tests" / "fixtures" / "bad_specs"
CASES = sorted(BAD.glob("*.toml"))
# These go through a real subprocess (the installed interpreter, `python -m runtime.cli`), the
# rest through typer's in-process runner.
SUBPROCESS = {"syntax_missing_equals", "not_utf8", "binary_file", "kind_switch_leaves_user_key", "empty_file"}


def _run(args: list[str], subprocess_run: bool) -> tuple[int, str, str]:
    if subprocess_run:
        out = subprocess.run([sys.executable, "-m", "runtime.cli", *args], cwd=ROOT, capture_output=True, text=True)
        return out.returncode, out.stdout, out.stderr
    result = CliRunner().invoke(app, args)
    if result.exception and not isinstance(result.exception, SystemExit):
        raise result.exception
    return result.exit_code, result.stdout, result.stderr


def test_the_corpus_is_large_and_complete():
    assert len(CASES) >= 30
    assert {p.stem for p in BAD.glob("*.expect")} == {p.stem for p in CASES}


@pytest.mark.parametrize("case", CASES, ids=lambda p: p.stem)
def test_bad_spec_is_refused_with_located_problems(case):
    expected = tomllib.loads(case.with_suffix(".expect").read_text())["error"]
    rel = str(case.relative_to(ROOT))
    code, out, err = _run(["check", rel], case.stem in SUBPROCESS)
    assert code == 2
    assert out == ""
    assert "Traceback" not in err
    lines = err.splitlines()
    assert all(line.startswith(f"{rel}:") for line in lines), err
    for e in expected:
        prefix = f"{rel}:{e['line']}: " + (f"{e['key']}: " if e["key"] else "")
        assert any(line.startswith(prefix) and e["message"] in line for line in lines), (prefix, e["message"], err)


@pytest.mark.parametrize("spec", sorted((ROOT / "specs").glob("*.toml")), ids=lambda p: p.name)
def test_check_prints_the_study_hash_and_exits_0(spec):
    rel = str(spec.relative_to(ROOT))
    study = load_study(spec)
    code, out, _ = _run(["check", rel], False)
    assert code == 0
    assert f"study hash  {study_hash(study.spec)}" in out
    for v in study.variants:
        assert v.hash[:12] in out and v.program in out


def test_check_json_form():
    spec = ROOT / "specs" / "kiln-drift.toml"
    code, out, _ = _run(["check", str(spec), "--format", "json"], True)
    assert code == 0
    report = json.loads(out)
    study = load_study(spec)
    assert report["study_hash"] == study_hash(study.spec)
    assert report["result_set"] == f"kiln-drift-{report['study_hash'][:12]}"
    assert report["runs"] == len(report["variants"]) * 4 == 16
    assert report["variants"][1] == {"label": "divergence huber", "changes": {"divergence.kind": "huber"},
                                     "variant_hash": study.variants[1].hash,
                                     "program": study.variants[1].program, "seeds": [11, 12, 13, 14]}


def test_check_and_schema_do_not_import_jax():
    # `import jax` costs seconds (measured on this machine); check must stay instant.
    code = ("import sys\nfrom typer.testing import CliRunner\nfrom runtime.cli import app\n"
            "r = CliRunner().invoke(app, ['check', 'specs/cold-chain.toml'])\n"
            "r2 = CliRunner().invoke(app, ['schema'])\n"
            "assert r.exit_code == r2.exit_code == 0\nprint('jax' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


@pytest.mark.parametrize("args", [["--help"], ["check", "--help"], ["schema", "--help"]])
def test_help_explains_with_examples(args):
    code, out, _ = _run(args, False)
    assert code == 0 and "Examples:" in out and "lesion " in out


def test_usage_errors_exit_2_without_traceback():
    code, _, err = _run(["check", "specs/cold-chain.toml", "--format", "yaml"], False)
    assert code == 2 and "Traceback" not in err


def test_labels_with_newlines_or_bidi_controls_are_escaped_in_check(tmp_path):
    # Unicode TR #9 explicit directional overrides and isolates (U+202E, U+2066) reorder what a
    # terminal shows (CVE-2021-42574); ESC starts an ANSI control sequence (ECMA-48). Printed
    # raw, a label could pose as another one or spill over lines.
    spec = tmp_path / "labels.toml"
    spec.write_text('[study]\nname = "labels"\nseeds = 2\n[ablation]\nmode = "list"\n'
                    '[[ablation.variant]]\nlabel = "fast\\u202eevil"\nchanges = { "optimizer.learning_rate" = 0.2 }\n'
                    '[[ablation.variant]]\nlabel = "two\\nlines\\u001b[31m\\u2066"\n'
                    'changes = { "optimizer.learning_rate" = 0.01 }\n')
    code, out, _ = _run(["check", str(spec)], subprocess_run=True)
    assert code == 0
    assert not {"\u202e", "\u2066", "\x1b"} & set(out)
    assert "fast\\u202eevil" in out and "two\\nlines\\x1b[31m\\u2066" in out
    code, out, _ = _run(["check", str(spec), "--format", "json"], subprocess_run=True)
    assert not {"\u202e", "\u2066", "\x1b"} & set(out)
    # JSON's own escapes (RFC 8259 §7) keep the labels exact for programs.
    assert [v["label"] for v in json.loads(out)["variants"]] == ["base", "fast\u202eevil", "two\nlines\x1b[31m\u2066"]


@pytest.mark.parametrize("width", [80, 120, 200])
@pytest.mark.parametrize("spec", sorted((ROOT / "specs").glob("*.toml")), ids=lambda p: p.name)
def test_check_fits_the_terminal_and_keys_its_labels(spec, width):
    out = CliRunner().invoke(app, ["check", str(spec)], env={"COLUMNS": str(width)}).stdout
    assert max(map(len, out.splitlines())) <= width, out
    if spec.name == "cold-chain.toml":
        # which axis each part of "none · 0.15" is, by the short names the pictures use too
        text = " ".join(line.strip() for line in out.split("labels", 1)[1].split("\n#")[0].splitlines())
        assert text == ("normalization · dropout.rate (normalization = normalization.kind, "
                        "dropout.rate = regularization.dropout.rate)")
