"""Result sets written before format 2 are read in today's names (runtime/migrate.py).

`tests/fixtures/format1/grid-v1-819b8933528e` was computed by lesion before the renames (dotted
key columns, ``diverged_at``, ``grad_norm_l<i>``, labels ``key=value, key=value``, the dropout
kind ``connect``), from `grid-v1.toml` beside it, which still uses the old words.
"""

import json
import shutil
from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from compiler.loader import load_study, load_text
from runtime.audit import audit
from runtime.diff import resolve_variant
from runtime.migrate import FORMAT
from runtime.replay import replay
from runtime.store import ResultSetError, open_result_set, write_results

FORMAT1 = Path(__file__).resolve().parents[1] / "fixtures" / "format1"
GRID = FORMAT1 / "grid-v1-819b8933528e"
SPEC = FORMAT1 / "grid-v1.toml"


def test_a_format_1_grid_is_read_in_todays_names():
    rs = open_result_set(GRID)
    assert rs.format == 1
    names = rs.runs.column_names
    assert not [c for c in names if "." in c]           # SQL takes every name bare
    assert {"normalization__kind", "regularization__dropout__kind", "non_finite_epoch",
            "final_grad_norm_layer1", "final_grad_norm_layer2"} <= set(names)
    assert not {"diverged_at", "final_grad_norm_l1", "normalization.kind"} & set(names)
    assert {"grad_norm_layer1", "grad_norm_layer2"} <= set(rs.curves.column_names)
    assert sorted(set(rs.runs.column("variant_label").to_pylist())) == [
        "layer · dropconnect", "layer · inverted", "none · dropconnect", "none · inverted"]
    by_run = dict(zip(rs.runs.column("run_id").to_pylist(), rs.runs.column("variant_label").to_pylist()))
    assert all(by_run[r] == lab for r, lab in zip(rs.curves.column("run_id").to_pylist(),
                                                   rs.curves.column("variant_label").to_pylist()))
    assert set(rs.runs.column("regularization__dropout__kind").to_pylist()) == {"inverted", "dropconnect"}
    assert {json.loads(c)["regularization.dropout.kind"] for c in rs.runs.column("changes").to_pylist()} == \
        {"inverted", "dropconnect"}
    assert rs.tree["ablation"]["axis"][1]["values"] == ["inverted", "dropconnect"]
    # the digests stored with the files are checked against the tables as stored
    found = audit(rs)
    assert found.warnings() == [] and found.notes() == []


def test_old_words_in_a_spec_are_read_with_a_notice_and_keep_the_study_hash():
    study = load_study(SPEC)
    assert study.study_hash == open_result_set(GRID).study_hash
    (notice,) = study.notices
    assert notice.startswith(f"{SPEC}:40: ablation.axis[1].values[1]: 'connect' is now 'dropconnect' (read as such")
    today = load_text(SPEC.read_text().replace('"connect"', '"dropconnect"'), "today.toml")
    assert today.notices == () and today.study_hash == study.study_hash
    assert [v.hash for v in today.variants] == [v.hash for v in study.variants]
    listed = ('[study]\nname = "l"\n[ablation]\nmode = "list"\n[[ablation.variant]]\nlabel = "dc"\n'
              '{} = {{ "regularization.dropout.kind" = "{}" }}\n')
    old, new = load_text(listed.format("set", "connect"), "o.toml"), load_text(listed.format("changes", "dropconnect"))
    assert old.study_hash == new.study_hash and new.notices == ()
    assert [n.split(": ", 2)[1] for n in old.notices] == ["ablation.variant[0].set",
                                                          "ablation.variant[0].set.regularization.dropout.kind"]


def test_a_variant_is_named_by_its_old_label_its_new_label_or_its_values():
    study = load_study(SPEC)
    assert resolve_variant(study, "normalization.kind=layer, regularization.dropout.kind=inverted") == 2
    assert resolve_variant(study, "layer · inverted") == 2
    assert resolve_variant(study, "layer, inverted") == 2
    assert resolve_variant(study, "dropout.kind=dropconnect, none") == 1


def test_an_old_form_baseline_is_read_with_a_one_line_notice_naming_todays_label(tmp_path):
    from typer.testing import CliRunner

    from runtime.cli import app
    from runtime.diff import name_variant

    study = load_study(SPEC)
    assert name_variant(study, "layer · inverted") == (2, None)        # today's forms: no notice
    assert name_variant(study, "layer, inverted") == (2, None)
    index, notice = name_variant(study, "normalization.kind=none, regularization.dropout.kind=connect")
    assert index == 1 and "read as 'none · dropconnect'" in notice and "'connect' is now 'dropconnect'" in notice
    index, notice = name_variant(study, "normalization.kind=layer, regularization.dropout.kind=inverted")
    assert index == 2 and notice.endswith("read as 'layer · inverted' (the label result-set format 1 gave it)")
    assert name_variant(study, "layer · connect")[0] == 3
    for command in (["diff", str(GRID)], ["report", str(GRID), "-o", str(tmp_path / "r.html")]):
        res = CliRunner().invoke(app, [*command, "--baseline", "none, connect", *(["-f", "json"] if command[0] == "diff" else [])])
        notices = [line for line in res.stderr.splitlines() if line.startswith("notice:")]
        assert notices == ["notice: --baseline 'none, connect': read as 'none · dropconnect' "
                           "('connect' is now 'dropconnect')"], res.stderr
        if command[0] == "diff":
            assert res.exit_code == 0 and {r["variant_a"] for r in json.loads(res.stdout)["rows"]} == {"none · dropconnect"}
    # still unknown after the renaming: every label, one per line
    res = CliRunner().invoke(app, ["diff", str(GRID), "--baseline", "none · connected"])
    assert res.exit_code == 2 and res.stderr.splitlines()[1:] == [
        "  0  none · inverted", "  1  none · dropconnect", "  2  layer · inverted", "  3  layer · dropconnect"]


def test_resuming_rewrites_an_old_result_set_in_the_current_format(tmp_path):
    path = tmp_path / GRID.name
    shutil.copytree(GRID, path)
    rs = open_result_set(path)
    first = rs.runs.column("run_id")[0].as_py()
    write_results(path, rs.meta, rs.runs.filter(pc.equal(rs.runs.column("run_id"), first)),
                  rs.curves.filter(pc.equal(rs.curves.column("run_id"), first)), previous=rs)
    again = open_result_set(path)
    assert again.format == FORMAT and again.stored is None
    assert again.runs.column_names == rs.runs.column_names
    assert sorted(again.runs.column("variant_label").to_pylist()) == sorted(rs.runs.column("variant_label").to_pylist())
    assert audit(again).warnings() == []
    assert pq.read_schema(path / "runs.parquet").metadata[b"lesion.format"] == str(FORMAT).encode()


def test_a_result_set_of_a_newer_format_is_refused_in_one_line(tmp_path):
    path = tmp_path / GRID.name
    shutil.copytree(GRID, path)
    for name in ("runs.parquet", "curves.parquet"):
        table = pq.read_table(path / name)
        meta = {**table.schema.metadata, b"lesion.format": str(FORMAT + 1).encode()}
        pq.write_table(table.replace_schema_metadata(meta), path / name)
    with pytest.raises(ResultSetError, match=f"format {FORMAT + 1} by a newer lesion.*upgrade lesion"):
        open_result_set(path)


@pytest.mark.slow   # four programs to compile; tests/runtime/test_stored_bits.py replays format-1 result sets always
def test_a_format_1_grid_replays_identical():
    report = replay(GRID)
    assert len(report.rows) == 8
    assert [(r.run_id, r.verdict, r.cells) for r in report.rows if r.verdict != "identical"] == []


def test_migration_keeps_arrow_types():
    rs = open_result_set(GRID)
    raw = pq.read_table(GRID / "runs.parquet")
    assert rs.runs.schema.field("normalization__kind").type == raw.schema.field("normalization.kind").type == pa.string()
    assert rs.runs.schema.field("non_finite_epoch").type == raw.schema.field("diverged_at").type


def test_every_key_a_spec_can_vary_has_a_bare_column_name_that_gives_the_key_back():
    from compiler.paths import field_paths
    from runtime.migrate import key_column, key_of

    for key in field_paths():
        name = key_column(key)
        assert name.replace("_", "").isalnum() and key_of(name) == key, key
