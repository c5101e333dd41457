"""The speed benchmark: lesion against the training loops a practitioner writes, side by side.

Usage (from the repository root; see tests/bench/README.md)::

    .venv/bin/python tests/bench/bench.py [--repeats 3] [--workloads small medium] [--no-torch]

For each workload of ``specs/`` (4 learning rates × 4 or 16 seeds) and each repeat, in
interleaved order (every way once, then again), it times as subprocesses, wall clock from spawn
to exit, with peak resident memory from GNU time (``%M``):

- ``lesion_cold``: ``lesion run`` with a fresh, empty ``LESION_CACHE_DIR``;
- ``lesion_warm``: the same command again on that cache, with ``--fresh`` (one worker process
  per CPU, the default);
- ``lesion_warm_1w``: the same with ``--workers 1`` (everything in one process);
- ``hand_jax``: :mod:`hand_jax` (jitted step, Python loop over batches, runs one after another);
- ``hand_torch``: :mod:`hand_torch` (PyTorch CPU, same model and loop), if torch is installed;
- ``import_jax``: ``python -c "import jax"``, the start-up every JAX-based way pays (a floor).

It then reports medians, the ratios lesion ÷ each other way, the study's matmul FLOPs divided by
this machine's float32 matmul throughput (a 2048² ``jnp.dot``, measured before and after) as the
physical limit, lesion's fraction of that limit (execution only: the result set's
``run_seconds`` of the one-worker run, i.e. per core), the throughput of the workload's hidden-layer product batched over its lanes
as XLA:CPU runs it (what lesion's execution fraction cannot exceed), each way's final training loss per learning rate, and the peak memory of a
64-run small study. The table goes to stdout and, with the machine's description, to
``results/bench-<UTC time>.json``.
"""

from __future__ import annotations

import argparse
import importlib.metadata
import importlib.util
import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(HERE))
import workload as wl  # noqa: E402

PYTHON = sys.executable
LESION = str(Path(PYTHON).with_name("lesion"))
TIME = "/usr/bin/time"  # GNU time, for the peak RSS of each way (%M, KiB)


def child(cmd: list[str], env: dict | None = None, cwd: Path = ROOT) -> dict:
    """Run a subprocess to completion: wall seconds, peak RSS (MiB) and its stdout."""
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err, \
            tempfile.NamedTemporaryFile("r") as rss:
        # GNU time starts the command: a forked child's peak RSS counts the pages it shared with
        # its parent at fork, and this process holds jax; time's own footprint is a few MiB.
        t0 = time.perf_counter()
        proc = subprocess.run([TIME, "-f", "%M", "-o", rss.name, *cmd], stdout=out, stderr=err,
                              env={**os.environ, **(env or {})}, cwd=cwd)
        seconds = time.perf_counter() - t0
        out.seek(0), err.seek(0)
        text = out.read().decode()
        if proc.returncode != 0:
            raise SystemExit(f"{' '.join(cmd)} failed (exit {proc.returncode}):\n{err.read().decode()[-3000:]}")
        rss_kib = int(rss.read().split()[-1])
    return {"seconds": seconds, "rss_mib": rss_kib / 1024, "stdout": text}


def result_set_numbers(path: str, w: dict) -> dict:
    import pyarrow.parquet as pq

    from runtime.migrate import key_column

    runs = pq.read_table(Path(path) / "runs.parquet").to_pydict()
    groups = dict(zip(runs["group_id"], runs["compile_seconds"]))
    order = sorted(range(len(runs["run_id"])),
                   key=lambda i: (w["learning_rates"].index(runs[key_column("optimizer.learning_rate")][i]), runs["seed"][i]))
    return {"execution_seconds": float(sum(runs["run_seconds"])),
            "compile_seconds": float(sum(groups.values())),
            "final_train_loss": [float(runs["final_train_divergence"][i]) for i in order],
            "final_val_accuracy": [float(runs["final_val_accuracy"][i]) for i in order]}


def lesion(spec: Path, cache: Path, out: Path, fresh: bool, w: dict, extra: tuple[str, ...] = (),
           tree: Path | None = None) -> dict:
    """``lesion run``; with ``tree``, the lesion whose ``compiler/`` and ``runtime/`` are there
    (``python -m runtime.cli`` started in that folder, which comes first on ``sys.path``)."""
    command = [LESION] if tree is None else [PYTHON, "-m", "runtime.cli"]
    cmd = [*command, "run", str(spec), "--results", str(out), "--quiet", *extra] + (["--fresh"] if fresh else [])
    r = child(cmd, {"LESION_CACHE_DIR": str(cache)}, cwd=tree or ROOT)
    r.update(result_set_numbers(r.pop("stdout").strip().splitlines()[-1], w))
    return r


def baseline(script: str, spec: Path) -> dict:
    r = child([PYTHON, str(HERE / script), str(spec)])
    r.update(json.loads(r.pop("stdout").strip().splitlines()[-1]))
    return r


def export_tree(rev: str, into: Path) -> Path:
    """``compiler/`` and ``runtime/`` of git revision ``rev`` (``.``: the working tree) in folder
    ``into``."""
    into.mkdir(parents=True)
    if rev == ".":
        for d in ("compiler", "runtime"):
            shutil.copytree(ROOT / d, into / d, ignore=shutil.ignore_patterns("__pycache__"))
        return into
    tar = subprocess.run(["git", "archive", rev, "compiler", "runtime"], cwd=ROOT, check=True,
                         capture_output=True).stdout
    subprocess.run(["tar", "-x", "-C", str(into)], input=tar, check=True)
    return into


def one_thread_rates(names: list[str]) -> dict:
    """Rates of one core: the 2048² matmul and each workload's batched hidden-layer product, in
    a child process whose XLA:CPU pool has one thread, as each of lesion's computing processes
    has (``runtime.environment.single_threaded_xla``)."""
    code = ("import sys, json; sys.path[:0] = [sys.argv[1], sys.argv[2]]\n"
            "from runtime.environment import single_threaded_xla; single_threaded_xla()\n"
            "import bench, workload as wl\n"
            "print(json.dumps({'matmul': bench.matmul_throughput(), 'batched': {n: bench.batched_matmul_throughput("
            "wl.workload(bench.HERE / 'specs' / f'{n}.toml')) for n in sys.argv[3:]}}))")
    out = subprocess.run([PYTHON, "-c", code, str(ROOT), str(HERE), *names], check=True, capture_output=True,
                         text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def matmul_throughput(n: int = 2048, reps: int = 5) -> float:
    """Best float32 GFLOP/s of an n×n matmul over ``reps`` timed batches of three."""
    import jax
    import jax.numpy as jnp

    a = jax.random.normal(jax.random.key(0), (n, n), jnp.float32)
    f = jax.jit(lambda a: a @ a)
    f(a).block_until_ready()
    best = float("inf")
    for _ in range(reps):
        t0 = time.perf_counter()
        for _ in range(3):
            r = f(a)
        r.block_until_ready()
        best = min(best, (time.perf_counter() - t0) / 3)
    return 2 * n ** 3 / best / 1e9


def batched_matmul_throughput(w: dict, reps: int = 5) -> float:
    """Best float32 GFLOP/s of the workload's widest hidden-layer product, batched over the lanes
    as a vmapped study computes it: ``[lanes, batch, h] @ [lanes, h, h]`` at lesion's default
    lane width (the study's runs, at most 32)."""
    import jax
    import jax.numpy as jnp

    h, b = max(w["widths"][1:-1]), w["batch_size"]
    lanes = lane_width(w)
    x = jax.random.normal(jax.random.key(0), (lanes, b, h), jnp.float32)
    m = jax.random.normal(jax.random.key(1), (lanes, h, h), jnp.float32)
    f = jax.jit(lambda x, m: jnp.einsum("lbi,lij->lbj", x, m))
    f(x, m).block_until_ready()
    best = float("inf")
    for _ in range(reps):
        t0 = time.perf_counter()
        for _ in range(50):
            r = f(x, m)
        r.block_until_ready()
        best = min(best, (time.perf_counter() - t0) / 50)
    return 2 * lanes * b * h * h / best / 1e9


def lane_width(w: dict) -> int:
    """lesion's default lane width for a benchmark study (one program key: all its runs, at most 32)."""
    return min(len(w["learning_rates"]) * len(w["seeds"]), 32)


def machine() -> dict:
    model = platform.processor()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    versions = {}
    for dist in ("jax", "jaxlib", "optax", "numpy", "torch", "lesion"):
        try:
            versions[dist] = importlib.metadata.version(dist)
        except importlib.metadata.PackageNotFoundError:
            versions[dist] = None
    return {"cpu": model, "cores": os.cpu_count(), "platform": platform.platform(),
            "python": platform.python_version(), "versions": versions,
            "xla_flags": os.environ.get("XLA_FLAGS", "")}


def per_lr_median(values: list[float], w: dict) -> list[float]:
    k = len(w["seeds"])
    return [float(np.median(values[i * k:(i + 1) * k])) for i in range(len(w["learning_rates"]))]


def big_study_rss(spec: Path, tmp: Path) -> dict:
    """Peak RSS of the small workload with 16 seeds (64 runs), cold cache."""
    text = spec.read_text().replace("seeds = 4\n", "seeds = 16\n").replace('name = "bench-small"',
                                                                          'name = "bench-small-64"')
    assert "seeds = 16" in text
    path = tmp / "small64.toml"
    path.write_text(text)
    r = child([LESION, "run", str(path), "--results", str(tmp / "out64"), "--quiet"],
              {"LESION_CACHE_DIR": str(tmp / "cache64")})
    return {"runs": 64, "seconds": r["seconds"], "rss_mib": r["rss_mib"]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--workloads", nargs="+", default=["small", "medium", "realistic"])
    ap.add_argument("--no-torch", action="store_true", help="skip the PyTorch baseline")
    ap.add_argument("--before", metavar="REV", help="also time lesion at git revision REV (before_cold, "
                    "before_warm, before_warm_1w), interleaved with the others")
    args = ap.parse_args()

    ways = ["lesion_cold", "lesion_warm", "lesion_warm_1w", "hand_jax", "import_jax"]
    if args.before:
        ways += ["before_cold", "before_warm", "before_warm_1w"]
    if args.no_torch:
        print("PyTorch baseline skipped (--no-torch)", file=sys.stderr)
    elif importlib.util.find_spec("torch") is None:
        print("PyTorch baseline skipped: torch is not installed "
              "(.venv/bin/pip install torch==2.13.0, or pip install -e '.[bench]')", file=sys.stderr)
    else:
        ways.append("hand_torch")

    started = datetime.now(timezone.utc)
    load_before = os.getloadavg()
    gflops = [matmul_throughput()]
    one_core = [one_thread_rates(args.workloads)]
    specs = {name: HERE / "specs" / f"{name}.toml" for name in args.workloads}
    works = {name: wl.workload(p) for name, p in specs.items()}
    samples: dict[str, dict[str, list[dict]]] = {n: {way: [] for way in ways} for n in specs}
    tmp = Path(tempfile.mkdtemp(prefix="lesion-bench-"))
    try:
        before = export_tree(args.before, tmp / "before") if args.before else None
        for rep in range(args.repeats):
            for name, spec in specs.items():
                w = works[name]
                cache, out = tmp / f"cache-{name}-{rep}", tmp / f"out-{name}-{rep}"
                for way in ways:
                    if way == "lesion_cold":
                        r = lesion(spec, cache, out, False, w)
                    elif way == "lesion_warm":
                        r = lesion(spec, cache, out, True, w)
                    elif way == "lesion_warm_1w":
                        r = lesion(spec, cache, out, True, w, ("--workers", "1"))
                    elif way.startswith("before_"):
                        fresh, extra = way != "before_cold", ("--workers", "1") if way.endswith("_1w") else ()
                        r = lesion(spec, tmp / f"before-{cache.name}", tmp / f"before-{out.name}", fresh, w, extra,
                                   tree=before)
                    elif way == "import_jax":
                        r = child([PYTHON, "-c", "import jax"])
                        r.pop("stdout")
                    else:
                        r = baseline(f"{way}.py", spec)
                    samples[name][way].append(r)
                    print(f"[{rep + 1}/{args.repeats}] {name:6s} {way:11s} {r['seconds']:7.2f} s "
                          f"{r['rss_mib']:6.0f} MiB  load {os.getloadavg()[0]:.1f}", file=sys.stderr)
        big = big_study_rss(specs["small"], tmp) if "small" in specs else None
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    gflops.append(matmul_throughput())
    one_core.append(one_thread_rates(args.workloads))
    peak, core = max(gflops), max(r["matmul"] for r in one_core)

    report = {"started": started.isoformat(timespec="seconds"), "machine": machine(),
              "load_average_before": load_before, "load_average_after": os.getloadavg(),
              "repeats": args.repeats, "matmul_gflops": gflops, "matmul_gflops_one_thread": one_core,
              "before": args.before, "workloads": {}, "small_64_runs": big}
    lines = []
    for name, w in works.items():
        med = {way: {k: statistics.median(s[k] for s in runs) for k in ("seconds", "rss_mib")}
               for way, runs in samples[name].items()}
        cold, warm = med["lesion_cold"]["seconds"], med["lesion_warm"]["seconds"]
        # One process with one XLA thread: the execution's rate per core, against one core's.
        exec_s = statistics.median(s["execution_seconds"] for s in samples[name]["lesion_warm_1w"])
        compile_s = statistics.median(s["compile_seconds"] for s in samples[name]["lesion_cold"])
        flops = wl.matmul_flops(w)
        limit = flops["total"] / (peak * 1e9)
        core_limit = flops["total"] / (core * 1e9)
        batched = max(r["batched"][name] for r in one_core)
        entry = {"workload": w, "flops": flops, "physical_limit_seconds": limit,
                 "one_core_limit_seconds": core_limit,
                 "lesion_execution_seconds": exec_s, "lesion_cold_compile_seconds": compile_s,
                 "lesion_fraction_of_one_core_execution": core_limit / exec_s,
                 "lesion_cold_fraction_of_limit_end_to_end": limit / cold,
                 "batched_hidden_matmul_gflops_one_thread": batched, "ways": {}}
        if args.before:
            before_s = statistics.median(s["execution_seconds"] for s in samples[name]["before_warm_1w"])
            entry["before_execution_seconds"] = before_s
            entry["before_fraction_of_one_core_execution"] = core_limit / before_s
        lines.append(f"\n{name}: {len(w['learning_rates']) * len(w['seeds'])} runs, widths {w['widths']}, "
                     f"{w['n_train']} training rows, batch {w['batch_size']}, {w['epochs']} epochs; "
                     f"{flops['total'] / 1e9:.1f} GFLOP")
        lines.append(f"  {'way':12s} {'seconds':>8s} {'peak MiB':>9s} {'cold÷this':>10s} {'warm÷this':>10s}  "
                     f"final train loss per learning rate {w['learning_rates']} (median over seeds)")
        for way, m in med.items():
            last = samples[name][way][-1]
            losses = per_lr_median(last["final_train_loss"], w) if "final_train_loss" in last else []
            entry["ways"][way] = {**m, "all_seconds": [s["seconds"] for s in samples[name][way]],
                                  "lesion_cold_over_this": cold / m["seconds"],
                                  "lesion_warm_over_this": warm / m["seconds"],
                                  "final_train_loss_per_lr": losses}
            lines.append(f"  {way:12s} {m['seconds']:8.2f} {m['rss_mib']:9.0f} {cold / m['seconds']:10.3f} "
                         f"{warm / m['seconds']:10.3f}  " + (" ".join(f"{v:.4f}" for v in losses) or "(trains nothing)"))
        lines.append(f"  {os.cpu_count()} workers (the default) against 1: "
                     f"{med['lesion_warm_1w']['seconds'] / warm:.2f}× (warm, end to end)")
        lines.append(f"  physical limit {limit:.3f} s ({peak:.0f} GFLOP/s, every core); end to end cold "
                     f"{100 * limit / cold:.1f} %, warm {100 * limit / warm:.1f} % of it; cold compile {compile_s:.2f} s")
        lines.append(f"  one core: limit {core_limit:.3f} s ({core:.0f} GFLOP/s, one XLA thread); lesion execution "
                     f"(--workers 1) {exec_s:.2f} s = {100 * core_limit / exec_s:.0f} % of it"
                     + (f"; {args.before}: {before_s:.2f} s = {100 * core_limit / before_s:.0f} %, "
                        f"this ÷ before {exec_s / before_s:.3f}" if args.before else ""))
        lines.append(f"  hidden-layer product batched over {lane_width(w)} lanes, one thread: {batched:.0f} GFLOP/s = "
                     f"{100 * batched / core:.0f} % of one core's 2048² rate (a ceiling for lesion's execution fraction)")
        report["workloads"][name] = entry
    if big:
        lines.append(f"\nsmall study with 64 runs: {big['seconds']:.1f} s, peak RSS {big['rss_mib']:.0f} MiB")
    singles = ", ".join(f"{r['matmul']:.0f}" for r in one_core)
    lines.append(f"\nmatmul {', '.join(f'{g:.0f}' for g in gflops)} GFLOP/s (one thread: {singles}); load average before "
                 f"{load_before[0]:.1f}, after {os.getloadavg()[0]:.1f} ({os.cpu_count()} cores)")
    text = "\n".join(lines)
    print(text)
    report["table"] = text
    results = HERE / "results"
    results.mkdir(exist_ok=True)
    path = results / f"bench-{started.strftime('%Y%m%dT%H%M%SZ')}.json"
    path.write_text(json.dumps(report, indent=2) + "\n")
    print(f"\nsaved {path.relative_to(ROOT)}")


if __name__ == "__main__":
    main()
