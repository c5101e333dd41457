"""``lesion replay``: re-execute stored runs and compare them bit for bit.

The spec comes from the result set's own metadata, never from the spec file on disk. Before
anything runs, the result set must prove it is what it claims: the stored canonical JSON must
hash to the stored study hash, the stored source must load to that same canonical JSON, and every
stored run's variant hash, label and run id must be re-derived from it. The selected runs are
then re-executed, each at its own recorded lane width, with a fresh compile (never a stored
program, never one compiled earlier in the process). Every per-epoch metric and every runs-table
cell the re-execution decides (final and best metrics, status, divergence epoch, epochs, the
parameter hash, labels, changes, varied-key columns, warnings) is compared: floats by bit
pattern, except that any NaN equals any NaN (−0.0 ≠ 0.0). A metric the re-execution computes but
the result set does not store (one added to lesion after it was written) is not compared; the
report's notes name it. A duplicated run is refused; a run the
spec derives but the result set lacks is reported as missing; a run whose recorded width
disagrees with the other runs of its call is reported; stored hashes that no longer match the
tables (``runtime.audit``) make the replay not identical even when every number reproduces.
"""

from __future__ import annotations

import json
import math
import struct
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from compiler.errors import SpecError, printable
from compiler.hashing import sha256_hex, study_json
from compiler.hashing import run_id as make_run_id
from compiler.loader import load_text
from runtime import environment
from runtime.audit import audit
from runtime.execute import execute_group
from runtime.plan import Group, Run
from runtime.runner import datasets_for, group_tables, typed_key_columns, varied_keys
from runtime.store import ResultSetError, open_result_set

__all__ = ["ReplayRow", "ReplayReport", "replay", "ReplayRefused", "bitwise_equal"]


class ReplayRefused(ResultSetError):
    """The result set failed its own integrity checks; nothing was re-executed."""


@dataclass
class ReplayRow:
    run_id: str
    variant: str
    seed: int
    lane_width: int | None             # None for a missing run
    verdict: str                       # "identical" | "differs" | "missing"
    first_epoch: int | None = None     # 1-based epoch of the first differing curve value
    first_metric: str | None = None
    max_abs: float = 0.0
    max_rel: float = 0.0
    param_hash: str = "identical"      # or "differs"
    cells: list[str] = field(default_factory=list)   # runs-table columns that differ

    def as_dict(self) -> dict:
        return {**self.__dict__, "cells": list(self.cells)}


@dataclass
class ReplayReport:
    path: Path
    rows: list[ReplayRow]
    environment_changes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)   # runtime.audit: missing runs, edits
    notes: list[str] = field(default_factory=list)
    edited: bool = False               # the stored hashes no longer match the tables
    arrays: dict[str, dict] = field(default_factory=dict)  # run id -> trained arrays (keep_arrays)

    @property
    def identical(self) -> bool:
        return not self.edited and all(r.verdict == "identical" for r in self.rows)


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
    if study_json(loaded.spec).decode() != canon or loaded.study_hash != rs.study_hash:
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


def _select(cols, run: str | None, variant: str | None) -> list[int]:
    idx = list(range(len(cols["run_id"])))
    if run is not None:
        idx = [i for i in idx if cols["run_id"][i] == run or cols["run_id"][i].startswith(run)]
        if not idx:
            raise ResultSetError(f"no run {run!r} in this result set ('lesion show --runs' lists them)")
    elif variant is not None:
        # A label is also found as printed (escaped), so it can be copied from a table.
        idx = [i for i in idx if variant in (cols["variant_label"][i], printable(cols["variant_label"][i]))]
        if not idx:
            labels = sorted(set(cols["variant_label"]))
            raise ResultSetError(f"no variant {variant!r} in this result set (it has: {', '.join(map(printable, labels))})")
    return idx


# Runs-table cells re-execution does not decide: the inputs replay takes from the record (group,
# width, position), where and when the run was computed (environment differences are named
# separately), and clocks. Every other cell is recomputed and compared.
_NOT_DETERMINED = {"group_id", "lane_width", "lane", "env_hash", "environment",
                   "compile_seconds", "run_seconds", "finished_at"}


def _widths_in_doubt(cols, chosen: list[int]) -> set[int]:
    """Rows whose lane width disagrees with the other runs of the call that computed them (one
    group id stored at one moment is one vmapped call, hence one width)."""
    calls: dict[tuple, list[int]] = {}
    for i in range(len(cols["run_id"])):
        calls.setdefault((cols["group_id"][i], cols["finished_at"][i]), []).append(i)
    doubt = set()
    for members in calls.values():
        ranked = Counter(cols["lane_width"][i] for i in members).most_common()
        if len(ranked) > 1:
            tied = ranked[0][1] == ranked[1][1]
            doubt |= {i for i in members if tied or cols["lane_width"][i] != ranked[0][0]}
    return doubt & set(chosen)


def replay(path: str | Path, *, run: str | None = None, variant: str | None = None,
           on_group=None, keep_arrays: bool = False) -> ReplayReport:
    """Re-execute every stored run of the selection (all runs by default) and compare it;
    ``keep_arrays`` also returns each run's trained arrays (``ReplayReport.arrays``)."""
    rs = open_result_set(path)
    loaded, by_hash, cols = _verify(rs)
    check = audit(rs, loaded)
    if check.duplicated:
        rid, n = next(iter(check.duplicated.items()))
        raise ReplayRefused(f"{rs.path}: run {rid} is stored {n} times (lesion writes one row per run); refusing")
    chosen = _select(cols, run, variant)
    environment.single_threaded_xla()  # as lesion run computes
    current = environment.capture()
    recorded = json.loads(cols["environment"][chosen[0]])
    changes = environment.differences(recorded, current)

    # Each run replays at its own recorded width, with the runs stored from the same call.
    batches: dict[tuple, list[int]] = {}
    for i in chosen:
        v = by_hash[cols["variant_hash"][i]]
        key = (cols["group_id"][i], cols["finished_at"][i], cols["lane_width"][i], v.program)
        batches.setdefault(key, []).append(i)
    plans = []
    for (gid, _, width, program), members in batches.items():
        runs = [Run(cols["run_id"][i], by_hash[cols["variant_hash"][i]], cols["seed"][i]) for i in members]
        for k in range(0, len(runs), width):
            plans.append(Group(gid, program, width, tuple(runs[k:k + width])))
    base = Path(rs.meta["spec_path"]).parent if rs.meta["spec_path"] else Path.cwd()
    data = datasets_for(plans, base)
    key_columns = typed_key_columns(loaded.variants, varied_keys(loaded.variants))
    curves = rs.curves.to_pydict()
    curve_rows: dict[str, list[int]] = {}
    for k, rid in enumerate(curves["run_id"]):
        curve_rows.setdefault(rid, []).append(k)
    row_of = {cols["run_id"][i]: i for i in chosen}
    doubt = _widths_in_doubt(cols, chosen)
    rows, arrays, unstored = [], {}, set()
    for g in plans:
        d = data[g.group_id]
        for r in g.runs:
            stored = cols["data_hash"][row_of[r.run_id]]
            if d.data_hash != stored:
                where = r.variant.spec.data.path if r.variant.spec.data.kind == "file" else "the generated data"
                raise ReplayRefused(f"{where}: the data changed since the run (SHA-256 now {d.data_hash}, "
                                    f"recorded {stored}); restore the data the run used")
        if on_group:
            on_group(g)
        result = execute_group(g, d, current, reuse=False, keep_arrays=keep_arrays)
        fresh, _ = group_tables(result, g, rs.study_hash, rs.headline, key_columns, d.data_hash)
        fresh = fresh.to_pydict()
        unstored.update(c for c in fresh if c not in cols)
        for j, lane in enumerate(result.lanes):
            i = row_of[lane.run_id]
            row = _compare(lane, cols, i, {c: fresh[c][j] for c in fresh}, curves, curve_rows.get(lane.run_id, []),
                           result.metric_names)
            if i in doubt:
                row.cells.insert(0, "lane_width")
                row.verdict = "differs"
            rows.append(row)
            if keep_arrays:
                arrays[lane.run_id] = lane.arrays
    rows += _missing_rows(check, loaded, run, variant)
    notes = check.notes()
    if unstored:
        notes.append(f"not compared, since this result set does not store them (an earlier lesion did not compute "
                     f"them): {', '.join(sorted(unstored))}")
    return ReplayReport(rs.path, rows, changes, check.warnings(), notes, bool(check.edits), arrays)


def _missing_rows(check, loaded, run, variant) -> list[ReplayRow]:
    """Runs the stored spec derives but the result set lacks, within the selection."""
    if run is not None:
        return []
    return [ReplayRow(make_run_id(v.hash, seed), v.label, seed, None, "missing")
            for v in loaded.variants if v.label in check.missing and variant in (None, v.label)
            for seed in check.missing[v.label]]


def _same(a, b) -> bool:
    """Cell equality: floats by bit pattern (any NaN equals any NaN, −0.0 is not 0.0)."""
    if isinstance(a, float) and isinstance(b, float):
        return (math.isnan(a) and math.isnan(b)) or struct.pack("<d", a) == struct.pack("<d", b)
    return type(a) is type(b) and a == b


def _compare(lane, cols, i, fresh: dict, curves, sel: list[int], metric_names) -> ReplayRow:
    rid = lane.run_id
    row = ReplayRow(rid, cols["variant_label"][i], cols["seed"][i], cols["lane_width"][i], "identical")
    sel = sorted(sel, key=lambda k: curves["epoch"][k])
    first = None
    for m in (m for m in metric_names if m in curves):
        new = lane.curves[m]
        old = np.asarray([curves[m][k] for k in sel], dtype=np.float32)
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
    # A column the stored result set lacks (a metric added to lesion since) is not compared.
    names = [c for c in cols if c not in _NOT_DETERMINED]
    row.cells = [c for c in names if not _same(cols[c][i] if c in cols else None, fresh.get(c))]
    if lane.param_hash != cols["param_hash"][i]:
        row.param_hash = "differs"
    if first is not None or row.cells:
        row.verdict = "differs"
        if first is not None:
            row.first_epoch, row.first_metric = first
    return row
