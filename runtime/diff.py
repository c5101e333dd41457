"""``lesion diff``: did anything get better or worse between two result sets, beyond seed noise?

1. The spec diff: every canonical-JSON field whose value differs between the two studies.
2. Variant matching (``runtime.specdiff.match_variants``): by resolved configuration minus the
   changed fields (an ablation axis whose values changed counts as a change of its key), then
   by label.
3. Per matched variant and metric, the final-epoch values by seed go to ``runtime.stats.compare``
   (paired over common seeds, else Welch); the p-values of all rows are adjusted together (Holm
   by default, or Benjamini–Hochberg) and each row gets a verdict in the metric's direction.

With ``baseline`` and one result set, every variant is compared with the baseline variant of the
same study (seeds shared, so paired).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

from compiler.errors import SpecError
from compiler.hashing import variant_payload
from compiler.loader import load_text
from compiler.spec import METRICS
from runtime.specdiff import Change, match_variants, spec_diff
from runtime.stats import adjust, compare, verdict
from runtime.store import ResultSet, ResultSetError

__all__ = ["DiffReport", "diff_result_sets", "diff_baseline", "DIFF_COLUMNS"]

DIFF_COLUMNS = ["variant_a", "variant_b", "metric", "test", "n_a", "n_b", "mean_a", "mean_b", "diff",
                "ci_low", "ci_high", "p", "p_adjusted", "p_sign_flip", "verdict"]


@dataclass
class DiffReport:
    changes: list[Change]
    rows: list[dict]
    only_a: list[str] = field(default_factory=list)
    only_b: list[str] = field(default_factory=list)
    correction: str = "holm"
    same_study: bool = False

    @property
    def worse(self) -> int:
        return sum(1 for r in self.rows if r["verdict"] == "worse")

    def extra(self) -> dict:
        return {
            "spec_changes": [c.as_dict() for c in self.changes],
            "identical_studies": self.same_study,
            "unmatched_a": self.only_a, "unmatched_b": self.only_b,
            "correction": self.correction,
        }


def _variants(rs: ResultSet) -> list[dict]:
    try:
        loaded = load_text(rs.meta["spec_source"], rs.meta["spec_path"] or str(rs.path))
    except SpecError as err:
        raise ResultSetError(f"{rs.path}: its stored spec does not load: {err.problems[0].render()}") from None
    return [{"label": v.label, "hash": v.hash, "payload": variant_payload(v.spec)} for v in loaded.variants]


def _values(rs: ResultSet, cols: dict, variant_hash: str, metric: str) -> dict[int, float | None]:
    """Final values of a variant's runs by seed (None for a diverged run); ``cols`` is
    ``rs.runs.to_pydict()``, converted once per result set."""
    col = f"final_{metric}"
    if col not in cols:
        have = sorted(c[len("final_"):] for c in cols if c.startswith("final_") and c[6:] in METRICS)
        raise ResultSetError(f"{rs.path}: metric {metric!r} is not stored (it has: {', '.join(have)})")
    return {cols["seed"][i]: (cols[col][i] if cols["status"][i] == "ok" else None)
            for i, h in enumerate(cols["variant_hash"]) if h == variant_hash}


def _metrics(rs: ResultSet, metrics: list[str] | None) -> list[str]:
    metrics = metrics or [rs.headline]
    for m in metrics:
        if m not in METRICS:
            raise ResultSetError(f"--metric {m!r}: no known direction (expected one of {', '.join(METRICS)})")
    return metrics


def _rows(pairs, rs_a, rs_b, metrics, correction, alpha) -> list[dict]:
    rows, comps = [], []
    cols_a = rs_a.runs.to_pydict()
    cols_b = cols_a if rs_b is rs_a else rs_b.runs.to_pydict()
    for a, b in pairs:
        for m in metrics:
            values_a, values_b = _values(rs_a, cols_a, a["hash"], m), _values(rs_b, cols_b, b["hash"], m)
            c = compare(values_a, values_b)
            # A variant with no stored run is an incomplete result set, not a lack of seeds.
            absent = " and ".join(side for side, values in (("A", values_a), ("B", values_b)) if not values)
            reason = f"no test possible: {absent} stores no run of this variant (incomplete result set)" \
                if absent else c.reason
            comps.append((a, b, m, c, reason))
    adjusted = adjust([c.p_value for *_, c, _ in comps], method=correction)
    for (a, b, m, c, reason), p_adj in zip(comps, adjusted):
        rows.append({
            "variant_a": a["label"], "variant_b": b["label"], "metric": m, "test": c.test,
            "n_a": c.n_a, "n_b": c.n_b, "mean_a": c.mean_a, "mean_b": c.mean_b, "diff": c.diff,
            "ci_low": c.ci_low, "ci_high": c.ci_high, "p": c.p_value, "p_adjusted": p_adj,
            "p_sign_flip": c.p_permutation, "verdict": verdict(c, p_adj, METRICS[m], alpha), "reason": reason,
        })
    return rows


def _ignored_keys(changes: list[Change], a_tree: dict, b_tree: dict) -> set[str]:
    """Fields to ignore when matching variants: the changed fields, plus the key of every axis (or
    listed variant's set key) whose entry changed — an axis over learning rate whose values moved
    from 0.1 to 0.001 makes learning rate the thing that was changed."""
    keys = {c.key for c in changes}
    for c in changes:
        m = re.match(r"ablation\.(axis|variant)\[(\d+)\]", c.key)
        if not m:
            continue
        for tree in (a_tree, b_tree):
            entries = (tree.get("ablation") or {}).get(m.group(1)) or []
            i = int(m.group(2))
            if i < len(entries):
                entry = entries[i]
                keys |= {entry["key"]} if m.group(1) == "axis" else set(entry.get("set", {}))
    return keys


def diff_result_sets(rs_a: ResultSet, rs_b: ResultSet, *, metrics: list[str] | None = None,
                     correction: str = "holm", alpha: float = 0.05) -> DiffReport:
    changes = spec_diff(rs_a.meta["canonical_json"], rs_b.meta["canonical_json"])
    va, vb = _variants(rs_a), _variants(rs_b)
    ignored = _ignored_keys(changes, rs_a.tree, rs_b.tree)
    pairs, only_a, only_b = match_variants(va, vb, ignored)
    rows = _rows([(p.a, p.b) for p in pairs], rs_a, rs_b, _metrics(rs_a, metrics), correction, alpha)
    return DiffReport(changes, rows, [v["label"] for v in only_a], [v["label"] for v in only_b], correction,
                      same_study=not changes)


def diff_baseline(rs: ResultSet, baseline: str, *, metrics: list[str] | None = None,
                  correction: str = "holm", alpha: float = 0.05) -> DiffReport:
    variants = _variants(rs)
    base = [v for v in variants if v["label"] == baseline]
    if not base:
        raise ResultSetError(f"--baseline {baseline!r}: no such variant (labels: "
                             f"{', '.join(v['label'] for v in variants)})")
    pairs = [(base[0], v) for v in variants if v is not base[0]]
    rows = _rows(pairs, rs, rs, _metrics(rs, metrics), correction, alpha)
    return DiffReport([], rows, correction=correction, same_study=True)
