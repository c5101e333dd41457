"""The resource guard (runtime/guard.py): its time model against the grids measured on this
machine, its memory model against the operating system's own accounting, narrower lanes when a
program would not fit, and a one-line refusal (exit 2) naming the knob to turn."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from compiler.expand import expand
from compiler.loader import load_study
from compiler.spec import Spec
from runtime import guard, runner
from runtime.plan import plan
from runtime.store import open_result_set

ROOT = Path(__file__).parents[2]


def _grid(samples, features, hidden, classes, batch, epochs, lanes=None):
    spec = Spec.model_validate({
        "study": {"name": "timing", "seeds": 4},
        "data": {"generator": "blobs", "samples": samples, "features": features, "classes": classes},
        "model": {"hidden": hidden},
        "optimizer": {"kind": "sgd", "momentum": 0.9},
        "training": {"epochs": epochs, "batch_size": batch},
        "ablation": {"axis": [{"key": "optimizer.learning_rate", "values": [0.01, 0.03, 0.1, 0.3]}]},
    })
    variants = expand(spec)
    groups = plan(variants, spec.study.seed_list, lanes=lanes)
    return groups, runner.datasets_for(groups, ROOT)


@pytest.mark.parametrize("shape, measured", [
    # Measured on a 2-core machine (jax 0.10.2, CPU), 2026-12-01: the 16-run grid (4 learning
    # rates × 4 seeds, SGD momentum 0.9) as one fused program (vmap × scan), execution only.
    ((2048, 16, [32, 32], 4, 64, 20), 0.7),
    ((10240, 32, [128, 128], 10, 128, 10), 7.3),
])
def test_time_model_is_within_a_factor_two_of_the_measured_grids(shape, measured):
    groups, data = _grid(*shape)
    assert [g.lane_width for g in groups] == [16]
    seconds = guard.estimate(groups, data).seconds - guard.COMPILE_SECONDS
    assert measured / 2 <= seconds <= measured * 2, seconds


def test_groups_are_handed_out_to_the_first_free_worker():
    # List scheduling (Graham 1966): jobs in order, each to the worker that is free first.
    assert guard.schedule([3.0, 1.0, 1.0, 1.0], 2) == 3.0
    assert guard.schedule([1.0, 1.0, 1.0], 1) == 3.0
    assert guard.schedule([2.0, 2.0], 8) == 2.0


def test_the_time_estimate_with_workers_is_the_busiest_workers_wall_time():
    # The 16-run grid at 4 lanes: 4 groups of one program. One process compiles once and runs
    # the groups one after another; on 2 workers each worker compiles (the cache is empty when
    # both start) and runs 2 groups; with the program cached, each worker loads it instead.
    groups, data = _grid(2048, 16, [32, 32], 4, 64, 20, lanes=4)
    assert len(groups) == 4
    cal = guard.Calibration(compile_seconds=2.0, load_seconds=0.1, execute_ratio=1.0, group_seconds=0.05)
    run = guard.model_seconds(groups[0], data[groups[0].group_id])
    one = guard.estimate(groups, data, calibration=cal)
    assert one.seconds == pytest.approx(2.0 + 4 * run + 4 * 0.05) and one.workers == 1
    two = guard.estimate(groups, data, calibration=cal, workers=2, cores=2)
    assert two.seconds == pytest.approx(2.0 + 2 * run + 4 * 0.05) and two.workers == 2
    loads = {g.group_id: "load" for g in groups}
    cached = guard.estimate(groups, data, calibration=cal, workers=2, preparation=loads, cores=2)
    assert cached.seconds == pytest.approx(0.1 + 2 * run + 4 * 0.05)
    assert guard.estimate(groups, data, calibration=cal, workers=16, cores=16).seconds == pytest.approx(
        2.0 + run + 4 * 0.05)
    # More worker processes than cores share them.
    assert guard.estimate(groups, data, calibration=cal, workers=4, cores=2).seconds == pytest.approx(
        2 * (2.0 + run + 4 * 0.05))
    # One group stays in this process whatever the workers (runtime.workers).
    assert guard.estimate(groups[:1], data, calibration=cal, workers=2).workers == 1


def test_per_lane_memory_grows_with_the_validation_split():
    # Each lane gathers and standardizes its own validation rows (compiler/build.py contract),
    # so a lane needs at least n_val × features float32 of them.
    groups, data = _grid(40_000, 32, [16], 3, 64, 1)
    n_val = 40_000 // 4
    per_lane = guard.per_lane_bytes(groups[0], data[groups[0].group_id])
    assert per_lane >= 4 * n_val * 32
    est = guard.estimate(groups, data)
    assert est.data_bytes == 2 * (data[groups[0].group_id].x.nbytes + data[groups[0].group_id].y.nbytes)
    assert est.peak_bytes == guard.RUNTIME_BYTES + est.data_bytes + int(guard.XLA_SLACK * 16 * per_lane)


def test_lane_budget_gives_the_widest_that_fits():
    groups, data = _grid(2048, 16, [32, 32], 4, 64, 1)
    g = groups[0]
    d = data[g.group_id]
    per_lane = guard.per_lane_bytes(g, d)
    fixed = guard.RUNTIME_BYTES + 2 * (d.x.nbytes + d.y.nbytes)
    for lanes in (1, 3, 7):
        budget = fixed + int(guard.XLA_SLACK * per_lane * lanes) + 1
        assert guard.lane_budget(groups, data, budget) == {g.program: lanes}
    assert guard.lane_budget(groups, data, 0) == {g.program: 1}


def test_this_machines_memory_matches_the_operating_system():
    # os.sysconf reports the physical pages the kernel manages, as /proc/meminfo's MemTotal does.
    physical = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    assert 0 < guard.available_bytes() <= guard.total_bytes() <= physical * 1.01
    assert guard.memory_budget() == int(guard.BUDGET_SHARE * guard.total_bytes())


def test_check_passes_what_fits_and_names_the_lanes_knob_otherwise():
    est = guard.Estimate(peak_bytes=guard.RUNTIME_BYTES + 100 + int(guard.XLA_SLACK * 8 * 1000),
                         data_bytes=100, lane_bytes=1000, lanes=8, seconds=90)
    guard.check(est, lanes_given=True, where="s.toml", available=est.peak_bytes)
    room = guard.RUNTIME_BYTES + 100 + int(guard.XLA_SLACK * 3 * 1000)
    with pytest.raises(guard.ResourceError) as err:
        guard.check(est, lanes_given=True, where="s.toml", available=room)
    assert str(err.value).startswith("s.toml: needs about ")
    assert "~2 min" in str(err.value) and "run with --lanes 3" in str(err.value) and "\n" not in str(err.value)
    with pytest.raises(guard.ResourceError, match="even one lane does not fit: lower training.batch_size"):
        guard.check(est, lanes_given=False, where="s.toml", available=guard.RUNTIME_BYTES)


@pytest.fixture(scope="module")
def narrowed(tmp_path_factory, tiny_spec):
    """The tiny study (6 runs of one program) run with a memory budget that fits 2 lanes."""
    tmp = tmp_path_factory.mktemp("narrow")
    loaded = load_study(tiny_spec(tmp, "narrow"))
    groups = plan(loaded.variants, loaded.seeds)
    data = runner.datasets_for(groups, tmp)
    d = data[groups[0].group_id]
    budget = (guard.RUNTIME_BYTES + 2 * (d.x.nbytes + d.y.nbytes)
              + int(guard.XLA_SLACK * guard.per_lane_bytes(groups[0], d) * 2.5))
    mp = pytest.MonkeyPatch()
    mp.setattr(guard, "memory_budget", lambda: budget)
    events = []
    try:
        first = runner.run_study(loaded, tmp / "r", progress=lambda e, **info: events.append((e, info)))
        again = runner.run_study(loaded, tmp / "r")
    finally:
        mp.undo()
    return loaded, first, again, events


def test_a_program_that_does_not_fit_gets_narrower_lanes(narrowed):
    loaded, first, again, events = narrowed
    rs = open_result_set(first.path)
    assert set(rs.runs.column("lane_width").to_pylist()) == {2}
    assert first.groups == 3 and first.computed == 6
    # The budget depends on the machine, not on what is missing: a re-run reuses every run.
    assert again.computed == 0 and again.reused == 6
    plan_event = next(info for e, info in events if e == "plan")
    assert plan_event["estimate"].lanes == 2


def test_a_study_that_cannot_fit_is_refused_before_compiling(tmp_path, tiny_spec, monkeypatch):
    loaded = load_study(tiny_spec(tmp_path, "refused"))
    # Enough to generate its 240 × 4 data set (float64 while drawn), not enough for one lane.
    monkeypatch.setattr(guard, "available_bytes", lambda: guard.RUNTIME_BYTES + 12 * 240 * 5 + 10)
    t0 = time.perf_counter()
    with pytest.raises(guard.ResourceError, match="even one lane does not fit"):
        runner.run_study(loaded, tmp_path / "r")
    assert time.perf_counter() - t0 < 5  # no compile happened (a compile takes seconds here)
    assert not list((tmp_path / "r").rglob("*.parquet"))


@pytest.mark.parametrize("sections, fragment", [
    # 65,536² weights per layer: tens of GB per lane, more than this 24 GB machine has.
    ("[model]\nhidden = [65536, 65536]\n", "even one lane does not fit: lower training.batch_size"),
    ("[data]\nsamples = 50000000\nfeatures = 4096\n", "lower data.samples or data.features"),
])
def test_lesion_run_refuses_with_one_line_and_exit_2(tmp_path, sections, fragment):
    spec = tmp_path / "big.toml"
    spec.write_text('[study]\nname = "big"\nseeds = 2\n' + sections)
    out = subprocess.run([sys.executable, "-m", "runtime.cli", "run", str(spec), "--results", str(tmp_path / "r")],
                         cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert out.returncode == 2, out.stderr
    assert "Traceback" not in out.stderr and out.stdout == ""
    (line,) = [x for x in out.stderr.splitlines() if x.strip()]
    assert line.startswith(f"{spec}: ") and fragment in line and " is available" in line, line


@pytest.mark.slow
def test_memory_model_bounds_the_measured_peak(tmp_path):
    # The kernel's peak resident set (getrusage ru_maxrss) of a real run must stay under the
    # estimate, and the estimate within 3× of it (a guard that refuses everything is no guard).
    spec = tmp_path / "probe.toml"
    spec.write_text(textwrap.dedent("""\
        [study]
        name = "probe"
        seeds = 8
        [data]
        generator = "blobs"
        samples = 200000
        features = 32
        classes = 3
        [model]
        hidden = [256, 256]
        [optimizer]
        kind = "adam"
        [training]
        epochs = 1
        batch_size = 512
        """))
    code = textwrap.dedent(f"""\
        import resource
        from pathlib import Path
        from compiler.loader import load_study
        from runtime import guard, runner
        from runtime.plan import plan
        st = load_study({str(spec)!r})
        groups = plan(st.variants, st.seeds)
        est = guard.estimate(groups, runner.datasets_for(groups, Path({str(tmp_path)!r})))
        runner.run_study(st, Path({str(tmp_path / 'r')!r}))
        print(est.peak_bytes, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024)
        """)
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, check=True)
    estimate, peak = map(int, out.stdout.split())
    assert peak <= estimate <= 3 * peak, (estimate, peak)


# ── memory limits and data files that expand ────────────────────────────────────────────────────
@pytest.mark.parametrize("files, expected", [
    # Linux kernel docs, cgroup-v2.rst: memory.max ("max" = no limit) and memory.current
    ({"memory.max": "1073741824\n", "memory.current": "104857600\n"}, (2**30, 100 * 2**20)),
    ({"memory.max": "max\n", "memory.current": "104857600\n"}, None),
    # cgroup-v1/memory.rst: memory.limit_in_bytes and memory.usage_in_bytes, "no limit" written as
    # the largest page-aligned int64 (9223372036854771712, from memory of what kernels print)
    ({"memory/memory.limit_in_bytes": "536870912\n", "memory/memory.usage_in_bytes": "52428800\n"},
     (2**29, 50 * 2**20)),
    ({"memory/memory.limit_in_bytes": "9223372036854771712\n", "memory/memory.usage_in_bytes": "1\n"}, None),
])
def test_cgroup_v1_and_v2_memory_limits_are_read(tmp_path, files, expected):
    for name, text in files.items():
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_text(text)
    assert guard._cgroup(str(tmp_path)) == expected


def test_a_compressed_npz_bomb_is_refused_from_its_headers_before_loading(tmp_path, monkeypatch):
    import numpy as np

    import compiler.data
    # 2**25 float64 zeros: 256 MiB in memory, a few hundred KB deflated (numpy.savez_compressed).
    np.savez_compressed(tmp_path / "bomb.npz", x=np.zeros(2**25), y=np.zeros(2**25, np.int8))
    assert (tmp_path / "bomb.npz").stat().st_size < 2**20
    spec = expand(Spec.model_validate({"study": {"name": "bomb"}, "data": {"kind": "file", "path": "bomb.npz"}}))
    groups = plan(spec, [0])
    monkeypatch.setattr(np, "load", lambda *a, **k: pytest.fail("the guard decompressed the data"))
    # the arrays as stored (8 + 1 bytes a row) plus 20 bytes per feature value while converting
    need = guard.RUNTIME_BYTES + 2**25 * (8 + 1) + 20 * 2**25
    with pytest.raises(guard.ResourceError, match=r"data.path = bomb.npz needs about 1.4 GB .* just to load"):
        guard.check_data(groups, where="s.toml", base_dir=tmp_path, available=need - 1)
    guard.check_data(groups, where="s.toml", base_dir=tmp_path, available=need)
    assert compiler.data.inspect_file(spec[0].spec.data, tmp_path).rows == 2**25

def test_the_time_estimate_is_calibrated_by_what_runs_measured_on_this_machine(tmp_path, tiny_spec, monkeypatch):
    # The estimate was 2-3× low on a busy machine (issue 14): each run stores what it measured,
    # and the next estimate is built from it. What is stored is CPU time of the computing
    # process (what an idle core takes), recorded per group by execute; the wall times the
    # result set keeps (runs.parquet: compile_seconds, run_seconds) are at least as long.
    from runtime import execute

    monkeypatch.setenv("LESION_CACHE_DIR", str(tmp_path / "cache"))
    monkeypatch.setattr(execute, "_programs", {})  # this process has compiled nothing yet
    seen = []
    execute_group = execute.execute_group
    monkeypatch.setattr(execute, "execute_group", lambda *a, **k: seen.append(execute_group(*a, **k)) or seen[-1])
    loaded = load_study(tiny_spec(tmp_path, "calibrate"))
    groups = plan(loaded.variants, loaded.seeds)
    data = runner.datasets_for(groups, tmp_path)
    modelled = sum(guard.model_seconds(g, data[g.group_id]) for g in groups)
    runner.run_study(loaded, tmp_path / "a")
    stored = guard.Calibration.load(tmp_path / "cache" / "timing.json")
    assert stored.runs == 1 and len(seen) == len(groups) == 1
    assert 0 < stored.compile_seconds == pytest.approx(seen[0].compile_cpu_seconds)
    assert stored.execute_ratio == pytest.approx(seen[0].run_cpu_seconds / modelled)

    # A second process: the programs are in the compile cache, so the estimate counts a load,
    # at the machine's load now.
    monkeypatch.setattr(execute, "_programs", {})
    monkeypatch.setattr(guard.os, "getloadavg", lambda: (0.0, 0.0, 0.0))
    events = []
    runner.run_study(loaded, tmp_path / "b", progress=lambda e, **info: events.append((e, info)))
    est = next(info["estimate"] for e, info in events if e == "plan")
    assert est.busy == 1.0
    assert est.seconds == pytest.approx(stored.execute_ratio * modelled + stored.load_seconds
                                        + stored.group_seconds * len(groups))
    assert guard.Calibration.load(tmp_path / "cache" / "timing.json").runs == 2


def test_a_busy_machine_lengthens_the_estimate_and_says_so():
    # A process gets (cores ÷ runnable processes) of a core when more want one than there are
    # (common practice: the load average counts runnable processes, Linux proc(5) loadavg).
    assert guard.slowdown(1, load=0.0, cores=2) == 1.0
    assert guard.slowdown(2, load=1.0, cores=2) == 1.5
    assert guard.slowdown(1, load=19.0, cores=2) == 10.0
    groups, data = _grid(2048, 16, [32, 32], 4, 64, 20)
    idle = guard.estimate(groups, data, load=0.0, cores=2)
    busy = guard.estimate(groups, data, load=19.0, cores=2)
    assert busy.seconds == pytest.approx(10 * idle.seconds)
    assert "busy" not in idle.describe()
    assert busy.describe().endswith("(the machine is busy: load average 19.0 on 2 cores)")
