"""The network: a multilayer perceptron as a stax-like (init, apply) pair.

Contract: :func:`mlp` returns a :class:`Network` with

- ``init(key, in_width) -> (params, state)``: ``params`` is ``{"l1": {...}, …, "lL": {...}}``
  (the last is the output layer), each layer a dict with ``W`` ``[fan_in, fan_out]``, ``b``
  (omitted when the normalizer makes it irrelevant) and the normalizer's γ/β; ``state`` holds the
  normalizer's running statistics per hidden layer. Layer ``i``'s weights are drawn from
  ``fold_in(key, i)``, so networks whose layer shapes agree start from the same weights
  whatever normalization or dropout they use (paired comparisons).
- ``apply(params, state, x, key, mask, train) -> (z, new_state)``: ``z`` is the raw output
  (before the divergence's link). Each hidden layer is
  ``h ← dropout(act(norm(dense(h) + b)))``; the output layer is ``z = hW + b``.
  ``key`` feeds the dropout masks (per layer ``fold_in(key, i)``); ``mask`` (``f32[batch]``)
  marks real examples for batch statistics; ``train`` is a Python bool.
- ``layers``: the layer names in order.

:func:`weight_mask` marks the weight matrices of a params tree (what the L2 penalty, weight decay
and the weight norm act on).
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp

__all__ = ["Network", "mlp", "weight_mask", "layer_names", "ACTIVATIONS", "INITIALIZERS"]

ACTIVATIONS: dict[str, Callable] = {
    "relu": jax.nn.relu,
    "tanh": jnp.tanh,
    "sigmoid": jax.nn.sigmoid,
    # Hendrycks & Gimpel 2016: x·Φ(x) with the exact normal CDF, not the tanh approximation.
    "gelu": lambda x: jax.nn.gelu(x, approximate=False),
    "identity": lambda x: x,
}

# He et al. 2015 (variance 2/fan_in) and Glorot & Bengio 2010 (variance 2/(fan_in + fan_out)),
# drawn from untruncated normals or from uniforms of the same variance.
INITIALIZERS: dict[str, Callable] = {
    "he_normal": jax.nn.initializers.variance_scaling(2.0, "fan_in", "normal"),
    "he_uniform": jax.nn.initializers.variance_scaling(2.0, "fan_in", "uniform"),
    "glorot_normal": jax.nn.initializers.variance_scaling(1.0, "fan_avg", "normal"),
    "glorot_uniform": jax.nn.initializers.variance_scaling(1.0, "fan_avg", "uniform"),
}


class Network(NamedTuple):
    init: Callable
    apply: Callable
    layers: tuple[str, ...]


def layer_names(depth: int) -> tuple[str, ...]:
    """``("l1", …, "l<depth>")`` for ``depth`` affine layers, the output layer last."""
    return tuple(f"l{i}" for i in range(1, depth + 1))


def mlp(hidden, out_width, activation, init, normalizer, dropout) -> Network:
    """An MLP with hidden widths ``hidden`` (possibly empty: a linear model), ``out_width``
    outputs, activation and initializer names from :data:`ACTIVATIONS` / :data:`INITIALIZERS`,
    a :class:`compiler.normalization.Normalizer` and a :class:`compiler.regularization.Dropout`
    for the hidden layers."""
    hidden = tuple(hidden)
    names = layer_names(len(hidden) + 1)
    act = ACTIVATIONS[activation]
    draw = INITIALIZERS[init]

    def init_fn(key, in_width):
        widths = (in_width, *hidden, out_width)
        params, state = {}, {}
        for i, name in enumerate(names):
            layer = {"W": draw(jax.random.fold_in(key, i + 1), widths[i:i + 2], jnp.float32)}
            is_hidden = i < len(hidden)
            if not is_hidden or normalizer.uses_bias:
                layer["b"] = jnp.zeros((widths[i + 1],), jnp.float32)
            if is_hidden:
                norm_params, state[name] = normalizer.init(widths[i + 1])
                layer.update(norm_params)
            params[name] = layer
        return params, state

    def apply_fn(params, state, x, key, mask, train):
        h, new_state = x, {}
        for i, name in enumerate(names[:-1]):
            p = params[name]
            layer_key = jax.random.fold_in(key, i + 1)
            u = dropout.dense(jax.random.fold_in(layer_key, 0), h, p["W"], train)
            if "b" in p:
                u = u + p["b"]
            norm_params = {k: v for k, v in p.items() if k not in ("W", "b")}
            u, new_state[name] = normalizer.apply(norm_params, state[name], u, mask, train)
            h = dropout.activation(jax.random.fold_in(layer_key, 1), act(u), train)
        out = params[names[-1]]
        return h @ out["W"] + out["b"], new_state

    return Network(init_fn, apply_fn, names)


def weight_mask(params):
    """A pytree of bools shaped like ``params``: True on weight matrices ``W`` only."""
    return {name: {k: k == "W" for k in layer} for name, layer in params.items()}
