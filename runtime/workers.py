"""Every core of this machine: a study's groups in worker processes, with one machine's bits.

Contract: :class:`LocalWorkers` is an executor in the sense of :class:`runtime.execute.InProcess`
— ``run(groups, data, environment, progress)`` yields ``(group, GroupResult)`` as groups finish,
in any order. ``workers`` processes (default: the CPUs this process may use) each execute one
group at a time with :func:`runtime.execute.execute_group`; the caller stays the single writer.

- Bits: a group is executed unchanged (its lane width and padding), and every worker, like
  ``lesion run`` itself, computes with a one-thread XLA:CPU pool
  (:func:`runtime.environment.single_threaded_xla`), so a run's bits do not depend on the number
  of workers, on which one ran it, nor on the cores the machine has. Each result records the
  environment of the worker that computed it.
- Why processes: the cores are used by groups side by side, not by splitting one group's small
  products (a run on this 2-core machine kept about 1.2 cores busy). Worker processes start with
  Python's ``spawn`` (a fork of a process running XLA's threads is unsafe) and pay their own
  ``import jax``; a study of one group, or ``workers=1``, runs in this process instead, where it
  also streams its epochs to ``progress``. Workers use the compile cache: the first group of a
  program compiles it, and groups of the same program that start later load it.
- ``progress`` hears of a worker's group as in this process: a "group" event when a worker starts
  it (its program is then being compiled or loaded), an "epoch" event as each epoch ends; the
  workers send them over a queue that the waiting loop empties. Several groups are under way at
  once, so every event names its group.
- Interruptions: workers ignore SIGINT from their first instruction on (a launcher, see
  :func:`_launcher`), so Ctrl-C reaches only this process, whose
  ``checkpoint()`` (as :class:`~runtime.execute.InProcess` takes it) is called while it waits for
  the workers; when it raises, or the loop is left early otherwise (an error), the groups not
  started are cancelled and the workers end, so what was yielded is all there is. Workers also
  end with this process, however it ends (Linux: a parent-death signal). A worker that dies
  (killed, out of memory) fails the study with :class:`WorkerError`; the groups already yielded
  are stored.
"""

from __future__ import annotations

import atexit
import ctypes
import multiprocessing
import shlex
import shutil
import signal
import sys
import tempfile
from multiprocessing import spawn
from pathlib import Path
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from typing import Callable

from runtime.environment import capture, single_threaded_xla, usable_cores
from compiler.errors import UserError
from runtime.execute import GroupResult, InProcess, execute_group
from runtime.programs import enable_compile_cache

__all__ = ["LocalWorkers", "WorkerError"]


class WorkerError(UserError):
    """A worker process ended without returning its group, with a one-line message."""


_worker_env: dict | None = None
_events = None   # the queue a worker tells the waiting process of its group's start and epochs


# How often a waiting run looks at its checkpoint (a Ctrl-C is answered within this).
_POLL_SECONDS = 0.2


def _start_worker(events) -> None:
    global _worker_env, _events
    if sys.platform.startswith("linux"):
        # A parent that ends at once (a second Ctrl-C exits without cleaning up) takes its
        # workers along instead of leaving them computing groups nobody will store.
        PR_SET_PDEATHSIG = 1
        ctypes.CDLL(None, use_errno=True).prctl(PR_SET_PDEATHSIG, signal.SIGTERM)
    single_threaded_xla()
    enable_compile_cache()
    _worker_env = capture()
    _events = events


def _launcher() -> Path:
    """An executable that starts this Python with SIGINT ignored, made once per process in a
    private temporary folder (removed at exit)."""
    global _launch_path
    if _launch_path is None or not _launch_path.exists():
        folder = Path(tempfile.mkdtemp(prefix="lesion-workers-"))
        atexit.register(shutil.rmtree, folder, True)
        path = folder / "python"
        path.write_text(f"#!/bin/sh\ntrap '' INT\nexec {shlex.quote(sys.executable)} \"$@\"\n")
        path.chmod(0o700)
        _launch_path = path
    return _launch_path


_launch_path: Path | None = None


def _execute(group, dataset) -> GroupResult:
    _events.put(("group", group.group_id, 0, 0))
    return execute_group(group, dataset, _worker_env,
                         on_epoch=lambda done, total: _events.put(("epoch", group.group_id, done, total)))


class LocalWorkers:
    """Runs groups in ``workers`` processes on this machine (see the module docstring)."""

    def __init__(self, workers: int | None = None, checkpoint: Callable[[], None] | None = None):
        self.workers = max(1, workers if workers is not None else usable_cores())
        self.checkpoint = checkpoint

    def run(self, groups, data, environment, progress=None):
        groups = list(groups)
        n = min(self.workers, len(groups))
        if n <= 1:
            yield from InProcess(checkpoint=self.checkpoint).run(groups, data, environment, progress)
            return
        check = self.checkpoint or (lambda: None)
        context = multiprocessing.get_context("spawn")
        events = context.Queue()
        pool = ProcessPoolExecutor(n, mp_context=context, initializer=_start_worker, initargs=(events,))
        told = _Relay(progress, {g.group_id: g for g in groups}, events)
        pending: dict = {}
        finished = False
        try:
            # A Ctrl-C at a terminal reaches the whole process group, and a worker still importing
            # jax would die of it: workers (started by submit) start through a launcher that
            # ignores SIGINT before Python does anything (an ignored signal stays ignored across
            # exec, and Python keeps it so). This process never ignores it, so a Ctrl-C pressed
            # while the workers start is not lost (it was, when this process ignored SIGINT to
            # pass that on).
            spawn.set_executable(str(_launcher()))
            try:
                for g in groups:
                    pending[pool.submit(_execute, g, data[g.group_id])] = g
            except (BrokenProcessPool, OSError):
                # A worker that died while others were still being started (a Ctrl-C before its
                # launcher ignored SIGINT) leaves the pool unusable.
                check()
                raise WorkerError("a worker process ended while the workers were starting; nothing was "
                                  "computed: run the same command again") from None
            finally:
                spawn.set_executable(sys.executable)
            while pending:
                check()
                done, _ = wait(pending, timeout=_POLL_SECONDS, return_when=FIRST_COMPLETED)
                told.relay()
                for fut in done:
                    g = pending.pop(fut)
                    try:
                        result = fut.result()
                    except BrokenProcessPool:
                        check()  # a worker ended by a Ctrl-C before its launcher ignored it
                        raise WorkerError(f"a worker process died while computing group {g.group_id} "
                                          "(killed, or out of memory?); the groups finished so far are "
                                          "stored: run the same command again to resume") from None
                    told.finished(g)
                    yield g, result
            finished = True
        finally:
            events.close()
            events.cancel_join_thread()
            if not finished:
                # Groups still running would finish unseen (their results are dropped), so the
                # workers end now instead of keeping the interrupted study alive.
                # ProcessPoolExecutor only gains terminate_workers() in Python 3.14.
                for process in list((pool._processes or {}).values()):
                    process.terminate()
            pool.shutdown(wait=True, cancel_futures=True)


class _Relay:
    """Hands the workers' events to ``progress`` in this process: a group's start and each epoch
    as they happen; a group whose result came back before its last events did gets them then."""

    def __init__(self, progress, groups: dict, events):
        self.progress, self.groups, self.events = progress, groups, events
        self.started: set[str] = set()
        self.epochs: dict[str, int] = {}

    def relay(self) -> None:
        import queue

        while True:
            try:
                kind, gid, done, total = self.events.get_nowait()
            except (queue.Empty, OSError, ValueError):
                return
            self._tell(kind, gid, done, total)

    def finished(self, group) -> None:
        self.relay()
        epochs = group.runs[0].variant.spec.training.epochs
        if group.group_id not in self.started:
            self._tell("group", group.group_id, 0, 0)
        if self.epochs.get(group.group_id, 0) < epochs:
            self._tell("epoch", group.group_id, epochs, epochs)

    def _tell(self, kind: str, gid: str, done: int, total: int) -> None:
        if gid not in self.groups or (kind == "epoch" and gid not in self.started):
            return
        group = self.groups[gid]
        if kind == "group":
            if gid in self.started:
                return
            self.started.add(gid)
            if self.progress:
                self.progress("group", group=group, todo=len(group.runs))
        elif done > self.epochs.get(gid, 0):
            self.epochs[gid] = done
            if self.progress:
                self.progress("epoch", group=group, done=done, total=total)
