"""Execution: compile groups, run their lanes, turn the numbers into result-set rows.

The seam is :func:`execute_group`: one :class:`~runtime.plan.Group` and its data in, a
:class:`GroupResult` out. It needs nothing else from the process, so a group can be executed in
another process or on another machine and its result written here.

Inside a group one program per structure is compiled (``vmap`` over lanes of (knobs, seed key)
of the compiler's per-epoch function, steps in ``lax.scan``) and called once per epoch from
Python; the data stays on the device across epochs and only the per-epoch metrics come back.
Knobs that are 0 in every lane of a group are passed to the builder as ``zero_knobs`` (work they
make the identity is left out, bits unchanged); programs compile with XLA's default options.
The compiled executables of a structure are stored in the user's cache folder under a name
hashed from everything they depend on (:func:`_program_path`), so a later invocation neither
traces, lowers nor compiles them; it is a speed-up only — a stored program computes the same bits
as a fresh compile (tested across processes), and replay always compiles afresh.
"""

from __future__ import annotations

import hashlib
import json
import os
import pickle
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from runtime.plan import Group

__all__ = ["GroupResult", "LaneResult", "execute_group", "InProcess", "enable_compile_cache", "cache_dir", "preparation",
           "CacheError", "cache_limit_bytes",
           "BN_COLLAPSE_RATIO"]

# Options of the init program's compile (its bits are a function of them, like of the code).
INIT_COMPILE_OPTIONS = {"xla_backend_optimization_level": 0}

# A batch-normalized layer whose gradient norm falls below this fraction of the output layer's
# has stopped learning: its batch statistics have (nearly) no spread left.
BN_COLLAPSE_RATIO = 1e-4


@dataclass
class LaneResult:
    run_id: str
    lane: int
    curves: dict[str, np.ndarray]       # metric -> float32[epochs]
    diverged_at: int | None             # 1-based epoch, None when the run stayed finite
    param_digest: str
    warnings: list[str] = field(default_factory=list)
    # Only with keep_arrays: "params/<layer>/<name>", "state/<layer>/<name>" (what the digest
    # covers) and "input/mean", "input/scale", "split/validation" (what using them needs).
    arrays: dict[str, np.ndarray] | None = None


@dataclass
class GroupResult:
    group_id: str
    lane_width: int
    metric_names: tuple[str, ...]
    lanes: list[LaneResult]
    compile_seconds: float
    run_seconds: float
    environment: dict


def cache_dir() -> Path:
    """The compile cache folder: ``$LESION_CACHE_DIR``, else ``$XDG_CACHE_HOME/lesion/xla``,
    else ``~/.cache/lesion/xla``. Trusted local state: it holds compiled machine code."""
    if os.environ.get("LESION_CACHE_DIR"):
        return Path(os.environ["LESION_CACHE_DIR"])
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "lesion" / "xla"


class CacheError(Exception):
    """The compile cache's setting is unusable (a user error: exit 2)."""


def cache_limit_bytes() -> int:
    """How much the stored programs may occupy: ``$LESION_CACHE_MAX_MB`` megabytes, else 2048."""
    raw = os.environ.get("LESION_CACHE_MAX_MB", "").strip()
    try:
        mb = float(raw) if raw else 2048.0
    except ValueError:
        mb = -1.0
    if not mb > 0 or mb == float("inf"):
        raise CacheError(f"LESION_CACHE_MAX_MB={raw!r}: expected a positive number of megabytes "
                         "for the compile cache (e.g. LESION_CACHE_MAX_MB=2048), or leave it unset")
    return int(mb * 2**20)


_cache_enabled = False


def enable_compile_cache() -> None:
    """Let this process load and store compiled programs in :func:`cache_dir` (``lesion run`` and
    cluster workers do; replay never does). Checks the cache's size limit first."""
    global _cache_enabled
    import jax

    cache_limit_bytes()
    # JAX's own persistent cache stays off: an executable it loaded from disk serializes into an
    # entry that fails when run in another process (measured: "Function … not found"), and the
    # program store below already skips more work (tracing and lowering too).
    jax.config.update("jax_enable_compilation_cache", False)
    _cache_enabled = True


# Compiled (init, epoch) per (structure, lane width, data signature, knobs zero in every lane), reused
# by every group of a structure within one process.
_programs: dict[tuple, tuple] = {}


def _zero_knobs(knobs: dict) -> frozenset[str]:
    """Knobs that are 0 in every lane (padding copies a real lane, so it never adds a non-zero)."""
    return frozenset(name for name, values in knobs.items() if not np.any(np.asarray(values)))


def _knob_arrays(group: Group) -> dict[str, np.ndarray]:
    """Each knob's value per lane (padding lanes copy the first run), float32."""
    from compiler.build import knob_vector

    vectors = [knob_vector(r.variant.spec) for r in list(group.runs) + [group.runs[0]] * group.padding]
    return {n: np.array([v[n] for v in vectors], dtype=np.float32) for n in vectors[0]}


def _program_key(group: Group, dataset, zero: frozenset[str]) -> tuple:
    return group.structure, group.lane_width, _data_signature(dataset), zero


def preparation(groups: list[Group], data: dict, environment: dict) -> dict[str, str]:
    """What executing ``groups`` in this process will do for each group's programs, without
    doing it: ``"compile"``, ``"load"`` (stored in the compile cache) or ``"reuse"`` (compiled
    or loaded already by this process or an earlier group), keyed by group id; for the time
    estimate, whose costs differ a hundredfold between these."""
    out: dict[str, str] = {}
    seen = set(_programs)
    for g in groups:
        zero = _zero_knobs(_knob_arrays(g))
        key = _program_key(g, data[g.group_id], zero)
        if key in seen:
            out[g.group_id] = "reuse"
        elif _cache_enabled and _program_path(g, data[g.group_id], zero, environment).exists():
            out[g.group_id] = "load"
        else:
            out[g.group_id] = "compile"
        seen.add(key)
    return out


def _data_signature(dataset) -> tuple:
    """What a structure's programs know of its data: shapes, dtypes, task and class count (the
    rows themselves are arguments, so data of the same signature share the programs)."""
    return (dataset.x.shape, str(dataset.x.dtype), dataset.y.shape, str(dataset.y.dtype), dataset.task,
            dataset.classes)


def _program_path(group: Group, dataset, zero: frozenset[str], environment: dict) -> Path:
    """Where the compiled programs of a structure live in the compile cache. The name hashes
    everything the programs are a function of: the numerics environment (lesion's sources among
    them), jax's configuration, the structure, the lane width, the data's signature and the knobs
    that are zero in every lane."""
    import jax

    from runtime import environment as env

    config = {k: repr(v) for k, v in sorted(jax.config.values.items()) if "cache" not in k}
    parts = [env.fingerprint(environment), config, group.structure, group.lane_width,
             _data_signature(dataset), sorted(zero)]
    digest = hashlib.sha256(json.dumps(parts, sort_keys=True, default=str).encode()).hexdigest()
    return cache_dir() / "programs" / f"{digest}.pkl"


def _load_programs(path: Path):
    """The stored (init, epoch) executables, or None when absent or unreadable (then they are
    compiled again and the entry rewritten). A loaded entry counts as just used."""
    from jax.experimental.serialize_executable import deserialize_and_load

    try:
        with open(path, "rb") as fh:
            stored = pickle.load(fh)
        programs = tuple(deserialize_and_load(*entry) for entry in stored)
    except Exception:  # noqa: BLE001 - a damaged or foreign entry only costs a compile
        return None
    try:
        os.utime(path)
    except OSError:
        pass
    return programs


def _store_programs(path: Path, programs) -> None:
    """Write an entry atomically, then drop the least recently used entries beyond the limit."""
    from jax.experimental.serialize_executable import serialize

    tmp = None
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        blob = pickle.dumps([serialize(p) for p in programs], protocol=pickle.HIGHEST_PROTOCOL)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-")
        with os.fdopen(fd, "wb") as fh:
            fh.write(blob)
        os.replace(tmp, path)
        tmp = None
        _prune(path.parent, cache_limit_bytes(), keep=path)
    except OSError:
        pass  # a cache that cannot be written only costs a compile next time
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass


# A temporary file this old is a write that was killed, not one in progress in another process.
_STALE_TMP_SECONDS = 3600


def _prune(folder: Path, limit: int, keep: Path) -> None:
    """Delete entries, least recently used first, until the folder holds at most ``limit`` bytes
    (``keep``, the entry just written, stays even if it alone is larger), and the temporary files
    of killed writes."""
    entries, now = [], time.time()
    for entry in folder.glob(".tmp-*"):
        try:
            if now - entry.stat().st_mtime > _STALE_TMP_SECONDS:
                entry.unlink()
        except OSError:
            continue
    for entry in folder.glob("*.pkl"):
        try:
            st = entry.stat()
        except OSError:
            continue  # removed by another process meanwhile
        entries.append((st.st_mtime, st.st_size, entry))
    total = sum(size for _, size, _ in entries)
    for _, size, entry in sorted(entries, key=lambda e: (e[0], e[2].name)):
        if total <= limit:
            break
        if entry == keep:
            continue
        try:
            entry.unlink()
        except OSError:
            continue
        total -= size


def _compiled(group: Group, dataset, knobs, seeds, reuse: bool, environment: dict):
    import jax

    from compiler.build import compile_variant, seed_key

    zero = _zero_knobs(knobs)
    key = _program_key(group, dataset, zero)
    if reuse and key in _programs:
        return _programs[key] + (0.0,)
    program = compile_variant(group.runs[0].variant.spec, dataset, zero_knobs=zero)
    t0 = time.perf_counter()
    # Programs see only the data's shapes: the rows are arguments, put on the device per group.
    x, y = (jax.ShapeDtypeStruct(a.shape, a.dtype) for a in (dataset.x, dataset.y))
    # With the compile cache on, the executables themselves are stored under a name derived
    # without tracing: a second invocation skips tracing and lowering too (JAX's own cache is
    # keyed by the lowered program, so it cannot).
    path = _program_path(group, dataset, zero, environment) if reuse and _cache_enabled else None
    loaded = _load_programs(path) if path is not None and path.exists() else None
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
            _store_programs(path, (init_c, epoch_c))
    # Picking fields of the carry needs no program: vmap without jit compiles nothing.
    status, params = jax.vmap(program.status), jax.vmap(program.params)
    seconds = time.perf_counter() - t0
    _programs[key] = (program, init_c, epoch_c, status, params)
    return _programs[key] + (seconds,)


def execute_group(group: Group, dataset, environment: dict,
                  on_epoch: Callable[[int, int], None] | None = None, reuse: bool = True,
                  keep_arrays: bool = False) -> GroupResult:
    """Train every run of a group at the group's lane width and return its numbers.

    ``reuse=False`` compiles afresh even when this process already compiled the structure
    (replay proves the bits with a new compile). ``keep_arrays`` returns each lane's trained
    arrays too (export); runs never store them."""
    import jax
    import jax.numpy as jnp

    from compiler.build import param_digest

    lanes = list(group.runs) + [group.runs[0]] * group.padding
    knobs = {n: jnp.asarray(a) for n, a in _knob_arrays(group).items()}
    seeds = np.array([r.seed for r in lanes], dtype=np.int32)

    program, init_c, epoch_c, status_fn, params_fn, compile_seconds = _compiled(group, dataset, knobs, seeds, reuse, environment)
    x, y = jax.device_put(dataset.x), jax.device_put(dataset.y)
    t0 = time.perf_counter()
    carry = init_c(knobs, seeds, x, y)
    per_epoch = []
    for e in range(program.epochs):
        carry, metrics = epoch_c(carry, knobs, x, y)
        per_epoch.append(metrics)
        if on_epoch is not None:
            jax.block_until_ready(metrics)
            on_epoch(e + 1, program.epochs)
    per_epoch, (diverged, at), params = jax.device_get((per_epoch, status_fn(carry), params_fn(carry)))
    run_seconds = time.perf_counter() - t0

    names = program.metric_names
    stacked = {m: np.stack([np.asarray(ep[m], dtype=np.float32) for ep in per_epoch]) for m in names}
    results = []
    for i, run in enumerate(group.runs):
        curves = {m: stacked[m][:, i] for m in names}
        lane_params = jax.tree.map(lambda a: a[i], params)
        results.append(LaneResult(
            run_id=run.run_id, lane=i, curves=curves,
            diverged_at=int(at[i]) + 1 if bool(diverged[i]) else None,
            param_digest=param_digest(lane_params),
            warnings=_warnings(run.variant.spec, curves),
            arrays=_lane_arrays(lane_params, carry, i) if keep_arrays else None,
        ))
    return GroupResult(group.group_id, group.lane_width, names, results, compile_seconds, run_seconds, environment)


def _lane_arrays(lane_params, carry, i) -> dict[str, np.ndarray]:
    import jax

    out = {"/".join(str(k.key) for k in path): np.asarray(leaf)
           for path, leaf in jax.tree_util.tree_flatten_with_path(lane_params)[0]}
    out["input/mean"], out["input/scale"] = np.asarray(carry.x_mean[i]), np.asarray(carry.x_scale[i])
    out["split/validation"] = np.asarray(carry.val_idx[i])
    return out


class InProcess:
    """The default executor: the groups one after another in this process.

    An executor's contract: ``run(groups, data, environment, progress)`` yields
    ``(group, GroupResult)`` as groups finish, in any order; ``data`` maps a group id to its
    Dataset; ``progress`` (or None) receives the ("group", group=…) and ("epoch", done=…, total=…)
    events. The caller writes each result as it arrives.

    ``checkpoint()`` (optional) is called before each group and after each epoch, outside any
    jax call, so that it may raise to abandon the group in flight (Ctrl-C)."""

    def __init__(self, checkpoint: Callable[[], None] | None = None):
        self.checkpoint = checkpoint

    def run(self, groups, data, environment, progress=None):
        check = self.checkpoint

        def on_epoch(done, total):
            if progress:
                progress("epoch", done=done, total=total)
            if check:
                check()

        for g in groups:
            if check:
                check()
            if progress:
                progress("group", group=g, todo=len(g.runs))
            yield g, execute_group(g, data[g.group_id], environment,
                                   on_epoch=on_epoch if check or progress else None)


def _warnings(spec, curves: dict[str, np.ndarray]) -> list[str]:
    """Batch-normalized layers whose gradient collapsed, judged from per-layer gradient norms."""
    if spec.normalization.kind != "batch":
        return []
    hidden = len(spec.model.widths)
    out_norm = curves.get(f"grad_norm_l{hidden + 1}")
    if out_norm is None:
        return []
    found = []
    for layer in range(1, hidden + 1):
        g = curves.get(f"grad_norm_l{layer}")
        if g is None:
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = g / out_norm
        bad = np.flatnonzero(np.isfinite(ratio) & (ratio < BN_COLLAPSE_RATIO) & (out_norm > 0))
        if bad.size:
            e = int(bad[0])
            found.append(f"batch-normalized layer l{layer}: gradient collapsed from epoch {e + 1} "
                         f"(|g| {g[e]:.2e} vs output layer {out_norm[e]:.2e}); "
                         "are the batch rows nearly identical?")
    return found
