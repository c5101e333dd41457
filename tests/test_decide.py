"""Deciding with a margin: TOST, power and seeds against statsmodels, the probability of improvement
by hand, the interaction test against statsmodels' AnovaRM, and Monte-Carlo calibration of the
verdicts' error rates."""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps
from statsmodels.stats.anova import AnovaRM
from statsmodels.stats.power import TTestPower
from statsmodels.stats.weightstats import ttost_paired

from runtime.stats import (adjust, compare, decide, detectable_difference, family_alpha, improvement,
                           interaction_test, interval, power_paired, seeds_needed, tost_pvalue)


def _arms(d: np.ndarray, base: np.ndarray) -> tuple[dict, dict]:
    return dict(enumerate(base)), dict(enumerate(base + d))


# ── equivalence ─────────────────────────────────────────────────────────────────────────────────
@pytest.mark.parametrize("n, shift, margin", [(5, 0.0, 0.5), (8, 0.2, 0.6), (12, -0.3, 0.4), (20, 0.05, 0.1)])
def test_tost_matches_statsmodels_ttost_paired(n, shift, margin):
    rng = np.random.default_rng(n)
    a = rng.normal(0.8, 0.1, size=n)
    b = a + rng.normal(shift, 0.3, size=n)
    # statsmodels.stats.weightstats.ttost_paired(x1, x2, low, upp): H0 x1 − x2 outside (low, upp)
    ref = ttost_paired(b, a, -margin, margin)[0]
    assert tost_pvalue(b - a, margin) == pytest.approx(ref, rel=1e-10)


def test_equivalent_verdict_is_tost_at_half_the_interval_level():
    # Schuirmann 1987: the two one-sided tests at level a ⇔ the 1 − 2a interval inside (−D, D);
    # a two-sided 1 − α interval is a 1 − 2(α/2) interval, so "equivalent" ⇔ TOST p ≤ α/2.
    rng = np.random.default_rng(11)
    agree = 0
    for _ in range(300):
        n = int(rng.integers(4, 15))
        a = rng.normal(size=n)
        d = rng.normal(rng.uniform(-0.5, 0.5), rng.uniform(0.2, 1.0), size=n)
        c = compare(*_arms(d, a))
        lo, hi = interval(c, 0.05)
        equivalent = decide(lo, hi, "max", 0.6) == "equivalent"
        p = ttost_paired(a + d, a, -0.6, 0.6)[0]   # statsmodels reference
        assert equivalent == (p <= 0.025), (lo, hi, p)
        agree += equivalent
    assert 20 < agree < 280   # both outcomes were exercised


# ── power and seeds ─────────────────────────────────────────────────────────────────────────────
@pytest.mark.parametrize("n, effect, sd, alpha", [(5, 0.01, 0.007, 0.05), (10, 0.5, 1.0, 0.05),
                                                   (36, 0.005, 0.01, 0.01), (3, 1.0, 0.4, 0.1)])
def test_power_matches_statsmodels_ttestpower(n, effect, sd, alpha):
    # statsmodels.stats.power.TTestPower: one-sample/paired t test, effect size in sd units
    ref = TTestPower().power(effect_size=effect / sd, nobs=n, alpha=alpha, alternative="two-sided")
    assert power_paired(n, effect, sd, alpha) == pytest.approx(ref, rel=1e-9)
    assert power_paired(n, -effect, sd, alpha) == pytest.approx(ref, rel=1e-9)   # two-sided: symmetric
    es = TTestPower().solve_power(effect_size=None, nobs=n, alpha=alpha, power=0.8, alternative="two-sided")
    assert detectable_difference(n, sd, alpha, 0.8) == pytest.approx(es * sd, rel=1e-5)


@pytest.mark.parametrize("sd, margin, alpha", [(1.0, 0.5, 0.05), (0.007, 0.005, 0.05), (0.02, 0.01, 0.0167)])
def test_seeds_needed_against_statsmodels_and_by_simulation(sd, margin, alpha):
    n = seeds_needed(sd, margin, alpha)
    # at least the seeds statsmodels' TTestPower.solve_power needs to detect ±margin at power 0.8
    detect = TTestPower().solve_power(effect_size=margin / sd, nobs=None, alpha=alpha, power=0.8,
                                      alternative="two-sided")
    assert n >= math.ceil(detect)
    # Monte Carlo, truth 0: the interval at 1 − α lands inside ±margin in ≥ 80 % of studies
    rng = np.random.default_rng(5)
    d = rng.normal(0.0, sd, size=(400, n))
    half = sps.t.ppf(1 - alpha / 2, n - 1) * d.std(axis=1, ddof=1) / math.sqrt(n)
    inside = np.mean(np.abs(d.mean(axis=1)) + half < margin)
    assert inside >= 0.8 - 3 * math.sqrt(0.8 * 0.2 / 400)
    # …and with one seed fewer the bound it was planned on is not met
    m = n - 1
    one = sps.nct.sf(sps.t.ppf(1 - alpha / 2, m - 1), m - 1, margin * math.sqrt(m) / sd)
    power = TTestPower().power(effect_size=margin / sd, nobs=m, alpha=alpha, alternative="two-sided")
    assert 2 * one - 1 < 0.8 or power < 0.8


def test_seeds_edge_cases():
    assert seeds_needed(0.0, 0.01, 0.05) == 2          # no spread: any two seeds decide
    assert math.isnan(seeds_needed(math.nan, 0.01, 0.05))
    assert seeds_needed(1.0, 1e-4, 0.05) == math.inf   # beyond 100 000 seeds
    assert math.isnan(detectable_difference(1, 1.0, 0.05))


# ── probability of improvement ──────────────────────────────────────────────────────────────────
def test_probability_of_improvement_by_hand():
    # B − A per seed: +, +, −, tie, + → (3 + ½) / 5 = 0.7 (ties count ½, as in Agarwal et al. 2021)
    p, lo, hi = improvement([0.02, 0.01, -0.01, 0.0, 0.03])
    assert p == pytest.approx(0.7, abs=1e-15)
    assert 0.0 <= lo <= p <= hi <= 1.0
    # every seed better: 1 with the degenerate interval [1, 1]; every seed worse: 0
    assert improvement([0.1, 0.2, 0.3]) == (1.0, 1.0, 1.0)
    assert improvement([-0.1, -0.2, -0.3]) == (0.0, 0.0, 0.0)
    # a 2-of-4 split: 0.5
    assert improvement([1, -1, 2, -2])[0] == 0.5
    c = compare({0: 0.8, 1: 0.8, 2: 0.8, 3: 0.8}, {0: 0.81, 1: 0.79, 2: 0.8, 3: 0.82})
    assert c.improvement == pytest.approx((2 + 0.5) / 4)


def test_improvement_interval_matches_scipy_percentile_bootstrap():
    d = np.random.default_rng(3).normal(0.2, 1.0, size=20)
    score = (d > 0) + 0.5 * (d == 0)
    # scipy.stats.bootstrap, percentile method: same resampling scheme, its own random stream
    ref = sps.bootstrap((score,), np.mean, method="percentile", n_resamples=20_000,
                        rng=np.random.default_rng(1)).confidence_interval
    _, lo, hi = improvement(d)
    assert (lo, hi) == pytest.approx((ref.low, ref.high), abs=0.051)   # one step of 1/20, MC noise


# ── interaction ─────────────────────────────────────────────────────────────────────────────────
def test_interaction_matches_statsmodels_anovarm():
    rng = np.random.default_rng(8)
    n, a, b = 6, 3, 2
    seed_effect = rng.normal(0, 0.5, size=(n, 1, 1))
    cells = np.array([[0.0, 0.1], [0.2, 0.6], [0.1, 0.0]])[None]
    y = seed_effect + cells + rng.normal(0, 0.15, size=(n, a, b))
    f, df1, df2, p = interaction_test(y)
    frame = pd.DataFrame([{"seed": s, "a": i, "b": j, "y": y[s, i, j]}
                          for s in range(n) for i in range(a) for j in range(b)])
    # statsmodels.stats.anova.AnovaRM: two-way within-subjects ANOVA, sphericity assumed
    ref = AnovaRM(frame, "y", "seed", within=["a", "b"]).fit().anova_table.loc["a:b"]
    assert f == pytest.approx(ref["F Value"], rel=1e-9)
    assert (df1, df2) == (ref["Num DF"], ref["Den DF"]) == (2, 10)
    assert p == pytest.approx(ref["Pr > F"], rel=1e-9)


# ── the family's level agrees with its adjusted p-values ────────────────────────────────────────
@pytest.mark.parametrize("method", ["holm", "bh"])
def test_interval_excludes_zero_exactly_when_adjusted_p_rejects(method):
    # Holm 1979 step-down and Benjamini–Hochberg 1995: the interval at 1 − family_alpha must
    # exclude 0 for each rejected row and contain it for each kept row.
    rng = np.random.default_rng(21 if method == "holm" else 22)
    rejected = kept = 0
    for _ in range(200):
        m = int(rng.integers(2, 10))
        comps = []
        for _ in range(m):
            a = rng.normal(size=6)
            comps.append(compare(*_arms(rng.normal(rng.choice([0.0, 0.8, 1.5]), 1.0, size=6), a)))
        pvals = [c.p_value for c in comps]
        level = family_alpha(pvals, 0.05, method)
        for c, p_adj in zip(comps, adjust(pvals, method)):
            lo, hi = interval(c, level)
            assert (lo > 0 or hi < 0) == (p_adj <= 0.05), (lo, hi, p_adj, level)
            rejected += p_adj <= 0.05
            kept += p_adj > 0.05
    assert rejected > 50 and kept > 50


# ── Monte-Carlo calibration ─────────────────────────────────────────────────────────────────────
def _rates(studies: int, n: int, truth: float, margin: float, family: int = 1, seed: int = 0) -> dict:
    """Share of simulated studies (paired normal differences, sd 1) with at least one row of each
    verdict, Holm over ``family`` comparisons with the same true difference."""
    rng = np.random.default_rng(seed)
    counts = {"better": 0, "worse": 0, "equivalent": 0}
    for _ in range(studies):
        comps = [compare(*_arms(rng.normal(truth, 1.0, size=n), rng.normal(size=n))) for _ in range(family)]
        level = family_alpha([c.p_value for c in comps], 0.05, "holm")
        verdicts = {decide(*interval(c, level), "max", margin) for c in comps}
        for v in counts:
            counts[v] += v in verdicts
    return {v: k / studies for v, k in counts.items()}


def _within(rate: float, bound: float, studies: int) -> bool:
    # one-sided: the rate may exceed the bound by 3 Monte-Carlo standard errors of a rate at the bound
    return rate <= bound + 3 * math.sqrt(bound * (1 - bound) / studies)


@pytest.mark.parametrize("studies, slow", [(300, False), pytest.param(4000, True, marks=pytest.mark.slow)])
def test_false_verdict_rates_are_at_most_alpha(studies, slow):
    margin = 0.8   # sd units of the differences
    null = _rates(studies, 8, 0.0, margin, seed=1)
    assert _within(null["better"] + null["worse"], 0.05, studies), null
    for truth in (margin, -margin):   # a difference exactly at the margin is not equivalent
        edge = _rates(studies, 8, truth, margin, seed=2 if truth > 0 else 3)
        assert _within(edge["equivalent"], 0.05, studies), edge
    family = _rates(studies // 2, 6, 0.0, margin, family=4, seed=4)   # Holm over 4: family-wise
    assert _within(family["better"] + family["worse"], 0.05, studies // 2), family
    if slow:   # with thousands of studies the t test's own size shows: near α, not far below
        assert null["better"] + null["worse"] > 0.05 - 3 * math.sqrt(0.05 * 0.95 / studies)


def test_power_stays_defined_where_scipys_far_tail_is_not():
    # scipy.stats.nct.cdf(-4.30, 2, 19.1) is NaN (true value ~1e-24): the power is still ~1 and the
    # detectable difference still solvable (a pilot with 3 seeds and a tiny sd hit this)
    assert power_paired(3, 0.011030100334448161, 0.001, 0.05) == pytest.approx(1.0, abs=1e-7)
    d = detectable_difference(3, 0.001, 0.05)
    ref = TTestPower().solve_power(effect_size=None, nobs=3, alpha=0.05, power=0.8, alternative="two-sided")
    assert d == pytest.approx(ref * 0.001, rel=1e-5)
