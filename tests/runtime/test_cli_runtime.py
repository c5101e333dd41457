"""The run/show/replay/diff commands as a user meets them: stdout, stderr, exit codes."""

import csv
import io
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from runtime.cli import app

ROOT = Path(__file__).resolve().parents[2]
runner = CliRunner()


def lesion(*args, env=None):
    return subprocess.run([sys.executable, "-m", "runtime.cli", *map(str, args)], capture_output=True, text=True,
                          cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT), **(env or {})}, timeout=300)


@pytest.fixture(scope="module")
def stored(tmp_path_factory, tiny_spec):
    tmp = tmp_path_factory.mktemp("cli")
    spec = tiny_spec(tmp, "clirun", seeds=3)
    out = lesion("run", spec, "--out", tmp / "r")
    assert out.returncode == 0, out.stderr
    return spec, Path(out.stdout.strip().splitlines()[-1]), out


def test_run_prints_only_the_result_set_path_on_stdout(stored):
    spec, path, out = stored
    assert out.stdout.strip().splitlines() == [str(path)]
    assert (path / "runs.parquet").exists() and (path / "curves.parquet").exists()
    assert "6 runs: 6 computed" in out.stderr
    check = json.loads(lesion("check", spec, "--format", "json").stdout)
    assert path.name == check["result_set"]


def test_quiet_rerun_computes_nothing_and_keeps_stdout_clean(stored):
    spec, path, _ = stored
    out = lesion("run", spec, "--out", path.parent, "--quiet")
    assert out.returncode == 0 and out.stderr == "" and out.stdout.strip() == str(path)


def test_show_formats_agree(stored):
    _, path, _ = stored
    as_json = json.loads(runner.invoke(app, ["show", str(path), "--format", "json"]).stdout)
    rows = as_json["rows"]
    assert [r["ok"] for r in rows] == [3, 3]
    as_csv = list(csv.DictReader(io.StringIO(runner.invoke(app, ["show", str(path), "-f", "csv"]).stdout)))
    assert [float(r["mean"]) for r in as_csv] == [r["mean"] for r in rows]
    md = runner.invoke(app, ["show", str(path), "-f", "markdown"]).stdout
    assert md.count("\n| optimizer.learning_rate=") == 2
    curves = json.loads(runner.invoke(app, ["show", str(path), "--curves", "-f", "json"]).stdout)["rows"]
    assert len(curves) == 2 * 3 and {"val_accuracy", "train_divergence"} <= set(curves[0])


def test_show_unknown_metric_is_a_clean_error(stored):
    _, path, _ = stored
    res = runner.invoke(app, ["show", str(path), "--metric", "val_rmse"])
    assert res.exit_code == 2 and "val_rmse" in res.stderr and "Traceback" not in res.output


def test_replay_cli_identical_and_json(stored):
    _, path, _ = stored
    out = lesion("replay", path, "--format", "json")
    assert out.returncode == 0, out.stderr
    doc = json.loads(out.stdout)
    assert doc["identical"] and doc["environment_changes"] == [] and len(doc["runs"]) == 6
    bad = lesion("replay", path, "--run", "nope")
    assert bad.returncode == 2 and "no run 'nope'" in bad.stderr and "Traceback" not in bad.stderr


def test_diff_cli_gate_and_formats(stored):
    _, path, _ = stored
    res = runner.invoke(app, ["diff", str(path), str(path), "--fail-on", "worse"])
    assert res.exit_code == 0, res.output
    assert "identical studies" in res.stdout and "no detectable change" in res.stdout
    md = runner.invoke(app, ["diff", str(path), "--baseline", "optimizer.learning_rate=0.03", "-f", "markdown"]).stdout
    assert md.splitlines()[2].startswith("| variant_a |")
    both = runner.invoke(app, ["diff", str(path)])
    assert both.exit_code == 2 and "--baseline" in both.stderr
    missing = runner.invoke(app, ["diff", str(path), str(path.parent / "absent")])
    assert missing.exit_code == 2 and "no such result set" in missing.stderr
