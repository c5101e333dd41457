"""The convolutional family against outside references: scipy's correlation, NumPy pooling,
Ioffe & Szegedy's batch normalization per channel, Ba et al.'s layer normalization over a
feature map, Tompson et al.'s spatial dropout."""

import math
import typing

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.signal

from compiler import model, normalization, regularization, spec


def _reference_correlation(x, w, stride, mode):
    """``scipy.signal.correlate`` per (example, input channel, output channel), summed over input
    channels, then every ``stride``-th output position (float64)."""
    b, c_in, c_out = x.shape[0], x.shape[-1], w.shape[-1]
    spatial = x.ndim - 2
    step = (slice(None, None, stride),) * spatial
    return np.stack([np.stack([sum(scipy.signal.correlate(x[i, ..., c].astype(np.float64),
                                                          w[..., c, o].astype(np.float64), mode=mode)
                                   for c in range(c_in))[step]
                               for o in range(c_out)], -1) for i in range(b)])


@pytest.mark.parametrize("mode", ["valid", "same"])
@pytest.mark.parametrize("kernel, stride", [(1, 1), (2, 1), (3, 1), (3, 2), (4, 2), (5, 3)])
def test_convolution_is_scipy_correlate(mode, kernel, stride):
    # scipy.signal.correlate, modes "valid" and "same" (its centring of an even window), with the
    # stride taken as every stride-th output of the stride-1 correlation
    rng = np.random.default_rng(kernel * 10 + stride)
    for positions in [(11,), (9, 8)]:
        x = rng.standard_normal((2, *positions, 3)).astype(np.float32)
        w = rng.standard_normal((*(kernel,) * len(positions), 3, 4)).astype(np.float32)
        got = np.asarray(model.convolve(jnp.asarray(x), jnp.asarray(w), stride, mode))
        ref = _reference_correlation(x, w, stride, mode)
        assert got.shape == ref.shape
        np.testing.assert_allclose(got, ref, rtol=1e-5, atol=1e-4)
        # The shape arithmetic the guard and the checks use agrees with the layer itself.
        block = spec.ConvBlock(channels=4, kernel=kernel, stride=stride, padding=mode)
        assert model.feature_shapes(x.shape[1:], [block])[0] == got.shape[1:]


@pytest.mark.parametrize("pooling", ["max", "average"])
@pytest.mark.parametrize("window", [2, 3])
def test_pooling_is_the_numpy_window_reduction(pooling, window):
    # NumPy reference: crop to whole windows, reshape into (…, window, …) blocks, reduce them
    rng = np.random.default_rng(window)
    x = rng.standard_normal((2, 8, 7, 3)).astype(np.float32)
    h, w = 8 // window, 7 // window
    blocks = x[:, :h * window, :w * window].reshape(2, h, window, w, window, 3)
    ref = blocks.max(axis=(2, 4)) if pooling == "max" else blocks.mean(axis=(2, 4))
    np.testing.assert_allclose(model.pool(jnp.asarray(x), window, pooling), ref, rtol=1e-6, atol=1e-6)
    signal = x[:, :, 0]
    cut = signal[:, :8 // window * window].reshape(2, 8 // window, window, 3)
    ref1 = cut.max(axis=2) if pooling == "max" else cut.mean(axis=2)
    np.testing.assert_allclose(model.pool(jnp.asarray(signal), window, pooling), ref1, rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("pooling", ["max", "average"])
def test_convolution_and_pooling_gradients_are_finite_differences(pooling):
    # The gradient training takes, with respect to the input and the kernel, against central
    # differences of the float64 references above (scipy.signal.correlate, NumPy windows) on a
    # strided "same" convolution whose 2 × 2 pooling leaves a column over.
    rng = np.random.default_rng(7)
    x = rng.standard_normal((2, 7, 6, 2))
    w = rng.standard_normal((3, 3, 2, 3))
    c = rng.standard_normal((2, 2, 1, 3))

    def reference(x, w):
        u = _reference_correlation(x, w, 2, "same")[:, :4, :2]
        u = u.reshape(2, 2, 2, 1, 2, 3)
        return np.sum(c * (u.max(axis=(2, 4)) if pooling == "max" else u.mean(axis=(2, 4))))

    def loss(x, w):
        return jnp.sum(jnp.asarray(c, jnp.float32) * model.pool(model.convolve(x, w, 2, "same"), 2, pooling))

    got = jax.grad(loss, (0, 1))(jnp.asarray(x, jnp.float32), jnp.asarray(w, jnp.float32))
    h = 1e-6
    for i, (arg, g) in enumerate(zip((x, w), got)):
        fd = np.zeros_like(arg)
        for idx in np.ndindex(*arg.shape):
            e = np.zeros_like(arg)
            e[idx] = h
            plus, minus = [(arg + s * e, w) if i == 0 else (x, arg + s * e) for s in (1, -1)]
            fd[idx] = (reference(*plus) - reference(*minus)) / (2 * h)
        np.testing.assert_allclose(np.asarray(g), fd, rtol=1e-4, atol=1e-4)


def _feature_map(rng, shape=(4, 5, 6, 3)):
    return (rng.normal(size=shape) * np.array([1.0, 3.0, 0.5]) + np.array([2.0, -1.0, 0.0])).astype(np.float32)


def _algorithm_1(x, gamma, beta, eps):
    """Ioffe & Szegedy 2015, Alg. 1 with §3.2's convolutional statistics: per channel over the
    batch and every position, biased variance (float64 numpy)."""
    axes = tuple(range(x.ndim - 1))
    mu, var = x.mean(axes), x.var(axes)
    return gamma * (x - mu) / np.sqrt(var + eps) + beta, mu, var


def test_conv_batch_norm_statistics_are_per_channel_over_batch_and_positions():
    rng = np.random.default_rng(0)
    x = _feature_map(rng)
    gamma, beta = rng.uniform(0.5, 2, 3), rng.normal(size=3)
    bn = normalization.batch(momentum=0.8, epsilon=1e-3)
    _, state = bn.init(3)
    params = {"gamma": jnp.asarray(gamma, jnp.float32), "beta": jnp.asarray(beta, jnp.float32)}
    y, new_state = bn.apply(params, state, jnp.asarray(x), None, True)
    ref, mu, var = _algorithm_1(x.astype(np.float64), gamma, beta, 1e-3)
    np.testing.assert_allclose(y, ref, rtol=1e-4, atol=1e-4)
    # Alg. 2's population variance is unbiased over the m = batch × positions values of a channel
    m = x.size // 3
    np.testing.assert_allclose(new_state["mean"], 0.2 * mu, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(new_state["var"], 0.8 + 0.2 * var * m / (m - 1), rtol=1e-5)
    # Padding examples (mask 0) take no part: the statistics of the real examples alone.
    padded = np.concatenate([x, 50 * np.ones((2, *x.shape[1:]), np.float32)])
    mask = jnp.asarray([1.0] * 4 + [0.0] * 2)
    y_pad, s_pad = bn.apply(params, state, jnp.asarray(padded), mask, True)
    np.testing.assert_allclose(y_pad[:4], y, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(s_pad["var"], new_state["var"], rtol=1e-5)


def test_conv_batch_norm_gradient_is_finite_differences():
    # Ioffe & Szegedy 2015, §3: the gradient of Alg. 1, here over the values of a channel at every
    # position; central differences of the float64 NumPy forward pass are the reference.
    rng = np.random.default_rng(1)
    x = _feature_map(rng, (3, 4, 3, 2)[:3] + (3,)).astype(np.float64)
    gamma, beta = rng.uniform(0.5, 2, 3), rng.normal(size=3)
    c = rng.normal(size=x.shape)
    eps = 1e-5
    bn = normalization.batch(0.9, eps)
    _, state = bn.init(3)

    def loss(x):
        y, _ = bn.apply({"gamma": jnp.asarray(gamma, jnp.float32), "beta": jnp.asarray(beta, jnp.float32)},
                        state, x, None, True)
        return jnp.sum(jnp.asarray(c, jnp.float32) * y)

    got = np.asarray(jax.grad(loss)(jnp.asarray(x, jnp.float32)))
    forward = lambda x: np.sum(c * _algorithm_1(x, gamma, beta, eps)[0])
    h, fd = 1e-6, np.zeros_like(x)
    for idx in np.ndindex(*x.shape):
        e = np.zeros_like(x)
        e[idx] = h
        fd[idx] = (forward(x + e) - forward(x - e)) / (2 * h)
    np.testing.assert_allclose(got, fd, rtol=1e-3, atol=2e-4)
    # Every channel's input gradient sums to 0 over batch and positions (a shift cancels).
    np.testing.assert_allclose(got.sum(axis=(0, 1, 2)), 0.0, atol=1e-4)


def test_conv_layer_norm_is_over_positions_and_channels():
    # Ba, Kiros & Hinton 2016: per example over every unit of the layer; for a feature map the
    # units are all positions and channels, with one gain and bias per channel
    rng = np.random.default_rng(2)
    x = _feature_map(rng)
    gamma, beta = rng.uniform(0.5, 2, 3), rng.normal(size=3)
    ln = normalization.layer(1e-5)
    y, _ = ln.apply({"gamma": jnp.asarray(gamma, jnp.float32), "beta": jnp.asarray(beta, jnp.float32)},
                    {}, jnp.asarray(x), None, True)
    x64 = x.astype(np.float64)
    mu = x64.mean(axis=(1, 2, 3), keepdims=True)
    sigma = np.sqrt(((x64 - mu) ** 2).mean(axis=(1, 2, 3), keepdims=True) + 1e-5)
    np.testing.assert_allclose(y, gamma * (x64 - mu) / sigma + beta, rtol=1e-4, atol=1e-4)


def test_spatial_dropout_drops_whole_channels_at_the_keep_rate():
    # Tompson et al. 2015, §3.2: one Bernoulli draw per (example, channel), shared by every
    # position, scaled by 1/p like inverted dropout. Monte Carlo: 4000 draws of keep rate 0.7,
    # 3σ of the kept share ≈ 0.022.
    rate = 0.3
    h = jnp.ones((200, 5, 4, 20), jnp.float32)
    out = np.asarray(regularization.spatial(rate).activation(jax.random.key(0), h, True))
    per_channel = out[:, 0, 0, :]
    assert np.all(out == per_channel[:, None, None, :])
    assert set(np.unique(per_channel)) <= {0.0, np.float32(1 / 0.7)}
    assert abs((per_channel > 0).mean() - 0.7) < 0.022
    assert np.all(np.asarray(regularization.spatial(rate).activation(jax.random.key(0), h, False)) == 1.0)
    # On a dense layer it is inverted dropout with the same masks.
    dense = jnp.ones((50, 8), jnp.float32)
    np.testing.assert_array_equal(regularization.spatial(rate).activation(jax.random.key(3), dense, True),
                                  regularization.inverted(rate).activation(jax.random.key(3), dense, True))


def _blocks(*channels, **common):
    return [spec.ConvBlock(channels=c, **common) for c in channels]


@pytest.mark.parametrize("norm", sorted(normalization.REGISTRY))
@pytest.mark.parametrize("dropout", sorted(regularization.REGISTRY))
def test_conv_network_layout_shapes_and_cost(norm, dropout):
    blocks = _blocks(4, 6, kernel=3, pool=2)
    net = model.conv(blocks, "max", (7,), 3, "relu", "he_normal", normalization.REGISTRY[norm](),
                     regularization.REGISTRY[dropout](0.2))
    params, state = net.init(jax.random.key(0), (8, 8, 1))
    assert list(params) == ["l1", "l2", "l3", "l4"]
    assert params["l1"]["W"].shape == (3, 3, 1, 4) and params["l2"]["W"].shape == (3, 3, 4, 6)
    assert params["l3"]["W"].shape == (2 * 2 * 6, 7) and params["l4"]["W"].shape == (7, 3)
    assert ("b" in params["l1"]) == (norm != "batch")  # Ioffe & Szegedy 2015, §3.2: β replaces the bias
    x = jnp.asarray(np.random.default_rng(0).standard_normal((5, 8, 8, 1)), jnp.float32)
    for train in (True, False):
        z, new_state = net.apply(params, state, x, jax.random.key(1), None, train)
        assert z.shape == (5, 3) and np.all(np.isfinite(z))
        assert jax.tree.structure(new_state) == jax.tree.structure(state)
    counted = sum(leaf.size for leaf in jax.tree.leaves(params))
    cost = model.FAMILIES["conv"].cost(in_shape=(8, 8, 1), out_width=3, blocks=blocks, pooling="max", hidden=[7],
                                       activation="relu", init="he_normal",
                                       dropout=regularization.REGISTRY[dropout](0.2))
    # The cost counts 3 values per unit (bias, γ, β) whether or not the layer has them all: the
    # output layer's 3 units have a bias only.
    units = 4 + 6 + 7
    assert cost.parameters == counted + {"none": 2 * units, "layer": 0, "batch": units}[norm] + 2 * 3
    assert cost.macs == 8 * 8 * 9 * 4 + 4 * 4 * 9 * 4 * 6 + 24 * 7 + 7 * 3  # positions × window × channels
    assert cost.layers == 4
    # DropConnect masks the dense layers' weights only (Wan et al. 2013 define it on a fully
    # connected layer), counted as the MLP counts its own: 3 values per unit besides.
    assert cost.masks == (24 * 7 + 3 * 7 + 7 * 3 + 3 * 3 if dropout == "dropconnect" else 0)


def test_conv_kernels_initialize_with_window_fans():
    # He et al. 2015, §2.2: for a convolution n = k²·c (window times input channels)
    net = model.conv(_blocks(64, kernel=5), "max", (), 2, "relu", "he_normal", normalization.none(),
                     regularization.inverted(0.0))
    params, _ = net.init(jax.random.key(0), (20, 20, 8))
    w = np.asarray(params["l1"]["W"])
    # 12 800 normal draws: the sample variance's relative sd is √(2/n) ≈ 1.25 %, 4σ = 5 % (Monte Carlo)
    np.testing.assert_allclose(w.var(), 2 / (25 * 8), rtol=0.05)
    assert w.shape == (5, 5, 8, 64)


def test_a_one_dimensional_network_runs_on_signals():
    net = model.conv(_blocks(4, kernel=5, stride=2, padding="valid"), "average", (), 2, "tanh", "glorot_uniform",
                     normalization.layer(), regularization.spatial(0.1))
    params, state = net.init(jax.random.key(0), (30, 2))
    assert params["l1"]["W"].shape == (5, 2, 4) and params["l2"]["W"].shape == (13 * 4, 2)
    z, _ = net.apply(params, state, jnp.zeros((3, 30, 2), jnp.float32), jax.random.key(1), None, True)
    assert z.shape == (3, 2)


def test_a_block_that_leaves_no_position_is_a_clear_error():
    with pytest.raises(model.ShapeError, match=r"model\.blocks\[3\]: .*leaves no position"):
        model.feature_shapes((8, 8, 1), _blocks(4, 4, 4, 4, pool=2, padding="same"))
    with pytest.raises(model.ShapeError, match="needs examples of shape"):
        model.feature_shapes((64,), _blocks(4))


def test_the_mlp_flattens_shaped_examples_in_c_order():
    net = model.mlp((5,), 3, "relu", "he_normal", normalization.none(), regularization.inverted(0.0))
    params, state = net.init(jax.random.key(0), (4, 4, 2))
    x = jnp.asarray(np.random.default_rng(0).standard_normal((6, 4, 4, 2)), jnp.float32)
    z, _ = net.apply(params, state, x, jax.random.key(1), None, False)
    flat, _ = net.apply(params, state, x.reshape(6, 32), jax.random.key(1), None, False)
    np.testing.assert_array_equal(z, flat)


def test_families_and_tables_match_the_spec():
    kinds = {typing.get_args(m.model_fields["kind"].annotation)[0] for m in (spec.Model, spec.ConvModel)}
    assert kinds == set(model.FAMILIES)
    assert set(typing.get_args(spec.ConvModel.model_fields["activation"].annotation)) == set(model.ACTIVATIONS)
    assert set(typing.get_args(spec.ConvModel.model_fields["init"].annotation)) == set(model.INITIALIZERS)


@pytest.mark.parametrize("padding", ["valid", "same"])
def test_the_guards_multiply_accumulates_are_xlas_own_count(padding):
    # XLA's cost analysis of the compiled forward pass (jax's Compiled.cost_analysis) counts
    # 2 FLOPs per multiply-accumulate of the convolutions (one product each, padding zeros
    # included) and dense products, plus the element-wise work (bias, activation, pooling) the
    # guard leaves out: within 15 % above. The second block's 7 × 7 map ("same") loses a row and
    # a column to the 2 × 2 pooling: its convolution computes them all the same, and both count them.
    blocks = _blocks(8, 16, kernel=3, pool=2, padding=padding)
    net = model.conv(blocks, "max", (32,), 10, "relu", "he_normal", normalization.none(), regularization.inverted(0.0))
    params, state = net.init(jax.random.key(0), (14, 14, 1))
    x = jnp.zeros((16, 14, 14, 1), jnp.float32)
    forward = jax.jit(lambda p, x: net.apply(p, state, x, jax.random.key(0), None, False)[0])
    analysis = forward.lower(params, x).compile().cost_analysis()
    flops = (analysis[0] if isinstance(analysis, list) else analysis)["flops"]
    cost = model.conv_cost(in_shape=(14, 14, 1), out_width=10, blocks=blocks, hidden=[32],
                           dropout=regularization.inverted(0.0))
    assert 1.0 <= flops / (2 * 16 * cost.macs) <= 1.15, flops / (2 * 16 * cost.macs)


def test_the_spec_check_and_the_network_agree_on_what_fits():
    # The spec's check (ConvModel.problems) and the network's shapes are one arithmetic
    # (compiler.shapes): a block that leaves no position is refused where the shape is declared,
    # at its own key, and a channel budget at its depth.
    base = {"study": {"name": "t"}, "data": {"generator": "glyphs", "shape": [8, 8, 1]}}
    deep = {"kind": "conv", "blocks": [{"channels": 4, "pool": 2}] * 4}
    with pytest.raises(ValueError, match=r"@model\.blocks\.3: a block of kernel 3"):
        spec.Spec.model_validate({**base, "model": deep})
    with pytest.raises(ValueError, match=r"@model\.blocks\.depth: block 4 of 4: "):
        spec.Spec.model_validate({**base, "model": {"kind": "conv", "blocks": {"channels": 16, "depth": 4,
                                                                                  "pool": 2}}})
    fits = spec.Spec.model_validate({**base, "model": {**deep, "blocks": deep["blocks"][:3]}})
    assert model.feature_shapes((8, 8, 1), fits.model.resolved_blocks)[-1] == (1, 1, 4)
    with pytest.raises(ValueError, match=r"@model\.kind: 'conv' needs examples of shape"):
        spec.Spec.model_validate({"study": {"name": "t"}, "data": {"generator": "blobs"}, "model": {"kind": "conv"}})


def test_a_lanes_bits_do_not_depend_on_its_position_or_neighbours():
    # Lanes of one width are computed independently (the im2col product is batched over lanes):
    # a run's parameters are bit for bit the same whichever lane it sits in and whatever runs
    # beside it, so a study's bits do not depend on how its runs are grouped at a fixed width.
    from compiler import build
    from compiler.data import load_data
    from compiler.expand import expand

    raw = {"study": {"name": "lanes"}, "data": {"generator": "glyphs", "samples": 160, "shape": [8, 8, 1],
                                                "classes": 4},
           "model": {"kind": "conv", "blocks": [{"channels": 4, "stride": 2, "pool": 2}]},
           "normalization": {"kind": "batch"}, "training": {"epochs": 2, "batch_size": 16}}
    v = expand(spec.Spec.model_validate(raw))[0].spec
    ds = load_data(v, ".")
    prog = build.compile_program([v], ds)
    train = jax.jit(jax.vmap(prog.train, in_axes=(0, 0, None, None)))
    rates = [0.01, 0.1, 0.03]

    def hashes(order):
        knobs = prog.pack([v] * 3)
        knobs = {**knobs, "optimizer.learning_rate": jnp.asarray([rates[i] for i in order], jnp.float32)}
        keys = jax.vmap(build.seed_key)(np.asarray(order, np.uint32))
        params = jax.vmap(prog.params)(train(knobs, keys, ds.x, ds.y)[0])
        return {i: build.param_hash(jax.tree.map(lambda a: a[k], params)) for k, i in enumerate(order)}

    assert hashes([0, 1, 2]) == hashes([2, 0, 1])
