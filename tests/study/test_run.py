"""`roikit run`: the whole pipeline from a study file, the extraction cache, the command line."""

from __future__ import annotations

import contextlib
import gzip
import hashlib
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
from roikit.study.schema import StudyError

from conftest import write_participant


@pytest.fixture
def count_reads(monkeypatch):
    """Count the maps extraction reads (effect and variance files), by path."""
    read: list[str] = []
    original = extraction._fetch_flat  # every map file extraction reads goes through it

    def counting(header, volume):
        read.append(os.fspath(header.path))
        return original(header, volume)

    monkeypatch.setattr(extraction, "_fetch_flat", counting)
    return read


def _fresh_values(study, contrasts=("novel",)):
    """A plain extraction of the maps of the contrasts the tiny study's analyses use (only 'novel')."""
    maps = study.maps[study.maps["contrast"].isin(contrasts)].reset_index(drop=True)
    return extract(maps, study.regions, statistic=study.statistic, keep_zeros=study.keep_zeros)


def test_run_writes_every_output_and_matches_the_api(study_dir, count_reads):
    run = run_study(study_dir / "study.toml", figures=False)
    out = study_dir / "results"
    assert run.out == out
    for name in ("region_values.tsv", "region_values.json", "group_results.tsv", "group_results.json", "tables",
                 "report.html", "methods.md", "provenance.json"):
        assert (out / name).exists(), name
    assert not [p for p in out.iterdir() if p.name.startswith((".run-tmp", ".roikit-staging", ".roikit-trash"))]
    # only the analysed contrast ('novel') is read: 8 effect + 8 variance maps, not the 'familiar' ones
    assert run.extracted == 8 and run.reused == 0
    assert len(count_reads) == 16 and not [p for p in count_reads if "familiar" in p]

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
    assert prov["run"]["extraction"]["cache"]["extracted"] == 8
    assert [a["design"] for a in prov["run"]["analyses"]] == ["one-sample", "two-group"]
    assert any(i["role"] == "study file" for i in prov["inputs"])
    assert {o["path"] for o in prov["outputs"]} >= {"region_values.tsv", "group_results.tsv", "report.html"}
    summary = run.summary()
    assert ("8 participants, 8 maps (8 extracted, 0 from the cache; 8 maps of contrasts no analysis uses not "
            "read), 4 regions x 2 analyses") in summary
    assert "analysis[2] two-group novel:" in summary


def _write(values, where):
    from roikit.extraction import write_values

    return write_values(where / "fresh_values.tsv", values)


def test_second_run_extracts_only_the_new_participant(study_dir, count_reads):
    run_study(study_dir / "study.toml", figures=False)
    assert len(count_reads) == 16
    count_reads.clear()

    # nothing changed: nothing is read, and re-running into the study's own results folder needs no overwrite
    again = run_study(study_dir / "study.toml", figures=False)
    assert count_reads == [] and again.extracted == 0 and again.reused == 8

    # one participant added (in participants.tsv too): only their 'novel' effect + variance maps are read
    write_participant(study_dir, "09", np.random.default_rng(9), shift=0.3)
    people = pd.read_csv(study_dir / "participants.tsv", sep="\t", dtype={"participant_id": str})
    people.loc[len(people)] = ["sub-09", "younger", 23, 75.0]
    people.to_csv(study_dir / "participants.tsv", sep="\t", index=False)
    run = run_study(study_dir / "study.toml", figures=False)
    assert sorted({os.path.basename(p) for p in count_reads}) == [
        "sub-09_contrast-novel_effect.nii.gz", "sub-09_contrast-novel_variance.nii.gz"]
    assert run.extracted == 1 and run.reused == 8
    # the merged table is identical to a fresh extraction of all 9 participants
    fresh = _fresh_values(load_study(study_dir / "study.toml"))
    pd.testing.assert_frame_equal(run.values, fresh)
    assert run.results["n"].max() == 9
    novel = run.study.maps[run.study.maps["contrast"] == "novel"]
    assert [i["path"] for i in run.values.attrs["roikit"]["inputs"]] == list(novel["path"])

    # a map whose modification time changed but whose bytes did not is not read again (keyed by content)
    count_reads.clear()
    path = study_dir / "maps" / "sub-03_contrast-novel_effect.nii.gz"
    st = os.stat(path)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))
    run = run_study(study_dir / "study.toml", figures=False)
    assert count_reads == [] and run.reused == 9


def _gzip_stored(raw: bytes) -> bytes:
    """gzip without compression: the file size depends only on the data's length, not on the values."""
    return gzip.compress(raw, compresslevel=0, mtime=0)


def test_a_map_replaced_with_the_same_size_and_time_is_read_again(study_dir, count_reads):
    """Issue 13: the cache was keyed by path, size and mtime, so such a map reused a stale value."""
    path = study_dir / "maps" / "sub-03_contrast-novel_effect.nii.gz"
    raw = gzip.decompress(path.read_bytes())
    path.write_bytes(_gzip_stored(raw))
    first = run_study(study_dir / "study.toml", figures=False)
    st = os.stat(path)

    offset = int(np.frombuffer(raw[108:112], "<f4")[0])  # NIfTI-1 vox_offset
    data = np.frombuffer(raw[offset:], "<f4")
    new_bytes = _gzip_stored(raw[:offset] + np.where(data != 0, data + 5.0, 0).astype("<f4").tobytes())
    path.write_bytes(new_bytes)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert os.stat(path).st_size == st.st_size and os.stat(path).st_mtime_ns == st.st_mtime_ns

    count_reads.clear()
    run = run_study(study_dir / "study.toml", figures=False)
    assert sorted(os.path.basename(p) for p in count_reads) == [
        "sub-03_contrast-novel_effect.nii.gz", "sub-03_contrast-novel_variance.nii.gz"]
    assert run.extracted == 1 and run.reused == 7
    pd.testing.assert_frame_equal(run.values, _fresh_values(load_study(study_dir / "study.toml")))
    mine = run.values["participant_id"] == "sub-03"
    # by construction: every valid voxel moved by +5, so every region mean moves by exactly +5
    np.testing.assert_allclose(run.values.loc[mine, "value"].to_numpy(),
                               first.values.loc[mine, "value"].to_numpy() + 5.0, rtol=1e-6)
    record = [i for i in run.values.attrs["roikit"]["inputs"] if i["path"] == os.fspath(path)][0]
    assert record["sha256"] == hashlib.sha256(new_bytes).hexdigest()


def test_changed_regions_or_statistic_invalidate_the_cache(study_dir, count_reads):
    run_study(study_dir / "study.toml", figures=False)
    count_reads.clear()
    text = (study_dir / "study.toml").read_text()
    (study_dir / "study.toml").write_text(text.replace("radius = 4.0", "radius = 6.0"))
    run = run_study(study_dir / "study.toml", figures=False)  # the same study file: its own folder
    assert run.extracted == 8 and len(count_reads) == 16
    count_reads.clear()
    (study_dir / "study.toml").write_text(text + '\n[extraction]\nstatistic = "median"\n')
    run = run_study(study_dir / "study.toml", figures=False)
    assert run.extracted == 8
    pd.testing.assert_frame_equal(run.values, _fresh_values(load_study(study_dir / "study.toml")))


def test_outputs_are_not_replaced_without_consent(study_dir):
    out = study_dir / "elsewhere"
    run_study(study_dir / "study.toml", out=out, figures=False)
    (out / "notes.txt").write_text("mine")
    # the same study into its own folder: a rerun, no consent needed; the user's file is kept
    run_study(study_dir / "study.toml", out=out, figures=False)
    assert (out / "notes.txt").read_text() == "mine"
    # another study file's run into that folder needs consent (Python spelling in Python)
    other = study_dir / "other.toml"
    other.write_text((study_dir / "study.toml").read_text())
    before = (out / "group_results.tsv").read_bytes()
    with pytest.raises(OutputExistsError, match=r"outputs of roikit run for .*study\.toml.*pass overwrite=True"):
        run_study(other, out=out, figures=False)
    assert (out / "group_results.tsv").read_bytes() == before
    run_study(other, out=out, overwrite=True, figures=False)
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
    assert "p < 0.05 after Holm correction: " in out  # the primary correction (default holm,fdr)
    assert (study_dir / "results" / "report.html").is_file()
    assert any((study_dir / "results" / "figures").glob("*.png"))
    status, out, err = _cli(["run", str(study_dir / "study.toml")])
    assert status == 0, err  # re-running a study into its own results folder is the normal case
    foreign = study_dir / "foreign"
    foreign.mkdir()
    (foreign / "draft.docx").write_bytes(b"not roikit's")
    status, out, err = _cli(["run", str(study_dir / "study.toml"), "--out", str(foreign), "--no-figures"])
    assert status == 1 and "pass --overwrite" in err and "overwrite=True" not in err and err.count("\n") == 1


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
    # the run uses only the analysed contrast ('novel'), all from the cache
    assert count_reads == [] and run.reused == 8 and run.extracted == 0
    novel = values[values["contrast"] == "novel"].reset_index(drop=True)
    for c in novel.select_dtypes("category"):  # a subset keeps the whole table's categories
        novel[c] = novel[c].cat.remove_unused_categories()
    pd.testing.assert_frame_equal(run.values, novel)
    # the run kept the cached maps of the contrast it did not analyse
    again = extract_study(study_dir / "study.toml")
    assert count_reads == [] and again.attrs["roikit"]["cache"]["reused"] == 16




def test_study_correction_space_and_citation_reach_every_output(study_dir):
    text = (study_dir / "study.toml").read_text()
    text = text.replace('labels = "atlas.tsv"\n', 'labels = "atlas.tsv"\nspace = "MNI152NLin2009cAsym"\n'
                        'citation = "Invented atlas, 2026"\n')
    text = text.replace('radius = 4.0\n', 'radius = 4.0\nspace = "MNI152NLin2009cAsym"\n')
    text = text.replace('contrast = "novel"\n\n[[analysis]]', 'contrast = "novel"\ncorrect = "bonferroni"\n\n[[analysis]]')
    (study_dir / "study.toml").write_text(text)
    run = run_study(study_dir / "study.toml", figures=False)
    out = study_dir / "results"
    first = run.results[run.results["analysis"] == 1]
    assert (first["correction"] == "bonferroni").all() and first["p_bonferroni"].notna().all()
    summary = run.summary()
    assert "after Bonferroni correction" in summary and "after Holm correction" in summary  # analyses 1 and 2
    methods = (out / "methods.md").read_text()
    assert "In analysis 1, *p* values were adjusted" in methods and "the Bonferroni method (Dunn, 1961)" in methods
    assert "in MNI152NLin2009cAsym space" in methods and "(Invented atlas, 2026)" in methods
    assert "mm in MNI152NLin2009cAsym coordinates." in methods
    assert "*p*_Bonferroni" in (out / "results.md").read_text()
    from roikit._tables import read_sidecar

    sidecar = read_sidecar(out / "group_results.tsv")  # BIDS layout: provenance in the GeneratedBy entry
    assert [a["primary_correction"] for a in sidecar["analyses"]] == ["bonferroni", "holm"]


def test_study_fwe_without_permutations_is_refused(study_dir):
    text = (study_dir / "study.toml").read_text().replace('contrast = "novel"\n\n', 'contrast = "novel"\ncorrect = "fwe"\n\n', 1)
    (study_dir / "study.toml").write_text(text)
    with pytest.raises(StudyError, match="analysis\\[1\\].correct: fwe .*needs permutations; add permutations = 5000"):
        load_study(study_dir / "study.toml")


def test_value_label_from_the_study_file_and_the_command_line(study_dir):
    """`[study] value_label` reaches the report (figures' axis label, provenance); `--value-label` overrides it."""
    import json

    text = (study_dir / "study.toml").read_text()
    (study_dir / "study.toml").write_text(text.replace('participants = "participants.tsv"\n',
                                                      'participants = "participants.tsv"\nvalue_label = "% signal change"\n'))
    from roikit.study import load_study

    assert load_study(study_dir / "study.toml").value_label == "% signal change"
    status, _, err = _cli(["run", str(study_dir / "study.toml"), "--no-figures"])
    assert status == 0, err
    assert "% signal change" in (study_dir / "results" / "provenance.json").read_text()
    status, _, err = _cli(["run", str(study_dir / "study.toml"), "--out", str(study_dir / "other"),
                           "--value-label", "Parameter estimate (a.u.)"])
    assert status == 0, err
    report_prov = json.loads((study_dir / "other" / "provenance.json").read_text())
    assert "Parameter estimate (a.u.)" in json.dumps(report_prov)
    # the regions drawn in the report: the Regions section with the region figure
    assert (study_dir / "other" / "figures" / "regions.png").is_file()
    assert '<section id="regions"' in (study_dir / "other" / "report.html").read_text()
