"""Divergences: how far the network's output is from the target, per example.

Contract: each factory in :data:`REGISTRY` takes the divergence's fields by name (knobs as plain
floats or traced f32 scalars) and returns a :class:`Divergence`, a pure function of the network's
*raw* output ``z`` (the last affine map, before the output link):
``per_example(z, target) -> f32[batch]``, the divergence of every example.

Targets are int32 class labels ``[batch]`` for a classification divergence and float32
``[batch, targets]`` for a regression one. Every form is written on the raw output in a
numerically stable way (log-softmax, log-sigmoid), so the link is never exponentiated and then
logged.

What a divergence is *for* — its task, the classes it is defined for, its output width — is
declared once, on its schema class in ``compiler/spec.py`` (``DivergenceSection``), where the
spec check needs it without jax; the shared tests check that each factory accepts what its
class declares.
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp

__all__ = ["Divergence", "l2", "kl", "bce", "huber", "REGISTRY"]


class Divergence(NamedTuple):
    per_example: Callable


def l2() -> Divergence:
    """Half squared error with an identity output: ``½‖z − d‖²`` per example (summed over the
    targets). Its gradient with respect to ``z`` is the error ``z − d``."""

    def per_example(z, d):
        return 0.5 * jnp.sum(jnp.square(z - d), axis=-1)

    return Divergence(per_example)


def kl(label_smoothing=0.0) -> Divergence:
    """``KL(d ‖ y)`` with ``y = softmax(z)`` and the smoothed target distribution
    ``d = (1 − ε)·onehot + ε/K`` (Szegedy et al. 2016, §7).

    ``KL(d‖y) = Σ_k d_k log d_k − Σ_k d_k log y_k = CE(d, y) − H(d)``; for one-hot targets
    (ε = 0) ``H(d) = 0`` and KL equals the cross-entropy. ``log y`` is ``log_softmax(z)``; the
    gradient with respect to ``z`` is ``y − d``.
    """

    def per_example(z, label):
        k = z.shape[-1]
        d = (1.0 - label_smoothing) * jax.nn.one_hot(label, k, dtype=z.dtype) + label_smoothing / k
        log_y = jax.nn.log_softmax(z, axis=-1)
        # xlogy: 0·log 0 = 0 for the classes a one-hot target gives no mass.
        return jnp.sum(jax.scipy.special.xlogy(d, d) - d * log_y, axis=-1)

    return Divergence(per_example)


def bce() -> Divergence:
    """Binary cross-entropy with a sigmoid output of one unit:
    ``−[d log σ(z) + (1 − d) log σ(−z)]`` with ``log σ`` computed as ``log_sigmoid``."""

    def per_example(z, label):
        z = z[..., 0]
        d = label.astype(z.dtype)
        return -(d * jax.nn.log_sigmoid(z) + (1.0 - d) * jax.nn.log_sigmoid(-z))

    return Divergence(per_example)


def huber(delta=1.0) -> Divergence:
    """Huber (1964) loss with threshold δ and an identity output, summed over the targets:
    ``½a²`` for ``|a| ≤ δ``, else ``δ(|a| − ½δ)``, with ``a = z − d``."""

    def per_example(z, d):
        a = jnp.abs(z - d)
        quadratic = jnp.minimum(a, delta)
        # ½q² + δ(a − q) equals both branches without a select on the traced δ.
        return jnp.sum(0.5 * jnp.square(quadratic) + delta * (a - quadratic), axis=-1)

    return Divergence(per_example)


REGISTRY: dict[str, Callable[..., Divergence]] = {"l2": l2, "kl": kl, "bce": bce, "huber": huber}
