"""The program store: compiled executables kept in the user's cache folder between invocations.

A program's compiled (init, epoch) executables are stored under a name hashed from everything
they depend on (:func:`program_path`), so a later invocation neither traces, lowers nor compiles
them; it is a speed-up only — a stored program computes the same bits as a fresh compile (tested
across processes), and replay never loads one. Writes are atomic; the folder is kept under
``$LESION_CACHE_MAX_MB`` by dropping the least recently used entries. The folder is trusted local
state (it holds machine code, unpickled on load) and comes from the environment, never from a
spec or a result set.
"""

from __future__ import annotations

import hashlib
import json
import os
import pickle
import tempfile
import time
from pathlib import Path

from compiler.errors import UserError
from runtime.plan import Group

__all__ = ["cache_dir", "CacheError", "cache_limit_bytes", "enable_compile_cache", "enabled", "data_signature",
           "program_path", "load_programs", "store_programs", "prune"]


def cache_dir() -> Path:
    """The compile cache folder: ``$LESION_CACHE_DIR``, else ``$XDG_CACHE_HOME/lesion/xla``,
    else ``~/.cache/lesion/xla``. Trusted local state: it holds compiled machine code."""
    if os.environ.get("LESION_CACHE_DIR"):
        return Path(os.environ["LESION_CACHE_DIR"])
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "lesion" / "xla"


class CacheError(UserError):
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
    # program store here already skips more work (tracing and lowering too).
    jax.config.update("jax_enable_compilation_cache", False)
    _cache_enabled = True


def enabled() -> bool:
    """Whether this process loads and stores programs (:func:`enable_compile_cache` was called)."""
    return _cache_enabled


def data_signature(dataset) -> tuple:
    """What a program key's programs know of its data: shapes, dtypes, task and class count (the
    rows themselves are arguments, so data of the same signature share the programs)."""
    return (dataset.x.shape, str(dataset.x.dtype), dataset.y.shape, str(dataset.y.dtype), dataset.task,
            dataset.classes)


def program_path(group: Group, dataset, zero: frozenset[str], environment: dict) -> Path:
    """Where the compiled programs of a program key live in the compile cache. The name hashes
    everything the programs are a function of: the numerics environment (lesion's sources among
    them), jax's configuration, the program key, the lane width, the data's signature and the knobs
    that are zero in every lane."""
    import jax

    from runtime import environment as env

    config = {k: repr(v) for k, v in sorted(jax.config.values.items()) if "cache" not in k}
    parts = [env.env_hash(environment), config, group.program, group.lane_width,
             data_signature(dataset), sorted(zero)]
    digest = hashlib.sha256(json.dumps(parts, sort_keys=True, default=str).encode()).hexdigest()
    return cache_dir() / "programs" / f"{digest}.pkl"


def load_programs(path: Path):
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


def store_programs(path: Path, programs) -> None:
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
        prune(path.parent, cache_limit_bytes(), keep=path)
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


def prune(folder: Path, limit: int, keep: Path) -> None:
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
