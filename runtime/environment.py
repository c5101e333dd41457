"""The software and machine a run was computed on, as far as they can change its bits.

A run's numbers are a function of (resolved variant, seed, lane width, software, machine). The
*numerics* fields below are the software and machine part: two environments with the same
numerics hash are expected to give identical bits, and resume/replay compare them field by
field to say what changed. Host name and time are recorded for people, never compared.

XLA:CPU's intra-op thread pool decides bits too (measured, jax 0.10.2): large reductions (a sum
of 65536 values, the mean of a 4000 × 32 block, a weight gradient over a 4096-row batch) are
split across the pool, and the split follows its size, which the CPU client takes from the
process's CPU affinity when jax creates it (later affinity changes do not move it; a stored
executable follows the pool of the process that runs it). Matrix products do not depend on it.
So the same study gave other bits on 1 core than on 2 (the medium benchmark: every run), and
would on a 64-core machine. :func:`single_threaded_xla` creates the client with one thread in
every process that computes runs, so bits do not depend on the machine's cores; the cores are
used by running groups side by side (:mod:`runtime.workers`). ``xla_cpu_threads`` records it.
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import socket
from functools import cache
from importlib import metadata
from pathlib import Path

from compiler.errors import UserError

__all__ = ["capture", "numerics", "env_hash", "differences", "source_hash", "check_settings", "SettingError",
           "single_threaded_xla", "xla_threads", "usable_cores"]

# CPU features that decide which kernels XLA:CPU emits (and so the rounding of matmuls).
_ISA_FLAGS = ("sse4_1", "sse4_2", "avx", "avx2", "fma", "f16c", "avx512f", "avx512bw", "avx512dq",
              "avx512vl", "avx512_vnni", "avx512_bf16", "amx_tile", "asimd", "sve")

# jax settings that change the numbers of a run (measured: a tiny study's parameter hashes under
# each): how keys become random bits, the seed itself, float width, matmul precision, and the
# options XLA compiles with (as XLA_FLAGS). Settings that only raise errors are in _REFUSED; the
# rest (logging, caches, devices, checks) cannot change a number.
_COMPILER_SETTINGS = ("jax_disable_most_optimizations", "jax_optimization_level",
                      "jax_exec_time_optimization_effort", "jax_memory_fitting_effort")
_JAX_SETTINGS = ("jax_threefry_partitionable", "jax_default_prng_impl", "jax_random_seed_offset",
                 "jax_default_matmul_precision", "jax_enable_x64", *_COMPILER_SETTINGS)

_NUMERICS_KEYS = ("lesion_sources", "python", "jax", "jaxlib", "optax", "numpy", "xla_flags", *_JAX_SETTINGS,
                  "xla_cpu_threads", "cpu_model", "cpu_isa", "machine", "os")

# Settings under which lesion's programs cannot run (each made `lesion run` fail mid-way with a
# traceback), with the value they need.
_REFUSED = {"jax_disable_jit": False, "jax_numpy_rank_promotion": "allow", "jax_numpy_dtype_promotion": "standard"}


class SettingError(UserError):
    """A jax setting lesion's programs cannot run under (a user error: exit 2)."""


def check_settings() -> None:
    """Refuse, before anything is compiled, the jax settings lesion's programs cannot run under."""
    import jax

    wrong = [f"{name}={_setting(jax, name)}" for name, needed in _REFUSED.items() if _setting(jax, name) != needed]
    if wrong:
        raise SettingError(f"jax setting {', '.join(wrong)} is not supported by lesion's programs; unset it "
                           f"(the environment variable {wrong[0].split('=')[0].upper()}) and run again")


def _setting(jax, name: str):
    """A jax setting as JSON can hold it (some are enums)."""
    v = jax.config.values.get(name)
    v = getattr(v, "value", v)
    return v if v is None or isinstance(v, (bool, int, float, str)) else str(v)



# The pool size every computing process gets: 1 is the only size every machine can give.
XLA_THREADS = 1
_pinned = False


def usable_cores() -> int:
    """CPUs this process may run on (its affinity, e.g. under taskset or a container's cpuset)."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def single_threaded_xla() -> None:
    """Create jax's CPU client with a one-thread intra-op pool, then give every thread of the
    process back its CPUs. Call it before anything runs on jax; once the client exists its pool
    is fixed, and this does nothing (:func:`xla_threads` then reports the CPUs the client saw,
    assuming the affinity has not changed since)."""
    global _pinned
    import jax
    from jax._src import xla_bridge

    if _pinned or xla_bridge.backends_are_initialized() or not hasattr(os, "sched_setaffinity"):
        return
    cpus = os.sched_getaffinity(0)
    # The client sizes its pool from the affinity of the thread that creates it; threads it
    # starts meanwhile inherit the narrow mask, so afterwards every thread gets the full one back.
    os.sched_setaffinity(0, set(sorted(cpus)[:XLA_THREADS]))
    try:
        jax.devices("cpu")
    finally:
        for task in os.listdir("/proc/self/task"):
            try:
                os.sched_setaffinity(int(task), cpus)
            except OSError:
                pass  # a thread that ended meanwhile
    _pinned = True


def xla_threads() -> int:
    """The intra-op pool size XLA:CPU computes with in this process."""
    return XLA_THREADS if _pinned else usable_cores()


def _version(dist: str) -> str:
    try:
        return metadata.version(dist)
    except metadata.PackageNotFoundError:
        return "absent"


@cache
def source_hash() -> str:
    """SHA-256 (16 hex digits) over lesion's own Python sources: a changed compiler (another
    release, a local edit) can change every run's bits, as a changed jax can."""
    h = hashlib.sha256()
    root = Path(__file__).resolve().parent.parent
    for folder in ("compiler", "runtime"):
        for path in sorted((root / folder).glob("*.py")):
            h.update(f"{folder}/{path.name}|{path.stat().st_size}|".encode())
            h.update(path.read_bytes())
    return h.hexdigest()[:16]


def _cpu() -> tuple[str, list[str]]:
    model, flags = platform.processor() or "unknown", set()
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
            for line in fh:
                key, _, value = line.partition(":")
                key = key.strip()
                if key == "model name" and model in ("unknown", "", platform.machine()):
                    model = value.strip()
                elif key in ("flags", "Features") and not flags:
                    flags = set(value.split())
    except OSError:
        pass
    return model, sorted(f for f in flags if f in _ISA_FLAGS)


def capture() -> dict:
    """The current process's environment. Imports jax (its config decides the random stream)."""
    import jax

    model, isa = _cpu()
    return {
        "python": platform.python_version(),
        "jax": _version("jax"),
        "jaxlib": _version("jaxlib"),
        "optax": _version("optax"),
        "numpy": _version("numpy"),
        "pyarrow": _version("pyarrow"),
        "lesion": _version("lesion"),
        "lesion_sources": source_hash(),
        "xla_flags": os.environ.get("XLA_FLAGS", ""),
        "jax_threefry_partitionable": bool(jax.config.jax_threefry_partitionable),
        "jax_default_prng_impl": str(jax.config.jax_default_prng_impl),
        "jax_random_seed_offset": int(jax.config.jax_random_seed_offset),
        "jax_default_matmul_precision": str(jax.config.jax_default_matmul_precision),
        "jax_enable_x64": bool(jax.config.jax_enable_x64),
        # XLA compile options, as XLA_FLAGS are
        **{name: _setting(jax, name) for name in _COMPILER_SETTINGS},
        "xla_cpu_threads": xla_threads(),
        "cpu_model": model,
        "cpu_isa": isa,
        "cores": os.cpu_count() or 0,
        "machine": platform.machine(),
        "os": f"{platform.system()} {platform.release()}",
        "host": socket.gethostname(),
    }


def numerics(env: dict) -> dict:
    return {k: env.get(k) for k in _NUMERICS_KEYS}


def env_hash(env: dict) -> str:
    """Short hash of the numerics fields: equal hashes, comparable bits."""
    text = json.dumps(numerics(env), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def differences(recorded: dict, current: dict) -> list[str]:
    """Human-readable list of numerics fields that differ, e.g. "jax: 0.10.2 → 0.11.0"."""
    out = []
    for key in _NUMERICS_KEYS:
        a, b = recorded.get(key), current.get(key)
        if a != b:
            out.append(f"{key}: {_show(a)} → {_show(b)}")
    return out


def _show(value) -> str:
    if isinstance(value, list):
        return ",".join(value) or "(none)"
    if value in ("", None):
        return "(unset)"
    return str(value)
