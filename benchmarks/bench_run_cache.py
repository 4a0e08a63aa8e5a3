"""Benchmark: `roikit run` extraction on the demo study, fresh versus from the cache (one participant added).

Usage: python benchmarks/bench_run_cache.py [REPEATS]
Prints the median wall time (s) of the extraction step `roikit run` uses (roikit.study.extract_study): all 288
maps read, then nothing new, then one participant's 9 maps changed (the others from DIR/.cache).
"""

from __future__ import annotations

import shutil
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

from roikit.demo import make_study
from roikit.study import extract_study, load_study


def main(repeats: int = 3) -> None:
    warnings.simplefilter("ignore")
    root = Path(tempfile.mkdtemp(prefix="roikit-bench-run-"))
    try:
        make_study(root / "study")
        study_file = root / "study" / "study.toml"
        fresh, cached, one_new = [], [], []
        for k in range(repeats):
            out = root / f"out{k}"
            study = load_study(study_file)
            t0 = time.perf_counter()
            extract_study(study, out=out, progress=False)
            fresh.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            extract_study(study, out=out, progress=False)
            cached.append(time.perf_counter() - t0)
            # one participant "added": drop their cache entries by touching their maps (new mtime)
            for p in (root / "study" / "maps").glob("sub-01_*"):
                p.touch()
            t0 = time.perf_counter()
            values = extract_study(study, out=out, progress=False)
            one_new.append(time.perf_counter() - t0)
            assert values.attrs["roikit"]["cache"]["extracted"] == 9
        print(f"maps: {len(study.maps)} (effect + variance files each), regions: {len(study.realised)}")
        print(f"extraction, all maps read:        median {statistics.median(fresh):.2f} s")
        print(f"extraction, all from the cache:   median {statistics.median(cached):.2f} s")
        print(f"extraction, one participant new:  median {statistics.median(one_new):.2f} s")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 3)
