"""Shared fixtures: tiny synthetic NIfTI studies whose answers are known by construction."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pandas as pd
import pytest

from roikit.images import Grid

from helpers import SMALL_AFFINE, SMALL_SHAPE, save_nifti

@pytest.fixture
def small_grid():
    return Grid(SMALL_SHAPE, SMALL_AFFINE)


@pytest.fixture
def tiny_study(tmp_path):
    """4 participants x 2 contrasts on a 20x24x18 grid with a 3-region atlas and variance maps.

    Returns a dict with paths and the arrays written, so tests can compute expected values.
    """
    rng = np.random.default_rng(20261201)
    atlas = np.zeros(SMALL_SHAPE, dtype=np.int16)
    atlas[2:6, 3:8, 4:8] = 1       # 80 voxels, world x > 0 (i small, x = 20 - 2 i)
    atlas[12:18, 10:14, 6:10] = 2  # 96 voxels, world x < 0
    atlas[8:12, 16:20, 10:14] = 3  # 64 voxels, straddles x = 0 (i = 10 -> x = 0)
    save_nifti(tmp_path / "atlas.nii.gz", atlas, dtype=np.int16)
    pd.DataFrame({"index": [1, 2, 3], "name": ["right caudate", "left caudate", "retrosplenial cortex"]}).to_csv(
        tmp_path / "atlas.tsv", sep="\t", index=False)
    maps_dir = tmp_path / "maps"
    maps_dir.mkdir()
    written = {}
    for label in ("01", "02", "007", "10"):
        for contrast in ("novel", "familiar"):
            data = rng.normal(1.0, 1.0, SMALL_SHAPE).astype(np.float32)
            data[0, :, :] = 0.0  # a slab written as 0 outside an analysis mask
            data[1, 0, 0] = np.nan
            var = rng.uniform(0.5, 2.0, SMALL_SHAPE).astype(np.float32)
            p = save_nifti(maps_dir / f"sub-{label}_contrast-{contrast}_effect.nii.gz", data)
            v = save_nifti(maps_dir / f"sub-{label}_contrast-{contrast}_variance.nii.gz", var)
            written[(f"sub-{label}", contrast)] = (p, v, data, var)
    return {"root": tmp_path, "atlas": tmp_path / "atlas.nii.gz", "labels": tmp_path / "atlas.tsv",
            "atlas_data": atlas, "maps": written,
            "pattern": str(maps_dir / "sub-{subject}_contrast-{contrast}_effect.nii.gz"),
            "variance": str(maps_dir / "sub-{subject}_contrast-{contrast}_variance.nii.gz")}
