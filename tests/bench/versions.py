"""lesion's per-epoch program at several revisions of the code, side by side, and whether their bits agree.

Usage (repository root)::

    .venv/bin/python tests/bench/versions.py REV [REV ...] [--spec SPEC] [--epochs 10] [--repeats 5]

Each ``REV`` is a git revision (``main``, ``HEAD~1``, a commit) or ``.`` for the working tree;
its ``compiler/`` and ``runtime/`` are copied to a temporary folder. For every repeat, each
revision in turn (interleaved, so a busy machine's slow phases spread over all of them) runs in
its own process with one XLA thread: the first group of ``SPEC`` (default: the realistic
workload) with ``training.epochs`` set to ``--epochs``, executed twice, the second (warm) timed.
It prints, per revision, the fastest epoch's wall milliseconds over all repeats (each epoch
is timed; on a busy machine the fastest is the one least disturbed by other jobs) and its ratio
to the first revision's, the median CPU milliseconds per epoch (the process's CPU time over the
warm execution) and its ratio, the median wall milliseconds, the compile seconds, and whether each revision's runs have the first one's bits (parameter digests
and every metric curve, bitwise; the metrics that differ are named with their largest relative
difference).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from bench import export_tree  # noqa: E402

CHILD = r"""
import json, sys, time
from pathlib import Path
from runtime.environment import single_threaded_xla
single_threaded_xla()
from compiler.loader import load_study
from runtime import environment
from runtime.execute import execute_group
from runtime.plan import plan
from runtime.runner import datasets_for
spec = Path(sys.argv[1])
study = load_study(spec)
group = plan(study.variants, study.spec.study.seed_list)[0]
data = datasets_for([group], spec.parent)[group.group_id]
env = environment.capture()
first = execute_group(group, data, env)
ticks = [(time.perf_counter(), time.process_time())]
cpu = time.process_time()
r = execute_group(group, data, env, on_epoch=lambda done, total: ticks.append((time.perf_counter(), time.process_time())))
cpu = time.process_time() - cpu
# The fastest epoch: the one least disturbed by other jobs of a busy machine.
best = min(b[0] - a[0] for a, b in zip(ticks[1:], ticks[2:]))
print(json.dumps({"compile": first.compile_seconds, "run": r.run_seconds, "cpu": cpu, "best": best,
                  "epochs": len(next(iter(r.lanes[0].curves.values()))),
                  "digests": [lane.param_hash for lane in r.lanes],
                  "curves": [{m: c.tolist() for m, c in lane.curves.items()} for lane in r.lanes]}))
"""


def compare(base: dict, other: dict) -> str:
    if base["digests"] != other["digests"]:
        params = "parameters differ"
    else:
        params = "parameters identical"
    differ = {}
    for a, b in zip(base["curves"], other["curves"]):
        for m in a:
            x, y = np.asarray(a[m], np.float32), np.asarray(b.get(m, []), np.float32)
            if x.shape != y.shape:
                differ[m] = float("inf")
            elif x.tobytes() != y.tobytes():
                rel = np.nanmax(np.abs(x - y) / np.maximum(np.abs(x), np.finfo(np.float32).tiny))
                differ[m] = max(differ.get(m, 0.0), float(rel))
    if not differ:
        return params + ", metrics identical"
    return params + "; metrics differ: " + ", ".join(f"{m} (≤ {v:.1e} rel.)" for m, v in sorted(differ.items()))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("revs", nargs="+")
    ap.add_argument("--spec", type=Path, default=HERE / "specs" / "realistic.toml")
    ap.add_argument("--epochs", type=int, default=10)
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="lesion-versions-"))
    try:
        text = args.spec.read_text()
        assert "\nepochs = " in text
        lines = [f"epochs = {args.epochs}" if line.startswith("epochs = ") else line for line in text.splitlines()]
        spec = tmp / args.spec.name
        spec.write_text("\n".join(lines) + "\n")
        trees = [export_tree(rev, tmp / f"rev{i}") for i, rev in enumerate(args.revs)]
        out: list[list[dict]] = [[] for _ in trees]
        for rep in range(args.repeats):
            for i, tree in enumerate(trees):
                proc = subprocess.run([sys.executable, "-c", CHILD, str(spec)], cwd=tree, capture_output=True,
                                      text=True, env={**os.environ, "PYTHONPATH": str(tree),
                                                      "LESION_CACHE_DIR": str(tmp / f"cache{i}")})
                if proc.returncode:
                    raise SystemExit(f"{args.revs[i]} failed:\n{proc.stderr[-3000:]}")
                r = json.loads(proc.stdout.strip().splitlines()[-1])
                out[i].append(r)
                print(f"[{rep + 1}/{args.repeats}] {args.revs[i]:12s} fastest {1e3 * r['best']:7.1f} ms"
                      f" {1e3 * r['cpu'] / r['epochs']:8.1f} CPU ms per epoch"
                      f" {1e3 * r['run'] / r['epochs']:8.1f} wall"
                      f"  load {os.getloadavg()[0]:.1f}", file=sys.stderr)
        base = statistics.median(r["cpu"] / r["epochs"] for r in out[0])
        base_best = min(r["best"] for r in out[0])
        print(f"{args.spec.name}, first group, {args.epochs} epochs, medians of {args.repeats} interleaved repeats")
        for rev, rs in zip(args.revs, out):
            ms = statistics.median(r["cpu"] / r["epochs"] for r in rs)
            wall = statistics.median(r["run"] / r["epochs"] for r in rs)
            comp = statistics.median(r["compile"] for r in rs)
            best = min(r["best"] for r in rs)
            print(f"  {rev:12s} fastest epoch {1e3 * best:6.1f} ms  {base_best / best:5.2f}× the first;  "
                  f"{1e3 * ms:6.1f} CPU ms per epoch  {base / ms:5.2f}×  (wall {1e3 * wall:6.1f} ms)"
                  f"  compile {comp:5.2f} s  "
                  + compare(out[0][0], rs[0]))
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
