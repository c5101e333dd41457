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
