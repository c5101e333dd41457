"""diff over real result sets: reproducibility, a planted effect, mismatched studies."""

import pytest
from typer.testing import CliRunner

from compiler.loader import load_study
from runtime.cli import app
from runtime.diff import diff_baseline, diff_design, diff_result_sets
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
        "0.05 · 0.0", "0.2 · 0.0"}


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


# ── questions that follow the design ───────────────────────────────────────────────────────────
LR, WD = "optimizer.learning_rate", "regularization.weight_decay"


@pytest.fixture(scope="module")
def grid(tmp_path_factory, tiny_spec):
    tmp = tmp_path_factory.mktemp("grid")
    extra = f'\n[[ablation.axis]]\nkey = "{WD}"\nvalues = [0.0, 0.01]\n'
    return _run(tmp, tiny_spec, "grid", seeds=4, epochs=3, rates="[0.03, 0.3]", extra=extra)


def _final(rs, lr, wd, metric="val_accuracy"):
    from runtime.migrate import key_column

    cols = rs.runs.to_pydict()
    lrs, wds = cols[key_column(LR)], cols[key_column(WD)]
    return {s: v for s, a, b, v in zip(cols["seed"], lrs, wds, cols[f"final_{metric}"])
            if a == lr and b == wd}


def test_design_asks_about_one_axis_at_each_level_of_the_other(grid):
    import numpy as np
    import pandas as pd
    from statsmodels.stats.anova import AnovaRM

    report = diff_design(grid, axis=LR, margin=0.05)
    assert report.questions == [f"does {LR} matter at each {WD}?", f"does {LR} matter on average over {WD}?",
                                f"does the effect of {LR} depend on {WD}?"]
    simple = [r for r in report.rows if r["question"] == report.questions[0]]
    assert [r["contrast"] for r in simple] == [f"0.03 → 0.3 at {WD}=0.0", f"0.03 → 0.3 at {WD}=0.01"]
    # by hand from runs.parquet: the mean over seeds of the paired differences
    for r, wd in zip(simple, (0.0, 0.01)):
        a, b = _final(grid, 0.03, wd), _final(grid, 0.3, wd)
        assert r["diff"] == pytest.approx(np.mean([b[s] - a[s] for s in a]), rel=1e-6)
        assert (r["ci_low"] > 0 or r["ci_high"] < 0) == (r["p_adjusted"] <= 0.05)   # interval agrees with verdict
    [main] = [r for r in report.rows if r["question"] == report.questions[1]]
    assert main["diff"] == pytest.approx(np.mean([r["diff"] for r in simple]), rel=1e-6)
    # the interaction against statsmodels' AnovaRM on the stored values (seeds as subjects); the
    # validation divergence, as accuracy on 60 samples is too coarse to move with weight decay here
    frame = pd.DataFrame([{"seed": s, "lr": lr, "wd": wd, "y": v} for lr in (0.03, 0.3) for wd in (0.0, 0.01)
                          for s, v in _final(grid, lr, wd, "val_divergence").items()])
    ref = AnovaRM(frame, "y", "seed", within=["lr", "wd"]).fit().anova_table.loc["lr:wd"]
    by_div = diff_design(grid, axis=LR, metrics=["val_divergence"])
    [inter] = [r for r in by_div.rows if r["question"] == by_div.questions[2]]
    assert inter["p"] == pytest.approx(ref["Pr > F"], rel=1e-5)
    assert inter["verdict"] == ("interacts" if ref["Pr > F"] <= 0.05 else "no detectable interaction")
    everything = diff_design(grid)
    assert len(everything.questions) == 5   # per axis: at each level, on average; one interaction


def test_margin_turns_open_rows_into_equivalent_or_inconclusive(grid):
    wide = diff_design(grid, axis=WD, margin=0.9)      # accuracy moves far less than 0.9
    assert {r["verdict"] for r in wide.rows if r["test"] == "paired"} == {"equivalent"}
    none = diff_design(grid, axis=WD)
    assert {r["verdict"] for r in none.rows if r["test"] == "paired"} <= {"better", "worse", "no detectable change"}
    # the divergence does move with weight decay: a margin of 1e-7 cannot be met by 4 seeds
    for r in diff_design(grid, axis=WD, metrics=["val_divergence"], margin=1e-7).rows:
        if r["test"] == "paired":
            assert r["verdict"] in ("better", "worse", "inconclusive"), r
            assert r["verdict"] != "inconclusive" or r["seeds_needed"] > r["n_a"]


def test_cli_decides_and_plans_and_refuses_bad_arguments(grid):
    run = CliRunner()
    out = run.invoke(app, ["diff", str(grid.path), "--axis", LR, "--margin", "0.05"])
    assert out.exit_code == 0, out.output
    assert f"does {LR} matter at each {WD}?" in out.stdout and "seeds needed" in out.stdout
    plan = run.invoke(app, ["seeds", str(grid.path), "--margin", "0.01"])
    assert plan.exit_code == 0 and "seeds_needed" in plan.stdout
    for args in (["diff", str(grid.path), "--axis", "nope"],
                 ["diff", str(grid.path), "--margin", "0.01", "-m", "val_accuracy", "-m", "val_divergence"],
                 ["diff", str(grid.path), "--margin", "-1"],
                 ["seeds", str(grid.path)]):
        bad = run.invoke(app, args)
        assert bad.exit_code == 2 and "Traceback" not in bad.output, (args, bad.output)
        assert len(bad.output.strip().splitlines()) == 1, bad.output


def test_spec_margin_is_the_default(tmp_path, tiny_spec):
    spec = tiny_spec(tmp_path, "margined", seeds=3, epochs=2, rates="[0.03, 0.3]")
    spec.write_text(spec.read_text().replace('metric = "val_accuracy"', 'metric = "val_accuracy"\nmargin = 0.9'))
    rs = open_result_set(run_study(load_study(spec), tmp_path / "r").path)
    [row] = diff_design(rs).rows
    assert row["margin"] == 0.9 and row["verdict"] == "equivalent"
    assert diff_design(rs, margin=1e-4).rows[0]["margin"] == 1e-4   # the command line wins

def test_base_names_the_grid_cell_equal_to_the_base_configuration():
    from pathlib import Path

    from compiler.loader import load_study
    from runtime.diff import resolve_variant

    # specs/cold-chain.toml's base is batch normalization without dropout: grid cell 3.
    study = load_study(Path(__file__).resolve().parents[2] / "specs" / "cold-chain.toml")
    assert study.variants[3].label == "batch · 0.0"
    assert resolve_variant(study, "base") == 3
    assert resolve_variant(study, "batch, dropout.rate=0.0") == 3
