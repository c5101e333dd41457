"""Groups on a Dask cluster (two worker processes on loopback) against the same study in process.

The reference is the in-process run: a run's bits are a function of (variant, seed, lane width,
software, machine) — measured: the same run vmapped 16, 4 or 1 wide differs from the 7th
significant digit on, but not with its neighbours' values or its lane position (README,
"Reproducibility") — so the same groups at the same widths on workers of the same environment must give the same bits, whoever computes them.
"""

import json
import os
import signal
import threading
import time

import pytest
from distributed import Client, LocalCluster
from typer.testing import CliRunner

import runtime.cluster
from compiler.loader import load_study
from runtime import environment
from runtime.cli import app
from runtime.cluster import ClusterError, DaskExecutor, parse_address
from runtime.replay import replay
from runtime.runner import run_study
from runtime.store import open_result_set


@pytest.fixture(scope="module")
def cluster():
    # Loopback only, one thread per worker process: the set-up `--cluster local:2` makes.
    with LocalCluster(n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1",
                      dashboard_address=":0") as lc, Client(lc) as client:
        yield lc, client


@pytest.fixture(scope="module")
def on_cluster(cluster, tmp_path_factory, tiny_spec):
    lc, _ = cluster
    tmp = tmp_path_factory.mktemp("cluster")
    loaded = load_study(tiny_spec(tmp, "spread", seeds=3, epochs=4, rates="[0.03, 0.3]"))
    here = run_study(loaded, tmp / "here", lanes=2)
    with DaskExecutor(lc.scheduler_address) as ex:
        there = run_study(loaded, tmp / "there", lanes=2, executor=ex)
    return loaded, open_result_set(here.path), open_result_set(there.path), there


def test_cluster_result_set_is_bit_identical_to_in_process(on_cluster, same_bits):
    loaded, here, there, report = on_cluster
    assert report.computed == 6 and report.groups == 3
    assert there.runs.num_rows == 6 and there.curves.num_rows == 6 * 4
    same_bits(here, there)


def test_runs_record_the_workers_environment(on_cluster, cluster):
    _, client = cluster
    _, _, there, _ = on_cluster
    workers = client.run(runtime.cluster.worker_environment)
    recorded = {environment.fingerprint(json.loads(e))
                for e in there.runs.column("environment").to_pylist()}
    assert recorded == {environment.fingerprint(e) for e in workers.values()}
    assert set(there.runs.column("env_fingerprint").to_pylist()) == recorded


def test_resume_on_the_cluster_computes_nothing(on_cluster, cluster):
    lc, _ = cluster
    loaded, _, there, _ = on_cluster
    with DaskExecutor(lc.scheduler_address) as ex:
        again = run_study(loaded, there.path.parent, lanes=2, executor=ex)
    assert again.computed == 0 and again.reused == 6


def test_replay_of_worker_runs_succeeds_here(on_cluster):
    _, _, there, _ = on_cluster
    report = replay(there.path)
    assert len(report.rows) == 6 and report.identical, [r.as_dict() for r in report.rows]
    assert report.environment_changes == []


def _set_worker_env(client, workers, change):
    def patch():
        runtime.cluster._worker_env = None
        runtime.cluster._worker_env = {**runtime.cluster.worker_environment(), **change}
    client.run(patch, workers=workers)


def _reset_worker_env(client):
    client.run(lambda: setattr(runtime.cluster, "_worker_env", None))


def test_workers_with_different_software_are_refused(cluster):
    lc, client = cluster
    first = sorted(client.scheduler_info()["workers"])[0]
    _set_worker_env(client, [first], {"jax": "0.0.1"})
    try:
        with pytest.raises(ClusterError) as err:
            DaskExecutor(lc.scheduler_address).open()
    finally:
        _reset_worker_env(client)
    msg = str(err.value)
    assert "\n" not in msg and first in msg and "jax: 0.0.1" in msg


def test_workers_unlike_this_machine_are_only_a_warning(cluster):
    lc, client = cluster
    _set_worker_env(client, None, {"xla_flags": "--xla_cpu_max_isa=AVX"})
    said = []
    try:
        with DaskExecutor(lc.scheduler_address, on_warning=said.append) as ex:
            assert ex.compute_environment["xla_flags"] == "--xla_cpu_max_isa=AVX"
    finally:
        _reset_worker_env(client)
    assert len(said) == 1 and "xla_flags" in said[0] and "replay" in said[0]


def test_resume_compares_with_the_workers_environment_not_this_machines(cluster, on_cluster, tmp_path):
    # workers unlike the client: the runs they stored are theirs, and a second invocation on the
    # same workers must find them instead of recomputing everything
    lc, client = cluster
    loaded = on_cluster[0]
    _set_worker_env(client, None, {"xla_flags": "--xla_cpu_max_isa=AVX"})
    try:
        with DaskExecutor(lc.scheduler_address) as ex:
            first = run_study(loaded, tmp_path, lanes=2, executor=ex)
        with DaskExecutor(lc.scheduler_address) as ex:
            again = run_study(loaded, tmp_path, lanes=2, executor=ex)
    finally:
        _reset_worker_env(client)
    assert first.computed == 6 and again.computed == 0 and again.reused == 6
    recorded = open_result_set(first.path).runs.column("environment").to_pylist()
    assert all(json.loads(e)["xla_flags"] == "--xla_cpu_max_isa=AVX" for e in recorded)


@pytest.mark.parametrize("text,expected", [
    ("local:3", ("local", 3)),
    ("tcp://127.0.0.1:8786", ("remote", "tcp://127.0.0.1:8786")),
    ("localhost:8786", ("remote", "tcp://localhost:8786")),
])
def test_cluster_addresses(text, expected):
    assert parse_address(text) == expected


@pytest.mark.parametrize("text", ["local", "local:0", "local:two", "nowhere"])
def test_bad_cluster_address_exits_2_with_one_line(text, tmp_path, tiny_spec):
    out = CliRunner().invoke(app, ["run", str(tiny_spec(tmp_path)), "--cluster", text, "--quiet",
                                   "--out", str(tmp_path / "r")])
    assert out.exit_code == 2, out.output
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and "local:N" in lines[0] and "tcp://HOST:PORT" in lines[0]
    assert not (tmp_path / "r").exists()


def _free_loopback_port() -> int:
    import socket
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_unreachable_scheduler_is_a_one_line_cluster_error():
    ex = DaskExecutor(f"tcp://127.0.0.1:{_free_loopback_port()}", connect_seconds=1)
    with pytest.raises(ClusterError) as err:
        ex.open()
    assert "cannot reach the scheduler" in str(err.value) and "\n" not in str(err.value)
    assert ex.client is None


def test_a_scheduler_without_workers_is_a_cluster_error():
    with LocalCluster(n_workers=0, processes=True, host="127.0.0.1", dashboard_address=":0") as lc:
        with pytest.raises(ClusterError, match="no worker joined"):
            DaskExecutor(lc.scheduler_address, worker_seconds=0.5).open()


def test_cli_local_cluster_matches_in_process(tmp_path, tiny_spec, on_cluster, same_bits):
    # `--cluster local:2` starts its own loopback cluster; same study, same widths, same bits
    _, here, _, _ = on_cluster
    spec = tiny_spec(tmp_path, "spread", seeds=3, epochs=4, rates="[0.03, 0.3]")
    out = CliRunner().invoke(app, ["run", str(spec), "--cluster", "local:2", "--lanes", "2", "--quiet",
                                   "--out", str(tmp_path / "r")])
    assert out.exit_code == 0, out.output
    path = out.stdout.strip().splitlines()[-1]
    same_bits(here, open_result_set(path))
    again = CliRunner().invoke(app, ["replay", path])
    assert again.exit_code == 0 and "all 6 replayed run(s) identical" in again.stdout, again.output


def _kill_a_busy_worker(client, killed: dict, stop: threading.Event):
    while not stop.is_set():
        for worker, keys in client.processing().items():
            if any(str(k).startswith("lesion-") for k in keys):
                pid = client.run(os.getpid, workers=[worker])[worker]
                os.kill(pid, signal.SIGKILL)
                killed.update(worker=worker, pid=pid, keys=list(keys))
                return
        time.sleep(0.005)


def test_a_worker_killed_mid_study_loses_nothing_and_writes_nothing_twice(cluster, tmp_path, tiny_spec, same_bits):
    # Dask recomputes the tasks of a lost worker elsewhere (distributed scheduler docs, "Resilience")
    lc, client = cluster
    loaded = load_study(tiny_spec(tmp_path, "killed", seeds=3, epochs=12, rates="[0.03, 0.3]"))
    here = open_result_set(run_study(loaded, tmp_path / "here", lanes=1).path)
    killed, stop = {}, threading.Event()
    stored = []
    killer = threading.Thread(target=_kill_a_busy_worker, args=(client, killed, stop), daemon=True)
    with DaskExecutor(lc.scheduler_address) as ex:
        killer.start()
        try:
            report = run_study(loaded, tmp_path / "there", lanes=1, executor=ex,
                               progress=lambda event, **info: stored.append(info["group"].group_id)
                               if event == "stored" else None)
        finally:
            stop.set()
            killer.join()
    assert killed, "no worker was seen busy with a group"
    assert killed["pid"] not in client.run(os.getpid).values()
    assert report.computed == 6 and sorted(stored) == sorted(set(stored)) and len(stored) == 6
    there = open_result_set(report.path)
    ids = there.runs.column("run_id").to_pylist()
    assert len(ids) == len(set(ids)) == 6
    assert there.curves.num_rows == 6 * 12
    same_bits(here, there)


def test_until_decided_on_the_cluster_matches_in_process(cluster, tmp_path, decided_spec, same_bits):
    # `run --until-decided --cluster`: each look's groups are tasks; same looks, seeds, decisions, bits
    from runtime.runner import run_until_decided
    from runtime.sequential import Rule

    lc, _ = cluster
    loaded = load_study(decided_spec(tmp_path))
    rule = Rule(margin=0.01, max_seeds=12, round=3)
    here, seq_here = run_until_decided(loaded, tmp_path / "here", rule)
    with DaskExecutor(lc.scheduler_address) as ex:
        there, seq_there = run_until_decided(loaded, tmp_path / "there", rule, executor=ex)
    assert seq_there.procedure.looks == seq_here.procedure.looks
    assert seq_there.procedure.settled == seq_here.procedure.settled
    same_bits(open_result_set(here[-1].path), open_result_set(there[-1].path))
