"""Resource guard: what a study will need, checked before anything is compiled.

Contract:

- :func:`estimate` ``(groups, data, workers=1) -> Estimate``: peak bytes and order-of-magnitude
  wall seconds of executing ``groups`` (``data`` maps a group id to its
  :class:`compiler.data.Dataset`) in this process or side by side in ``workers`` processes,
  without compiling or running anything;
- :func:`lane_budget` ``(groups, data, budget_bytes=None) -> {program key: lanes}``: for each
  program key, the most lanes whose estimate fits in ``budget_bytes`` (default
  :func:`memory_budget`), for :func:`runtime.plan.plan`'s ``lane_budget``;
- :func:`check_data` ``(groups, where, base_dir, available=None)`` raises :class:`ResourceError`
  before a built-in data set too large to generate is drawn, or a data file too large to load (by
  its metadata) is read; :func:`data_room` is the memory a data set may take now;
- :func:`check` ``(estimate, lanes_given, where, available=None)`` raises :class:`ResourceError`,
  one line naming the estimate, what is available and the knob to turn, when the peak exceeds
  :func:`available_bytes`.

Memory model (float32 everywhere; a run's state is its lane's share of a vmapped program):

- data: the host arrays and one device copy per (program key, data set), since compiled programs
  keep theirs for the whole invocation;
- per lane (:func:`per_lane_bytes`): from the network family's declared cost
  (``compiler.model.FAMILIES``: parameters, activations per example, weight masks), parameters,
  gradients, up to three optimizer slots and one batch of activations, plus what grows with the data: the split indices, the epoch's
  shuffled order, the larger of the gathered training rows (standardization is fitted on them)
  and the validation split's forward pass, and the per-step metrics of one epoch;
- × :data:`XLA_SLACK` for temporaries XLA allocates beside the live values, plus
  :data:`RUNTIME_BYTES` for the interpreter, jax and the compiled programs.

Time model: execution is ``2·MACs`` FLOPs per example forward, ``6·MACs`` forward and backward,
at :data:`FLOPS_PER_SECOND`, plus a fixed cost per vmapped step; each program costs a compile, or
a load when the compile cache holds it, or nothing when an earlier group of the invocation made
it; each group costs a fixed amount besides (moving its data, writing the result set). With
several worker processes the groups are handed out in order to the first free worker
(:func:`schedule`), and a worker pays a compile, or a load once the compile cache holds the
program, for each program it has not made itself: the estimate is the busiest worker's wall
time plus the parent's writes, not the sum over groups. The
constants start as rounded facts of an idle machine and are then *calibrated*: every
``lesion run`` in this process stores what it measured (:class:`Calibration`, in the compile
cache folder) and the next estimate uses it, so a slower machine gets a larger one. What is
stored is what an idle core would take: the computing processes' CPU seconds (one XLA thread
each), not their wall time, so a study run while the machine was busy does not inflate the
estimates of later runs on an idle one. The machine's load now is applied on top
(:func:`slowdown`), and the estimate says when it does.

The lane budget is taken from a fixed share of the machine's *total* memory, not from what
happens to be free, so the lane width of a program (which decides a run's bits) is the same on
every invocation on one machine; only the refusal looks at the memory free right now.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

from compiler.errors import UserError
from compiler.spec import example_shape, train_size
from runtime.environment import usable_cores
from runtime.plan import Group

__all__ = ["Estimate", "ResourceError", "Calibration", "estimate", "schedule", "model_seconds", "lane_budget", "check",
           "check_data", "available_bytes", "memory_budget", "total_bytes", "data_room", "XLA_SLACK", "RUNTIME_BYTES",
           "FLOPS_PER_SECOND", "slowdown"]

XLA_SLACK = 1.5
RUNTIME_BYTES = 512 * 2**20
# XLA:CPU on small matrix products reached 25-28 % of a ≈117 GFLOP/s f32 peak here.
FLOPS_PER_SECOND = 30e9
STEP_SECONDS = 1e-3        # small grid: ~0.7 s for 480 vmapped steps of a tiny model
COMPILE_SECONDS = 2.0      # one per-epoch program
BUDGET_SHARE = 0.75        # of total memory, for choosing lane widths
CGROUP_ROOT = "/sys/fs/cgroup"


CALIBRATION_WEIGHT = 0.5   # of a new measurement against the stored one: recent load counts most


@dataclass(frozen=True)
class Calibration:
    """Measured costs of this machine, stored as JSON beside the compiled programs."""

    compile_seconds: float = COMPILE_SECONDS   # per program compiled
    load_seconds: float = 0.1                  # per program loaded from the compile cache
    execute_ratio: float = 1.0                 # measured ÷ modelled execution seconds
    group_seconds: float = 0.05                # per group besides compiling and executing
    runs: int = 0                              # invocations measured so far

    @classmethod
    def load(cls, path) -> "Calibration":
        """The stored calibration, or the idle-machine defaults when there is none or it is unusable."""
        try:
            with open(path) as fh:
                stored = json.load(fh)
            return cls(**{f: float(stored[f]) for f in ("compile_seconds", "load_seconds", "execute_ratio",
                                                        "group_seconds")}, runs=int(stored["runs"]))
        except (OSError, ValueError, TypeError, KeyError):
            return cls()

    def save(self, path) -> None:
        """Write atomically; a folder that cannot be written only leaves the estimate uncalibrated."""
        path = Path(path)
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-timing-")
            with os.fdopen(fd, "w") as fh:
                json.dump(dataclasses.asdict(self), fh)
            os.replace(tmp, path)
        except OSError:
            pass

    def updated(self, *, compiled: list[float], loaded: list[float], executed: tuple[float, float],
                other: tuple[float, int]) -> "Calibration":
        """Blend one invocation's measurements in: seconds of each program compiled and loaded,
        (measured, modelled) execution seconds, (other seconds, groups)."""
        def blend(old: float, new: float | None) -> float:
            if new is None or not new >= 0:
                return old
            return new if self.runs == 0 else (1 - CALIBRATION_WEIGHT) * old + CALIBRATION_WEIGHT * new

        mean = (lambda xs: sum(xs) / len(xs) if xs else None)
        (measured, modelled), (rest, groups) = executed, other
        return Calibration(blend(self.compile_seconds, mean(compiled)), blend(self.load_seconds, mean(loaded)),
                           blend(self.execute_ratio, measured / modelled if modelled > 0 else None),
                           blend(self.group_seconds, rest / groups if groups else None), self.runs + 1)


class ResourceError(UserError):
    """A study that cannot fit this machine as asked; the message says what to change."""


def slowdown(processes: int = 1, load: float | None = None, cores: int | None = None) -> float:
    """How many times longer than on an idle machine ``processes`` single-threaded processes
    take while ``load`` (the one-minute load average: runnable processes) competes for ``cores``:
    at least 1, and the share of a core each gets when more want one than there are."""
    load = os.getloadavg()[0] if load is None else load
    cores = usable_cores() if cores is None else cores
    return max(1.0, (load + processes) / cores)


@dataclass(frozen=True)
class Estimate:
    peak_bytes: int
    data_bytes: int
    lane_bytes: int        # of the widest-footprint group, per lane
    lanes: int             # that group's lane width
    seconds: float         # wall time
    workers: int = 1       # processes the groups are handed out to
    busy: float = 1.0      # the machine's load now: seconds is this many times the idle estimate
    load: float = 0.0
    cores: int = 1

    def describe(self) -> str:
        side = f" on {self.workers} workers" if self.workers > 1 else ""
        text = f"about {_size(self.peak_bytes)} of memory and {_duration(self.seconds)}{side}"
        if self.busy >= 1.5:
            text += f" (the machine is busy: load average {self.load:.1f} on {self.cores} cores)"
        return text


def _shape(group: Group, dataset):
    """The group's spec, its network's declared :class:`compiler.model.Cost`, rows in all and in
    training, and optimization steps per epoch: the network, its divergence and its training
    section each say their own part."""
    # Imported here, not at the top: `lesion check` reads this module (``data_room``) and must
    # not load jax.
    from compiler import model, regularization

    spec = group.runs[0].variant.spec
    fields = {name: getattr(spec.model, name) for name in type(spec.model).model_fields if name != "kind"}
    cost = model.FAMILIES[spec.model.kind].cost(
        **{**fields, "hidden": spec.model.widths}, in_shape=dataset.x.shape[1:],
        out_width=spec.divergence.outputs(dataset.classes, dataset.targets),
        dropout=regularization.REGISTRY[spec.regularization.dropout.kind]())
    n = dataset.x.shape[0]
    n_train = train_size(n, spec.data.validation, spec.data.test)
    return spec, cost, n, n_train, spec.training.steps(n_train)


def per_lane_bytes(group: Group, dataset) -> int:
    """Parameters with gradients and up to three optimizer slots, one batch of activations kept
    for the backward pass (and the weight masks it draws), plus what grows with the data: the
    split indices, the epoch's order, the larger of the gathered training rows and the validation
    split's forward pass, and one epoch of per-step metrics; float32, with a factor of 4 on the
    activations for XLA's copies of them."""
    spec, cost, n, n_train, steps = _shape(group, dataset)
    n_val, features = n - n_train, math.prod(dataset.x.shape[1:])
    batch = spec.training.batch_size
    lane = 5 * cost.parameters + 4 * batch * cost.activations + batch * cost.masks
    grows = (n + n_train + max(n_train * features, n_val * (features + 2 * cost.activations))
             + steps * (cost.layers + 7))
    return 4 * (lane + grows)


def model_seconds(group: Group, dataset) -> float:
    """Uncalibrated execution seconds of a group."""
    spec, cost, n, n_train, steps = _shape(group, dataset)
    flops = group.lane_width * (6 * cost.macs * n_train + 2 * cost.macs * (n - n_train))
    return spec.training.epochs * (flops / FLOPS_PER_SECOND + steps * STEP_SECONDS)


def schedule(costs: list[float], workers: int) -> float:
    """Wall seconds of jobs of ``costs`` handed out in order, each to the first worker free
    (how :class:`runtime.workers.LocalWorkers` hands out groups)."""
    free = [0.0] * max(1, min(workers, len(costs)))
    for cost in costs:
        w = free.index(min(free))
        free[w] += cost
    return max(free)


def _parallel_seconds(groups: list[Group], data: dict, execute: list[float], actions: list[str],
                      cal: Calibration, workers: int) -> float:
    """Wall seconds of compiling and executing ``groups`` in ``workers`` new processes. A
    worker holds no program at first: a group whose program its worker has not made pays a
    compile, or a load once the compile cache holds the program (stored by the first worker
    that compiled it, or before this invocation: ``actions`` other than compile)."""
    free = [0.0] * min(workers, len(groups))
    held: list[set] = [set() for _ in free]
    stored: dict = {}
    first: dict = {}
    for g, run, action in zip(groups, execute, actions):
        key = (g.program, g.lane_width, id(data[g.group_id]))
        first.setdefault(key, action)
        w = free.index(min(free))
        start = free[w]
        if key in held[w]:
            cost = 0.0
        elif first[key] != "compile" or stored.get(key, float("inf")) <= start:
            cost = cal.load_seconds
        else:
            cost = cal.compile_seconds
            stored[key] = min(stored.get(key, float("inf")), start + cost)
        held[w].add(key)
        free[w] = start + cost + run
    return max(free)


def estimate(groups: list[Group], data: dict, *, preparation: dict[str, str] | None = None,
             calibration: Calibration | None = None, workers: int = 1, load: float | None = 0.0,
             cores: int | None = None) -> Estimate:
    """Peak memory (per process) and rough wall time of executing ``groups``: one after another
    in this process, or handed out to ``workers`` worker processes side by side (more than one
    worker and one group). ``preparation`` (group id -> compile, load or reuse, from
    :func:`runtime.execute.preparation`) defaults to one compile per program and data set;
    ``calibration`` defaults to the idle-machine constants. ``load`` (the one-minute load
    average; ``None``: this machine's now) slows everything by :func:`slowdown`; the default
    0 estimates an idle machine."""
    host = {id(data[g.group_id]): data[g.group_id] for g in groups}
    device = {(g.program, id(data[g.group_id])): data[g.group_id] for g in groups}
    data_bytes = sum(d.x.nbytes + d.y.nbytes for d in [*host.values(), *device.values()])
    widest, lanes, lane = 0, 1, 0
    for g in groups:
        b = per_lane_bytes(g, data[g.group_id])
        if b * g.lane_width >= widest:
            widest, lanes, lane = b * g.lane_width, g.lane_width, b
    cal = calibration or Calibration()
    execute = [cal.execute_ratio * model_seconds(g, data[g.group_id]) for g in groups]
    if preparation is None:
        seen: set = set()
        actions = []
        for g in groups:
            key = (g.program, id(data[g.group_id]))
            actions.append("reuse" if key in seen else "compile")
            seen.add(key)
    else:
        actions = [preparation[g.group_id] for g in groups]
    # The parent writes each group's result: that part stays serial whatever the workers.
    other = cal.group_seconds * len(groups)
    if workers > 1 and len(groups) > 1:
        seconds = _parallel_seconds(groups, data, execute, actions, cal, workers) + other
    else:
        workers = 1
        seconds = (sum(execute) + cal.compile_seconds * actions.count("compile")
                   + cal.load_seconds * actions.count("load") + other)
    peak = RUNTIME_BYTES + data_bytes + int(XLA_SLACK * widest)
    load = os.getloadavg()[0] if load is None else load
    cores = usable_cores() if cores is None else cores
    busy = slowdown(min(workers, len(groups)), load, cores)
    return Estimate(peak, data_bytes, lane, lanes, seconds * busy, workers, busy, load, cores)


def lane_budget(groups: list[Group], data: dict, budget_bytes: int | None = None) -> dict[str, int]:
    """Most lanes per program key (at least 1) whose estimate, with its own data set, fits
    ``budget_bytes``. It depends on nothing but the program, its data and the machine, so a
    resumed study gets the widths its first invocation had."""
    budget = memory_budget() if budget_bytes is None else budget_bytes
    out: dict[str, int] = {}
    for g in groups:
        d = data[g.group_id]
        room = budget - RUNTIME_BYTES - 2 * (d.x.nbytes + d.y.nbytes)
        fits = max(1, int(room // (XLA_SLACK * per_lane_bytes(g, d))))
        out[g.program] = min(out.get(g.program, fits), fits)
    return out


def check(est: Estimate, *, lanes_given: bool, where: str, available: int | None = None) -> None:
    """Raise :class:`ResourceError` when ``est`` does not fit the memory available now."""
    free = available_bytes() if available is None else available
    if est.peak_bytes <= free:
        return
    room = free - RUNTIME_BYTES - est.data_bytes
    fits = int(room // (XLA_SLACK * est.lane_bytes)) if room > 0 else 0
    if fits >= 1:
        knob = f"run with --lanes {min(fits, est.lanes - 1)}" + ("" if lanes_given else " (or free some memory)")
    else:
        knob = "even one lane does not fit: lower training.batch_size, model.hidden or the data size"
    raise ResourceError(f"{where}: needs {est.describe()} ({est.lanes} lanes × {_size(est.lane_bytes)} per lane, "
                        f"data {_size(est.data_bytes)}), but {_size(free)} is available; {knob}")


def check_data(groups: list[Group], *, where: str, base_dir=".", available: int | None = None) -> None:
    """Before generating or loading anything: raise :class:`ResourceError` when a data set alone
    would not fit — a built-in one drawn in float64 then kept in float32, a file as its metadata
    declares it (:func:`compiler.data.load_bytes`: NPZ headers, Parquet row counts, CSV size), so
    a small file that expands hugely is refused instead of killing the process."""
    from compiler.data import inspect_file, load_bytes

    free = available_bytes() if available is None else available
    for g in groups:
        data = g.runs[0].variant.spec.data
        if data.kind == "synthetic":
            shape = example_shape(data)
            need = RUNTIME_BYTES + 12 * data.samples * (math.prod(shape) + 1)
            size, value = ("data.shape", list(shape)) if len(shape) > 1 else ("data.features", data.features)
            what, fix = f"data.samples = {data.samples} × {size} = {value}", f"lower data.samples or {size}"
        else:
            need = RUNTIME_BYTES + load_bytes(inspect_file(data, base_dir), data)
            what, fix = f"data.path = {data.path}", "use a sample of its rows or fewer columns"
        if need > free:
            raise ResourceError(f"{where}: {what} needs about {_size(need)} of memory just to load, but "
                                f"{_size(free)} is available; {fix}")


def data_room() -> int:
    """Memory a data set may take now: what is available, less the interpreter's share."""
    return available_bytes() - RUNTIME_BYTES


# ── this machine ────────────────────────────────────────────────────────────────────────────────
def _meminfo() -> dict[str, int]:
    out = {}
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                name, _, rest = line.partition(":")
                out[name] = int(rest.split()[0]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return out


def _read_int(path: str) -> int | None:
    try:
        with open(path) as fh:
            text = fh.read().strip()
    except OSError:
        return None
    return int(text) if text.isdigit() else None   # cgroup v2 writes "max" for no limit


# cgroup v1 writes "no limit" as the largest page-aligned signed 64-bit value; anything from 2**60
# bytes up is read as none.
_NO_LIMIT = 2**60


def _cgroup(root: str = CGROUP_ROOT) -> tuple[int, int] | None:
    """A container's memory limit and what it uses, (limit, in use), or None without a limit: cgroup
    v2 (``memory.max``, ``memory.current``) or v1 (``memory/memory.limit_in_bytes``,
    ``memory/memory.usage_in_bytes``). Either can be far below the machine's memory."""
    for limit_file, usage_file in (("memory.max", "memory.current"),
                                   ("memory/memory.limit_in_bytes", "memory/memory.usage_in_bytes")):
        limit = _read_int(os.path.join(root, limit_file))
        if limit is not None and limit < _NO_LIMIT:
            return limit, _read_int(os.path.join(root, usage_file)) or 0
    return None


def total_bytes() -> int:
    """The machine's memory, or the container's limit when that is lower."""
    info = _meminfo()
    total = info.get("MemTotal") or os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    cg = _cgroup()
    return total if cg is None else min(total, cg[0])


def available_bytes() -> int:
    """Memory this process can use now: MemAvailable, capped by what a cgroup limit leaves."""
    free = _meminfo().get("MemAvailable") or total_bytes()
    cg = _cgroup()
    return free if cg is None else min(free, cg[0] - cg[1])


def memory_budget() -> int:
    return int(BUDGET_SHARE * total_bytes())


def _size(n: int) -> str:
    for unit, scale in (("GB", 2**30), ("MB", 2**20), ("KB", 2**10)):
        if n >= scale:
            return f"{n / scale:.1f} {unit}"
    return f"{n} B"


def _duration(s: float) -> str:
    if s < 60:
        return f"~{max(1, round(s))} s"
    if s < 3600:
        return f"~{round(s / 60)} min"
    return f"~{s / 3600:.1f} h"
