"""Bad input that cannot live in tests/fixtures/bad_specs/ (too large to commit, not a regular
file) and the corpus' own size: every case ends in exit code 2, a located one-line problem per
line of stderr and no traceback, through a real ``lesion`` process."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).parent.parent
BAD = ROOT / "tests" / "fixtures" / "bad_specs"


def _lesion(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "runtime.cli", *args], cwd=cwd, capture_output=True, text=True)


def _refused(out: subprocess.CompletedProcess, where: str, fragment: str) -> None:
    assert out.returncode == 2, out
    assert out.stdout == "" and "Traceback" not in out.stderr
    lines = out.stderr.splitlines()
    assert lines and all(line.startswith(f"{where}:") for line in lines), out.stderr
    assert any(fragment in line for line in lines), out.stderr


def test_the_corpus_holds_at_least_100_cases_each_with_its_sidecar():
    cases = {p.stem for p in BAD.glob("*.toml")}
    assert len(cases) >= 100
    assert cases == {p.stem for p in BAD.glob("*.expect")}


@pytest.mark.parametrize("body", [b"# padding\n", b"x" * 1023 + b"\n", b'[study]\nname = "a"\n' * 1000])
def test_a_10_mb_file_is_refused_before_it_is_parsed(tmp_path, body):
    path = tmp_path / "huge.toml"
    path.write_bytes(body * (10 * 2**20 // len(body) + 1))
    assert path.stat().st_size >= 10 * 2**20
    _refused(_lesion("check", str(path)), str(path), "larger than 1024 KiB")


def test_a_directory_named_as_the_spec(tmp_path):
    (tmp_path / "study.toml").mkdir()
    _refused(_lesion("check", str(tmp_path / "study.toml")), str(tmp_path / "study.toml"), "is a directory")


def test_a_device_that_never_ends_is_refused_unread():
    # /dev/zero has no size: reading it whole would never return.
    _refused(_lesion("check", "/dev/zero"), "/dev/zero", "is a character device, not a regular file")


@pytest.mark.parametrize("command", ["check", "run"])
def test_a_fifo_named_as_the_spec_is_refused_without_waiting_for_a_writer(tmp_path, command):
    # POSIX open(2): opening a FIFO read-only blocks until a writer opens it; none ever will here.
    fifo = tmp_path / "study.toml"
    os.mkfifo(fifo)
    args = [command, str(fifo)] + (["--results", str(tmp_path / "results")] if command == "run" else [])
    try:
        out = subprocess.run([sys.executable, "-m", "runtime.cli", *args], cwd=ROOT, capture_output=True,
                             text=True, timeout=60)
    except subprocess.TimeoutExpired:
        pytest.fail(f"lesion {command} waited on the FIFO")
    _refused(out, str(fifo), "is a named pipe (FIFO), not a regular file")
    assert not (tmp_path / "results").exists()


def test_a_missing_file(tmp_path):
    _refused(_lesion("check", str(tmp_path / "nope.toml")), str(tmp_path / "nope.toml"), "no such file")


@pytest.mark.skipif(os.geteuid() == 0, reason="root reads any file")
def test_an_unreadable_file(tmp_path):
    path = tmp_path / "locked.toml"
    path.write_text('[study]\nname = "x"\n')
    path.chmod(0)
    _refused(_lesion("check", str(path)), str(path), "cannot read")


@pytest.mark.parametrize("case", ["deeply_nested_arrays", "deep_table_header", "utf16_file", "latin1_file",
                                  "kind_os_system"])
def test_run_refuses_a_bad_spec_before_importing_jax(case, tmp_path):
    # `lesion run` loads the spec first: the same located problem, and nothing written under --results.
    rel = f"tests/fixtures/bad_specs/{case}.toml"
    out = _lesion("run", rel, "--results", str(tmp_path / "results"), "--quiet")
    _refused(out, rel, "")
    assert not (tmp_path / "results").exists()


# ── data files: cases that need a link, a large file or a memory limit made at run time ─────────
_DATA_SPEC = '[study]\nname = "apiary"\n[data]\nkind = "file"\npath = "{path}"\n[training]\nbatch_size = 8\n'


def _hives(path: Path, rows: int = 40) -> None:
    # A table of our own: two hive measurements and whether the colony swarmed.
    import numpy as np
    rng = np.random.default_rng(3)
    x = rng.normal(size=(rows, 2))
    np.savetxt(path, np.column_stack([x, x[:, 0] > 0]), delimiter=",", header="weight,humidity,y", comments="",
               fmt="%.4g")


def test_symlinked_data_leading_out_of_the_spec_folder_is_refused(tmp_path):
    # The spec's rule (README "What a spec can reach"): a spec reads only files inside its folder.
    outside, study = tmp_path / "elsewhere", tmp_path / "study"
    outside.mkdir()
    study.mkdir()
    _hives(outside / "hives.csv")
    (study / "hives.csv").symlink_to(outside / "hives.csv")
    spec = study / "s.toml"
    spec.write_text(_DATA_SPEC.format(path="hives.csv"))
    _refused(_lesion("check", str(spec)), f"{spec}:5", "symbolic link leads out of the spec's folder")
    out = _lesion("run", str(spec), "--results", str(tmp_path / "results"), "--quiet")
    _refused(out, f"{spec}:5", "symbolic link")
    assert not (tmp_path / "results").exists()
    # a link that stays inside the folder is an ordinary file of the spec's
    _hives(study / "real.csv")
    (study / "inside.csv").symlink_to(study / "real.csv")
    spec.write_text(_DATA_SPEC.format(path="inside.csv"))
    assert _lesion("check", str(spec)).returncode == 0


@pytest.mark.parametrize("case", ["data_target_misspelt", "data_feature_misspelt", "data_batch_exceeds_rows",
                                  "data_validation_leaves_no_rows", "data_complex_npz", "data_npz_bomb"])
def test_run_refuses_a_data_mistake_before_creating_the_result_folder(case, tmp_path):
    # Before: the spec passed, `run` failed at the data without file:line and left results/<name>/.lock.
    rel = f"tests/fixtures/bad_specs/{case}.toml"
    _refused(_lesion("run", rel, "--results", str(tmp_path / "results"), "--quiet"), rel, "")
    assert not (tmp_path / "results").exists()


def test_parquet_declaring_many_rows_is_refused_from_its_footer(tmp_path, monkeypatch):
    # A 5 M-row Parquet of constant columns is a few KB on disk; its footer says how many rows
    # loading would decode (Apache Parquet format: FileMetaData.num_rows).
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq
    from typer.testing import CliRunner

    import runtime.guard
    from runtime.cli import app

    rows = 5_000_000
    pq.write_table(pa.table({"x": np.zeros(rows), "y": np.zeros(rows, np.int8)}), tmp_path / "b.parquet",
                   compression="zstd")
    assert (tmp_path / "b.parquet").stat().st_size < 100_000
    spec = tmp_path / "s.toml"
    spec.write_text(_DATA_SPEC.format(path="b.parquet"))
    # arrow's table and numpy's copy (16 bytes per value, 2 columns) plus 20 bytes per feature value
    need = 16 * rows * 2 + 20 * rows
    monkeypatch.setattr(runtime.guard, "available_bytes", lambda: runtime.guard.RUNTIME_BYTES + need - 1)
    result = CliRunner().invoke(app, ["check", str(spec)])
    assert result.exit_code == 2
    assert result.stderr.startswith(f"{spec}:5: data.path: loading b.parquet needs about 0.2 GB"), result.stderr
    assert "5000000 rows × 2 columns" in result.stderr
    monkeypatch.setattr(runtime.guard, "available_bytes", lambda: runtime.guard.RUNTIME_BYTES + need)
    assert CliRunner().invoke(app, ["check", str(spec)]).exit_code == 0
