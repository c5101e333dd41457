"""Result sets that are damaged, truncated, foreign or not result sets at all, given to
``lesion show``, ``lesion replay`` and ``lesion diff``: each is refused with exit code 2 and a
message naming the path, never a traceback."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from compiler.loader import load_study
from runtime.cli import app
from runtime.runner import run_study

ROOT = Path(__file__).parents[2]


@pytest.fixture(scope="module")
def good(tmp_path_factory, tiny_spec):
    tmp = tmp_path_factory.mktemp("good")
    return run_study(load_study(tiny_spec(tmp, "intact", seeds=2, epochs=2)), tmp / "r").path


def _truncate(name, keep):
    def damage(rs: Path):
        data = (rs / name).read_bytes()
        (rs / name).write_bytes(data[:int(len(data) * keep)])
    return damage


def _replace(name, data: bytes):
    def damage(rs: Path):
        (rs / name).write_bytes(data)
    return damage


def _footer_flip(name):
    # The footer (schema, row groups, key-value metadata) sits just before the trailing length and
    # "PAR1" magic (Apache Parquet format specification, "File format").
    def damage(rs: Path):
        data = bytearray((rs / name).read_bytes())
        length = int.from_bytes(data[-8:-4], "little")
        start = len(data) - 8 - length
        for i in range(start, start + length, 7):
            data[i] ^= 0xFF
        (rs / name).write_bytes(bytes(data))
    return damage


def _rewrite(name, edit):
    def damage(rs: Path):
        table = pq.read_table(rs / name)
        pq.write_table(edit(table), rs / name)
    return damage


def _meta(key, value):
    def edit(table):
        md = dict(table.schema.metadata)
        md[key] = value
        return table.replace_schema_metadata(md)
    return edit


def _foreign(rs: Path):
    # A valid Parquet file some other program wrote: right name, no lesion metadata.
    pq.write_table(pa.table({"run_id": ["a"], "loss": [0.5]}), rs / "runs.parquet")


def _random_folder(rs: Path):
    for p in rs.iterdir():
        if p.is_file():
            p.unlink()
    (rs / "notes.txt").write_text("not results")
    (rs / "data.bin").write_bytes(bytes(range(256)))


def _runs_is_a_folder(rs: Path):
    (rs / "runs.parquet").unlink()
    (rs / "runs.parquet").mkdir()


DAMAGE = {
    "runs_truncated_half": (_truncate("runs.parquet", 0.5), "runs.parquet: not a readable Parquet file"),
    "runs_truncated_to_magic": (_truncate("runs.parquet", 0.0), "runs.parquet: not a readable Parquet file"),
    "curves_truncated": (_truncate("curves.parquet", 0.9), "curves.parquet: not a readable Parquet file"),
    "runs_random_bytes": (_replace("runs.parquet", bytes(range(256)) * 40), "not a readable Parquet file"),
    "runs_only_magic": (_replace("runs.parquet", b"PAR1PAR1"), "not a readable Parquet file"),
    "runs_footer_flipped": (_footer_flip("runs.parquet"), "runs.parquet: not a readable Parquet file"),
    "curves_footer_flipped": (_footer_flip("curves.parquet"), "curves.parquet: not a readable Parquet file"),
    "runs_foreign": (_foreign, "not a lesion result set"),
    "curves_missing": (lambda rs: (rs / "curves.parquet").unlink(), "curves.parquet: no such file"),
    "runs_without_run_id": (_rewrite("runs.parquet", lambda t: t.drop_columns(["run_id"])),
                            "column 'run_id' is missing"),
    "curves_without_run_id": (_rewrite("curves.parquet", lambda t: t.drop_columns(["run_id"])),
                              "column 'run_id' is missing"),
    "environment_not_json": (_rewrite("runs.parquet", _meta(b"lesion.environment", b"{not json")),
                             "recorded environment is not valid JSON"),
    "curves_of_another_study": (_rewrite("curves.parquet", _meta(b"lesion.study_hash", b"0" * 64)),
                                "belong to different studies"),
    "folder_of_random_files": (_random_folder, "runs.parquet: no such file"),
    # pyarrow reads a folder as an (empty) data set: no lesion metadata in it.
    "runs_is_a_folder": (_runs_is_a_folder, "not a lesion result set"),
}


@pytest.fixture(scope="module")
def damaged(good, tmp_path_factory):
    out = {}
    for name, (damage, _) in DAMAGE.items():
        rs = tmp_path_factory.mktemp("bad") / good.name
        shutil.copytree(good, rs)
        damage(rs)
        out[name] = rs
    return out


def _cli(*args) -> tuple[int, str]:
    result = CliRunner().invoke(app, [str(a) for a in args])
    if result.exception and not isinstance(result.exception, SystemExit):
        raise result.exception  # a traceback: the bug this file looks for
    return result.exit_code, result.stderr


@pytest.mark.parametrize("command", ["show", "replay", "diff-a", "diff-b", "diff-baseline"])
@pytest.mark.parametrize("case", list(DAMAGE))
def test_damaged_result_sets_are_refused(damaged, good, case, command):
    rs = damaged[case]
    args = {"show": ["show", rs], "replay": ["replay", rs], "diff-a": ["diff", rs, good],
            "diff-b": ["diff", good, rs], "diff-baseline": ["diff", rs, "--baseline", "x"]}[command]
    code, err = _cli(*args)
    assert code == 2, err
    (line,) = err.splitlines()
    assert str(rs) in line and DAMAGE[case][1] in line, line


@pytest.mark.parametrize("target", ["missing", "spec_file", "dev_null"])
def test_paths_that_are_not_result_sets(tmp_path, target):
    path = {"missing": tmp_path / "nope", "spec_file": ROOT / "specs" / "cold-chain.toml",
            "dev_null": Path("/dev/null")}[target]
    for args in (["show", path], ["replay", path], ["diff", path, path]):
        code, err = _cli(*args)
        assert code == 2 and str(path) in err and len(err.splitlines()) == 1, err


def test_a_real_process_prints_no_traceback(damaged):
    rs = damaged["runs_truncated_half"]
    for cmd in (["show", str(rs)], ["replay", str(rs)], ["diff", str(rs), str(rs)]):
        out = subprocess.run([sys.executable, "-m", "runtime.cli", *cmd], cwd=ROOT, capture_output=True, text=True)
        assert out.returncode == 2 and "Traceback" not in out.stderr and str(rs) in out.stderr, out.stderr


def test_the_intact_copy_still_shows(good):
    # The damage is what is refused, not the result set format itself.
    code, _ = _cli("show", good, "--format", "json")
    assert code == 0
    assert json.loads(CliRunner().invoke(app, ["show", str(good), "--format", "json"]).stdout)


def _column(name, edit):
    def change(table):
        i = table.column_names.index(name)
        values = table.column(name).to_pylist()
        return table.set_column(i, table.field(i), pa.array(edit(values), type=table.field(i).type))
    return change


def _edited_source(table):
    source = table.schema.metadata[b"lesion.spec_source"].decode()
    return _meta(b"lesion.spec_source", source.replace("values = [0.03, 0.3]", "values = [0.03, 0.5]").encode())(table)


# Edits that keep the files readable (show still works) but break what replay verifies first:
# the stored spec must re-derive every stored hash, label and run id (runtime/replay.py contract).
TAMPERED = {
    "source_no_longer_loads": (_meta(b"lesion.spec_source", b"[study\n"), "the stored spec source no longer loads"),
    "source_disagrees_with_canonical_json": (_edited_source, "the stored spec source and canonical JSON disagree"),
    "canonical_json_edited": (_meta(b"lesion.canonical_json", b'{"study":{}}'), "does not hash to the stored study hash"),
    "seed_changed": (_column("seed", lambda v: [v[0] + 100] + v[1:]), "does not match its variant and seed"),
    "label_changed": (_column("variant_label", lambda v: ["renamed"] + v[1:]), "which the stored spec does not derive"),
}


@pytest.mark.parametrize("case", list(TAMPERED))
def test_replay_refuses_a_tampered_result_set_before_running_anything(good, tmp_path, case):
    rs = tmp_path / good.name
    shutil.copytree(good, rs)
    edit, fragment = TAMPERED[case]
    _rewrite("runs.parquet", edit)(rs)
    code, err = _cli("replay", rs)
    assert code == 2, err
    (line,) = err.splitlines()
    assert line.startswith(f"{rs}: ") and fragment in line, line


@pytest.mark.parametrize("args, fragment", [(["--run", "zzzz"], "no run 'zzzz'"),
                                            (["--variant", "nope"], "no variant 'nope'"),
                                            (["--run", "a", "--variant", "b"], "give --run or --variant, not both")])
def test_replay_selection_errors(good, args, fragment):
    code, err = _cli("replay", good, *args)
    assert code == 2 and fragment in err and len(err.splitlines()) == 1, err
