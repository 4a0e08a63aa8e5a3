"""Helpers shared by the tests: tiny synthetic NIfTI files with answers known by construction."""

from __future__ import annotations

import nibabel as nib
import numpy as np

#: A small grid, 2 mm voxels, x flipped as in MNI space (common practice).
SMALL_AFFINE = np.array([[-2.0, 0, 0, 20.0], [0, 2.0, 0, -24.0], [0, 0, 2.0, -18.0], [0, 0, 0, 1]])
SMALL_SHAPE = (20, 24, 18)

# MNI152 2 mm template grid (common practice, from memory): 91 x 109 x 91, diag(-2, 2, 2), origin (90, -126, -72).
MNI2_AFFINE = np.array([[-2.0, 0, 0, 90], [0, 2, 0, -126], [0, 0, 2, -72], [0, 0, 0, 1]])
MNI2_SHAPE = (91, 109, 91)


def save_nifti(path, data, affine=SMALL_AFFINE, dtype=np.float32):
    img = nib.Nifti1Image(np.asarray(data, dtype=dtype), affine)
    img.header.set_data_dtype(dtype)
    nib.save(img, str(path))
    return path


def process_ended(pid: int, *, within: float = 10.0) -> bool:
    """Whether process ``pid`` has ended (gone, or a zombie awaiting its parent) within ``within`` seconds.

    Read from /proc, not from ``multiprocessing.Process.is_alive()``: a process pool's own management thread may
    reap the worker first, and ``is_alive()`` then keeps answering True.
    """
    import time

    deadline = time.monotonic() + within
    while True:
        try:
            with open(f"/proc/{pid}/status", encoding="ascii") as fh:
                state = next((line.split()[1] for line in fh if line.startswith("State:")), "")
        except OSError:
            return True
        if state in ("Z", "X"):
            return True
        if time.monotonic() > deadline:
            return False
        time.sleep(0.05)


def write_caudate_atlas(root) -> None:
    """The functional-region tests' atlas: right caudate (80 voxels) and left caudate, with atlas.tsv."""
    import pandas as pd

    atlas = np.zeros(SMALL_SHAPE, dtype=np.int16)
    atlas[2:6, 3:8, 4:8] = 1  # 80 voxels
    atlas[12:18, 10:14, 6:10] = 2
    save_nifti(root / "atlas.nii.gz", atlas, dtype=np.int16)
    pd.DataFrame({"index": [1, 2], "name": ["right caudate", "left caudate"]}).to_csv(
        root / "atlas.tsv", sep="\t", index=False)


def write_map_pair(folder, rng, stem: str, mean: float) -> None:
    """``<stem>_effect.nii.gz`` (normal noise around ``mean``, SD 1) and ``<stem>_variance.nii.gz`` (uniform 0.5-2)."""
    save_nifti(folder / f"{stem}_effect.nii.gz", rng.normal(mean, 1.0, SMALL_SHAPE).astype(np.float32))
    save_nifti(folder / f"{stem}_variance.nii.gz", rng.uniform(0.5, 2.0, SMALL_SHAPE).astype(np.float32))


def write_run_study(root, labels, seed: int, *, novel: float = 0.5, familiar: float = 0.1):
    """A study folder with the caudate atlas and two runs of novel and familiar per participant (maps/)."""
    (root / "maps").mkdir(parents=True)
    write_caudate_atlas(root)
    rng = np.random.default_rng(seed)
    for label in labels:
        for run in (1, 2):
            for contrast, mean in (("novel", novel), ("familiar", familiar)):
                write_map_pair(root / "maps", rng, f"sub-{label}_run-{run}_contrast-{contrast}", mean)
    return root
