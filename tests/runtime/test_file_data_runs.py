"""Studies on data files: the data hash guards replay; degenerate inputs raise the BN warning."""

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from compiler.loader import load_study
from runtime.cli import app
from runtime.replay import ReplayRefused, replay
from runtime.runner import run_study
from runtime.store import open_result_set

SPEC = """
[study]
name = "{name}"
seeds = 2

[data]
kind = "file"
path = "{file}"
target = "label"
task = "classification"
validation = 0.25

[model]
hidden = [8, 8]

[divergence]
kind = "kl"

[normalization]
kind = "{norm}"

[optimizer]
kind = "sgd"
learning_rate = 0.1

[training]
epochs = 3
batch_size = 16
"""


def _table(x: np.ndarray, labels: np.ndarray) -> pa.Table:
    cols = {f"f{i}": x[:, i] for i in range(x.shape[1])}
    return pa.table({**cols, "label": labels})


def _study(tmp_path, name, x, labels, norm="none"):
    pq.write_table(_table(x, labels), tmp_path / f"{name}.parquet")
    spec = tmp_path / f"{name}.toml"
    spec.write_text(SPEC.format(name=name, file=f"{name}.parquet", norm=norm))
    return spec


def test_changed_or_missing_data_file_is_refused_naming_path_and_digests(tmp_path):
    rng = np.random.default_rng(3)
    x = rng.normal(size=(160, 3)).astype(np.float32)
    labels = (x[:, 0] > 0).astype(np.int64)
    spec = _study(tmp_path, "sieve", x, labels)
    report = run_study(load_study(spec), tmp_path / "r")
    recorded = open_result_set(report.path).runs.column("data_hash")[0].as_py()
    assert replay(report.path).identical

    x[0, 0] += 1.0  # one changed cell
    pq.write_table(_table(x, labels), tmp_path / "sieve.parquet")
    with pytest.raises(ReplayRefused) as err:
        replay(report.path)
    message = str(err.value)
    assert "sieve.parquet" in message and recorded in message
    current = load_data_hash(spec)
    assert current in message and current != recorded

    (tmp_path / "sieve.parquet").unlink()
    res = CliRunner().invoke(app, ["replay", str(report.path)])
    assert res.exit_code == 2 and "data file not found" in res.stderr and "Traceback" not in res.output


def load_data_hash(spec) -> str:
    from compiler.data import load_data

    loaded = load_study(spec)
    return load_data(loaded.variants[0].spec, spec.parent).data_hash


def test_batch_norm_gradient_collapse_is_warned_in_the_record_and_on_screen(tmp_path):
    # Constant features: after standardization every row is the same vector (zeros), so a
    # batch-normalized first layer sees no spread: its weights get exactly zero gradient
    # (dL/dW1 = x^T·g with x = 0, a fact of the trade) and only float noise reaches its β
    # through the next batch norm (Σᵢ(gᵢ − ḡ) = 0), so the layer's gradient norm collapses.
    rng = np.random.default_rng(4)
    x = np.full((160, 3), 2.5, dtype=np.float32)
    labels = rng.integers(0, 2, size=160)
    spec = _study(tmp_path, "flat", x, labels, norm="batch")
    res = CliRunner().invoke(app, ["run", str(spec), "--results", str(tmp_path / "r")])
    assert res.exit_code == 0, res.output
    assert "warning:" in res.stderr and "batch-normalized layer l1: gradient collapsed from epoch" in res.stderr
    runs = open_result_set(res.stdout.strip().splitlines()[-1]).runs
    assert all("layer l1: gradient collapsed" in w for w in runs.column("warnings").to_pylist())
    assert runs.column("final_grad_norm_layer1").to_pylist() == [0.0, 0.0]
