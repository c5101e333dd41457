"""Baseline for the convolutional workload: the training loop a practitioner writes in JAX.

As :mod:`hand_jax` (one ``jax.jit`` train step with the learning rate as an argument, SGD with
momentum ``v ← μv + g; θ ← θ − ηv``, data on the device, a Python loop over batches, the losses
read once per epoch, a jitted evaluation of the validation images each epoch, runs one after
another), for ``specs/conv.toml``: 3 × 3 "same" convolutions with ReLU and 2 × 2 max pooling per
block, then the output layer; He-normal kernels (fan-in 9·channels), zero biases. The images are
lesion's own ``glyphs`` draw (``compiler.data``, whose import this way pays), so every way
trains on identical data; the split and standardization are numpy's, as in :mod:`workload`.

Usage: ``python hand_jax_conv.py SPEC.toml`` — prints one JSON line like :mod:`hand_jax`.
"""

import json
import sys
import time
import tomllib

import numpy as np

t_start = time.perf_counter()
import jax  # noqa: E402
import jax.numpy as jnp  # noqa: E402

from compiler.data import glyphs  # noqa: E402

spec = tomllib.loads(open(sys.argv[1]).read())
data, training = spec["data"], spec["training"]
shape, classes = tuple(data["shape"]), data["classes"]
x_all, y_all = glyphs(np.random.Generator(np.random.PCG64(data.get("seed", 0))), data["samples"], shape,
                      classes, data["noise"])
x_all, y_all = x_all.astype(np.float32), y_all.astype(np.int32)
n_val = int(round(data["samples"] * data["validation"]))
n_train = data["samples"] - n_val
channels = [b["channels"] for b in spec["model"]["blocks"]]
B, momentum = training["batch_size"], spec["optimizer"]["momentum"]
steps = n_train // B
(axis,) = spec["ablation"]["axis"]
seeds = spec["study"]["seeds"]


def init(key):
    params, c_in, side = [], shape[-1], shape[0]
    for i, c in enumerate(channels):
        W = jax.random.normal(jax.random.fold_in(key, i), (3, 3, c_in, c)) * np.sqrt(2.0 / (9 * c_in))
        params.append((W, jnp.zeros((c,))))
        c_in, side = c, side // 2
    flat = side * side * c_in
    W = jax.random.normal(jax.random.fold_in(key, 99), (flat, classes)) * np.sqrt(2.0 / flat)
    return params + [(W, jnp.zeros((classes,)))]


def logits(params, x):
    for W, b in params[:-1]:
        x = jax.lax.conv_general_dilated(x, W, (1, 1), "SAME", dimension_numbers=("NHWC", "HWIO", "NHWC"))
        x = jax.nn.relu(x + b)
        x = jax.lax.reduce_window(x, -jnp.inf, jax.lax.max, (1, 2, 2, 1), (1, 2, 2, 1), "VALID")
    W, b = params[-1]
    return x.reshape(x.shape[0], -1) @ W + b


def loss_fn(params, x, y):
    return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(logits(params, x)), y[:, None], axis=1))


@jax.jit
def train_step(params, velocity, x, y, idx, lr):
    loss, grads = jax.value_and_grad(loss_fn)(params, x[idx], y[idx])
    velocity = jax.tree.map(lambda v, g: momentum * v + g, velocity, grads)
    params = jax.tree.map(lambda p, v: p - lr * v, params, velocity)
    return params, velocity, loss


@jax.jit
def evaluate(params, x, y):
    return loss_fn(params, x, y), jnp.mean(jnp.argmax(logits(params, x), axis=1) == y)


finals, accuracies = [], []
for lr in axis["values"]:
    for seed in (range(seeds) if isinstance(seeds, int) else seeds):
        order = np.random.default_rng(seed).permutation(len(x_all))
        tr, va = order[:n_train], order[n_train:]
        mean, std = x_all[tr].mean(axis=0), x_all[tr].std(axis=0)
        std = np.where(std > 0, std, 1.0).astype(np.float32)
        x_tr, y_tr = jnp.asarray((x_all[tr] - mean) / std), jnp.asarray(y_all[tr])
        x_va, y_va = jnp.asarray((x_all[va] - mean) / std), jnp.asarray(y_all[va])
        params = init(jax.random.key(seed))
        velocity = jax.tree.map(jnp.zeros_like, params)
        rng = np.random.default_rng(1000 + seed)
        for epoch in range(training["epochs"]):
            batches = rng.permutation(n_train)[:steps * B].reshape(steps, B).astype(np.int32)
            losses = []
            for i in range(steps):
                params, velocity, loss = train_step(params, velocity, x_tr, y_tr, batches[i], lr)
                losses.append(loss)
            train_loss = float(np.mean(jax.device_get(losses)))
            val_loss, val_acc = (float(v) for v in evaluate(params, x_va, y_va))
        finals.append(train_loss)
        accuracies.append(val_acc)

print(json.dumps({"way": "hand_jax_conv", "final_train_loss": finals, "final_val_accuracy": accuracies,
                  "seconds_from_jax_import": time.perf_counter() - t_start}))
