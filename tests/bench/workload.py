"""The benchmark's workloads as plain numbers, and their data, for the hand-written baselines.

Contract: :func:`workload` ``(spec_path) -> dict`` reads one of ``specs/*.toml`` with the
standard library (no lesion import) into a flat description: data (generator settings), layer
widths, epochs, batch size, momentum, learning rates, seeds. :func:`arrays` ``(w) -> (x, y)``
draws the same rows as lesion's built-in ``blobs`` generator (PCG64 from ``data.seed``: class
centres uniform in [−3, 3]^features, balanced shuffled labels, isotropic spread 0.5 + noise), so
every way trains on identical data. :func:`split` gives one run's train/validation rows from its
seed with training-split standardization — the usual practice; the draw is numpy's, not
lesion's, so baseline and lesion runs share the data but not the split or the initial weights.

Only numpy and the standard library are imported here: the baselines pay for their own imports.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np

__all__ = ["workload", "arrays", "split", "matmul_flops"]


def workload(spec_path: str | Path) -> dict:
    spec = tomllib.loads(Path(spec_path).read_text())
    data, opt, training = spec["data"], spec["optimizer"], spec["training"]
    (axis,) = spec["ablation"]["axis"]
    assert axis["key"] == "optimizer.learning_rate", "the benchmark varies the learning rate only"
    assert data["generator"] == "blobs" and spec["divergence"]["kind"] == "kl"
    seeds = spec["study"]["seeds"]
    n_val = int(round(data["samples"] * data["validation"]))
    return {
        "name": spec["study"]["name"],
        "samples": data["samples"], "features": data["features"], "classes": data["classes"],
        "noise": data["noise"], "data_seed": data.get("seed", 0),
        "n_train": data["samples"] - n_val, "n_val": n_val,
        "widths": [data["features"], *spec["model"]["hidden"], data["classes"]],
        "epochs": training["epochs"], "batch_size": training["batch_size"],
        "momentum": opt["momentum"], "learning_rates": list(axis["values"]),
        "seeds": list(range(seeds)) if isinstance(seeds, int) else list(seeds),
    }


def arrays(w: dict) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.Generator(np.random.PCG64(w["data_seed"]))
    centres = rng.uniform(-3.0, 3.0, (w["classes"], w["features"]))
    label = rng.permutation(np.arange(w["samples"]) % w["classes"])
    x = centres[label] + (0.5 + w["noise"]) * rng.standard_normal((w["samples"], w["features"]))
    return x.astype(np.float32), label.astype(np.int32)


def split(w: dict, x: np.ndarray, y: np.ndarray, seed: int):
    """(x_train, y_train, x_val, y_val), standardized with the training rows' mean and std."""
    order = np.random.default_rng(seed).permutation(len(x))
    tr, va = order[:w["n_train"]], order[w["n_train"]:]
    mean, std = x[tr].mean(axis=0), x[tr].std(axis=0)
    std = np.where(std > 0, std, 1.0).astype(np.float32)
    return (x[tr] - mean) / std, y[tr], (x[va] - mean) / std, y[va]


def matmul_flops(w: dict) -> dict:
    """Matmul FLOPs of the whole study (every run): a dense layer costs 2·fan_in·fan_out per
    example forward; training costs ≈ 3× forward (forward, input gradient, weight gradient —
    common practice); each epoch also runs the validation rows forward once."""
    forward = 2 * sum(a * b for a, b in zip(w["widths"][:-1], w["widths"][1:]))
    steps = w["n_train"] // w["batch_size"]
    per_epoch = 3 * forward * steps * w["batch_size"] + forward * w["n_val"]
    runs = len(w["learning_rates"]) * len(w["seeds"])
    return {"forward_per_example": forward, "per_run": per_epoch * w["epochs"],
            "total": per_epoch * w["epochs"] * runs}
