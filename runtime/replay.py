"""``lesion replay``: re-execute stored runs and compare them bit for bit.

The spec comes from the result set's own metadata, never from the spec file on disk. Before
anything runs, the result set must prove it is what it claims: the stored canonical JSON must
hash to the stored study hash, the stored source must load to that same canonical JSON, and every
stored run's variant hash, label and run id must be re-derived from it. The selected runs are
then re-executed at their recorded lane width with a fresh compile (never a stored program, never
one compiled earlier in the process), and every per-epoch metric, every final/best metric cell and the parameter digest are
compared bitwise: float32 bit patterns, except that any NaN equals any NaN (−0.0 ≠ 0.0).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from compiler.errors import SpecError, printable
from compiler.hashing import canonical_json, sha256_hex
from compiler.hashing import run_id as make_run_id
from compiler.loader import load_text
from runtime import environment
from runtime.execute import execute_group
from runtime.plan import Group, Run
from runtime.runner import datasets_for
from runtime.store import ResultSetError, open_result_set

__all__ = ["ReplayRow", "ReplayReport", "replay", "ReplayRefused", "bitwise_equal"]


class ReplayRefused(ResultSetError):
    """The result set failed its own integrity checks; nothing was re-executed."""


@dataclass
class ReplayRow:
    run_id: str
    variant: str
    seed: int
    lane_width: int
    verdict: str                       # "identical" | "differs"
    first_epoch: int | None = None     # 1-based epoch of the first differing curve value
    first_metric: str | None = None
    max_abs: float = 0.0
    max_rel: float = 0.0
    digest: str = "identical"          # or "differs"

    def as_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass
class ReplayReport:
    path: Path
    rows: list[ReplayRow]
    environment_changes: list[str] = field(default_factory=list)
    arrays: dict[str, dict] = field(default_factory=dict)  # run id -> trained arrays (keep_arrays)

    @property
    def identical(self) -> bool:
        return all(r.verdict == "identical" for r in self.rows)


def bitwise_equal(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Elementwise: same float32 bits, or both NaN."""
    a = np.asarray(a, dtype=np.float32)
    b = np.asarray(b, dtype=np.float32)
    same_bits = a.view(np.uint32) == b.view(np.uint32)
    return same_bits | (np.isnan(a) & np.isnan(b))


def _verify(rs):
    meta = rs.meta
    canon = meta["canonical_json"]
    if sha256_hex(canon.encode()) != rs.study_hash:
        raise ReplayRefused(f"{rs.path}: the stored canonical JSON does not hash to the stored study hash "
                            f"{rs.study_hash[:12]}: the result set was edited; refusing to replay it")
    try:
        loaded = load_text(meta["spec_source"], meta["spec_path"] or "stored spec")
    except SpecError as err:
        raise ReplayRefused(f"{rs.path}: the stored spec source no longer loads: {err.problems[0].render()}") from None
    if canonical_json(loaded.spec.model_dump(mode="json")).decode() != canon or loaded.study_hash != rs.study_hash:
        raise ReplayRefused(f"{rs.path}: the stored spec source and canonical JSON disagree "
                            f"(source hashes to {loaded.study_hash[:12]}, stored {rs.study_hash[:12]}); refusing")
    by_hash = {v.hash: v for v in loaded.variants}
    cols = rs.runs.to_pydict()
    for i, rid in enumerate(cols["run_id"]):
        v = by_hash.get(cols["variant_hash"][i])
        if v is None or v.label != cols["variant_label"][i] or cols["study_hash"][i] != rs.study_hash:
            raise ReplayRefused(f"{rs.path}: run {rid} names variant {cols['variant_hash'][i][:12]} "
                                f"('{printable(cols['variant_label'][i])}') which the stored spec does not derive; refusing")
        if make_run_id(v.hash, cols["seed"][i]) != rid:
            raise ReplayRefused(f"{rs.path}: run id {rid} does not match its variant and seed; refusing")
    return loaded, by_hash, cols


def _select(cols, run: str | None, variant: str | None, everything: bool) -> list[int]:
    idx = list(range(len(cols["run_id"])))
    if run is not None:
        idx = [i for i in idx if cols["run_id"][i] == run or cols["run_id"][i].startswith(run)]
        if not idx:
            raise ResultSetError(f"no run {run!r} in this result set ('lesion show --runs' lists them)")
        return idx[:1] if len(idx) > 1 and not everything else idx
    if variant is not None:
        # A label is also found as printed (escaped), so it can be copied from a table.
        idx = [i for i in idx if variant in (cols["variant_label"][i], printable(cols["variant_label"][i]))]
        if not idx:
            labels = sorted(set(cols["variant_label"]))
            raise ResultSetError(f"no variant {variant!r} in this result set (it has: {', '.join(map(printable, labels))})")
    if everything:
        return idx
    first: dict[str, int] = {}
    for i in sorted(idx, key=lambda i: (cols["variant_index"][i], cols["seed"][i])):
        first.setdefault(cols["variant_label"][i], i)
    return list(first.values())


def replay(path: str | Path, *, run: str | None = None, variant: str | None = None, everything: bool = False,
           on_group=None, keep_arrays: bool = False) -> ReplayReport:
    rs = open_result_set(path)
    loaded, by_hash, cols = _verify(rs)
    chosen = _select(cols, run, variant, everything)
    current = environment.capture()
    recorded = json.loads(cols["environment"][chosen[0]])
    changes = environment.differences(recorded, current)

    # Runs of one stored group replay together at that group's width; lane order does not matter.
    groups: dict[str, list[int]] = {}
    for i in chosen:
        groups.setdefault(cols["group_id"][i], []).append(i)
    plans = []
    for gid, members in groups.items():
        width = cols["lane_width"][members[0]]
        runs = [Run(cols["run_id"][i], by_hash[cols["variant_hash"][i]], cols["seed"][i]) for i in members]
        for k in range(0, len(runs), width):
            plans.append(Group(gid, cols["structure"][members[0]], width, tuple(runs[k:k + width])))
    base = Path(rs.meta["spec_path"]).parent if rs.meta["spec_path"] else Path.cwd()
    data = datasets_for(plans, base)
    curves = rs.curves.to_pydict()
    row_of = {cols["run_id"][i]: i for i in chosen}
    rows, arrays = [], {}
    for g in plans:
        d = data[g.group_id]
        for r in g.runs:
            stored = cols["data_fingerprint"][row_of[r.run_id]]
            if d.fingerprint != stored:
                where = r.variant.spec.data.path if r.variant.spec.data.kind == "file" else "the generated data"
                raise ReplayRefused(f"{where}: the data changed since the run (SHA-256 now {d.fingerprint}, "
                                    f"recorded {stored}); restore the data the run used")
        if on_group:
            on_group(g)
        result = execute_group(g, d, current, reuse=False, keep_arrays=keep_arrays)
        for lane in result.lanes:
            rows.append(_compare(lane, cols, row_of[lane.run_id], curves, result.metric_names))
            if keep_arrays:
                arrays[lane.run_id] = lane.arrays
    return ReplayReport(rs.path, rows, changes, arrays)


def _compare(lane, cols, i, curves, metric_names) -> ReplayRow:
    rid = lane.run_id
    row = ReplayRow(rid, cols["variant_label"][i], cols["seed"][i], cols["lane_width"][i], "identical")
    sel = [k for k, c in enumerate(curves["run_id"]) if c == rid]
    sel.sort(key=lambda k: curves["epoch"][k])
    first = None
    for m in metric_names:
        new = lane.curves[m]
        old = np.asarray([curves[m][k] if m in curves else np.nan for k in sel], dtype=np.float32)
        if old.shape != new.shape:
            first = first or (1, m)
            row.max_abs = float("inf")
            continue
        eq = bitwise_equal(old, new)
        if not eq.all():
            e = int(np.flatnonzero(~eq)[0])
            if first is None or e + 1 < first[0]:
                first = (e + 1, m)
            with np.errstate(invalid="ignore", divide="ignore"):
                diff = np.abs(old.astype(np.float64) - new.astype(np.float64))
                rel = diff / np.maximum(np.abs(old.astype(np.float64)), np.finfo(np.float32).tiny)
            row.max_abs = max(row.max_abs, float(np.nanmax(np.where(eq, 0, diff))) if diff.size else 0.0)
            row.max_rel = max(row.max_rel, float(np.nanmax(np.where(eq, 0, rel))) if rel.size else 0.0)
    for m in metric_names:
        col = f"final_{m}"
        if col in cols and not bitwise_equal(np.float32(cols[col][i]), lane.curves[m][-1]):
            first = first or (len(lane.curves[m]), col)
    if lane.param_digest != cols["param_digest"][i]:
        row.digest = "differs"
    if first is not None or row.digest == "differs":
        row.verdict = "differs"
        if first is not None:
            row.first_epoch, row.first_metric = first
    return row
