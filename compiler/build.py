"""From a resolved variant to pure JAX training functions: where the spec meets the components.

Contract (what the runtime relies on): :func:`compile_program` ``(variants, dataset) -> Program``
builds — but does not jit — the program of variants sharing one program key: pure, vmappable
functions of

- ``knobs``: ``{name: f32 scalar}`` for the names in ``Program.knob_names`` (the variant's knob
  fields, :func:`compiler.hashing.knobs_of`); ``Program.pack(lanes)`` gives them as
  ``f32[lanes]`` for a list of variants. Every knob is traced, so one XLA program serves every
  variant of a program key;
- ``key``: the run's root key :func:`seed_key` ``(seed)``;
- ``data_x``, ``data_y``: the whole :class:`compiler.data.Dataset` arrays, shared by all lanes.

``init`` draws the run's train/validation split and fits standardization on its training rows
(:func:`fit_standardization`: mean, population standard deviation, scale 1 for a feature
constant up to rounding; mean 0 and scale 1 when ``data.standardize`` is false). Targets are
never standardized. ``epoch`` is a whole
epoch: shuffle, every step in ``lax.scan``, then the validation split in inference mode;
``train`` is ``init`` then a scan over ``epochs``. Metrics per epoch (``Program.metric_names``):
``train_divergence`` and ``train_penalty`` (``λ/2‖W‖²``, 0 when decay is decoupled) averaged
over the epoch's steps; ``val_divergence`` and ``val_accuracy`` or ``val_rmse`` (target units)
on the validation split in inference mode, for a classifier also ``val_macro_f1`` and
``val_recall_<k>`` per class from the same predictions (:func:`class_scores`; the names come from
``compiler.spec.class_metrics``); ``grad_norm`` and ``grad_norm_layer<i>`` (L2 norm of the
objective's gradient, all of it or one layer's, averaged over steps); ``weight_norm`` (L2 norm of
the weight matrices at the end of the epoch); ``learning_rate`` at the epoch's last step.
``evaluate`` returns ``divergence`` and ``accuracy`` (with ``macro_f1`` and ``recall_<k>``) or
``rmse``.

With ``data.test``, the split's permutation gives its last rows to a test split
(:func:`compiler.spec.split_sizes`), which neither training nor standardization sees, nor any
epoch: ``test(carry, data_x, data_y)`` scores them (``Program.test_names``: ``test_divergence``
and ``test_accuracy`` or ``test_rmse``, inference mode) for the weights of a carry, once, after
training (the runtime passes the weights of the epoch the study judges its runs at).

Components are built from their spec sections by their family's registry under the section's
``kind``, with every field of the section as an argument of the same name: knobs as the traced
values, the other fields as Python values (what a knob-free section field changes, such as
``nesterov`` or ``warmup_epochs``, is part of the program key).

``Program.zero_knobs`` are the knobs that are 0 in every variant the program was built for;
``pack`` refuses lanes where one is not. Where a zero knob makes a component exactly the
identity, the program leaves that work out: a dropout rate of 0 on activations (inverted,
scaled or spatial) keeps every unit with scale 1, so no masks are drawn — the same bits, without a threefry
draw the size of every hidden activation per step. DropConnect keeps its masks: its per-example
product is a different computation than ``x W``.

Randomness: one root key per seed; fixed tags derive independent streams (``fold_in(root, tag)``):
the split and the per-epoch shuffle (``fold_in(stream, epoch)``), both a :func:`permutation`; the
initial weights (one draw, :func:`compiler.model.draw_weights`); and dropout
(``fold_in(fold_in(stream, epoch), step)``). Two variants with the same seed and shapes therefore
share split, initial weights and batch order.

Health is judged per epoch: if within an epoch the objective, a gradient, a parameter, a running
statistic or a metric (e.g. the validation loss of huge but finite weights) is not finite, the
whole epoch is discarded (``jnp.where`` after the scan) and the run stays frozen, from then on, at
the state it ended its last healthy epoch with. ``status`` reports the epoch it happened in, and
that epoch's and later metrics are NaN.
"""

from __future__ import annotations

import hashlib
from typing import Any, Callable, NamedTuple, Sequence

import jax
import jax.numpy as jnp
import numpy as np
import optax

from compiler import divergences, model, normalization, optimizers, regularization
from compiler.data import Dataset
from compiler.hashing import knobs_of, program_key
from compiler.spec import MACRO_F1, RECALL, Spec, Strict, class_metrics, split_sizes

__all__ = ["Program", "Carry", "compile_program", "class_scores", "zero_knobs", "fit_standardization", "knob_vector",
           "seed_key", "param_hash", "permutation",
           "SPLIT", "INIT", "SHUFFLE", "DROPOUT"]

# Purpose tags of the random streams; fixed forever, since they decide every run's bits.
SPLIT, INIT, SHUFFLE, DROPOUT = 1, 2, 3, 4


class Program(NamedTuple):
    key: str                # the program key its variants share
    knob_names: tuple[str, ...]
    zero_knobs: frozenset[str]
    metric_names: tuple[str, ...]
    test_names: tuple[str, ...]
    epochs: int
    init: Callable
    epoch: Callable
    train: Callable
    evaluate: Callable
    params: Callable
    status: Callable
    pack: Callable
    test: Callable        # carry, data → test scores of the carry's weights (with data.test)


class Carry(NamedTuple):
    params: Any
    state: Any            # running statistics of the normalizers
    opt_state: Any
    knobs: dict           # kept for ``evaluate``, which takes no knobs
    epoch: jax.Array      # int32, index of the next epoch
    train_idx: jax.Array  # int32 [n_train]
    val_idx: jax.Array    # int32 [n_val]
    test_idx: jax.Array   # int32 [n_test], empty without data.test
    x_mean: jax.Array
    x_scale: jax.Array
    shuffle_key: jax.Array
    dropout_key: jax.Array
    non_finite: jax.Array   # bool
    non_finite_epoch: jax.Array  # int32 epoch index, −1 while healthy


class _Parts(NamedTuple):
    divergence: divergences.Divergence
    network: model.Network
    tx: optax.GradientTransformation
    schedule: Callable
    weight_decay: Any


def seed_key(seed: int) -> jax.Array:
    """The root key of a run: a typed threefry key. The generator is named, not taken from
    ``jax_default_prng_impl``: another one (``rbg``) would draw other numbers from the same seed."""
    return jax.random.key(seed, impl="threefry2x32")


def permutation(key: jax.Array, n: int) -> jax.Array:
    """A random permutation of ``range(n)`` (int32): the indices sorted by 32-bit random keys.

    One stable sort instead of ``jax.random.permutation``'s repeated rounds, which compile about
    twice as slowly. Rows whose keys tie (about n²/2³³ pairs per call: 0.0005 for 2048 rows,
    1 for 90 000) keep their relative order in that one permutation."""
    return jnp.argsort(jax.random.bits(key, (n,))).astype(jnp.int32)


def knob_vector(variant: Spec) -> dict[str, np.float32]:
    """The variant's knob values as float32 scalars, in ``KNOBS`` order."""
    return {name: np.float32(value) for name, value in knobs_of(variant).items()}


def param_hash(params_pytree) -> str:
    """SHA-256 hex over every leaf in sorted key-path order: path, dtype, shape, raw bytes."""
    h = hashlib.sha256()
    leaves = jax.tree_util.tree_flatten_with_path(params_pytree)[0]
    for path, leaf in sorted(leaves, key=lambda item: jax.tree_util.keystr(item[0])):
        a = np.ascontiguousarray(np.asarray(leaf))
        h.update(f"{jax.tree_util.keystr(path)}|{a.dtype.str}|{a.shape}|".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def _component(registry: dict, section: Strict, prefix: str, knobs: dict, **made):
    """The component registered under the section's ``kind``, given every field of the section
    by name: knobs as the traced values under ``prefix``, the other fields as Python values.
    ``made`` holds what the compiler makes itself (it replaces a field of the same name: the
    learning rate becomes its schedule). The ``kind`` and nested sections, which are components
    of their own, are not passed."""
    arguments = {}
    for name in type(section).model_fields:
        value = getattr(section, name)
        if name == "kind" or isinstance(value, Strict):
            continue
        arguments[name] = knobs[prefix + name] if name in type(section).knobs else value
    return registry[section.kind](**{**arguments, **made})


def _global_norm(tree) -> jax.Array:
    leaves = jax.tree.leaves(tree)
    return optax.tree.norm(leaves) if leaves else jnp.float32(0.0)


def _all_finite(tree) -> jax.Array:
    return jnp.all(jnp.stack([jnp.all(jnp.isfinite(leaf)) for leaf in jax.tree.leaves(tree)]))


def fit_standardization(x_train: jax.Array) -> tuple[jax.Array, jax.Array]:
    """Per-feature mean and scale of the training rows ``[n, *shape]`` (float32): one per value
    of an example (each pixel of each channel of an image).

    The scale is the population standard deviation, except for a feature that is constant up to
    rounding: its scale is 1, so it is only centred. A feature constant in the training rows has
    a float32 variance of about 1e-16, not 0, and dividing a validation value by its square root
    would blow it up by 1e8. "Constant up to rounding" is scikit-learn's ``StandardScaler`` test
    (``sklearn.preprocessing._data._is_constant_feature``): ``var <= n·eps·var + (n·mean·eps)²``,
    the error bound of the two-pass variance (Chan, Golub & LeVeque 1983), here with float32's
    eps since that is the precision the variance is computed in (scikit-learn accumulates in
    float64 and uses its eps). Where the test fails the scale is the plain standard deviation,
    bit for bit what it was before the test existed."""
    n = x_train.shape[0]
    mean = jnp.mean(x_train, axis=0)
    var = jnp.var(x_train, axis=0)
    eps = jnp.finfo(jnp.float32).eps
    constant = var <= n * eps * var + jnp.square(n * mean * eps)
    return mean, jnp.where(constant, 1.0, jnp.sqrt(var))


def class_scores(predicted: jax.Array, y: jax.Array, classes: int) -> dict[str, jax.Array]:
    """Recall of each class and the macro-averaged F1 score of class predictions (int ``[n]``)
    against labels (int ``[n]``, ``0 … classes − 1``), as float32 scalars named by
    ``compiler.spec.RECALL`` + k and ``compiler.spec.MACRO_F1``.

    With per-class counts ``tp`` (predicted k and labelled k), ``support`` (labelled k) and
    ``chosen`` (predicted k): recall_k = tp / support, F1_k = 2 tp / (support + chosen) (the
    harmonic mean of precision and recall written without either, as scikit-learn computes it).
    Macro F1 is the unweighted mean of F1_k over the classes that occur in the labels or the
    predictions: scikit-learn's ``f1_score(average="macro")`` with ``labels`` left out. A class
    absent from the labels has recall 0 (scikit-learn's ``zero_division`` default, "warn", which
    returns 0); a class in neither is left out of the mean, so the macro F1 never divides by 0.
    The counts are int32 scatter-adds (exact, in any order); every value is finite, so these
    metrics never mark an epoch unhealthy."""
    ones = jnp.ones_like(y, dtype=jnp.int32)
    count = lambda index, weight: jnp.zeros((classes,), jnp.int32).at[index].add(weight)
    support, chosen = count(y, ones), count(predicted, ones)
    tp = count(y, (predicted == y).astype(jnp.int32))
    ratio = lambda num, den: jnp.where(den > 0, num.astype(jnp.float32) / jnp.maximum(den, 1).astype(jnp.float32),
                                       jnp.float32(0.0))
    recall = ratio(tp, support)
    f1 = ratio(2 * tp, support + chosen)
    present = (support + chosen) > 0
    macro = jnp.sum(jnp.where(present, f1, 0.0)) / jnp.sum(present).astype(jnp.float32)
    return {MACRO_F1: macro, **{f"{RECALL}{k}": recall[k] for k in range(classes)}}


def zero_knobs(variants: Sequence[Spec]) -> frozenset[str]:
    """The knobs that are 0 in every one of ``variants`` (lanes padded with copies of a real run
    add no other value): work they make the identity can be left out of their program."""
    vectors = [knob_vector(v) for v in variants]
    return frozenset(name for name in vectors[0] if not any(vec[name] for vec in vectors))


def compile_program(variants: Sequence[Spec], dataset: Dataset) -> Program:
    """Pure training functions for resolved variants (``model.hidden`` a list) of one program
    key and their data; the program's ``zero_knobs`` are those 0 in every one of them."""
    variant = variants[0]
    shared = program_key(variant)
    if any(program_key(v) != shared for v in variants):
        raise ValueError(f"variants of several program keys in one program: {sorted({program_key(v) for v in variants})}")
    knob_names = tuple(knob_vector(variant))
    zero = zero_knobs(variants)
    n, shape = dataset.x.shape[0], dataset.x.shape[1:]
    classification = dataset.task == "classification"
    n_train, n_val, n_test = split_sizes(n, variant.data.validation, variant.data.test)
    epochs = variant.training.epochs
    batch_size = variant.training.batch_size
    steps = variant.training.steps(n_train)
    padded = steps * batch_size
    decoupled = variant.regularization.decoupled
    opt = variant.optimizer
    widths = list(variant.model.widths)
    names = model.layer_names(variant.model.hidden_layers + 1)
    fit_scale = variant.data.standardize
    def parts(knobs) -> _Parts:
        divergence = _component(divergences.REGISTRY, variant.divergence, "divergence.", knobs)
        normalizer = _component(normalization.REGISTRY, variant.normalization, "normalization.", knobs)
        dropout = _component(regularization.REGISTRY, variant.regularization.dropout, "regularization.dropout.", knobs)
        if "regularization.dropout.rate" in zero and not dropout.masks_weights:
            dropout = dropout._replace(activation=lambda key, h, train: h)
        out_width = variant.divergence.outputs(dataset.classes, dataset.targets)
        networks = {kind: family.network for kind, family in model.FAMILIES.items()}
        network = _component(networks, variant.model, "model.", knobs, hidden=widths, out_width=out_width,
                             normalizer=normalizer, dropout=dropout)
        schedule = _component(optimizers.SCHEDULES, opt.schedule, "optimizer.schedule.", knobs,
                              learning_rate=knobs["optimizer.learning_rate"], steps_per_epoch=steps,
                              total_steps=steps * epochs)
        weight_decay = knobs["regularization.weight_decay"]
        # The mask is a function of the params tree so optax can build it at init and update alike.
        decay = (weight_decay, model.weight_mask) if decoupled else None
        tx = _component(optimizers.REGISTRY, opt, "optimizer.", knobs, learning_rate=schedule, decoupled=decay)
        return _Parts(divergence, network, tx, schedule, weight_decay)

    def pack(lanes: Sequence[Spec]) -> dict[str, jax.Array]:
        """The knobs of ``lanes`` (variants of this program key), ``f32[len(lanes)]`` per name."""
        strangers = sorted({program_key(v) for v in lanes} - {shared})
        if strangers:
            raise ValueError(f"lanes of program keys {strangers} packed for the program of key {shared}")
        lane_vectors = [knob_vector(v) for v in lanes]
        packed = {name: np.array([vec[name] for vec in lane_vectors], dtype=np.float32) for name in knob_names}
        # The program may have left out work these knobs do when they are not 0.
        broken = sorted(name for name in zero if np.any(packed[name]))
        if broken:
            raise ValueError(f"knobs {broken} are 0 in every variant the program was built for, not in these lanes")
        return {name: jnp.asarray(values) for name, values in packed.items()}

    def standardize(carry, x):
        return (x - carry.x_mean) / carry.x_scale

    def init(knobs, key, data_x, data_y):
        p = parts(knobs)
        data_x = jnp.asarray(data_x)
        order = permutation(jax.random.fold_in(key, SPLIT), n)
        # The test rows come last in the split's permutation: without a test split the training and
        # validation rows are what they always were.
        train_idx, val_idx, test_idx = order[:n_train], order[n_train:n_train + n_val], order[n_train + n_val:]
        mean, scale = fit_standardization(data_x[train_idx]) if fit_scale else \
            (jnp.zeros(shape, jnp.float32), jnp.ones(shape, jnp.float32))
        params, state = p.network.init(jax.random.fold_in(key, INIT), shape)
        return Carry(params, state, p.tx.init(params), dict(knobs), jnp.int32(0),
                     train_idx.astype(jnp.int32), val_idx.astype(jnp.int32), test_idx.astype(jnp.int32), mean,
                     scale, jax.random.fold_in(key, SHUFFLE),
                     jax.random.fold_in(key, DROPOUT), jnp.bool_(False), jnp.int32(-1))

    def scores(p, params, state, x, y):
        """Inference-mode divergence and accuracy/RMSE on standardized inputs; for a classifier
        also the per-class recall and macro F1 of the same predictions (:func:`class_scores`)."""
        # Inference draws no dropout masks, so any key will do.
        z, _ = p.network.apply(params, state, x, seed_key(0), None, False)
        out = {"divergence": jnp.mean(p.divergence.per_example(z, y))}
        if not classification:
            out["rmse"] = jnp.sqrt(jnp.mean(jnp.square(z - y)))
            return out
        if z.shape[-1] == 1:
            out["accuracy"] = jnp.mean(((z[:, 0] > 0) == (y == 1)).astype(jnp.float32))
            predicted = (z[:, 0] > 0).astype(jnp.int32)
        else:
            out["accuracy"] = jnp.mean((jnp.argmax(z, axis=-1) == y).astype(jnp.float32))
            predicted = jnp.argmax(z, axis=-1).astype(jnp.int32)
        return {**out, **class_scores(predicted, y, dataset.classes)}

    def epoch(carry: Carry, knobs, data_x, data_y):
        p = parts(knobs)
        data_x, data_y = jnp.asarray(data_x), jnp.asarray(data_y)
        weights = model.weight_mask(carry.params)
        e = carry.epoch
        order = carry.train_idx[permutation(jax.random.fold_in(carry.shuffle_key, e), n_train)]
        real = jnp.ones((n_train,), jnp.float32)
        if padded > n_train:
            order = jnp.concatenate([order, jnp.zeros((padded - n_train,), jnp.int32)])
            real = jnp.concatenate([real, jnp.zeros((padded - n_train,), jnp.float32)])
        batches = (order[:padded].reshape(steps, batch_size), real[:padded].reshape(steps, batch_size))
        epoch_dropout = jax.random.fold_in(carry.dropout_key, e)

        def step(inner, batch):
            params, state, opt_state, bad = inner
            (idx, mask), s = batch
            x = standardize(carry, data_x[idx])
            y = data_y[idx]

            def objective(params):
                z, new_state = p.network.apply(params, state, x, jax.random.fold_in(epoch_dropout, s), mask, True)
                div = jnp.sum(mask * p.divergence.per_example(z, y)) / jnp.sum(mask)
                penalty = jnp.float32(0.0) if decoupled else regularization.l2_penalty(params, weights, p.weight_decay)
                return div + penalty, (div, penalty, new_state)

            (value, (div, penalty, new_state)), grads = jax.value_and_grad(objective, has_aux=True)(params)
            updates, new_opt_state = p.tx.update(grads, opt_state, params)
            grad_norm = _global_norm(grads)
            # A finite objective and gradient norm imply finite gradients; parameters that
            # overflow show up in the next step's objective or in the check after the epoch.
            bad = bad | ~jnp.isfinite(value) | ~jnp.isfinite(grad_norm)
            metrics = {"train_divergence": div, "train_penalty": penalty, "grad_norm": grad_norm,
                       **{model.layer_metric(name): _global_norm(grads[name]) for name in names}}
            return (optax.apply_updates(params, updates), new_state, new_opt_state, bad), metrics

        (params, state, opt_state, bad), per_step = jax.lax.scan(
            step, (carry.params, carry.state, carry.opt_state, jnp.bool_(False)),
            (batches, jnp.arange(steps, dtype=jnp.int32)))
        val_x = standardize(carry, data_x[carry.val_idx])
        val = scores(p, params, state, val_x, data_y[carry.val_idx])
        metrics = {name: jnp.mean(values) for name, values in per_step.items()}
        metrics.update({f"val_{k}": v for k, v in val.items()})
        metrics["weight_norm"] = _global_norm([w for w, m in zip(jax.tree.leaves(params), jax.tree.leaves(weights)) if m])
        metrics["learning_rate"] = jnp.asarray(p.schedule(e * steps + steps - 1), jnp.float32)
        # Health is judged once per epoch, not per step (one select over the parameters per
        # epoch instead of one per step): an epoch in which the objective, a gradient, a
        # parameter, a running statistic or a metric (finite but huge weights can overflow the
        # validation loss) became non-finite is discarded whole. The run keeps the state it ended
        # its last healthy epoch with, and every reported number is either finite or NaN.
        non_finite = (carry.non_finite | bad | ~_all_finite(params) | ~_all_finite(metrics)
                      | (~_all_finite(state) if jax.tree.leaves(state) else False))
        keep = lambda new, old: jax.tree.map(lambda a, b: jnp.where(non_finite, b, a), new, old)
        params, state, opt_state = (keep(params, carry.params), keep(state, carry.state),
                                    keep(opt_state, carry.opt_state))
        metrics = {name: jnp.where(non_finite, jnp.nan, metrics[name]).astype(jnp.float32) for name in metric_names}
        non_finite_epoch = jnp.where(non_finite & ~carry.non_finite, e, carry.non_finite_epoch)
        return carry._replace(params=params, state=state, opt_state=opt_state, epoch=e + 1,
                              non_finite=non_finite, non_finite_epoch=non_finite_epoch), metrics

    def train(knobs, key, data_x, data_y):
        carry = init(knobs, key, data_x, data_y)
        return jax.lax.scan(lambda c, _: epoch(c, knobs, data_x, data_y), carry, None, length=epochs)

    def evaluate(carry: Carry, x, y):
        return scores(parts(carry.knobs), carry.params, carry.state, standardize(carry, jnp.asarray(x)),
                      jnp.asarray(y))

    def test(carry: Carry, data_x, data_y):
        idx = carry.test_idx
        scored = evaluate(carry, jnp.asarray(data_x)[idx], jnp.asarray(data_y)[idx])
        return {f"test_{k}": v for k, v in scored.items()}

    metric_names = ("train_divergence", "train_penalty", "val_divergence",
                    *(("val_accuracy", *class_metrics(dataset.classes)) if classification else ("val_rmse",)),
                    "grad_norm",
                    *(model.layer_metric(name) for name in names), "weight_norm", "learning_rate")
    test_names = tuple(f"test_{m.removeprefix('val_')}" for m in metric_names if m.startswith("val_")) if n_test else ()
    return Program(shared, knob_names, zero, metric_names, test_names, epochs, init, epoch, train, evaluate,
                   lambda carry: {"params": carry.params, "state": carry.state},
                   lambda carry: (carry.non_finite, carry.non_finite_epoch), pack, test)
