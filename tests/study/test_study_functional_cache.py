"""The functional regions' rows in the extraction cache (a rerun reads no map), and per-run maps beside session maps
(``[maps] run_effect``)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import roikit.extraction
import roikit.functional
from helpers import write_caudate_atlas, write_map_pair, write_run_study
from roikit.study import load_study, run_study
from roikit.study.schema import StudyError

LABELS = ("01", "02", "03", "04", "05", "06")

SPLIT = """\
[study]
title = "Wayfinding study (functional region cache test)"

[maps]
effect = "maps/sub-{subject}_run-{run}_contrast-{contrast}_effect.nii.gz"
variance = "maps/sub-{subject}_run-{run}_contrast-{contrast}_variance.nii.gz"

[regions]
atlas = "atlas.nii.gz"
labels = "atlas.tsv"

[[regions.functional]]
name = "novelty fROI"
within = "right caudate"
localiser = "novel"
top = TOP
split = "run"

[[analysis]]
design = "one-sample"
contrast = "novel"
"""


@pytest.fixture
def split_study(tmp_path):
    return write_run_study(tmp_path / "study", LABELS, 161)


def _write(root, top='"20%"'):
    (root / "study.toml").write_text(SPLIT.replace("TOP", top), encoding="utf-8")
    return root / "study.toml"


@pytest.fixture
def reads(monkeypatch):
    """Count the maps whose voxels are read: every read, the region extraction's and the functional pass's, goes
    through extraction._fetch_flat (effect and variance maps alike)."""
    count = {"n": 0}
    original = roikit.extraction._fetch_flat

    def counting(*args, **kwargs):
        count["n"] += 1
        return original(*args, **kwargs)

    monkeypatch.setattr(roikit.extraction, "_fetch_flat", counting)
    return count


def test_a_rerun_reads_no_map_and_gives_the_same_values(split_study, reads):
    path = _write(split_study)
    out = split_study / "results"
    first = run_study(path, out=out, figures=False)
    # effect + variance of 6 participants x 2 runs x 1 analysed contrast (novel is localiser and tested)
    assert reads["n"] == len(LABELS) * 2 * 2
    assert first.values.attrs["roikit"]["cache"]["functional"] == "computed"
    reads["n"] = 0
    again = run_study(path, out=out, figures=False)
    assert reads["n"] == 0  # neither the regions' maps nor the functional regions' were read
    assert again.values.attrs["roikit"]["cache"]["functional"] == "from the cache"
    pd.testing.assert_frame_equal(again.values.reset_index(drop=True), first.values.reset_index(drop=True))
    pd.testing.assert_frame_equal(again.results, first.results)
    # the selections (for the overlap figure) come back with the rows
    assert again.values.attrs["roikit"]["functional"]["selections"] == \
        first.values.attrs["roikit"]["functional"]["selections"]


def test_a_changed_definition_or_map_recomputes(split_study, reads):
    out = split_study / "results"
    first = run_study(_write(split_study), out=out, figures=False)
    froi = first.values[first.values["region"] == "novelty fROI"]
    assert (froi["n_voxels"] == 16).all()  # 20% of the 80 voxels
    reads["n"] = 0
    changed = run_study(_write(split_study, top="8"), out=out, figures=False)
    # a new definition: the functional pass reads the maps it needs (the regions' values stay cached)
    assert changed.values.attrs["roikit"]["cache"]["functional"] == "computed"
    assert reads["n"] == len(LABELS) * 2 * 2
    froi = changed.values[changed.values["region"] == "novelty fROI"]
    assert (froi["n_voxels"] == 8).all()
    # the same definition again: from the cache, the same values as computed
    reads["n"] = 0
    back = run_study(_write(split_study, top="8"), out=out, figures=False)
    assert reads["n"] == 0
    pd.testing.assert_frame_equal(back.values.reset_index(drop=True), changed.values.reset_index(drop=True))
    # a changed map (new bytes): recomputed, and the participant's value changes
    stem = split_study / "maps" / "sub-03_run-2_contrast-novel"
    write_map_pair(split_study / "maps", np.random.default_rng(5), stem.name, 3.0)
    reads["n"] = 0
    fresh = run_study(split_study / "study.toml", out=out, figures=False)
    assert fresh.values.attrs["roikit"]["cache"]["functional"] == "computed" and reads["n"] > 0
    old = back.values.set_index(["participant_id", "region"])["value"]
    new = fresh.values.set_index(["participant_id", "region"])["value"]
    assert new[("sub-03", "novelty fROI")] != pytest.approx(old[("sub-03", "novelty fROI")])


RUN_EFFECT = """\
[study]
title = "Wayfinding study (session maps and per-run maps)"

[maps]
effect = "maps/sub-{subject}_contrast-{contrast}_effect.nii.gz"
variance = "maps/sub-{subject}_contrast-{contrast}_variance.nii.gz"
run_effect = "maps/runs/sub-{subject}_run-{run}_contrast-{contrast}_effect.nii.gz"
run_variance = "maps/runs/sub-{subject}_run-{run}_contrast-{contrast}_variance.nii.gz"

[regions]
atlas = "atlas.nii.gz"
labels = "atlas.tsv"

[[regions.functional]]
name = "novelty fROI"
within = "right caudate"
localiser = "novel"
top = 10
split = "run"

[[analysis]]
design = "one-sample"
contrast = "novel"

[[analysis]]
design = "one-sample"
contrast = "familiar"
"""


@pytest.fixture
def session_and_runs(tmp_path):
    """Session maps of novel and familiar; per-run maps of novel only (maps/runs/)."""
    root = tmp_path / "study"
    (root / "maps" / "runs").mkdir(parents=True)
    write_caudate_atlas(root)
    rng = np.random.default_rng(162)
    for label in LABELS:
        for contrast, mean in (("novel", 0.5), ("familiar", 0.1)):
            write_map_pair(root / "maps", rng, f"sub-{label}_contrast-{contrast}", mean)
        for run in (1, 2):
            write_map_pair(root / "maps" / "runs", rng, f"sub-{label}_run-{run}_contrast-novel", 0.5)
    (root / "study.toml").write_text(RUN_EFFECT, encoding="utf-8")
    return root


def test_run_effect_maps_serve_the_functional_regions(session_and_runs):
    study = load_study(session_and_runs / "study.toml")
    assert "run_id" not in study.maps.columns and len(study.maps) == len(LABELS) * 2
    assert len(study.run_maps) == len(LABELS) * 2 and set(study.run_maps["run_id"]) == {"run-1", "run-2"}
    run = run_study(study, figures=False)
    values = run.values
    assert "run_id" not in values.columns  # the regions use the session maps; the folds are averaged
    froi = values[values["region"] == "novelty fROI"]
    # measured only on the contrast with per-run maps: novel (familiar has none)
    assert list(froi["contrast"].unique()) == ["novel"] and len(froi) == len(LABELS)
    assert (froi["n_folds"] == 2).all() and (froi["n_voxels"] == 10).all()
    assert set(run.results.loc[run.results["contrast"] == "familiar", "region"]) == {"right caudate",
                                                                                      "left caudate"}
    assert "novelty fROI" in set(run.results.loc[run.results["contrast"] == "novel", "region"])
    # by hand with nibabel: top 10 of the other run's novel map, measured on the held-out run
    import nibabel as nib

    atlas = np.asarray(nib.load(session_and_runs / "atlas.nii.gz").dataobj).ravel(order="F")
    space = np.flatnonzero(atlas == 1)

    def voxels(run_, label):
        img = nib.load(session_and_runs / "maps" / "runs" / f"sub-{label}_run-{run_}_contrast-novel_effect.nii.gz")
        return np.asarray(img.dataobj, dtype=float).ravel(order="F")[space]

    for label in LABELS[:2]:
        by_hand = np.mean([voxels(held, label)[np.argsort(-voxels(train, label), kind="stable")[:10]].mean()
                           for held, train in ((1, 2), (2, 1))])
        assert froi.set_index("participant_id").loc[f"sub-{label}", "value"] == pytest.approx(by_hand, rel=1e-6)


def test_run_effect_problems_have_key_paths(session_and_runs):
    path = session_and_runs / "study.toml"
    path.write_text(RUN_EFFECT.replace("_run-{run}_contrast-{contrast}_effect", "_contrast-{contrast}_effect"),
                    encoding="utf-8")
    with pytest.raises(StudyError, match=r"maps.run_effect: needs a \{run\} placeholder"):
        load_study(path)
    text = RUN_EFFECT.replace('effect = "maps/sub-{subject}_contrast', 'effect = "maps/runs/sub-{subject}_run-{run}'
                                                                       '_contrast')
    path.write_text(text.replace('variance = "maps/sub-{subject}_contrast', 'variance = "maps/runs/sub-{subject}'
                                 '_run-{run}_contrast'), encoding="utf-8")
    with pytest.raises(StudyError, match=r"maps.run_effect: the maps of maps.effect \(or maps.list\) already have "
                                         r"runs"):
        load_study(path)
    path.write_text(RUN_EFFECT.replace('localiser = "novel"', 'localiser = "familiar"'), encoding="utf-8")
    with pytest.raises(StudyError, match=r"regions.functional\[1\].localiser: no maps of contrast 'familiar'"):
        load_study(path)
    text = RUN_EFFECT.split("[[regions.functional]]")[0] + RUN_EFFECT.split('split = "run"\n')[1]
    path.write_text(text, encoding="utf-8")
    with pytest.raises(StudyError, match=r"maps.run_effect: per-run maps serve only functional regions"):
        load_study(path)
