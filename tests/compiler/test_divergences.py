"""Divergences against scipy and the standard output-layer derivations."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.special
import scipy.stats

from compiler import divergences


def test_l2_identity_output_gradient_is_the_error():
    # common practice: d/dz ½‖z − d‖² = z − d (standard derivation for an identity output)
    rng = np.random.default_rng(1)
    z, d = rng.normal(size=(5, 3)).astype(np.float32), rng.normal(size=(5, 3)).astype(np.float32)
    div = divergences.l2()
    g = jax.grad(lambda z: jnp.sum(div.per_example(z, d)))(z)
    np.testing.assert_allclose(g, z - d, rtol=1e-6, atol=1e-7)


def test_kl_softmax_one_hot_gradient_is_the_error():
    # common practice: d/dz CE(onehot, softmax(z)) = softmax(z) − onehot
    rng = np.random.default_rng(2)
    z = rng.normal(size=(6, 4)).astype(np.float32)
    labels = np.array([0, 1, 2, 3, 1, 0])
    div = divergences.kl(0.0)
    g = jax.grad(lambda z: jnp.sum(div.per_example(z, labels)))(z)
    expected = scipy.special.softmax(z, axis=1) - np.eye(4)[labels]
    np.testing.assert_allclose(g, expected, rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("eps", [0.0, 0.1, 0.3])
def test_kl_equals_scipy_relative_entropy(eps):
    # scipy.special.rel_entr and scipy.stats.entropy(p, q) both give KL(p‖q)
    rng = np.random.default_rng(3)
    k = 5
    z = rng.normal(size=(8, k))
    labels = rng.integers(0, k, 8)
    y = scipy.special.softmax(z, axis=1)
    d = (1 - eps) * np.eye(k)[labels] + eps / k
    ours = np.asarray(divergences.kl(eps).per_example(jnp.asarray(z, jnp.float32), labels))
    np.testing.assert_allclose(ours, scipy.special.rel_entr(d, y).sum(axis=1), rtol=2e-5, atol=1e-6)
    np.testing.assert_allclose(ours, scipy.stats.entropy(d, y, axis=1), rtol=2e-5, atol=1e-6)
    if eps == 0.0:
        # KL = CE − H(d) and H(onehot) = 0: KL equals the cross-entropy (common practice)
        np.testing.assert_allclose(ours, -np.log(y[np.arange(8), labels]), rtol=2e-5)


def test_kl_is_stable_for_large_logits():
    z = jnp.array([[1000.0, 0.0, -1000.0]])
    assert np.isfinite(divergences.kl(0.1).per_example(z, np.array([2]))).all()


def test_bce_matches_scipy_log_expit():
    # BCE = −[d log σ(z) + (1−d) log σ(−z)], scipy.special.log_expit as the reference
    z = np.array([-30.0, -2.0, 0.0, 1.5, 40.0])
    d = np.array([1, 0, 1, 1, 0])
    ref = -(d * scipy.special.log_expit(z) + (1 - d) * scipy.special.log_expit(-z))
    ours = divergences.bce().per_example(jnp.asarray(z[:, None], jnp.float32), d)
    np.testing.assert_allclose(ours, ref, rtol=1e-5)


@pytest.mark.parametrize("delta", [0.5, 1.0, 2.5])
def test_huber_matches_scipy(delta):
    # scipy.special.huber(δ, r) = ½r² for |r| ≤ δ, δ(|r| − ½δ) otherwise (Huber 1964)
    rng = np.random.default_rng(4)
    z, d = rng.normal(scale=3, size=(10, 2)), rng.normal(size=(10, 2))
    ours = divergences.huber(delta).per_example(jnp.asarray(z, jnp.float32), jnp.asarray(d, jnp.float32))
    np.testing.assert_allclose(ours, scipy.special.huber(delta, z - d).sum(axis=1), rtol=1e-5)


