"""Optimizers and learning-rate schedules, all composed from optax.

Contract:

- :data:`REGISTRY` maps an optimizer kind to a factory
  ``(learning_rate, <kind's fields, named as in the spec>, decoupled=None)
  -> optax.GradientTransformation``.
  ``learning_rate`` is a schedule ``step -> f32``; knobs may be traced f32 scalars, so one
  compiled program serves every value. ``decoupled`` is ``None`` (no decoupled decay) or a
  ``(weight_decay, mask)`` pair: the decay term ``λθ`` on masked leaves then joins the update
  just before the learning-rate scaling (Loshchilov & Hutter 2019, in optax's placement).
- :data:`SCHEDULES` maps a schedule kind to a factory
  ``(learning_rate, steps_per_epoch, total_steps, <kind's fields>) -> schedule``; step counts and
  ``warmup_epochs`` are static ints, rates and fractions may be traced.

A momentum of 0 is the plain method (optax's ``trace`` with decay 0 passes the gradient
through), so momentum stays a knob rather than a switch that needs a program of its own.
"""

from __future__ import annotations

from typing import Callable

import jax.numpy as jnp
import optax

from compiler.regularization import decoupled_decay

__all__ = ["sgd", "adam", "adamw", "rmsprop", "REGISTRY",
           "constant", "exponential", "cosine", "warmup_cosine", "SCHEDULES"]


def _decay(decoupled):
    return [] if decoupled is None else [decoupled_decay(*decoupled)]


def sgd(learning_rate, momentum=0.0, nesterov=False, decoupled=None) -> optax.GradientTransformation:
    """Stochastic gradient descent with heavy-ball or Nesterov momentum (Sutskever et al. 2013):
    ``v ← μv + g``, step ``−η v`` (Nesterov: ``−η(μv + g)``). With decoupled decay this is
    SGDW (Loshchilov & Hutter 2019, Alg. 1): ``−η(v + λθ)``."""
    return optax.chain(optax.trace(decay=momentum, nesterov=nesterov), *_decay(decoupled),
                       optax.scale_by_learning_rate(learning_rate))


def adam(learning_rate, b1=0.9, b2=0.999, eps=1e-8, decoupled=None) -> optax.GradientTransformation:
    """Adam (Kingma & Ba 2015, Alg. 1): ``m ← β₁m + (1−β₁)g``, ``v ← β₂v + (1−β₂)g²``,
    step ``−η m̂/(√v̂ + ε)`` with ``m̂ = m/(1−β₁ᵗ)``, ``v̂ = v/(1−β₂ᵗ)``."""
    return optax.chain(optax.scale_by_adam(b1=b1, b2=b2, eps=eps), *_decay(decoupled),
                       optax.scale_by_learning_rate(learning_rate))


def adamw(learning_rate, b1=0.9, b2=0.999, eps=1e-8, decoupled=None) -> optax.GradientTransformation:
    """AdamW (Loshchilov & Hutter 2019, Alg. 2) as optax defines it: step
    ``−η(m̂/(√v̂ + ε) + λθ)`` — optax multiplies the decay by the learning rate. Decay is part of
    the method, so ``decoupled`` is required."""
    weight_decay, mask = decoupled
    return optax.adamw(learning_rate, b1=b1, b2=b2, eps=eps, weight_decay=weight_decay, mask=mask)


def rmsprop(learning_rate, decay=0.9, eps=1e-8, momentum=0.0, decoupled=None) -> optax.GradientTransformation:
    """RMSProp (Tieleman & Hinton 2012): ``ν ← ρν + (1−ρ)g²``, ``u = g/√(ν + ε)``, then
    momentum on the learning-rate-scaled step, in optax's ``rmsprop`` order."""
    return optax.chain(optax.scale_by_rms(decay=decay, eps=eps), *_decay(decoupled),
                       optax.scale_by_learning_rate(learning_rate), optax.trace(decay=momentum))


REGISTRY: dict[str, Callable[..., optax.GradientTransformation]] = {
    "sgd": sgd, "adam": adam, "adamw": adamw, "rmsprop": rmsprop}


def constant(learning_rate, steps_per_epoch, total_steps):
    """``η_t = η``."""
    return lambda count: learning_rate * jnp.ones((), jnp.float32)


def exponential(learning_rate, steps_per_epoch, total_steps, rate=0.97):
    """``η_t = η · rate^(t / steps_per_epoch)``: multiplied by ``rate`` once per epoch, spread
    smoothly over its steps. (Written out because optax's ``exponential_decay`` branches in
    Python on the rate, which a traced rate cannot allow.)"""
    return lambda count: learning_rate * jnp.power(rate, count / steps_per_epoch)


def cosine(learning_rate, steps_per_epoch, total_steps, final_fraction=0.0):
    """Cosine decay (Loshchilov & Hutter 2017, without restarts) over all training steps:
    ``η_t = η(f + (1 − f)·½(1 + cos(π t/T)))`` with ``f`` = ``final_fraction``."""
    return optax.cosine_decay_schedule(learning_rate, decay_steps=total_steps, alpha=final_fraction)


def warmup_cosine(learning_rate, steps_per_epoch, total_steps, warmup_epochs=1, final_fraction=0.0):
    """Linear warm-up from 0 to ``η`` over ``warmup_epochs`` epochs (Goyal et al. 2017), then the
    cosine decay above over the remaining steps down to ``final_fraction · η``."""
    warmup = warmup_epochs * steps_per_epoch
    return optax.join_schedules(
        [optax.linear_schedule(0.0, learning_rate, warmup),
         optax.cosine_decay_schedule(learning_rate, decay_steps=total_steps - warmup, alpha=final_fraction)],
        [warmup])


SCHEDULES: dict[str, Callable] = {"constant": constant, "exponential": exponential, "cosine": cosine,
                                  "warmup_cosine": warmup_cosine}
