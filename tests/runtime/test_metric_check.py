"""Asking any reader for a metric the result set does not hold: one check, one message, exit 2."""

from pathlib import Path

import pytest
from typer.testing import CliRunner

from runtime.cli import app
from runtime.store import ResultSetError, open_result_set

# A regression study: it stores val_rmse, never val_accuracy.
STORED = next((Path(__file__).resolve().parents[1] / "fixtures" / "stored").glob("bits-guard-regression-*"))


def test_require_names_what_is_stored():
    rs = open_result_set(STORED)
    rs.require(["val_rmse", "val_divergence"])
    rs.require(["val_rmse"], curves=True)
    with pytest.raises(ResultSetError, match=r"'val_accuracy' is not stored .*\(it has: .*val_rmse"):
        rs.require(["val_rmse", "val_accuracy"])
    with pytest.raises(ResultSetError, match=r"'val_accuracy' has no curves .*\(it has: .*val_rmse"):
        rs.require(["val_accuracy"], curves=True)


@pytest.mark.parametrize("args, what", [
    (["show", str(STORED), "--metric", "val_accuracy"], "is not stored"),
    (["show", str(STORED), "--runs", "--metric", "val_accuracy"], "is not stored"),
    (["show", str(STORED), "--curves", "--metric", "val_accuracy"], "has no curves"),
    (["diff", str(STORED), "--baseline", "0", "--metric", "val_accuracy"], "is not stored"),
    (["plot", str(STORED), "--kind", "arms", "--metric", "val_accuracy", "-o", "{tmp}/a.png"], "is not stored"),
    (["plot", str(STORED), "--kind", "curves", "--metric", "val_accuracy", "-o", "{tmp}/c.png"], "has no curves"),
])
def test_every_reader_refuses_a_missing_metric_alike(args, what, tmp_path):
    out = CliRunner().invoke(app, [a.format(tmp=tmp_path) for a in args])
    assert out.exit_code == 2, out.output
    lines = [line for line in out.stderr.splitlines() if "val_accuracy" in line]
    assert len(lines) == 1, out.stderr
    assert lines[0].startswith(f"{STORED}: metric 'val_accuracy' {what} in this result set (it has: "), out.stderr
    assert "Traceback" not in out.output
