"""`roikit demo` end to end: the full invented study, the pipeline, and what the results show."""

from __future__ import annotations

import contextlib
import io
import tomllib

import numpy as np
import pytest

from roikit._tables import read_table, sha256_file
from roikit.cli import main
from roikit.demo import CONTRASTS, REGION_NAMES, run_demo
from roikit.errors import OutputExistsError


@pytest.fixture(scope="module")
def full_demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("roikit-demo")
    stdout = io.StringIO()
    with contextlib.redirect_stdout(stdout):
        status = main(["demo", "--out", str(out), "--quiet"])
    return {"out": out, "status": status, "stdout": stdout.getvalue()}


@pytest.mark.slow
def test_demo_runs_end_to_end(full_demo):
    out = full_demo["out"]
    assert full_demo["status"] == 0
    assert full_demo["stdout"].split() == [str(out / "study"), str(out / "results")]
    for rel in ("study/study.toml", "study/participants.tsv", "study/participants.json", "study/atlas.nii.gz",
                "study/atlas.tsv", "study/ground_truth.json", "results/region_values.tsv",
                "results/region_values.json", "results/group_results.tsv", "results/group_results.json",
                "results/report.html", "results/methods.md", "results/provenance.json"):
        assert (out / rel).is_file(), rel
    assert any((out / "results" / "figures").glob("*.png"))
    assert any((out / "results" / "tables").glob("*.tsv"))
    assert sorted(p.name for p in out.iterdir()) == ["results", "study"]  # no temporary folders left
    maps = sorted((out / "study" / "maps").glob("*.nii.gz"))
    assert len(maps) == 32 * len(CONTRASTS) * 2
    # issue 16: two runs of novel-vs-familiar (effect and variance) for the functional region
    assert len(list((out / "study" / "maps" / "runs").glob("*.nii.gz"))) == 32 * 2 * 2
    # issue 3: the study stays under 120 MB
    size = sum(p.stat().st_size for p in (out / "study").rglob("*") if p.is_file())
    assert size < 120e6
    study = tomllib.loads((out / "study" / "study.toml").read_text())
    assert study["maps"]["effect"] == "maps/sub-{subject}_contrast-{contrast}_effect.nii.gz"


@pytest.fixture(scope="module")
def results(full_demo):
    out = full_demo["out"]
    values = read_table(out / "results" / "region_values.tsv")
    truth = read_table(out / "study" / "ground_truth_values.tsv")
    merged = values.merge(truth, on=["participant_id", "contrast", "region"], suffixes=("", "_true"),
                          validate="one_to_one")
    gt = __import__("json").loads((out / "study" / "ground_truth.json").read_text())
    return {"values": values, "merged": merged, "ground_truth": gt}


@pytest.mark.slow
def test_extracted_values_recover_the_ground_truth(results):
    merged = results["merged"]
    assert len(merged) == 32 * len(CONTRASTS) * (len(REGION_NAMES) + 1)
    full = merged[merged["n_valid"] == merged["n_voxels"]]
    z = (full["value"] - full["value_true"]) / full["noise_sd"]
    # every region mean within 5 SD of the region mean of the smooth noise (the generator's noise model;
    # two-sided normal tail beyond 5 SD is 5.7e-7 per value; common practice); SD of z near 1 (about 2800
    # values, standard error of the SD about 0.015)
    assert np.abs(z).max() < 5.0
    assert 0.9 < z.std() < 1.1
    np.testing.assert_allclose(full["variance"], full["variance_true"], rtol=1e-5)


def _modified_z(x: np.ndarray) -> np.ndarray:
    # modified z-score 0.6745 (x - median) / MAD (Iglewicz & Hoaglin 1993)
    med = np.median(x)
    return 0.6745 * (x - med) / np.median(np.abs(x - med))


@pytest.mark.slow
def test_planted_problems_show_in_the_results(results):
    values, gt = results["values"], results["ground_truth"]
    problems = {p["kind"]: p for p in gt["planted_problems"]}
    # dropout: low coverage (fewer than half the voxels valid) in the left hippocampus, every contrast
    drop = values[values["participant_id"] == problems["dropout"]["participant_id"]]
    hc = drop[drop["region"] == "left hippocampus"]
    assert ((hc["n_valid"] / hc["n_voxels"]) < 0.5).all() and len(hc) == len(CONTRASTS)
    others = values[values["participant_id"] != problems["dropout"]["participant_id"]]
    assert (others["n_valid"] == others["n_voxels"]).all()
    # outlier: modified z > 3.5 on novel-vs-familiar in the regions where it was planted (the robust outlier rule)
    nvf = values[values["contrast"] == "novel-vs-familiar"]
    flagged = []
    assert len(problems["outlier"]["offset"]) == 5
    for region in problems["outlier"]["offset"]:
        sub = nvf[nvf["region"] == region].set_index("participant_id")["value"]
        mz = _modified_z(sub.to_numpy())
        flagged.append(sub.index[np.argmax(mz)] == problems["outlier"]["participant_id"] and mz.max() > 3.5)
    assert sum(flagged) >= len(flagged) - 1
    # large first-level variance: the largest region variance in every region and contrast
    for (contrast, region), sub in values.groupby(["contrast", "region"]):
        top = sub.sort_values("variance").iloc[-1]["participant_id"]
        assert top == problems["large_variance"]["participant_id"], (contrast, region)


@pytest.mark.slow
def test_every_analysis_of_the_study_file_ran(full_demo, results):
    out = full_demo["out"]
    group = read_table(out / "results" / "group_results.tsv")
    study = tomllib.loads((out / "study" / "study.toml").read_text())
    assert list(dict.fromkeys(group["design"])) == [a["design"] for a in study["analysis"]]
    for design, sub in group.groupby("design"):
        if design == "repeated-measures":  # one unit per left/right pair of regions.tsv
            assert set(sub["region"]) == {"hippocampus (left, right)", "parahippocampal gyrus (left, right)",
                                          "caudate (left, right)"}
        elif design == "region-difference":
            assert set(sub["region"]) == {"left hippocampus - right hippocampus"}
        elif (sub["contrast"] == "novel-vs-familiar").all():  # the functional region is measured on its runs
            assert set(sub["region"]) == set(REGION_NAMES) | {"prior peak", "novelty fROI"}, design
        else:
            assert set(sub["region"]) == set(REGION_NAMES) | {"prior peak"}, design
    # the planted problems reach roikit's own diagnostics: low coverage and robust outliers
    problems = {p["kind"]: p["participant_id"] for p in results["ground_truth"]["planted_problems"]}
    one = group[(group["design"] == "one-sample")].set_index("region")
    assert one.loc["left hippocampus", "low_coverage_ids"] == problems["dropout"]
    for region in ("left hippocampus", "right hippocampus", "retrosplenial cortex"):
        assert problems["outlier"] in str(one.loc[region, "outlier_ids"]).split(","), region
    html = (out / "results" / "report.html").read_text(encoding="utf-8")
    assert "left hippocampus" in html and problems["dropout"] in html


@pytest.mark.slow
def test_built_in_effects_are_visible(results):
    """The demo's headline truths show in the extracted values (simple numpy summaries, not roikit.stats)."""
    values = results["values"]
    nvf = values[values["contrast"] == "novel-vs-familiar"].pivot(index="participant_id", columns="region",
                                                                   values="value")
    mean, se = nvf.mean(), nvf.std(ddof=1) / np.sqrt(nvf.count())
    for region in ("left hippocampus", "right hippocampus"):
        assert mean[region] / se[region] > 3  # novel > familiar
    for region in ("left caudate", "right caudate"):
        assert mean[region] / se[region] < -2  # familiar > novel
    assert abs(mean["primary visual cortex"] / se["primary visual cortex"]) < 3  # no effect in the control


def test_existing_output_fails_fast(tmp_path, capsys):
    (tmp_path / "study").mkdir()
    assert main(["demo", "--out", str(tmp_path)]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "exists" in err and "--overwrite" in err


def test_negative_seed_is_a_usage_error(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "d"), "--seed", "-1"]) == 2
    assert "--seed must be a non-negative integer" in capsys.readouterr().err
    assert not (tmp_path / "d").exists()


def test_pipeline_is_deterministic_and_overwrites_only_a_demo(tmp_path):
    first = run_demo(tmp_path / "a", seed=5, n_per_group=3, progress=False, figures=False)
    hashes = {name: sha256_file(first.outputs[name]) for name in ("region_values", "group_results")}
    assert set(first.group_results["design"]) == {"one-sample", "paired", "two-group", "glm", "precision-weighted",
                                                  "mixed", "repeated-measures", "region-difference"}
    assert first.outputs["report"].is_file() and first.report["html"] == first.outputs["report"]
    with pytest.raises(OutputExistsError, match="pass overwrite=True"):  # Python spelling in Python
        run_demo(tmp_path / "a", seed=5, n_per_group=3, progress=False)
    # the same seed again, replacing the earlier demo: identical tables
    again = run_demo(tmp_path / "a", seed=5, n_per_group=3, overwrite=True, progress=False, figures=False)
    assert {name: sha256_file(again.outputs[name]) for name in hashes} == hashes
    assert sorted(p.name for p in (tmp_path / "a").iterdir()) == ["results", "study"]
    # a results folder that is not next to a demo study is never replaced
    (tmp_path / "c" / "results").mkdir(parents=True)
    with pytest.raises(OutputExistsError, match="not an earlier demo's results"):
        run_demo(tmp_path / "c", n_per_group=3, overwrite=True, progress=False)


@pytest.mark.slow
def test_within_designs_find_the_expected_patterns(full_demo, results):
    """The ground truth's expected patterns (derived from the generating model) against the demo's results."""
    out = full_demo["out"]
    group = read_table(out / "results" / "group_results.tsv")
    expected = results["ground_truth"]["expected_patterns"]
    rm = group[group["design"] == "repeated-measures"].set_index(["region", "term"])
    units = expected["repeated_measures_route_x_hemisphere_x_group"]["units"]
    for unit, effects in units.items():
        # a route effect of d_z 0.7-1.3 in every pair is found after correction across the three pairs
        assert abs(effects["route"]["d_z"]) > 0.7 and rm.loc[(unit, "route"), "p_holm"] < 0.05, unit
        # the route x hemisphere interaction is 0 or tiny in the model and not found
        assert abs(effects["route:hemisphere"]["d_z"]) < 0.15 and rm.loc[(unit, "route:hemisphere"), "p_holm"] > 0.05
    assert units["caudate (left, right)"]["route:hemisphere"]["absent"]
    one = group[group["design"] == "one-sample"].set_index("region")
    truth = expected["evidence_for_absence_primary_visual_cortex"]
    assert truth["novel_vs_familiar"] == {"younger": 0.0, "older": 0.0}
    visual = one.loc["primary visual cortex"]
    assert visual["bf10"] < 1 and visual["equivalence_bound"] == truth["equivalence_bound_d"]
    # equivalence is expected with probability ~0.73; at the demo's default seed it is shown
    assert visual["p_equivalence"] < 0.05
    assert one.loc["left hippocampus", "bf10"] > 100  # a large route effect: extreme evidence for it
    rd = group[group["design"] == "region-difference"].iloc[0]
    assert rd["p"] > 0.05 and abs(expected["region_difference_hippocampi_novel_vs_familiar"]["d_z"]) < 0.2
    assert any(p.name.startswith("a7-repeated-measures_interaction") for p in (out / "results" / "figures").iterdir())


@pytest.mark.slow
def test_the_functional_region_recovers_its_ground_truth(full_demo, results):
    """Issue 16: the leave-one-run-out functional region finds the focal novelty response the generator planted."""
    import json

    import nibabel as nib

    out = full_demo["out"]
    truth = results["ground_truth"]["functional_region"]
    assert truth["split"] == "run" and truth["localiser"] == truth["tested_contrast"] == "novel-vs-familiar"
    group = read_table(out / "results" / "group_results.tsv")
    one = group[group["design"] == "one-sample"].set_index("region")
    froi, region = one.loc[truth["name"]], one.loc[truth["within"]]
    expected = truth["expected"]
    # the cross-validated estimate's 95% CI holds the model's value (generate._functional_truth derives it: the
    # region's true response plus the focal boost) and this sample's true mean
    assert froi["ci_low"] < expected["population_mean_of_groups"] < froi["ci_high"]
    assert froi["ci_low"] < expected["sample_true_mean"] < froi["ci_high"]
    # what the anatomical region averages away: its whole CI lies below the functional region's
    assert region["ci_high"] < froi["ci_low"]
    # within participants, functional region - anatomical region recovers the boost alone (the participants' true
    # responses cancel): within 3 standard errors of the mean difference
    values = results["values"]
    nvf = values[values["contrast"] == "novel-vs-familiar"].pivot(index="participant_id", columns="region",
                                                                   values="value")
    diff = nvf[truth["name"]] - nvf[truth["within"]]
    se = diff.std(ddof=1) / np.sqrt(len(diff))
    assert abs(diff.mean() - truth["focal_response"]["boost"]) < 3 * se
    # the selections fall in the focal set (17 voxels of the right hippocampus around its centre, outside the
    # prior-peak sphere), recomputed here from the atlas with nibabel
    img = nib.load(out / "study" / "atlas.nii.gz")
    labels = np.asarray(img.dataobj).ravel(order="F")
    ijk = np.indices(img.shape).reshape(3, -1, order="F")
    xyz = (img.affine[:3, :3] @ ijk + img.affine[:3, 3:]).T
    sphere = results["ground_truth"]["regions"][-1]
    focal = ((labels == REGION_NAMES.index(truth["within"]) + 1)
             & (np.linalg.norm(xyz - truth["focal_response"]["center_mm"], axis=1)
                <= truth["focal_response"]["radius_mm"])
             & (np.linalg.norm(xyz - sphere["center_mm"], axis=1) > sphere["radius_mm"]))
    assert focal.sum() == truth["focal_response"]["n_voxels"]
    sidecar = json.loads((out / "results" / "region_values.json").read_text())
    selections = sidecar["GeneratedBy"][0]["provenance"]["functional"]["selections"]
    chosen = [v for record in selections for fold in record["folds"] for v in fold["voxels"]]
    assert len(selections) == 32 and focal[chosen].mean() > 0.9
