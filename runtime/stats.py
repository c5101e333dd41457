"""Statistics behind comparing two arms of a study: summaries, paired and Welch tests, multiplicity.

Contract: pure functions of plain numbers (numpy and scipy only). A metric's values arrive per seed;
a value that is not finite (a diverged run) is excluded from every estimate and counted, never
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
- :func:`verdict` — ``better`` / ``worse`` / ``no detectable change`` / ``no test possible``.

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

__all__ = ["Summary", "Comparison", "summarize", "compare", "sign_flip_pvalue", "adjust", "verdict",
           "MIN_PER_SIDE", "EXACT_MAX_PAIRS", "RANDOM_SIGN_PATTERNS", "VERDICTS"]

MIN_PER_SIDE = 3
EXACT_MAX_PAIRS = 16           # 2^16 = 65 536 sign patterns: exhaustive enumeration stays cheap
RANDOM_SIGN_PATTERNS = 65_535  # beyond that, this many random patterns (so (1+k)/(1+R) has R+1 = 2^16)
_PATTERN_SEED = 20_240_917     # fixed so that the same numbers always give the same p-value
_CHUNK = 4096                  # random patterns per batch: memory stays bounded with thousands of seeds
VERDICTS = ("better", "worse", "no detectable change", "no test possible")


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
    n_finite: int       # values used (the rest diverged)
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
    nonfinite_a: int    # values of A that were not finite (diverged runs)
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
        return Comparison("paired", reason, len(common), len(common), bad_a, bad_b,
                          float(xa.mean()), float(xb.mean()), diff, lo, hi, confidence,
                          stat, float(len(d) - 1), p, sign_flip_pvalue(d))

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
        return Comparison("welch", reason, len(xa), len(xb), bad_a, bad_b, mean_a, mean_b,
                          diff, lo, hi, confidence, stat, df, p, nan)

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


def verdict(comparison: Comparison, adjusted_p: float, direction: str, alpha: float = 0.05) -> str:
    """B relative to A. Significant means ``adjusted_p ≤ alpha``; then the sign of B − A decides,
    read through the metric's direction (``max``: higher is better, ``min``: lower is better)."""
    if direction not in ("max", "min"):
        raise ValueError(f"unknown metric direction {direction!r} (expected 'max' or 'min')")
    if comparison.test == "none" or adjusted_p is None or math.isnan(adjusted_p):
        return "no test possible"
    if adjusted_p > alpha:
        return "no detectable change"
    higher = comparison.diff > 0
    return "better" if higher == (direction == "max") else "worse"
