"""Optimizers and schedules: hand-computed references and optax's own named optimizers."""

import math

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest

from compiler import model, optimizers


def _const(lr):
    return optimizers.constant(lr, 10, 100)


def _run(tx, params, grads):
    state = tx.init(params)
    out = []
    for g in grads:
        updates, state = tx.update(g, state, params)
        params = optax.apply_updates(params, updates)
        out.append(params)
    return out


def test_adam_first_steps_match_kingma_ba_algorithm_1():
    # Kingma & Ba 2015, Alg. 1, in numpy float64
    lr, b1, b2, eps = 0.01, 0.8, 0.95, 1e-6
    rng = np.random.default_rng(0)
    theta = rng.normal(size=4)
    grads = [rng.normal(size=4) for _ in range(4)]
    ours = _run(optimizers.adam(_const(lr), b1, b2, eps), jnp.asarray(theta, jnp.float32),
                [jnp.asarray(g, jnp.float32) for g in grads])
    m = v = np.zeros(4)
    for t, g in enumerate(grads, start=1):
        m = b1 * m + (1 - b1) * g
        v = b2 * v + (1 - b2) * g ** 2
        theta = theta - lr * (m / (1 - b1 ** t)) / (np.sqrt(v / (1 - b2 ** t)) + eps)
        np.testing.assert_allclose(ours[t - 1], theta, rtol=1e-5, atol=1e-6)


def _tree():
    rng = np.random.default_rng(1)
    f = lambda *s: jnp.asarray(rng.normal(size=s), jnp.float32)
    return {"l1": {"W": f(3, 2), "b": f(2)}}, {"l1": {"W": f(3, 2), "b": f(2)}}


def test_adamw_decay_is_multiplied_by_the_learning_rate_as_optax_documents():
    # optax.adamw docstring: the update is −η(m̂/(√v̂+ε) + λθ) — decay scaled by the learning
    # rate, unlike Loshchilov & Hutter 2019, Alg. 2, which scales it by a separate multiplier.
    # Biases are masked out. First step: m̂ = g, v̂ = g², so the Adam direction is g/(|g|+ε).
    params, g = _tree()
    lr, lam, eps = 0.1, 0.5, 1e-8
    for kind in ("adamw", "adam"):
        tx = optimizers.REGISTRY[kind](_const(lr), 0.9, 0.999, eps, decoupled=(lam, model.weight_mask))
        new = _run(tx, params, [g])[0]
        for name in ("W", "b"):
            p, gg = np.asarray(params["l1"][name]), np.asarray(g["l1"][name])
            decay = lam * p if name == "W" else 0.0
            np.testing.assert_allclose(new["l1"][name], p - lr * (gg / (np.abs(gg) + eps) + decay), rtol=1e-5, atol=1e-6)


def test_decoupled_sgd_is_sgdw():
    # Loshchilov & Hutter 2019, Alg. 1 (SGDW): θ ← θ − η(v + λθ), v the momentum buffer of g only
    params, g = _tree()
    lr, lam, mu = 0.1, 0.2, 0.9
    tx = optimizers.sgd(_const(lr), mu, decoupled=(lam, model.weight_mask))
    w = np.asarray(params["l1"]["W"], np.float64)
    gw = np.asarray(g["l1"]["W"], np.float64)
    v = np.zeros_like(w)
    for new in _run(tx, params, [g, g, g]):
        v = mu * v + gw
        w = w - lr * (v + lam * w)
        np.testing.assert_allclose(new["l1"]["W"], w, rtol=1e-5)


@pytest.mark.parametrize("kind, ours, reference", [
    ("sgd", lambda lr: optimizers.sgd(lr, 0.9, nesterov=True), lambda lr: optax.sgd(lr, 0.9, nesterov=True)),
    ("adam", lambda lr: optimizers.adam(lr, 0.9, 0.99, 1e-7), lambda lr: optax.adam(lr, 0.9, 0.99, 1e-7)),
    ("rmsprop", lambda lr: optimizers.rmsprop(lr, 0.8, 1e-6, 0.5), lambda lr: optax.rmsprop(lr, 0.8, 1e-6, momentum=0.5)),
])
def test_without_decay_equals_optax_named_optimizer(kind, ours, reference):
    # optax's own sgd/adam/rmsprop as the reference: our compositions differ only by the decay slot
    params, g = _tree()
    a = _run(ours(0.05), params, [g, g, g])
    b = _run(reference(0.05), params, [g, g, g])
    for x, y in zip(a, b):
        jax.tree.map(lambda u, v: np.testing.assert_allclose(u, v, rtol=1e-6, atol=1e-7), x, y)


def test_schedules_match_their_formulas():
    lr, spe, total = 0.2, 10, 100
    t = np.arange(0, total)
    exp = jax.vmap(optimizers.exponential(lr, spe, total, 0.9))(t)
    np.testing.assert_allclose(exp, lr * 0.9 ** (t / spe), rtol=1e-5)  # rate once per epoch, smoothly
    cos = jax.vmap(optimizers.cosine(lr, spe, total, 0.1))(t)
    # Loshchilov & Hutter 2017, eq. 5 with η_min = f·η and no restart
    np.testing.assert_allclose(cos, lr * (0.1 + 0.9 * 0.5 * (1 + np.cos(np.pi * t / total))), rtol=1e-5, atol=1e-7)
    wc = np.asarray(jax.vmap(optimizers.warmup_cosine(lr, spe, total, 2, 0.0))(t))
    np.testing.assert_allclose(wc[:20], lr * t[:20] / 20, rtol=1e-5, atol=1e-7)  # linear warm-up, Goyal et al. 2017
    np.testing.assert_allclose(wc[20:], lr * 0.5 * (1 + np.cos(np.pi * (t[20:] - 20) / 80)), rtol=1e-5, atol=1e-7)
    np.testing.assert_allclose(jax.vmap(optimizers.constant(lr, spe, total))(t), lr)


def test_knobs_are_traced_one_compile_serves_all_values():
    traces = []

    @jax.jit
    def one_step(lr, mu, rate, params, g):
        traces.append(1)
        tx = optimizers.sgd(optimizers.exponential(lr, 5, 50, rate), mu)
        updates, _ = tx.update(g, tx.init(params), params)
        return optax.apply_updates(params, updates)
    params, g = jnp.ones(3), jnp.full(3, 2.0)
    a = one_step(jnp.float32(0.1), jnp.float32(0.0), jnp.float32(0.9), params, g)
    b = one_step(jnp.float32(0.3), jnp.float32(0.9), jnp.float32(0.5), params, g)
    assert len(traces) == 1
    np.testing.assert_allclose(a, 1 - 0.1 * 2, rtol=1e-6)
    np.testing.assert_allclose(b, 1 - 0.3 * 2, rtol=1e-6)


