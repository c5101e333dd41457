"""Scale-out: a study's groups executed on a Dask cluster, with the bits of one machine.

Contract: :class:`DaskExecutor` is an executor in the sense of :class:`runtime.execute.InProcess`
— ``run(groups, data, environment, progress)`` yields ``(group, GroupResult)`` as groups finish,
in any order — whose groups run as tasks of a ``dask.distributed`` scheduler:

- ``address`` is ``tcp://HOST:PORT`` (any address the scheduler listens on) of a running
  scheduler, or ``local:N`` for a ``LocalCluster`` of N worker processes on 127.0.0.1 (one thread
  each), started on :meth:`~DaskExecutor.open` and shut down on :meth:`~DaskExecutor.close`;
- on opening, every worker reports its environment (``client.run``); a cluster whose workers
  differ in their numerics fields (:func:`runtime.environment.numerics`) is refused with a
  :class:`ClusterError` naming the workers and the fields, because a run's bits are a function of
  (variant, seed, lane width, software, machine) and a mixed cluster could not be replayed on any
  one of them. Workers that differ from *this* process are only reported through ``on_warning``:
  the client computes nothing, but replaying those runs later needs the workers' environment;
- one group is one task, submitted unchanged (its recorded lane width and padding), so a run's
  bits do not depend on which worker, or how many, computed it. The task enables the compile
  cache (:mod:`runtime.programs`) on the worker and calls :func:`runtime.execute.execute_group` with the worker's own
  captured environment, which is what the run records;
- each distinct data set is scattered once (``broadcast=True``), not sent per task: it reaches
  each worker once, by the scatter or from a peer that holds it. Should every worker holding it
  die, the scheduler cancels the tasks that need it; those groups are resubmitted with the data
  sent again (a few times, then a :class:`ClusterError`);
- the first group of each compiled program goes out alone and the program's other groups follow
  when it is back: workers that share a compile cache (``local:N``, or one
  ``$LESION_CACHE_DIR`` on a shared disk) then compile each program once and load it elsewhere,
  instead of every worker compiling it at the same time;
- results stream back through ``distributed.as_completed``; each group is yielded at most once,
  so the caller (the single writer of the result set) never writes a group twice even when the
  scheduler recomputes a task whose worker died. A worker that joins later with other numerics is
  refused when its first result arrives. Leaving the loop early (an error, an interrupt) cancels
  the tasks still pending: a crash loses at most the groups in flight. ``progress`` hears of a
  group when it is back (a "group" event, then its last "epoch"): epochs are not streamed from
  the workers.

:attr:`DaskExecutor.compute_environment` is the workers' common environment; the runner compares
stored runs with it when it resumes.
"""

from __future__ import annotations

import re
import uuid
from typing import Callable

from compiler.errors import UserError
from runtime.environment import capture, differences, env_hash, single_threaded_xla
from runtime.execute import GroupResult, execute_group
from runtime.programs import enable_compile_cache

__all__ = ["ClusterError", "DaskExecutor", "parse_address", "worker_environment"]


class ClusterError(UserError):
    """A cluster that cannot be used as asked, with a one-line message a person can act on."""


_USAGE = ("expected tcp://HOST:PORT of a running Dask scheduler, or local:N for N worker processes "
          "on this machine (e.g. --cluster local:2)")


def parse_address(text: str) -> tuple[str, str | int]:
    """``("local", N)`` for ``local:N``; ``("remote", address)`` for a scheduler address.
    A bare ``HOST:PORT`` means ``tcp://HOST:PORT`` (the scheduler's default protocol)."""
    text = text.strip()
    if text == "local" or text.startswith("local:"):
        m = re.fullmatch(r"local:(\d+)", text)
        if not m or int(m.group(1)) < 1:
            raise ClusterError(f"--cluster {text!r}: {_USAGE}")
        return "local", int(m.group(1))
    if re.fullmatch(r"[a-z][a-z0-9+]*://\S+", text):
        return "remote", text
    if re.fullmatch(r"[^\s:/]+:\d+", text):
        return "remote", f"tcp://{text}"
    raise ClusterError(f"--cluster {text!r}: {_USAGE}")


# Times a group is submitted again after the scheduler cancelled it for lost data.
_ATTEMPTS = 3

_worker_env: dict | None = None


def worker_environment() -> dict:
    """This worker process's environment, captured once, after giving XLA:CPU its one-thread pool
    (as ``lesion run`` does: a run's bits do not depend on the worker's cores) and enabling its
    compile cache."""
    global _worker_env
    if _worker_env is None:
        single_threaded_xla()
        enable_compile_cache()
        _worker_env = capture()
    return _worker_env


def _execute_on_worker(group, dataset) -> GroupResult:
    return execute_group(group, dataset, worker_environment())


class DaskExecutor:
    """Runs each group as one task of a Dask scheduler (see the module docstring).

    ``connect_seconds`` bounds reaching the scheduler, ``worker_seconds`` the wait for its first
    worker. Use as a context manager, or call :meth:`open` and :meth:`close`."""

    def __init__(self, address: str, *, on_warning: Callable[[str], None] | None = None,
                 connect_seconds: float = 10.0, worker_seconds: float = 60.0):
        self.kind, self.target = parse_address(address)
        self.address = address
        self.on_warning = on_warning
        self.connect_seconds = connect_seconds
        self.worker_seconds = worker_seconds
        self.cluster = None
        self.client = None
        self._env: dict | None = None

    def __enter__(self):
        self.open()
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    @property
    def compute_environment(self) -> dict:
        """The environment every worker shares (the one the runs record)."""
        self.open()
        return self._env

    def open(self) -> None:
        if self.client is not None:
            return
        try:
            from distributed import Client, LocalCluster
        except ImportError:
            raise ClusterError(f"--cluster {self.address}: needs Dask's distributed scheduler, which is not "
                               "installed: pip install 'lesion[cluster]'") from None
        try:
            if self.kind == "local":
                # Loopback only, on free ports: nothing listens beyond this machine, and a second
                # study on the same machine does not collide with the first.
                self.cluster = LocalCluster(n_workers=self.target, processes=True, threads_per_worker=1,
                                            host="127.0.0.1", scheduler_port=0, dashboard_address=":0")
                self.client = Client(self.cluster)
            else:
                self.client = Client(self.target, timeout=self.connect_seconds)
        except (OSError, TimeoutError) as err:
            self.close()
            raise ClusterError(f"--cluster {self.address}: cannot reach the scheduler "
                               f"({str(err).splitlines()[0] if str(err) else type(err).__name__}); "
                               "is it running, and is the address right?") from None
        try:
            try:
                self.client.wait_for_workers(1, timeout=self.worker_seconds)
            except TimeoutError:
                raise ClusterError(f"--cluster {self.address}: no worker joined the scheduler within "
                                   f"{self.worker_seconds:.0f} s; start workers pointed at it") from None
            self._env = self._agreed_environment()
        except BaseException:
            self.close()
            raise

    def close(self) -> None:
        if self.client is not None:
            self.client.close()
        if self.cluster is not None:
            self.cluster.close()
        self.client = self.cluster = None

    def _agreed_environment(self) -> dict:
        envs = self.client.run(worker_environment)
        by_fp: dict[str, list[str]] = {}
        for worker, env in sorted(envs.items()):
            by_fp.setdefault(env_hash(env), []).append(worker)
        first = next(iter(by_fp.values()))[0]
        if len(by_fp) > 1:
            parts = []
            for workers in list(by_fp.values())[1:]:
                changes = differences(envs[first], envs[workers[0]])
                parts.append(f"{first} vs {', '.join(workers)}: {'; '.join(changes)}")
            raise ClusterError(f"--cluster {self.address}: the workers differ in software or machine "
                               f"({' | '.join(parts)}); runs from mixed environments could not be replayed "
                               "bit for bit: give every worker the same environment (requirements.lock, "
                               "same CPU kind, same XLA_FLAGS)")
        agreed = envs[first]
        here = differences(agreed, capture())
        if here and self.on_warning:
            self.on_warning(f"the cluster's workers differ from this machine ({'; '.join(here)}): the runs "
                            "record the workers' environment, and replaying them bit for bit needs it")
        return agreed

    def run(self, groups, data, environment, progress=None):
        """Yield ``(group, GroupResult)`` as the cluster finishes groups (``environment`` — this
        process's — is not used: each run records the environment of the worker that computed it)."""
        from distributed import KilledWorker, as_completed

        self.open()
        client = self.client
        agreed = env_hash(self._env)
        scattered: dict[int, object] = {}

        def scatter(d):
            # A Dataset is a tuple: wrapped in a list so it travels as one object.
            scattered[id(d)] = client.scatter([d], broadcast=True, hash=False)[0]

        for g in groups:
            if id(data[g.group_id]) not in scattered:
                scatter(data[g.group_id])
        tag = uuid.uuid4().hex[:8]
        pending = {}
        attempts: dict[str, int] = {}

        def submit(g):
            attempts[g.group_id] = attempts.get(g.group_id, 0) + 1
            fut = client.submit(_execute_on_worker, g, scattered[id(data[g.group_id])],
                                key=f"lesion-{g.group_id}-{tag}-{attempts[g.group_id]}", pure=False)
            pending[fut.key] = (g, fut)
            return fut

        # One program per (program key, width, data): its first group goes out alone, the rest when
        # it is back, so workers sharing a compile cache load that program instead of all
        # compiling it at once. Different programs still start side by side.
        waiting: dict[tuple, list] = {}
        for g in groups:
            waiting.setdefault((g.program, g.lane_width, id(data[g.group_id])), []).append(g)
        program_of = {}
        for program, members in waiting.items():
            program_of[submit(members.pop(0)).key] = program
        # This client's own loop: as_completed would otherwise track the futures on the loop of
        # whichever client the process made its default, and can wait forever.
        finished = as_completed([f for _, f in pending.values()], with_results=True, loop=client.loop)
        try:
            for fut, result in finished:
                if fut.key not in pending:
                    continue  # already yielded (a recomputed task): never hand a group over twice
                g, _ = pending.pop(fut.key)
                cancelled = fut.status == "cancelled"
                fut.release()  # the result is here now: the workers may drop it
                if cancelled:
                    # Not by us: the scheduler cancels a task whose scattered data was lost with
                    # every worker that held it. Send the data again and resubmit the group.
                    if attempts[g.group_id] >= _ATTEMPTS:
                        raise ClusterError(f"--cluster {self.address}: group {g.group_id} was cancelled "
                                           f"{_ATTEMPTS} times (its data kept being lost with its workers); "
                                           "the groups finished so far are stored: run again to resume")
                    scatter(data[g.group_id])
                    again = submit(g)
                    if fut.key in program_of:
                        program_of[again.key] = program_of.pop(fut.key)
                    finished.add(again)
                    continue
                for later in waiting.pop(program_of.pop(fut.key, None), []):
                    finished.add(submit(later))
                if env_hash(result.environment) != agreed:
                    changes = differences(self._env, result.environment)
                    raise ClusterError(f"--cluster {self.address}: group {g.group_id} was computed by a "
                                       f"worker ({result.environment.get('host')}) that joined with another "
                                       f"environment ({'; '.join(changes)}); its runs were not stored")
                if progress:
                    epochs = g.runs[0].variant.spec.training.epochs
                    progress("group", group=g, todo=len(g.runs))
                    progress("epoch", group=g, done=epochs, total=epochs)
                yield g, result
        except KilledWorker as err:
            raise ClusterError(f"--cluster {self.address}: a task's workers kept dying ({err}); the groups "
                               "finished so far are stored: run the same command again to resume") from None
        finally:
            if pending:
                client.cancel([f for _, f in pending.values()])
            for f in scattered.values():
                f.release()
