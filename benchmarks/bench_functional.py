"""Benchmark: functional-region selection cost per map, next to the region extraction of the same maps.

Usage: python benchmarks/bench_functional.py [N_PARTICIPANTS] [REPEATS]
Synthetic MNI-like 2 mm grid (91 x 109 x 91, float32 .nii.gz), 2 runs x 2 contrasts per participant, a 400-voxel
box as the search space plus 20 other box regions. Prints the median wall time per map of
- roikit.extraction.extract (every map, all 21 regions),
- roikit.functional.extract_functional (the same maps read once more, split = "run", top 10%),
so the extra cost a functional region adds to `roikit run` (which reads the localiser and tested maps again
for the functional pass) is visible per map. Data go to a temporary folder, removed afterwards.
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

from roikit.extraction import extract, find_maps
from roikit.functional import FunctionalRegion, extract_functional
from roikit.images import read_header
from roikit.regions import Mask, RegionSet

AFFINE = np.array([[-2.0, 0, 0, 90], [0, 2, 0, -126], [0, 0, 2, -72], [0, 0, 0, 1]])
SHAPE = (91, 109, 91)


def main(n_part: int = 10, repeats: int = 3) -> None:
    warnings.simplefilter("ignore")
    root = Path(tempfile.mkdtemp(prefix="roikit-bench-functional-"))
    try:
        (root / "maps").mkdir()
        rng = np.random.default_rng(1)
        for p in range(1, n_part + 1):
            for run in (1, 2):
                for contrast in ("novel", "familiar"):
                    data = rng.standard_normal(SHAPE).astype(np.float32)
                    nib.save(nib.Nifti1Image(data, AFFINE),
                             root / "maps" / f"sub-{p:02d}_run-{run}_contrast-{contrast}.nii.gz")
        sources = []
        for k in range(21):
            mask = np.zeros(SHAPE, np.uint8)
            i, j = 10 + 3 * k, 20 + 3 * k
            mask[i:i + 10, j:j + 8, 40:45] = 1  # 400 voxels
            nib.save(nib.Nifti1Image(mask, AFFINE), root / f"box{k}.nii.gz")
            sources.append(Mask(f"box {k}", root / f"box{k}.nii.gz"))
        maps = find_maps("maps/sub-{subject}_run-{run}_contrast-{contrast}.nii.gz", root=root)
        regions = RegionSet(sources).realise(read_header(maps.path[0]).grid)
        froi = FunctionalRegion("fROI", "box 0", "novel", top="10%", split="run")
        plain, functional = [], []
        for _ in range(repeats):
            t0 = time.perf_counter()
            extract(maps, regions, progress=False)
            plain.append((time.perf_counter() - t0) / len(maps))
            t0 = time.perf_counter()
            extract_functional(maps, regions, [froi], contrasts=["novel", "familiar"])
            functional.append((time.perf_counter() - t0) / len(maps))
        print(f"maps: {len(maps)} ({n_part} participants x 2 runs x 2 contrasts), grid {SHAPE}, 21 regions")
        print(f"extract (all regions):            median {1000 * statistics.median(plain):.1f} ms per map")
        print(f"extract_functional (split, 10%):  median {1000 * statistics.median(functional):.1f} ms per map")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:3]))
