"""Benchmark: statistics on a values table that carries functional regions' provenance (every fold's voxels).

Usage: python benchmarks/bench_functional_stats.py [SPACES] [REPEATS]
Pure-noise maps (16 participants x 2 runs, SPACES search spaces of 50 voxels, uncompressed .nii in a temporary
folder, removed afterwards); `extract(..., functional=...)` with a circular and a cross-validated functional region
per search space. Prints, one line each, the median wall time of
- collapse_runs (one value per participant, the mean over runs),
- run_design one-sample on the collapsed table as extract returns it (with its provenance in attrs),
- the same with the attrs emptied by the caller (what the designs now do themselves: the two should be close).
"""

from __future__ import annotations

import shutil
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd

from roikit.extraction import extract, find_maps
from roikit.functional import FunctionalRegion, collapse_runs
from roikit.regions import Atlas, RegionSet
from roikit.stats import run_design


def _median_time(func, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        func()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main(spaces: int = 100, repeats: int = 3) -> None:
    warnings.simplefilter("ignore")
    root = Path(tempfile.mkdtemp(prefix="roikit-bench-functional-stats-"))
    try:
        rng = np.random.default_rng(1)
        shape, affine = (spaces, 50, 1), np.diag([2.0, 2.0, 2.0, 1.0])
        nib.save(nib.Nifti1Image(np.repeat(np.arange(1, spaces + 1), 50).reshape(shape).astype(np.int16), affine),
                 root / "spaces.nii")
        names = [f"space {k:03d}" for k in range(1, spaces + 1)]
        pd.DataFrame({"index": range(1, spaces + 1), "name": names}).to_csv(root / "spaces.tsv", sep="\t",
                                                                          index=False)
        for i in range(1, 17):
            for run in (1, 2):
                nib.save(nib.Nifti1Image(rng.standard_normal(shape).astype(np.float32), affine),
                         root / f"sub-{i:02d}_run-{run}_contrast-task.nii")
        maps = find_maps("sub-{subject}_run-{run}_contrast-{contrast}.nii", root=root)
        functional = ([FunctionalRegion(f"{n} circular", n, "task", top="10%", circular_ok=True) for n in names]
                      + [FunctionalRegion(f"{n} split", n, "task", top="10%", split="run") for n in names])
        t0 = time.perf_counter()
        values = extract(maps, RegionSet([Atlas(root / "spaces.nii", root / "spaces.tsv")]), functional=functional,
                         progress=False)
        t_extract = time.perf_counter() - t0
        collapsed = collapse_runs(values)
        bare = pd.DataFrame(collapsed)  # the same table without attrs
        t_collapse = _median_time(lambda: collapse_runs(values), repeats)
        t_with = _median_time(lambda: run_design(collapsed, "one-sample", contrast="task", correct=None), repeats)
        t_bare = _median_time(lambda: run_design(bare, "one-sample", contrast="task", correct=None), repeats)
        regions = collapsed["region"].nunique()
        print(f"extract with {2 * spaces} functional regions, 32 maps: {t_extract:.2f} s")
        print(f"collapse_runs, {len(values)} rows: {t_collapse:.3f} s")
        print(f"run_design one-sample, {regions} regions, table with provenance: {t_with:.3f} s")
        print(f"run_design one-sample, {regions} regions, attrs emptied by the caller: {t_bare:.3f} s")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:3]))
