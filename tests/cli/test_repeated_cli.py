"""Repeated measures, region differences and evidence for absence from the command line and from a study file.

Reference values come from libraries no one here wrote: statsmodels ``AnovaRM`` (F and p of a balanced
within-participant design), scipy ``ttest_rel`` / ``ttest_1samp`` (region difference; two one-sided tests built
from one-sided t-tests), statsmodels ``multipletests`` (post-hoc correction) and pingouin ``bayesfactor_ttest``
(JZS Bayes factor).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from helpers import SMALL_SHAPE, save_nifti
from roikit._tables import read_table
from roikit.cli import main

REGIONS = ("left hippocampus", "right hippocampus", "left caudate", "right caudate", "visual cortex")
ROUTES = ("novel", "familiar", "mixed")


def _values(n=14, seed=3):
    """Invented region values: route effect in the hippocampi, none in the visual cortex."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        u = rng.normal(0, 0.5, len(REGIONS))
        for c, route in enumerate(ROUTES):
            for r, region in enumerate(REGIONS):
                effect = 0.6 * (route == "novel") * ("hippocampus" in region) + 0.1 * c * (region == "left caudate")
                rows.append(dict(participant_id=f"sub-{i + 1:02d}", contrast=route, region=region,
                                 value=u[r] + effect + rng.normal(0, 0.4), n_voxels=20, n_valid=20))
    return pd.DataFrame(rows)


@pytest.fixture
def files(tmp_path):
    values = _values()
    values.to_csv(tmp_path / "values.tsv", sep="\t", index=False)
    ids = values["participant_id"].unique()
    pd.DataFrame({"participant_id": ids, "group": ["younger", "older"] * (len(ids) // 2)}).to_csv(
        tmp_path / "participants.tsv", sep="\t", index=False)
    pd.DataFrame({"contrast": list(ROUTES) + ["other"], "route": list(ROUTES) + ["n/a"]}).to_csv(
        tmp_path / "contrasts.tsv", sep="\t", index=False)
    pd.DataFrame({"region": REGIONS, "structure": ["hippocampus", "hippocampus", "caudate", "caudate", "visual cortex"],
                  "hemisphere": ["left", "right", "left", "right", "n/a"]}).to_csv(
        tmp_path / "regions.tsv", sep="\t", index=False)
    return tmp_path


def _stats(files, *args):
    return main(["stats", str(files / "values.tsv"), "--out", str(files / "out.tsv"), *args])


def test_repeated_measures_from_the_command_line_matches_statsmodels_anovarm(files, capsys):
    code = _stats(files, "--design", "repeated-measures", "--within", "route,hemisphere", "--contrasts",
                  str(files / "contrasts.tsv"), "--region-table", str(files / "regions.tsv"))
    assert code == 0, capsys.readouterr().err
    out = read_table(files / "out.tsv")
    # the midline region (hemisphere n/a) is in no hemisphere unit; the two pairs are
    assert set(out["region"]) == {"hippocampus (left, right)", "caudate (left, right)"}
    from statsmodels.stats.anova import AnovaRM

    values = _values()
    for unit, (left, right) in {"hippocampus (left, right)": REGIONS[:2], "caudate (left, right)": REGIONS[2:4]}.items():
        part = values[values["region"].isin([left, right])].assign(
            hemisphere=lambda d: d["region"].str.split(" ").str[0], route=lambda d: d["contrast"])
        # statsmodels AnovaRM(depvar="value", subject="participant_id", within=["route", "hemisphere"])
        table = AnovaRM(part, "value", "participant_id", within=["route", "hemisphere"]).fit().anova_table
        for term, ref in (("route", "route"), ("hemisphere", "hemisphere"), ("route:hemisphere", "route:hemisphere")):
            row = out[(out["region"] == unit) & (out["term"] == term)].iloc[0]
            assert row["statistic"] == pytest.approx(table.loc[ref, "F Value"], rel=1e-8)
            assert row["p"] == pytest.approx(table.loc[ref, "Pr > F"], rel=1e-6)
            assert row["df1"] == table.loc[ref, "Num DF"] and row["df"] == table.loc[ref, "Den DF"]
    cells = json.loads(out.loc[out["term"] == "route", "cells"].iloc[0])
    assert [c[2] for c in cells][:2] == [["novel", "left"], ["novel", "right"]]


def test_between_factor_and_posthoc_use_the_primary_correction(files, capsys):
    from statsmodels.stats.multitest import multipletests

    code = _stats(files, "--design", "repeated-measures", "--within", "route,hemisphere", "--between", "group",
                  "--contrasts", str(files / "contrasts.tsv"), "--region-table", str(files / "regions.tsv"),
                  "--participants", str(files / "participants.tsv"), "--posthoc", "--correct", "bonferroni,holm")
    assert code == 0, capsys.readouterr().err
    out = read_table(files / "out.tsv")
    assert {"route:group", "route:hemisphere:group"} <= set(out["term"])
    post = out[out["term"].str.startswith("route: ")]
    assert len(post) == 2 * 3 and (post["posthoc_correction"] == "bonferroni").all()
    unit = post[post["region"] == "hippocampus (left, right)"]
    # statsmodels multipletests(method="bonferroni") over the three pairs of route in this unit
    expected = multipletests(unit["p"].to_numpy(float), method="bonferroni")[1]
    np.testing.assert_allclose(unit["p_posthoc"].to_numpy(float), expected, rtol=1e-12)
    sidecar = json.loads((files / "out.json").read_text())
    assert sidecar["p_gg"]["Description"].startswith("repeated-measures")


def test_region_difference_from_the_command_line_is_a_paired_test(files, capsys):
    code = _stats(files, "--design", "region-difference", "--regions", "left hippocampus,right hippocampus",
                  "--contrast", "novel")
    assert code == 0, capsys.readouterr().err
    row = read_table(files / "out.tsv").iloc[0]
    wide = _values().query("contrast == 'novel'").pivot(index="participant_id", columns="region", values="value")
    ref = stats.ttest_rel(wide["left hippocampus"], wide["right hippocampus"])  # scipy.stats.ttest_rel
    assert row["term"] == "left hippocampus - right hippocampus"
    assert row["statistic"] == pytest.approx(ref.statistic, rel=1e-10)
    assert row["p"] == pytest.approx(ref.pvalue, rel=1e-10)


def test_region_difference_without_regions_is_a_usage_error(files, capsys):
    assert _stats(files, "--design", "region-difference", "--contrast", "novel") == 2
    err = capsys.readouterr().err
    assert "--regions" in err and len(err.strip().splitlines()) == 1


def test_unknown_within_factor_names_the_tables(files, capsys):
    code = _stats(files, "--design", "repeated-measures", "--within", "town", "--contrasts",
                  str(files / "contrasts.tsv"), "--region-table", str(files / "regions.tsv"))
    assert code == 2
    err = capsys.readouterr().err
    assert "town" in err and "--contrasts" in err


def test_equivalence_and_bayes_factor_from_the_command_line(files, capsys):
    code = _stats(files, "--design", "one-sample", "--contrast", "familiar", "--equivalence", "0.3",
                  "--bayes-factor")
    assert code == 0, capsys.readouterr().err
    out = read_table(files / "out.tsv").set_index("region")
    x = _values().query("contrast == 'familiar' and region == 'visual cortex'")["value"].to_numpy()
    bound = 0.3 * x.std(ddof=1)
    # two one-sided tests from scipy.stats.ttest_1samp against -bound (greater) and +bound (less)
    p_tost = max(stats.ttest_1samp(x, -bound, alternative="greater").pvalue,
                 stats.ttest_1samp(x, bound, alternative="less").pvalue)
    row = out.loc["visual cortex"]
    assert row["p_equivalence"] == pytest.approx(p_tost, rel=1e-8)
    assert row["equivalence_bound"] == 0.3
    pg = pytest.importorskip("pingouin")
    t = stats.ttest_1samp(x, 0).statistic
    # pingouin.bayesfactor_ttest(t, nx=n, r=0.707): JZS Bayes factor (Rouder et al. 2009)
    assert row["bf10"] == pytest.approx(float(pg.bayesfactor_ttest(t, len(x), r=np.sqrt(2) / 2)), rel=1e-3)


STUDY = """\
[study]
title = "Within-participant designs (tiny)"
participants = "participants.tsv"
contrasts = "contrasts.tsv"
regions = "regions.tsv"

[maps]
effect = "maps/sub-{subject}_contrast-{contrast}_effect.nii.gz"

[regions]
atlas = "atlas.nii.gz"
labels = "atlas.tsv"

[[analysis]]
design = "one-sample"
contrast = "familiar"
equivalence = 0.5
bayes_factor = true

[[analysis]]
design = "repeated-measures"
within = ["route", "hemisphere"]
between = "group"
posthoc = true
correct = "fdr,holm"

[[analysis]]
design = "region-difference"
regions = ["left hippocampus", "right hippocampus"]
contrast = "novel"
"""


@pytest.fixture
def study(files):
    root = files / "study"
    (root / "maps").mkdir(parents=True)
    atlas = np.zeros(SMALL_SHAPE, dtype=np.int16)
    boxes = [(slice(2, 6), slice(3, 8), slice(4, 8)), (slice(12, 16), slice(3, 8), slice(4, 8)),
             (slice(2, 6), slice(12, 16), slice(10, 14)), (slice(12, 16), slice(12, 16), slice(10, 14)),
             (slice(8, 11), slice(18, 22), slice(4, 8))]
    for k, box in enumerate(boxes, start=1):
        atlas[box] = k
    save_nifti(root / "atlas.nii.gz", atlas, dtype=np.int16)
    pd.DataFrame({"index": range(1, 6), "name": list(REGIONS)}).to_csv(root / "atlas.tsv", sep="\t", index=False)
    values = _values()
    for (pid, contrast), part in values.groupby(["participant_id", "contrast"]):
        data = np.zeros(SMALL_SHAPE, dtype=np.float32)
        for k, region in enumerate(REGIONS, start=1):
            data[atlas == k] = part.loc[part["region"] == region, "value"].iloc[0]
        save_nifti(root / "maps" / f"{pid}_contrast-{contrast}_effect.nii.gz", data)
    for name in ("participants.tsv", "contrasts.tsv", "regions.tsv"):
        (root / name).write_bytes((files / name).read_bytes())
    (root / "study.toml").write_text(STUDY, encoding="utf-8")
    return root


def test_study_file_runs_the_within_designs_and_reports_them(study, capsys):
    out = study / "results"
    assert main(["run", str(study / "study.toml"), "--out", str(out), "--quiet"]) == 0, capsys.readouterr().err
    results = read_table(out / "group_results.tsv")
    assert set(results["design"]) == {"one-sample", "repeated-measures", "region-difference"}
    rm = results[results["design"] == "repeated-measures"]
    assert (rm.loc[rm["term"].str.startswith("route: "), "posthoc_correction"] == "fdr").all()
    # the values were written into the maps as constants per region, so the study reproduces the table's tests
    rd = results[results["design"] == "region-difference"].iloc[0]
    wide = _values().query("contrast == 'novel'").pivot(index="participant_id", columns="region", values="value")
    ref = stats.ttest_rel(wide["left hippocampus"], wide["right hippocampus"])  # scipy.stats.ttest_rel
    assert rd["statistic"] == pytest.approx(ref.statistic, rel=1e-5)
    assert results.loc[results["design"] == "one-sample", "bf10"].notna().all()
    text = (out / "results.md").read_text(encoding="utf-8")
    assert "evidence for no effect" in text or "evidence for an effect" in text
    assert "two one-sided tests" in text
    assert "Gelman & Stern, 2006" in text and "as analysis 3 does" in text
    assert any(p.name.startswith("a2-repeated-measures_interaction") for p in (out / "figures").iterdir())
    bib = (out / "references.bib").read_text(encoding="utf-8")
    assert "gelman2006" in bib and "lee2013" in bib and "jeffreys1961" in bib


def test_study_file_refuses_evidence_options_for_other_designs(study, capsys):
    text = (study / "study.toml").read_text(encoding="utf-8").replace(
        'contrast = "novel"\n', 'contrast = "novel"\nbayes_factor = true\n')
    (study / "study.toml").write_text(text, encoding="utf-8")
    assert main(["run", str(study / "study.toml"), "--out", str(study / "results"), "--quiet"]) == 2
    assert "analysis[3].bayes_factor" in capsys.readouterr().err


def test_report_takes_results_about_several_regions(files, capsys):
    """Rows over a within-region factor ("hippocampus (left, right)") and region differences ("A - B") name no
    region of the values table, yet use only its regions: roikit report takes them, and --regions keeps the rows
    whose regions are all chosen."""
    assert _stats(files, "--design", "repeated-measures", "--within", "route,hemisphere", "--contrasts",
                  str(files / "contrasts.tsv"), "--region-table", str(files / "regions.tsv")) == 0
    rm = read_table(files / "out.tsv")
    assert main(["stats", str(files / "values.tsv"), "--out", str(files / "diff.tsv"), "--design",
                 "region-difference", "--regions", "left hippocampus,right hippocampus", "--contrast", "novel"]) == 0
    both = pd.concat([rm, read_table(files / "diff.tsv")], ignore_index=True, sort=False)
    both.to_csv(files / "both.tsv", sep="\t", index=False, na_rep="n/a")
    capsys.readouterr()
    # the midline region is in no hemisphere pair, so no result uses it: still refused
    assert main(["report", "--values", str(files / "values.tsv"), "--results", str(files / "both.tsv"), "--out",
                 str(files / "report"), "--quiet"]) == 2
    assert "only in --values: visual cortex)" in capsys.readouterr().err
    values = read_table(files / "values.tsv")
    values[values["region"] != "visual cortex"].to_csv(files / "paired.tsv", sep="\t", index=False)
    assert main(["report", "--values", str(files / "paired.tsv"), "--results", str(files / "both.tsv"), "--out",
                 str(files / "report"), "--quiet"]) == 0, capsys.readouterr().err
    html = (files / "report" / "report.html").read_text(encoding="utf-8")
    assert "hippocampus (left, right)" in html and "caudate (left, right)" in html
    assert main(["report", "--values", str(files / "values.tsv"), "--results", str(files / "both.tsv"), "--out",
                 str(files / "report2"), "--regions", "left hippocampus,right hippocampus", "--quiet"]) == 0
    html = (files / "report2" / "report.html").read_text(encoding="utf-8")
    assert "hippocampus (left, right)" in html and "left hippocampus - right hippocampus" in html
    assert "caudate (left, right)" not in html


def test_posthoc_pairs_are_reported_with_their_own_correction(files, capsys):
    """Post-hoc rows stay in their analysis; text and table give p adjusted across the pairs (p_posthoc) as
    *p*_pairs beside the across-region correction, with M_diff and the pair in words."""
    assert _stats(files, "--design", "repeated-measures", "--within", "route", "--contrasts",
                  str(files / "contrasts.tsv"), "--posthoc") == 0, capsys.readouterr().err
    out = read_table(files / "out.tsv")
    pair = out[(out["region"] == "left hippocampus") & (out["term"] == "route: novel - familiar")].iloc[0]
    assert main(["report", "--values", str(files / "values.tsv"), "--results", str(files / "out.tsv"), "--out",
                 str(files / "report"), "--quiet"]) == 0, capsys.readouterr().err
    results = (files / "report" / "results.md").read_text(encoding="utf-8")
    assert "*Analysis 2" not in results  # the pairs belong to analysis 1
    assert ("Post-hoc pair novel − familiar (route), paired *t*-tests in each region: *p* values were adjusted "
            "with the Holm method across the 3 pairs of route within each region (*p*_pairs)") in results
    from roikit.reporting.format import format_p

    sentence = results.split("Post-hoc pair novel − familiar")[1].split("Right hippocampus")[0]
    sentence = sentence.replace("\u00a0", " ")  # the text keeps "= value" together with no-break spaces
    assert f"*p*_pairs = {format_p(pair['p_posthoc'])}" in sentence and "*M*_diff = " in sentence
    table = next((files / "report" / "tables").glob("a1-repeated-measures.md")).read_text(encoding="utf-8")
    assert "| left hippocampus | route: novel − familiar |" in table and "*p*_pairs" in table
    assert "*p*_pairs = *p* of the post-hoc paired *t*-test adjusted with the Holm method across the 3 pairs" in table
