"""The networks: a multilayer perceptron and a convolutional network as stax-like (init, apply) pairs.

Contract: :data:`FAMILIES` maps the spec's ``model.kind`` to a :class:`Family` whose ``network``
factory — :func:`mlp` (``"mlp"``), :func:`conv` (``"conv"``) — returns a :class:`Network` with

- ``init(key, in_shape) -> (params, state)``: ``in_shape`` is one example's shape (an int for a
  vector). ``params`` is ``{"l1": {...}, …, "lL": {...}}`` (the last is the output layer), each
  layer a dict with ``W`` (``[fan_in, fan_out]``, or a convolution kernel
  ``[*window, in_channels, out_channels]``), ``b`` (omitted when the normalizer makes it
  irrelevant) and the normalizer's γ/β; ``state`` holds the normalizer's running statistics per
  hidden layer. All weights come from one draw from ``key`` (:func:`draw_weights`), so networks
  whose layer shapes agree start from the same weights whatever normalization or dropout they
  use (paired comparisons).
- ``apply(params, state, x, key, mask, train) -> (z, new_state)``: ``x`` is ``[batch, *in_shape]``,
  channels last; ``z`` is the raw output (before the divergence's link). ``key`` feeds the dropout
  masks (per layer ``fold_in(key, i)``); ``mask`` (``f32[batch]``) marks real examples for batch
  statistics; ``train`` is a Python bool.
- ``layers``: the layer names in order.

and whose ``cost`` (:func:`mlp_cost`, :func:`conv_cost`) declares the :class:`Cost` facts the
resource guard reads, pure Python (no jax).

:func:`weight_mask` marks the weight matrices of a params tree (what the L2 penalty, weight decay
and the weight norm act on).
"""

from __future__ import annotations

import itertools
import math
from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp

from compiler import shapes
from compiler.errors import UserError

__all__ = ["Network", "Family", "Cost", "mlp", "mlp_cost", "conv", "conv_cost", "FAMILIES", "ShapeError",
           "feature_shapes", "convolve", "pool", "weight_mask", "layer_names", "layer_metric", "draw_weights", "ACTIVATIONS",
           "INITIALIZERS"]

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


class ShapeError(UserError, ValueError):
    """A network that does not fit its data's shape; the message names the key to change."""


def draw_weights(init: str, key, shapes) -> list[jax.Array]:
    """Weights of ``shapes`` from one draw of unit-variance numbers, consecutive slices scaled to
    the initializer's variance. Each entry is ``(fan_in, fan_out)`` (a matrix of that shape) or
    ``(fan_in, fan_out, shape)``: a convolution kernel, whose fans count its window too
    (``window·in_channels``, ``window·out_channels``; common practice).

    One draw rather than one per matrix: every random draw is its own block of generated code,
    and XLA:CPU compiles three normal draws about four times slower than one of the same total
    size. The draw is prefix-stable, so networks whose leading layers agree in shape get the same
    leading matrices."""
    kind, variance = INITIALIZERS[init]
    shapes = [(s[0], s[1], tuple(s[2]) if len(s) > 2 else (s[0], s[1])) for s in shapes]
    sizes = [math.prod(shape) for _, _, shape in shapes]
    total = sum(sizes)
    if kind == "normal":
        unit = jax.random.normal(key, (total,), jnp.float32)
    else:  # uniform on [-√3, √3): variance 1
        unit = jax.random.uniform(key, (total,), jnp.float32, -1.0) * jnp.sqrt(jnp.float32(3.0))
    out, start = [], 0
    for (fan_in, fan_out, shape), size in zip(shapes, sizes):
        scale = jnp.sqrt(jnp.float32(variance(fan_in, fan_out)))
        out.append(unit[start:start + size].reshape(shape) * scale)
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


def _shape_of(in_shape) -> tuple[int, ...]:
    return (in_shape,) if isinstance(in_shape, int) else tuple(in_shape)


def _dense_init(params, state, names, weights, widths, normalizer):
    """The dense layers ``names`` (hidden ones, then the output layer) into ``params``/``state``."""
    hidden = len(names) - 1
    for i, name in enumerate(names):
        layer = {"W": weights[i]}
        is_hidden = i < hidden
        if not is_hidden or normalizer.uses_bias:
            layer["b"] = jnp.zeros((widths[i + 1],), jnp.float32)
        if is_hidden:
            norm_params, state[name] = normalizer.init(widths[i + 1])
            layer.update(norm_params)
        params[name] = layer


def _dense_apply(params, state, new_state, names, h, key, first, mask, train, act, normalizer, dropout):
    """``h ← dropout(act(norm(dense(h) + b)))`` per hidden layer, then ``z = hW + b``; the layer
    keys are ``fold_in(key, first + i)``."""
    for i, name in enumerate(names[:-1]):
        p = params[name]
        layer_key = jax.random.fold_in(key, first + i)
        u = dropout.dense(jax.random.fold_in(layer_key, 0), h, p["W"], train)
        if "b" in p:
            u = u + p["b"]
        norm_params = {k: v for k, v in p.items() if k not in ("W", "b")}
        u, new_state[name] = normalizer.apply(norm_params, state[name], u, mask, train)
        h = dropout.activation(jax.random.fold_in(layer_key, 1), act(u), train)
    out = params[names[-1]]
    return h @ out["W"] + out["b"]


def mlp(hidden, out_width, activation, init, normalizer, dropout) -> Network:
    """An MLP with hidden widths ``hidden`` (possibly empty: a linear model), ``out_width``
    outputs, activation and initializer names from :data:`ACTIVATIONS` / :data:`INITIALIZERS`,
    a :class:`compiler.normalization.Normalizer` and a :class:`compiler.regularization.Dropout`
    for the hidden layers. An example of any shape is flattened (C order) into one vector."""
    hidden = tuple(hidden)
    names = layer_names(len(hidden) + 1)
    act = ACTIVATIONS[activation]

    def init_fn(key, in_shape):
        widths = (math.prod(_shape_of(in_shape)), *hidden, out_width)
        weights = draw_weights(init, key, list(zip(widths[:-1], widths[1:])))
        params, state = {}, {}
        _dense_init(params, state, names, weights, widths, normalizer)
        return params, state

    def apply_fn(params, state, x, key, mask, train):
        h = x if x.ndim == 2 else x.reshape(x.shape[0], -1)
        new_state = {}
        z = _dense_apply(params, state, new_state, names, h, key, 1, mask, train, act, normalizer, dropout)
        return z, new_state

    return Network(init_fn, apply_fn, names)


def convolve(x, kernel, stride: int, padding: str):
    """Cross-correlation of ``x`` (``[batch, *positions, in_channels]``) with ``kernel``
    (``[*window, in_channels, out_channels]``) along every spatial axis at ``stride``, ``"valid"``
    (no padding) or ``"same"`` (zeros around the input, so stride 1 keeps its size).

    Written as im2col: the input's window taps as static strided slices side by side (tap-major,
    then input channel, the kernel's C order), then one matrix product. ``lax.conv_general_dilated``
    computes the same, but XLA:CPU runs a convolution inside a loop body (the epoch's scan) far
    more slowly than at the top of a program (jax-ml/jax#12868), and vmapped over lanes' kernels
    it becomes a grouped convolution: measured on the benchmark's conv workload, one training step
    of 16 lanes inside a scan took about 14× longer than this form, whose product vmaps into one
    lane-batched ``dot_general``."""
    spatial = x.ndim - 2
    window = kernel.shape[:spatial]
    pads = [shapes.padding(k, padding) for k in window]
    x = jnp.pad(x, ((0, 0), *pads, (0, 0)))
    out = [(n - k) // stride + 1 for n, k in zip(x.shape[1:-1], window)]
    taps = [x[(slice(None), *(slice(o, o + stride * (m - 1) + 1, stride) for o, m in zip(offset, out)))]
            for offset in itertools.product(*(range(k) for k in window))]
    columns = taps[0] if len(taps) == 1 else jnp.concatenate(taps, axis=-1)
    return columns @ kernel.reshape(-1, kernel.shape[-1])


def pool(x, window: int, pooling: str):
    """Non-overlapping ``window``×… pooling over every spatial axis of ``x`` (``[batch,
    *positions, channels]``): the maximum or the mean of each window; positions left over at
    the end of an axis are dropped.

    A reshape into windows and a reduction over them, not ``lax.reduce_window``: its gradient
    (``select_and_scatter``) vmapped over lanes measured about 6× slower than the reduction's.
    The maximum's gradient goes to the window's largest entry, split evenly among equal ones."""
    spatial = x.ndim - 2
    kept = [n // window for n in x.shape[1:-1]]
    x = x[(slice(None), *(slice(0, m * window) for m in kept))]
    x = x.reshape(x.shape[0], *(d for m in kept for d in (m, window)), x.shape[-1])
    axes = tuple(range(2, 2 + 2 * spatial, 2))
    return jnp.max(x, axis=axes) if pooling == "max" else jnp.mean(x, axis=axes)


def feature_shapes(in_shape, blocks) -> list[tuple[int, ...]]:
    """The shape of one example after each convolution block (channels last), by
    :mod:`compiler.shapes`' arithmetic. Raises :class:`ShapeError` for examples no convolution
    takes or a block that leaves no position: the spec's check catches both where the shape is
    declared, this where only the data says it (an NPZ array's own shape)."""
    in_shape = _shape_of(in_shape)
    wrong = shapes.misfit(in_shape, blocks)
    if wrong is not None:
        index, message = wrong
        if index is None:
            raise ShapeError(f'model.kind = "conv" {message}; set data.shape (e.g. [8, 8, 1]) or use kind = "mlp"')
        raise ShapeError(f"model.blocks[{index}]: {message}")
    return shapes.feature_shapes(in_shape, blocks)


def conv(blocks, pooling, hidden, out_width, activation, init, normalizer, dropout) -> Network:
    """A convolutional network for 1-D (``[length, channels]``) or 2-D (``[height, width,
    channels]``) examples: per block ``h ← pool(dropout(act(norm(W ⋆ h + b))))`` — a
    cross-correlation of window ``kernel`` along every spatial axis, ``stride``, ``"same"`` or
    ``"valid"`` padding, then ``pool``×… windows of ``pooling`` (``"max"`` or ``"average"``,
    stride = window; ``pool = 1``: none) — then the feature maps flattened (C order) into the
    dense ``hidden`` layers and the output layer, as in :func:`mlp`.

    Normalization acts per channel over the batch and positions (batch) or per example over
    positions and channels (layer); dropout draws its masks per unit of the feature map, per
    channel (spatial), or not at all on blocks (connect: DropConnect acts on the dense layers'
    weights only)."""
    blocks, hidden = tuple(blocks), tuple(hidden)
    names = layer_names(len(blocks) + len(hidden) + 1)
    conv_names, dense_names = names[:len(blocks)], names[len(blocks):]
    act = ACTIVATIONS[activation]

    def init_fn(key, in_shape):
        in_shape = _shape_of(in_shape)
        shapes = feature_shapes(in_shape, blocks)
        spatial = len(in_shape) - 1
        entries, channels = [], in_shape[-1]
        for block in blocks:
            window = block.kernel ** spatial
            entries.append((window * channels, window * block.channels,
                            (*(block.kernel,) * spatial, channels, block.channels)))
            channels = block.channels
        widths = (math.prod(shapes[-1]) if shapes else math.prod(in_shape), *hidden, out_width)
        entries += list(zip(widths[:-1], widths[1:]))
        weights = draw_weights(init, key, entries)
        params, state = {}, {}
        for i, (name, block) in enumerate(zip(conv_names, blocks)):
            layer = {"W": weights[i]}
            if normalizer.uses_bias:
                layer["b"] = jnp.zeros((block.channels,), jnp.float32)
            norm_params, state[name] = normalizer.init(block.channels)
            layer.update(norm_params)
            params[name] = layer
        _dense_init(params, state, dense_names, weights[len(blocks):], widths, normalizer)
        return params, state

    def apply_fn(params, state, x, key, mask, train):
        h, new_state = x, {}
        for i, (name, block) in enumerate(zip(conv_names, blocks)):
            p = params[name]
            layer_key = jax.random.fold_in(key, i + 1)
            u = convolve(h, p["W"], block.stride, block.padding)
            if "b" in p:
                u = u + p["b"]
            norm_params = {k: v for k, v in p.items() if k not in ("W", "b")}
            u, new_state[name] = normalizer.apply(norm_params, state[name], u, mask, train)
            h = dropout.activation(jax.random.fold_in(layer_key, 1), act(u), train)
            if block.pool > 1:
                h = pool(h, block.pool, pooling)
        h = h.reshape(h.shape[0], -1)
        z = _dense_apply(params, state, new_state, dense_names, h, key, len(blocks) + 1, mask, train, act,
                         normalizer, dropout)
        return z, new_state

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


def conv_cost(in_shape, out_width, blocks, hidden, dropout, **fields) -> Cost:
    """The convolutional network's :class:`Cost` on examples of ``in_shape``: per block a kernel
    of ``window·in_channels·out_channels`` weights and three vectors per channel, applied at every
    position of its output (which the backward pass keeps, before pooling); then the dense layers
    as :func:`mlp_cost` counts them on the flattened feature maps. DropConnect masks only the
    dense layers' weights (:func:`conv`), so only they count as masks."""
    in_shape = _shape_of(in_shape)
    spatial = len(in_shape) - 1
    parameters = macs = 0
    activations, channels = math.prod(in_shape), in_shape[-1]
    maps = feature_shapes(in_shape, blocks)
    for block, shape in zip(blocks, [in_shape, *maps]):
        kernel = block.kernel ** spatial * channels * block.channels
        # Every position the convolution computes, also those a pooling window leaves over.
        positions = math.prod(shapes.convolved(n, block) for n in shape[:-1])
        parameters += kernel + 3 * block.channels
        macs += positions * kernel
        activations += positions * block.channels
        channels = block.channels
    flat = math.prod(maps[-1]) if maps else math.prod(in_shape)
    dense = mlp_cost((flat,), out_width, hidden, dropout)
    # The flattened maps are the dense part's input, already counted as the last block's output
    # (or as the input itself).
    return Cost(parameters + dense.parameters, activations + dense.activations - flat, macs + dense.macs,
                len(blocks) + dense.layers, dense.masks)


class Family(NamedTuple):
    """A network family: ``network`` takes the ``[model]`` fields by name plus ``out_width``,
    ``normalizer`` and ``dropout`` and returns a :class:`Network`; ``cost`` takes ``in_shape``,
    ``out_width``, ``dropout`` and the same fields and returns its :class:`Cost`."""

    network: Callable[..., Network]
    cost: Callable[..., Cost]


# Network families by the spec's ``model.kind``.
FAMILIES: dict[str, Family] = {"mlp": Family(mlp, mlp_cost), "conv": Family(conv, conv_cost)}


def weight_mask(params):
    """A pytree of bools shaped like ``params``: True on weights ``W`` only (matrices and kernels)."""
    return {name: {k: k == "W" for k in layer} for name, layer in params.items()}
