"""runtime.stats against scipy.stats, a published worked example and hand-computed adjustments."""

import json
import math

import numpy as np
import pytest
from scipy import stats as sps

from runtime.stats import (EXACT_MAX_PAIRS, RANDOM_SIGN_PATTERNS, adjust, compare, decide, interval,
                           sign_flip_pvalue, summarize)

# Student (1908), "The probable error of a mean", Biometrika 6: extra hours of sleep of the same
# ten patients under two drugs (data of Cushny & Peebles 1905). Patient number plays the seed.
SLEEP_A = [0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0]
SLEEP_B = [1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4]

# Our own numbers: validation accuracy of two arms over seeds 0..7 (B a little better).
ACC_A = {0: 0.812, 1: 0.798, 2: 0.825, 3: 0.790, 4: 0.808, 5: 0.817, 6: 0.801, 7: 0.822}
ACC_B = {0: 0.821, 1: 0.803, 2: 0.829, 3: 0.805, 4: 0.806, 5: 0.826, 6: 0.812, 7: 0.824}


# ── summarize ───────────────────────────────────────────────────────────────────────────────────
def test_summary_matches_scipy_one_sample_interval():
    values = list(ACC_A.values())
    s = summarize(values + [math.nan, math.inf, None])
    # scipy.stats.ttest_1samp(...).confidence_interval(): the same t interval of the mean
    ci = sps.ttest_1samp(values, 0.0).confidence_interval(0.95)
    assert (s.n, s.n_finite) == (11, 8)
    assert s.mean == pytest.approx(np.mean(values), rel=1e-12)
    assert s.sd == pytest.approx(np.std(values, ddof=1), rel=1e-12)  # numpy, ddof=1
    assert (s.ci_low, s.ci_high) == pytest.approx((ci.low, ci.high), rel=1e-12)
    ci90 = sps.ttest_1samp(values, 0.0).confidence_interval(0.90)
    s90 = summarize(values, confidence=0.90)
    assert (s90.ci_low, s90.ci_high) == pytest.approx((ci90.low, ci90.high), rel=1e-12)


def test_summary_with_fewer_than_two_values_has_no_spread():
    one = summarize([0.7, math.nan])
    assert (one.n, one.n_finite, one.mean) == (2, 1, 0.7)
    assert math.isnan(one.sd) and math.isnan(one.ci_low) and math.isnan(one.ci_high)
    none = summarize([math.nan])
    assert none.n_finite == 0 and math.isnan(none.mean)


# ── compare: paired ─────────────────────────────────────────────────────────────────────────────
def test_paired_matches_scipy_ttest_rel_over_common_finite_seeds():
    a = dict(reversed(list(ACC_A.items())))   # insertion order must not matter: seeds pair
    b = dict(ACC_B)
    a[8], b[9] = 0.5, 0.9                     # seeds on one side only are left out
    a[3] = math.nan                           # a non-finite run drops its pair
    c = compare(a, b)
    seeds = [0, 1, 2, 4, 5, 6, 7]
    xa = [ACC_A[s] for s in seeds]
    xb = [ACC_B[s] for s in seeds]
    ref = sps.ttest_rel(xb, xa)               # scipy.stats.ttest_rel, B − A
    ci = ref.confidence_interval(0.95)
    assert c.test == "paired" and c.n_a == c.n_b == 7
    assert (c.nonfinite_a, c.nonfinite_b) == (1, 0)
    assert c.diff == pytest.approx(np.mean(np.subtract(xb, xa)), rel=1e-12)
    assert c.diff == pytest.approx(c.mean_b - c.mean_a, rel=1e-12)
    assert c.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert c.df == ref.df == 6
    assert c.p_value == pytest.approx(ref.pvalue, rel=1e-12)
    assert (c.ci_low, c.ci_high) == pytest.approx((ci.low, ci.high), rel=1e-12)
    assert "not used" in c.reason


def test_paired_worked_example_student_sleep_data():
    # Student 1908 sleep data; reference output of R's t.test(extra ~ group, data = sleep,
    # paired = TRUE) for drug 2 − drug 1, from memory: t = 4.0621, df = 9, p = 0.002833,
    # 95 % CI 0.7001142 … 2.4598858, mean difference 1.58.
    c = compare(dict(enumerate(SLEEP_A)), dict(enumerate(SLEEP_B)))
    assert c.test == "paired" and c.n_a == 10
    assert c.diff == pytest.approx(1.58, abs=1e-12)
    assert c.statistic == pytest.approx(4.0621, abs=5e-5)
    assert c.df == 9
    assert c.p_value == pytest.approx(0.002833, abs=5e-7)
    assert (c.ci_low, c.ci_high) == pytest.approx((0.7001142, 2.4598858), abs=5e-8)
    # Exact sign-flip test of the same differences, against scipy.stats.permutation_test with
    # permutation_type="samples" (swapping the two values within a pair = flipping the sign).
    ref = sps.permutation_test((SLEEP_B, SLEEP_A), lambda x, y, axis: np.mean(x - y, axis=axis),
                               permutation_type="samples", n_resamples=np.inf, vectorized=True)
    assert c.p_permutation == pytest.approx(ref.pvalue, rel=1e-12)


def test_sign_flip_exact_matches_scipy_permutation_test():
    rng = np.random.default_rng(7)
    for n in (3, 6, 11):
        d = rng.normal(0.3, 1.0, size=n)
        ref = sps.permutation_test((d,), lambda x, axis: np.mean(x, axis=axis),
                                   permutation_type="samples", n_resamples=np.inf, vectorized=True)
        assert sign_flip_pvalue(d) == pytest.approx(ref.pvalue, rel=1e-12)


def test_sign_flip_beyond_exhaustive_is_close_to_exact_and_reproducible():
    n = EXACT_MAX_PAIRS + 2
    d = np.random.default_rng(3).normal(0.25, 1.0, size=n)
    # Exhaustive reference over all 2^18 patterns, by brute force from the definition.
    bits = (np.arange(2 ** n)[:, None] >> np.arange(n)) & 1
    exact = float(np.mean(np.abs((1 - 2 * bits) @ d) >= abs(d.sum()) * (1 - 1e-12)))
    p = sign_flip_pvalue(d)
    se = math.sqrt(exact * (1 - exact) / RANDOM_SIGN_PATTERNS)
    assert abs(p - exact) < 5 * se
    assert sign_flip_pvalue(d) == p
    # (1 + k)/(1 + R) is never 0 (Phipson & Smyth 2010)
    # all 40 differences positive: a random pattern ties only with chance 2^-39 per draw
    assert sign_flip_pvalue(1.0 + np.arange(40) * 1e-3) == 1 / (1 + RANDOM_SIGN_PATTERNS)


def test_identical_bits_give_p_one_and_zero_interval():
    c = compare(ACC_A, dict(ACC_A))
    assert c.test == "paired"
    assert c.diff == 0.0 and (c.ci_low, c.ci_high) == (0.0, 0.0)
    assert c.p_value == 1.0 and c.p_permutation == 1.0
    # scipy.stats.ttest_rel returns NaN here (0/0): the explicit handling is what differs
    assert math.isnan(sps.ttest_rel(list(ACC_A.values()), list(ACC_A.values())).pvalue)


@pytest.mark.filterwarnings("ignore:Precision loss")  # scipy warns on the reference call itself
def test_constant_nonzero_difference_follows_scipy_limit():
    b = {s: v + 0.25 for s, v in ACC_A.items() if s < 5}   # 0.25 is exact in binary
    a = {s: ACC_A[s] for s in b}
    d = [b[s] - a[s] for s in b]
    assert len(set(d)) == 1
    c = compare(a, b)
    assert (c.ci_low, c.ci_high) == (d[0], d[0])
    assert c.p_value == 0.0 and c.statistic == math.inf
    ref = sps.ttest_rel(list(b.values()), list(a.values()))   # scipy: t = inf, p = 0
    assert ref.pvalue == 0.0 and ref.statistic == math.inf
    assert c.p_permutation == 2 / 2 ** 5     # only the all-plus and all-minus patterns reach it


# ── compare: Welch and no test ──────────────────────────────────────────────────────────────────
def test_welch_matches_scipy_when_seeds_differ():
    a = {s: v for s, v in ACC_A.items()}
    b = {100 + s: v for s, v in ACC_B.items() if s < 5}
    b[200] = math.inf
    for conf in (0.95, 0.90):
        c = compare(a, b, confidence=conf)
        ref = sps.ttest_ind(list(b.values())[:5], list(a.values()), equal_var=False)
        ci = ref.confidence_interval(conf)   # Welch–Satterthwaite interval
        assert c.test == "welch" and (c.n_a, c.n_b, c.nonfinite_b) == (8, 5, 1)
        assert c.statistic == pytest.approx(ref.statistic, rel=1e-12)
        assert c.df == pytest.approx(ref.df, rel=1e-12)
        assert c.p_value == pytest.approx(ref.pvalue, rel=1e-12)
        assert (c.ci_low, c.ci_high) == pytest.approx((ci.low, ci.high), rel=1e-12)
        assert math.isnan(c.p_permutation)


def test_welch_worked_example_student_sleep_data():
    # Same data taken as two independent groups; R's t.test(extra ~ group, data = sleep) (Welch,
    # the default), from memory: t = 1.8608 (drug 2 − drug 1), df = 17.776, p = 0.07939,
    # 95 % CI -0.2054832 … 3.3654832.
    c = compare(dict(enumerate(SLEEP_A)), {100 + i: v for i, v in enumerate(SLEEP_B)})
    assert c.test == "welch"
    assert c.statistic == pytest.approx(1.8608, abs=5e-5)
    assert c.df == pytest.approx(17.776, abs=5e-4)
    assert c.p_value == pytest.approx(0.07939, abs=5e-6)
    assert (c.ci_low, c.ci_high) == pytest.approx((-0.2054832, 3.3654832), abs=5e-8)


def test_divergence_on_shared_seeds_falls_back_to_welch():
    a = {0: 0.80, 1: 0.82, 2: 0.81, 3: 0.79}
    b = {0: 0.84, 1: math.nan, 2: math.nan, 3: 0.83, 4: 0.85}
    c = compare(a, b)
    ref = sps.ttest_ind([0.84, 0.83, 0.85], list(a.values()), equal_var=False)
    assert c.test == "welch" and c.p_value == pytest.approx(ref.pvalue, rel=1e-12)


def test_welch_without_spread_is_decided_not_estimated():
    same = compare({0: 0.5, 1: 0.5, 2: 0.5}, {10: 0.5, 11: 0.5, 12: 0.5})
    assert same.p_value == 1.0 and (same.ci_low, same.ci_high) == (0.0, 0.0)
    apart = compare({0: 0.5, 1: 0.5, 2: 0.5}, {10: 0.75, 11: 0.75, 12: 0.75})
    assert apart.p_value == 0.0 and (apart.ci_low, apart.ci_high) == (0.25, 0.25)


def test_too_few_values_means_no_test():
    c = compare({0: 0.80, 1: 0.82, 2: math.nan}, {0: 0.84, 1: 0.86, 2: 0.85})
    assert c.test == "none" and math.isnan(c.p_value) and math.isnan(c.ci_low)
    assert c.mean_a == pytest.approx(0.81) and c.diff == pytest.approx(0.85 - 0.81)
    assert "at least 3" in c.reason
    assert decide(*interval(c, 0.05), "max") == "no test possible"


# ── adjust ──────────────────────────────────────────────────────────────────────────────────────
# The 15 p-values of the thrombolysis example of Benjamini & Hochberg (1995), JRSS-B 57:289,
# as copied from the scipy.stats.false_discovery_control docstring (installed scipy 1.17).
BH95 = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344,
        0.0459, 0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]


def test_holm_by_hand_on_the_benjamini_hochberg_example():
    # Holm 1979 by hand: (m − i + 1)·p_(i), running maximum, capped at 1. Positions 7 and 8
    # (9·0.0298 = 0.2682, 8·0.0344 = 0.2752) are lifted to 0.278 by monotonicity.
    hand = [0.0015, 0.0056, 0.0247, 0.114, 0.2211, 0.278, 0.278, 0.278, 0.3213] + [1.0] * 6
    assert adjust(BH95, "holm") == pytest.approx(hand, abs=1e-12)
    # Holm, like Bonferroni in the scipy docstring's account of the paper, rejects three at 0.05
    assert sum(p <= 0.05 for p in adjust(BH95, "holm")) == 3


def test_holm_unsorted_with_nan_by_hand():
    # m = 3 valid: 0.01·3 = 0.03, 0.03·2 = 0.06, 0.04·1 = 0.04 → lifted to 0.06
    out = adjust([0.01, math.nan, 0.04, 0.03], "holm")
    assert math.isnan(out[1])
    assert [out[0], out[2], out[3]] == pytest.approx([0.03, 0.06, 0.06], abs=1e-15)


def test_bh_matches_scipy_docstring_and_passes_nan_through():
    # scipy.stats.false_discovery_control docstring: the BH-adjusted values of the example
    doc = [0.0015, 0.003, 0.0095, 0.035625, 0.0603, 0.06385714, 0.06385714, 0.0645,
           0.0765, 0.486, 0.58118182, 0.714875, 0.75323077, 0.81321429, 1.0]
    assert adjust(BH95, "bh") == pytest.approx(doc, abs=5e-9)
    assert sum(p <= 0.05 for p in adjust(BH95, "bh")) == 4   # four rejections, as the docstring says
    # docstring: false_discovery_control([0.5, 0.6, 0.1, 0.001]) -> [0.6, 0.6, 0.2, 0.004];
    # a NaN in between must neither change them nor count as a fifth test
    out = adjust([0.5, math.nan, 0.6, 0.1, None, 0.001], "bh")
    assert math.isnan(out[1]) and math.isnan(out[4])
    assert [out[0], out[2], out[3], out[5]] == pytest.approx([0.6, 0.6, 0.2, 0.004], abs=1e-15)
    assert all(math.isnan(p) for p in adjust([math.nan, math.nan], "holm"))


def test_unknown_adjustment_is_refused():
    with pytest.raises(ValueError, match="expected 'holm' or 'bh'"):
        adjust([0.1], "bonferroni")


# ── verdict ─────────────────────────────────────────────────────────────────────────────────────
@pytest.mark.parametrize("low, high, direction, margin, expected", [
    # common practice: for a metric to maximise a significant rise is better, for one to
    # minimise (a divergence, an RMSE) a significant fall is better
    (0.01, 0.03, "max", None, "better"),
    (-0.03, -0.01, "max", None, "worse"),
    (0.01, 0.03, "min", None, "worse"),
    (-0.03, -0.01, "min", None, "better"),
    (-0.01, 0.03, "max", None, "no detectable change"),
    # Schuirmann 1987: equivalence when the interval lies inside (−D, D)
    (-0.004, 0.003, "max", 0.005, "equivalent"),
    (0.001, 0.003, "max", 0.005, "equivalent"),     # inside the margin beats a tiny significant rise
    (-0.004, 0.006, "max", 0.005, "inconclusive"),  # reaches past the margin and across 0
    (0.002, 0.03, "max", 0.005, "better"),
    (-0.005, 0.003, "max", 0.005, "inconclusive"),  # touching the margin is not inside it
    (math.nan, math.nan, "max", 0.005, "no test possible"),
])
def test_verdict_table(low, high, direction, margin, expected):
    assert decide(low, high, direction, margin) == expected


def test_verdict_refuses_unknown_direction():
    with pytest.raises(ValueError, match="expected 'max' or 'min'"):
        decide(0.1, 0.2, "up")


def test_as_dict_is_valid_json():
    c = compare({0: 0.8, 1: 0.81}, {0: 0.82, 1: 0.83})
    d = c.as_dict()
    text = json.dumps(d, allow_nan=False)   # RFC 8259 JSON has no NaN: undefined is null
    assert json.loads(text)["p_value"] is None and d["test"] == "none"
    assert set(summarize([1.0, 2.0]).as_dict()) == {"n", "n_finite", "mean", "sd", "ci_low", "ci_high"}
