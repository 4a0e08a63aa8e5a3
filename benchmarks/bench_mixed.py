"""Mixed-design benchmark: crossed participants x towns on a demo-like data set, all regions.

Synthesises a region values table shaped like the demo (32 participants in two age groups, the six towns
town1..town6 as stimuli, the demo's 11 regions) with a random participant intercept, a random town intercept
and residual noise, then times

    run_design(values, "mixed", formula="value ~ group", random="1", crossed="contrast", participants=...)

over all regions (profiled REML, several optimisers, Satterthwaite df), with n_jobs=1 and n_jobs=2. Prints
medians and writes benchmarks/results/bench_mixed.json.

    python benchmarks/bench_mixed.py [--repeats 5]
"""

from __future__ import annotations

import argparse
import json
import platform
import statistics
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from roikit.stats import run_design

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"

try:  # the demo's region names when the demo module is present
    from roikit.demo.generate import REGION_NAMES
except Exception:  # pragma: no cover - fallback keeps the benchmark standalone
    REGION_NAMES = tuple(f"{side} {name}" for name in ("hippocampus", "parahippocampal gyrus", "caudate",
                                                       "retrosplenial cortex", "primary visual cortex")
                         for side in ("left", "right")) + ("medial prefrontal cortex",)
# the demo's atlas regions, its "prior peak" sphere, padded to the 11 regions of the demo-like set of the brief
REGION_NAMES = tuple(REGION_NAMES) + ("prior peak",)
REGION_NAMES = REGION_NAMES + tuple(f"extra region {k}" for k in range(1, 12 - len(REGION_NAMES)))


def make_values(seed: int = 0, n: int = 32, n_towns: int = 6, regions=REGION_NAMES):
    rng = np.random.default_rng(seed)
    ids = [f"sub-{i + 1:02d}" for i in range(n)]
    group = np.where(np.arange(n) < n // 2, "younger", "older")
    towns = [f"town{j + 1}" for j in range(n_towns)]
    rows = []
    for region in regions:
        u = rng.normal(0, 0.5, n)
        t = rng.normal(0, 0.3, n_towns)
        for i in range(n):
            for j in range(n_towns):
                rows.append((ids[i], towns[j], region, 0.4 + 0.2 * (group[i] == "older") + u[i] + t[j]
                             + rng.normal(0, 0.6), 120, 118))
    values = pd.DataFrame(rows, columns=["participant_id", "contrast", "region", "value", "n_voxels", "n_valid"])
    participants = pd.DataFrame({"participant_id": ids, "group": group})
    return values, participants


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args(argv)
    values, participants = make_values()
    out = {"platform": platform.platform(), "n_regions": len(REGION_NAMES), "n_participants": 32, "n_towns": 6,
           "n_observations_per_region": 32 * 6, "repeats": args.repeats}
    for n_jobs in (1, 2):
        times = []
        for _ in range(args.repeats + 1):  # first run warms imports and caches, not counted
            t0 = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                res = run_design(values, "mixed", formula="value ~ group", random="1", crossed="contrast",
                                 participants=participants, n_jobs=n_jobs)
            times.append(time.perf_counter() - t0)
        times = times[1:]
        out[f"n_jobs={n_jobs}"] = {"median_s": statistics.median(times), "min_s": min(times), "all_s": times,
                                   "converged": bool(res["converged"].all()),
                                   "boundary_regions": int(res.drop_duplicates("region")["boundary"].sum())}
        print(f"mixed, crossed participant + town, {len(REGION_NAMES)} regions x 192 observations, n_jobs={n_jobs}: "
              f"median {statistics.median(times):.3f} s (min {min(times):.3f} s, {args.repeats} repeats); "
              f"{statistics.median(times) / len(REGION_NAMES) * 1e3:.1f} ms per region")
    RESULTS.mkdir(exist_ok=True)
    (RESULTS / "bench_mixed.json").write_text(json.dumps(out, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
