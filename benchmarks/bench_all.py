"""Run every roikit benchmark in one go and print the ratios side by side.

    python benchmarks/bench_all.py [--maps 200] [--regions 400]

Runs bench_extract.py (extraction vs plain zlib decompression, vs a per-region mask loop, 2 workers,
peak memory vs the number of maps), bench_single_core.py (marginal cost per map vs libdeflate alone, 1 vs 2
worker processes on 600 maps), bench_stats.py (statistics across 400 regions x 1000 participants vs
a per-region scipy loop, 10,000 sign-flip permutations) and bench_mixed.py (mixed design on a demo-like
study), each in its own process, then prints one summary table and writes benchmarks/results/bench_all.json.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--maps", type=int, default=200)
    parser.add_argument("--regions", type=int, default=400)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args(argv)
    runs = [
        ["bench_extract.py", "--maps", str(args.maps), "--regions", str(args.regions), "--repeats", str(args.repeats)],
        ["bench_stats.py", "--repeats", str(args.repeats)],
        ["bench_mixed.py"],
        ["bench_single_core.py", "--repeats", str(args.repeats)],
    ]
    for run in runs:
        print(f"== {' '.join(run)}", flush=True)
        subprocess.run([sys.executable, str(HERE / run[0]), *run[1:]], check=True)
    ex = json.loads((RESULTS / "bench_extract.json").read_text())
    st = json.loads((RESULTS / "bench_stats.json").read_text())
    mixed_path = RESULTS / "bench_mixed.json"
    mx = json.loads(mixed_path.read_text()) if mixed_path.exists() else {}
    sc = json.loads((RESULTS / "bench_single_core.json").read_text())["medians"]
    r, q = ex["results"], ex["ratios"]
    perm = next(row for row in st["rows"] if "permutations" in row["task"])
    summary = [
        ("extraction throughput / plain zlib decompression (1 core)", q["throughput_vs_plain_zlib"], ">= 0.85"),
        ("  the same without libdeflate (zlib only)", q["throughput_vs_plain_zlib_without_libdeflate"], ">= 0.70"),
        ("extraction speed-up, 2 worker processes / 1", q["speedup_2_workers"], ">= 1.7"),
        ("extraction marginal cost per map / libdeflate alone (default)", sc["ratio"], "<= 1.25"),
        ("  the same, everything on one thread (CPU time)", sc["ratio_one_thread_cpu"], "-"),
        ("extraction speed-up on 600 maps, 2 worker processes / 1 process", sc["speedup_2_workers"], ">= 1.8"),
        ("extraction speed-up over a per-region mask loop", q["speedup_vs_mask_loop"], ">= 20"),
        (f"peak memory, {ex['info']['maps']} maps / 10 maps", q[f"memory_{ex['info']['maps']}_over_10_maps"], "<= 1.2"),
        ("one-sample statistics: scipy loop / roikit (with effect sizes)",
         st["speedups"]["with effect sizes: scipy loop (+brentq d CI) / roikit core"], ">= 50"),
        ("10,000 sign-flip permutations, 400 regions x 1000 participants (s)", perm["median_s"], "< 10"),
    ]
    print(f"\n{'measure':70s} {'value':>10s}  target")
    for name, value, target in summary:
        print(f"{name:70s} {value:10.2f}  {target}")
    print(f"{'ms per map: plain zlib / roikit / roikit 2 workers':70s} "
          f"{r['plain_zlib_ms']:.1f} / {r['roikit_ms']:.1f} / {r['roikit_2_workers_ms']:.1f}")
    print(f"{'peak MiB by number of maps':70s} {ex['peak_mib_by_maps']}")
    if mx:
        print(f"{'mixed design, demo-like study, all regions (s): 1 process / 2':70s} "
              f"{mx['n_jobs=1']['median_s']:.2f} / {mx['n_jobs=2']['median_s']:.2f}")
    (RESULTS / "bench_all.json").write_text(json.dumps(
        {"summary": [{"measure": n, "value": v, "target": t} for n, v, t in summary],
         "extract": ex, "stats": st, "mixed": mx, "single_core": sc}, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
