"""The convolutional benchmark row: lesion against hand-written JAX and PyTorch loops on ``specs/conv.toml``.

Usage (from the repository root, on a quiet machine; see README.md)::

    .venv/bin/python tests/bench/conv_bench.py [--repeats 3] [--no-torch]

The same method as :mod:`bench`: every way a subprocess timed from spawn to exit with its peak
resident memory (:func:`bench.child`), the ways interleaved per repeat, medians reported —
``lesion_cold`` (empty ``LESION_CACHE_DIR``), ``lesion_warm`` (``--fresh`` on the filled cache),
``hand_jax_conv`` (:mod:`hand_jax_conv`), ``hand_torch_conv`` (:mod:`hand_torch_conv`, skipped with
a message when torch is not installed, as in :mod:`bench`). The table goes to stdout and to
``results/bench-conv-<UTC time>.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import tomllib
from datetime import datetime, timezone
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
import bench  # noqa: E402

SPEC = HERE / "specs" / "conv.toml"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--no-torch", action="store_true", help="skip the PyTorch baseline")
    args = ap.parse_args()
    hands = ["hand_jax_conv", "hand_torch_conv"] if bench.with_torch(args.no_torch) else ["hand_jax_conv"]
    raw = tomllib.loads(SPEC.read_text())
    (axis,) = raw["ablation"]["axis"]
    w = {"learning_rates": list(axis["values"])}
    rows: dict[str, list[dict]] = {way: [] for way in ["lesion_cold", "lesion_warm", *hands]}
    load = [os.getloadavg()]
    for _ in range(args.repeats):
        with tempfile.TemporaryDirectory() as tmp:
            cache, out = Path(tmp) / "cache", Path(tmp) / "out"
            rows["lesion_cold"].append(bench.lesion(SPEC, cache, out, False, w))
            rows["lesion_warm"].append(bench.lesion(SPEC, cache, out, True, w))
        for way in hands:
            rows[way].append(bench.baseline(f"{way}.py", SPEC))
        load.append(os.getloadavg())
    summary = {way: {"seconds": statistics.median(r["seconds"] for r in runs),
                     "rss_mib": statistics.median(r["rss_mib"] for r in runs),
                     "mean_final_val_accuracy": statistics.fmean(statistics.fmean(r["final_val_accuracy"])
                                                                 for r in runs)}
               for way, runs in rows.items()}
    hand = summary["hand_jax_conv"]["seconds"]
    print(f"{'way':<15} {'seconds':>8} {'÷ hand':>7} {'RSS MiB':>8} {'val acc':>8}")
    for way, s in summary.items():
        print(f"{way:<15} {s['seconds']:8.1f} {s['seconds'] / hand:7.2f} {s['rss_mib']:8.0f} "
              f"{s['mean_final_val_accuracy']:8.3f}")
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    report = {"spec": str(SPEC.relative_to(bench.ROOT)), "repeats": args.repeats, "machine": bench.machine(),
              "load_average": load, "summary": summary, "runs": rows}
    path = HERE / "results" / f"bench-conv-{stamp}.json"
    path.write_text(json.dumps(report, indent=1))
    print(f"wrote {path.relative_to(bench.ROOT)}")


if __name__ == "__main__":
    main()
