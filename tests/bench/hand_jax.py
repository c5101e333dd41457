"""Baseline: the training loop a practitioner writes in JAX, runs one after another.

One ``jax.jit`` train step (the gather of the batch rows, forward, backward, SGD with momentum
``v ← μv + g; θ ← θ − ηv``, as ``optax.sgd(η, momentum=μ)``) with the learning rate as an
argument so all runs share one compile; data on the device; a Python loop over batches; the
host reads the losses once per epoch, and a jitted evaluation scores the validation rows each
epoch (lesion computes the same per-epoch metrics). He-normal weights, zero biases.

Usage: ``python hand_jax.py SPEC.toml`` — prints one JSON line: final train loss of every run
(mean over the last epoch's steps) and final validation accuracy, in (learning rate, seed) order.
"""

import json
import sys
import time

import numpy as np

import workload as wl

t_start = time.perf_counter()
import jax  # noqa: E402
import jax.numpy as jnp  # noqa: E402

w = wl.workload(sys.argv[1])
x_all, y_all = wl.arrays(w)
B, momentum = w["batch_size"], w["momentum"]
steps = w["n_train"] // B


def init(key):
    params = []
    for i, (fan_in, fan_out) in enumerate(zip(w["widths"][:-1], w["widths"][1:])):
        W = jax.random.normal(jax.random.fold_in(key, i), (fan_in, fan_out)) * np.sqrt(2.0 / fan_in)
        params.append((W, jnp.zeros((fan_out,))))
    return params


def logits(params, x):
    for W, b in params[:-1]:
        x = jax.nn.relu(x @ W + b)
    W, b = params[-1]
    return x @ W + b


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
    z = logits(params, x)
    return loss_fn(params, x, y), jnp.mean(jnp.argmax(z, axis=1) == y)


finals, accuracies = [], []
for lr in w["learning_rates"]:
    for seed in w["seeds"]:
        x_tr, y_tr, x_va, y_va = (jnp.asarray(a) for a in wl.split(w, x_all, y_all, seed))
        params = init(jax.random.key(seed))
        velocity = jax.tree.map(jnp.zeros_like, params)
        rng = np.random.default_rng(1000 + seed)
        for epoch in range(w["epochs"]):
            order = rng.permutation(w["n_train"])[:steps * B].reshape(steps, B).astype(np.int32)
            losses = []
            for i in range(steps):
                params, velocity, loss = train_step(params, velocity, x_tr, y_tr, order[i], lr)
                losses.append(loss)
            train_loss = float(np.mean(jax.device_get(losses)))
            val_loss, val_acc = (float(v) for v in evaluate(params, x_va, y_va))
        finals.append(train_loss)
        accuracies.append(val_acc)

print(json.dumps({"way": "hand_jax", "final_train_loss": finals, "final_val_accuracy": accuracies,
                  "seconds_from_jax_import": time.perf_counter() - t_start}))
