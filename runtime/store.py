"""Result sets: what one ``lesion run`` of one spec leaves on disk.

Layout (``<out>/<study name>-<first 12 hex of the study hash>/``):

- ``runs.parquet``: one row per run (identity, varied keys, lane facts, status, final and best
  metrics, parameter digest, timings, environment);
- ``curves.parquet``: one row per run per epoch with every per-epoch metric;
- ``.lock``: held (``flock``) by the one process writing the result set.

Every Parquet file carries schema metadata: the spec's source text and path, its canonical JSON,
the study hash, lesion's version and the writing process's environment (keys ``lesion.*``).

Writes are atomic: a new file is written beside the old one, fsynced, renamed over it and the
folder fsynced, so a crash at any moment leaves the previous complete state. ``runs.parquet`` is
the commit record: curves of a run id that is not in it are ignored and dropped on the next
write. Both files open in plain pyarrow or pandas.
"""

from __future__ import annotations

import errno
import fcntl
import json
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

__all__ = ["column", "ResultSet", "ResultSetError", "open_result_set", "result_dir", "write_results", "writer_lock",
           "META_KEYS", "SEQUENTIAL", "RUNS", "CURVES"]

RUNS = "runs.parquet"
_TMP = ".parquet-tmp"
CURVES = "curves.parquet"
META_KEYS = ("spec_source", "spec_path", "canonical_json", "study_hash", "version", "environment")
# Present only on a result set whose seeds were added by a stopping rule (``lesion run
# --until-decided``): the rule, the looks and the seeds run (JSON), so show and diff use its inference.
SEQUENTIAL = "sequential"



_NUMPY = {pa.int32(): np.int32, pa.int64(): np.int64, pa.float32(): np.float32, pa.float64(): np.float64}


def column(values, typ: pa.DataType) -> pa.Array:
    """An Arrow array of ``values`` (a sequence; None is null) of type ``typ`` — bool, int32,
    int64, float32, float64 or string — assembled from buffers.

    Not ``pa.array``: its first call imports pandas whenever pandas is installed, 0.25-0.45 s of
    every ``lesion run`` (measured with ``python -X importtime``)."""
    n = len(values)
    if isinstance(values, np.ndarray) and values.dtype != object:
        return pa.Array.from_buffers(typ, n, [None, pa.py_buffer(np.ascontiguousarray(values, dtype=_NUMPY[typ]))])
    valid = np.fromiter((v is not None for v in values), dtype=bool, count=n)
    nulls = n - int(valid.sum())
    validity = pa.py_buffer(np.packbits(valid, bitorder="little")) if nulls else None
    if typ == pa.string():
        encoded = [b"" if v is None else v.encode() for v in values]
        offsets = np.zeros(n + 1, dtype=np.int32)
        np.cumsum([len(b) for b in encoded], out=offsets[1:])
        buffers = [validity, pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))]
    elif typ == pa.bool_():
        bits = np.fromiter((bool(v) for v in values), dtype=bool, count=n)
        buffers = [validity, pa.py_buffer(np.packbits(bits, bitorder="little"))]
    else:
        data = np.array([0 if v is None else v for v in values], dtype=_NUMPY[typ]) if nulls else \
            np.ascontiguousarray(values, dtype=_NUMPY[typ])
        buffers = [validity, pa.py_buffer(data)]
    return pa.Array.from_buffers(typ, n, buffers, null_count=nulls)


class ResultSetError(Exception):
    """A result set that cannot be read or written, with a message a person can act on."""


@dataclass(frozen=True)
class ResultSet:
    path: Path
    runs: pa.Table
    curves: pa.Table
    meta: dict

    @property
    def study_hash(self) -> str:
        return self.meta["study_hash"]

    @property
    def tree(self) -> dict:
        """The stored study as the nested dict of its canonical JSON (defaults filled in)."""
        return json.loads(self.meta["canonical_json"])

    @property
    def headline(self) -> str:
        """The study's headline metric."""
        return self.tree["study"]["metric"]


def result_dir(out: Path, name: str, study_hash: str) -> Path:
    return Path(out) / f"{name}-{study_hash[:12]}"


def _metadata(meta: dict) -> dict[bytes, bytes]:
    out = {}
    for key in META_KEYS:
        value = meta[key]
        text = value if isinstance(value, str) else json.dumps(value, sort_keys=True)
        out[f"lesion.{key}".encode()] = text.encode()
    if meta.get(SEQUENTIAL) is not None:
        out[f"lesion.{SEQUENTIAL}".encode()] = json.dumps(meta[SEQUENTIAL], sort_keys=True).encode()
    return out


def _read_meta(schema: pa.Schema, path: Path) -> dict:
    raw = schema.metadata or {}
    meta = {}
    for key in META_KEYS:
        value = raw.get(f"lesion.{key}".encode())
        if value is None:
            raise ResultSetError(f"{path}: not a lesion result set (its schema metadata has no 'lesion.{key}')")
        meta[key] = value.decode()
    try:
        meta["environment"] = json.loads(meta["environment"])
    except json.JSONDecodeError as err:
        raise ResultSetError(f"{path}: the recorded environment is not valid JSON ({err})") from None
    rule = raw.get(f"lesion.{SEQUENTIAL}".encode())
    if rule is not None:
        try:
            meta[SEQUENTIAL] = json.loads(rule)
        except json.JSONDecodeError as err:
            raise ResultSetError(f"{path}: the recorded stopping rule is not valid JSON ({err})") from None
    return meta


def _read(path: Path) -> pa.Table:
    try:
        return pq.read_table(path)
    except FileNotFoundError:
        raise ResultSetError(f"{path}: no such file") from None
    except (pa.ArrowException, OSError, ValueError) as err:
        raise ResultSetError(f"{path}: not a readable Parquet file ({str(err).splitlines()[0]})") from None


def open_result_set(path: str | Path) -> ResultSet:
    """Read a result set folder (or its runs.parquet). Raises ResultSetError, never a traceback."""
    path = Path(path)
    if path.is_file() and path.name in (RUNS, CURVES):
        path = path.parent
    if not path.exists():
        raise ResultSetError(f"{path}: no such result set (expected a folder written by 'lesion run')")
    if not path.is_dir():
        raise ResultSetError(f"{path}: not a result set folder (expected a folder holding {RUNS} and {CURVES})")
    runs = _read(path / RUNS)
    curves = _read(path / CURVES)
    meta = _read_meta(runs.schema, path / RUNS)
    if _read_meta(curves.schema, path / CURVES)["study_hash"] != meta["study_hash"]:
        raise ResultSetError(f"{path}: {RUNS} and {CURVES} belong to different studies")
    for name in ("run_id", "variant_label", "seed", "status"):
        if name not in runs.column_names:
            raise ResultSetError(f"{path / RUNS}: column '{name}' is missing (not a lesion runs table)")
    ids = set(runs.column("run_id").to_pylist())
    if "run_id" not in curves.column_names:
        raise ResultSetError(f"{path / CURVES}: column 'run_id' is missing (not a lesion curves table)")
    keep = column([r in ids for r in curves.column("run_id").to_pylist()], pa.bool_())
    return ResultSet(path, runs, curves.filter(keep), meta)


# Errors of the disk or the folder, not of lesion: reported as a ResultSetError (exit 2).
_DISK_ERRORS = (errno.ENOSPC, errno.EDQUOT, errno.EACCES, errno.EPERM, errno.EROFS, errno.EIO)


def _cannot_write(target: Path, err: OSError) -> ResultSetError:
    return ResultSetError(f"{target}: cannot write ({err.strerror or os.strerror(err.errno)}); "
                          "the result set keeps its previous complete state")


def _umask() -> int:
    # Reading the umask means setting it; it is set straight back.
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _atomic_write(table: pa.Table, target: Path) -> None:
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=_TMP, dir=target.parent)
    except OSError as err:
        if err.errno in _DISK_ERRORS:
            raise _cannot_write(target, err) from None
        raise
    try:
        # mkstemp creates 0600; the result set is a shared artifact, so it gets the mode any new
        # file of the user would (0666 less the umask).
        os.fchmod(fd, 0o666 & ~_umask())
        with os.fdopen(fd, "wb") as fh:
            pq.write_table(table, fh, compression="zstd")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException as err:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        if isinstance(err, OSError) and err.errno in _DISK_ERRORS:
            raise _cannot_write(target, err) from None
        raise
    dir_fd = os.open(target.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


def _concat(old: pa.Table | None, new: pa.Table) -> pa.Table:
    if old is None or old.num_rows == 0:
        return new
    return pa.concat_tables([old.replace_schema_metadata(None), new.replace_schema_metadata(None)],
                            promote_options="default")


def write_results(path: Path, meta: dict, runs: pa.Table, curves: pa.Table, *,
                  previous: ResultSet | None) -> ResultSet:
    """Merge new run rows (and their curves) into the result set at ``path``, replacing rows of
    the same run ids, and write both files atomically (curves first; runs is the commit)."""
    path.mkdir(parents=True, exist_ok=True)
    new_ids = set(runs.column("run_id").to_pylist())
    old_runs = old_curves = None
    if previous is not None:
        keep = [r not in new_ids for r in previous.runs.column("run_id").to_pylist()]
        old_runs = previous.runs.filter(column(keep, pa.bool_()))
        kept_ids = set(old_runs.column("run_id").to_pylist())
        keep_c = [r in kept_ids for r in previous.curves.column("run_id").to_pylist()]
        old_curves = previous.curves.filter(column(keep_c, pa.bool_()))
    md = _metadata(meta)
    all_curves = _concat(old_curves, curves).replace_schema_metadata(md)
    all_runs = _concat(old_runs, runs).replace_schema_metadata(md)
    _atomic_write(all_curves, path / CURVES)
    _atomic_write(all_runs, path / RUNS)
    return ResultSet(path, all_runs, all_curves, {**meta})


class writer_lock:
    """Exclusive ``flock`` on ``<result set>/.lock`` for the whole of one ``lesion run``.

    A second process on the same result set waits for the first, then finds the runs already
    stored and computes only what is still missing: no run is computed or stored twice. The lock
    is released by the kernel when the holder dies, so a killed run never leaves a stale lock;
    the next holder removes the temporary file such a run may have left mid-write."""

    def __init__(self, path: Path, on_wait=None):
        self.path, self.on_wait, self.fh = Path(path), on_wait, None

    def __enter__(self):
        try:
            self.path.mkdir(parents=True, exist_ok=True)
            self.fh = open(self.path / ".lock", "a+")
        except OSError as err:
            raise ResultSetError(f"{self.path}: cannot create the result set folder or its lock "
                                 f"({err.strerror or err}); choose a writable --out") from None
        try:
            fcntl.flock(self.fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            if self.on_wait:
                self.on_wait()
            fcntl.flock(self.fh, fcntl.LOCK_EX)
        self.fh.seek(0)
        self.fh.truncate()
        self.fh.write(str(os.getpid()))
        self.fh.flush()
        # Holding the lock, any temporary file here is left by a writer that was killed mid-write.
        for stale in self.path.glob(f".*{_TMP}"):
            stale.unlink(missing_ok=True)
        return self

    def __exit__(self, *exc):
        fcntl.flock(self.fh, fcntl.LOCK_UN)
        self.fh.close()
        return False
