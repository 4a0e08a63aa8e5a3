"""Benchmark: what the demo's functional region (issue 16) costs, and what caching its rows saves.

Usage: python benchmarks/bench_demo_functional.py [REPEATS]

Prints, one figure per line (median over REPEATS, CPU seconds of this process and wall seconds):
- generating the demo study with the two runs of novel-vs-familiar (roikit.demo.make_study) and without them
  (generate.RUN_CONTRASTS emptied: no per-run maps written), and the difference;
- the functional pass of `roikit run` on the demo study: computed (the 64 per-run maps read, selections made) and
  taken from the extraction cache (a rerun: no map read), through roikit.study.cache._functional_with_cache.

Five engineers share two cores while this is written: report the figures with the load (printed by the script).
Data go to a temporary folder, removed afterwards.
"""

from __future__ import annotations

import os
import shutil
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

from roikit.demo import generate
from roikit.study import load_study
from roikit.study.cache import _functional_with_cache


def _timed(fn, repeats: int) -> tuple[float, float]:
    cpu, wall = [], []
    for _ in range(repeats):
        c, w = time.process_time(), time.perf_counter()
        fn()
        cpu.append(time.process_time() - c)
        wall.append(time.perf_counter() - w)
    return statistics.median(cpu), statistics.median(wall)


def main(repeats: int = 3) -> None:
    root = Path(tempfile.mkdtemp(prefix="roikit-bench-demo16-"))
    warnings.simplefilter("ignore")
    try:
        print(f"load average at start: {', '.join(f'{x:.2f}' for x in os.getloadavg())}")
        with_runs = _timed(lambda: generate.make_study(root / "a" / "study", overwrite=True), repeats)
        saved = generate.RUN_CONTRASTS
        generate.RUN_CONTRASTS = ()
        try:
            without = _timed(lambda: generate.make_study(root / "b" / "study", overwrite=True), repeats)
        finally:
            generate.RUN_CONTRASTS = saved
        print(f"make_study with the runs: {with_runs[0]:.2f} s CPU, {with_runs[1]:.2f} s wall")
        print(f"make_study without the runs: {without[0]:.2f} s CPU, {without[1]:.2f} s wall")
        print(f"the runs add to generation: {with_runs[0] - without[0]:.2f} s CPU, {with_runs[1] - without[1]:.2f} s wall")

        study = load_study(root / "a" / "study" / "study.toml")
        tested = ["novel-vs-familiar"]
        entry = {}

        def compute():
            entry["e"] = _functional_with_cache(study, tested, {}, None)[1]

        computed = _timed(compute, repeats)
        cached = _timed(lambda: _functional_with_cache(study, tested, {}, entry["e"]), repeats)
        n = len(study.run_maps)
        print(f"functional pass computed ({n} per-run maps + variance maps read): {computed[0]:.2f} s CPU, "
              f"{computed[1]:.2f} s wall ({1000 * computed[1] / n:.1f} ms per map)")
        print(f"functional pass from the cache (SHA-256 of {n} maps and their variance maps, no map read): "
              f"{cached[0]:.2f} s CPU, {cached[1]:.2f} s wall")
        print(f"load average at end: {', '.join(f'{x:.2f}' for x in os.getloadavg())}")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 3)
