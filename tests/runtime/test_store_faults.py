"""The store's own fault paths, in this process: a writer interrupted inside a write, a waiting
second writer, temporary files a killed writer left, an unwritable folder."""

from __future__ import annotations

import fcntl
import os
import stat
import threading
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from runtime import store
from runtime.store import ResultSetError, open_result_set, writer_lock

META = {"spec_source": "", "spec_path": "", "canonical_json": "{}", "study_hash": "0" * 64, "version": "0",
        "environment": {}}


def _tables(ids):
    runs = pa.table({"run_id": ids, "variant_label": ["v"] * len(ids), "seed": list(range(len(ids))),
                     "status": ["ok"] * len(ids)})
    curves = pa.table({"run_id": ids, "epoch": [1] * len(ids)})
    return runs, curves


def test_ctrl_c_inside_a_write_leaves_the_previous_file_and_no_temporary(tmp_path, monkeypatch):
    first = store.write_results(tmp_path, META, *_tables(["a"]), previous=None)
    before = (tmp_path / store.RUNS).read_bytes()
    real = pq.write_table

    def interrupted(table, where, **kw):
        real(table.slice(0, 0), where, **kw)  # some bytes reach the temporary file, then Ctrl-C
        raise KeyboardInterrupt

    monkeypatch.setattr(pq, "write_table", interrupted)
    with pytest.raises(KeyboardInterrupt):
        store.write_results(tmp_path, META, *_tables(["b"]), previous=first)
    monkeypatch.undo()
    assert sorted(p.name for p in tmp_path.iterdir()) == [store.CURVES, store.RUNS]
    assert (tmp_path / store.RUNS).read_bytes() == before
    assert open_result_set(tmp_path / store.RUNS).runs.column("run_id").to_pylist() == ["a"]


def test_a_second_writer_waits_for_the_first(tmp_path):
    holder = open(tmp_path / ".lock", "a+")
    fcntl.flock(holder, fcntl.LOCK_EX)
    waited = []

    def release():
        waited.append(True)
        threading.Timer(0.05, lambda: fcntl.flock(holder, fcntl.LOCK_UN)).start()

    with writer_lock(tmp_path, on_wait=release):
        assert waited == [True]
        assert (tmp_path / ".lock").read_text().isdigit()
    holder.close()


def test_the_lock_holder_removes_only_temporary_files_a_killed_writer_left(tmp_path):
    stale = tmp_path / f".runs.parquet.k1l2{store._TMP}"
    stale.write_bytes(b"PAR1 half a file")
    mine = tmp_path / ".notes.tmp"
    mine.write_text("a user's file")
    with writer_lock(tmp_path):
        pass
    assert not stale.exists() and mine.exists()


def test_a_folder_that_cannot_be_created_is_a_result_set_error():
    # /sys refuses new entries even to root.
    with pytest.raises(ResultSetError, match=r"^/sys/lesion-x/y: cannot create the result set folder"):
        with writer_lock(Path("/sys/lesion-x/y")):
            pass


@pytest.mark.parametrize("umask, mode", [(0o022, 0o644), (0o077, 0o600), (0o002, 0o664)])
def test_result_files_get_the_users_umask(tmp_path, umask, mode):
    # POSIX open(2): a new file's mode is the requested mode (0666 for data files) less the umask.
    old = os.umask(umask)
    try:
        store.write_results(tmp_path, META, *_tables(["a"]), previous=None)
    finally:
        os.umask(old)
    assert {p.name: stat.S_IMODE(p.stat().st_mode) for p in (tmp_path / store.RUNS, tmp_path / store.CURVES)} == {
        store.RUNS: mode, store.CURVES: mode}

def test_a_disk_that_refuses_the_locks_bytes_is_a_result_set_error(tmp_path):
    # A file-size limit of 0 bytes makes the kernel refuse the pid written into the lock (EFBIG),
    # as a full disk refuses it (ENOSPC): the same OSError path of the lock file.
    import resource
    import signal

    soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
    old = signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # else the kernel's SIGXFSZ ends pytest
    resource.setrlimit(resource.RLIMIT_FSIZE, (0, hard))
    try:
        with pytest.raises(ResultSetError, match=r"\.lock: cannot write \(File too large\)"):
            with writer_lock(tmp_path / "new-set"):
                pass
    finally:
        resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
        signal.signal(signal.SIGXFSZ, old)


@pytest.mark.parametrize("link, refusal", [
    ("symlink_to", r"\.lock: is a symbolic link"),
    ("hardlink_to", r"\.lock: is not a plain file of its own"),
])
def test_a_lock_linked_to_another_file_is_refused_and_that_file_untouched(tmp_path, link, refusal):
    victim = tmp_path / "precious.txt"
    victim.write_text("keep me")
    folder = tmp_path / "set"
    folder.mkdir()
    getattr(folder / ".lock", link)(victim)
    with pytest.raises(ResultSetError, match=refusal):
        with writer_lock(folder):
            pass
    assert victim.read_text() == "keep me"


def test_a_result_folder_that_is_a_symbolic_link_is_refused(tmp_path):
    outside = tmp_path / "outside"
    outside.mkdir()
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "set").symlink_to(outside, target_is_directory=True)
    with pytest.raises(ResultSetError, match=r"out/set: is a symbolic link"):
        with writer_lock(tmp_path / "out" / "set"):
            pass
    with pytest.raises(ResultSetError, match=r"out/set: is a symbolic link"):
        store.write_results(tmp_path / "out" / "set", META, *_tables(["a"]), previous=None)
    assert list(outside.iterdir()) == []
