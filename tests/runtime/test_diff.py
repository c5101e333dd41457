"""diff over real result sets: reproducibility, a planted effect, mismatched studies."""

import pytest
from typer.testing import CliRunner

from compiler.loader import load_study
from runtime.cli import app
from runtime.diff import diff_baseline, diff_result_sets
from runtime.runner import run_study
from runtime.store import open_result_set


def _run(tmp, tiny_spec, name, **kw):
    return open_result_set(run_study(load_study(tiny_spec(tmp, name, **kw)), tmp / name).path)


@pytest.fixture(scope="module")
def pair(tmp_path_factory, tiny_spec):
    tmp = tmp_path_factory.mktemp("diff")
    a = _run(tmp, tiny_spec, "same", seeds=5, epochs=4, rates="[0.05, 0.2]")
    (tmp / "again").mkdir()
    b = _run(tmp / "again", tiny_spec, "same", seeds=5, epochs=4, rates="[0.05, 0.2]")
    return a, b


def test_same_spec_twice_is_no_detectable_change_with_zero_difference(pair):
    a, b = pair
    report = diff_result_sets(a, b)
    assert report.same_study and report.changes == []
    assert len(report.rows) == 2
    for row in report.rows:
        assert row["test"] == "paired" and row["n_a"] == 5
        assert row["diff"] == 0.0 and row["ci_low"] == 0.0 and row["ci_high"] == 0.0
        assert row["verdict"] == "no detectable change"


def test_planted_effect_is_detected_as_worse(tmp_path, tiny_spec):
    # learning rate 100× too small for 4 epochs: validation accuracy must drop in every seed
    good = _run(tmp_path, tiny_spec, "good", seeds=6, epochs=4, rates="[0.1]")
    (tmp_path / "b").mkdir()
    slow = _run(tmp_path / "b", tiny_spec, "good", seeds=6, epochs=4, rates="[0.001]")
    report = diff_result_sets(good, slow)
    assert [c.key for c in report.changes] == ["ablation.axis[0].values"]
    [row] = report.rows
    assert row["verdict"] == "worse", row
    assert row["diff"] < 0 and row["p_adjusted"] < 0.05
    assert report.worse == 1
    gate = CliRunner().invoke(app, ["diff", str(good.path), str(slow.path), "--fail-on", "worse"])
    assert gate.exit_code == 1 and "worse" in gate.stdout
    assert CliRunner().invoke(app, ["diff", str(good.path), str(slow.path)]).exit_code == 0


def test_baseline_within_one_result_set(pair):
    a, _ = pair
    labels = sorted(set(a.runs.column("variant_label").to_pylist()))
    report = diff_baseline(a, labels[0])
    assert [r["variant_b"] for r in report.rows] == [labels[1]]
    assert report.rows[0]["test"] == "paired"


def test_mismatched_studies_give_a_readable_spec_diff(pair, tmp_path, tiny_spec):
    a, _ = pair
    extra = '\n[[ablation.axis]]\nkey = "regularization.weight_decay"\nvalues = [0.0, 0.01]\n'
    b = _run(tmp_path, tiny_spec, "same", seeds=5, epochs=4, rates="[0.05, 0.2]", extra=extra)
    report = diff_result_sets(a, b)
    keys = [c.key for c in report.changes]
    assert any(k.startswith("ablation.axis[1]") for k in keys)
    # each A variant finds its weight_decay=0.0 counterpart by configuration; the 0.01 arms are B-only
    assert len(report.rows) == 2 and len(report.only_b) == 2 and report.only_a == []
    assert {r["variant_b"] for r in report.rows} == {
        "optimizer.learning_rate=0.05, regularization.weight_decay=0.0",
        "optimizer.learning_rate=0.2, regularization.weight_decay=0.0"}


def test_different_data_is_shown_and_variants_still_pair(pair, tmp_path, tiny_spec):
    a, _ = pair
    spec = tiny_spec(tmp_path, "same", seeds=5, epochs=4, rates="[0.05, 0.2]")
    spec.write_text(spec.read_text().replace("noise = 0.5", "noise = 0.9"))
    b = open_result_set(run_study(load_study(spec), tmp_path / "r").path)
    report = diff_result_sets(a, b)
    assert [c.render() for c in report.changes] == ["data.noise: 0.5 → 0.9"]
    # matched by configuration minus data.noise, paired over the five shared seeds
    assert [(r["variant_a"] == r["variant_b"], r["test"], r["n_a"]) for r in report.rows] == [(True, "paired", 5)] * 2
    text = CliRunner().invoke(app, ["diff", str(a.path), str(b.path)]).stdout
    assert "data.noise: 0.5 → 0.9" in text and "Traceback" not in text


def test_base_names_the_grid_cell_equal_to_the_base_configuration():
    from pathlib import Path

    from compiler.loader import load_study
    from runtime.diff import resolve_variant

    # specs/cold-chain.toml's base is batch normalization without dropout: grid cell 3.
    study = load_study(Path(__file__).resolve().parents[2] / "specs" / "cold-chain.toml")
    assert study.variants[3].label == "normalization.kind=batch, regularization.dropout.rate=0.0"
    assert resolve_variant(study, "base") == 3
    assert resolve_variant(study, "batch, dropout.rate=0.0") == 3
