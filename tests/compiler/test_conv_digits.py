"""A small convolutional network on scikit-learn's bundled 8×8 digits, through lesion's own data
loading and compiled program, against the accuracy common practice expects of it and against an
MLP of (nearly) the same number of parameters over paired seeds."""

import pathlib
import runpy

import jax
import numpy as np
import pytest
import scipy.stats

from compiler import build
from compiler.data import load_data
from compiler.expand import expand
from compiler.spec import Spec

ROOT = pathlib.Path(__file__).resolve().parents[2]
# 9·1·16 + 16 + 9·16·32 + 32 + (2·2·32)·10 + 10 = 6090 parameters;
# the MLP 64 → 81 → 10 has 64·81 + 81 + 81·10 + 10 = 6085.
CONV = {"kind": "conv", "blocks": [{"channels": 16, "pool": 2}, {"channels": 32, "pool": 2}]}
MLP = {"hidden": [81]}


@pytest.fixture(scope="module")
def digits(tmp_path_factory) -> pathlib.Path:
    folder = tmp_path_factory.mktemp("digits")
    runpy.run_path(str(ROOT / "specs" / "digits" / "make_digits.py"))["write_digits"](folder / "digits.npz")
    return folder


def _variant(network, epochs):
    raw = {"study": {"name": "digits"},
           "data": {"kind": "file", "path": "digits.npz", "target": "y", "features": ["x"], "validation": 0.25},
           "model": network, "optimizer": {"kind": "adam", "learning_rate": 0.003},
           "training": {"epochs": epochs, "batch_size": 32}}
    return expand(Spec.model_validate(raw))[0].spec


def _final_accuracy(folder, network, seeds, epochs):
    v = _variant(network, epochs)
    ds = load_data(v, folder)
    prog = build.compile_program([v], ds)
    knobs = prog.pack([v] * len(seeds))
    keys = jax.vmap(build.seed_key)(np.asarray(seeds, np.uint32))
    _, metrics = jax.jit(jax.vmap(prog.train, in_axes=(0, 0, None, None)))(knobs, keys, ds.x, ds.y)
    return ds, np.asarray(metrics["val_accuracy"])[:, -1]


def test_the_loader_keeps_the_images_shape(digits):
    ds = load_data(_variant(CONV, 1), digits)
    assert ds.x.shape == (1797, 8, 8, 1) and ds.classes == 10


def test_a_small_conv_net_reaches_97_percent_on_digits(digits):
    # common practice: a small convolutional network reaches about 97-98 % on the held-out 8×8
    # digits within a few epochs (from memory). One seed, the fast variant of the slow check
    # below: over seeds 0-9 this network measured 0.9715 on average, between 0.962 and 0.982,
    # so a single seed is a regression check of this seed's run, not the claim itself.
    _, accuracy = _final_accuracy(digits, CONV, [0], epochs=8)
    assert accuracy[0] >= 0.97, accuracy


@pytest.mark.slow
def test_conv_against_an_mlp_of_equal_parameters_over_paired_seeds(digits):
    # Paired seeds: the same split per seed for both networks; a Wilcoxon signed-rank test
    # (scipy.stats.wilcoxon) on the per-seed differences. Measured (8 epochs, seeds 0-9): conv
    # 0.9715 ± 0.0083, MLP 0.9717 ± 0.0074, conv − MLP −0.0002 (5 wins of 10), p = 0.98: at equal
    # parameters and this budget of epochs the convolutional network does NOT beat the MLP on
    # these tiny images. What is asserted is what was found: the conv net's mean reaches the
    # common-practice 97 %, and it is within one point of the MLP either way.
    seeds = list(range(10))
    _, conv = _final_accuracy(digits, CONV, seeds, epochs=8)
    _, mlp = _final_accuracy(digits, MLP, seeds, epochs=8)
    diff = conv - mlp
    print(f"conv {conv.mean():.4f} ± {conv.std(ddof=1):.4f}, mlp {mlp.mean():.4f} ± {mlp.std(ddof=1):.4f}, "
          f"conv − mlp {diff.mean():+.4f} (wins {int(np.sum(diff > 0))}/{len(seeds)}), "
          f"Wilcoxon p = {scipy.stats.wilcoxon(diff).pvalue:.3g}")
    assert conv.mean() >= 0.97
    assert abs(diff.mean()) < 0.01
