"""Regularization: the L2 penalty, decoupled weight decay and dropout.

Contract:

- :func:`l2_penalty` ``(params, mask, weight_decay) -> f32``: ``λ/2 Σ ‖W‖²`` over the leaves the
  boolean ``mask`` pytree selects (weight matrices only: not biases, γ, β);
- :func:`decoupled_decay` ``(weight_decay, mask) -> optax.GradientTransformation``: adds ``λW``
  to the update; the optimizer places it before its learning-rate scaling;
- :data:`REGISTRY` maps a dropout kind to a factory ``(rate) -> Dropout`` of two pure functions
  used on hidden layers only (never on the input, never on the output layer):
  ``dense(key, x, W, train) -> x W`` (the hidden layer's linear map, bias added by the caller)
  and ``activation(key, h, train) -> h`` (on the hidden layer's activations, ``[batch, width]``
  or a feature map ``[batch, *positions, channels]``). ``train`` is a Python bool. Masks are
  drawn per example from ``key``; the caller gives a fresh key per step and layer.
  ``masks_weights`` declares whether the masks cover the weights (a mask per example the size
  of the layer: the network's cost counts it) rather than the activations (a rate of 0 then
  makes ``activation`` the identity, which the compiler leaves out).
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp
import optax

__all__ = ["l2_penalty", "decoupled_decay", "Dropout", "inverted", "scaled", "dropconnect", "spatial", "REGISTRY"]


def l2_penalty(params, mask, weight_decay):
    """``λ/2 Σ_W ‖W‖²`` over the masked leaves; its gradient is exactly ``λW`` on each of them."""
    leaves = [jnp.sum(jnp.square(p)) for p, keep in zip(jax.tree.leaves(params), jax.tree.leaves(mask)) if keep]
    return 0.5 * weight_decay * sum(leaves, jnp.float32(0.0))


def decoupled_decay(weight_decay, mask) -> optax.GradientTransformation:
    """Decoupled weight decay (Loshchilov & Hutter 2019): ``λθ`` joins the update rather than
    the gradient, so adaptive scaling and momentum statistics never see it. Placed before the
    learning-rate scaling, the step is ``−η(u + λθ)``, as optax's ``adamw`` does (the paper
    scales the decay by a separate schedule multiplier instead of by η)."""
    return optax.add_decayed_weights(weight_decay, mask)


class Dropout(NamedTuple):
    dense: Callable
    activation: Callable
    masks_weights: bool  # a mask per example over the weights (its cost), not over the activations


def _plain_dense(key, x, w, train):
    return x @ w


def _keep_mask(key, rate, shape, dtype):
    return jax.random.bernoulli(key, 1.0 - rate, shape).astype(dtype)


def inverted(rate=0.0) -> Dropout:
    """Inverted dropout: while training each hidden unit is kept with probability
    ``p = 1 − rate`` and scaled by ``1/p``, so the expected activation is unchanged and
    inference is the plain network."""
    keep = 1.0 - rate

    def activation(key, h, train):
        return h * _keep_mask(key, rate, h.shape, h.dtype) / keep if train else h

    return Dropout(_plain_dense, activation, False)


def scaled(rate=0.0) -> Dropout:
    """Dropout as in Srivastava et al. 2014 (§4): units are kept with probability ``p`` while
    training, unscaled; at inference every activation is multiplied by ``p`` (the expectation of
    the training-time output)."""
    keep = 1.0 - rate

    def activation(key, h, train):
        return h * _keep_mask(key, rate, h.shape, h.dtype) if train else h * keep

    return Dropout(_plain_dense, activation, False)


def dropconnect(rate=0.0) -> Dropout:
    """DropConnect (Wan et al. 2013): while training each weight of a hidden layer is kept with
    probability ``p`` (unscaled), with a fresh mask ``M`` per example: ``u_b = x_b (M_b ⊙ W)``.
    Inference is mean-weight, ``u = p·xW`` (common practice); the paper's inference instead
    moment-matches a Gaussian over ``u`` and samples it, which this does not do."""
    keep = 1.0 - rate

    def dense(key, x, w, train):
        if not train:
            return keep * (x @ w)
        masks = _keep_mask(key, rate, (x.shape[0],) + w.shape, w.dtype)
        return jnp.einsum("bi,bio->bo", x, masks * w)

    return Dropout(dense, lambda key, h, train: h, True)


def spatial(rate=0.0) -> Dropout:
    """Spatial dropout (Tompson et al. 2015, §3.2): while training each channel of an example's
    feature map is kept or dropped whole, at every position at once, with probability
    ``p = 1 − rate``, and scaled by ``1/p`` as inverted dropout is. Neighbouring positions of a
    feature map are strongly correlated, so dropping single units hardly regularizes it. On a
    dense layer (no positions) it is inverted dropout, unit by unit, with the same masks."""
    keep = 1.0 - rate

    def activation(key, h, train):
        if not train:
            return h
        shape = (h.shape[0],) + (1,) * (h.ndim - 2) + (h.shape[-1],)
        return h * _keep_mask(key, rate, shape, h.dtype) / keep

    return Dropout(_plain_dense, activation, False)


REGISTRY: dict[str, Callable[..., Dropout]] = {"inverted": inverted, "scaled": scaled, "dropconnect": dropconnect,
                                               "spatial": spatial}
