"""Extraction at the single-core limit: roikit's marginal cost per map against libdeflate alone, and 1 vs 2 workers.

Uses bench_extract.py's synthetic data (91 x 109 x 91 float32 .nii.gz maps, gzip level 6, 400 regions; made and
cached in benchmarks/results/data on first use). Every figure is a median over ``--repeats`` rounds; within a
round the decompressors and roikit run back to back, so the ratios compare like with like on a busy machine.

- libdeflate / zlib: read each file from disk (page cache) and decompress it whole, one thread, ms per map
  (zlib is told the output size from the gzip trailer, as roikit's fallback is);
- roikit marginal: (t(N + 10 maps) - t(10 maps)) / N for ``extract`` in this process (N = ``--maps``, 600), ms per
  map: the default (a helper thread reads and decompresses the next map while this one is hashed and summarised,
  when a core is spare) and
  everything on one thread;
- workers: ``extract(..., n_jobs=k)`` on N maps for k = 1, 2 worker processes (each process on one thread), and
  the speed-up.

    python benchmarks/bench_single_core.py [--maps 600] [--repeats 3]

Writes benchmarks/results/bench_single_core.json.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import struct
import sys
import time
import zlib
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_extract import RESULTS, make_data  # noqa: E402


def _ms_per_map(fn, items) -> tuple[float, float]:
    """Wall-clock and CPU (this process) milliseconds per item."""
    t, c = time.perf_counter(), time.process_time()
    fn(items)
    return (time.perf_counter() - t) / len(items) * 1000, (time.process_time() - c) / len(items) * 1000


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--maps", type=int, default=600, help="maps beyond the first 10 (marginal cost, workers)")
    parser.add_argument("--regions", type=int, default=400)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args(argv)

    import deflate

    from roikit import extraction
    from roikit.extraction import extract, find_maps
    from roikit.regions import Atlas, RegionSet

    folder = RESULTS / "data"
    atlas, labels, _ = make_data(args.maps + 10, args.regions, folder)
    maps = find_maps("sub-{subject}_contrast-{contrast}_effect.nii.gz", root=folder).iloc[: args.maps + 10]
    paths = [Path(p) for p in maps["path"]]
    regions = RegionSet([Atlas(atlas, labels)]).realise(extraction.read_header(paths[0]).grid)
    few, many = maps.iloc[:10], maps.iloc[: args.maps + 10]
    work = paths[: args.maps]

    def libdeflate_alone(ps):
        for p in ps:
            with open(p, "rb") as fh:
                deflate.gzip_decompress(fh.read())

    def zlib_alone(ps):
        for p in ps:
            with open(p, "rb") as fh:
                raw = fh.read()
            zlib.decompress(raw, 31, struct.unpack("<I", raw[-4:])[0])

    def marginal(alongside: bool) -> tuple[float, float]:
        extraction._READ_AHEAD = alongside
        try:
            few_wall, few_cpu = _ms_per_map(lambda _: extract(few, regions, progress=False), [None])
            many_wall, many_cpu = _ms_per_map(lambda _: extract(many, regions, progress=False), [None])
        finally:
            extraction._READ_AHEAD = True
        return (many_wall - few_wall) / args.maps, (many_cpu - few_cpu) / args.maps

    def workers(k: int) -> float:
        extraction._READ_AHEAD = False  # one thread per worker process
        try:
            t = time.perf_counter()
            extract(maps.iloc[10: args.maps + 10], regions, progress=False, n_jobs=k)
            return time.perf_counter() - t
        finally:
            extraction._READ_AHEAD = True

    libdeflate_alone(work)  # warm the page cache and the allocator
    extract(few, regions, progress=False)
    rounds = []
    for r in range(args.repeats):
        row = {}
        row["libdeflate_ms"], row["libdeflate_cpu_ms"] = _ms_per_map(libdeflate_alone, work)
        row["zlib_ms"], row["zlib_cpu_ms"] = _ms_per_map(zlib_alone, work)
        row["roikit_marginal_ms"], _ = marginal(True)
        row["roikit_marginal_one_thread_ms"], row["roikit_marginal_one_thread_cpu_ms"] = marginal(False)
        row["workers_1_s"] = workers(1)
        row["workers_2_s"] = workers(2)
        row["ratio"] = row["roikit_marginal_ms"] / row["libdeflate_ms"]
        row["ratio_one_thread"] = row["roikit_marginal_one_thread_ms"] / row["libdeflate_ms"]
        row["ratio_one_thread_cpu"] = row["roikit_marginal_one_thread_cpu_ms"] / row["libdeflate_cpu_ms"]
        row["speedup_2_workers"] = row["workers_1_s"] / row["workers_2_s"]
        row["load_1min"] = os.getloadavg()[0]
        rounds.append(row)
        print(f"round {r + 1}: " + ", ".join(f"{k} {v:.3f}" for k, v in row.items()), file=sys.stderr, flush=True)
    med = {k: statistics.median(row[k] for row in rounds) for k in rounds[0]}
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        cores = os.cpu_count()
    n = args.maps
    print(f"\nsingle-core limit: {n} maps 91x109x91 float32 .nii.gz, {args.regions} regions, {cores} cores, "
          f"medians of {args.repeats} rounds, load average {', '.join(f'{x:.2f}' for x in os.getloadavg())}")
    print(f"libdeflate decompression, read from disk, 1 thread (ms per map)   {med['libdeflate_ms']:.2f}")
    print(f"zlib decompression told the size, 1 thread (ms per map)           {med['zlib_ms']:.2f}")
    print(f"roikit marginal cost, default install (ms per map)                {med['roikit_marginal_ms']:.2f}")
    print(f"roikit marginal cost, everything on one thread (ms per map)       "
          f"{med['roikit_marginal_one_thread_ms']:.2f}")
    print(f"ratio roikit / libdeflate, default (target <= 1.25)               {med['ratio']:.2f}")
    print(f"ratio roikit / libdeflate, one thread                             {med['ratio_one_thread']:.2f}")
    print(f"ratio roikit / libdeflate, one thread, CPU time ({med['roikit_marginal_one_thread_cpu_ms']:.2f} / "
          f"{med['libdeflate_cpu_ms']:.2f} ms)          {med['ratio_one_thread_cpu']:.2f}")
    print(f"{n} maps, 1 process (n_jobs=1) / 2 worker processes (s)          "
          f"{med['workers_1_s']:.2f} / {med['workers_2_s']:.2f}")
    print(f"speed-up of 2 worker processes over 1 (target >= 1.8)             {med['speedup_2_workers']:.2f}")
    RESULTS.mkdir(exist_ok=True)
    (RESULTS / "bench_single_core.json").write_text(json.dumps(
        {"maps": n, "regions": args.regions, "cores": cores, "medians": med, "rounds": rounds}, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
