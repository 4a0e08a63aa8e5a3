"""Region hygiene in study files: midline, an atlas without a label table, overlap in the values' provenance."""

from __future__ import annotations

import pandas as pd
import pytest

from roikit.cli import main
from roikit.study import load_study
from roikit.study.schema import StudyError


def test_midline_key_and_atlas_without_labels(study_dir):
    text = (study_dir / "study.toml").read_text()
    text = text.replace('labels = "atlas.tsv"\n', 'split_hemispheres = ["label 3"]\nmidline = "both"\n')
    (study_dir / "study.toml").write_text(text)
    with pytest.warns(Warning):
        study = load_study(study_dir / "study.toml")
    assert study.realised.names[:2] == ["label 1", "label 2"]
    assert "left label 3" in study.realised.names and "right label 3" in study.realised.names
    (study_dir / "study.toml").write_text(text.replace('midline = "both"', 'midline = "center"'))
    with pytest.raises(StudyError, match="regions.midline: must be one of drop, both, left, right"):
        load_study(study_dir / "study.toml")


def test_midline_on_the_command_line(study_dir, tmp_path, capsys):
    # a sphere centred on x = 0 mm: symmetric halves when the midline is dropped, the left half larger by the
    # midline slab when it goes left (by construction)
    like = str(study_dir / "maps" / "sub-01_contrast-novel_effect.nii.gz")
    counts = {}
    for midline in ("drop", "left"):
        out = tmp_path / f"{midline}.tsv"
        assert main(["regions", "--sphere", "c=0,0,0,4", "--split-hemispheres", "--midline", midline,
                     "--like", like, "--out", str(out)]) == 0
        table = pd.read_csv(out, sep="\t")
        counts[midline] = dict(zip(table["region"], table["n_voxels"]))
    assert counts["drop"]["left c"] == counts["drop"]["right c"] == counts["left"]["right c"]
    assert counts["left"]["left c"] > counts["drop"]["left c"]
    capsys.readouterr()
    with pytest.raises(SystemExit):
        main(["regions", "--atlas", "a.nii.gz", "--midline", "centre"])
    assert "invalid choice: 'centre'" in capsys.readouterr().err


def test_overlap_found_when_the_study_is_loaded_is_in_warnings_tsv(study_dir, tmp_path):
    from roikit._tables import read_table
    from roikit.study import run_study

    text = (study_dir / "study.toml").read_text().replace(
        "[[analysis]]", '[[regions.sphere]]\nname = "peak copy"\ncenter = [-10.0, 0.0, 0.0]\nradius = 4.0\n\n'
        "[[analysis]]", 1)
    (study_dir / "study.toml").write_text(text)
    with pytest.warns(Warning, match="overlapping regions"):
        study = load_study(study_dir / "study.toml")
    with pytest.warns(Warning):
        run_study(study, out=tmp_path / "results", figures=False)
    table = read_table(tmp_path / "results" / "warnings.tsv")
    overlap = table[table["kind"] == "region overlap"]
    # the sphere overlaps an atlas region, and its copy overlaps both: three findings, each once
    assert overlap["region"].tolist() == ["22/33 voxels of prior peak lie in left caudate",
                                          "22/33 voxels of peak copy lie in left caudate",
                                          "33/33 voxels of prior peak lie in peak copy"]


def test_select_and_rename_on_the_command_line_as_in_a_study_file(study_dir, tmp_path):
    out = tmp_path / "regions.tsv"
    assert main(["regions", "--atlas", str(study_dir / "atlas.nii.gz"), "--labels", str(study_dir / "atlas.tsv"),
                 "--select", "left caudate,right caudate", "--rename", "left caudate=caudate L", "--like",
                 str(study_dir / "maps" / "sub-01_contrast-novel_effect.nii.gz"), "--out", str(out)]) == 0
    assert pd.read_csv(out, sep="\t")["region"].tolist() == ["caudate L", "right caudate"]


def test_quiet_run_prints_no_warning_but_keeps_them_in_the_files(study_dir, tmp_path, capsys):
    out = tmp_path / "results"
    assert main(["run", str(study_dir / "study.toml"), "--out", str(out), "--no-figures", "--quiet"]) == 0
    captured = capsys.readouterr()
    assert captured.err == "" and captured.out.strip() == str(out)
    assert (out / "warnings.tsv").is_file()
    out2 = tmp_path / "loud"
    assert main(["run", str(study_dir / "study.toml"), "--out", str(out2), "--no-figures"]) == 0
    err = capsys.readouterr().err.splitlines()
    assert err and all(len(line) <= 200 for line in err)
    assert err[-1].startswith("roikit: every warning, one row per participant and region:")
    assert len(err) - 1 == len(set(pd.read_csv(out2 / "warnings.tsv", sep="\t")["problem"]))


def test_the_report_lists_the_run_s_warnings(study_dir, tmp_path):
    from roikit.study import run_study

    with pytest.warns(Warning):
        run = run_study(study_dir / "study.toml", out=tmp_path / "results", figures=False)
    html = (tmp_path / "results" / "report.html").read_text()
    problems = list(dict.fromkeys(w["problem"] for w in run.warnings))
    assert problems and '<section id="warnings">' in html
    assert all(p.replace("'", "&#x27;").replace(">", "&gt;").replace("<", "&lt;") in html
               for p in problems if "report carries" not in p)
