"""Region values table benchmark: bytes per row in memory, peak memory of extraction, TSV vs Parquet writing.

1. Bytes per row (``DataFrame.memory_usage(deep=True)``) of the region values table for 610 maps x 400 regions
   with variance: roikit's lean layout (categorical labels, int32 counts) against the layout before it (labels as
   strings, int64 counts; pandas' ``str`` columns measured with Python storage, as without pyarrow, and with
   pyarrow storage).
2. Peak memory (ru_maxrss of a fresh process) extracting 10 and N maps (default 610) x 400 regions from the
   synthetic maps of ``bench_extract.py`` (made on first use in benchmarks/results/data): the table in memory
   (``extract``) and streamed to Parquet (``extract_to_file``, row groups of 64 maps).
3. Writing a table of R rows (default 10 million: 5 contrasts x 400 regions x 5,000 participants) as TSV
   (``write_table``) and as Parquet (``write_table``), rows per second (median of ``--repeats``).

Writes benchmarks/results/bench_tables.json.

    python benchmarks/bench_tables.py [--maps 610] [--rows 10000000] [--repeats 3] [--skip-memory] [--skip-write]
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

from roikit._tables import write_table  # noqa: E402
from roikit.extraction import assemble_values  # noqa: E402


def synthetic_table(n_participants: int, n_contrasts: int, n_regions: int) -> pd.DataFrame:
    rng = np.random.default_rng(0)
    n_maps = n_participants * n_contrasts
    maps = pd.DataFrame({"participant_id": np.repeat([f"sub-{i:05d}" for i in range(n_participants)], n_contrasts),
                         "contrast": np.tile([f"contrast{k}" for k in range(n_contrasts)], n_participants)})
    names = [f"parcel {k:03d}" for k in range(1, n_regions + 1)]
    n_vox = rng.integers(300, 1200, n_regions)
    values = rng.normal(size=(n_maps, n_regions))
    return assemble_values(maps, names, n_vox, values, np.broadcast_to(n_vox, (n_maps, n_regions)),
                           rng.uniform(0.5, 2.0, size=(n_maps, n_regions)))


def before_layout(table: pd.DataFrame, storage: str) -> pd.DataFrame:
    """The same table as the code before the lean table built it: ``astype(str)`` labels, int64 counts."""
    with pd.option_context("mode.string_storage", storage):
        out = table.copy()
        for c in ("participant_id", "session_id", "contrast", "region"):
            if c in out.columns:
                out[c] = pd.Series(np.asarray(out[c], dtype=object)).astype(str)
        for c in ("n_voxels", "n_valid"):
            out[c] = out[c].astype(np.int64)
    return out


def bytes_per_row(table: pd.DataFrame) -> float:
    return float(table.memory_usage(deep=True).sum() / len(table))


def peak_memory_mib(n_maps: int, folder: Path, n_regions: int, *, stream: bool, root: Path,
                    storage: str) -> tuple[float, float]:
    """(ru_maxrss of the whole process, tracemalloc's peak during the extraction call), both in MiB."""
    out_path = Path(tempfile.mkdtemp(dir=RESULTS)) / "values.parquet"
    call = (f"ex.extract_to_file({str(out_path)!r}, maps, regions, progress=False)" if stream
            else "ex.extract(maps, regions, progress=False)")
    code = f"""
import resource, sys
sys.path.insert(0, {str(root)!r})
import tracemalloc
import pandas as pd
pd.set_option("mode.string_storage", {storage!r})
import roikit.extraction as ex
from roikit.regions import RegionSet, Atlas
folder = {str(folder)!r}
maps = ex.find_maps("sub-{{subject}}_contrast-{{contrast}}_effect.nii.gz", root=folder).iloc[:{n_maps}]
regions = RegionSet([Atlas(folder + "/atlas-{n_regions}.nii.gz", folder + "/atlas-{n_regions}.tsv")])
tracemalloc.start()
v = {call}
traced = tracemalloc.get_traced_memory()[1] / 2**20
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, traced)
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    rss, traced = out.stdout.strip().splitlines()[-1].split()
    return float(rss), float(traced)


def time_write(table: pd.DataFrame, suffix: str, repeats: int) -> float:
    runs = []
    for _ in range(repeats):
        folder = Path(tempfile.mkdtemp(dir=RESULTS))
        t = time.perf_counter()
        write_table(folder / f"values.{suffix}", table)
        runs.append(time.perf_counter() - t)
        (folder / f"values.{suffix}").unlink()
        folder.rmdir()
    return statistics.median(runs)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--maps", type=int, default=610)
    parser.add_argument("--regions", type=int, default=400)
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--tsv-repeats", type=int, default=1, help="TSV writing is slow: repeats for it")
    parser.add_argument("--skip-memory", action="store_true")
    parser.add_argument("--skip-write", action="store_true")
    parser.add_argument("--root", type=Path, default=HERE.parent,
                        help="roikit source tree for the memory runs (e.g. an export of an earlier commit)")
    parser.add_argument("--no-stream", action="store_true", help="memory: only the in-memory table")
    parser.add_argument("--string-storage", choices=("auto", "python", "pyarrow"), default="auto",
                        help="pandas' storage of str columns in the memory runs (python: as without pyarrow)")
    args = parser.parse_args(argv)
    RESULTS.mkdir(parents=True, exist_ok=True)
    report: dict = {}

    table = synthetic_table(args.maps // 5 or 1, 5, args.regions)
    report["bytes_per_row"] = {
        "lean": bytes_per_row(table),
        "before, str columns with Python storage": bytes_per_row(before_layout(table, "python")),
        "before, str columns with pyarrow storage": bytes_per_row(before_layout(table, "pyarrow")),
    }
    print(f"bytes per row ({len(table)} rows):")
    for k, v in report["bytes_per_row"].items():
        print(f"  {k:42s} {v:7.1f}")

    if not args.skip_memory:
        from bench_extract import make_data

        folder = RESULTS / "data"
        t0 = time.perf_counter()
        make_data(args.maps, args.regions, folder)
        print(f"data ready in {time.perf_counter() - t0:.1f} s", file=sys.stderr)
        mem = {}
        for stream in ((False,) if args.no_stream else (False, True)):
            for n in (10, args.maps):
                mem[f"{'parquet stream' if stream else 'in memory'}, {n} maps"] = peak_memory_mib(
                    n, folder, args.regions, stream=stream, root=args.root, storage=args.string_storage)
        report["peak_memory_mib"] = {k: {"ru_maxrss": a, "tracemalloc_peak": b} for k, (a, b) in mem.items()}
        print(f"peak memory (MiB; code in {args.root}, str storage {args.string_storage}): process ru_maxrss, "
              "tracemalloc peak during extraction")
        for k, (a, b) in mem.items():
            print(f"  {k:42s} {a:7.1f} {b:7.1f}")

    if not args.skip_write:
        n_regions, n_contrasts = args.regions, 5
        n_participants = max(1, args.rows // (n_regions * n_contrasts))
        big = synthetic_table(n_participants, n_contrasts, n_regions)
        t_pq = time_write(big, "parquet", args.repeats)
        t_tsv = time_write(big, "tsv", args.tsv_repeats) if args.tsv_repeats else float("nan")
        report["write"] = {"rows": len(big), "parquet_s": t_pq, "tsv_s": t_tsv,
                           "parquet_rows_per_s": len(big) / t_pq, "tsv_rows_per_s": len(big) / t_tsv}
        print(f"writing {len(big):,} rows: Parquet {t_pq:.2f} s ({len(big) / t_pq / 1e6:.2f} M rows/s), "
              f"TSV {t_tsv:.1f} s ({len(big) / t_tsv / 1e3:.0f} k rows/s), Parquet {t_tsv / t_pq:.0f}x faster")
    (RESULTS / "bench_tables.json").write_text(json.dumps(report, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
