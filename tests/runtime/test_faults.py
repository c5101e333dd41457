"""Faults while ``lesion run`` writes a result set: SIGKILL at random moments, Ctrl-C, two
writers at once, a full disk and an unwritable folder. Nothing stored is lost, nothing is stored
twice, nothing is left torn, and a finished run is never recomputed.

The study has 12 runs written one group of one lane at a time (``--lanes 1``), so a kill can land
between, before or inside any of 12 writes."""

from __future__ import annotations

import errno
import os
import random
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from compiler.loader import load_study
from runtime.cli import app
from runtime.store import CURVES, RUNS, STAGING, open_result_set

ROOT = Path(__file__).parents[2]
RUNS_TOTAL, EPOCHS = 12, 3


def _spec(tmp: Path, tiny_spec) -> Path:
    return tiny_spec(tmp, "faults", seeds=4, epochs=EPOCHS, rates="[0.03, 0.1, 0.3]")


def _start(spec: Path, out: Path, *extra: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "runtime.cli", "run", str(spec), "--results", str(out),
                             "--lanes", "1", *extra],
                            cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _state(folder: Path) -> dict[str, tuple[str, str]]:
    """run id -> (finished_at, param_hash) of what is stored; asserts the set is whole."""
    if not (folder / RUNS).exists():
        # Curves are written before runs: a kill between the two leaves the first group's curves
        # alone, which must still be whole (every run's every epoch) and are then not yet stored.
        if (folder / CURVES).exists():
            orphan_ids = pq.read_table(folder / CURVES).column("run_id").to_pylist()
            assert all(orphan_ids.count(r) == EPOCHS for r in orphan_ids), "a torn curves file"
        return {}
    rs = open_result_set(folder)  # raises on a torn or mixed-up file
    ids = rs.runs.column("run_id").to_pylist()
    assert len(ids) == len(set(ids)), "a run stored twice"
    curve_ids = rs.curves.column("run_id").to_pylist()
    assert all(curve_ids.count(r) == EPOCHS for r in ids), "a run without its full curve"
    return dict(zip(ids, zip(rs.runs.column("finished_at").to_pylist(), rs.runs.column("param_hash").to_pylist())))


def _writes_seen(folder: Path, last: float) -> tuple[bool, float]:
    try:
        m = (folder / RUNS).stat().st_mtime_ns
    except FileNotFoundError:
        return False, last
    return m != last, m


@pytest.fixture(scope="module")
def reference(tmp_path_factory, tiny_spec):
    """One uninterrupted run of the study: what every interrupted one must end up equal to."""
    tmp = tmp_path_factory.mktemp("ref")
    spec = _spec(tmp, tiny_spec)
    proc = _start(spec, tmp / "out", "--quiet")
    out, err = proc.communicate(timeout=600)
    assert proc.returncode == 0, err
    folder = Path(out.strip().splitlines()[-1])
    state = _state(folder)
    assert len(state) == RUNS_TOTAL
    return spec, {rid: digest for rid, (_, digest) in state.items()}


def _kill_loop(spec: Path, out: Path, reference: dict, kills: int, rng: random.Random) -> dict:
    """SIGKILL `lesion run` at random moments, `kills` times, re-running after each; then let it
    finish. Returns the figures."""
    folder = out / load_study(spec).result_set
    figures = {"kills": 0, "lost": 0, "recomputed": 0, "torn": 0}
    while figures["kills"] < kills:
        before = _state(folder)
        if len(before) == RUNS_TOTAL:  # finished: start over to keep killing
            for p in (folder / RUNS, folder / CURVES):
                p.unlink()
            before = {}
        proc = _start(spec, out, "--quiet")
        # Wait for a random number of further writes (0 = kill before the first), then a random
        # fraction of a group's time, so kills land before, between and inside writes.
        wanted, seen, last = rng.randint(0, 3), 0, 0.0
        _, last = _writes_seen(folder, last)
        deadline = time.monotonic() + 300
        while seen < wanted and proc.poll() is None and time.monotonic() < deadline:
            changed, last = _writes_seen(folder, last)
            seen += changed
            time.sleep(0.002)
        time.sleep(rng.uniform(0, 0.05))
        proc.send_signal(signal.SIGKILL)
        proc.communicate()
        figures["kills"] += 1
        try:
            after = _state(folder)
        except Exception:  # noqa: BLE001 -- a torn set cannot be resumed from: the caller's check of the figures fails
            figures["torn"] += 1
            return figures
        figures["lost"] += sum(1 for r in before if r not in after)
        figures["recomputed"] += sum(1 for r, v in before.items() if r in after and after[r] != v)
    before = _state(folder)
    proc = _start(spec, out, "--quiet")
    _, err = proc.communicate(timeout=600)
    assert proc.returncode == 0, err
    final = _state(folder)
    figures["lost"] += sum(1 for r in before if r not in final)
    figures["recomputed"] += sum(1 for r, v in before.items() if final[r] != v)
    assert len(final) == RUNS_TOTAL
    # Bits equal an uninterrupted run's: resuming changed no lane width and no number.
    assert {r: d for r, (_, d) in final.items()} == reference
    assert not list(folder.glob(".*tmp")), "a temporary file was left behind"
    return figures


def test_sigkill_at_random_moments_loses_and_recomputes_nothing(tmp_path, reference):
    spec, digests = reference
    figures = _kill_loop(spec, tmp_path / "out", digests, kills=3, rng=random.Random(11))
    assert figures == {"kills": 3, "lost": 0, "recomputed": 0, "torn": 0}


@pytest.mark.slow
def test_sigkill_long(tmp_path, reference):
    spec, digests = reference
    figures = _kill_loop(spec, tmp_path / "out", digests, kills=50, rng=random.Random(2024))
    print(f"\nsigkill: {figures}")
    assert figures == {"kills": 50, "lost": 0, "recomputed": 0, "torn": 0}


def test_ctrl_c_keeps_finished_groups_and_says_how_to_resume(tmp_path, reference):
    spec, digests = reference
    out = tmp_path / "out"
    folder = out / load_study(spec).result_set
    proc = _start(spec, out, "--quiet")
    last = 0.0
    deadline = time.monotonic() + 300
    while proc.poll() is None and time.monotonic() < deadline:
        changed, last = _writes_seen(folder, last)
        if changed:
            break
        time.sleep(0.002)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    kept = _state(folder)
    if proc.returncode == 0:  # the run finished before the signal landed: nothing to check
        pytest.skip("the run finished before Ctrl-C")
    assert proc.returncode == 130, err
    assert "Traceback" not in err
    assert f"interrupted: finished groups are stored in {folder}" in err
    assert "run the same command again" in err
    assert 1 <= len(kept) < RUNS_TOTAL
    again = subprocess.run([sys.executable, "-m", "runtime.cli", "run", str(spec), "--results", str(out), "--lanes", "1"],
                           cwd=ROOT, capture_output=True, text=True, timeout=600)
    assert again.returncode == 0, again.stderr
    assert f"{RUNS_TOTAL} runs: {RUNS_TOTAL - len(kept)} computed, {len(kept)} already stored" in again.stderr
    final = _state(folder)
    assert all(final[r] == v for r, v in kept.items())
    assert {r: d for r, (_, d) in final.items()} == digests


def test_two_writers_at_once_store_every_run_once(tmp_path, reference):
    spec, digests = reference
    out = tmp_path / "out"
    procs = [_start(spec, out) for _ in range(2)]
    results = [p.communicate(timeout=600) for p in procs]
    assert [p.returncode for p in procs] == [0, 0], [e for _, e in results]
    computed = []
    for _, err in results:
        line = next(x for x in err.splitlines() if x.startswith(f"{RUNS_TOTAL} runs: "))
        computed.append(int(line.split(": ")[1].split()[0]))
    # One computed everything while the other waited on the lock, then found it all stored.
    assert sorted(computed) == [0, RUNS_TOTAL]
    assert any("waiting: another 'lesion run' is writing this result set" in e for _, e in results)
    final = _state(out / load_study(spec).result_set)
    assert {r: d for r, (_, d) in final.items()} == digests


# ── a full disk, an unwritable folder ───────────────────────────────────────────────────────────
@pytest.fixture(scope="module")
def stored_once(tmp_path_factory, reference):
    """A complete result set (copied from the reference run's numbers by a fresh in-process run)."""
    spec, _ = reference
    out = tmp_path_factory.mktemp("stored")
    result = CliRunner().invoke(app, ["run", str(spec), "--results", str(out), "--lanes", "1", "--quiet"])
    assert result.exit_code == 0, result.stderr
    return spec, Path(result.stdout.strip().splitlines()[-1])


@pytest.fixture()
def stored(tmp_path, stored_once):
    """A copy of it for each test, which tries to damage it (computed once: it was the same set each time)."""
    spec, computed = stored_once
    folder = shutil.copytree(computed, tmp_path / "out" / computed.name)
    return spec, folder, {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()}


def _enospc(*args, **kwargs):
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


@pytest.mark.parametrize("where", ["os.fsync", "os.replace", "pyarrow.parquet.write_table", "tempfile.mkstemp"])
def test_a_full_disk_is_a_clean_error_and_the_previous_set_is_intact(stored, monkeypatch, where):
    spec, folder, before = stored
    module, name = where.rsplit(".", 1)
    monkeypatch.setattr(sys.modules[module] if module in sys.modules else __import__(module), name, _enospc)
    result = CliRunner().invoke(app, ["run", str(spec), "--results", str(folder.parent), "--lanes", "1", "--quiet", "--fresh"])
    monkeypatch.undo()
    assert result.exit_code == 2, (result.exception, result.stderr)
    (line,) = result.stderr.splitlines()
    assert "No space left on device" in line and "keeps its previous complete state" in line, line
    after = {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()}
    assert after.keys() == before.keys(), "a temporary file was left behind"
    assert after[RUNS] == before[RUNS]
    assert len(_state(folder)) == RUNS_TOTAL


def test_an_unwritable_out_folder_is_a_clean_error(reference):
    spec, _ = reference
    # /sys refuses new folders even to root (EPERM), where a chmod would not stop root.
    out = subprocess.run([sys.executable, "-m", "runtime.cli", "run", str(spec), "--results", "/sys/lesion-results",
                          "--quiet"], cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert out.returncode == 2 and "Traceback" not in out.stderr, out.stderr
    (line,) = out.stderr.splitlines()
    assert line.startswith("/sys/lesion-results/") and "choose a writable --results" in line, line


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_a_read_only_result_set_is_a_clean_error(stored):
    spec, folder, before = stored
    folder.chmod(0o555)
    try:
        result = CliRunner().invoke(app, ["run", str(spec), "--results", str(folder.parent), "--quiet", "--fresh"])
    finally:
        folder.chmod(0o755)
    assert result.exit_code == 2 and "cannot" in result.stderr
    assert (folder / RUNS).read_bytes() == before[RUNS]


# ── Ctrl-C at a terminal ─────────────────────────────────────────────────────────────────────────
def _at_terminal(spec: Path, out: Path, *extra: str, python: tuple = ()) -> tuple[int, int]:
    """`lesion run` on a pseudo-terminal of its own (its session and foreground process group):
    returns (pid, master fd). Typing Ctrl-C is writing the INTR character (0x03) to the master;
    the terminal's line discipline turns it into SIGINT to the foreground group (POSIX termios,
    ISIG), as at an interactive shell."""
    import pty
    import warnings
    with warnings.catch_warnings():
        # jax warns of forking a threaded process; the child only changes folder and signal
        # disposition (system calls, no lock another thread could hold) before it execs
        warnings.simplefilter("ignore", RuntimeWarning)
        pid, fd = pty.fork()
    if pid == 0:  # the child: pty.fork made the terminal its controlling one
        os.chdir(ROOT)
        signal.signal(signal.SIGINT, signal.SIG_DFL)  # a foreground job, even if pytest runs in the background
        os.execv(sys.executable, [sys.executable, *python, "-m", "runtime.cli", "run", str(spec), "--results", str(out),
                                  "--lanes", "1", *extra])
    return pid, fd


def _drain(fd: int, sink: bytearray, seconds: float) -> None:
    import select
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        ready, _, _ = select.select([fd], [], [], max(0.0, min(0.02, end - time.monotonic())))
        if ready:
            try:
                chunk = os.read(fd, 65536)
            except OSError:  # EIO: the child closed the terminal
                return
            if not chunk:
                return
            sink += chunk


def _interrupt_at(spec: Path, out: Path, moment: str, rng: random.Random, *extra: str,
                  after: float | None = None) -> tuple[int | None, str, float]:
    """Press Ctrl-C once at `moment` (import, compile, execution, write; for import, `after`
    seconds past the interpreter's start-up, else a random moment of the next second); returns
    (exit status or None when a signal ended it, everything it printed, seconds from Ctrl-C to exit)."""
    folder = out / load_study(spec).result_set
    if "--fresh" in extra:  # its groups are written beside the stored set until the study is complete
        folder = folder / STAGING
    # -X importtime reports each import as it ends: the interpreter's own start-up (before the
    # `site` module) is Python's, not lesion's, to handle.
    pid, fd = _at_terminal(spec, out, *extra, python=("-X", "importtime") if moment == "import" else ())
    text = bytearray()
    deadline = time.monotonic() + 300
    if moment == "import":  # while lesion imports typer, pyarrow, pydantic, jax
        while b"| site\r\n" not in text and time.monotonic() < deadline:
            _drain(fd, text, 0.002)
        _drain(fd, text, rng.uniform(0.0, 1.0) if after is None else after)
    elif moment == "compile":  # the plan is printed just before the first compile
        while b"runs to compute" not in text and time.monotonic() < deadline:
            _drain(fd, text, 0.01)
        _drain(fd, text, rng.uniform(0.0, 0.3))
    else:
        last = (folder / RUNS).stat().st_mtime_ns if (folder / RUNS).exists() else 0
        while time.monotonic() < deadline:
            _drain(fd, text, 0.001)
            if moment == "write" and list(folder.glob(".*parquet-tmp")):
                break
            if moment == "execution" and (folder / RUNS).exists() and (folder / RUNS).stat().st_mtime_ns != last:
                _drain(fd, text, rng.uniform(0.0, 0.1))
                break
    os.write(fd, b"\x03")
    pressed = time.monotonic()
    while True:
        done, status = os.waitpid(pid, os.WNOHANG)
        if done:
            break
        _drain(fd, text, 0.05)
        assert time.monotonic() - pressed < 120, "Ctrl-C did not stop the run"
    took = time.monotonic() - pressed
    _drain(fd, text, 0.2)
    os.close(fd)
    return (os.WEXITSTATUS(status) if os.WIFEXITED(status) else None), text.decode(errors="replace"), took


def _clean_interrupt(code, text: str, folder: Path, fresh: bool = False) -> dict:
    assert code == 130, (code, text[-2000:])
    for bad in ("Traceback", "Segmentation fault", "Exception ignored", "Aborted"):
        assert bad not in text, text[-2000:]
    assert "interrupted" in text
    if fresh:
        assert "run the same command again" not in text
    return _state(folder)


@pytest.mark.parametrize("moment", ["import", "compile", "execution", "write"])
def test_ctrl_c_at_a_terminal_stops_cleanly_with_130_at_any_moment(tmp_path, reference, moment):
    spec, digests = reference
    out = tmp_path / "out"
    code, text, took = _interrupt_at(spec, out, moment, random.Random(moment))
    kept = _clean_interrupt(code, text, out / load_study(spec).result_set)
    assert took < 30, f"Ctrl-C took {took:.1f} s to stop the run"
    assert {r: d for r, (_, d) in kept.items()} == {r: digests[r] for r in kept}


def test_ctrl_c_anywhere_in_start_up_exits_130_without_a_traceback(tmp_path, reference):
    """One Ctrl-C in each tenth of the first second after the interpreter's start-up: imports,
    typer building the commands (it imports pydantic then), the command line parsed, `run` begun.
    A KeyboardInterrupt raised there once killed the interpreter by SIGINT, exited 130 without a
    word, or was lost in an importlib callback ("Exception ignored") and the run went on: 15 of 60
    such tries failed, so ten of them all passing by luck is about one chance in twenty."""
    spec, digests = reference
    rng = random.Random(130)
    for tenth in range(10):
        out = tmp_path / f"out{tenth}"
        code, text, _ = _interrupt_at(spec, out, "import", rng, after=(tenth + rng.random()) / 10)
        kept = _clean_interrupt(code, text, out / load_study(spec).result_set)
        assert {r: d for r, (_, d) in kept.items()} == {r: digests[r] for r in kept}


def test_ctrl_c_during_fresh_keeps_the_stored_set_and_says_what_happens(tmp_path, reference):
    spec, digests = reference
    out = tmp_path / "out"
    folder = out / load_study(spec).result_set
    first = subprocess.run([sys.executable, "-m", "runtime.cli", "run", str(spec), "--results", str(out), "--lanes", "1",
                            "--quiet"], cwd=ROOT, capture_output=True, text=True, timeout=600)
    assert first.returncode == 0, first.stderr
    before = _state(folder)
    code, text, _ = _interrupt_at(spec, out, "execution", random.Random(3), "--fresh")
    assert _clean_interrupt(code, text, folder, fresh=True) == before
    assert "is unchanged" in " ".join(text.split())
