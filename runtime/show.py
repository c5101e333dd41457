"""``lesion show``: a result set summarized per variant across seeds.

The headline metric (the study's ``metric``) and the final validation divergence are summarized
by their value at the last epoch of each run: mean, sample standard deviation and a 95 % t
interval of the mean. Diverged runs are counted and left out of the statistics.
"""

from __future__ import annotations


import numpy as np

from runtime import tuning
from runtime.formats import Fit
from runtime.migrate import key_column
from runtime.stats import summarize
from runtime.store import ResultSet

__all__ = ["summary_rows", "curve_rows", "run_rows", "axis_values", "SUMMARY_COLUMNS", "SUMMARY_FIT", "CURVES_FIT",
           "RUNS_FIT"]

# mean, sd, ci_low and ci_high are of the row's metric (named in every row: one or several metrics
# give the same columns); groups: the groups (runs of one program computed in one call) the
# variant's runs were computed in; execution_seconds: their execution time, compiling left out.
SUMMARY_COLUMNS = ["variant", "metric", "ok", "non_finite", "mean", "sd", "ci_low", "ci_high",
                   "val_divergence_mean", "val_divergence_sd", "groups", "execution_seconds", "warnings"]
# On a narrow terminal the headline's interval outlives the bookkeeping and the second metric;
# "ok" out of the study's seeds still tells how many were non-finite; the title names one metric.
SUMMARY_FIT = Fit(keep=("variant", "ok", "mean", "ci_low", "ci_high"),
                  drop=("metric", "groups", "execution_seconds", "val_divergence_sd", "val_divergence_mean",
                        "non_finite"), wrap=("variant",))
CURVES_FIT = Fit(keep=("variant", "epoch"), wrap=("variant",))
# The seed is also the run id's "-s<seed>"; the metrics' columns are added to keep by the caller.
RUNS_FIT = Fit(keep=("run_id", "variant", "status"), drop=("execution_seconds", "seed"), wrap=("variant",))


def _variants(rs: ResultSet) -> list[tuple[int, str]]:
    pairs = sorted(set(zip(rs.runs.column("variant_index").to_pylist(), rs.runs.column("variant_label").to_pylist())))
    return pairs


def summary_rows(rs: ResultSet, metric: str | None = None) -> list[dict]:
    metric = metric or rs.headline
    rs.require([metric])
    cols = rs.runs.to_pydict()
    col = f"final_{metric}"
    rows = []
    for _, label in _variants(rs):
        idx = [i for i, lab in enumerate(cols["variant_label"]) if lab == label]
        ok = [i for i in idx if cols["status"][i] == "ok"]
        head = summarize([cols[col][i] for i in ok])
        div = summarize([cols["final_val_divergence"][i] for i in ok]) if "final_val_divergence" in cols else None
        warn = sum(1 for i in idx if cols["warnings"][i])
        rows.append({
            "variant": label, "metric": metric, "ok": len(ok), "non_finite": len(idx) - len(ok),
            "mean": head.mean, "sd": head.sd, "ci_low": head.ci_low, "ci_high": head.ci_high,
            "val_divergence_mean": div.mean if div else None, "val_divergence_sd": div.sd if div else None,
            "groups": len({cols["group_id"][i] for i in idx}),
            "execution_seconds": float(sum(cols["run_seconds"][i] for i in idx)),
            "warnings": warn or None,
        })
    return rows


def curve_rows(rs: ResultSet, metrics: list[str] | None = None) -> tuple[list[dict], list[str]]:
    """Per-epoch means across the ok runs of each variant."""
    curves = rs.curves.to_pydict()
    ok_ids = {r for r, s in zip(rs.runs.column("run_id").to_pylist(), rs.runs.column("status").to_pylist()) if s == "ok"}
    headline = rs.headline
    default = [m for m in (headline, "train_divergence", "val_divergence") if m in curves]
    metrics = metrics or list(dict.fromkeys(default))
    rs.require(metrics, curves=True)
    rows = []
    for _, label in _variants(rs):
        idx = [i for i, (lab, rid) in enumerate(zip(curves["variant_label"], curves["run_id"]))
               if lab == label and rid in ok_ids]
        epochs = sorted({curves["epoch"][i] for i in idx})
        for e in epochs:
            sel = [i for i in idx if curves["epoch"][i] == e]
            row = {"variant": label, "epoch": e, "runs": len(sel)}
            for m in metrics:
                row[m] = float(np.mean([curves[m][i] for i in sel]))
            rows.append(row)
    return rows, ["variant", "epoch", "runs", *metrics]


def run_rows(rs: ResultSet, metrics: list[str]) -> tuple[list[dict], list[str]]:
    """One row per stored run: its id (what ``lesion replay --run`` takes), seed, status and final
    values."""
    rs.require(metrics)
    cols = rs.runs.to_pydict()
    order = sorted(range(len(cols["run_id"])), key=lambda i: (cols["variant_index"][i], cols["seed"][i]))
    rows = [{"run_id": cols["run_id"][i], "variant": cols["variant_label"][i], "seed": cols["seed"][i],
             "status": cols["status"][i], "non_finite_epoch": cols["non_finite_epoch"][i],
             **{m: cols[f"final_{m}"][i] for m in metrics}, "execution_seconds": cols["run_seconds"][i]} for i in order]
    return rows, ["run_id", "variant", "seed", "status", "non_finite_epoch", *metrics, "execution_seconds"]


def axis_values(rs: ResultSet) -> tuple[list[str], dict[str, dict]]:
    """The varied keys' column names and, per variant label, each one's value: the result set
    stores one column per varied key (:func:`runtime.migrate.key_column`: no other column name has
    ``__``), and a program reading ``show --format json``/``csv`` gets the names it would query
    the Parquet file by (plain identifiers, unlike the dotted keys)."""
    names = [c for c in rs.runs.column_names if "__" in c]
    cols = rs.runs.select(["variant_label", *names]).to_pydict()
    values = {lab: {c: cols[c][i] for c in names} for i, lab in enumerate(cols["variant_label"])}
    if tuning.tuned(rs):
        # An arm (the rows of its picks and of its budget) has the values its tuned variants share;
        # a tuned knob's column stays empty, its value differing from seed to seed.
        for v in tuning.study_of(rs).variants:
            tuned_columns = {key_column(k) for k in v.setting}
            values.setdefault(v.arm.label, {c: x for c, x in values.get(v.label, {}).items() if c not in tuned_columns})
    return names, values
