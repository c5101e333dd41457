"""The example studies say what they show: their comments are checked against their own results
(slow: each runs its full study; `make test-long`), and their shape against their comments."""

from pathlib import Path

import pytest

from compiler.loader import load_study
from runtime.diff import diff_baseline
from runtime.runner import run_study
from runtime.show import summary_rows

SPECS = Path(__file__).parents[2] / "specs"


def test_gearbox_budget_spends_24_neurons_at_every_depth():
    # the comment: "a fixed budget of 24 neurons", depths 1, 2, 3, 4 and 6
    study = load_study(SPECS / "gearbox-budget.toml")
    widths = {v.label: list(v.spec.model.widths) for v in study.variants}
    assert widths == {"base": [24], "two-layers": [12, 12], "three-layers": [8, 8, 8],
                      "four-layers": [6, 6, 6, 6], "six-layers": [4] * 6}
    assert {v.spec.normalization.kind for v in study.variants} == {"none"}


@pytest.mark.slow
def test_gearbox_budget_shows_the_sweet_spot_its_comment_claims(tmp_path):
    rs = run_study(load_study(SPECS / "gearbox-budget.toml"), tmp_path).path
    from runtime.store import open_result_set

    rs = open_result_set(rs)
    means = {r["variant"]: r["mean"] for r in summary_rows(rs)}
    verdicts = {r["variant_b"]: r["verdict"] for r in diff_baseline(rs, "base").rows}
    assert verdicts == {"two-layers": "better", "three-layers": "better", "four-layers": "better",
                        "six-layers": "worse"}
    assert means["base"] == pytest.approx(0.71, abs=0.01)
    assert means["two-layers"] == pytest.approx(0.84, abs=0.01)
    assert means["three-layers"] == pytest.approx(0.83, abs=0.01)
    assert means["six-layers"] == pytest.approx(0.47, abs=0.01)
    assert min(means["two-layers"], means["three-layers"]) > means["four-layers"] > means["base"]


def test_heavy_ball_gives_both_arms_the_same_five_rates():
    # the comment: five learning rates from 0.01 to 1.0 on a log scale, 2 × 5 × 6 = 60 runs, one program
    study = load_study(SPECS / "heavy-ball.toml")
    rates = {(v.arm.label, v.setting["optimizer.learning_rate"]) for v in study.variants}
    assert rates == {(a, r) for a in ("plain", "momentum") for r in (0.01, 0.03162, 0.1, 0.3162, 1.0)}
    assert study.runs == 60 and len({v.program for v in study.variants}) == 1


@pytest.mark.slow
def test_heavy_ball_shows_what_its_readme_example_claims(tmp_path):
    from runtime.store import open_result_set

    rs = open_result_set(run_study(load_study(SPECS / "heavy-ball.toml"), tmp_path).path)
    means = {r["variant"]: r["mean"] for r in summary_rows(rs)}
    # at the shared rate 0.01, plain SGD looks far worse (README: 0.780 against 0.905)
    assert means["plain, optimizer.learning_rate=0.01"] == pytest.approx(0.780, abs=0.001)
    assert means["momentum, optimizer.learning_rate=0.01"] == pytest.approx(0.905, abs=0.001)
    # each arm at its own rate: momentum 1.5 points worse on test, inside the ±0.02 margin
    (row,) = diff_baseline(rs, "plain").rows
    assert row["metric"] == "test_accuracy" and row["diff"] == pytest.approx(-0.01481, abs=1e-4)
    assert row["verdict"] == "worse" and row["ci_low"] < -0.02 < row["ci_high"] < 0
