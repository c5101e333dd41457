"""Tuning inside arms and the test split: selection on validation only, arms compared on test."""

import itertools
import math
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from compiler.errors import SpecError
from compiler.loader import load_text
from runtime.diff import diff_baseline
from runtime.runner import run_study
from runtime.stats import compare, decide, interval
from runtime.store import open_result_set
from runtime.tuning import arm_picks, expected_best, study_of


# ── the estimator ───────────────────────────────────────────────────────────────────────────────
def _brute_force(values, n, direction):
    """Every multiset of n draws with replacement, weighted by its multinomial probability."""
    big = len(values)
    pick = max if direction == "max" else min
    mean = second = 0.0
    for combo in itertools.combinations_with_replacement(range(big), n):
        counts = Counter(combo).values()
        p = math.factorial(n) / math.prod(math.factorial(c) for c in counts) / big ** n
        best = pick(values[i] for i in combo)
        mean += p * best
        second += p * best * best
    return mean, math.sqrt(max(second - mean * mean, 0.0))


@pytest.mark.parametrize("values", [[0.7, 0.9, 0.8], [0.5, 0.5, 0.6, 0.1], [3.0, -1.0, 2.5, 2.5, 0.0], [0.42]])
@pytest.mark.parametrize("direction", ["max", "min"])
def test_expected_best_matches_enumeration(values, direction):
    # Dodge et al. 2019, "Show your work", §3: the expected maximum of n i.i.d. draws from the
    # empirical distribution of the N scores; checked against enumerating all n-draw multisets.
    for n in range(1, 5):
        want = _brute_force(values, n, direction)
        got = expected_best(values, n, direction)
        assert got == pytest.approx(want, abs=1e-12)


def test_expected_best_limits():
    # n = 1 is the sample mean and a large n tends to the best score (Dodge et al. 2019, §3)
    v = [0.2, 0.9, 0.4, 0.7]
    assert expected_best(v, 1)[0] == pytest.approx(np.mean(v))
    assert expected_best(v, 200)[0] == pytest.approx(0.9, abs=1e-12)
    assert expected_best(v, 200, "min")[0] == pytest.approx(0.2, abs=1e-12)


# ── spec checks ─────────────────────────────────────────────────────────────────────────────────
BASE = """
[study]
name = "t"
seeds = 2
[data]
samples = {samples}
validation = {validation}
test = {test}
[training]
batch_size = 8
"""

TUNE = """
[ablation]
mode = "list"
[[ablation.variant]]
label = "heavy"
changes = {{ "optimizer.momentum" = 0.9 }}
[ablation.tune]
{tune}
[[ablation.tune.knob]]
key = "{key}"
{values}
"""


def _problems(text):
    with pytest.raises(SpecError) as err:
        load_text(text, "t.toml")
    return [(".".join(map(str, p.loc)), p.message) for p in err.value.problems]


def test_no_training_rows_left():
    # 100 × 0.5 + 100 × 0.5: every row held out
    (loc, msg), = _problems(BASE.format(samples=100, validation=0.5, test=0.5))
    assert loc == "data.test" and "leave no training rows" in msg and "50 validation + 50 test" in msg


def test_test_share_rounding_to_nothing():
    (loc, msg), = _problems(BASE.format(samples=100, validation=0.25, test=0.004))
    assert loc == "data.test" and "no test row" in msg


def test_test_split_default_keeps_hash():
    plain = load_text(BASE.format(samples=100, validation=0.25, test=0).replace("test = 0\n", ""), "t.toml")
    zero = load_text(BASE.format(samples=100, validation=0.25, test=0), "t.toml")
    assert plain.study_hash == zero.study_hash
    assert load_text(BASE.format(samples=100, validation=0.25, test=0.2), "t.toml").study_hash != plain.study_hash


@pytest.mark.parametrize("test, tune, key, values, loc, words", [
    # tuning compares arms on a test split: without one there is nothing to compare on
    (0, "", "optimizer.learning_rate", "values = [0.1, 0.3]", "ablation.tune", ("data.test",)),
    # settings are chosen on validation data only
    (0.2, 'metric = "train_divergence"', "optimizer.learning_rate", "values = [0.1, 0.3]",
     "ablation.tune.metric", ("validation",)),
    # a tuned key must be a knob (lanes, not programs)
    (0.2, "", "training.epochs", "values = [2, 4]", "ablation.tune.knob.0.key",
     ("not a knob", "optimizer.learning_rate")),
    # and not a key the arms themselves vary
    (0.2, "", "optimizer.momentum", "values = [0.0, 0.5]", "ablation.tune.knob.0.key", ("varied by the ablation",)),
], ids=["needs-a-test-split", "chooses-on-validation-only", "key-must-be-a-knob", "key-not-varied-by-the-arms"])
def test_tuning_rules(test, tune, key, values, loc, words):
    text = BASE.format(samples=100, validation=0.25, test=test) + TUNE.format(tune=tune, key=key, values=values)
    (got_loc, msg), = _problems(text)
    assert got_loc == loc and all(w in msg for w in words), (got_loc, msg)


def test_log_range_and_equal_budget():
    text = BASE.format(samples=100, validation=0.25, test=0.2) + TUNE.format(
        tune="", key="optimizer.learning_rate", values="low = 0.001\nhigh = 0.1\npoints = 3")
    loaded = load_text(text, "t.toml")
    # the base and the listed arm, each with the same three rates (log-spaced: common practice)
    rates = Counter((v.arm.label, v.setting["optimizer.learning_rate"]) for v in loaded.variants)
    assert rates == {(a, r): 1 for a in ("base", "heavy") for r in (0.001, 0.01, 0.1)}
    assert len({v.program for v in loaded.variants}) == 1      # knobs: lanes, not programs


# ── a constructed study: a shared rate misleads, tuning inside arms does not ────────────────────
SHARED = """
[study]
name = "shared-rate"
seeds = 8
metric = "val_accuracy"
margin = 0.05

[data]
generator = "blobs"
samples = 400
features = 4
classes = 3
noise = 1.0
validation = 0.25
test = 0.25

[model]
hidden = [16]

[optimizer]
kind = "sgd"
learning_rate = 0.01

[training]
epochs = 4
batch_size = 25

[ablation]
mode = "list"
include_base = false

[[ablation.variant]]
label = "momentum"
changes = { "optimizer.momentum" = 0.9 }

[[ablation.variant]]
label = "plain"
changes = { "optimizer.momentum" = 0.0 }

[ablation.tune]

[[ablation.tune.knob]]
key = "optimizer.learning_rate"
values = [0.01, 0.1]
"""


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    folder = tmp_path_factory.mktemp("shared")
    (folder / "s.toml").write_text(SHARED)
    loaded = load_text(SHARED, str(folder / "s.toml"))
    return open_result_set(run_study(loaded, folder / "r").path)


def test_shared_rate_makes_plain_look_worse_tuning_shows_no_difference(shared):
    # Heavy-ball momentum β multiplies the step of a steady gradient by 1/(1 − β) (Polyak 1964;
    # common practice: lr/(1 − β) is the effective rate), so the rate 0.01 that suits momentum 0.9
    # is ten times too small for plain SGD in 4 epochs.
    cols = shared.runs.to_pydict()
    at_shared = {label: {s: t for lab, s, t in zip(cols["variant_label"], cols["seed"], cols["test_accuracy"])
                         if lab == f"{label}, optimizer.learning_rate=0.01"} for label in ("momentum", "plain")}
    c = compare(at_shared["momentum"], at_shared["plain"])
    lo, hi = interval(c, 0.05)
    assert decide(lo, hi, "max", 0.05) == "worse"
    # each arm at its own rate, picked on validation: within the study's margin of ±0.05
    (row,) = diff_baseline(shared, "momentum").rows
    assert row["metric"] == "test_accuracy" and row["verdict"] == "equivalent"
    picks = {a.arm.label: {p.setting["optimizer.learning_rate"] for p in a.picks.values()}
             for a in arm_picks(shared, study_of(shared))}
    assert picks["plain"] == {0.1}


def test_test_scores_taken_at_the_judged_epoch(shared):
    cols = shared.runs.to_pydict()
    assert set(cols["test_epoch"]) == {4}                     # epoch = "last" (the default)
    assert all(0 <= x <= 1 for x in cols["test_accuracy"])
    assert "test_accuracy" not in shared.curves.column_names  # never a curve


# ── test rows never influence selection ─────────────────────────────────────────────────────────
IRIS = """
[study]
name = "iris-tuned"
seeds = [0]
metric = "val_accuracy"

[data]
kind = "file"
path = "iris.csv"
validation = 0.3
test = 0.3

[model]
hidden = [8]

[training]
epochs = 6
batch_size = 16

[ablation]
mode = "list"
[[ablation.variant]]
label = "heavy"
changes = { "optimizer.momentum" = 0.9 }

[ablation.tune]
epoch = "best"
[[ablation.tune.knob]]
key = "optimizer.learning_rate"
values = [0.003, 0.03, 0.3]
"""


def test_perturbing_test_rows_changes_no_selection(tmp_path):
    # Fisher's iris data (scikit-learn's bundled copy); the test rows of seed 0 are the last of
    # the split's permutation (compiler.build), recomputed here from the same key.
    import jax
    from sklearn.datasets import load_iris

    from compiler.build import SPLIT, permutation, seed_key
    from compiler.spec import split_sizes

    x, y = load_iris(return_X_y=True)
    n_train, n_val, n_test = split_sizes(len(x), 0.3, 0.3)
    test_rows = np.asarray(permutation(jax.random.fold_in(seed_key(0), SPLIT), len(x)))[n_train + n_val:]
    results = []
    for name, shift in (("clean", 0.0), ("shifted", 25.0)):
        folder = tmp_path / name
        folder.mkdir()
        xs = x.copy()
        xs[test_rows] += shift
        header = "a,b,c,d,y\n"
        (folder / "iris.csv").write_text(header + "".join(",".join(map(repr, [*r, int(t)])) + "\n"
                                                         for r, t in zip(xs.tolist(), y)))
        (folder / "s.toml").write_text(IRIS)
        loaded = load_text(IRIS, str(folder / "s.toml"))
        results.append(open_result_set(run_study(loaded, folder / "r").path))
    clean, shifted = ({a.arm.label: a.picks[0] for a in arm_picks(rs, study_of(rs))} for rs in results)
    assert {k: p.setting for k, p in clean.items()} == {k: p.setting for k, p in shifted.items()}
    assert {k: p.value for k, p in clean.items()} == {k: p.value for k, p in shifted.items()}
    c_cols, s_cols = (rs.runs.to_pydict() for rs in results)
    assert c_cols["best_epoch"] == s_cols["best_epoch"] and c_cols["test_epoch"] == s_cols["test_epoch"]
    for m in ("final_val_accuracy", "final_val_divergence", "final_train_divergence"):
        assert c_cols[m] == s_cols[m]
    # the perturbation did reach the test scores, so the check above could have failed
    assert c_cols["test_divergence"] != s_cols["test_divergence"]
    # epoch = "best": scored with the weights of each run's first epoch of best val_accuracy (not
    # always the last, so this tells the two apart)
    assert min(c_cols["test_epoch"]) < 6
    curves = results[0].curves.to_pydict()
    for rid, at in zip(c_cols["run_id"], c_cols["test_epoch"]):
        acc = [a for r, a in zip(curves["run_id"], curves["val_accuracy"]) if r == rid]
        assert at == int(np.argmax(acc)) + 1


def test_budget_table_and_picture_agree(shared, tmp_path):
    from runtime.plot import DPI, PlotError, plot, save_figure
    from runtime.tuning import budget_rows

    rows, metric = budget_rows(shared, study_of(shared))
    assert metric == "val_accuracy" and {r["trials"] for r in rows} == {16}      # 2 rates × 8 seeds per arm
    fig = plot(shared, "budget")
    drawn = {line.get_gid(): line.get_ydata() for line in fig.axes[0].get_lines() if line.get_gid()}
    for arm in ("momentum", "plain"):
        assert list(drawn[f"budget:{arm}"]) == [r["expected"] for r in rows if r["arm"] == arm]
    png = save_figure(fig, tmp_path / "budget.png")
    assert png.stat().st_size > 0 and fig.get_size_inches()[0] * DPI > 0
    with pytest.raises(PlotError):
        plot(shared, "budget", metrics=["val_accuracy"])


def test_report_of_a_tuned_study(shared):
    from runtime.report import default_baseline, render_report

    assert default_baseline(shared) == "momentum"            # the first arm, not a tuned variant
    page = render_report(shared)
    assert "arms tuned inside" in page and "budget:momentum" in page and "budget:plain" in page


def test_until_decided_adds_seeds_to_every_setting_of_the_open_arms(shared, tmp_path):
    # The stopping rule judges the arms as diff does (each its pick per seed); a look's new seed
    # is a new replicate of the whole tune-then-test procedure, so every setting of an open arm
    # runs on it. A narrow margin keeps the question open past the first look.
    from runtime.diff import sequential_design
    from runtime.runner import run_until_decided
    from runtime.sequential import Rule

    loaded = study_of(shared)
    rule = Rule(margin=0.005, max_seeds=12, round=4)
    reports, seq = run_until_decided(loaded, tmp_path, rule)
    rs = open_result_set(reports[-1].path)
    cols = rs.runs.to_pydict()
    seeds = {}
    for label, seed in zip(cols["variant_label"], cols["seed"]):
        seeds.setdefault(label, set()).add(seed)
    assert len(reports) > 1 and max(cols["seed"]) >= 8              # seeds beyond the spec's were added
    assert len({frozenset(s) for s in seeds.values()}) == 1          # every setting of both arms, same seeds
    assert len(seeds) == 4
    # the values judged at the last look are the arms' picks on those seeds, on the test split
    (question, start, comparison, (a, b)), = seq.judged.values()
    picks = {p.arm.label: p.picks for p in arm_picks(rs, study_of(rs))}
    assert start["metric"] == "val_accuracy" and comparison.n_a == len(a) == len(seq.procedure.seeds)
    assert a == {s: picks[start["variant_a"]][s].tests["test_accuracy"] for s in a}
    assert b == {s: picks[start["variant_b"]][s].tests["test_accuracy"] for s in b}
    again = sequential_design(rs, rule, loaded.spec.study.seed_list)
    assert again.done and again.procedure.settled == seq.procedure.settled


def test_test_rows_are_apart_and_standardization_ignores_them():
    from compiler.build import compile_program, seed_key
    from compiler.data import load_data

    text = BASE.format(samples=200, validation=0.25, test=0.2)
    held, plain = (load_text(t, "t.toml").variants[0].spec
                   for t in (text, BASE.format(samples=200, validation=0.25, test=0)))
    ds = load_data(held, Path("."))
    carries = {}
    for name, spec in (("held", held), ("plain", plain)):
        prog = compile_program([spec], ds)
        knobs = {k: v[0] for k, v in prog.pack([spec]).items()}
        carries[name] = prog.init(knobs, seed_key(5), ds.x, ds.y)
        assert prog.test_names == (("test_divergence", "test_accuracy", "test_macro_f1", "test_recall_0", "test_recall_1",
                                     "test_recall_2") if name == "held" else ())
    c, p = carries["held"], carries["plain"]
    train, val, test = (np.asarray(a).tolist() for a in (c.train_idx, c.val_idx, c.test_idx))
    assert (len(train), len(val), len(test)) == (110, 50, 40)       # 200 − 50 − 40
    assert sorted(train + val + test) == list(range(200))
    # one permutation of the seed's split key, cut in three instead of two
    assert train + val + test == np.asarray(p.train_idx).tolist() + np.asarray(p.val_idx).tolist()
    assert np.asarray(p.test_idx).shape == (0,)
    # fitted on the 110 training rows only (population sd: numpy's default ddof = 0)
    np.testing.assert_allclose(np.asarray(c.x_mean), ds.x[train].mean(axis=0), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(np.asarray(c.x_scale), ds.x[train].std(axis=0), rtol=1e-5, atol=1e-6)
