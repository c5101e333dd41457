"""Tuning inside arms: which setting represents each arm, and what a larger tuning budget buys.

A study with ``[ablation.tune]`` runs every arm (a variant of its ablation) once per setting of
the tuned knobs and seed. Selection is *per seed*: for each arm and seed, the setting whose run
has the best validation score at the judged epoch (``compiler.spec.Spec.selection``: the last
epoch, or the run's best epoch of that metric) represents the arm on that seed; ties go to the
first setting in the spec's order, and a seed on which a setting's run is missing or every run
went non-finite has no pick. The arm's value on that seed is the picked run's ``test_<metric>``. Each
seed thus replicates the whole procedure — draw the split, tune on its validation rows, score
once on its test rows — so the spread across seeds includes the noise of the selection itself,
and arms stay paired by seed (the same split, the same initial weights) for ``runtime.diff``.

Expected best validation score against budget (Dodge et al. 2019, "Show your work", §3): with
the N validation scores of an arm's runs sorted ``v(1) ≤ … ≤ v(N)``, the expected maximum of n
draws with replacement is ``Σ_i v(i)·((i/N)^n − ((i−1)/N)^n)``; for a metric to minimise, the
expected minimum (the same on the negated scores).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from compiler.errors import SpecError
from compiler.expand import Variant, arms
from compiler.labels import label_parts
from compiler.loader import load_text
from compiler.spec import direction
from runtime.stats import summarize
from runtime.store import ResultSet, ResultSetError

__all__ = ["Pick", "ArmPicks", "study_of", "tuned", "arm_picks", "test_metric", "expected_best", "budget_rows",
           "arm_rows", "ARM_COLUMNS", "BUDGET_COLUMNS"]

ARM_COLUMNS = ["arm", "picked", "mean", "sd", "ci_low", "ci_high", "settings"]
BUDGET_COLUMNS = ["arm", "budget", "expected", "sd", "trials"]


@dataclass
class Pick:
    seed: int
    run_id: str
    setting: dict[str, float]
    value: float           # validation score at the judged epoch: what chose it
    tests: dict[str, float]  # test_<metric> of the run


@dataclass
class ArmPicks:
    arm: Variant
    picks: dict[int, Pick | None]      # seed -> pick (None: missing runs, or every run non-finite)
    trials: list[float] = field(default_factory=list)   # validation scores of the arm's ok runs
    non_finite: int = 0


def study_of(rs: ResultSet):
    """The result set's stored spec, loaded and expanded."""
    try:
        return load_text(rs.meta["spec_source"], rs.meta["spec_path"] or str(rs.path))
    except SpecError as err:
        raise ResultSetError(f"{rs.path}: its stored spec does not load: {err.problems[0].render()}") from None


def tuned(rs: ResultSet) -> bool:
    return bool((rs.tree.get("ablation") or {}).get("tune"))


def test_metric(metric: str) -> str:
    """The test column that stands for a validation metric (val_accuracy → test_accuracy)."""
    if not metric.startswith("val_"):
        raise ResultSetError(f"{metric!r} has no test counterpart: the arms of a tuned study are compared on the "
                             "test split (use a validation metric such as val_accuracy)")
    return "test_" + metric[4:]


_last: list = [None, None]


def arm_picks(rs: ResultSet, loaded) -> list[ArmPicks]:
    """Per arm (in the study's order) its pick on every seed of the study."""
    if _last[0] is rs:
        return _last[1]
    metric, epoch = loaded.spec.selection
    better = direction(metric)
    cols = rs.runs.to_pydict()
    if "test_epoch" not in cols:
        raise ResultSetError(f"{rs.path}: stores no test scores (a tuned study needs data.test)")
    row = {rid: i for i, rid in enumerate(cols["run_id"])}
    at_epoch = _judged_values(rs, cols, metric, epoch)
    # The spec's seeds and any a stopping rule added (lesion run --until-decided).
    seeds = sorted(set(loaded.spec.study.seed_list) | set(cols["seed"]))
    out = []
    for arm in arms(loaded.variants):
        members = [v for v in loaded.variants if (v.arm or v).hash == arm.hash]
        got = ArmPicks(arm, {})
        for v in members:
            for s in seeds:
                i = row.get(f"{v.hash[:16]}-s{s}")
                if i is None:
                    continue
                if cols["status"][i] != "ok" or not math.isfinite(at_epoch.get(cols["run_id"][i], math.nan)):
                    got.non_finite += 1
                else:
                    got.trials.append(at_epoch[cols["run_id"][i]])
        for s in seeds:
            rows = [row.get(f"{v.hash[:16]}-s{s}") for v in members]
            if any(i is None for i in rows):
                got.picks[s] = None
                continue
            best = None
            for v, i in zip(members, rows):
                value = at_epoch.get(cols["run_id"][i], math.nan)
                if cols["status"][i] != "ok" or not math.isfinite(value):
                    continue
                if best is None or (value > best[1] if better == "max" else value < best[1]):
                    best = (v, value, i)
            got.picks[s] = None if best is None else Pick(
                s, cols["run_id"][best[2]], best[0].setting, best[1],
                {c: cols[c][best[2]] for c in cols if c.startswith("test_") and c != "test_epoch"})
        out.append(got)
    _last[:] = [rs, out]
    return out


def _judged_values(rs: ResultSet, cols: dict, metric: str, epoch: str) -> dict[str, float]:
    """run id → the validation metric at the epoch its test scores were taken (``test_epoch``)."""
    if epoch == "last":
        return {rid: float(x) if x is not None else math.nan for rid, x in zip(cols["run_id"], cols[f"final_{metric}"])}
    at = {rid: e for rid, e in zip(cols["run_id"], cols["test_epoch"]) if e is not None}
    curves = rs.curves.select(["run_id", "epoch", metric]).to_pydict()
    return {rid: float(x) for rid, e, x in zip(curves["run_id"], curves["epoch"], curves[metric])
            if at.get(rid) == e and x is not None}


def expected_best(values, n: int, direction: str = "max") -> tuple[float, float]:
    """(expected best, its standard deviation) of ``n`` draws with replacement from ``values``
    (Dodge et al. 2019, §3)."""
    v = np.sort(np.asarray(values, dtype=float))
    if direction == "min":
        mean, sd = expected_best(-v, n, "max")
        return -mean, sd
    big = len(v)
    if big == 0 or n < 1:
        return math.nan, math.nan
    i = np.arange(1, big + 1)
    weights = (i / big) ** n - ((i - 1) / big) ** n
    mean = float(np.sum(weights * v))
    second = float(np.sum(weights * v * v))
    return mean, math.sqrt(max(second - mean * mean, 0.0))


def budget_rows(rs: ResultSet, loaded) -> tuple[list[dict], str]:
    """Per arm and budget n = 1 … N (its runs), the expected best validation score; and the metric."""
    metric, _ = loaded.spec.selection
    rows = []
    for a in arm_picks(rs, loaded):
        for n in range(1, len(a.trials) + 1):
            mean, sd = expected_best(a.trials, n, direction(metric))
            rows.append({"arm": a.arm.label, "budget": n, "expected": mean, "sd": sd, "trials": len(a.trials)})
    return rows, metric


def arm_rows(rs: ResultSet, loaded, metric: str) -> list[dict]:
    """Per arm: seeds with a pick, the test metric over them (mean, sd, 95 % t interval) and the
    settings picked with their counts, most frequent first."""
    column = test_metric(metric)
    rows = []
    for a in arm_picks(rs, loaded):
        picked = [p for p in a.picks.values() if p is not None]
        s = summarize([p.tests[column] for p in picked])
        counts: dict[str, int] = {}
        for p in picked:
            text = ", ".join(label_parts(p.setting, lambda k: k.rsplit(".", 1)[-1]))
            counts[text] = counts.get(text, 0) + 1
        rows.append({"arm": a.arm.label, "picked": len(picked), "mean": s.mean, "sd": s.sd, "ci_low": s.ci_low,
                     "ci_high": s.ci_high,
                     "settings": "; ".join(f"{t} ×{c}" for t, c in sorted(counts.items(), key=lambda x: -x[1])),
                     "per_seed": {str(seed): (None if p is None else {"run_id": p.run_id, "setting": p.setting,
                                                                     "validation": p.value, "test": p.tests[column]})
                                  for seed, p in a.picks.items()}})
    return rows
