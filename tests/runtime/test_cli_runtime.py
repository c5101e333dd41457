"""The run/show/replay/diff commands as a user meets them: stdout, stderr, exit codes."""

import csv
import io
import json
import os
import subprocess
import sys
from pathlib import Path

import pyarrow.parquet as pq
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
    out = lesion("run", spec, "--results", tmp / "r")
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
    out = lesion("run", spec, "--results", path.parent, "--quiet")
    assert out.returncode == 0 and out.stderr == "" and out.stdout.strip() == str(path)


def test_show_formats_agree(stored):
    _, path, _ = stored
    as_json = json.loads(runner.invoke(app, ["show", str(path), "--format", "json"]).stdout)
    rows = as_json["rows"]
    assert [r["ok"] for r in rows] == [3, 3]
    as_csv = list(csv.DictReader(io.StringIO(runner.invoke(app, ["show", str(path), "-f", "csv"]).stdout)))
    assert [float(r["mean"]) for r in as_csv] == [r["mean"] for r in rows]
    md = runner.invoke(app, ["show", str(path), "-f", "markdown"]).stdout
    assert md.count("\n| 0.03 ") == md.count("\n| 0.3 ") == 1
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
    both = runner.invoke(app, ["diff", str(path), str(path), "--baseline", "optimizer.learning_rate=0.03"])
    assert both.exit_code == 2 and "--baseline" in both.stderr
    alone = runner.invoke(app, ["diff", str(path)])   # one result set: the questions of its design
    assert alone.exit_code == 0 and "does optimizer.learning_rate matter?" in alone.stdout
    missing = runner.invoke(app, ["diff", str(path), str(path.parent / "absent")])
    assert missing.exit_code == 2 and "no such result set" in missing.stderr


@pytest.mark.parametrize("width", [80, 120, 200])
def test_tables_fit_the_terminal(stored, width):
    spec, path, _ = stored
    env = {"COLUMNS": str(width)}
    for args in (["show", str(path)], ["show", str(path), "--curves"], ["check", str(spec)],
                 ["diff", str(path), "--baseline", "optimizer.learning_rate=0.03"], ["diff", str(path), str(path)]):
        res = runner.invoke(app, args, env=env)
        assert res.exit_code == 0, res.output
        assert max(map(len, res.stdout.splitlines())) <= width, (args, res.stdout)
        # A generated label already says what changed; nothing spends columns on repeating that.
        assert "(as the label says)" not in res.stdout
    wide = runner.invoke(app, ["show", str(path), "--wide"], env={"COLUMNS": "80"}).stdout
    assert max(map(len, wide.splitlines())) > 80 and "val_divergence_sd" in wide and "execution_seconds" in wide


@pytest.mark.parametrize("given", ["optimizer.learning_rate=0.03", "0", "learning_rate=0.03", "0.03", "base"])
def test_baseline_by_label_short_label_index_or_base(stored, given):
    # The tiny study's base sets learning_rate = 0.1, which no grid cell has: 'base' is refused
    # there; every other way names variant 0.
    _, path, _ = stored
    res = runner.invoke(app, ["diff", str(path), "--baseline", given, "-f", "json"])
    if given == "base":
        assert res.exit_code == 2 and "no variant equals the base configuration" in res.stderr
        return
    assert res.exit_code == 0, res.output
    rows = json.loads(res.stdout)["rows"]
    assert {r["variant_a"] for r in rows} == {"0.03"}


def test_unknown_baseline_lists_the_choices_one_per_line(stored):
    _, path, _ = stored
    res = runner.invoke(app, ["diff", str(path), "--baseline", "nope"])
    assert res.exit_code == 2 and "Traceback" not in res.output
    assert res.stderr.splitlines()[1:] == ["  0  0.03", "  1  0.3"]


def test_show_takes_several_metrics(stored):
    _, path, _ = stored
    res = runner.invoke(app, ["show", str(path), "-m", "val_accuracy", "-m", "val_divergence", "-f", "json"])
    assert res.exit_code == 0, res.output
    rows = json.loads(res.stdout)["rows"]
    assert [(r["variant"], r["metric"]) for r in rows] == [
        (v, m) for v in ("0.03", "0.3")
        for m in ("val_accuracy", "val_divergence")]


def test_show_runs_lists_the_ids_replay_takes(stored):
    _, path, _ = stored
    res = runner.invoke(app, ["show", str(path), "--runs", "-f", "json"])
    assert res.exit_code == 0, res.output
    runs = json.loads(res.stdout)["rows"]
    assert len(runs) == 6 and {r["seed"] for r in runs} == {0, 1, 2}
    stored_ids = set(pq.read_table(path / "runs.parquet", columns=["run_id"]).column("run_id").to_pylist())
    assert {r["run_id"] for r in runs} == stored_ids
    table = runner.invoke(app, ["show", str(path), "--runs"], env={"COLUMNS": "80"}).stdout
    assert all(r["run_id"] in table for r in runs)


def test_show_json_carries_the_study_hash_and_axis_values(stored):
    spec, path, _ = stored
    doc = json.loads(runner.invoke(app, ["show", str(path), "-f", "json"]).stdout)
    assert doc["study_hash"] == json.loads(runner.invoke(app, ["check", str(spec), "-f", "json"]).stdout)["study_hash"]
    # named as the Parquet column a program would query, each value a field of its own
    assert doc["axes"] == ["optimizer__learning_rate"]
    assert [r["optimizer__learning_rate"] for r in doc["rows"]] == [0.03, 0.3]
    stored = pq.read_table(path / "runs.parquet").to_pydict()
    for r in doc["rows"]:
        assert {v for lab, v in zip(stored["variant_label"], stored["optimizer__learning_rate"])
                if lab == r["variant"]} == {r["optimizer__learning_rate"]}
    rows = list(csv.DictReader(io.StringIO(runner.invoke(app, ["show", str(path), "-f", "csv"]).stdout)))
    assert [r["optimizer__learning_rate"] for r in rows] == ["0.03", "0.3"]
    assert {r["study_hash"] for r in rows} == {doc["study_hash"]}


def test_version_and_help_metavars():
    from importlib.metadata import version

    res = runner.invoke(app, ["--version"])
    assert res.exit_code == 0 and res.stdout.strip() == f"lesion {version('lesion')}"
    for command in ("check", "run", "show", "replay", "diff", "plot"):
        text = runner.invoke(app, [command, "--help"]).stdout
        assert "{" not in text.splitlines()[0] and "range>" not in text and "<list[" not in text, text


def test_help_examples_name_the_shipped_specs_hashes():
    import re

    from compiler.loader import load_study

    from compiler.hashing import run_id

    studies = [load_study(p) for p in (ROOT / "specs").glob("*.toml")]
    shipped = {s.result_set for s in studies}
    texts = " ".join(runner.invoke(app, [c, "--help"]).stdout
                     for c in ("show", "replay", "diff", "plot", "report", "export"))
    named = set(re.findall(r"results/([a-z-]+-[0-9a-f]{12})\b", texts))
    assert named and named <= shipped
    # a run id in an example is one of those studies' runs
    ids = set(re.findall(r"--run ([0-9a-f]{16}-s\d+)", texts))
    assert ids and ids <= {run_id(v.hash, seed) for s in studies for v in s.variants for seed in s.seeds}


def test_progress_says_compiling_then_counts_epochs_with_an_estimate():
    import io
    from types import SimpleNamespace

    from rich.console import Console

    from runtime.cli import _RunProgress

    run = SimpleNamespace(variant=SimpleNamespace(spec=SimpleNamespace(training=SimpleNamespace(epochs=4))))
    group = SimpleNamespace(group_id="a-0", runs=[run, run], lane_width=2)
    other = SimpleNamespace(group_id="b-0", runs=[run, run], lane_width=2)
    out = io.StringIO()
    with _RunProgress(None, console=Console(file=out, width=120)) as bar:
        bar("plan", groups=2, runs=4, planned=4)
        # two workers: both groups start (compiling) before either has an epoch
        bar("group", group=group, todo=2)
        bar("group", group=other, todo=2)
        task = bar.progress.tasks[bar.bars["a-0"]["task"]]
        second = bar.progress.tasks[bar.bars["b-0"]["task"]]
        assert "compiling" in task.description and task.fields["count"] == "0/4 epochs"
        assert "compiling" in second.description and "2/2" in second.description
        for done in (1, 2, 3):
            bar("epoch", group=group, done=done, total=4)
        assert "compiling" not in task.description and task.completed == 3
        assert task.fields["count"] == "3/4 epochs" and task.fields["left"].endswith("left")
        assert "compiling" in second.description   # the other group's epochs are its own
        study = bar.progress.tasks[bar.study]
        assert study.completed == 1.5 and study.fields["left"].endswith("left")
        bar("epoch", group=other, done=2, total=4)
        assert study.completed == 2.5 and second.fields["count"] == "2/4 epochs"
        bar("epoch", group=group, done=4, total=4)
        bar("stored", group=group)
        assert study.fields["count"] == "3/4 runs"    # 2 stored + half of the other group
    assert task.fields["count"] == "4/4 epochs"


@pytest.mark.parametrize("redirect, message", [
    (">/dev/full", "lesion: cannot write to standard output (No space left on device)"),
    (">&-", "lesion: standard output is closed; redirect it instead (e.g. >/dev/null)"),
])
def test_an_unwritable_standard_output_is_one_line_and_exit_2(redirect, message):
    # /dev/full refuses every write with ENOSPC (Linux null(4)/full(4) man page); `>&-` closes
    # descriptor 1 (POSIX shell redirection)
    out = subprocess.run(["bash", "-c", f'"$0" -m runtime.cli schema {redirect}', sys.executable],
                         capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert out.returncode == 2, out.stderr
    assert out.stderr.splitlines() == [message]


def test_a_pipe_closed_by_its_reader_stays_quiet():
    # `| head` closing early is normal use, not an error worth a message (common practice)
    out = subprocess.run(["bash", "-c", '"$0" -m runtime.cli schema | head -c 1 >/dev/null; exit ${PIPESTATUS[0]}',
                          sys.executable], capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert out.returncode in (0, 1) and out.stderr == "", out.stderr


def test_the_default_generator_setting_changes_no_bits_and_is_recorded(stored, tmp_path):
    # JAX documents JAX_DEFAULT_PRNG_IMPL=rbg as drawing other bits than threefry from the same
    # seed (jax.random module docs, "Advanced RNG configuration"); lesion names its generator
    from runtime import environment
    from runtime.store import open_result_set

    spec, path, _ = stored
    out = lesion("run", spec, "--results", tmp_path, "--quiet", env={"JAX_DEFAULT_PRNG_IMPL": "rbg"})
    assert out.returncode == 0, out.stderr
    default, rbg = open_result_set(path), open_result_set(out.stdout.strip())
    digests = [dict(zip(rs.runs.column("run_id").to_pylist(), rs.runs.column("param_hash").to_pylist()))
               for rs in (default, rbg)]
    assert digests[0] == digests[1]
    assert rbg.meta["environment"]["jax_default_prng_impl"] == "rbg"
    assert "jax_default_prng_impl: threefry2x32 → rbg" in environment.differences(
        default.meta["environment"], rbg.meta["environment"])
    # so resuming under the other setting recomputes rather than mixing: environment hashes differ
    assert environment.env_hash(default.meta["environment"]) != environment.env_hash(rbg.meta["environment"])


@pytest.mark.parametrize("variable, value", [("JAX_NUMPY_DTYPE_PROMOTION", "strict"),
                                             ("JAX_NUMPY_RANK_PROMOTION", "raise"), ("JAX_DISABLE_JIT", "1")])
def test_jax_settings_lesion_cannot_run_under_are_one_line_and_exit_2(stored, tmp_path, variable, value):
    spec, _, _ = stored
    out = lesion("run", spec, "--results", tmp_path, "--quiet", env={variable: value})
    assert out.returncode == 2, out.stderr
    (line,) = out.stderr.splitlines()
    assert f"is not supported by lesion's programs; unset it (the environment variable {variable})" in line
    assert not list(tmp_path.iterdir())
