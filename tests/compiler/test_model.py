"""The MLP: layer layout, initializers, activations, bias omission and paired initialization."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.special
import scipy.stats
import typing

from compiler import model, normalization, regularization, spec


def _net(hidden=(6, 5), norm="none", activation="relu", init="he_normal", out=3):
    return model.mlp(hidden, out, activation, init, normalization.REGISTRY[norm](), regularization.inverted(0.0))


def test_activation_and_init_tables_match_spec_literals():
    assert set(typing.get_args(spec.Model.model_fields["activation"].annotation)) == set(model.ACTIVATIONS)
    assert set(typing.get_args(spec.Model.model_fields["init"].annotation)) == set(model.INITIALIZERS)


def test_activations_match_references():
    x = np.linspace(-4, 4, 41)
    f = lambda name: np.asarray(model.ACTIVATIONS[name](jnp.asarray(x, jnp.float32)))
    np.testing.assert_allclose(f("relu"), np.maximum(x, 0), atol=1e-7)
    np.testing.assert_allclose(f("tanh"), np.tanh(x), atol=1e-6)
    np.testing.assert_allclose(f("sigmoid"), scipy.special.expit(x), atol=1e-6)
    # Hendrycks & Gimpel 2016: GELU(x) = x Φ(x), Φ the standard normal CDF (scipy.stats.norm)
    np.testing.assert_allclose(f("gelu"), x * scipy.stats.norm.cdf(x), atol=1e-6)
    np.testing.assert_allclose(f("identity"), x, atol=1e-7)


@pytest.mark.parametrize("init, variance, uniform", [
    ("he_normal", lambda i, o: 2 / i, False),        # He et al. 2015, eq. 10
    ("he_uniform", lambda i, o: 2 / i, True),
    ("glorot_normal", lambda i, o: 2 / (i + o), False),  # Glorot & Bengio 2010, eq. 12 (variance)
    ("glorot_uniform", lambda i, o: 2 / (i + o), True),
])
def test_initializer_variance(init, variance, uniform):
    fan_in, fan_out = 400, 300
    w = np.asarray(model.draw_weights(init, jax.random.key(0), [(fan_in, fan_out)])[0])
    # 120 000 draws: the sample variance is within ~1 % (Monte Carlo, 3σ ≈ 0.8 % for a normal)
    np.testing.assert_allclose(w.var(), variance(fan_in, fan_out), rtol=0.02)
    if uniform:
        limit = np.sqrt(3 * variance(fan_in, fan_out))
        assert np.abs(w).max() <= limit and np.abs(w).max() > 0.99 * limit
    else:
        assert abs(scipy.stats.kurtosis(w.ravel())) < 0.1  # a normal, not truncated (truncation lowers it)


def test_layout_names_shapes_and_bias_omitted_before_batch_norm():
    params, state = _net(norm="batch").init(jax.random.key(0), 4)
    assert list(params) == ["l1", "l2", "l3"]
    assert params["l1"]["W"].shape == (4, 6) and params["l2"]["W"].shape == (6, 5) and params["l3"]["W"].shape == (5, 3)
    assert "b" not in params["l1"] and "b" not in params["l2"] and "b" in params["l3"]  # Ioffe & Szegedy 2015, §3.2
    assert set(params["l1"]) == {"W", "gamma", "beta"} and set(state["l1"]) == {"mean", "var"}
    plain, _ = _net(norm="layer").init(jax.random.key(0), 4)
    assert "b" in plain["l1"]
    assert model.weight_mask(params) == {"l1": {"W": True, "gamma": False, "beta": False},
                                         "l2": {"W": True, "gamma": False, "beta": False}, "l3": {"W": True, "b": False}}


def test_linear_model_when_no_hidden_layer():
    net = _net(hidden=())
    params, state = net.init(jax.random.key(1), 4)
    assert list(params) == ["l1"] and state == {}
    x = jnp.asarray(np.random.default_rng(0).normal(size=(5, 4)), jnp.float32)
    z, _ = net.apply(params, state, x, jax.random.key(0), None, True)
    np.testing.assert_allclose(z, x @ params["l1"]["W"] + params["l1"]["b"], rtol=1e-6)


def test_weights_are_paired_across_normalization_and_dropout():
    # Same key and shapes: identical W whatever the normalization (paired comparisons)
    a, _ = _net(norm="none").init(jax.random.key(7), 4)
    b, _ = _net(norm="batch").init(jax.random.key(7), 4)
    c, _ = model.mlp((6, 5), 3, "relu", "he_normal", normalization.layer(), regularization.connect(0.3)).init(jax.random.key(7), 4)
    for layer in a:
        np.testing.assert_array_equal(a[layer]["W"], b[layer]["W"])
        np.testing.assert_array_equal(a[layer]["W"], c[layer]["W"])


def test_forward_equals_a_hand_written_mlp_with_normalization_before_activation():
    net = model.mlp((6,), 2, "tanh", "glorot_uniform", normalization.layer(1e-5), regularization.scaled(0.5))
    params, state = net.init(jax.random.key(3), 4)
    x = np.random.default_rng(1).normal(size=(5, 4)).astype(np.float32)
    z, _ = net.apply(params, state, jnp.asarray(x), jax.random.key(0), None, False)
    p = jax.tree.map(np.asarray, params)
    u = x @ p["l1"]["W"] + p["l1"]["b"]
    u = (u - u.mean(1, keepdims=True)) / np.sqrt(u.var(1, keepdims=True) + 1e-5) * p["l1"]["gamma"] + p["l1"]["beta"]
    h = 0.5 * np.tanh(u)  # scaled dropout at inference multiplies by keep (Srivastava et al. 2014)
    np.testing.assert_allclose(z, h @ p["l2"]["W"] + p["l2"]["b"], rtol=1e-5, atol=1e-6)


def test_dropout_is_not_applied_to_inputs_or_outputs():
    # With every hidden unit dropped, the output is exactly the output layer's bias: neither the
    # input nor the output is masked, and dropout sits after the activation.
    net = model.mlp((6,), 2, "relu", "he_normal", normalization.none(), regularization.inverted(1.0 - 1e-7))
    params, state = net.init(jax.random.key(0), 3)
    params["l2"]["b"] = jnp.asarray([0.5, -1.0])
    x = jnp.ones((4, 3))
    z, _ = net.apply(params, state, x, jax.random.key(1), None, True)
    np.testing.assert_allclose(z, np.tile([0.5, -1.0], (4, 1)))


@pytest.mark.parametrize("init", sorted(model.INITIALIZERS))
def test_one_draw_gives_networks_with_the_same_leading_layers_the_same_matrices(init):
    key = jax.random.key(11)
    a = model.draw_weights(init, key, [(4, 6), (6, 5), (5, 3)])
    b = model.draw_weights(init, key, [(4, 6), (6, 5), (5, 9)])  # another output width
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])
    assert not np.array_equal(a[0].ravel()[:15], a[2].ravel())  # consecutive slices, not repeats
