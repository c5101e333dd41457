"""Execution: compile a group's program, run its lanes, turn the numbers into result-set rows.

The seam is :func:`execute_group`: one :class:`~runtime.plan.Group` and its data in, a
:class:`GroupResult` out. It needs nothing else from the process, so a group can be executed in
another process or on another machine and its result written here.

Inside a group one program per program key is compiled (``vmap`` over lanes of (knobs, seed key)
of the compiler's per-epoch function, steps in ``lax.scan``) and called once per epoch from
Python; the data stays on the device across epochs and only the per-epoch metrics come back.
The program (:func:`compiler.build.compile_program` of the group's variants) packs the lanes'
knobs itself and decides which work its zero knobs let it leave out; programs compile with XLA's
default options. With a test split, each lane's test rows are scored once, after the last epoch,
with the weights of the epoch the study judges it at (``_Judge``). With the compile cache on, a
program key's executables are loaded from and stored in :mod:`runtime.programs`; replay always
compiles afresh.
"""

from __future__ import annotations

import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from runtime import programs
from runtime.plan import Group

__all__ = ["GroupResult", "LaneResult", "execute_group", "InProcess", "preparation"]

# Options of the init program's compile (its bits are a function of them, like of the code).
INIT_COMPILE_OPTIONS = {"xla_backend_optimization_level": 0}


@dataclass
class LaneResult:
    run_id: str
    lane: int
    curves: dict[str, np.ndarray]       # metric -> float32[epochs]
    # test metric -> its value at test_epoch (NaN for a run that went non-finite); {} without data.test
    tests: dict[str, np.float32]
    test_epoch: int | None              # 1-based epoch whose weights the test split scored
    non_finite_epoch: int | None             # 1-based epoch, None when the run stayed finite
    param_hash: str
    warnings: list[str] = field(default_factory=list)
    # Only with keep_arrays: "params/<layer>/<name>", "state/<layer>/<name>" (what the hash
    # covers) and "input/mean", "input/scale", "split/validation" (what using them needs).
    arrays: dict[str, np.ndarray] | None = None


@dataclass
class GroupResult:
    group_id: str
    lane_width: int
    metric_names: tuple[str, ...]
    test_names: tuple[str, ...]
    lanes: list[LaneResult]
    compile_seconds: float
    run_seconds: float
    environment: dict
    # CPU seconds of the computing process (one XLA thread): what the group costs on an idle
    # core, whatever else the machine was doing; the time estimate is calibrated by these.
    compile_cpu_seconds: float = 0.0
    run_cpu_seconds: float = 0.0


# Compiled (init, epoch) per (program key, lane width, data signature, knobs zero in every lane), reused
# by every group of a program key within one process.
_programs: dict[tuple, tuple] = {}


def _program_key(group: Group, dataset, zero: frozenset[str]) -> tuple:
    return group.program, group.lane_width, programs.data_signature(dataset), zero


def preparation(groups: list[Group], data: dict, environment: dict) -> dict[str, str]:
    """What executing ``groups`` in this process will do for each group's programs, without
    doing it: ``"compile"``, ``"load"`` (stored in the compile cache) or ``"reuse"`` (compiled
    or loaded already by this process or an earlier group), keyed by group id; for the time
    estimate, whose costs differ a hundredfold between these."""
    from compiler.build import zero_knobs

    out: dict[str, str] = {}
    seen = set(_programs)
    for g in groups:
        zero = zero_knobs([r.variant.spec for r in g.runs])
        key = _program_key(g, data[g.group_id], zero)
        if key in seen:
            out[g.group_id] = "reuse"
        elif programs.enabled() and programs.program_path(g, data[g.group_id], zero, environment).exists():
            out[g.group_id] = "load"
        else:
            out[g.group_id] = "compile"
        seen.add(key)
    return out


def _compiled(group: Group, program, dataset, knobs, seeds, reuse: bool, environment: dict):
    import jax

    from compiler.build import seed_key

    zero = program.zero_knobs
    key = _program_key(group, dataset, zero)
    if reuse and key in _programs:
        return _programs[key] + (0.0, 0.0)
    t0, c0 = time.perf_counter(), time.process_time()
    # Programs see only the data's shapes: the rows are arguments, put on the device per group.
    x, y = (jax.ShapeDtypeStruct(a.shape, a.dtype) for a in (dataset.x, dataset.y))
    # With the compile cache on, the executables themselves are stored under a name derived
    # without tracing: a second invocation skips tracing and lowering too (JAX's own cache is
    # keyed by the lowered program, so it cannot).
    path = programs.program_path(group, dataset, zero, environment) if reuse and programs.enabled() else None
    loaded = programs.load_programs(path) if path is not None and path.exists() else None
    if loaded is not None:
        init_c, epoch_c = loaded
    else:
        # The root keys are made inside init: a separate program for them would be one more compile.
        init = jax.jit(jax.vmap(lambda k, seed, x, y: program.init(k, seed_key(seed), x, y),
                                in_axes=(0, 0, None, None))).lower(knobs, seeds, x, y)
        # init runs once per group, so only its compile time counts: without LLVM's optimizations
        # it compiles in 0.35 s instead of 0.59 s (small benchmark study). It compiles in a
        # thread (XLA releases the GIL) while the epoch is traced and lowered here; the epoch
        # runs every epoch and keeps XLA's default options.
        with ThreadPoolExecutor(1) as pool:
            pending = pool.submit(init.compile, INIT_COMPILE_OPTIONS)
            epoch = jax.jit(jax.vmap(program.epoch, in_axes=(0, 0, None, None))).lower(init.out_info, knobs, x, y)
            epoch_c = epoch.compile()
            init_c = pending.result()
        if path is not None:
            programs.store_programs(path, (init_c, epoch_c))
    # Picking fields of the carry needs no program: vmap without jit compiles nothing.
    status, params = jax.vmap(program.status), jax.vmap(program.params)
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    _programs[key] = (program, init_c, epoch_c, status, params)
    return _programs[key] + (seconds, cpu)


def execute_group(group: Group, dataset, environment: dict,
                  on_epoch: Callable[[int, int], None] | None = None, reuse: bool = True,
                  keep_arrays: bool = False) -> GroupResult:
    """Train every run of a group at the group's lane width and return its numbers.

    ``reuse=False`` compiles afresh even when this process already compiled the program
    (replay proves the bits with a new compile). ``keep_arrays`` returns each lane's trained
    arrays too (export); runs never store them."""
    import jax

    from compiler.build import compile_program, param_hash
    from compiler.normalization import diagnose

    # Padding copies a real run, so it never adds a non-zero to a knob that is 0 in every run.
    lanes = list(group.runs) + [group.runs[0]] * group.padding
    program = compile_program([r.variant.spec for r in group.runs], dataset)
    knobs = program.pack([r.variant.spec for r in lanes])
    seeds = np.array([r.seed for r in lanes], dtype=np.int32)

    program, init_c, epoch_c, status_fn, params_fn, compile_seconds, compile_cpu = _compiled(
        group, program, dataset, knobs, seeds, reuse, environment)
    x, y = jax.device_put(dataset.x), jax.device_put(dataset.y)
    t0, c0 = time.perf_counter(), time.process_time()
    carry = init_c(knobs, seeds, x, y)
    judge = _Judge(program, group, len(lanes), carry)
    per_epoch = []
    for e in range(program.epochs):
        carry, metrics = epoch_c(carry, knobs, x, y)
        per_epoch.append(metrics)
        judge.epoch(e + 1, carry, metrics)
        if on_epoch is not None:
            jax.block_until_ready(metrics)
            on_epoch(e + 1, program.epochs)
    tested, judged_at = judge.scores(carry, x, y)
    per_epoch, (non_finite, at), params = jax.device_get((per_epoch, status_fn(carry), params_fn(carry)))
    run_seconds, run_cpu = time.perf_counter() - t0, time.process_time() - c0

    names = program.metric_names
    stacked = {m: np.stack([np.asarray(ep[m], dtype=np.float32) for ep in per_epoch]) for m in names}
    results = []
    for i, run in enumerate(group.runs):
        curves = {m: stacked[m][:, i] for m in names}
        lane_params = jax.tree.map(lambda a: a[i], params)
        results.append(LaneResult(
            run_id=run.run_id, lane=i, curves=curves,
            tests={m: np.float32(np.nan) if bool(non_finite[i]) else tested[m][i] for m in program.test_names},
            test_epoch=int(judged_at[i]) if program.test_names and judged_at[i] > 0 else None,
            non_finite_epoch=int(at[i]) + 1 if bool(non_finite[i]) else None,
            param_hash=param_hash(lane_params),
            warnings=diagnose(run.variant.spec.normalization.kind, run.variant.spec.model.hidden_layers, curves),
            arrays=_lane_arrays(lane_params, carry, i) if keep_arrays else None,
        ))
    return GroupResult(group.group_id, group.lane_width, names, program.test_names, results, compile_seconds,
                       run_seconds, environment, compile_cpu, run_cpu)


class _Judge:
    """The epoch each lane is judged at (``Variant.judge``: its last, or the first with the best
    value of a validation metric) and, once training is over, its test scores there: for "best",
    each lane's weights are copied whenever its metric improves, and only those are scored. The
    test rows are read once per run, after every choice; nothing here reads them before."""

    def __init__(self, program, group: Group, width: int, carry):
        import jax.numpy as jnp

        self.program = program
        self.metric, rule = group.runs[0].variant.judge
        self.best = bool(program.test_names) and rule == "best"
        self.at = np.full(width, program.epochs if program.test_names and not self.best else 0)
        if self.best:
            self.value = np.full(width, np.nan)
            self.kept = (carry.params, carry.state)
            self.where = lambda keep, new, old: jnp.where(keep.reshape((-1,) + (1,) * (new.ndim - 1)), new, old)

    def epoch(self, e: int, carry, metrics) -> None:
        if not self.best:
            return
        import jax

        from compiler.spec import direction

        v = np.asarray(metrics[self.metric], dtype=np.float64)
        ahead = v > self.value if direction(self.metric) == "max" else v < self.value
        better = np.isfinite(v) & (np.isnan(self.value) | ahead)
        if better.any():
            self.value, self.at = np.where(better, v, self.value), np.where(better, e, self.at)
            self.kept = jax.tree.map(lambda new, old: self.where(better, new, old),
                                     (carry.params, carry.state), self.kept)

    def scores(self, carry, x, y) -> tuple[dict[str, np.ndarray], np.ndarray]:
        if not self.program.test_names:
            return {}, self.at
        import jax

        if self.best:
            carry = carry._replace(params=self.kept[0], state=self.kept[1])
        tested = jax.device_get(jax.vmap(self.program.test, in_axes=(0, None, None))(carry, x, y))
        return {m: np.asarray(v, dtype=np.float32) for m, v in tested.items()}, self.at


def _lane_arrays(lane_params, carry, i) -> dict[str, np.ndarray]:
    import jax

    out = {"/".join(str(k.key) for k in path): np.asarray(leaf)
           for path, leaf in jax.tree_util.tree_flatten_with_path(lane_params)[0]}
    out["input/mean"], out["input/scale"] = np.asarray(carry.x_mean[i]), np.asarray(carry.x_scale[i])
    out["split/validation"] = np.asarray(carry.val_idx[i])
    if carry.test_idx.shape[-1]:
        out["split/test"] = np.asarray(carry.test_idx[i])
    return out


class InProcess:
    """The default executor: the groups one after another in this process.

    An executor's contract: ``run(groups, data, environment, progress)`` yields
    ``(group, GroupResult)`` as groups finish, in any order; ``data`` maps a group id to its
    Dataset; ``progress`` (or None) receives the ("group", group=…) and ("epoch", group=…, done=…,
    total=…) events. The caller writes each result as it arrives.

    ``checkpoint()`` (optional) is called before each group and after each epoch, outside any
    jax call, so that it may raise to abandon the group in flight (Ctrl-C)."""

    def __init__(self, checkpoint: Callable[[], None] | None = None):
        self.checkpoint = checkpoint

    def run(self, groups, data, environment, progress=None):
        check = self.checkpoint

        def on_epoch(g):
            def told(done, total):
                if progress:
                    progress("epoch", group=g, done=done, total=total)
                if check:
                    check()
            return told

        for g in groups:
            if check:
                check()
            if progress:
                progress("group", group=g, todo=len(g.runs))
            yield g, execute_group(g, data[g.group_id], environment,
                                   on_epoch=on_epoch(g) if check or progress else None)
