"""L2 penalty, decoupled decay and the three dropout schemes."""

import jax
import jax.numpy as jnp
import numpy as np

from compiler import model, regularization


def _params():
    rng = np.random.default_rng(0)
    f = lambda *s: jnp.asarray(rng.normal(size=s), jnp.float32)
    return {"l1": {"W": f(3, 4), "gamma": f(4), "beta": f(4)}, "l2": {"W": f(4, 2), "b": f(2)}}


def test_l2_penalty_value_and_gradient_gains_exactly_lambda_w():
    # common practice: d/dW (λ/2‖W‖²) = λW; biases, γ, β are not penalized
    params, lam = _params(), np.float32(0.03)
    mask = model.weight_mask(params)
    value = regularization.l2_penalty(params, mask, lam)
    expected = 0.5 * lam * sum(float(np.sum(np.asarray(params[l]["W"], np.float64) ** 2)) for l in ("l1", "l2"))
    np.testing.assert_allclose(value, expected, rtol=1e-6)
    g = jax.grad(lambda p: regularization.l2_penalty(p, mask, lam))(params)
    for layer in params:
        for name, leaf in params[layer].items():
            want = lam * np.asarray(leaf) if name == "W" else np.zeros_like(leaf)
            np.testing.assert_array_equal(g[layer][name], want)


def test_decoupled_decay_adds_lambda_theta_on_weights_only():
    # Loshchilov & Hutter 2019: the decay term λθ joins the update, not the gradient
    params, lam = _params(), 0.1
    tx = regularization.decoupled_decay(lam, model.weight_mask)
    zeros = jax.tree.map(jnp.zeros_like, params)
    updates, _ = tx.update(zeros, tx.init(params), params)
    for layer in params:
        for name, leaf in params[layer].items():
            want = lam * np.asarray(leaf) if name == "W" else np.zeros_like(leaf)
            np.testing.assert_allclose(updates[layer][name], want, rtol=1e-6)


def test_inverted_dropout_preserves_the_mean_activation():
    # Inverted dropout: E[m·h/p] = h. 200 000 units at rate 0.3: the sample mean of m/p has
    # std √(r/p)/√N ≈ 0.0015; tolerance 5σ ≈ 0.008 (Monte Carlo).
    h = jnp.ones((1000, 200), jnp.float32)
    drop = regularization.inverted(0.3)
    out = np.asarray(drop.activation(jax.random.key(0), h, True))
    assert abs(out.mean() - 1.0) < 0.008
    np.testing.assert_allclose(np.mean(out == 0), 0.3, atol=0.005)
    np.testing.assert_array_equal(drop.activation(jax.random.key(0), h, False), h)


def test_scaled_dropout_inference_is_keep_times_training_expectation():
    # Srivastava et al. 2014, §4: weights (here activations) scaled by p at test time equal the
    # expected training output p·h; Monte Carlo tolerance as above (≈ 5σ of the mean).
    rng = np.random.default_rng(1)
    h = jnp.asarray(rng.uniform(0.5, 1.5, (1, 50)), jnp.float32)
    drop = regularization.scaled(0.4)
    inference = np.asarray(drop.activation(None, h, False))
    np.testing.assert_allclose(inference, 0.6 * np.asarray(h), rtol=1e-6)
    many = jnp.tile(h, (20000, 1))
    train_mean = np.asarray(drop.activation(jax.random.key(1), many, True)).mean(0)
    sigma = np.sqrt(0.4 * 0.6 / 20000) * np.asarray(h)[0]
    assert np.all(np.abs(train_mean - inference[0]) < 5 * sigma)


def test_dropconnect_masks_weights_per_example():
    # Wan et al. 2013: u = x (M ⊙ W); a one-hot input reads one row of the masked weights, so each
    # output is either W_ij or exactly 0, with fresh masks per example; inference is p·xW
    # (mean-weight, common practice).
    rng = np.random.default_rng(2)
    w = jnp.asarray(rng.uniform(1, 2, (3, 400)), jnp.float32)
    x = jnp.asarray(np.tile([0.0, 1.0, 0.0], (64, 1)), jnp.float32)
    drop = regularization.connect(0.25)
    u = np.asarray(drop.dense(jax.random.key(3), x, w, True))
    row = np.asarray(w)[1]
    assert np.all((u == 0) | (u == row))
    np.testing.assert_allclose(np.mean(u == 0), 0.25, atol=0.01)  # 25 600 draws: σ ≈ 0.003
    assert len({tuple(r == 0) for r in u}) == 64
    np.testing.assert_allclose(drop.dense(None, x, w, False), 0.75 * np.asarray(x @ w), rtol=1e-6)
    np.testing.assert_array_equal(drop.activation(None, x, True), x)


