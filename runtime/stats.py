"""Statistics behind comparing two arms of a study: summaries, paired and Welch tests, multiplicity.

Contract: pure functions of plain numbers (numpy and scipy only). A metric's values arrive per seed;
a value that is not finite (a non-finite run) is excluded from every estimate and counted, never
silently dropped. Differences are always B − A.

- :func:`summarize` — mean, sample standard deviation (ddof = 1) and the Student t interval of
  the mean, ``mean ± t_{n-1, (1+c)/2} · sd / √n``.
- :func:`compare` — with at least :data:`MIN_PER_SIDE` seeds finite on both sides, a paired t test
  over those seeds (arms with one seed share data split, initial weights and batch order, so the
  pairing removes that shared noise), plus a sign-flip permutation test of the mean difference
  (Fisher 1935, *The Design of Experiments*, §21 — cited from memory), exact up to 16 pairs;
  otherwise Welch's t test with the Welch–Satterthwaite degrees of freedom (Welch 1947) when
  each side has enough finite values; otherwise no test.
- :func:`adjust` — Holm (1979) step-down or Benjamini & Hochberg (1995) adjusted p-values.
- :func:`family_alpha`, :func:`interval`, :func:`decide` — the level of a family's intervals that
  agrees with its adjusted p-values, the interval at that level, and the verdict read off it:
  ``better`` / ``worse`` / ``equivalent`` (inside a practical margin) / ``inconclusive``, or
  ``no detectable change`` when no margin is given, ``no test possible`` without a test.
- :func:`tost_pvalue`, :func:`power_paired`, :func:`detectable_difference`, :func:`seeds_needed`,
  :func:`improvement`, :func:`interaction_test` — equivalence, planning seeds, the probability of
  improvement, and the interaction of two crossed axes.

Every decision is a pure function of per-seed numbers, so a procedure that adds seeds and decides
again can reuse it.

Degenerate cases, decided here rather than left to scipy:

- every difference exactly 0 (identical bits on both sides): diff 0, CI [0, 0], p = 1 for both
  tests (scipy's t test gives NaN: 0/0); the statistic stays NaN;
- every difference the same non-zero d (no spread): CI [d, d], t = ±inf and p = 0, which is
  scipy's own limit; the sign-flip p-value stays honest at 2/2^n. Welch with no spread on either
  side is treated the same way (equal means: p = 1; different means: p = 0).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, fields

import numpy as np
from scipy import stats as sps

__all__ = ["Summary", "Comparison", "summarize", "compare", "sign_flip_pvalue", "adjust", "family_alpha",
           "interval", "t_interval", "decide", "tost_pvalue", "power_paired", "detectable_difference", "seeds_needed",
           "improvement", "interaction_test", "MIN_PER_SIDE", "EXACT_MAX_PAIRS", "RANDOM_SIGN_PATTERNS",
           "POWER"]

MIN_PER_SIDE = 3
EXACT_MAX_PAIRS = 16           # 2^16 = 65 536 sign patterns: exhaustive enumeration stays cheap
RANDOM_SIGN_PATTERNS = 65_535  # beyond that, this many random patterns (so (1+k)/(1+R) has R+1 = 2^16)
_PATTERN_SEED = 20_240_917     # fixed so that the same numbers always give the same p-value
_CHUNK = 4096                  # random patterns per batch: memory stays bounded with thousands of seeds
POWER = 0.8                    # Cohen (1988): the conventional target power when planning seeds
_BOOTSTRAP = 2000              # resamples of seeds for the interval of the probability of improvement


def _plain(value):
    """JSON has no NaN or infinity: an undefined number becomes None (null / an empty CSV cell)."""
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, np.integer):
        return int(value)
    return value


class _AsDict:
    def as_dict(self) -> dict:
        return {f.name: _plain(getattr(self, f.name)) for f in fields(self)}


@dataclass(frozen=True)
class Summary(_AsDict):
    n: int              # values given
    n_finite: int       # values used (the rest non-finite)
    mean: float
    sd: float           # sample standard deviation, ddof = 1; NaN when n_finite < 2
    ci_low: float
    ci_high: float


@dataclass(frozen=True)
class Comparison(_AsDict):
    test: str           # "paired" | "welch" | "none"
    reason: str         # why this test, over which seeds, what was left out
    n_a: int            # values of A used (paired: the number of pairs)
    n_b: int
    nonfinite_a: int    # values of A that were not finite (non-finite runs)
    nonfinite_b: int
    mean_a: float       # over the values used, so diff == mean_b - mean_a
    mean_b: float
    diff: float         # B − A
    ci_low: float       # confidence interval of diff
    ci_high: float
    confidence: float
    statistic: float    # t
    df: float
    p_value: float      # two-sided, from the t test
    p_permutation: float  # two-sided sign-flip p-value (paired only, else NaN)
    se: float = math.nan        # standard error of diff: the interval at any level is diff ± t_df · se
    sd_diff: float = math.nan   # paired: sample sd of the per-seed differences (planning seeds), else NaN
    improvement: float = math.nan       # paired: share of seeds where B − A > 0, ties counting ½
    improvement_low: float = math.nan   # its percentile bootstrap interval over seeds
    improvement_high: float = math.nan


def _floats(values: Iterable) -> np.ndarray:
    """None (a missing value) counts as not finite, like NaN."""
    return np.array([math.nan if v is None else float(v) for v in values], dtype=float)


def summarize(values: Iterable[float | None], confidence: float = 0.95) -> Summary:
    """Mean ± sd and the t interval of the mean over the finite values.

    ``mean ± t_{n-1,(1+c)/2} · s/√n`` with ``s`` the ddof = 1 standard deviation (Student 1908).
    """
    x = _floats(values)
    ok = x[np.isfinite(x)]
    n = len(ok)
    mean = float(ok.mean()) if n else math.nan
    if n < 2:
        return Summary(len(x), n, mean, math.nan, math.nan, math.nan)
    sd = float(ok.std(ddof=1))
    half = float(sps.t.ppf((1 + confidence) / 2, n - 1)) * sd / math.sqrt(n)
    return Summary(len(x), n, mean, sd, mean - half, mean + half)


def sign_flip_pvalue(differences: Sequence[float]) -> float:
    """Two-sided permutation p-value of the mean of paired differences under sign flipping.

    Under H0 (the arms are exchangeable within a seed) each difference is equally likely to carry
    either sign. The p-value is the share of sign patterns whose mean is at least as far from 0
    as the observed one (Fisher 1935). For n ≤ :data:`EXACT_MAX_PAIRS` all 2^n patterns
    are enumerated (the observed one included), so the smallest possible value is 2/2^n — with 3
    seeds never below 0.25. Beyond, :data:`RANDOM_SIGN_PATTERNS` patterns drawn with a fixed seed
    give ``(1 + k) / (1 + R)`` (Phipson & Smyth 2010), never 0.
    """
    d = np.asarray(differences, dtype=float)
    n = len(d)
    if n == 0:
        return math.nan
    # Relative tolerance: a pattern that reorders the same sum must count as a tie, not lose by an ulp.
    bar = abs(d.mean()) * (1 - 1e-12)
    if n <= EXACT_MAX_PAIRS:
        bits = (np.arange(2 ** n)[:, None] >> np.arange(n)) & 1
        means = (1 - 2 * bits) @ d / n
        return float(np.mean(np.abs(means) >= bar))
    rng = np.random.default_rng(_PATTERN_SEED)
    hits, left = 0, RANDOM_SIGN_PATTERNS
    while left:
        rows = min(left, _CHUNK)
        signs = rng.integers(0, 2, size=(rows, n), dtype=np.int8) * 2 - 1
        hits += int(np.sum(np.abs(signs @ d / n) >= bar))
        left -= rows
    return (1 + hits) / (1 + RANDOM_SIGN_PATTERNS)


def _finite_by_seed(values: Mapping[int, float | None]) -> tuple[dict[int, float], int]:
    out, bad = {}, 0
    for seed, v in values.items():
        v = math.nan if v is None else float(v)
        if math.isfinite(v):
            out[seed] = v
        else:
            bad += 1
    return out, bad


def _no_spread(diff: float) -> tuple[float, float, float, float]:
    """(statistic, p, ci_low, ci_high) when neither side varies: decided, not estimated."""
    if diff == 0:
        return math.nan, 1.0, 0.0, 0.0
    return math.copysign(math.inf, diff), 0.0, diff, diff


def compare(a: Mapping[int, float | None], b: Mapping[int, float | None],
            confidence: float = 0.95) -> Comparison:
    """Compare metric values of arm B with arm A; keys are seeds, differences are B − A.

    Paired (seeds finite on both sides ≥ :data:`MIN_PER_SIDE`): ``d_i = b_i − a_i``,
    ``t = d̄ / (s_d/√n)`` on n − 1 degrees of freedom (``scipy.stats.ttest_rel``), CI
    ``d̄ ± t_{n-1,(1+c)/2} s_d/√n``, and :func:`sign_flip_pvalue` of the d_i.
    Welch (each side ≥ :data:`MIN_PER_SIDE` finite values, too few common seeds):
    ``t = (b̄ − ā)/√(s_a²/n_a + s_b²/n_b)`` on the Welch–Satterthwaite degrees of freedom
    ``(s_a²/n_a + s_b²/n_b)² / ((s_a²/n_a)²/(n_a−1) + (s_b²/n_b)²/(n_b−1))``
    (``scipy.stats.ttest_ind(equal_var=False)``). Otherwise means and difference only.
    """
    fa, bad_a = _finite_by_seed(a)
    fb, bad_b = _finite_by_seed(b)
    common = sorted(set(fa) & set(fb))
    nan = math.nan

    if len(common) >= MIN_PER_SIDE:
        xa = np.array([fa[s] for s in common])
        xb = np.array([fb[s] for s in common])
        d = xb - xa
        diff = float(d.mean())
        left_out = (len(a) - len(common), len(b) - len(common))
        reason = f"paired over {len(common)} seeds finite on both sides"
        if any(left_out):
            reason += f" (not used: {left_out[0]} of A's, {left_out[1]} of B's seeds)"
        if np.all(d == d[0]):
            stat, p, lo, hi = _no_spread(diff)
        else:
            res = sps.ttest_rel(xb, xa)
            ci = res.confidence_interval(confidence)
            stat, p, lo, hi = float(res.statistic), float(res.pvalue), float(ci.low), float(ci.high)
        sd = float(d.std(ddof=1))
        return Comparison("paired", reason, len(common), len(common), bad_a, bad_b,
                          float(xa.mean()), float(xb.mean()), diff, lo, hi, confidence,
                          stat, float(len(d) - 1), p, sign_flip_pvalue(d),
                          sd / math.sqrt(len(d)), sd, *improvement(d, confidence))

    xa = np.array([fa[s] for s in sorted(fa)])
    xb = np.array([fb[s] for s in sorted(fb)])
    mean_a = float(xa.mean()) if len(xa) else nan
    mean_b = float(xb.mean()) if len(xb) else nan
    diff = mean_b - mean_a

    if len(xa) >= MIN_PER_SIDE and len(xb) >= MIN_PER_SIDE:
        reason = (f"Welch over {len(xa)} finite values of A and {len(xb)} of B "
                  f"({len(common)} seeds in common, fewer than {MIN_PER_SIDE} to pair)")
        if np.all(xa == xa[0]) and np.all(xb == xb[0]):
            stat, p, lo, hi = _no_spread(diff)
            df = nan  # Welch–Satterthwaite is 0/0 without spread
        else:
            res = sps.ttest_ind(xb, xa, equal_var=False)
            ci = res.confidence_interval(confidence)
            stat, p, lo, hi = float(res.statistic), float(res.pvalue), float(ci.low), float(ci.high)
            df = float(res.df)
        se = math.sqrt(xa.var(ddof=1) / len(xa) + xb.var(ddof=1) / len(xb))
        return Comparison("welch", reason, len(xa), len(xb), bad_a, bad_b, mean_a, mean_b,
                          diff, lo, hi, confidence, stat, df, p, nan, se)

    reason = (f"no test possible: A has {len(xa)} finite values, B has {len(xb)}; "
              f"a test needs at least {MIN_PER_SIDE} on each side (run more seeds)")
    return Comparison("none", reason, len(xa), len(xb), bad_a, bad_b, mean_a, mean_b,
                      diff, nan, nan, confidence, nan, nan, nan, nan)


def adjust(pvalues: Sequence[float | None], method: str = "holm") -> list[float]:
    """Adjusted p-values in input order; NaN (or None) passes through and is not counted as a test.

    ``holm`` (Holm 1979): with the m valid p-values sorted, p_(1) ≤ … ≤ p_(m),
    ``p̃_(i) = min(1, max_{j ≤ i} (m − j + 1) p_(j))`` — controls the family-wise error rate.
    ``bh`` (Benjamini & Hochberg 1995): ``p̃_(i) = min_{j ≥ i} min(1, m p_(j) / j)`` — controls
    the false discovery rate; computed by ``scipy.stats.false_discovery_control``.
    """
    if method not in ("holm", "bh"):
        raise ValueError(f"unknown adjustment {method!r} (expected 'holm' or 'bh')")
    p = _floats(pvalues)
    out = np.full(len(p), math.nan)
    valid = np.flatnonzero(~np.isnan(p))
    if len(valid) == 0:
        return out.tolist()
    pv = p[valid]
    if method == "bh":
        out[valid] = sps.false_discovery_control(pv, method="bh")
        return out.tolist()
    m = len(pv)
    order = np.argsort(pv, kind="stable")
    stepped = np.maximum.accumulate((m - np.arange(m)) * pv[order])
    out[valid[order]] = np.minimum(stepped, 1.0)
    return out.tolist()


def improvement(differences: Sequence[float], confidence: float = 0.95) -> tuple[float, float, float]:
    """Probability of improvement over paired seeds and its percentile bootstrap interval.

    ``P̂(B > A) = (1/n) Σ [1(d_i > 0) + ½·1(d_i = 0)]`` over the paired differences ``d_i = b_i − a_i``
    (the paired form of the probability of improvement of Agarwal et al. 2021, "Deep reinforcement
    learning at the edge of the statistical precipice", NeurIPS, §4, whose interval is also a
    bootstrap over runs). Seeds are resampled with replacement :data:`_BOOTSTRAP` times from a fixed
    stream, so the same numbers always give the same interval. With n seeds the estimate moves in
    steps of 1/(2n).
    """
    d = np.asarray(differences, dtype=float)
    if len(d) == 0:
        return math.nan, math.nan, math.nan
    score = (d > 0) + 0.5 * (d == 0)
    rng = np.random.default_rng(_PATTERN_SEED)
    boot = score[rng.integers(0, len(d), size=(_BOOTSTRAP, len(d)))].mean(axis=1)
    tail = (1 - confidence) / 2
    return float(score.mean()), float(np.quantile(boot, tail)), float(np.quantile(boot, 1 - tail))


# ── deciding ────────────────────────────────────────────────────────────────────────────────────
def family_alpha(pvalues: Sequence[float | None], alpha: float = 0.05, method: str = "holm") -> float:
    """The two-sided level α* of every interval of one family, chosen so that an interval at
    ``1 − α*`` excludes 0 exactly when the row's adjusted p-value is ≤ α.

    ``holm``: ``α* = α / max(m − r, 1)`` with m tests and r Holm rejections — the critical level of
    the step at which Holm's (1979) procedure stops. A rejected row i has ``p_(i) ≤ α/(m − i + 1) <
    α*``; every kept row has ``p > α/(m − r) = α*``. For the kept rows these are the compatible
    simultaneous bounds of Strassburger & Bretz (2008, Statistics in Medicine 27:4914); for a
    rejected row only the sign of its interval carries the family-wise guarantee.
    ``bh``: ``α* = max(r, 1)·α/m`` — the false-coverage-rate intervals of Benjamini & Yekutieli
    (2005, JASA 100:71): Benjamini–Hochberg rejects exactly the rows with ``p ≤ rα/m``.
    """
    adjusted = adjust(pvalues, method)
    m = sum(1 for p in adjusted if not math.isnan(p))
    r = sum(1 for p in adjusted if p <= alpha)
    if m == 0:
        return alpha
    return alpha / max(m - r, 1) if method == "holm" else max(r, 1) * alpha / m


def interval(comparison: Comparison, alpha: float) -> tuple[float, float]:
    """``diff ± t_{df, 1−α/2} · se``: the two-sided 1 − α interval of B − A (the t interval of
    :func:`compare` at another level); no spread gives the point ``[diff, diff]``."""
    c = comparison
    if c.test == "none":
        return math.nan, math.nan
    return t_interval(c.diff, c.se, c.df, alpha)


def t_interval(diff: float, se: float, df: float, alpha: float) -> tuple[float, float]:
    """``diff ± t_{df, 1−α/2} · se`` from the estimate itself (NaN without an se, the point
    ``[diff, diff]`` without spread): what :func:`interval` reads off a comparison."""
    if math.isnan(se):
        return math.nan, math.nan
    if se == 0:
        return diff, diff
    half = float(sps.t.ppf(1 - alpha / 2, df)) * se
    return diff - half, diff + half


def decide(low: float, high: float, direction: str, margin: float | None = None) -> str:
    """The verdict read off the interval ``[low, high]`` of B − A (so the two never disagree).

    - ``equivalent``: a margin D is given and the interval lies inside ``(−D, D)``. A two-sided
      1 − α* interval inside the margin is Schuirmann's (1987) two one-sided tests rejecting both
      ``Δ ≤ −D`` and ``Δ ≥ D`` at α*/2 each. It takes precedence: a difference shown to be smaller
      than what matters is, for the question asked, no difference.
    - ``better`` / ``worse``: the interval excludes 0; the metric's direction (``max``: higher is
      better) reads the sign.
    - otherwise ``inconclusive`` with a margin (neither a difference nor an equivalence is shown:
      more seeds, see :func:`seeds_needed`), ``no detectable change`` without one (nothing to be
      equivalent within).
    """
    if direction not in ("max", "min"):
        raise ValueError(f"unknown metric direction {direction!r} (expected 'max' or 'min')")
    if math.isnan(low) or math.isnan(high):
        return "no test possible"
    if margin is not None and -margin < low and high < margin:
        return "equivalent"
    if low > 0 or high < 0:
        return "better" if (low > 0) == (direction == "max") else "worse"
    return "inconclusive" if margin is not None else "no detectable change"


def tost_pvalue(differences: Sequence[float], margin: float) -> float:
    """Two one-sided tests of ``|Δ| ≥ D`` for paired differences (Schuirmann 1987, J Pharmacokinet
    Biopharm 15:657): ``p = max(p₋, p₊)``, ``p₋ = P(T_{n−1} ≥ (d̄ + D)/se)``, ``p₊ = P(T_{n−1} ≥
    (D − d̄)/se)``, ``se = s_d/√n``. Equivalence at level a ⇔ the 1 − 2a interval inside ``(−D, D)``."""
    d = np.asarray(differences, dtype=float)
    n = len(d)
    se = float(d.std(ddof=1)) / math.sqrt(n)
    mean = float(d.mean())
    if se == 0:
        return 0.0 if abs(mean) < margin else 1.0
    lower = float(sps.t.sf((mean + margin) / se, n - 1))
    upper = float(sps.t.sf((margin - mean) / se, n - 1))
    return max(lower, upper)


def power_paired(n: int, effect: float, sd: float, alpha: float) -> float:
    """Power of the two-sided paired t test at level α with n pairs against a true difference
    ``effect`` when the differences have standard deviation ``sd``: with ``λ = effect·√n/sd`` and
    ``c = t_{n−1, 1−α/2}``, ``P(T'_{n−1,λ} > c) + P(T'_{n−1,λ} < −c)`` for the noncentral t T'
    (as in Colas, Sigaud & Oudeyer 2018, "How many random seeds?", §3)."""
    df = n - 1
    crit = float(sps.t.ppf(1 - alpha / 2, df))
    nc = abs(effect) * math.sqrt(n) / sd   # the power is symmetric in the sign of the effect
    far = float(sps.nct.cdf(-crit, df, nc))
    # scipy's noncentral t can return NaN deep in the far tail (seen at λ ≈ 19, df 2, where the true
    # value is about 1e-24): there the term is 0 to double precision.
    return float(sps.nct.sf(crit, df, nc)) + (0.0 if math.isnan(far) else far)


def detectable_difference(n: int, sd: float, alpha: float, power: float = POWER) -> float:
    """The smallest true |B − A| that the paired t test at α detects with the given power with n
    seeds, solving :func:`power_paired` for the effect (NaN below 2 seeds or without an sd)."""
    if n < 2 or not math.isfinite(sd):
        return math.nan
    if sd == 0:
        return 0.0
    from scipy.optimize import brentq
    hi = sd
    while power_paired(n, hi, sd, alpha) < power:
        hi *= 2
    return float(brentq(lambda e: power_paired(n, e, sd, alpha) - power, 0.0, hi, xtol=sd * 1e-10))


def _equivalence_power(n: int, margin: float, sd: float, alpha: float) -> float:
    # Interval at 1 − α inside (−D, D) when the truth is 0: both one-sided tests at α/2 must reject.
    # P(A ∩ B) ≥ P(A) + P(B) − 1 (Bonferroni), each P from the noncentral t: a lower bound of the
    # power of the two one-sided tests (Phillips 1990, J Pharmacokinet Biopharm 18:137, gives the
    # exact value through Owen's Q; the bound errs on the side of more seeds).
    df = n - 1
    crit = float(sps.t.ppf(1 - alpha / 2, df))
    one = float(sps.nct.sf(crit, df, margin * math.sqrt(n) / sd))
    return 2 * one - 1


def seeds_needed(sd: float, margin: float, alpha: float, power: float = POWER, most: int = 100_000) -> float:
    """Seeds for a decision at margin D, planned from the sd of the paired differences.

    The smallest n (≥ 2) at which both hold: a true difference of ±D is called better/worse with
    the given power (:func:`power_paired`), and a true difference of 0 is called equivalent with at
    least that power (a Bonferroni lower bound on the two one-sided tests). Returns ``inf`` beyond
    ``most`` and NaN without an sd."""
    if not math.isfinite(sd):
        return math.nan
    if sd == 0:
        return 2

    def enough(n: int) -> bool:
        return power_paired(n, margin, sd, alpha) >= power and _equivalence_power(n, margin, sd, alpha) >= power

    if not enough(most):
        return math.inf
    lo, hi = 1, 2
    while not enough(hi):
        lo, hi = hi, hi * 2
    while hi - lo > 1:   # both powers rise with n: bisect between a failing lo and a passing hi
        mid = (lo + hi) // 2
        lo, hi = (lo, mid) if enough(mid) else (mid, hi)
    return hi


def interaction_test(y: np.ndarray) -> tuple[float, float, float, float]:
    """Two-way repeated-measures test of the interaction of factors A and B, seeds as subjects.

    ``y[s, i, j]`` is seed s's value at level i of A and j of B (complete seeds only). With n seeds,
    a and b levels, ``SS_AB = n Σ_ij (ȳ_ij· − ȳ_i·· − ȳ_·j· + ȳ)²`` on (a−1)(b−1) df is tested
    against its interaction with seeds, ``SS_ABS = Σ (y_ijs − ȳ_ij· − ȳ_i·s − ȳ_·js + ȳ_i·· + ȳ_·j·
    + ȳ_··s − ȳ)²`` on (a−1)(b−1)(n−1) df: ``F = MS_AB / MS_ABS`` (e.g. Maxwell & Delaney,
    *Designing Experiments and Analyzing Data*, ch. 12 — from memory), sphericity assumed.
    Returns (F, df1, df2, p); a residual of exactly 0 gives F = inf (p = 0) or, with no
    interaction either, NaN and p = 1.
    """
    n, a, b = y.shape
    grand = y.mean()
    cell = y.mean(axis=0)
    ma, mb = cell.mean(axis=1), cell.mean(axis=0)
    ms = y.mean(axis=(1, 2))
    mas, mbs = y.mean(axis=2), y.mean(axis=1)          # [s, i], [s, j]
    ss_ab = n * float(np.sum((cell - ma[:, None] - mb[None, :] + grand) ** 2))
    resid = (y - cell[None] - mas[:, :, None] - mbs[:, None, :] + ma[None, :, None] + mb[None, None, :]
             + ms[:, None, None] - grand)
    ss_abs = float(np.sum(resid ** 2))
    df1, df2 = (a - 1) * (b - 1), (a - 1) * (b - 1) * (n - 1)
    if ss_abs == 0:
        return (math.inf, float(df1), float(df2), 0.0) if ss_ab > 0 else (math.nan, float(df1), float(df2), 1.0)
    f = (ss_ab / df1) / (ss_abs / df2)
    return f, float(df1), float(df2), float(sps.f.sf(f, df1, df2))
