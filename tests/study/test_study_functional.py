"""[[regions.functional]] in a study file: validation with key paths, the circularity guard, a split study end to end."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from helpers import write_run_study
from roikit.study import load_study, run_study
from roikit.study.schema import StudyError

LABELS = ("01", "02", "03", "04", "05", "06")

BASE = """\
[study]
title = "Wayfinding study (functional region test)"

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
top = "20%"
"""

ANALYSIS = """
[[analysis]]
design = "one-sample"
contrast = "novel"
"""


@pytest.fixture
def run_study_dir(tmp_path):
    return write_run_study(tmp_path / "study", LABELS, 16)


def _write(root, extra: str = "", analysis: str = ANALYSIS):
    (root / "study.toml").write_text(BASE + extra + analysis, encoding="utf-8")
    return root / "study.toml"


def test_the_guard_refuses_the_circular_study_before_any_work(run_study_dir):
    path = _write(run_study_dir)
    with pytest.raises(StudyError) as err:
        load_study(path)
    message = str(err.value)
    assert "regions.functional[1]: functional region 'novelty fROI'" in message
    for part in ("localiser 'novel'", "tested contrast 'novel'", 'split = "run"', "independent runs",
                 "circular_ok = true"):
        assert part in message
    assert not (run_study_dir / "results").exists()


def test_study_file_problems_have_key_paths(run_study_dir):
    extra = 'top = 20\nthreshold = 2.0\nsplit = "session"\nminimum = 0\nlocalizer = "x"\n'
    with pytest.raises(StudyError) as err:
        load_study(_write(run_study_dir, extra.replace("top = 20\n", "")))
    message = str(err.value)
    for part in ("regions.functional[1]: give top", "regions.functional[1].split: must be one of run",
                 "regions.functional[1].minimum", "regions.functional[1].localizer"):
        assert part in message
    text = BASE.replace('within = "right caudate"', 'within = "rigth caudate"') + 'split = "run"\n' + ANALYSIS
    (run_study_dir / "study.toml").write_text(text, encoding="utf-8")
    with pytest.raises(StudyError, match=r"regions.functional\[1\].within: unknown region 'rigth caudate'"):
        load_study(run_study_dir / "study.toml")


def test_split_study_runs_end_to_end(run_study_dir):
    run = run_study(_write(run_study_dir, 'split = "run"\n'), figures=False)
    values = pd.read_csv(run.out / "region_values.tsv", sep="\t", keep_default_na=False, na_values=["n/a"])
    # anatomical regions: one row per run, with run_id; the functional region: one row per participant (folds)
    caudate = values[values["region"] == "right caudate"]
    assert sorted(caudate["run_id"].unique()) == ["run-1", "run-2"] and len(caudate) == len(LABELS) * 2
    froi = values[values["region"] == "novelty fROI"]
    assert len(froi) == len(LABELS) and froi["run_id"].isna().all()
    assert (froi["n_folds"] == 2).all()
    # 20% of the 80 voxels of the right caudate (4 x 5 x 4), all valid: 16 selected by construction
    assert (froi["n_search"] == 80).all() and (froi["n_voxels"] == 16).all()
    assert froi["selected_share"].to_numpy() == pytest.approx(0.2)
    results = run.results
    assert "novelty fROI" in set(results["region"])
    sidecar = json.loads((run.out / "region_values.json").read_text())
    assert sidecar["n_search"]["Description"].startswith("Functional regions only")
    assert sidecar["run_id"]["Description"].startswith("Run label")
    prov = sidecar["GeneratedBy"][0]["provenance"]["functional"]
    assert prov["regions"][0]["split"] == "run" and len(prov["selections"]) == len(LABELS)
    # a single read: the functional pass took its voxels from the region extraction's read of the same maps
    assert prov["maps_read"] == 0 and prov["maps_from_extraction"] == len(LABELS) * 2
    again = run_study(run_study_dir / "study.toml", figures=False)  # everything from the cache: nothing read
    assert again.values.attrs["roikit"]["functional"]["maps_read"] == 0
    assert again.values.attrs["roikit"]["functional"]["from_cache"] is True
    assert again.extracted == 0
    pd.testing.assert_frame_equal(again.values.reset_index(drop=True), run.values.reset_index(drop=True))
    assert "circular" not in run.summary()
    methods = (run.out / "methods.md").read_text(encoding="utf-8")
    assert ("The functional region novelty fROI was defined for each participant within right caudate" in methods
            and "held-out run" in methods and "(range 16–16)" in methods)
    # two runs: each fold selects on the one other run (not "the mean of all runs but one")
    assert "selected on the localiser map of the other run" in methods and "all runs but one" not in methods
    # the values agree with a selection computed here by hand with nibabel (top 16 of run A, measured on run B)
    import nibabel as nib

    atlas = np.asarray(nib.load(run_study_dir / "atlas.nii.gz").dataobj).ravel(order="F")
    space = np.flatnonzero(atlas == 1)

    def voxels(run_, label):
        img = nib.load(run_study_dir / "maps" / f"sub-{label}_run-{run_}_contrast-novel_effect.nii.gz")
        return np.asarray(img.dataobj, dtype=float).ravel(order="F")[space]

    for label in LABELS[:3]:
        by_hand = np.mean([voxels(held, label)[np.argsort(-voxels(train, label), kind="stable")[:16]].mean()
                           for held, train in ((1, 2), (2, 1))])
        assert froi.set_index("participant_id").loc[f"sub-{label}", "value"] == pytest.approx(by_hand, rel=1e-6)


def test_circular_ok_runs_with_a_caution_in_the_outputs(run_study_dir):
    run = run_study(_write(run_study_dir, "circular_ok = true\n"), figure_formats=("png",))
    assert "caution: circular region definition: novelty fROI" in run.summary()
    report = (run.out / "report.html").read_text(encoding="utf-8")
    assert "Circular region definition" in report and "novelty fROI" in report
    assert (run.out / "figures" / "functional_regions.png").is_file() and "share of participants" in report
    methods = (run.out / "methods.md").read_text(encoding="utf-8")
    assert "Selection and measurement used the same runs" in methods
    table = (run.out / "tables" / "a1-one-sample.md").read_text(encoding="utf-8")
    assert "Circular region definition: novelty fROI was defined from the same data" in table


def test_split_needs_runs(run_study_dir):
    text = (BASE.replace("_run-{run}", "") + 'split = "run"\n' + ANALYSIS)
    for f in (run_study_dir / "maps").glob("*_run-1_*"):
        f.rename(f.with_name(f.name.replace("_run-1", "")))
    for f in (run_study_dir / "maps").glob("*_run-2_*"):
        f.unlink()
    (run_study_dir / "study.toml").write_text(text, encoding="utf-8")
    with pytest.raises(StudyError, match=r'regions.functional\[1\].split: "run" needs maps with runs'):
        load_study(run_study_dir / "study.toml")
