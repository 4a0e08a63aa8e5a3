"""Mixed-design benchmark: many regions with a random intercept against statsmodels, random slopes, crossed towns.

Part 1 (the headline): 400 regions x 30 participants x 4 contrasts, ``value ~ contrast`` with a random participant
intercept. roikit fits all regions together (batched profiled REML on the analytic derivative, Satterthwaite df
from participant-level sums); the reference is a loop of statsmodels ``MixedLM(...).fit(reml=True)`` over the same
regions. Prints both times, the ratio, and the REML criterion of both fits per region (ours minus statsmodels'
-2 log-likelihood: never positive beyond rounding means ours is never worse).

Part 2: random intercept and slope (``value ~ load``, ``random = "1 + load"``, 4 load levels as contrasts joined from
a contrasts table), roikit's region-by-region fit against a statsmodels loop on fewer regions.

Part 3 (below): crossed participants x towns on a demo-like data set, all regions.

Synthesises a region values table shaped like the demo (32 participants in two age groups, the six towns
town1..town6 as stimuli, the demo's 11 regions) with a random participant intercept, a random town intercept
and residual noise, then times

    run_design(values, "mixed", formula="value ~ group", random="1", crossed="contrast", participants=...)

over all regions (profiled REML, several optimisers, Satterthwaite df), with n_jobs=1 and n_jobs=2. Prints
medians and writes benchmarks/results/bench_mixed.json.

    python benchmarks/bench_mixed.py [--repeats 5] [--regions 400] [--slope-regions 40]
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


def make_intercept_values(seed: int = 1, n_regions: int = 400, n: int = 30, n_contrasts: int = 4,
                          slope_sd: float = 0.0):
    """Regions x participants x contrasts with a random intercept (SD varying by region, some at zero) and,
    with ``slope_sd``, a random slope of the contrasts' load level."""
    rng = np.random.default_rng(seed)
    ids = np.array([f"sub-{i + 1:02d}" for i in range(n)])
    contrasts = np.array([f"load{j + 1}" for j in range(n_contrasts)])
    load = np.arange(1, n_contrasts + 1, dtype=float)
    sd_u = rng.choice([0.0, 0.1, 0.4, 1.0], size=n_regions)
    u = rng.normal(0, 1, (n_regions, n, 1)) * sd_u[:, None, None]
    s = rng.normal(0, slope_sd, (n_regions, n, 1))
    y = 0.3 + u + (0.2 + s) * load[None, None, :] + rng.normal(0, 0.8, (n_regions, n, n_contrasts))
    values = pd.DataFrame({
        "participant_id": np.tile(np.repeat(ids, n_contrasts), n_regions),
        "contrast": np.tile(contrasts, n_regions * n),
        "region": np.repeat([f"region {r + 1:03d}" for r in range(n_regions)], n * n_contrasts),
        "value": y.ravel(), "n_voxels": 100, "n_valid": 100})
    table = pd.DataFrame({"contrast": contrasts, "load": load})
    return values, table


def _statsmodels_loop(values, formula, re_formula=None):
    """-2 log restricted likelihood of statsmodels' fit per region, and the relative covariance it estimated."""
    import statsmodels.formula.api as smf

    crit, rel_cov = {}, {}
    for region, sub in values.groupby("region", sort=False):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit = smf.mixedlm(formula, sub, groups="participant_id", re_formula=re_formula).fit(reml=True)
        crit[region] = -2 * fit.llf
        rel_cov[region] = np.asarray(fit.cov_re, dtype=float) / fit.scale
    return crit, rel_cov


def _criterion_at(values, region, formula_columns, rel_cov):
    """roikit's REML criterion (the one it minimises) evaluated at statsmodels' estimates for one region."""
    from roikit.stats.mixed import RandomFactor, _build_Z, _CrossProducts

    sub = values[values["region"] == region]
    y = sub["value"].to_numpy(float)
    X = np.column_stack([np.ones(len(y))] + [sub[c].to_numpy(float) for c in formula_columns])
    codes = pd.factorize(sub["participant_id"])[0]
    Z = X[:, : rel_cov.shape[0]]
    f = [RandomFactor("participant", codes, Z, ["Intercept"] + list(formula_columns)[: rel_cov.shape[0] - 1])]
    # Cholesky factor of the relative covariance, column by column (tolerates a singular covariance)
    r = rel_cov.shape[0]
    T = np.zeros((r, r))
    for j in range(r):
        d = rel_cov[j, j] - T[j, :j] @ T[j, :j]
        T[j, j] = np.sqrt(max(d, 0.0))
        for i in range(j + 1, r):
            T[i, j] = (rel_cov[i, j] - T[i, :j] @ T[j, :j]) / T[j, j] if T[j, j] > 0 else 0.0
    theta = [T[i, j] for j in range(r) for i in range(j, r)]
    return _CrossProducts(y, X, _build_Z(f, len(y)), f, True)(np.asarray(theta))


def bench_intercept(n_regions: int, repeats: int) -> dict:
    values, _ = make_intercept_values(n_regions=n_regions)
    times = []
    for _ in range(repeats + 1):
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = run_design(values, "mixed", formula="value ~ contrast", random="1")
        times.append(time.perf_counter() - t0)
    ours = statistics.median(times[1:])
    t0 = time.perf_counter()
    ref, _ = _statsmodels_loop(values, "value ~ contrast")
    theirs = time.perf_counter() - t0
    dev = res.drop_duplicates("region").set_index("region")["deviance"]
    diff = np.array([dev[r] - ref[r] for r in dev.index])
    out = {"regions": n_regions, "roikit_s": ours, "statsmodels_loop_s": theirs, "ratio": theirs / ours,
           "criterion_ours_minus_statsmodels_max": float(diff.max()),
           "criterion_ours_minus_statsmodels_min": float(diff.min()),
           "regions_ours_better_by_1e-6": int((diff < -1e-6).sum()),
           "regions_ours_worse_by_1e-9": int((diff > 1e-9).sum()),
           "optimizer": sorted(set(res["optimizer"]))}
    print(f"random intercept, {n_regions} regions x 30 participants x 4 contrasts: roikit {ours:.3f} s "
          f"(median of {repeats}), statsmodels MixedLM loop {theirs:.1f} s: {theirs / ours:.1f}x faster")
    print(f"  REML criterion, roikit minus statsmodels per region: max {diff.max():.3g}, min {diff.min():.3g}; "
          f"roikit lower by > 1e-6 in {out['regions_ours_better_by_1e-6']} region(s), higher by > 1e-9 in "
          f"{out['regions_ours_worse_by_1e-9']}")
    return out


def bench_slopes(n_regions: int) -> dict:
    values, table = make_intercept_values(seed=2, n_regions=n_regions, slope_sd=0.15)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_design(values, "mixed", formula="value ~ load", random="1 + load", contrasts=table,
                         center=False)
    ours = time.perf_counter() - t0
    data = values.merge(table, on="contrast")
    t0 = time.perf_counter()
    ref, rel_cov = _statsmodels_loop(data, "value ~ load", re_formula="1 + load")
    theirs = time.perf_counter() - t0
    dev = res.drop_duplicates("region").set_index("region")["deviance"]
    diff = np.array([dev[r] - ref[r] for r in dev.index])
    # the same criterion formula on both sides: ours at statsmodels' estimates (its llf loses digits near a
    # singular covariance)
    same = np.array([dev[r] - _criterion_at(data, r, ["load"], rel_cov[r]) for r in dev.index])
    print(f"random intercept + slope, {n_regions} regions x 30 participants x 4 load levels: roikit {ours:.2f} s "
          f"({ours / n_regions * 1e3:.0f} ms per region), statsmodels loop {theirs:.2f} s "
          f"({theirs / n_regions * 1e3:.0f} ms per region): {theirs / ours:.1f}x")
    print(f"  REML criterion roikit minus statsmodels' -2 llf: max {diff.max():.3g}, min {diff.min():.3g}; roikit's "
          f"criterion at its estimates minus at statsmodels' estimates: max {same.max():.3g}, min {same.min():.3g}")
    return {"regions": n_regions, "roikit_s": ours, "statsmodels_loop_s": theirs, "ratio": theirs / ours,
            "criterion_ours_minus_statsmodels_max": float(diff.max()),
            "criterion_ours_minus_statsmodels_min": float(diff.min()),
            "criterion_same_formula_max": float(same.max()), "criterion_same_formula_min": float(same.min())}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--regions", type=int, default=400, help="regions of the random-intercept comparison")
    ap.add_argument("--slope-regions", type=int, default=40, help="regions of the random-slope comparison")
    args = ap.parse_args(argv)
    summary = {"random_intercept": bench_intercept(args.regions, args.repeats),
               "random_slope": bench_slopes(args.slope_regions)}
    values, participants = make_values()
    out = {**summary,"platform": platform.platform(), "n_regions": len(REGION_NAMES), "n_participants": 32, "n_towns": 6,
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
        print(f"crossed participant + town, {len(REGION_NAMES)} regions x 192 observations, n_jobs={n_jobs}: "
              f"median {statistics.median(times):.3f} s (min {min(times):.3f} s, {args.repeats} repeats); "
              f"{statistics.median(times) / len(REGION_NAMES) * 1e3:.1f} ms per region")
    RESULTS.mkdir(exist_ok=True)
    (RESULTS / "bench_mixed.json").write_text(json.dumps(out, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
