"""Result sets edited after lesion wrote them, or left incomplete by an interruption: replay
reports every cell it recomputes that no longer matches; show and diff warn from the digests and
the runs the stored spec derives; a diff gate that compared nothing does not pass.

The edits are made the way a person with pyarrow would make them: read the table, change
values, write it back with its schema metadata (digests included) untouched."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from compiler.loader import load_study
from runtime.cli import app
from runtime.runner import run_study


class _Stop(Exception):
    """Stands in for an interruption after some groups were stored."""


@pytest.fixture(scope="module")
def studies(tmp_path_factory, tiny_spec):
    tmp = tmp_path_factory.mktemp("tamper")
    spec = tiny_spec(tmp, "tamper", seeds=3, epochs=2)
    full = run_study(load_study(spec), tmp / "full").path

    stored = []

    def stop_after_two(event, **info):
        if event == "stored":
            stored.append(info["group"])
            if len(stored) == 2:
                raise _Stop

    with pytest.raises(_Stop):
        run_study(load_study(spec), tmp / "part", lanes=1, progress=stop_after_two)
    partial = tmp / "part" / full.name

    (tmp / "other").mkdir()
    other = tiny_spec(tmp / "other", "tamper", seeds=3, epochs=2, rates="[0.1]")
    # an axis over another key: no variant of either study has a counterpart in the other
    other.write_text(other.read_text().replace('key = "optimizer.learning_rate"\nvalues = [0.1]',
                                               'key = "optimizer.momentum"\nvalues = [0.5, 0.8]'))
    unrelated = run_study(load_study(other), tmp / "unrelated").path
    return full, partial, unrelated


def _cli(*args):
    result = CliRunner().invoke(app, [str(a) for a in args])
    if result.exception and not isinstance(result.exception, SystemExit):
        raise result.exception
    return result


def _edit_runs(table: pa.Table, name: str, edit) -> pa.Table:
    i = table.column_names.index(name)
    values = table.column(name).to_pylist()
    return table.set_column(i, table.field(i), pa.array(edit(values), type=table.field(i).type))


def _first(value):
    return lambda values: [value(values[0])] + values[1:]


def _metadata(key: bytes, edit):
    def change(table):
        md = dict(table.schema.metadata)
        md[key] = edit(md[key])
        return table.replace_schema_metadata(md)
    return change


# name: (edit of runs.parquet, the row it edits, what replay must say: the differing cell it names
# for that run, "refused", "missing" for that run, or "edited" when every cell still reproduces)
TAMPER = {
    "status_flipped": (lambda t: _edit_runs(t, "status", _first(lambda s: "non_finite")), 0, "status"),
    "row_duplicated": (lambda t: pa.concat_tables([t, t.slice(0, 1)]), 0, "refused"),
    "row_deleted": (lambda t: t.slice(1), 0, "missing"),
    "best_cell_changed": (lambda t: _edit_runs(t, "best_val_accuracy", _first(lambda x: x - 0.25)), 0,
                          "best_val_accuracy"),
    "lane_width_changed": (lambda t: _edit_runs(t, "lane_width", lambda v: v[:1] + [v[1] + 1] + v[2:]), 1,
                           "lane_width"),
    "varied_key_changed": (lambda t: _edit_runs(t, "optimizer__learning_rate", _first(lambda x: 0.5)), 0,
                           "optimizer__learning_rate"),
    "changes_json_changed": (lambda t: _edit_runs(t, "changes", _first(
        lambda s: json.dumps({"optimizer.learning_rate": 0.5}))), 0, "changes"),
    "epochs_changed": (lambda t: _edit_runs(t, "epochs", _first(lambda e: e + 1)), 0, "epochs"),
    "spec_path_changed": (_metadata(b"lesion.spec_path", lambda p: b"/elsewhere/tamper.toml"), 0, "edited"),
}


@pytest.mark.parametrize("case", list(TAMPER))
def test_tampered_runs_table_is_caught_by_replay_show_and_diff(studies, tmp_path, case):
    full, _, _ = studies
    copy = tmp_path / full.name
    shutil.copytree(full, copy, ignore=shutil.ignore_patterns(".lock"))
    edit, row, expect = TAMPER[case]
    table = pq.read_table(copy / "runs.parquet")
    rid = table.column("run_id")[row].as_py()
    pq.write_table(edit(table), copy / "runs.parquet")

    shown = _cli("show", copy)
    assert shown.exit_code == 0, shown.output
    assert "edited after lesion wrote it" in shown.stderr, shown.stderr
    compared = _cli("diff", full, copy)
    assert "warning: B: " in compared.stderr and "edited after lesion wrote it" in compared.stderr, compared.stderr

    replayed = _cli("replay", copy, "--format", "json")
    if expect == "refused":
        assert replayed.exit_code == 2 and f"run {rid} is stored 2 times" in replayed.stderr, replayed.output
        return
    assert replayed.exit_code == 1, replayed.output
    doc = json.loads(replayed.stdout)
    assert not doc["identical"]
    runs = {r["run_id"]: r for r in doc["runs"]}
    if expect == "missing":
        assert runs[rid]["verdict"] == "missing"
    elif expect == "edited":
        # the path is not an input of any run: every cell reproduces, the digest tells the edit
        assert all(r["verdict"] == "identical" for r in runs.values())
        assert any("edited after lesion wrote it" in w for w in doc["warnings"]), doc["warnings"]
    else:
        assert runs[rid]["verdict"] == "differs" and expect in runs[rid]["cells"], runs[rid]
        others = [r for r in runs.values() if r["run_id"] != rid]
        assert all(r["verdict"] == "identical" for r in others), others


def test_changed_curve_cell_is_caught_by_show(studies, tmp_path):
    full, _, _ = studies
    untouched = _cli("show", full)
    assert untouched.exit_code == 0 and untouched.stderr == "", untouched.stderr  # no false alarm
    copy = tmp_path / full.name
    shutil.copytree(full, copy, ignore=shutil.ignore_patterns(".lock"))
    table = pq.read_table(copy / "curves.parquet")
    pq.write_table(_edit_runs(table, "val_accuracy", _first(lambda x: x + 0.125)), copy / "curves.parquet")
    shown = _cli("show", copy)
    assert "curves.parquet: edited after lesion wrote it" in shown.stderr, shown.stderr


def test_interrupted_result_set_says_it_is_incomplete(studies):
    full, partial, _ = studies
    shown = _cli("show", partial)
    assert shown.exit_code == 0
    # lanes=1 computes the study's runs in order (variant, then seed): two of six stored
    assert ("warning: incomplete: 2 of 6 runs stored; missing: 0.03 (seed 2); "
            "0.3 (seeds 0, 1, 2)") in shown.stderr, shown.stderr
    assert "edited" not in shown.stderr

    compared = _cli("diff", full, partial, "--format", "json")
    assert "warning: B: incomplete: 2 of 6 runs stored" in compared.stderr, compared.stderr
    doc = json.loads(compared.stdout)
    assert any(f.startswith("warning: B: incomplete") for f in doc["findings"])
    absent = [r for r in doc["rows"] if r["variant_b"] == "0.3"]
    assert absent and "B stores no run of this variant" in absent[0]["reason"]
    assert all("run more seeds" not in r["reason"] for r in absent)


def test_interrupted_result_set_replays_as_missing(studies):
    _, partial, _ = studies
    replayed = _cli("replay", partial, "--format", "json")
    assert replayed.exit_code == 1, replayed.output
    doc = json.loads(replayed.stdout)
    verdicts = sorted(r["verdict"] for r in doc["runs"])
    assert verdicts == ["identical"] * 2 + ["missing"] * 4
    assert any(w.startswith("incomplete: 2 of 6 runs stored") for w in doc["warnings"])


def test_gate_that_compared_nothing_does_not_pass(studies):
    full, _, unrelated = studies
    gate = _cli("diff", full, unrelated, "--fail-on", "worse")
    assert gate.exit_code == 1, gate.output
    assert "no variant matched" in gate.stderr


def test_result_set_written_before_digests_is_read_with_a_note(studies, tmp_path):
    full, _, _ = studies
    copy = tmp_path / full.name
    shutil.copytree(full, copy, ignore=shutil.ignore_patterns(".lock"))
    for name in ("runs.parquet", "curves.parquet"):
        table = pq.read_table(copy / name)
        md = {k: v for k, v in table.schema.metadata.items()
              if k not in (b"lesion.runs_hash", b"lesion.curves_hash")}
        pq.write_table(table.replace_schema_metadata(md), copy / name)
    shown = _cli("show", copy)
    assert shown.exit_code == 0 and shown.stderr.startswith("note: no consistency hash stored"), shown.stderr
    assert "warning" not in shown.stderr
    replayed = _cli("replay", copy)
    assert replayed.exit_code == 0 and "note: no consistency hash stored" in replayed.stdout, replayed.output


def _documented_digest(table: pa.Table, order: list[str], prefix: list[bytes]) -> str:
    """The digest as README.md ("Result sets") describes it, written apart from runtime/store.py."""
    import hashlib
    import struct

    h = hashlib.sha256()

    def feed(data: bytes):
        h.update(struct.pack("<Q", len(data)) + data)

    for value in prefix:
        feed(value)
    rows = sorted(range(table.num_rows), key=lambda i: tuple(table.column(k)[i].as_py() for k in order))
    for name in sorted(table.column_names):
        values = [table.column(name)[i].as_py() for i in rows]
        typ = table.schema.field(name).type
        feed(name.encode())
        feed(str(typ).encode())
        bits = bytearray((len(values) + 7) // 8)
        for i, v in enumerate(values):
            if v is not None:
                bits[i // 8] |= 1 << (i % 8)
        feed(bytes(bits))
        if pa.types.is_string(typ):
            encoded = [(v or "").encode() for v in values]
            feed(b"".join(struct.pack("<q", len(e)) for e in encoded))
            feed(b"".join(encoded))
        else:
            code = {pa.int32(): "<i", pa.int64(): "<q", pa.float32(): "<f", pa.float64(): "<d"}[typ]
            feed(b"".join(struct.pack(code, 0 if v is None else v) for v in values))
    return h.hexdigest()


def test_digests_follow_the_documented_encoding_and_survive_a_rewrite(studies, tmp_path):
    full, _, _ = studies
    runs, curves = pq.read_table(full / "runs.parquet"), pq.read_table(full / "curves.parquet")
    md = runs.schema.metadata
    keys = ("spec_source", "spec_path", "canonical_json", "study_hash", "version", "environment")
    assert md[b"lesion.runs_hash"].decode() == _documented_digest(
        runs, ["run_id"], [md[f"lesion.{k}".encode()] for k in (*keys, "format")])
    assert md[b"lesion.curves_hash"].decode() == _documented_digest(curves, ["run_id", "epoch"], [])
    # Other compression, row groups and row order change the file's bytes, not its values.
    copy = tmp_path / full.name
    shutil.copytree(full, copy, ignore=shutil.ignore_patterns(".lock"))
    for name, table in (("runs.parquet", runs), ("curves.parquet", curves)):
        reordered = table.take(pa.array(range(table.num_rows - 1, -1, -1)))
        pq.write_table(reordered, copy / name, compression="snappy", row_group_size=4)
    assert (copy / "runs.parquet").read_bytes() != (full / "runs.parquet").read_bytes()
    shown = _cli("show", copy)
    assert shown.exit_code == 0 and shown.stderr == "", shown.stderr
