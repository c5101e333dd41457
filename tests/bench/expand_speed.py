"""Time to load and expand a study of 10,000 variants (a 100 × 100 grid of two knobs), spec text
to validated variants with their hashes: what `lesion check` and `lesion run` pay before anything
else. Run by hand from the repository root on a quiet machine:

    .venv/bin/python tests/bench/expand_speed.py [--repeats N]

Prints each repeat and the median; the target is under 1 s.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from compiler.loader import load_text  # noqa: E402


def spec_text(side: int = 100) -> str:
    lrs = [round(0.001 * (i + 1), 6) for i in range(side)]
    momenta = [round(0.0099 * i, 6) for i in range(side)]
    return ('[study]\nname = "expand-speed"\nseeds = 3\n[ablation]\nmode = "grid"\n'
            f'[[ablation.axis]]\nkey = "optimizer.learning_rate"\nvalues = {lrs}\n'
            f'[[ablation.axis]]\nkey = "optimizer.momentum"\nvalues = {momenta}\n')


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    text = spec_text()
    times = []
    for i in range(args.repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        study = load_text(text, "expand-speed.toml")
        times.append(time.perf_counter() - t0)
        # CPU time too: on a shared machine the wall time mostly measures the neighbours.
        print(f"repeat {i + 1}: {len(study.variants)} variants in {times[-1]:.2f} s "
              f"({time.process_time() - c0:.2f} s of CPU)")
    print(f"median {statistics.median(times):.2f} s for {len(study.variants)} variants "
          f"(load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores)")


if __name__ == "__main__":
    main()
