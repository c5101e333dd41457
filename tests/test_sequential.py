"""Run until decided: the spending boundaries against published values and against scipy's
multivariate normal, and Monte-Carlo calibration of the whole procedure on synthetic per-seed
differences (no training): false better/worse, false equivalent, seeds spent against the fixed
design of the same power."""

import math

import numpy as np
import pytest
from scipy import stats as sps

from runtime.sequential import Procedure, Row, Rule, boundaries, look_alpha, spent
from runtime.stats import decide, seeds_needed, t_interval

ALPHA = 0.05
MARGIN = 0.6          # in sd units of the per-seed differences
FIXED = seeds_needed(1.0, MARGIN, ALPHA)   # 32: the fixed design, power 0.8 both ways
RULE = Rule(MARGIN, max_seeds=35, round=5, alpha=ALPHA)   # N ≈ 1.1 × fixed, first look at 5 seeds


# ── boundaries ──────────────────────────────────────────────────────────────────────────────────
@pytest.mark.parametrize("looks, published", [
    # Lan–DeMets O'Brien–Fleming-type spending, one-sided α = 0.025, equally spaced looks; the
    # values tabulated for this function (e.g. Jennison & Turnbull 2000, ch. 7, and the gsDesign
    # documentation's sfLDOF examples) — cited from memory to 3 decimals.
    (2, (2.963, 1.969)),
    (3, (3.710, 2.511, 1.993)),
    (5, (4.877, 3.357, 2.680, 2.290, 2.031)),
])
def test_boundaries_match_published_obrien_fleming_type_values(looks, published):
    got = boundaries(tuple((i + 1) / looks for i in range(looks)), 0.025)
    assert got == pytest.approx(published, abs=1.5e-3)


def test_one_look_is_the_fixed_design():
    # one look at t = 1 spends everything: the boundary is z_{1−a}
    assert boundaries((1.0,), 0.025) == pytest.approx((sps.norm.isf(0.025),), abs=1e-12)
    assert look_alpha([32], 32, 0.05) == pytest.approx(0.05, rel=1e-9)
    assert spent(1.0, 0.025) == pytest.approx(0.025, rel=1e-12)


@pytest.mark.parametrize("fractions", [(0.3, 0.55, 1.0), (5 / 35, 10 / 35, 15 / 35, 20 / 35), (0.25, 0.9)])
def test_boundaries_spend_what_the_function_says_by_scipy_multivariate_normal(fractions):
    # Independent reference: scipy.stats.multivariate_normal.cdf (Genz's algorithm) of the
    # canonical joint distribution, corr(Z_i, Z_j) = √(t_i/t_j) (Jennison & Turnbull 2000, §3.1).
    c = boundaries(fractions, 0.025)
    t = np.array(fractions)
    for k in range(1, len(t) + 1):
        cov = np.sqrt(np.minimum.outer(t[:k], t[:k]) / np.maximum.outer(t[:k], t[:k]))
        stay = sps.multivariate_normal.cdf(np.array(c[:k]), mean=np.zeros(k), cov=cov, abseps=1e-6, releps=1e-6)
        assert 1 - stay == pytest.approx(spent(t[k - 1], 0.025), abs=2e-5)


def test_bad_fractions_and_rules_are_refused():
    with pytest.raises(ValueError):
        boundaries((0.5, 0.4), 0.025)
    with pytest.raises(ValueError):
        Procedure(Rule(0.1, max_seeds=4, round=2), first=range(5))
    with pytest.raises(ValueError):
        Procedure(Rule(0.1, max_seeds=10, round=0), first=range(3))


# ── the procedure ───────────────────────────────────────────────────────────────────────────────
def _row(key, d, family=1, arms=("a", "b")):
    n = len(d)
    return Row(key, family, float(d.mean()), float(d.std(ddof=1) / math.sqrt(n)), n - 1, "max", frozenset(arms))


def _study(diffs: np.ndarray, rule: Rule = RULE, first: int = 5) -> tuple[dict, int]:
    """One procedure over comparisons whose per-seed differences (one row each, in seed order) are
    given in full: each look sees the first n of them. Returns (settled, seeds spent per arm)."""
    p = Procedure(rule, list(range(first)))
    while True:
        n = len(p.seeds)
        p.look([_row(i, d[:n], family=len(diffs), arms=(f"a{i}", f"b{i}")) for i, d in enumerate(diffs)])
        if p.done:
            return p.settled, n
        assert p.advance()


def _rates(truth: float, studies: int, seed: int = 1, comparisons: int = 1):
    rng = np.random.default_rng(seed)
    verdicts, spent_seeds = [], []
    for _ in range(studies):
        settled, n = _study(rng.normal(truth, 1.0, size=(comparisons, RULE.max_seeds)))
        verdicts.append([settled[i].verdict for i in range(comparisons)])
        spent_seeds.append(n)
    return verdicts, float(np.mean(spent_seeds))


def _bound(rate: float, studies: int) -> float:
    return rate + 3 * math.sqrt(rate * (1 - rate) / studies)   # 3 Monte-Carlo standard errors


def _calibration(studies: int):
    # truth 0: better or worse at any look is a false positive (two-sided level α)
    null, seeds_null = _rates(0.0, studies)
    false_call = np.mean([v[0] in ("better", "worse") for v in null])
    assert false_call <= _bound(ALPHA, studies), false_call
    # truth ±D: equivalent is false (each one-sided test spends α/2)
    for truth in (MARGIN, -MARGIN):
        edge, seeds_edge = _rates(truth, studies, seed=2)
        false_equivalent = np.mean([v[0] == "equivalent" for v in edge])
        assert false_equivalent <= _bound(ALPHA / 2, studies), (truth, false_equivalent)
        assert seeds_edge < FIXED   # settles earlier than the fixed design on average
    assert seeds_null < FIXED


def test_calibration_of_the_stopping_rule():
    _calibration(300)


@pytest.mark.slow
def test_calibration_of_the_stopping_rule_slow():
    _calibration(4000)


def test_peeking_without_the_rule_is_caught_by_the_same_check():
    # The check can fail: reading each look at the fixed level α (what "add seeds until p < 0.05"
    # does) calls a false difference far more often than α across 7 looks (Armitage, McPherson &
    # Rowe 1969 report about 0.14 for 5 looks — from memory).
    rng = np.random.default_rng(3)
    studies, hits = 300, 0
    for _ in range(studies):
        d = rng.normal(0.0, 1.0, size=RULE.max_seeds)
        for n in (5, 10, 15, 20, 25, 30, 35):
            r = _row(0, d[:n])
            if decide(*t_interval(r.diff, r.se, r.df, ALPHA), "max", MARGIN) in ("better", "worse"):
                hits += 1
                break
    assert hits / studies > _bound(ALPHA, studies)


def test_family_of_null_comparisons_keeps_its_level():
    # three null comparisons of one question: any false better/worse at most α (Bonferroni inside)
    verdicts, _ = _rates(0.0, 200, seed=4, comparisons=3)
    any_false = np.mean([any(x in ("better", "worse") for x in v) for v in verdicts])
    assert any_false <= _bound(ALPHA, 200), any_false


def test_a_large_effect_settles_at_the_first_look_and_its_arms_close():
    # comparison 0 has a true difference of −5 sd (an arm that clearly hurts), comparison 1 of 0.3 sd
    rule = Rule(MARGIN, max_seeds=20, round=4, alpha=ALPHA)
    rng = np.random.default_rng(6)
    diffs = np.stack([rng.normal(-5.0, 1.0, rule.max_seeds), rng.normal(0.3, 1.0, rule.max_seeds)])
    p = Procedure(rule, list(range(8)))
    p.look([_row(i, d[:8], 2, (f"a{i}", f"b{i}")) for i, d in enumerate(diffs)])
    assert p.settled[0].verdict == "worse" and p.settled[0].look == 1 and p.settled[0].seeds == 8
    assert list(p.open) == [1] and p.arms == {"a1", "b1"}   # only the close question's arms go on
    assert not p.done and p.advance() == [8, 9, 10, 11]


def test_seeds_are_new_shared_and_capped():
    p = Procedure(Rule(0.1, max_seeds=12, round=4), [7, 19, 23])
    d = np.array([0.0, 1.0, -1.0, 0.5, -0.5, 0.2, 0.1, 2.0, -2.0, 1.5, -1.5, 0.0])   # wide: never decided
    p.look([_row("q", d[:3])])
    assert p.advance() == [24, 25, 26, 27]          # above every seed used, never one run before
    p.look([_row("q", d[:7])])
    assert p.advance() == [28, 29, 30, 31]
    p.look([_row("q", d[:11])])
    assert p.advance() == [32]                      # the last round stops at N = 12
    p.look([_row("q", d)])
    assert p.done and p.settled["q"].verdict == "inconclusive" and p.settled["q"].seeds == 12
    assert p.settled["q"].look == 4 and p.advance() == []
