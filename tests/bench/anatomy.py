"""Where a step of a vmapped study goes, and what a per-step program would cost instead.

Usage (repository root, quiet machine)::

    .venv/bin/python tests/bench/anatomy.py [SPEC] [--rounds=7]   # default: specs/realistic.toml

On the workload's shapes at lesion's lane width (lanes × batch × widths, SGD with momentum,
softmax cross-entropy), each a jitted program timed warm in CPU seconds (one XLA thread), the
items interleaved round after round and the least of the rounds kept:

- ``epoch``: lesion's own per-epoch program (``execute_group`` on the study's first group, its
  CPU time over the epochs, once);
- ``products``: a ``lax.scan`` over the epoch's steps doing only the step's matrix products
  (forward, input gradient and weight gradient of every layer);
- ``step``: the same scan with the whole training step written out (gather of the batch rows,
  forward, softmax cross-entropy, backward, momentum update), without metrics;
- ``step+metrics``: that step plus lesion's per-step metrics (global and per-layer gradient
  norms, the loss mean), as per-step outputs of the scan averaged after it; ``sums``: the same
  metrics as running sums in the scan's carry; ``unroll 5``: that, five steps per iteration;
- ``shuffle``: one epoch's random keys and sort (lesion's :func:`compiler.build.permutation`);
- ``evaluate``: the validation rows forward once;
- ``empty scan``: the steps with nothing to do (the loop's own cost);
- per-step dispatch: the same step as one jitted call per step from a Python loop, its compile
  time against the per-epoch scan's and its time per step.

Prints one line per item, milliseconds per epoch and per step.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parents[1]))
import workload as wl  # noqa: E402


def interleaved(items: dict, rounds: int) -> dict:
    """CPU seconds of each jitted ``(f, *args)`` of ``items``: every item once per round, in turn
    (a busy machine's slow phases spread over all of them), the least of ``rounds`` (the run
    least disturbed by other jobs; with one XLA thread, CPU time moves less with load than wall
    time)."""
    import jax

    for f, *args in items.values():
        jax.block_until_ready(f(*args))
    out = {name: float("inf") for name in items}
    for _ in range(rounds):
        for name, (f, *args) in items.items():
            t0 = time.process_time()
            jax.block_until_ready(f(*args))
            out[name] = min(out[name], time.process_time() - t0)
    return out


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--rounds=")]
    rounds = int(next((a.split("=", 1)[1] for a in sys.argv[1:] if a.startswith("--rounds=")), 7))
    spec = Path(args[0]) if args else HERE / "specs" / "realistic.toml"
    from runtime.environment import single_threaded_xla

    single_threaded_xla()
    import jax
    import jax.numpy as jnp

    from compiler.build import permutation
    from compiler.loader import load_study
    from runtime import environment
    from runtime.execute import execute_group
    from runtime.plan import plan
    from runtime.runner import datasets_for

    w = wl.workload(spec)
    lanes = min(len(w["learning_rates"]) * len(w["seeds"]), 32)
    B, steps, widths = w["batch_size"], w["n_train"] // w["batch_size"], w["widths"]
    key = jax.random.key(0)
    x = jax.random.normal(key, (w["n_train"], widths[0]))
    y = jax.random.randint(key, (w["n_train"],), 0, widths[-1])
    xv = jax.random.normal(key, (w["n_val"], widths[0]))
    params = [(jax.random.normal(jax.random.fold_in(key, i), (lanes, a, b)) * 0.1, jnp.zeros((lanes, b)))
              for i, (a, b) in enumerate(zip(widths[:-1], widths[1:]))]
    order = jnp.tile(jnp.arange(steps * B, dtype=jnp.int32).reshape(steps, B)[None], (lanes, 1, 1))
    lr = jnp.full((lanes,), 0.01)

    def forward(p, h):
        for W, b in p[:-1]:
            h = jax.nn.relu(h @ W + b)
        W, b = p[-1]
        return h @ W + b

    def loss(p, xb, yb):
        return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(forward(p, xb)), yb[:, None], axis=1))

    def train_step(p, v, idx, lr, metrics):
        value, g = jax.value_and_grad(loss)(p, x[idx], y[idx])
        v = jax.tree.map(lambda a, b: 0.9 * a + b, v, g)
        p = jax.tree.map(lambda a, b: a - lr * b, p, v)
        out = {"loss": value}
        if metrics:
            out["grad_norm"] = jnp.sqrt(sum(jnp.sum(jnp.square(t)) for t in jax.tree.leaves(g)))
            out.update({f"l{i}": jnp.sqrt(jnp.sum(jnp.square(W)) + jnp.sum(jnp.square(b)))
                        for i, (W, b) in enumerate(g)})
        return p, v, out

    def epoch_of(metrics, sums=False, unroll=1):
        """The scanned epoch; with ``sums`` the metrics are running sums in the carry (divided
        by the steps once) instead of per-step outputs stacked and averaged after the scan."""
        def epoch(p, v, order, lr):
            def body(c, idx):
                p, v, acc = c
                p, v, out = train_step(p, v, idx, lr, metrics)
                if sums:
                    return (p, v, jax.tree.map(jnp.add, acc, out)), None
                return (p, v, acc), out
            zero = jax.tree.map(jnp.zeros_like, jax.eval_shape(lambda: train_step(p, v, order[0], lr, metrics)[2]))
            (p, v, acc), out = jax.lax.scan(body, (p, v, zero), order, unroll=unroll)
            if sums:
                return p, v, jax.tree.map(lambda a: a / order.shape[0], acc)
            return p, v, jax.tree.map(jnp.mean, out)
        return jax.jit(jax.vmap(epoch, in_axes=(0, 0, 0, 0)))

    def products_epoch(p, order):
        # Weight gradients accumulate in the carry (an add per step, as the update's would), so
        # no product is dead code and none is reduced to a scalar.
        def body(acc, idx):
            h, acts = x[idx], []
            for W, _ in p:
                acts.append(h)
                h = h @ W
            g, grads = h, []
            for (W, _), a in zip(reversed(p), reversed(acts)):
                grads.append(a.T @ g)
                g = g @ W.T
            return tuple(c + d for c, d in zip(acc, reversed(grads))), None
        return jax.lax.scan(body, tuple(jnp.zeros_like(W) for W, _ in p), order)[0]

    v0 = jax.tree.map(jnp.zeros_like, params)
    rows = {}
    study = load_study(spec)
    group = plan(study.variants, study.spec.study.seed_list)[0]
    data = datasets_for([group], spec.parent)
    env = environment.capture()
    execute_group(group, data[group.group_id], env)
    t0 = time.process_time()
    execute_group(group, data[group.group_id], env)
    rows["epoch (lesion)"] = (time.process_time() - t0) / w["epochs"]
    keys = jax.random.split(key, lanes)
    items = {
        "products": (jax.jit(jax.vmap(products_epoch, in_axes=(0, 0))), params, order),
        "step": (epoch_of(False), params, v0, order, lr),
        "step+metrics": (epoch_of(True), params, v0, order, lr),
        "step+metrics, sums": (epoch_of(True, sums=True), params, v0, order, lr),
        "step+metrics, sums, unroll 5": (epoch_of(True, sums=True, unroll=5), params, v0, order, lr),
        "shuffle": (jax.jit(jax.vmap(lambda k: permutation(k, w["n_train"]))), keys),
        "evaluate": (jax.jit(jax.vmap(forward, in_axes=(0, None))), params, xv),
        "empty scan": (jax.jit(jax.vmap(lambda o: jax.lax.scan(lambda c, i: (c + i[0], None), 0, o)[0])), order),
    }
    rows.update(interleaved(items, rounds))
    t0 = time.perf_counter()
    one_step = jax.jit(jax.vmap(lambda p, v, idx, lr: train_step(p, v, idx, lr, True)))
    one_step.lower(params, v0, order[:, 0], lr).compile()
    step_compile = time.perf_counter() - t0
    t0 = time.perf_counter()
    epoch_of(True).lower(params, v0, order, lr).compile()
    scan_compile = time.perf_counter() - t0
    p, v = params, v0
    jax.block_until_ready(one_step(p, v, order[:, 0], lr))
    t0 = time.perf_counter()
    for i in range(steps):
        p, v, out = one_step(p, v, order[:, i], lr)
    jax.block_until_ready(out)
    rows["per-step calls"] = time.perf_counter() - t0

    print(f"{spec.name}: {lanes} lanes, batch {B}, {steps} steps per epoch, widths {widths}, "
          f"{environment.xla_threads()} XLA thread(s)")
    for name, seconds in rows.items():
        print(f"  {name:16s} {1e3 * seconds:9.2f} ms per epoch {1e6 * seconds / steps:9.1f} µs per step")
    flops = 3 * 2 * sum(a * b for a, b in zip(widths[:-1], widths[1:])) * B * lanes
    print(f"  products at {flops * steps / rows['products'] / 1e9:.1f} GFLOP/s")
    print(f"  compile: one step {step_compile:.2f} s, the per-epoch scan {scan_compile:.2f} s")


if __name__ == "__main__":
    main()
