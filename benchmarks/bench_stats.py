"""Benchmark of roikit.stats on 400 regions x 1000 participants (synthetic, seeded).

Targets (issue 4): all one-sample tests with effect sizes and CIs < 1 s; 10,000 sign-flip max-statistic
permutations < 10 s; >= 50x faster than a loop over regions calling scipy. Prints a table of medians and writes
JSON to benchmarks/results/bench_stats.json.

    /work/venv/bin/python benchmarks/bench_stats.py [--repeats 5]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import optimize, stats

from roikit.stats import run_design
from roikit.stats.designs import one_sample_matrix
from roikit.stats.permutation import sign_flip_max_t

N_PARTICIPANTS, N_REGIONS = 1000, 400


def _time(fn, repeats):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), times


def _scipy_loop_basic(y):
    out = []
    for j in range(y.shape[1]):
        r = stats.ttest_1samp(y[:, j], 0.0)
        ci = r.confidence_interval(0.95)
        out.append((r.statistic, r.pvalue, ci.low, ci.high))
    return out


def _scipy_loop_full(y):
    """Per region: scipy t-test, CI, and d with its noncentral-t interval by scalar brentq."""
    out = []
    n = y.shape[0]
    for j in range(y.shape[1]):
        r = stats.ttest_1samp(y[:, j], 0.0)
        ci = r.confidence_interval(0.95)
        t = r.statistic
        w = 4 * np.sqrt(1 + t**2 / (2 * (n - 1))) + 1
        f = lambda c, target: stats.nct.cdf(t, n - 1, c) - target  # noqa: E731
        lo = optimize.brentq(f, t - w, t + w, args=(0.975,))
        hi = optimize.brentq(f, t - w, t + w, args=(0.025,))
        out.append((t, r.pvalue, ci.low, ci.high, t / np.sqrt(n), lo / np.sqrt(n), hi / np.sqrt(n)))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--permutations", type=int, default=10_000)
    args = parser.parse_args()
    rng = np.random.default_rng(20240501)
    y = rng.normal(0.1, 1.0, (N_PARTICIPANTS, N_REGIONS)) + rng.normal(0, 0.05, N_REGIONS)
    ids = [f"sub-{i:04d}" for i in range(N_PARTICIPANTS)]
    regions = [f"region {j:03d}" for j in range(N_REGIONS)]
    values = pd.DataFrame({
        "participant_id": np.repeat(ids, N_REGIONS), "contrast": "novel", "region": np.tile(regions, N_PARTICIPANTS),
        "value": y.ravel(), "n_voxels": 100.0, "n_valid": 100.0,
    })  # fmt: skip

    rows = []

    def record(name, median, times, target=None, note=""):
        rows.append({"task": name, "median_s": median, "runs_s": times, "target_s": target, "note": note})

    numpy_basic = lambda: one_sample_matrix(y)  # noqa: E731  (includes d and its CI)
    m, ts = _time(numpy_basic, args.repeats)
    record("one-sample core: t, p, CI, d + noncentral-t CI (numpy, all regions)", m, ts, 1.0)

    def full():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            run_design(values, "one-sample", contrast="novel")

    m, ts = _time(full, args.repeats)
    record("run_design one-sample end to end (pivot 400k rows, diagnostics, corrections)", m, ts, 1.0)

    def t_only():
        mask = ~np.isnan(y)
        n = mask.sum(0)
        mean = y.mean(0)
        sd = y.std(0, ddof=1)
        t = mean / (sd / np.sqrt(n))
        p = 2 * stats.t.sf(np.abs(t), n - 1)
        crit = stats.t.ppf(0.975, n - 1)
        return t, p, mean - crit * sd / np.sqrt(n), mean + crit * sd / np.sqrt(n)

    m_tonly, ts = _time(t_only, args.repeats)
    record("numpy t, p, CI only (no effect sizes)", m_tonly, ts)
    m_loop_basic, ts = _time(lambda: _scipy_loop_basic(y), max(1, args.repeats // 2))
    record("scipy loop over regions: ttest_1samp + confidence_interval", m_loop_basic, ts)
    m_loop_full, ts = _time(lambda: _scipy_loop_full(y), 1)
    record("scipy loop over regions: + d with brentq noncentral-t CI", m_loop_full, ts)
    m_core = rows[0]["median_s"]

    perm = lambda: sign_flip_max_t(y, permutations=args.permutations, rng=np.random.default_rng(1))  # noqa: E731
    m, ts = _time(perm, max(1, args.repeats // 2))
    record(f"{args.permutations} sign-flip max-|t| permutations (float32 matrix products)", m, ts, 10.0)

    speedups = {
        "t_p_ci: scipy loop / numpy": m_loop_basic / m_tonly,
        "with effect sizes: scipy loop (+brentq d CI) / roikit core": m_loop_full / m_core,
        "scipy loop without effect sizes / roikit core with effect sizes": m_loop_basic / m_core,
    }
    width = max(len(r["task"]) for r in rows)
    print(f"{'task':<{width}}  median (s)  target (s)")
    for r in rows:
        target = "" if r["target_s"] is None else f"< {r['target_s']:g}"
        print(f"{r['task']:<{width}}  {r['median_s']:10.4f}  {target}")
    for k, v in speedups.items():
        print(f"speed-up {k}: {v:.0f}x (target >= 50x)")
    result = {
        "benchmark": "bench_stats",
        "shape": {"participants": N_PARTICIPANTS, "regions": N_REGIONS},
        "repeats": args.repeats,
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(), "numpy": np.__version__},
        "rows": rows,
        "speedups": speedups,
    }
    out = Path(__file__).parent / "results"
    out.mkdir(exist_ok=True)
    (out / "bench_stats.json").write_text(json.dumps(result, indent=2) + "\n")
    print(f"wrote {out / 'bench_stats.json'}")


if __name__ == "__main__":
    main()
