"""The network: a multilayer perceptron as a stax-like (init, apply) pair.

Contract: :data:`FAMILIES` maps the spec's ``model.kind`` to a factory; :func:`mlp` (``"mlp"``)
returns a :class:`Network` with

- ``init(key, in_width) -> (params, state)``: ``params`` is ``{"l1": {...}, …, "lL": {...}}``
  (the last is the output layer), each layer a dict with ``W`` ``[fan_in, fan_out]``, ``b``
  (omitted when the normalizer makes it irrelevant) and the normalizer's γ/β; ``state`` holds the
  normalizer's running statistics per hidden layer. All weight matrices come from one draw from
  ``key`` (:func:`draw_weights`), so networks whose layer shapes agree start from the same
  weights whatever normalization or dropout they use (paired comparisons).
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

import math
from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp

__all__ = ["Network", "Family", "Cost", "mlp", "mlp_cost", "FAMILIES", "weight_mask", "layer_names", "layer_metric",
           "draw_weights", "ACTIVATIONS", "INITIALIZERS"]

ACTIVATIONS: dict[str, Callable] = {
    "relu": jax.nn.relu,
    "tanh": jnp.tanh,
    "sigmoid": jax.nn.sigmoid,
    # Hendrycks & Gimpel 2016: x·Φ(x) with the exact normal CDF, not the tanh approximation.
    "gelu": lambda x: jax.nn.gelu(x, approximate=False),
    "identity": lambda x: x,
}

# He et al. 2015 (variance 2/fan_in) and Glorot & Bengio 2010 (variance 2/(fan_in + fan_out)),
# drawn from untruncated normals or from uniforms of the same variance:
# name -> (unit-variance distribution, variance(fan_in, fan_out)).
INITIALIZERS: dict[str, tuple[str, Callable]] = {
    "he_normal": ("normal", lambda fan_in, fan_out: 2.0 / fan_in),
    "he_uniform": ("uniform", lambda fan_in, fan_out: 2.0 / fan_in),
    "glorot_normal": ("normal", lambda fan_in, fan_out: 2.0 / (fan_in + fan_out)),
    "glorot_uniform": ("uniform", lambda fan_in, fan_out: 2.0 / (fan_in + fan_out)),
}


def draw_weights(init: str, key, shapes) -> list[jax.Array]:
    """Weight matrices of ``shapes`` (each ``(fan_in, fan_out)``) from one draw of unit-variance
    numbers, consecutive slices scaled to the initializer's variance.

    One draw rather than one per matrix: every random draw is its own block of generated code,
    and XLA:CPU compiles three normal draws about four times slower than one of the same total
    size. The draw is prefix-stable, so networks whose leading layers agree in shape get the same
    leading matrices."""
    kind, variance = INITIALIZERS[init]
    sizes = [fan_in * fan_out for fan_in, fan_out in shapes]
    total = sum(sizes)
    if kind == "normal":
        unit = jax.random.normal(key, (total,), jnp.float32)
    else:  # uniform on [-√3, √3): variance 1
        unit = jax.random.uniform(key, (total,), jnp.float32, -1.0) * jnp.sqrt(jnp.float32(3.0))
    out, start = [], 0
    for (fan_in, fan_out), size in zip(shapes, sizes):
        scale = jnp.sqrt(jnp.float32(variance(fan_in, fan_out)))
        out.append(unit[start:start + size].reshape(fan_in, fan_out) * scale)
        start += size
    return out


class Network(NamedTuple):
    init: Callable
    apply: Callable
    layers: tuple[str, ...]


def layer_names(depth: int) -> tuple[str, ...]:
    """``("l1", …, "l<depth>")`` for ``depth`` affine layers, the output layer last."""
    return tuple(f"l{i}" for i in range(1, depth + 1))


def layer_metric(name: str) -> str:
    """The per-epoch metric of a layer's gradient norm: ``l3`` → ``grad_norm_layer3`` (not
    ``grad_norm_l3``, which reads as an L3 norm)."""
    return f"grad_norm_layer{name.removeprefix('l')}"


def mlp(hidden, out_width, activation, init, normalizer, dropout) -> Network:
    """An MLP with hidden widths ``hidden`` (possibly empty: a linear model), ``out_width``
    outputs, activation and initializer names from :data:`ACTIVATIONS` / :data:`INITIALIZERS`,
    a :class:`compiler.normalization.Normalizer` and a :class:`compiler.regularization.Dropout`
    for the hidden layers."""
    hidden = tuple(hidden)
    names = layer_names(len(hidden) + 1)
    act = ACTIVATIONS[activation]

    def init_fn(key, in_width):
        widths = (in_width, *hidden, out_width)
        weights = draw_weights(init, key, list(zip(widths[:-1], widths[1:])))
        params, state = {}, {}
        for i, name in enumerate(names):
            layer = {"W": weights[i]}
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


class Cost(NamedTuple):
    """What a network declares about its size, per lane and per example, in float32 values: the
    resource guard's memory and time model is written in these and nothing else of the network."""

    parameters: int   # an upper bound: every unit counted with a bias, γ and β, whatever the normalizer
    activations: int  # kept per example for the backward pass, the input and the output included
    macs: int         # multiply-accumulates of one example's forward pass
    layers: int       # layers with a gradient norm of their own (``grad_norm_layer<i>``)
    masks: int        # per-example weight masks a training step draws (DropConnect), per example


def mlp_cost(in_shape, out_width, hidden, dropout, **fields) -> Cost:
    """The MLP's :class:`Cost` on inputs of ``in_shape`` (one example's): ``Σ a·b`` weights over
    consecutive widths, three vectors per unit; a DropConnect mask (``dropout.masks_weights``) is
    one per example over the parameters."""
    widths = [math.prod(in_shape), *hidden, out_width]
    parameters = sum(a * b + 3 * b for a, b in zip(widths[:-1], widths[1:]))
    return Cost(parameters, sum(widths), sum(a * b for a, b in zip(widths[:-1], widths[1:])), len(widths) - 1,
                parameters if dropout.masks_weights else 0)


class Family(NamedTuple):
    """A network family: ``network`` takes the ``[model]`` fields by name plus ``out_width``,
    ``normalizer`` and ``dropout`` and returns a :class:`Network`; ``cost`` takes ``in_width``,
    ``out_width``, ``dropout`` and the same fields and returns its :class:`Cost`."""

    network: Callable[..., Network]
    cost: Callable[..., Cost]


# Network families by the spec's ``model.kind``.
FAMILIES: dict[str, Family] = {"mlp": Family(mlp, mlp_cost)}


def weight_mask(params):
    """A pytree of bools shaped like ``params``: True on weight matrices ``W`` only."""
    return {name: {k: k == "W" for k in layer} for name, layer in params.items()}
