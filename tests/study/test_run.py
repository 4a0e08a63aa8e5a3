"""`roikit run`: the whole pipeline from a study file, the extraction cache, the command line."""

from __future__ import annotations

import contextlib
import io
import json
import os

import numpy as np
import pandas as pd
import pytest

import roikit.extraction as extraction
from roikit._tables import read_table
from roikit.cli import main
from roikit.errors import DesignError, OutputExistsError
from roikit.extraction import extract
from roikit.stats import run_design
from roikit.study import load_study, run_study

from conftest import write_participant


@pytest.fixture
def count_reads(monkeypatch):
    """Count the maps extraction reads (effect and variance files), by path."""
    read: list[str] = []
    original = extraction._read_gathered

    def counting(header, volume, uniq):
        read.append(os.fspath(header.path))
        return original(header, volume, uniq)

    monkeypatch.setattr(extraction, "_read_gathered", counting)
    return read


def _fresh_values(study):
    return extract(study.maps, study.regions, statistic=study.statistic, keep_zeros=study.keep_zeros)


def test_run_writes_every_output_and_matches_the_api(study_dir, count_reads):
    run = run_study(study_dir / "study.toml", figures=False)
    out = study_dir / "results"
    assert run.out == out
    for name in ("region_values.tsv", "region_values.json", "group_results.tsv", "group_results.json", "tables",
                 "report.html", "methods.md", "provenance.json"):
        assert (out / name).exists(), name
    assert not [p for p in out.iterdir() if p.name.startswith(".run-tmp")]
    assert run.extracted == 16 and run.reused == 0
    assert len(count_reads) == 32  # 16 effect + 16 variance maps

    # the values are those of a plain extraction; the results those of run_design on them
    study = load_study(study_dir / "study.toml")
    fresh = _fresh_values(study)
    pd.testing.assert_frame_equal(run.values, fresh)
    pd.testing.assert_frame_equal(read_table(out / "region_values.tsv"), read_table(_write(fresh, study_dir)))
    expected = [run_design(fresh, "one-sample", participants=study.participants, contrast="novel"),
                run_design(fresh, "two-group", participants=study.participants, contrast="novel", group="group",
                           levels=["younger", "older"])]
    for k, rows in enumerate(expected, start=1):
        got = run.results[run.results["analysis"] == k].drop(columns="analysis").dropna(axis=1, how="all")
        pd.testing.assert_frame_equal(got.reset_index(drop=True), rows.dropna(axis=1, how="all"),
                                      check_dtype=False)
    table = read_table(out / "group_results.tsv")
    assert list(table["analysis"].unique()) == [1, 2]
    assert table.loc[table["analysis"] == 2, "term"].unique().tolist() == ["younger - older"]

    prov = json.loads((out / "provenance.json").read_text())
    assert prov["kind"] == "roikit run"
    assert prov["run"]["extraction"]["cache"]["extracted"] == 16
    assert [a["design"] for a in prov["run"]["analyses"]] == ["one-sample", "two-group"]
    assert any(i["role"] == "study file" for i in prov["inputs"])
    assert {o["path"] for o in prov["outputs"]} >= {"region_values.tsv", "group_results.tsv", "report.html"}
    summary = run.summary()
    assert "8 participants, 16 maps (16 extracted, 0 from the cache), 4 regions x 2 analyses" in summary
    assert "analysis[2] two-group novel:" in summary


def _write(values, where):
    from roikit.extraction import write_values

    return write_values(where / "fresh_values.tsv", values)


def test_second_run_extracts_only_the_new_participant(study_dir, count_reads):
    run_study(study_dir / "study.toml", figures=False)
    assert len(count_reads) == 32
    count_reads.clear()

    # nothing changed: nothing is read
    again = run_study(study_dir / "study.toml", overwrite=True, figures=False)
    assert count_reads == [] and again.extracted == 0 and again.reused == 16

    # one participant added (in participants.tsv too): only their 2 effect + 2 variance maps are read
    write_participant(study_dir, "09", np.random.default_rng(9), shift=0.3)
    people = pd.read_csv(study_dir / "participants.tsv", sep="\t", dtype={"participant_id": str})
    people.loc[len(people)] = ["sub-09", "younger", 23, 75.0]
    people.to_csv(study_dir / "participants.tsv", sep="\t", index=False)
    run = run_study(study_dir / "study.toml", overwrite=True, figures=False)
    assert sorted({os.path.basename(p) for p in count_reads}) == [
        "sub-09_contrast-familiar_effect.nii.gz", "sub-09_contrast-familiar_variance.nii.gz",
        "sub-09_contrast-novel_effect.nii.gz", "sub-09_contrast-novel_variance.nii.gz"]
    assert run.extracted == 2 and run.reused == 16
    # the merged table is identical to a fresh extraction of all 9 participants
    fresh = _fresh_values(load_study(study_dir / "study.toml"))
    pd.testing.assert_frame_equal(run.values, fresh)
    assert run.results["n"].max() == 9
    assert [i["path"] for i in run.values.attrs["roikit"]["inputs"]] == list(run.study.maps["path"])

    # a map rewritten (new size/modification time) is read again
    count_reads.clear()
    path = study_dir / "maps" / "sub-03_contrast-novel_effect.nii.gz"
    data = path.read_bytes()
    os.utime(path, ns=(os.stat(path).st_atime_ns, os.stat(path).st_mtime_ns + 5_000_000_000))
    run = run_study(study_dir / "study.toml", overwrite=True, figures=False)
    assert sorted(os.path.basename(p) for p in count_reads) == [
        "sub-03_contrast-novel_effect.nii.gz", "sub-03_contrast-novel_variance.nii.gz"]
    assert path.read_bytes() == data


def test_changed_regions_or_statistic_invalidate_the_cache(study_dir, count_reads):
    run_study(study_dir / "study.toml", figures=False)
    count_reads.clear()
    text = (study_dir / "study.toml").read_text()
    (study_dir / "study.toml").write_text(text.replace("radius = 4.0", "radius = 6.0"))
    run = run_study(study_dir / "study.toml", overwrite=True, figures=False)
    assert run.extracted == 16 and len(count_reads) == 32
    count_reads.clear()
    (study_dir / "study.toml").write_text(text + '\n[extraction]\nstatistic = "median"\n')
    run = run_study(study_dir / "study.toml", overwrite=True, figures=False)
    assert run.extracted == 16
    pd.testing.assert_frame_equal(run.values, _fresh_values(load_study(study_dir / "study.toml")))


def test_outputs_are_not_replaced_without_consent(study_dir):
    out = study_dir / "elsewhere"
    run_study(study_dir / "study.toml", out=out, figures=False)
    (out / "notes.txt").write_text("mine")
    before = (out / "group_results.tsv").read_bytes()
    with pytest.raises(OutputExistsError, match="overwrite=True"):
        run_study(study_dir / "study.toml", out=out, figures=False)
    assert (out / "group_results.tsv").read_bytes() == before
    run_study(study_dir / "study.toml", out=out, overwrite=True, figures=False)
    assert (out / "notes.txt").read_text() == "mine"


def test_a_failing_analysis_writes_no_outputs(study_dir):
    text = (study_dir / "study.toml").read_text()
    # 'age' has 8 distinct values: a two-group comparison of two of them leaves one participant per group
    text += '\n[[analysis]]\ndesign = "two-group"\ncontrast = "novel"\ngroup = "age"\nlevels = [21, 61]\n'
    (study_dir / "study.toml").write_text(text)
    with pytest.raises(DesignError, match=r"^analysis\[3\] two-group novel: "):
        run_study(study_dir / "study.toml", figures=False)
    out = study_dir / "results"
    assert not (out / "group_results.tsv").exists() and not (out / "report.html").exists()
    assert (out / ".cache" / "extraction.json").is_file()  # the extraction is kept for the next try


def _cli(args):
    stdout, stderr = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(stderr):
        status = main(args)
    return status, stdout.getvalue(), stderr.getvalue()


def test_command_line_run_with_figures(study_dir):
    status, out, err = _cli(["run", str(study_dir / "study.toml")])
    assert status == 0, err
    assert out.startswith("roikit run: Wayfinding study (tiny test copy)\n")
    assert "p < 0.05 after correction: Holm" in out
    assert (study_dir / "results" / "report.html").is_file()
    assert any((study_dir / "results" / "figures").glob("*.png"))
    status, out, err = _cli(["run", str(study_dir / "study.toml")])
    assert status == 1 and "--overwrite" in err


def test_command_line_reports_all_problems_with_status_2(study_dir):
    text = (study_dir / "study.toml").read_text()
    (study_dir / "study.toml").write_text(text.replace('levels = ["younger", "older"]', 'levels = ["younger", "old"]')
                                          .replace('design = "one-sample"', 'design = "one-sampel"'))
    status, out, err = _cli(["run", str(study_dir / "study.toml"), "--out", str(study_dir / "x")])
    assert status == 2
    lines = err.splitlines()
    assert lines[0].startswith("roikit run: error: ") and lines[0].endswith("2 problems in the study file (nothing was run):")
    assert lines[1] == "  analysis[1].design: 'one-sampel' is not a design; did you mean 'one-sample'? (designs: " \
        + lines[1].split("(designs: ")[1]
    assert lines[2].startswith("  analysis[2].levels: 'old' is not a value of column group")
    assert not (study_dir / "x").exists()


def test_command_line_data_error_exits_1(study_dir):
    # a corrupt map that is not the first one passes validation and fails in extraction
    (study_dir / "maps" / "sub-05_contrast-novel_effect.nii.gz").write_bytes(b"not an image")
    status, out, err = _cli(["run", str(study_dir / "study.toml"), "--quiet", "--no-figures"])
    assert status == 1
    assert "sub-05_contrast-novel_effect.nii.gz" in err


def test_extract_study_uses_the_same_cache_as_run(study_dir, count_reads):
    from roikit.study import extract_study

    values = extract_study(study_dir / "study.toml")
    assert len(count_reads) == 32 and values.attrs["roikit"]["cache"]["extracted"] == 16
    count_reads.clear()
    run = run_study(study_dir / "study.toml", figures=False)
    assert count_reads == [] and run.reused == 16
    pd.testing.assert_frame_equal(run.values, values)
