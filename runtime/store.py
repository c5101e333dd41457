"""Result sets: what one ``lesion run`` of one spec leaves on disk.

Layout (``<out>/<study name>-<first 12 hex of the study hash>/``):

- ``runs.parquet``: one row per run (identity, varied keys, lane facts, status, final and best
  metrics, parameter digest, timings, environment);
- ``curves.parquet``: one row per run per epoch with every per-epoch metric;
- ``.lock``: held (``flock``) by the one process writing the result set.

Every Parquet file carries schema metadata: the spec's source text and path, its canonical JSON,
the study hash, lesion's version and the writing process's environment (keys ``lesion.*``), and
two digests of the values as written (:func:`runs_digest`, :func:`curves_digest`), so a reader
can tell cheaply whether the tables were edited since (:func:`edits`).

Writes are atomic: a new file is written beside the old one, fsynced, renamed over it and the
folder fsynced, so a crash at any moment leaves the previous complete state. ``runs.parquet`` is
the commit record: curves of a run id that is not in it are ignored and dropped on the next
write. Both files open in plain pyarrow or pandas.
"""

from __future__ import annotations

import errno
import fcntl
import hashlib
import json
import os
import stat
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from compiler.errors import UserError
from compiler.spec import class_of_metric, direction, metric_problem, spelled_metrics

__all__ = ["column", "ResultSet", "ResultSetError", "open_result_set", "result_dir", "write_results", "writer_lock",
           "META_KEYS", "DIGEST_KEYS", "SEQUENTIAL", "RUNS", "CURVES", "STAGING", "refuse_link", "runs_digest",
           "curves_digest", "edits"]

RUNS = "runs.parquet"
_TMP = ".parquet-tmp"
CURVES = "curves.parquet"
# Where ``lesion run --fresh`` writes its new runs until the whole study is computed.
STAGING = ".fresh"
META_KEYS = ("spec_source", "spec_path", "canonical_json", "study_hash", "version", "environment")
# Optional on reading: result sets written before lesion recorded them have none.
DIGEST_KEYS = ("runs_digest", "curves_digest")
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


class ResultSetError(UserError):
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

    def require(self, metrics, curves: bool = False) -> None:
        """Raise :class:`ResultSetError` naming the first of ``metrics`` this result set does not
        store (as a final value per run, or with ``curves`` as a per-epoch curve), and what it has."""
        if curves:
            have = [c for c in self.curves.column_names if c not in ("run_id", "variant_label", "seed", "epoch")]
        else:
            have = [c[len("final_"):] for c in self.runs.column_names if c.startswith("final_")]
        for m in metrics:
            if m not in have:
                what = "has no curves" if curves else "is not stored"
                why = self._absent(m)
                raise ResultSetError(f"{self.path}: metric {m!r} {what} in this result set "
                                     f"(it has: {spelled_metrics(sorted(have))})" + (f"; {why}" if why else ""))

    def _absent(self, metric: str) -> str | None:
        """Why a metric lesion knows is not stored here, from the stored columns; None for a name
        lesion does not know as a metric."""
        if direction(metric) is None:
            return None
        finals = [c[len("final_"):] for c in self.runs.column_names if c.startswith("final_")]
        task = "regression" if "val_rmse" in finals else "classification"
        classes = max((c[1] + 1 for c in map(class_of_metric, finals) if c), default=None)
        return (metric_problem(metric, task, classes, "this result set's data")
                or "the lesion that wrote it did not compute this metric yet (`lesion run` on the study's spec "
                   "recomputes its runs with this lesion)")


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


def _feed(h, data: bytes) -> None:
    # Length-prefixed, so two different sequences of fields never feed the same bytes.
    h.update(len(data).to_bytes(8, "little"))
    h.update(data)


def _table_digest(table: pa.Table, order: list[str], h) -> str:
    """SHA-256 over a table's values, not its file's bytes (Parquet encodings vary): rows sorted by
    ``order`` (row order carries no meaning), columns by name; per column its name, its Arrow
    type, its validity bits and its values: numbers little-endian with every NaN as one NaN;
    strings as their UTF-8 lengths (int64 little-endian), then their bytes; a null as 0 or empty;
    each of these fields preceded by its own length."""
    if table.num_rows:
        table = table.sort_by([(k, "ascending") for k in order if k in table.column_names])
    for name in sorted(table.column_names):
        col = table.column(name).combine_chunks()
        typ, n, off = col.type, len(col), col.offset
        bufs = col.buffers()
        # Read from the Arrow buffers: converting to NumPy or Python imports pandas (see column).
        valid = _bits(bufs[0], off, n) if bufs[0] is not None else np.ones(n, dtype=bool)
        _feed(h, name.encode())
        _feed(h, str(typ).encode())
        _feed(h, np.packbits(valid, bitorder="little").tobytes())
        if typ in _NUMPY or typ == pa.bool_():
            if n == 0:
                values = np.zeros(0, dtype=_NUMPY.get(typ, bool))
            else:
                values = _bits(bufs[1], off, n) if typ == pa.bool_() else \
                    np.frombuffer(bufs[1], dtype=_NUMPY[typ])[off:off + n]
            values = np.where(valid, values, np.zeros(1, dtype=values.dtype))
            if pa.types.is_floating(typ):
                values = np.where(np.isnan(values), np.array(np.nan, dtype=values.dtype), values)
            _feed(h, np.ascontiguousarray(values, dtype=values.dtype.newbyteorder("<")).tobytes())
        elif typ == pa.string():
            offsets = np.frombuffer(bufs[1], dtype=np.int32)[off:off + n + 1] if n else np.zeros(1, np.int32)
            data = b"" if bufs[2] is None else bufs[2].to_pybytes()
            lengths = np.where(valid, np.diff(offsets), 0)
            if valid.all():
                text = data[offsets[0]:offsets[-1]]
            else:
                text = b"".join(data[a:b] for a, b, ok in zip(offsets[:-1], offsets[1:], valid) if ok)
            _feed(h, lengths.astype("<i8").tobytes())
            _feed(h, text)
        else:  # not a type lesion writes: still fed, so an edit that introduces it is seen
            _feed(h, "\0".join(map(repr, col.to_pylist())).encode())
    return h.hexdigest()


def _bits(buf: pa.Buffer, offset: int, n: int) -> np.ndarray:
    return np.unpackbits(np.frombuffer(buf, dtype=np.uint8), bitorder="little")[offset:offset + n].astype(bool)


def runs_digest(runs: pa.Table, metadata: dict[bytes, bytes]) -> str:
    """Digest of the runs table's values and of the ``lesion.*`` metadata it is stored with (the
    spec, its path, the environment: what a reader trusts beside the numbers)."""
    h = hashlib.sha256()
    for key in META_KEYS:
        _feed(h, metadata.get(f"lesion.{key}".encode(), b""))
    rule = metadata.get(f"lesion.{SEQUENTIAL}".encode())
    if rule is not None:   # fed only when present: the digests of other result sets stay as they were
        _feed(h, rule)
    return _table_digest(runs, ["run_id"], h)


def curves_digest(curves: pa.Table) -> str:
    return _table_digest(curves, ["run_id", "epoch"], hashlib.sha256())


def edits(rs: "ResultSet") -> list[str] | None:
    """What no longer matches the digests stored when the result set was written: [] when all
    does, None when it has no digests (written before lesion recorded them). A digest is a check
    of consistency, not a signature: whoever edits the tables can also recompute it."""
    stored = rs.runs.schema.metadata or {}
    runs_d, curves_d = (stored.get(f"lesion.{k}".encode()) for k in DIGEST_KEYS)
    if runs_d is None or curves_d is None:
        return None
    if runs_digest(rs.runs, stored).encode() != runs_d:
        # A deleted run also drops its curves on reading: one finding, not two.
        return [f"{rs.path / RUNS}: edited after lesion wrote it (its values or metadata no longer match "
                "the digest stored with them)"]
    if curves_digest(rs.curves).encode() != curves_d:
        return [f"{rs.path / CURVES}: edited after lesion wrote it (its values no longer match the digest "
                f"stored in {RUNS})"]
    return []


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
    refuse_link(path)
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
    all_curves = _concat(old_curves, curves)
    all_runs = _concat(old_runs, runs)
    md[b"lesion.runs_digest"] = runs_digest(all_runs, md).encode()
    md[b"lesion.curves_digest"] = curves_digest(all_curves).encode()
    all_curves = all_curves.replace_schema_metadata(md)
    all_runs = all_runs.replace_schema_metadata(md)
    _atomic_write(all_curves, path / CURVES)
    _atomic_write(all_runs, path / RUNS)
    return ResultSet(path, all_runs, all_curves, {**meta})


def refuse_link(path: Path) -> None:
    """Refuse a result-set path that is a symbolic link: writing through it would put files
    outside ``--out``, or overwrite whatever it points to."""
    try:
        st = os.lstat(path)
    except FileNotFoundError:
        return
    except OSError as err:
        raise ResultSetError(f"{path}: cannot inspect ({err.strerror or err})") from None
    if stat.S_ISLNK(st.st_mode):
        raise ResultSetError(f"{path}: is a symbolic link; lesion writes a result set only as a real folder "
                             "under --out (remove the link or choose another --out)")


class writer_lock:
    """Exclusive ``flock`` on ``<result set>/.lock`` for the whole of one ``lesion run``.

    A second process on the same result set waits for the first, then finds the runs already
    stored and computes only what is still missing: no run is computed or stored twice. The lock
    is released by the kernel when the holder dies, so a killed run never leaves a stale lock;
    the next holder removes the temporary files such a run may have left mid-write (in the
    result set and in its ``--fresh`` staging folder).

    The folder and the lock file are never followed through a symbolic link (``lstat``,
    ``O_NOFOLLOW``), and a lock file with other hard links is refused: the pid written into it
    must not land in another file."""

    def __init__(self, path: Path, on_wait=None, checkpoint=None):
        self.path, self.on_wait, self.checkpoint, self.fd = Path(path), on_wait, checkpoint, -1

    def __enter__(self):
        lock = self.path / ".lock"
        refuse_link(self.path)
        try:
            self.path.mkdir(parents=True, exist_ok=True)
            refuse_link(self.path)
            fd = os.open(lock, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW | os.O_CLOEXEC, 0o644)
        except OSError as err:
            if err.errno == errno.ELOOP:
                raise ResultSetError(f"{lock}: is a symbolic link; refusing to write through it "
                                     "(remove it: lesion creates its own lock file)") from None
            raise ResultSetError(f"{self.path}: cannot create the result set folder or its lock "
                                 f"({err.strerror or err}); choose a writable --out") from None
        self.fd = fd
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode) or st.st_nlink != 1:
            os.close(fd)
            raise ResultSetError(f"{lock}: is not a plain file of its own (hard-linked or special); refusing "
                                 "to write into it (remove it: lesion creates its own lock file)")
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            if self.on_wait:
                self.on_wait()
            self._wait(fd)
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, str(os.getpid()).encode(), 0)
            # Holding the lock, any temporary file here is left by a writer killed mid-write.
            for stale in [*self.path.glob(f".*{_TMP}"), *self.path.glob(f"{STAGING}/.*{_TMP}")]:
                stale.unlink(missing_ok=True)
        except OSError as err:
            self.__exit__()
            raise _cannot_write(lock, err) from None
        return self

    def _wait(self, fd: int) -> None:
        if self.checkpoint is None:
            fcntl.flock(fd, fcntl.LOCK_EX)
            return
        # Polled, so that ``checkpoint`` (Ctrl-C) can end the wait: a blocking flock is resumed
        # after a signal handler returns.
        while True:
            try:
                self.checkpoint()
            except BaseException:
                os.close(fd)
                raise
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                return
            except BlockingIOError:
                time.sleep(0.1)

    def __exit__(self, *exc):
        fcntl.flock(self.fd, fcntl.LOCK_UN)
        os.close(self.fd)
        return False
