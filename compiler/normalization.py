"""Normalization layers placed between a hidden layer's affine map and its activation.

Contract: each factory in :data:`REGISTRY` takes the layer's knobs (floats or traced f32
scalars) and returns a :class:`Normalizer` (a stax-like pair plus one flag):

- ``init(width) -> (params, state)``: learnable parameters (γ, β) and non-learned running
  statistics, both dicts of f32 arrays (empty when the layer has none);
- ``apply(params, state, x, mask, train) -> (y, new_state)``: ``x`` is ``[batch, width]`` or a
  feature map ``[batch, *positions, channels]`` (channels last, ``width`` of them); ``mask`` is
  ``f32[batch]`` (1 for a real example, 0 for padding) and restricts batch statistics to the
  real examples; ``train`` is a Python bool choosing the mode;
- ``uses_bias``: False when a preceding affine bias cannot change the output (it is then
  omitted, not merely left untrained).

:func:`diagnose` reads a trained run's per-epoch curves for a failure its normalization is
prone to (batch statistics without spread); the runs table stores what it finds as warnings.
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax.numpy as jnp
import numpy as np

__all__ = ["Normalizer", "none", "batch", "layer", "batch_axes", "layer_axes", "REGISTRY", "diagnose",
           "BN_COLLAPSE_RATIO"]

# A batch-normalized layer whose gradient norm falls below this fraction of the output layer's
# has stopped learning: its batch statistics have (nearly) no spread left.
BN_COLLAPSE_RATIO = 1e-4


class Normalizer(NamedTuple):
    init: Callable
    apply: Callable
    uses_bias: bool


def none() -> Normalizer:
    """The identity: no parameters, no statistics."""
    return Normalizer(lambda width: ({}, {}), lambda params, state, x, mask, train: (x, state), True)


def batch_axes(rank: int) -> tuple[int, ...]:
    """Axes of batch statistics: the batch and every position, so each channel (the last axis)
    has one mean and variance (Ioffe & Szegedy 2015, §3.2: for convolutional layers the
    statistics are shared by every location of a feature map)."""
    return tuple(range(rank - 1))


def layer_axes(rank: int) -> tuple[int, ...]:
    """Axes of layer statistics: every axis but the batch, the units of a dense layer or the
    positions and channels of a feature map (Ba, Kiros & Hinton 2016, §3 and §6.7)."""
    return tuple(range(1, rank))


def _affine_params(width):
    return {"gamma": jnp.ones((width,), jnp.float32), "beta": jnp.zeros((width,), jnp.float32)}


def batch(momentum=0.9, epsilon=1e-5) -> Normalizer:
    """Batch normalization (Ioffe & Szegedy 2015).

    Training (Alg. 1), per neuron (per channel of a feature map, over the batch and every
    position: :func:`batch_axes`) over the ``m`` real values of the mini-batch:
    ``μ = Σ x_i / m``, ``σ² = Σ (x_i − μ)² / m`` (biased), ``x̂ = (x − μ)/√(σ² + ε)``,
    ``y = γ x̂ + β``. Inference (Alg. 2) uses population statistics: here exponential running
    averages ``s ← momentum·s + (1 − momentum)·batch`` (``momentum`` weights the *old* value) of
    ``μ`` and of the unbiased variance ``m/(m − 1)·σ²``. Running statistics start at mean 0,
    variance 1. Subtracting ``μ`` cancels any per-neuron shift, so a preceding bias is dropped.
    """

    def init(width):
        return _affine_params(width), {"mean": jnp.zeros((width,), jnp.float32),
                                       "var": jnp.ones((width,), jnp.float32)}

    def apply(params, state, x, mask, train):
        if train:
            axes = batch_axes(x.ndim)
            w = jnp.ones(x.shape[:1], x.dtype) if mask is None else mask
            w = w.reshape(w.shape + (1,) * (x.ndim - 1))
            m = jnp.sum(w)
            if x.ndim > 2:  # every position of a real example is a value of its channel
                m = m * (x.size // (x.shape[0] * x.shape[-1]))
            mu = jnp.sum(w * x, axis=axes) / m
            var = jnp.sum(w * jnp.square(x - mu), axis=axes) / m
            # A batch of one real example has no unbiased variance; keep the old estimate's scale.
            unbiased = var * m / jnp.maximum(m - 1.0, 1.0)
            new_state = {"mean": momentum * state["mean"] + (1.0 - momentum) * mu,
                         "var": momentum * state["var"] + (1.0 - momentum) * unbiased}
        else:
            mu, var, new_state = state["mean"], state["var"], state
        x_hat = (x - mu) / jnp.sqrt(var + epsilon)
        return params["gamma"] * x_hat + params["beta"], new_state

    return Normalizer(init, apply, False)


def layer(epsilon=1e-5) -> Normalizer:
    """Layer normalization (Ba, Kiros & Hinton 2016, eq. 4), per example over the ``H`` units of
    the layer (every position and channel of a feature map: :func:`layer_axes`):
    ``μ = Σ a_j / H``, ``σ = √(Σ (a_j − μ)² / H + ε)``, ``y = g ⊙ (a − μ)/σ + b`` with one gain and
    bias per channel.
    The same computation in training and inference; no batch statistics, so padding rows do not
    matter. A preceding bias is kept: it shifts units differently, which the per-example mean
    does not cancel."""

    def apply(params, state, x, mask, train):
        axes = layer_axes(x.ndim) if x.ndim > 2 else -1
        mu = jnp.mean(x, axis=axes, keepdims=True)
        var = jnp.mean(jnp.square(x - mu), axis=axes, keepdims=True)
        return params["gamma"] * (x - mu) / jnp.sqrt(var + epsilon) + params["beta"], state

    return Normalizer(lambda width: (_affine_params(width), {}), apply, True)


REGISTRY: dict[str, Callable[..., Normalizer]] = {"none": none, "batch": batch, "layer": layer}


def diagnose(kind: str, hidden: int, curves: dict[str, np.ndarray]) -> list[str]:
    """Batch-normalized layers whose gradient collapsed, judged from the per-layer gradient norms
    (``grad_norm_layer1`` … ``grad_norm_layer{hidden + 1}``, the last the output layer's) of a run with
    ``hidden`` hidden layers normalized by ``kind``; one line per layer."""
    if kind != "batch":
        return []
    out_norm = curves.get(f"grad_norm_layer{hidden + 1}")
    if out_norm is None:
        return []
    found = []
    for layer in range(1, hidden + 1):
        g = curves.get(f"grad_norm_layer{layer}")
        if g is None:
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = g / out_norm
        bad = np.flatnonzero(np.isfinite(ratio) & (ratio < BN_COLLAPSE_RATIO) & (out_norm > 0))
        if bad.size:
            e = int(bad[0])
            found.append(f"batch-normalized layer l{layer}: gradient collapsed from epoch {e + 1} "
                         f"(|g| {g[e]:.2e} vs output layer {out_norm[e]:.2e}); "
                         "are the batch rows nearly identical?")
    return found
