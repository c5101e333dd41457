"""``lesion run``: a loaded study planned, executed group by group, and stored.

Order of work: hold the result set's writer lock; read what is already stored; plan every run of
the study (so lane widths never depend on what is missing, and a program with stored runs keeps
their width); skip runs stored with the same run id and the same numerics environment; execute
the rest group by group, writing each finished group atomically before starting the next. An
interruption loses at most the group in flight. ``--fresh`` writes into a staging folder inside
the result set and replaces the stored runs only once the whole study is computed.
"""

from __future__ import annotations

import json
import shutil
import time
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import numpy as np
import pyarrow as pa

from compiler.hashing import lookup, study_json, variant_payload
from compiler.spec import direction as metric_direction
from runtime import __version__, environment, execute, guard, programs
from runtime.execute import GroupResult
from runtime.migrate import key_column
from runtime.plan import Group, plan
from runtime.store import (SEQUENTIAL, STAGING, ResultSet, ResultSetError, column, open_result_set, refuse_link,
                           result_dir, write_results, writer_lock)
from runtime.workers import LocalWorkers

__all__ = ["RunReport", "run_study", "run_until_decided", "study_meta", "varied_keys", "typed_key_columns",
           "group_tables", "datasets_for"]


@dataclass
class RunReport:
    path: Path
    planned: int
    computed: int
    reused: int
    non_finite: int
    warnings: list[str]
    groups: int
    compile_seconds: float
    run_seconds: float


def study_meta(loaded, env: dict) -> dict:
    return {
        "spec_source": loaded.source,
        "spec_path": str(Path(loaded.path).resolve()) if loaded.path else "",
        "canonical_json": study_json(loaded.spec).decode(),
        "study_hash": loaded.study_hash,
        "version": __version__,
        "environment": env,
    }


def varied_keys(variants) -> list[str]:
    keys: list[str] = []
    for v in variants:
        for k in v.changes:
            if k not in keys:
                keys.append(k)
    return keys


def typed_key_columns(variants, keys: list[str]) -> dict[str, tuple[pa.DataType, dict]]:
    """Each varied key's value in every resolved variant, typed when the values share a type, by
    the key's column name (:func:`runtime.migrate.key_column`)."""
    out = {}
    for key in keys:
        values = {v.hash: lookup(variant_payload(v.spec), key) for v in variants}
        kinds = {type(x) for x in values.values() if x is not None}
        if kinds <= {bool}:
            typ = pa.bool_()
        elif kinds <= {int}:
            typ = pa.int64()
        elif kinds <= {int, float}:
            typ, values = pa.float64(), {h: (None if x is None else float(x)) for h, x in values.items()}
        elif kinds <= {str}:
            typ = pa.string()
        else:
            typ = pa.string()
            values = {h: (None if x is None else json.dumps(x, sort_keys=True)) for h, x in values.items()}
        out[key_column(key)] = (typ, values)
    return out


def datasets_for(groups: list[Group], base_dir: Path, cache: dict | None = None) -> dict[str, object]:
    """One data set per distinct data section (loaded once, shared by its groups; ``cache``
    keeps them across calls)."""
    from compiler.data import load_data

    cache = {} if cache is None else cache
    out = {}
    for g in groups:
        spec = g.runs[0].variant.spec
        key = json.dumps(spec.data.model_dump(mode="json"), sort_keys=True)
        if key not in cache:
            cache[key] = load_data(spec, base_dir)
        out[g.group_id] = cache[key]
    return out


def group_tables(result: GroupResult, group: Group, study_hash: str, headline: str, key_columns: dict,
                 data_hash: str) -> tuple[pa.Table, pa.Table]:
    """The runs rows and curves rows of one executed group; with a test split, ``test_epoch`` and
    the ``test_<metric>`` scores there (``execute.LaneResult``)."""
    env_json = json.dumps(result.environment, sort_keys=True)
    env_fp = environment.env_hash(result.environment)
    direction = metric_direction(headline)
    by_id = {r.run_id: r for r in group.runs}
    finished = datetime.now(timezone.utc).isoformat(timespec="seconds")
    n = len(result.lanes)
    cols: dict[str, list] = {k: [] for k in (
        "study_hash", "variant_hash", "run_id", "variant_label", "variant_index", "changes")}
    cols.update({k: [] for k in key_columns})
    for k in ("seed", "lane_width", "lane", "group_id", "program", "status", "non_finite_epoch", "epochs"):
        cols[k] = []
    finals = {f"final_{m}": [] for m in result.metric_names}
    best, best_epoch = [], []
    tested: dict[str, list] = {"test_epoch": [], **{m: [] for m in result.test_names}}
    tail = {k: [] for k in ("param_hash", "data_hash", "env_hash", "environment",
                            "compile_seconds", "run_seconds", "warnings", "finished_at")}
    curve_cols: dict[str, list] = {"run_id": [], "variant_label": [], "seed": [], "epoch": []}
    curve_metrics: dict[str, list] = {m: [] for m in result.metric_names}
    for lane in result.lanes:
        run = by_id[lane.run_id]
        v = run.variant
        epochs = len(next(iter(lane.curves.values())))
        cols["study_hash"].append(study_hash)
        cols["variant_hash"].append(v.hash)
        cols["run_id"].append(lane.run_id)
        cols["variant_label"].append(v.label)
        cols["variant_index"].append(v.index)
        cols["changes"].append(json.dumps(v.changes, sort_keys=True))
        for k, (_, values) in key_columns.items():
            cols[k].append(values[v.hash])
        cols["seed"].append(run.seed)
        cols["lane_width"].append(result.lane_width)
        cols["lane"].append(lane.lane)
        cols["group_id"].append(result.group_id)
        cols["program"].append(group.program)
        cols["status"].append("non_finite" if lane.non_finite_epoch is not None else "ok")
        cols["non_finite_epoch"].append(lane.non_finite_epoch)
        cols["epochs"].append(epochs)
        for m in result.metric_names:
            finals[f"final_{m}"].append(lane.curves[m][-1])
        h = lane.curves.get(headline)
        if h is None or not np.isfinite(h).any():
            best.append(np.float32("nan"))
            best_epoch.append(None)
        else:
            i = int(np.nanargmax(h) if direction == "max" else np.nanargmin(h))
            best.append(h[i])
            best_epoch.append(i + 1)
        if result.test_names:
            tested["test_epoch"].append(lane.test_epoch)
            for m in result.test_names:
                tested[m].append(lane.tests[m])
        tail["param_hash"].append(lane.param_hash)
        tail["data_hash"].append(data_hash)
        tail["env_hash"].append(env_fp)
        tail["environment"].append(env_json)
        tail["compile_seconds"].append(result.compile_seconds)
        tail["run_seconds"].append(result.run_seconds / n)
        tail["warnings"].append("; ".join(lane.warnings))
        tail["finished_at"].append(finished)
        curve_cols["run_id"].extend([lane.run_id] * epochs)
        curve_cols["variant_label"].extend([v.label] * epochs)
        curve_cols["seed"].extend([run.seed] * epochs)
        curve_cols["epoch"].extend(range(1, epochs + 1))
        for m in result.metric_names:
            curve_metrics[m].append(lane.curves[m])
    int32 = {"variant_index", "lane_width", "lane", "non_finite_epoch", "epochs"}
    arrays, names = [], []
    for k, vals in cols.items():
        if k in key_columns:
            arrays.append(column(vals, key_columns[k][0]))
        elif k in int32:
            arrays.append(column(vals, pa.int32()))
        elif k == "seed":
            arrays.append(column(vals, pa.int64()))
        else:
            arrays.append(column(vals, pa.string()))
        names.append(k)
    for k, vals in finals.items():
        arrays.append(column(vals, pa.float32()))
        names.append(k)
    arrays += [column(best, pa.float32()), column(best_epoch, pa.int32())]
    names += [f"best_{headline}", "best_epoch"]
    if result.test_names:
        for k, vals in tested.items():
            arrays.append(column(vals, pa.int32() if k == "test_epoch" else pa.float32()))
            names.append(k)
    for k, vals in tail.items():
        typ = pa.float64() if k.endswith("seconds") else pa.string()
        arrays.append(column(vals, typ))
        names.append(k)
    runs = pa.Table.from_arrays(arrays, names=names)
    c_arrays = [column(curve_cols["run_id"], pa.string()), column(curve_cols["variant_label"], pa.string()),
                column(curve_cols["seed"], pa.int64()), column(curve_cols["epoch"], pa.int32())]
    c_names = ["run_id", "variant_label", "seed", "epoch"]
    for m, parts in curve_metrics.items():
        c_arrays.append(column(np.concatenate(parts), pa.float32()))
        c_names.append(m)
    return runs, pa.Table.from_arrays(c_arrays, names=c_names)


def _stored(path: Path) -> ResultSet | None:
    refuse_link(path)
    if not (path / "runs.parquet").exists():
        return None
    return open_result_set(path)


def _missing(groups: list[Group], done: set) -> list[Group]:
    todo = []
    for g in groups:
        missing = tuple(r for r in g.runs if r.run_id not in done)
        if missing:
            todo.append(Group(g.group_id, g.program, g.lane_width, missing))
    return todo


def _recorded_widths(stored: ResultSet | None, done: set) -> dict[str, int]:
    """program key -> the lane width its reused runs were computed at (bits depend on the width, so
    the rest of the program.s runs are computed at that width too)."""
    if stored is None or not done:
        return {}
    found: dict[str, set] = {}
    cols = stored.runs.select(["run_id", "program", "lane_width"]).to_pydict()
    for rid, program, width in zip(cols["run_id"], cols["program"], cols["lane_width"]):
        if rid in done:
            found.setdefault(program, set()).add(width)
    return {s: next(iter(w)) for s, w in found.items() if len(w) == 1}


def _refuse_other_width(todo: list[Group], widths: dict[str, int], lanes: int | None, where: Path, fresh: bool):
    """A ``--lanes`` that differs from the width of a program's stored runs would mix widths in
    that program: refused, rather than silently overridden, when runs of it are still missing."""
    clash = sorted({widths[g.program] for g in todo if g.program in widths and lanes not in (None, widths[g.program])})
    if clash:
        raise ResultSetError(
            f"{where}: runs stored there were computed at lane width {', '.join(map(str, clash))}; --lanes {lanes} "
            "would compute the rest of their program at another width (a run's bits depend on it); "
            + (f"omit --lanes to keep it, or delete {where} to start the fresh computation over" if fresh else
               f"omit --lanes to keep it, or recompute every run with --fresh --lanes {lanes}"))


def _keep_rule(stored: ResultSet | None, meta: dict, sequential: dict | None, where: Path) -> None:
    """The stopping rule that chose a result set's seeds stays in its metadata: another rule on the
    same runs would make its looks and decisions a different procedure, so it is refused."""
    recorded = stored.meta.get(SEQUENTIAL) if stored is not None else None
    if recorded is not None and sequential is not None and recorded != sequential:
        keys = sorted(set(recorded) | set(sequential))
        differ = ", ".join(f"{k} {recorded.get(k)} → {sequential.get(k)}" for k in keys
                           if recorded.get(k) != sequential.get(k))
        raise ResultSetError(f"{where}: its seeds were chosen by another stopping rule ({differ}); give the same "
                             "--margin/--max-seeds/--round/--axis to continue it, or --results another folder")
    if sequential is not None or recorded is not None:
        meta[SEQUENTIAL] = sequential or recorded


def _timing_path() -> Path:
    return programs.cache_dir() / "timing.json"


def run_study(loaded, out: Path, *, lanes: int | None = None, fresh: bool = False,
              progress: Callable | None = None, on_wait: Callable | None = None, executor=None,
              checkpoint: Callable[[], None] | None = None, seeds_of: dict[str, list[int]] | None = None,
              sequential: dict | None = None, workers: int = 1) -> RunReport:
    """Compute every run of the study not already stored; write each group as it finishes.

    ``executor`` runs the groups elsewhere (a cluster); without one they run on this machine, in
    ``workers`` processes side by side (:class:`runtime.workers.LocalWorkers`; 1: in this
    process). Whatever runs them, this process stays the single writer of the result set, and a
    run's bits do not depend on the number of workers (XLA:CPU computes with one thread in each:
    :func:`runtime.environment.single_threaded_xla`, called here first).

    In this process (no ``executor``), the resource guard sees every group first: programs
    whose lanes would not fit the machine get a narrower width (unless ``lanes`` forces one), and
    a study that still does not fit raises :class:`runtime.guard.ResourceError` before anything
    is compiled. Programs with reused runs keep the width those were computed at.

    ``fresh`` recomputes every run without touching the stored ones until the whole study is
    computed: the new runs are written group by group into the staging folder
    (:data:`runtime.store.STAGING`) and replace the stored result set at the end. An interrupted
    fresh computation is resumed by the next ``fresh`` call.

    ``checkpoint()`` is called at safe points (between epochs, between groups, after each write,
    while waiting for the lock); it may raise (:class:`runtime.interrupt.Interrupted`) to stop.

    ``seeds_of`` (variant hash → seeds) and ``sequential`` (the stopping rule's record, with its
    ``round``) are how :func:`run_until_decided` runs one look: only those runs, at the widths of
    :func:`runtime.plan.plan`'s ``per_round``, the rule recorded in the metadata.

    ``progress(event, **info)`` receives ("plan", groups=…, runs=…, estimate=…), ("group", group=…,
    todo=…), ("epoch", group=…, done=…, total=…), ("stored", group=…, result=…)."""
    environment.single_threaded_xla()
    programs.enable_compile_cache()
    environment.check_settings()
    env = environment.capture()
    # Stored runs are reused when they match the environment that will compute the missing ones
    # (an executor's workers, when it says so), not necessarily this process's.
    env_fp = environment.env_hash(getattr(executor, "compute_environment", None) or env)
    path = result_dir(out, loaded.spec.study.name, loaded.study_hash)
    target = path / STAGING if fresh else path
    meta = study_meta(loaded, env)
    spec = loaded.spec
    headline = spec.study.metric
    seeds = spec.study.seed_list
    base_dir = Path(loaded.path).resolve().parent if loaded.path else Path.cwd()
    where = loaded.path or loaded.spec.study.name
    # Everything that can refuse the study (data, memory) is decided before the result set's
    # folder exists, from all runs (never from what is missing, so widths stay a function of
    # the program).
    shape = dict(seeds_of=seeds_of, per_round=sequential["round"] if sequential else None)
    groups = plan(loaded.variants, seeds, lanes=lanes, **shape)
    if executor is None:  # the memory checked is this machine's
        guard.check_data(groups, where=where, base_dir=base_dir)
    loaded_data: dict = {}
    data = datasets_for(groups, base_dir, loaded_data)
    budget = None
    if executor is None:
        budget = guard.lane_budget(groups, data)
        if lanes is None and any(g.lane_width > budget[g.program] for g in groups):
            groups = plan(loaded.variants, seeds, lane_budget=budget, **shape)
            data = datasets_for(groups, base_dir, loaded_data)
        one = guard.estimate(groups, data)
        guard.check(one, lanes_given=lanes is not None, where=where)
        # Each worker process holds its own data and group: no more workers than fit beside each other.
        workers = max(1, min(workers, guard.available_bytes() // one.peak_bytes))
    check = checkpoint or (lambda: None)
    with writer_lock(path, on_wait=on_wait, checkpoint=checkpoint):
        check()
        for folder in {path, target}:
            found = _stored(folder)
            if found is not None and found.study_hash != loaded.study_hash:
                raise ResultSetError(f"{folder}: holds study {found.study_hash[:12]}, not {loaded.study_hash[:12]}")
        stored = _stored(target)
        _keep_rule(stored, meta, sequential, target)
        done = set()
        if stored is not None:
            for rid, fp in zip(stored.runs.column("run_id").to_pylist(),
                               stored.runs.column("env_hash").to_pylist()):
                if fp == env_fp:
                    done.add(rid)
        # Programs with reused runs keep the width those were computed at.
        widths = _recorded_widths(stored, done)
        if widths:
            groups = plan(loaded.variants, seeds, lanes=lanes, lane_budget=budget, widths=widths, **shape)
            data = datasets_for(groups, base_dir, loaded_data)
        todo = _missing(groups, done)
        _refuse_other_width(todo, widths, lanes, target, fresh)
        estimate = preparation = calibration = None
        if executor is None:
            preparation = execute.preparation(todo, data, env)
            calibration = guard.Calibration.load(_timing_path())
            estimate = guard.estimate(todo, data, preparation=preparation, calibration=calibration,
                                      workers=workers, load=None)
        planned = sum(len(g.runs) for g in groups)
        if progress:
            progress("plan", groups=len(todo), runs=sum(len(g.runs) for g in todo), planned=planned,
                     estimate=estimate)
        key_columns = typed_key_columns(loaded.variants, varied_keys(loaded.variants))
        non_finite, warnings = 0, []
        compile_s = run_s = 0.0
        current = stored
        started = time.perf_counter()
        compiled, loaded_s, busy, run_cpu = [], [], {}, 0.0
        check()
        for g, result in (executor or LocalWorkers(workers, checkpoint=checkpoint)).run(todo, data, env, progress):
            if estimate is not None and preparation[g.group_id] != "reuse":
                (compiled if preparation[g.group_id] == "compile" else loaded_s).append(result.compile_cpu_seconds)
            runs_t, curves_t = group_tables(result, g, loaded.study_hash, headline, key_columns,
                                            data[g.group_id].data_hash)
            current = write_results(target, meta, runs_t, curves_t, previous=current)
            non_finite += sum(1 for lane in result.lanes if lane.non_finite_epoch is not None)
            warnings += [f"{lane.run_id}: {w}" for lane in result.lanes for w in lane.warnings]
            compile_s += result.compile_seconds
            run_s += result.run_seconds
            run_cpu += result.run_cpu_seconds
            busy[g.group_id] = result.compile_seconds + result.run_seconds
            if progress:
                progress("stored", group=g, result=result)
            check()
        if estimate is not None and todo:
            # What this invocation measured calibrates the next estimate on this machine, as
            # an idle core would have taken it: CPU seconds of the computing processes. Groups
            # that computed side by side overlap: what is left besides them is the elapsed time
            # less the busiest worker's, taken back to an idle machine by the load seen now.
            rest = time.perf_counter() - started - guard.schedule([busy[g.group_id] for g in todo], workers)
            rest /= guard.slowdown(processes=0)
            modelled = sum(guard.model_seconds(g, data[g.group_id]) for g in todo)
            calibration.updated(compiled=compiled, loaded=loaded_s, executed=(run_cpu, modelled),
                                other=(rest, len(todo))).save(_timing_path())
        if current is None:  # nothing to compute and nothing stored: an empty study cannot happen
            raise ResultSetError(f"{path}: nothing was computed")
        if fresh:  # the whole study is computed: it replaces the stored one
            write_results(path, meta, current.runs, current.curves, previous=None)
            shutil.rmtree(target)
        computed = sum(len(g.runs) for g in todo)
        return RunReport(path, planned, computed, planned - computed, non_finite, warnings, len(todo),
                         compile_s, run_s)


def run_until_decided(loaded, out: Path, rule, *, axis: str | None = None, **kw) -> tuple[list[RunReport], object]:
    """Run the study's seeds, then round after round the seeds the stopping rule asks for, until
    every question of the design is settled or the rule's maximum is reached
    (:mod:`runtime.sequential`, the questions of :func:`runtime.diff.sequential_design`).

    Each look is one :func:`run_study` of only the runs it needs (arms still open, the round's new
    seeds), so settled arms stop consuming compute and open ones share groups; the next
    look is found by replaying the rule over the stored runs. The rule's decisions at a look
    depend only on the runs of that look, so a killed procedure, run again, replays to where it
    stopped and continues with the same decisions and the same seeds. Returns the report of each
    look's runs and the replayed procedure (:class:`runtime.diff.Sequential`); ``kw`` goes to
    :func:`run_study` (lanes, executor, progress, checkpoint…)."""
    from runtime.diff import sequential_design

    spec = loaded.spec
    first = spec.study.seed_list
    record = {**rule.as_dict(), "first": first, "axis": axis, "metric": spec.study.metric}
    path = result_dir(out, spec.study.name, loaded.study_hash)
    seeds_of = {v.hash: first for v in loaded.variants}
    reports = []
    while True:
        reports.append(run_study(loaded, out, seeds_of=seeds_of, sequential=record, **kw))
        replayed = sequential_design(open_result_set(path), rule, first, axis=axis, metric=record["metric"])
        if not replayed.missing:
            return reports, replayed
        seeds_of = replayed.missing
