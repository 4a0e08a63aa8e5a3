"""A tiny study on disk (maps, atlas, participants.tsv, a study file) with answers known by construction."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from helpers import SMALL_SHAPE, save_nifti

#: Participants of the tiny study: labels, groups, ages (invented).
LABELS = ("01", "02", "03", "04", "05", "06", "07", "08")
GROUPS = ("younger",) * 4 + ("older",) * 4
AGES = (21, 25, 30, 34, 61, 66, 70, 75)

STUDY_TOML = """\
[study]
title = "Wayfinding study (tiny test copy)"
participants = "participants.tsv"

[maps]
effect = "maps/sub-{subject}_contrast-{contrast}_effect.nii.gz"
variance = "maps/sub-{subject}_contrast-{contrast}_variance.nii.gz"

[regions]
atlas = "atlas.nii.gz"
labels = "atlas.tsv"

[[regions.sphere]]
name = "prior peak"
center = [-10.0, 0.0, 0.0]
radius = 4.0

[[analysis]]
design = "one-sample"
contrast = "novel"

[[analysis]]
design = "two-group"
contrast = "novel"
group = "group"
levels = ["younger", "older"]
"""


def write_participant(root, label: str, rng: np.random.Generator, *, shift: float = 0.0) -> None:
    """Effect and variance maps of one participant for the contrasts novel and familiar."""
    for contrast, mean in (("novel", 1.0 + shift), ("familiar", 0.2 + shift)):
        data = rng.normal(mean, 1.0, SMALL_SHAPE).astype(np.float32)
        data[0, :, :] = 0.0  # written as 0 outside an analysis mask
        var = rng.uniform(0.5, 2.0, SMALL_SHAPE).astype(np.float32)
        save_nifti(root / "maps" / f"sub-{label}_contrast-{contrast}_effect.nii.gz", data)
        save_nifti(root / "maps" / f"sub-{label}_contrast-{contrast}_variance.nii.gz", var)


@pytest.fixture
def study_dir(tmp_path):
    """Folder with study.toml, participants.tsv, atlas (3 regions) and maps of 8 participants x 2 contrasts."""
    root = tmp_path / "study"
    (root / "maps").mkdir(parents=True)
    rng = np.random.default_rng(20261207)
    atlas = np.zeros(SMALL_SHAPE, dtype=np.int16)
    atlas[2:6, 3:8, 4:8] = 1
    atlas[12:18, 10:14, 6:10] = 2
    atlas[8:12, 16:20, 10:14] = 3
    save_nifti(root / "atlas.nii.gz", atlas, dtype=np.int16)
    pd.DataFrame({"index": [1, 2, 3], "name": ["right caudate", "left caudate", "retrosplenial cortex"]}).to_csv(
        root / "atlas.tsv", sep="\t", index=False)
    mask = np.zeros(SMALL_SHAPE, dtype=np.uint8)
    mask[1:19, 1:23, 1:17] = 1
    save_nifti(root / "brain_mask.nii.gz", mask, dtype=np.uint8)
    for label, group in zip(LABELS, GROUPS):
        write_participant(root, label, rng, shift=0.3 if group == "younger" else 0.0)
    pd.DataFrame({"participant_id": [f"sub-{x}" for x in LABELS], "group": GROUPS, "age": AGES,
                  "route_accuracy": np.linspace(60, 90, len(LABELS))}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    (root / "study.toml").write_text(STUDY_TOML, encoding="utf-8")
    return root
