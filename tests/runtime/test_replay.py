"""Replay: stored runs re-executed in a fresh process compare bit for bit; tampering is caught."""

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from compiler.loader import load_study
from runtime.replay import ReplayRefused, bitwise_equal, replay
from runtime.runner import run_study
from runtime.store import open_result_set

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def stored(tmp_path_factory, tiny_spec):
    tmp = tmp_path_factory.mktemp("replay")
    report = run_study(load_study(tiny_spec(tmp, "rep", seeds=3)), tmp / "r")
    return report.path


def _copy(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst, ignore=shutil.ignore_patterns(".lock"))
    return dst


def test_bitwise_equal_rules():
    # NaN equals NaN, but −0.0 is not 0.0 (IEEE 754 bit patterns)
    a = np.array([np.nan, -0.0, 1.0], dtype=np.float32)
    b = np.array([np.nan, 0.0, 1.0], dtype=np.float32)
    assert bitwise_equal(a, b).tolist() == [True, False, True]


def test_replay_in_a_fresh_process_is_identical(stored):
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    out = subprocess.run([sys.executable, "-c",
                          "import json,sys; from runtime.replay import replay; r = replay(sys.argv[1]);"
                          "print(json.dumps([x.verdict for x in r.rows]))", str(stored)],
                         capture_output=True, text=True, env=env, cwd=ROOT, timeout=300)
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout.strip().splitlines()[-1]) == ["identical"] * 6


def test_single_run_of_a_wide_group_replays_at_its_width(stored):
    rs = open_result_set(stored)
    rid = rs.runs.column("run_id")[4].as_py()
    report = replay(stored, run=rid)
    assert [(r.run_id, r.lane_width, r.verdict) for r in report.rows] == [(rid, 6, "identical")]


def _rewrite(path: Path, table: pa.Table):
    pq.write_table(table, path)


def test_edited_canonical_json_is_refused(stored, tmp_path):
    copy = _copy(stored, tmp_path / "edited")
    for name in ("runs.parquet", "curves.parquet"):
        t = pq.read_table(copy / name)
        md = dict(t.schema.metadata)
        md[b"lesion.canonical_json"] = md[b"lesion.canonical_json"].replace(b'"epochs":3', b'"epochs":4')
        _rewrite(copy / name, t.replace_schema_metadata(md))
    with pytest.raises(ReplayRefused, match="does not hash"):
        replay(copy)


def test_changed_metric_cell_is_reported_as_differing(stored, tmp_path):
    copy = _copy(stored, tmp_path / "cell")
    t = pq.read_table(copy / "curves.parquet")
    col = t.column("val_divergence").to_numpy().copy()
    col[1] = np.nextafter(col[1], np.float32(np.inf), dtype=np.float32)  # one ulp
    t = t.set_column(t.schema.get_field_index("val_divergence"), "val_divergence", pa.array(col))
    _rewrite(copy / "curves.parquet", t)
    rid = t.column("run_id")[1].as_py()
    rows = {r.run_id: r for r in replay(copy).rows}
    assert rows[rid].verdict == "differs" and rows[rid].first_metric == "val_divergence"
    assert rows[rid].first_epoch == t.column("epoch")[1].as_py()
    assert 0 < rows[rid].max_abs < 1e-5
    assert sum(r.verdict == "differs" for r in rows.values()) == 1


def test_changed_environment_is_named(stored):
    # a lower instruction-set ceiling for XLA:CPU is a documented numerics change (measured.md)
    env = {**os.environ, "PYTHONPATH": str(ROOT), "XLA_FLAGS": "--xla_cpu_max_isa=SSE4_2"}
    out = subprocess.run([sys.executable, "-c",
                          "import sys; from runtime.replay import replay; r = replay(sys.argv[1]);"
                          "print('\\n'.join(r.environment_changes))", str(stored)],
                         capture_output=True, text=True, env=env, cwd=ROOT, timeout=300)
    assert out.returncode == 0, out.stderr
    assert "xla_flags: (unset) → --xla_cpu_max_isa=SSE4_2" in out.stdout
