"""The shared table-driven tests: every row of ``components.ROWS`` (one per registered kind of
every family) is checked alike, so a new kind is picked up by adding its row.

Each family's own test file checks its kinds against their papers; these check what every kind
owes the rest of the program: that registry and schema name the same kinds and the same fields,
shapes, float32, jit equal to no jit, progress on a small problem, and that what the kind
declares about itself (a divergence's task and output width, a network's cost) is what it does.
"""

import inspect
import math
import pathlib
import sys

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from pydantic import TypeAdapter

from compiler import build, model, normalization, regularization
from compiler.expand import expand
from compiler.spec import Spec, Strict

sys.path.insert(0, str(pathlib.Path(__file__).parent))  # the suite imports in importlib mode
import components  # noqa: E402
from components import FAMILIES, ROWS  # noqa: E402

ids = [row.id for row in ROWS]


def rows_of(family):
    return [pytest.param(row, id=row.id) for row in ROWS if row.family == family]


def section_of(row: components.Row) -> Strict:
    return TypeAdapter(FAMILIES[row.family][0]).validate_python(row.section)


# What the compiler makes itself and hands a factory besides the section's fields.
MADE = {
    "model": {"out_width", "normalizer", "dropout"},
    "optimizer": {"decoupled"},
    "optimizer.schedule": {"learning_rate", "steps_per_epoch", "total_steps"},
}


def built(row: components.Row, **made):
    """The row's component built the way ``compiler.build`` builds it (knobs as traced-like f32
    scalars, the other fields as Python values)."""
    section = section_of(row)
    knobs = {f"{row.family}.{name}": jnp.float32(getattr(section, name)) for name in type(section).knobs}
    registry = FAMILIES[row.family][1]
    if row.family == "model":
        registry = {kind: family.network for kind, family in registry.items()}
    return build._component(registry, section, f"{row.family}.", knobs, **made)


# ── registry ↔ schema ───────────────────────────────────────────────────────────────────────────
@pytest.mark.parametrize("family", list(FAMILIES))
def test_registry_schema_and_table_name_the_same_kinds(family):
    annotation, registry = FAMILIES[family]
    assert components.kinds(annotation) == set(registry)
    listed = [row.kind for row in ROWS if row.family == family]
    assert sorted(listed) == sorted(registry), "every registered kind needs exactly one row in components.ROWS"


@pytest.mark.parametrize("row", ROWS, ids=ids)
def test_factory_parameters_are_the_schema_fields(row):
    # Both ways: a field the factory does not take would be dropped, a parameter no field fills
    # would always take the factory's default.
    section = section_of(row)
    fields = {name for name in type(section).model_fields
              if name != "kind" and not isinstance(getattr(section, name), Strict)}
    factory = FAMILIES[row.family][1][row.kind]
    factory = factory.network if isinstance(factory, model.Family) else factory
    parameters = set(inspect.signature(factory).parameters) - MADE.get(row.family, set())
    assert parameters == fields


@pytest.mark.parametrize("row", ROWS, ids=ids)
def test_the_row_sets_every_field_away_from_its_default(row):
    section = section_of(row)
    for name, info in type(section).model_fields.items():
        if name != "kind" and not isinstance(getattr(section, name), Strict):
            assert getattr(section, name) != info.default, f"{row.id}: {name} is left at its default"


# ── divergences ─────────────────────────────────────────────────────────────────────────────────
def _outputs_and_targets(section, rng, batch=7):
    classes = section.classes or 3
    width = section.outputs(classes, 2)
    z = jnp.asarray(rng.normal(size=(batch, width)), jnp.float32)
    if section.task == "classification":
        target = jnp.asarray(rng.integers(0, classes, batch), jnp.int32)
    else:
        target = jnp.asarray(rng.normal(size=(batch, 2)), jnp.float32)
    return z, target


@pytest.mark.parametrize("row", rows_of("divergence"))
def test_divergence_shapes_dtype_jit_progress_and_declared_width(row):
    section, div = section_of(row), built(row)
    z, target = _outputs_and_targets(section, np.random.default_rng(5))
    plain = div.per_example(z, target)
    assert plain.shape == (7,) and plain.dtype == jnp.float32
    # Fusion under jit may reorder float operations: equal to rounding, not bit for bit.
    np.testing.assert_allclose(plain, jax.jit(div.per_example)(z, target), rtol=1e-6)
    loss = lambda z: jnp.mean(div.per_example(z, target))
    grad = jax.grad(loss)(z)
    assert loss(z - 0.5 * grad) < loss(z)
    # The declared output width is what the divergence reads: every declared unit moves it.
    assert np.all(np.any(np.asarray(grad) != 0, axis=0)), "an output unit the divergence never reads"


@pytest.mark.parametrize("row", [pytest.param(r, id=r.id) for r in ROWS if r.family == "divergence" and r.reference])
def test_divergence_matches_its_reference(row):
    section, div = section_of(row), built(row)
    z, target = _outputs_and_targets(section, np.random.default_rng(8))
    fields = {name: getattr(section, name) for name in type(section).knobs}
    np.testing.assert_allclose(div.per_example(z, target), row.reference(np.asarray(z, np.float64),
                                                                          np.asarray(target), **fields), rtol=1e-5)


@pytest.mark.parametrize("row", rows_of("divergence"))
def test_divergence_declares_its_task_to_the_spec_check(row):
    declared = components.schema_class("divergence", row.kind)
    mine = {"generator": "friedman1", "features": 5} if declared.task == "regression" \
        else {"generator": "blobs", "classes": declared.classes or 3}
    other = {"generator": "blobs", "classes": 2} if declared.task == "regression" \
        else {"generator": "sines"}
    metric = "train_divergence"
    Spec.model_validate({"study": {"name": "t", "metric": metric}, "data": mine, "divergence": row.section})
    with pytest.raises(ValueError, match="divergence.kind"):
        Spec.model_validate({"study": {"name": "t", "metric": metric}, "data": other, "divergence": row.section})


# ── normalization ───────────────────────────────────────────────────────────────────────────────
@pytest.mark.parametrize("row", rows_of("normalization"))
def test_normalization_shapes_dtype_jit_and_both_modes(row):
    norm = built(row)
    params, state = norm.init(4)
    x = jnp.asarray(np.random.default_rng(6).normal(2.0, 3.0, (10, 4)), jnp.float32)
    for train in (True, False):
        y, new_state = norm.apply(params, state, x, None, train)
        assert y.shape == x.shape and y.dtype == jnp.float32
        yj, _ = jax.jit(norm.apply, static_argnums=4)(params, state, x, None, train)
        np.testing.assert_allclose(y, yj, rtol=1e-6, atol=1e-6)
        assert jax.tree.structure(new_state) == jax.tree.structure(state)
        assert all(leaf.dtype == jnp.float32 for leaf in jax.tree.leaves(new_state))


# ── dropout ─────────────────────────────────────────────────────────────────────────────────────
@pytest.mark.parametrize("row", rows_of("regularization.dropout"))
def test_dropout_shapes_dtype_jit_fresh_masks_and_declared_masks(row):
    drop = built(row)
    rng = np.random.default_rng(4)
    x = jnp.asarray(rng.normal(size=(8, 5)), jnp.float32)
    w = jnp.asarray(rng.normal(size=(5, 6)), jnp.float32)

    def layer(key, train, drop=drop):
        return drop.activation(jax.random.fold_in(key, 1), drop.dense(jax.random.fold_in(key, 0), x, w, train), train)
    a = layer(jax.random.key(0), True)
    assert a.shape == (8, 6) and a.dtype == jnp.float32
    np.testing.assert_allclose(a, jax.jit(layer, static_argnums=1)(jax.random.key(0), True), rtol=1e-6, atol=1e-6)
    assert not np.array_equal(a, layer(jax.random.key(1), True))  # masks come from the key
    np.testing.assert_array_equal(layer(jax.random.key(0), False), layer(jax.random.key(1), False))
    zero = built(row._replace(section={**row.section, "rate": 0.0}))
    np.testing.assert_allclose(layer(jax.random.key(2), True, zero), x @ w, rtol=1e-5, atol=1e-6)
    # masks_weights is what it does: a weight mask leaves the activations' masking alone.
    h = jnp.ones((8, 6), jnp.float32)
    untouched = np.array_equal(drop.activation(jax.random.key(3), h, True), h)
    assert untouched == drop.masks_weights


# ── optimizers and schedules ────────────────────────────────────────────────────────────────────
def _quadratic():
    # Every optimizer under every schedule lowers a convex quadratic ½‖Aθ − b‖² (common practice).
    rng = np.random.default_rng(2)
    a = jnp.asarray(rng.normal(size=(6, 3)), jnp.float32)
    b = jnp.asarray(rng.normal(size=6), jnp.float32)
    return lambda p: 0.5 * jnp.sum(jnp.square(a @ p["l1"]["W"] - b))


@pytest.mark.parametrize("schedule", rows_of("optimizer.schedule"))
@pytest.mark.parametrize("row", rows_of("optimizer"))
def test_optimizer_progress_dtype_and_jit_under_every_schedule(row, schedule):
    loss = _quadratic()
    sched = built(schedule, learning_rate=0.02, steps_per_epoch=10, total_steps=40)
    # Decoupled decay on: every optimizer accepts it, and some require it.
    tx = built(row, learning_rate=sched, decoupled=(0.01, model.weight_mask))
    params = {"l1": {"W": jnp.zeros(3, jnp.float32)}}

    def run(params):
        state = tx.init(params)
        for _ in range(20):
            updates, state = tx.update(jax.grad(loss)(params), state, params)
            params = optax.apply_updates(params, updates)
        return params
    out = run(params)
    assert out["l1"]["W"].dtype == jnp.float32
    assert loss(out) < loss(params)
    np.testing.assert_allclose(jax.jit(run)(params)["l1"]["W"], out["l1"]["W"], rtol=1e-5, atol=1e-7)


@pytest.mark.parametrize("row", rows_of("optimizer.schedule"))
def test_schedule_dtype_jit_and_range(row):
    sched = built(row, learning_rate=0.02, steps_per_epoch=10, total_steps=40)
    steps = jnp.arange(40)
    rates = jax.vmap(sched)(steps)
    assert rates.dtype == jnp.float32 and rates.shape == (40,)
    np.testing.assert_allclose(rates, jax.jit(jax.vmap(sched))(steps), rtol=1e-6)
    assert np.all(rates >= 0) and np.all(rates <= 0.02 * (1 + 1e-6))


# ── model families ──────────────────────────────────────────────────────────────────────────────
@pytest.fixture(scope="module", params=rows_of("model"))
def family(request):
    """The row's network with every normalizer and dropout, on the row's small example shape as
    written and on its wide one with wide dense layers (where the multiply-accumulates outweigh
    the elementwise work), each with the cost its family declares."""
    row = request.param
    cases = {}
    for shape, wide in zip(row.shapes, (False, True)):
        section = section_of(row._replace(section={**row.section, **({"hidden": [48, 48]} if wide else {})}))
        fields = {name: getattr(section, name) for name in type(section).model_fields if name != "kind"}
        for norm in normalization.REGISTRY:
            for drop in regularization.REGISTRY:
                normalizer, dropout = normalization.REGISTRY[norm](), regularization.REGISTRY[drop](0.1)
                net = built(row, hidden=section.widths, out_width=3, normalizer=normalizer, dropout=dropout)
                cost = model.FAMILIES[row.kind].cost(**{**fields, "hidden": section.widths}, in_shape=shape,
                                                     out_width=3, dropout=dropout)
                cases[shape, norm, drop] = net, cost, dropout.masks_weights
    return row, cases, row.shapes[1]


def test_family_shapes_dtype_jit_and_progress(family):
    _, cases, _ = family
    rng = np.random.default_rng(3)
    y = jnp.asarray(rng.integers(0, 3, 16), jnp.int32)
    for (shape, norm, drop), (net, _, _) in cases.items():
        x = jnp.asarray(rng.normal(size=(16, *shape)), jnp.float32)
        params, state = net.init(jax.random.key(0), shape)
        assert all(leaf.dtype == jnp.float32 for leaf in jax.tree.leaves((params, state)))
        apply = lambda p, train: net.apply(p, state, x, jax.random.key(1), None, train)[0]
        z = apply(params, False)
        assert z.shape == (16, 3) and z.dtype == jnp.float32
        np.testing.assert_allclose(z, jax.jit(apply, static_argnums=1)(params, False), rtol=1e-5, atol=1e-6)
        loss = lambda p: jnp.mean(optax.softmax_cross_entropy_with_integer_labels(apply(p, False), y))
        stepped = jax.tree.map(lambda p, g: p - 0.1 * g, params, jax.grad(loss)(params))
        assert loss(stepped) < loss(params), (shape, norm, drop)


def test_family_declared_cost_is_what_it_builds(family):
    _, cases, wide = family
    for (shape, norm, drop), (net, cost, masks_weights) in cases.items():
        params, state = net.init(jax.random.key(0), shape)
        counted = sum(leaf.size for leaf in jax.tree.leaves(params))
        # A unit is an output unit of a dense layer or an output channel of a convolution.
        units = sum(layer["W"].shape[-1] for layer in params.values())
        # The declared count is a bound (every unit with a bias, γ and β): never below what is
        # built, and above it by at most those three vectors.
        assert counted <= cost.parameters <= counted + 3 * units, (norm, drop)
        assert cost.layers == len(params)
        # Weight masks (DropConnect) cover the dense layers' matrices, one per example: at least
        # their weights, at most the whole bound.
        dense = sum(layer["W"].size for layer in params.values() if layer["W"].ndim == 2)
        assert (dense <= cost.masks <= cost.parameters) if masks_weights else cost.masks == 0, (norm, drop)
        # Activations kept per example: at least the input and every layer's output.
        assert cost.activations >= math.prod(shape) + units
        if shape == wide:
            # XLA's own operation count of the forward pass: 2 FLOPs per multiply-accumulate
            # (common practice), the elementwise work of normalization and activation besides.
            x = jnp.zeros((32, *shape), jnp.float32)
            flops = jax.jit(lambda p: net.apply(p, state, x, jax.random.key(1), None, False)[0]).lower(params) \
                .compile().cost_analysis()["flops"]
            assert 2 * cost.macs * 32 <= flops <= 1.5 * 2 * cost.macs * 32, (norm, drop, flops, cost.macs)


def test_family_memory_estimate_bounds_a_measured_training_step(family, tmp_path):
    """The guard's estimate from the declared cost against XLA's own account of one compiled
    training epoch (argument, output and temporary bytes, less the data set): never below it,
    at most 4 times above."""
    from compiler.data import load_data
    from runtime import guard
    from runtime.plan import plan

    row, _, _ = family
    data = ({"generator": "glyphs", "shape": list(row.shapes[0])} if row.shaped
            else {"generator": "blobs", "features": row.shapes[0][0]})
    raw = {"study": {"name": "mem", "seeds": 1}, "model": row.section,
           "data": {**data, "samples": 512, "classes": 3},
           "training": {"epochs": 1, "batch_size": 64}}
    variant = expand(Spec.model_validate(raw))[0]
    ds = load_data(variant.spec, tmp_path)
    program = build.compile_program([variant.spec], ds)
    knobs = program.pack([variant.spec])
    keys = jax.vmap(build.seed_key)(jnp.arange(1))
    carry = jax.vmap(program.init, in_axes=(0, 0, None, None))(knobs, keys, ds.x, ds.y)
    epoch = jax.jit(jax.vmap(program.epoch, in_axes=(0, 0, None, None)))
    memory = epoch.lower(carry, knobs, ds.x, ds.y).compile().memory_analysis()
    measured = (memory.argument_size_in_bytes + memory.output_size_in_bytes + memory.temp_size_in_bytes
                - ds.x.nbytes - ds.y.nbytes)
    group = plan([variant], [0])[0]
    estimated = guard.per_lane_bytes(group, ds)
    # Measured here: 45 720 estimated for 19 538 bytes; the estimate is meant to err high.
    assert measured <= estimated <= 4 * measured, (estimated, measured)
