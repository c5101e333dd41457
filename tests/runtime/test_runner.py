"""End to end on tiny studies: run → result set → reading it back without lesion."""

import json
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

from compiler.loader import load_study
from runtime.runner import run_study
from runtime.store import ResultSetError, open_result_set


@pytest.fixture(scope="module")
def tiny_run(tmp_path_factory, tiny_spec):
    tmp = tmp_path_factory.mktemp("tiny")
    loaded = load_study(tiny_spec(tmp))
    report = run_study(loaded, tmp / "results")
    return loaded, report, open_result_set(report.path)


def test_result_set_has_every_run_and_epoch(tiny_run):
    loaded, report, rs = tiny_run
    assert report.planned == report.computed == 6 and report.non_finite == 0
    assert rs.runs.num_rows == 6
    assert rs.curves.num_rows == 6 * 3
    assert sorted(set(rs.runs.column("run_id").to_pylist())) == sorted(
        f"{v.hash[:16]}-s{s}" for v in loaded.variants for s in loaded.seeds)
    for col in ("study_hash", "variant_hash", "variant_label", "optimizer__learning_rate", "seed",
                "lane_width", "group_id", "program", "status", "non_finite_epoch", "final_val_accuracy",
                "best_val_accuracy", "param_hash", "compile_seconds", "run_seconds"):
        assert col in rs.runs.column_names, col
    assert set(rs.runs.column("status").to_pylist()) == {"ok"}
    assert rs.runs.column("optimizer__learning_rate").to_pylist().count(0.3) == 3


def test_hashes_equal_check_and_metadata_is_complete(tiny_run):
    loaded, report, rs = tiny_run
    assert rs.study_hash == loaded.study_hash
    assert set(rs.runs.column("study_hash").to_pylist()) == {loaded.study_hash}
    assert set(rs.runs.column("variant_hash").to_pylist()) == {v.hash for v in loaded.variants}
    assert rs.meta["spec_source"] == loaded.source
    env = rs.meta["environment"]
    for key in ("python", "jax", "jaxlib", "optax", "numpy", "xla_flags", "jax_threefry_partitionable",
                "cpu_model", "cpu_isa", "cores", "os"):
        assert key in env, key
    assert report.path.name == loaded.result_set


def test_opens_in_plain_pyarrow_and_pandas(tiny_run):
    _, report, _ = tiny_run
    pd = pytest.importorskip("pandas")
    runs = pd.read_parquet(report.path / "runs.parquet")
    curves = pd.read_parquet(report.path / "curves.parquet")
    assert len(runs) == 6 and len(curves) == 18
    md = pq.read_schema(report.path / "runs.parquet").metadata
    assert json.loads(md[b"lesion.environment"])["jax"]
    # the last curve epoch is the run's final value
    last = curves[curves.epoch == 3].set_index("run_id")["val_accuracy"]
    np.testing.assert_array_equal(runs.set_index("run_id").loc[last.index, "final_val_accuracy"], last)


def test_arms_with_the_same_seed_start_from_the_same_parameters(tiny_run, tmp_path):
    # paired comparison: the init stream depends on the seed only, not on the knobs
    from compiler.build import compile_program, knob_vector, seed_key
    from compiler.data import load_data
    import jax

    loaded, _, _ = tiny_run
    a, b = loaded.variants
    data = load_data(a.spec, Path("."))
    pa_, pb_ = compile_program([a.spec], data), compile_program([b.spec], data)
    ca = pa_.init(knob_vector(a.spec), seed_key(1), data.x, data.y)
    cb = pb_.init(knob_vector(b.spec), seed_key(1), data.x, data.y)
    for x, y in zip(jax.tree.leaves(pa_.params(ca)), jax.tree.leaves(pb_.params(cb))):
        np.testing.assert_array_equal(x, y)


def test_resume_computes_nothing_when_complete(tiny_run):
    loaded, report, rs = tiny_run
    again = run_study(loaded, report.path.parent)
    assert again.computed == 0 and again.reused == 6
    assert open_result_set(report.path).runs.column("finished_at").to_pylist() == rs.runs.column("finished_at").to_pylist()


def test_runs_of_other_lesion_sources_are_recomputed_and_replay_names_the_change(tmp_path, tiny_spec, monkeypatch):
    # lesion's own code decides bits as much as jax does (a new shuffle changes every run), so
    # a result set is never completed with runs of another lesion
    from runtime import environment
    from runtime.replay import replay
    loaded = load_study(tiny_spec(tmp_path, "kiln", seeds=2, epochs=2))
    first = run_study(loaded, tmp_path / "r")
    old = environment.source_hash()
    monkeypatch.setattr(environment, "source_hash", lambda: "f" * 16)
    again = run_study(loaded, tmp_path / "r")
    assert again.computed == first.planned and again.reused == 0
    assert set(open_result_set(again.path).runs.column("env_hash").to_pylist()) == {
        environment.env_hash(environment.capture())}
    monkeypatch.setattr(environment, "source_hash", lambda: old)
    report = replay(again.path)
    assert f"lesion_sources: {'f' * 16} → {old}" in report.environment_changes
    assert report.identical  # the same code in fact: the bits agree, and the change is named


def test_a_run_in_a_wide_group_equals_it_alone_at_the_same_width(tmp_path, tiny_spec):
    # measured fact: bits depend on the lane width, not on neighbours — so a study of one run
    # executed at the big study's width reproduces it exactly
    big = load_study(tiny_spec(tmp_path, "wide", seeds=8, rates="[0.03, 0.1]"))
    rep_big = run_study(big, tmp_path / "r")
    rs_big = open_result_set(rep_big.path)
    assert set(rs_big.runs.column("lane_width").to_pylist()) == {16}
    one = load_study(tiny_spec(tmp_path, "one", seeds="[5]", rates="[0.1]"))
    rep_one = run_study(one, tmp_path / "r", lanes=16)
    rs_one = open_result_set(rep_one.path)
    rid = rs_one.runs.column("run_id")[0].as_py()
    big_row = rs_big.runs.to_pandas().set_index("run_id").loc[rid]
    one_row = rs_one.runs.to_pandas().set_index("run_id").loc[rid]
    assert big_row.param_hash == one_row.param_hash
    cb = rs_big.curves.to_pandas().query("run_id == @rid").drop(columns=["variant_label"]).reset_index(drop=True)
    co = rs_one.curves.to_pandas().query("run_id == @rid").drop(columns=["variant_label"]).reset_index(drop=True)
    np.testing.assert_array_equal(cb.to_numpy(), co.to_numpy())


def test_a_divergent_arm_is_marked_and_the_others_finish(tmp_path, tiny_spec):
    loaded = load_study(tiny_spec(tmp_path, "boom", seeds=2, epochs=4, rates="[0.05, 1e5]"))
    report = run_study(loaded, tmp_path / "r")
    rs = open_result_set(report.path).runs.to_pandas()
    bad = rs[rs["optimizer__learning_rate"] == 1e5]
    good = rs[rs["optimizer__learning_rate"] == 0.05]
    assert (bad.status == "non_finite").all() and bad.non_finite_epoch.between(1, 4).all()
    assert (good.status == "ok").all() and good.final_val_accuracy.notna().all()
    assert report.non_finite == 2


class _KilledAfter:
    """A progress callback that stops the run (as a kill would) once `groups` groups are stored."""

    def __init__(self, groups: int):
        self.left = groups

    def __call__(self, event, **info):
        if event == "stored":
            self.left -= 1
            if self.left == 0:
                raise SystemExit("killed")


def _digests(path) -> dict:
    runs = open_result_set(path).runs
    return dict(zip(runs.column("run_id").to_pylist(), zip(runs.column("param_hash").to_pylist(),
                                                            runs.column("lane_width").to_pylist())))


def test_an_interrupted_fresh_run_keeps_every_stored_run_until_the_study_is_complete(tmp_path, tiny_spec):
    loaded = load_study(tiny_spec(tmp_path, "renew", seeds=3, epochs=2))
    first = run_study(loaded, tmp_path / "r", lanes=2)
    before = (first.path / "runs.parquet").read_bytes()
    with pytest.raises(SystemExit):
        run_study(loaded, tmp_path / "r", lanes=2, fresh=True, progress=_KilledAfter(1))
    assert (first.path / "runs.parquet").read_bytes() == before  # all 6 stored runs, untouched
    again = run_study(loaded, tmp_path / "r", lanes=2, fresh=True)
    assert (again.computed, again.reused) == (4, 2)  # the interrupted fresh run's group is not redone
    assert _digests(again.path) == _digests(first.path)
    assert not (again.path / ".fresh").exists()


def test_resume_keeps_the_lane_width_the_stored_runs_were_computed_at(tmp_path, tiny_spec):
    # README, Reproducibility: bits depend on the lane width, so resume reuses the recorded one
    loaded = load_study(tiny_spec(tmp_path, "narrow", seeds=3, epochs=2))
    clean = run_study(loaded, tmp_path / "clean", lanes=2)
    with pytest.raises(SystemExit):
        run_study(loaded, tmp_path / "r", lanes=2, progress=_KilledAfter(1))
    with pytest.raises(ResultSetError, match=r"computed at lane width 2; --lanes 3 would compute"):
        run_study(loaded, tmp_path / "r", lanes=3)
    resumed = run_study(loaded, tmp_path / "r")  # no --lanes: 6 would be the default width
    assert (resumed.computed, resumed.reused) == (4, 2)
    assert _digests(resumed.path) == _digests(clean.path)
    assert run_study(loaded, tmp_path / "r", lanes=3).computed == 0  # complete: nothing to mix
