"""Zero knobs: leaving out work that a knob of 0 makes the identity must not change a bit."""

import pathlib

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from compiler import build
from compiler.data import load_data
from compiler.expand import expand
from compiler.spec import Spec

def _variant(kind: str, rate: float):
    raw = {"study": {"name": "z"}, "data": {"generator": "blobs", "samples": 96, "features": 3, "classes": 3},
           "model": {"hidden": [6, 6]}, "regularization": {"dropout": {"kind": kind, "rate": rate}},
           "training": {"epochs": 2, "batch_size": 16}}
    return expand(Spec.model_validate(raw))[0].spec


def _train(kind: str, zero: bool):
    """The rate-0 variant, trained by a program built for it alone (the rate is 0 in every lane)
    or for it and a variant of rate 0.5 (it is not)."""
    v = _variant(kind, 0.0)
    ds = load_data(v, pathlib.Path("."))
    prog = build.compile_program([v] if zero else [v, _variant(kind, 0.5)], ds)
    assert ("regularization.dropout.rate" in prog.zero_knobs) == zero
    knobs = {k: jnp.float32(x) for k, x in build.knob_vector(v).items()}
    args = (knobs, build.seed_key(3), ds.x, ds.y)
    draws = str(jax.make_jaxpr(prog.train)(*args)).count("random_bits")
    carry, metrics = jax.jit(prog.train)(*args)
    return draws, build.param_hash(prog.params(carry)), {m: np.asarray(metrics[m]) for m in prog.metric_names}


# Srivastava et al. 2014 §4: with retention probability p = 1 (rate 0) every unit is kept and the
# training-time network is the plain network; inverted dropout's 1/p scale is then exactly 1.
@pytest.mark.parametrize("kind", ["inverted", "scaled"])
def test_zero_dropout_rate_without_masks_is_bit_identical(kind):
    draws, digest, metrics = _train(kind, zero=False)
    draws_zero, digest_zero, metrics_zero = _train(kind, zero=True)
    assert draws_zero < draws  # the masks really are left out
    assert digest_zero == digest
    for name, values in metrics.items():
        assert values.tobytes() == metrics_zero[name].tobytes(), name

