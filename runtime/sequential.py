"""Run until decided: seeds added in rounds, with a stopping rule that keeps its error rates.

Looking at a study's verdicts after every few seeds and stopping when one says ``better`` inflates
false positives: each look is another chance for noise to cross the line. This module is the
group-sequential design that allows the looks.

**Why a group-sequential design.** Seeds arrive in rounds of K, so the looks are few and known in
advance (the first seeds, then every K more, up to a maximum N), which is the setting
group-sequential tests were made for; they reuse the paired t statistic and interval every other
verdict of lesion is read off, and their information fraction (seeds so far ÷ N) is exact here.
Anytime-valid confidence sequences (Howard, Ramdas, McAuliffe & Sekhon 2021, Ann. Statist.
49:1055) allow a look after every seed, but pay for it with wider intervals at every n and need a
known bound or scale of the per-seed differences, which a study does not have; with a handful of
looks the spending design reaches a decision with fewer seeds.

**The boundaries.** Lan & DeMets (1983, Biometrika 70:659) spend a one-sided error a over the
information fraction t ∈ (0, 1] with the O'Brien–Fleming-type function

    a(t) = 2 − 2 Φ(z_{1−a/2} / √t),

so almost nothing is spent at early looks and nearly the fixed design's level remains for the
last. At looks with fractions t_1 < … < t_k the boundaries c_1 … c_k on the z scale solve

    P(Z_1 < c_1, …, Z_{j−1} < c_{j−1}, Z_j ≥ c_j) = a(t_j) − a(t_{j−1})

under the canonical joint distribution (Z_j √t_j a Brownian motion at times t_j, Jennison &
Turnbull 2000, *Group Sequential Methods with Applications to Clinical Trials*, §11 and ch. 19),
computed by recursive numerical integration of the density of the continuing paths (Armitage,
McPherson & Rowe 1969, JRSS A 132:235).

**Verdicts at a look.** Each one-sided test of a question spends a = α/(2m), m the comparisons of
its family (Bonferroni inside a family, each question its own family as in ``lesion diff``; Holm's
step-down does not carry over to stopped comparisons without the graphical machinery of Maurer &
Bretz 2013, so the simpler bound is kept). The interval at look j is the repeated confidence
interval ``diff ± t_{n_j−1}(1 − p_j)·se`` with the nominal one-sided level p_j = 1 − Φ(c_j)
(Jennison & Turnbull 1989, JRSS B 51:305; the t quantile at the nominal level is their
"significance level approach" for an unknown variance), and the verdict is
:func:`runtime.stats.decide` read off it: ``better``/``worse`` when it excludes 0 (a two-sided test
of no difference spending α/m), ``equivalent`` when it lies inside ±D (each of Schuirmann's two
one-sided tests spending α/(2m)). A settled question keeps the look, seeds and interval that
settled it; one still open at the last look (N seeds) is ``inconclusive`` with the interval reached.

**The seeds.** The study's seeds come first; each round adds the K smallest integers above every
seed used so far (never a seed run before), the same K to every arm still open, so pairs stay
paired. An arm is open while any comparison it takes part in is open. The verdicts at look j use
only the first n_j seeds of that sequence, so replaying the procedure from its stored runs makes
the same decisions and asks for the same seeds: a killed procedure resumes where it stopped.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Iterable, Sequence
from dataclasses import asdict, dataclass, field
from functools import lru_cache

import numpy as np
from scipy import stats as sps
from scipy.optimize import brentq
from scipy.special import ndtr

from runtime.stats import decide, t_interval

__all__ = ["RULE_NAME", "Rule", "Row", "Settled", "Procedure", "spent", "boundaries", "look_alpha"]

RULE_NAME = "group-sequential, Lan-DeMets O'Brien-Fleming-type alpha spending, Bonferroni within a question"
DECIDED = ("better", "worse", "equivalent")
_GRID = 601        # points of the integration grid per look: boundaries to about 1e-5 on the z scale
_TAIL = 8.5        # the grid reaches 8.5 sd below 0: the mass left out is below 1e-16


def spent(t: float, a: float) -> float:
    """One-sided error spent by information fraction t: ``2 − 2Φ(z_{1−a/2}/√t)`` (Lan & DeMets 1983)."""
    return float(2 * sps.norm.sf(sps.norm.isf(a / 2) / math.sqrt(t)))


@lru_cache(maxsize=4096)
def boundaries(fractions: tuple[float, ...], a: float) -> tuple[float, ...]:
    """Upper z boundaries c_1 … c_k at information fractions ``fractions`` (increasing, ≤ 1) that
    spend the one-sided error a with :func:`spent` (module doc). A look with nothing left to spend
    gets ``inf``."""
    out: list[float] = []
    grid = density = None   # the score S = Z√t of the paths still going, on a grid, with its density
    before, t_prev = 0.0, 0.0
    for t in fractions:
        if not (t_prev < t <= 1.0 + 1e-12):
            raise ValueError(f"information fractions must increase within (0, 1]: {fractions}")
        target = spent(t, a) - before
        if grid is None:
            c = float(sps.norm.isf(target)) if target > 0 else math.inf
            top = c * math.sqrt(t) if math.isfinite(c) else _TAIL * math.sqrt(t)
            grid = np.linspace(-_TAIL * math.sqrt(t), top, _GRID)
            density = sps.norm.pdf(grid, scale=math.sqrt(t))
        else:
            step = math.sqrt(t - t_prev)
            weights = np.full(_GRID, grid[1] - grid[0])
            weights[[0, -1]] /= 2                # the trapezoid rule on the uniform grid
            mass = density * weights

            def crossing(c: float) -> float:
                return float(np.sum(mass * ndtr((grid - c * math.sqrt(t)) / step)))

            if target <= 0 or crossing(40.0) >= target:
                c = math.inf
            else:
                c = float(brentq(lambda c: crossing(c) - target, -_TAIL, 40.0, xtol=1e-9))
            top = c * math.sqrt(t) if math.isfinite(c) else grid[-1] + _TAIL * step
            new = np.linspace(-_TAIL * math.sqrt(t), top, _GRID)
            gap = (new[:, None] - grid[None, :]) / step
            density = np.exp(-0.5 * gap * gap) @ mass / (step * math.sqrt(2 * math.pi))
            grid = new
        out.append(c)
        before, t_prev = spent(t, a), t
    return tuple(out)


def look_alpha(looks: Sequence[int], max_seeds: int, alpha: float) -> float:
    """The two-sided nominal level of a repeated confidence interval at the last of ``looks``
    (seeds at each look so far) for a comparison of two-sided level α: ``2(1 − Φ(c_j))`` with c_j the
    boundary spending α/2 on each side over fractions ``n/N``."""
    fractions = tuple(n / max_seeds for n in looks)
    return float(2 * sps.norm.sf(boundaries(fractions, alpha / 2)[-1]))


@dataclass(frozen=True)
class Rule:
    """The stopping rule a study was run with: practical margin D, at most N seeds per arm, K seeds
    added per round, family-wise level α of each question."""
    margin: float
    max_seeds: int
    round: int
    alpha: float = 0.05

    def as_dict(self) -> dict:
        return {"rule": RULE_NAME, **asdict(self)}


@dataclass(frozen=True)
class Row:
    """One comparison at one look: its estimate over the look's seeds (``diff``, ``se``, ``df`` as
    from :func:`runtime.stats.compare`), the size of its family, the metric's direction and the arms
    (variants) whose seeds it uses."""
    key: Hashable
    family: int
    diff: float
    se: float
    df: float
    direction: str
    arms: frozenset = field(default_factory=frozenset)


@dataclass(frozen=True)
class Settled:
    verdict: str
    look: int        # 1-based
    seeds: int       # seeds per arm at that look
    low: float
    high: float
    level: float     # two-sided nominal α of the interval


class Procedure:
    """One run-until-decided procedure: feed it the rows of each look, run the seeds it asks for.

    ``seeds`` are the seeds every open arm has run so far; :meth:`look` judges the open rows at
    ``len(seeds)`` seeds; :meth:`advance` adds the next round's seeds and returns them; ``arms``
    are the arms still open. Pure bookkeeping: it never sees a run, only numbers."""

    def __init__(self, rule: Rule, first: Sequence[int]):
        if rule.round < 1:
            raise ValueError(f"a round adds at least one seed (got {rule.round})")
        if len(first) > rule.max_seeds:
            raise ValueError(f"the study already has {len(first)} seeds, more than the maximum of {rule.max_seeds}")
        self.rule = rule
        self.seeds: list[int] = list(first)
        self.looks: list[int] = []
        self.settled: dict[Hashable, Settled] = {}
        self.open: dict[Hashable, Settled] = {}
        self.arms: frozenset = frozenset()

    @property
    def final(self) -> bool:
        return len(self.seeds) >= self.rule.max_seeds

    @property
    def done(self) -> bool:
        return bool(self.looks) and (self.final or not self.open)

    def look(self, rows: Iterable[Row]) -> None:
        self.looks.append(len(self.seeds))
        self.open, arms = {}, set()
        for row in rows:
            if row.key in self.settled:
                continue
            level = look_alpha(self.looks, self.rule.max_seeds, self.rule.alpha / max(row.family, 1))
            low, high = t_interval(row.diff, row.se, row.df, level)
            verdict = decide(low, high, row.direction, self.rule.margin)
            state = Settled(verdict, len(self.looks), len(self.seeds), low, high, level)
            if verdict in DECIDED or self.final:
                self.settled[row.key] = state
            else:
                self.open[row.key] = state
                arms |= row.arms
        self.arms = frozenset(arms)

    def advance(self) -> list[int]:
        if self.done:
            return []
        k = min(self.rule.round, self.rule.max_seeds - len(self.seeds))
        top = max(self.seeds, default=-1)
        new = list(range(top + 1, top + 1 + k))
        self.seeds += new
        return new
