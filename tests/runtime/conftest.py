"""Tiny studies shared by the runtime tests: compiled once per session, results in a tmp folder."""

import os
from pathlib import Path

import numpy as np
import pytest

TINY = """
[study]
name = "{name}"
seeds = {seeds}
metric = "val_accuracy"

[data]
kind = "synthetic"
generator = "blobs"
samples = 240
features = 4
classes = 3
noise = 0.5

[model]
hidden = [8]

[divergence]
kind = "kl"

[optimizer]
kind = "sgd"
learning_rate = 0.1
momentum = 0.9

[training]
epochs = {epochs}
batch_size = 32

[ablation]
mode = "grid"
[[ablation.axis]]
key = "optimizer.learning_rate"
values = {rates}
"""


def _write_tiny(tmp: Path, name="tiny", seeds=3, epochs=3, rates="[0.03, 0.3]", extra="") -> Path:
    path = tmp / f"{name}.toml"
    path.write_text(TINY.format(name=name, seeds=seeds, epochs=epochs, rates=rates) + extra)
    return path


@pytest.fixture(scope="session")
def tiny_spec():
    """tiny_spec(folder, name=..., seeds=..., epochs=..., rates="[...]", extra="") -> spec path"""
    return _write_tiny


# A list study for `run --until-decided`: the base, an arm whose learning rate is too small to learn
# in 3 epochs (clearly worse), and a light dropout (close to the base); all share one program.
DECIDED_VARIANTS = """
[ablation]
mode = "list"
include_base = true
[[ablation.variant]]
label = "stalled"
changes = { "optimizer.learning_rate" = 0.0005 }
[[ablation.variant]]
label = "light"
changes = { "regularization.dropout.rate" = 0.02 }
"""


def _write_decided(tmp: Path, name="seq") -> Path:
    path = _write_tiny(tmp, name=name, seeds=6, rates="[0.1]")
    text = path.read_text()
    path.write_text(text[:text.index("[ablation]")] + DECIDED_VARIANTS.lstrip())
    return path


@pytest.fixture(scope="session")
def decided_spec():
    """decided_spec(folder, name=...) -> spec path of a small list study to run until decided"""
    return _write_decided


@pytest.fixture(autouse=True, scope="session")
def _private_compile_cache(tmp_path_factory):
    # The persistent compile cache is a speed-up only; tests keep theirs apart from the user's.
    os.environ.setdefault("LESION_CACHE_DIR", str(tmp_path_factory.mktemp("xla-cache")))


def _assert_same_bits(a, b):
    runs_a, runs_b = a.runs.sort_by("run_id"), b.runs.sort_by("run_id")
    curves_a = a.curves.sort_by([("run_id", "ascending"), ("epoch", "ascending")])
    curves_b = b.curves.sort_by([("run_id", "ascending"), ("epoch", "ascending")])
    for column in ("run_id", "param_hash", "lane_width"):
        assert runs_a.column(column).to_pylist() == runs_b.column(column).to_pylist(), column
    metrics = [c for c in curves_a.column_names if c not in ("run_id", "variant_label", "seed", "epoch")]
    assert metrics
    for m in metrics:
        # float32 bit patterns, not a tolerance
        x = curves_a.column(m).to_numpy().astype(np.float32).view(np.uint32)
        y = curves_b.column(m).to_numpy().astype(np.float32).view(np.uint32)
        np.testing.assert_array_equal(x, y, err_msg=m)


@pytest.fixture(scope="session")
def same_bits():
    """same_bits(a, b): two opened result sets hold the same runs, parameter hashes, widths and curve bits."""
    return _assert_same_bits
