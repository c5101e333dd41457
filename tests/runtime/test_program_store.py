"""Stored programs: a later invocation loads a program's compiled executables from the compile
cache without tracing, and gets the same bits as the invocation that compiled them."""

import dataclasses
import os
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pytest

from compiler import build
from compiler.loader import load_study
from runtime import environment, execute, programs
from runtime.plan import plan
from runtime.replay import replay
from runtime.runner import datasets_for, run_study
from runtime.store import open_result_set

TIMING = ["compile_seconds", "run_seconds", "finished_at"]


def _numbers(path) -> tuple[pa.Table, pa.Table]:
    rs = open_result_set(path)
    return rs.runs.drop_columns(TIMING), rs.curves


def _assert_same_bits(a, b):
    (runs_a, curves_a), (runs_b, curves_b) = _numbers(a), _numbers(b)
    assert runs_a.column("param_hash").to_pylist() == runs_b.column("param_hash").to_pylist()
    assert runs_a.equals(runs_b) and curves_a.equals(curves_b)


@pytest.fixture
def store(tmp_path, monkeypatch):
    """A compile cache of this test's own, and no programs compiled earlier in the process."""
    monkeypatch.setenv("LESION_CACHE_DIR", str(tmp_path / "cache"))
    monkeypatch.setattr(execute, "_programs", {})
    return tmp_path / "cache" / "programs"


def _untraceable(monkeypatch):
    """From now on a program's executables can only come from the store: tracing them fails."""
    real = build.compile_program

    def no_tracing(*args, **kwargs):
        def boom(*a, **k):
            raise AssertionError("traced although the programs were stored")
        return real(*args, **kwargs)._replace(init=boom, epoch=boom)

    monkeypatch.setattr(build, "compile_program", no_tracing)


def test_a_later_run_loads_the_programs_without_tracing_and_gets_the_same_bits(tmp_path, tiny_spec, store, monkeypatch):
    loaded = load_study(tiny_spec(tmp_path, "ember", seeds=2, epochs=2))
    first = run_study(loaded, tmp_path / "a").path
    assert len(list(store.glob("*.pkl"))) == 1  # one program, one entry holding init and epoch
    monkeypatch.setattr(execute, "_programs", {})
    _untraceable(monkeypatch)
    second = run_study(loaded, tmp_path / "b").path
    _assert_same_bits(first, second)


def test_a_damaged_entry_is_compiled_again_and_rewritten(tmp_path, tiny_spec, store, monkeypatch):
    loaded = load_study(tiny_spec(tmp_path, "ember", seeds=2, epochs=2))
    first = run_study(loaded, tmp_path / "a").path
    [entry] = store.glob("*.pkl")
    entry.write_bytes(b"not a program")
    monkeypatch.setattr(execute, "_programs", {})
    second = run_study(loaded, tmp_path / "b").path
    _assert_same_bits(first, second)
    assert entry.read_bytes() != b"not a program" and programs.load_programs(entry) is not None


def test_the_entry_name_follows_sources_environment_width_and_zero_knobs(tmp_path, tiny_spec):
    loaded = load_study(tiny_spec(tmp_path, "ember", seeds=2, epochs=2))
    [group] = plan(loaded.variants, loaded.spec.study.seed_list)
    data = datasets_for([group], tmp_path, {})[group.group_id]
    env = environment.capture()

    def name(g=group, env=env, zero=frozenset()):
        return programs.program_path(g, data, zero, env).name

    base = name()
    assert name() == base
    assert name(g=dataclasses.replace(group, lane_width=2 * group.lane_width)) != base
    assert name(env=dict(env, xla_flags="--xla_cpu_max_isa=SSE4_2")) != base
    assert name(env=dict(env, jax="0.0.0")) != base
    assert name(zero=frozenset({"regularization.weight_decay"})) != base
    assert name(env=dict(env, lesion_sources="0" * 16)) != base  # an edited or upgraded lesion


def test_replay_never_takes_a_stored_program(tmp_path, tiny_spec, store, monkeypatch):
    loaded = load_study(tiny_spec(tmp_path, "ember", seeds=2, epochs=2))
    path = run_study(loaded, tmp_path / "a").path
    monkeypatch.setattr(programs, "load_programs", lambda p: pytest.fail("replay loaded a stored program"))
    report = replay(path)
    assert report.identical


def test_a_second_process_loads_the_stored_programs_with_the_same_bits(tmp_path, tiny_spec):
    spec = tiny_spec(tmp_path, "ember", seeds=2, epochs=2)
    env = dict(os.environ, LESION_CACHE_DIR=str(tmp_path / "cache"))
    outs = []
    for name in ("a", "b"):
        done = subprocess.run([sys.executable, "-m", "runtime.cli", "run", str(spec), "--quiet", "--results",
                               str(tmp_path / name)], env=env, capture_output=True, text=True, timeout=300)
        assert done.returncode == 0, done.stderr
        outs.append(done.stdout.strip().splitlines()[-1])
    assert len(list((tmp_path / "cache" / "programs").glob("*.pkl"))) == 1
    _assert_same_bits(*outs)


def test_the_least_recently_used_entries_go_first_when_the_cache_is_over_its_limit(tmp_path):
    folder = tmp_path / "programs"
    folder.mkdir()
    for i, name in enumerate("abcde"):
        entry = folder / f"{name}.pkl"
        entry.write_bytes(b"x" * 1000)
        os.utime(entry, (1_000_000 + i, 1_000_000 + i))  # a is the least recently used
    os.utime(folder / "b.pkl", (2_000_000, 2_000_000))  # b was just loaded
    (folder / ".tmp-killed").write_bytes(b"half an entry")       # a write killed long ago
    os.utime(folder / ".tmp-killed", (1_000_000, 1_000_000))
    (folder / ".tmp-writing").write_bytes(b"another process")   # a write in progress
    programs.prune(folder, limit=2500, keep=folder / "a.pkl")
    assert sorted(p.name for p in folder.glob("*.pkl")) == ["a.pkl", "b.pkl"]  # a: just written
    assert sorted(p.name for p in folder.glob(".tmp-*")) == [".tmp-writing"]


def test_loading_an_entry_marks_it_used(tmp_path, tiny_spec, store):
    loaded = load_study(tiny_spec(tmp_path, "ember", seeds=2, epochs=2))
    run_study(loaded, tmp_path / "a")
    [entry] = store.glob("*.pkl")
    os.utime(entry, (1_000_000, 1_000_000))
    assert programs.load_programs(entry) is not None
    assert entry.stat().st_mtime > 1_000_000


@pytest.mark.parametrize("value", ["abc", "0", "-5", "inf", "nan"])
def test_an_unusable_cache_limit_is_a_one_line_error_before_anything_runs(tmp_path, tiny_spec, value):
    spec = tiny_spec(tmp_path, "ember", seeds=2, epochs=2)
    env = dict(os.environ, LESION_CACHE_DIR=str(tmp_path / "cache"), LESION_CACHE_MAX_MB=value)
    done = subprocess.run([sys.executable, "-m", "runtime.cli", "run", str(spec), "--results", str(tmp_path / "r")],
                          env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 2 and "Traceback" not in done.stderr
    [line] = done.stderr.strip().splitlines()
    assert f"LESION_CACHE_MAX_MB='{value}'" in line and "LESION_CACHE_MAX_MB=2048" in line
    assert not (tmp_path / "r").exists()
