"""Batch and layer normalization against the formulas of their papers."""

import jax
import jax.numpy as jnp
import numpy as np

from compiler import normalization


def _batch(rng, m=16, width=5):
    return rng.normal(loc=2.0, scale=3.0, size=(m, width)).astype(np.float32)


def _params(rng, width):
    return {"gamma": jnp.asarray(rng.uniform(0.5, 2, width), jnp.float32),
            "beta": jnp.asarray(rng.normal(size=width), jnp.float32)}


def test_batch_norm_training_forward_is_algorithm_1():
    # Ioffe & Szegedy 2015, Alg. 1, in numpy: biased batch variance
    rng = np.random.default_rng(0)
    x = _batch(rng)
    bn = normalization.batch(momentum=0.9, epsilon=1e-3)
    params, state = bn.init(5)
    params = _params(rng, 5)
    y, _ = bn.apply(params, state, jnp.asarray(x), None, True)
    mu, var = x.mean(0), x.var(0)
    ref = np.asarray(params["gamma"]) * (x - mu) / np.sqrt(var + 1e-3) + np.asarray(params["beta"])
    np.testing.assert_allclose(y, ref, rtol=1e-5, atol=1e-5)


def test_batch_norm_running_stats_and_inference_are_algorithm_2():
    # Ioffe & Szegedy 2015, Alg. 2: inference uses E[x] and the unbiased m/(m−1)·Var_B; here as
    # running averages where momentum weights the old value.
    rng = np.random.default_rng(1)
    m, momentum, eps = 8, 0.8, 1e-5
    bn = normalization.batch(momentum, eps)
    params, state = bn.init(3)
    batches = [_batch(rng, m, 3) for _ in range(4)]
    mean_ref, var_ref = np.zeros(3), np.ones(3)
    for b in batches:
        _, state = bn.apply(params, state, jnp.asarray(b), None, True)
        mean_ref = momentum * mean_ref + (1 - momentum) * b.mean(0)
        var_ref = momentum * var_ref + (1 - momentum) * b.var(0) * m / (m - 1)
    np.testing.assert_allclose(state["mean"], mean_ref, rtol=1e-5)
    np.testing.assert_allclose(state["var"], var_ref, rtol=1e-5)
    x = _batch(rng, 4, 3)
    y, same = bn.apply(params, state, jnp.asarray(x), None, False)
    np.testing.assert_allclose(y, (x - mean_ref) / np.sqrt(var_ref + eps), rtol=1e-4, atol=1e-5)
    assert same is state  # inference leaves the statistics alone


def test_batch_norm_mask_uses_only_real_examples():
    # A padded batch must normalize exactly as the batch of its real rows (Alg. 1 over m real rows).
    rng = np.random.default_rng(2)
    x = _batch(rng, 6, 4)
    padded = np.concatenate([x, 100 * np.ones((2, 4), np.float32)])
    mask = jnp.asarray([1, 1, 1, 1, 1, 1, 0, 0], jnp.float32)
    bn = normalization.batch(0.9, 1e-5)
    params, state = bn.init(4)
    y_real, s_real = bn.apply(params, state, jnp.asarray(x), None, True)
    y_pad, s_pad = bn.apply(params, state, jnp.asarray(padded), mask, True)
    np.testing.assert_allclose(y_pad[:6], y_real, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(s_pad["var"], s_real["var"], rtol=1e-5)


def _bn_loss(c):
    bn = normalization.batch(0.9, 1e-5)
    params, state = bn.init(c.shape[1])

    def loss(x, params=params):
        y, _ = bn.apply(params, state, x, None, True)
        return jnp.sum(c * y)
    return loss


def test_batch_norm_gradients_cancel_a_common_shift():
    # Fact of the trade: BN output is invariant to adding the same vector to every row, so the
    # input gradients sum to zero over the batch and a preceding bias gets zero gradient.
    rng = np.random.default_rng(3)
    x, c = jnp.asarray(_batch(rng, 8, 3)), jnp.asarray(rng.normal(size=(8, 3)), jnp.float32)
    loss = _bn_loss(c)
    g = jax.grad(loss)(x)
    bias_grad = jax.grad(lambda b: loss(x + b))(jnp.zeros(3, jnp.float32))
    np.testing.assert_allclose(np.asarray(g).sum(0), 0.0, atol=1e-5)
    np.testing.assert_allclose(bias_grad, 0.0, atol=1e-5)


def test_batch_norm_identical_rows_give_zero_input_gradient():
    # Fact of the trade: with every row identical, x̂ = 0 and, for a loss that treats every row
    # alike, dL/dx_i = γ/σ (g_i − mean g − x̂_i mean(g x̂)) = 0. Checked exactly (batch of 8: the
    # mean of identical float32 values is then exact). With different upstream gradients per row
    # it is γ/σ(g_i − ḡ), not zero: the row-identity alone does not make it vanish.
    row = np.array([0.3, -1.7, 2.2], np.float32)
    x = jnp.asarray(np.tile(row, (8, 1)))
    g = jax.grad(_bn_loss(jnp.asarray(np.tile([1.0, -2.0, 0.5], (8, 1)), jnp.float32)))(x)
    assert np.all(np.asarray(g) == 0.0)


def _paper_backward(x, gamma, dy, eps):
    """Ioffe & Szegedy 2015, §3: the chain rule written out for ∂ℓ/∂x, ∂ℓ/∂γ, ∂ℓ/∂β (float64)."""
    m = x.shape[0]
    mu = x.mean(0)
    var = x.var(0)
    x_hat = (x - mu) / np.sqrt(var + eps)
    dx_hat = dy * gamma
    dvar = np.sum(dx_hat * (x - mu), 0) * -0.5 * (var + eps) ** -1.5
    dmu = np.sum(dx_hat * -1 / np.sqrt(var + eps), 0) + dvar * np.sum(-2 * (x - mu), 0) / m
    dx = dx_hat / np.sqrt(var + eps) + dvar * 2 * (x - mu) / m + dmu / m
    return dx, np.sum(dy * x_hat, 0), np.sum(dy, 0)


def test_batch_norm_backward_paper_formula_jax_grad_and_finite_differences():
    rng = np.random.default_rng(4)
    x = rng.normal(size=(6, 3)) * 2 + 1
    gamma, beta = rng.uniform(0.5, 2, 3), rng.normal(size=3)
    c = rng.normal(size=(6, 3))
    eps = 1e-5
    dx, dgamma, dbeta = _paper_backward(x, gamma, c, eps)
    bn = normalization.batch(0.9, eps)
    _, state = bn.init(3)

    def loss(x, gamma, beta):
        y, _ = bn.apply({"gamma": gamma, "beta": beta}, state, x, None, True)
        return jnp.sum(jnp.asarray(c, jnp.float32) * y)
    f32 = lambda a: jnp.asarray(a, jnp.float32)
    gx, gg, gb = jax.grad(loss, argnums=(0, 1, 2))(f32(x), f32(gamma), f32(beta))
    np.testing.assert_allclose(gx, dx, rtol=1e-3, atol=1e-4)
    np.testing.assert_allclose(gg, dgamma, rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(gb, dbeta, rtol=1e-5)

    def forward64(x):  # Alg. 1 in float64 numpy for central differences
        return np.sum(c * (gamma * (x - x.mean(0)) / np.sqrt(x.var(0) + eps) + beta))
    h = 1e-6
    fd = np.zeros_like(x)
    for idx in np.ndindex(*x.shape):
        e = np.zeros_like(x)
        e[idx] = h
        fd[idx] = (forward64(x + e) - forward64(x - e)) / (2 * h)
    np.testing.assert_allclose(dx, fd, rtol=1e-6, atol=1e-7)


def test_layer_norm_is_ba_et_al_eq_4():
    # Ba, Kiros & Hinton 2016, eq. 4: statistics over the units of one example; same in both modes
    rng = np.random.default_rng(5)
    x = _batch(rng, 4, 6)
    ln = normalization.layer(1e-5)
    _, state = ln.init(6)
    params = _params(rng, 6)
    mu = x.mean(1, keepdims=True)
    sigma = np.sqrt(((x - mu) ** 2).mean(1, keepdims=True) + 1e-5)
    ref = np.asarray(params["gamma"]) * (x - mu) / sigma + np.asarray(params["beta"])
    for train in (True, False):
        y, _ = ln.apply(params, state, jnp.asarray(x), None, train)
        np.testing.assert_allclose(y, ref, rtol=1e-5, atol=1e-5)


def test_diagnose_names_the_batch_normalized_layer_whose_gradient_collapsed():
    # lesion's own rule: a layer's gradient norm below BN_COLLAPSE_RATIO of the output layer's
    out = np.array([1.0, 1.0, 1.0], np.float32)
    curves = {"grad_norm_l1": np.array([0.5, 1e-6, 1e-7], np.float32),
              "grad_norm_l2": np.array([0.5, 0.4, 0.3], np.float32), "grad_norm_l3": out}
    found = normalization.diagnose("batch", 2, curves)
    assert len(found) == 1 and found[0].startswith("batch-normalized layer l1: gradient collapsed from epoch 2 ")
    assert normalization.diagnose("layer", 2, curves) == [] and normalization.diagnose("none", 2, curves) == []
    assert normalization.diagnose("batch", 2, {**curves, "grad_norm_l1": curves["grad_norm_l2"]}) == []
