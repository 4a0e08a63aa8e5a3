"""Benchmark: `roikit run` extraction on the demo study, fresh versus from the cache (one participant added).

Usage: python benchmarks/bench_run_cache.py [REPEATS]
Prints the median wall time (s) of the extraction step `roikit run` uses (roikit.study.extract_study): all 288
maps read, then nothing new, then one participant's 9 maps changed (the others from DIR/.cache). The cache is keyed
by the SHA-256 of each map's bytes, so a cached pass reads (but does not decompress) every file; the last lines
give that hashing cost per map (effect + variance file) next to a fresh extraction's cost per map.
"""

from __future__ import annotations

import gzip
import os
import shutil
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

from roikit._tables import sha256_file
from roikit.demo import make_study
from roikit.study import extract_study, load_study


def main(repeats: int = 3) -> None:
    warnings.simplefilter("ignore")
    root = Path(tempfile.mkdtemp(prefix="roikit-bench-run-"))
    try:
        make_study(root / "study")
        study_file = root / "study" / "study.toml"
        fresh, cached, one_new, hashing = [], [], [], []
        for k in range(repeats):
            out = root / f"out{k}"
            study = load_study(study_file)
            t0 = time.perf_counter()
            extract_study(study, out=out, progress=False)
            fresh.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            extract_study(study, out=out, progress=False)
            cached.append(time.perf_counter() - t0)
            files = list(study.maps["path"]) + list(study.maps.get("variance_path", []))
            t0 = time.perf_counter()
            for f in files:
                sha256_file(f)
            hashing.append(time.perf_counter() - t0)
            # one participant "added": new bytes for their maps (same voxels, another gzip header time)
            for p in (root / "study" / "maps").glob("sub-01_*"):
                p.write_bytes(gzip.compress(gzip.decompress(p.read_bytes()), mtime=1000 + k))
            t0 = time.perf_counter()
            values = extract_study(study, out=out, progress=False)
            one_new.append(time.perf_counter() - t0)
            assert values.attrs["roikit"]["cache"]["extracted"] == 9
        print(f"maps: {len(study.maps)} (effect + variance files each), regions: {len(study.realised)}")
        print(f"extraction, all maps read:        median {statistics.median(fresh):.2f} s")
        print(f"extraction, all from the cache:   median {statistics.median(cached):.2f} s")
        print(f"extraction, one participant new:  median {statistics.median(one_new):.2f} s")
        n = len(study.maps)
        size = statistics.mean(os.path.getsize(f) for f in files) / 1024
        print(f"hashing every file (SHA-256 of the compressed bytes, {size:.0f} KiB per file on average): "
              f"median {statistics.median(hashing):.3f} s = {1000 * statistics.median(hashing) / n:.2f} ms per map "
              f"(effect + variance); a fresh extraction costs {1000 * statistics.median(fresh) / n:.1f} ms per map")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 3)
