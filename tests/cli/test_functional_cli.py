"""Functional regions on the command line: `roikit extract --functional`, the guard in command-line language, and
`roikit stats` on per-run values tables; the same numbers as a study file run through `roikit run`.

Expected values are known by construction (the study path is the reference for "the same definition") or computed
here by hand with nibabel (the selection), as stated beside each check.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pytest

from helpers import write_run_study
from roikit._tables import read_table
from roikit.cli import main
from roikit.cli._extract import functional_from_args
from roikit.errors import UsageError
from roikit.extraction import extract, find_maps
from roikit.functional import FunctionalRegion, extract_functional
from roikit.regions import Atlas, RegionSet
from roikit.study import run_study

LABELS = ("01", "02", "03", "04", "05")
EFFECT = "maps/sub-{subject}_run-{run}_contrast-{contrast}_effect.nii.gz"
VARIANCE = "maps/sub-{subject}_run-{run}_contrast-{contrast}_variance.nii.gz"
SPEC = "novelty fROI:within=right caudate,localiser=novel,top=20%,split=run"

STUDY = f"""\
[study]
title = "Wayfinding study (functional region, command line)"

[maps]
effect = "{EFFECT}"
variance = "{VARIANCE}"

[regions]
atlas = "atlas.nii.gz"
labels = "atlas.tsv"

[[regions.functional]]
name = "novelty fROI"
within = "right caudate"
localiser = "novel"
top = "20%"
split = "run"

[[analysis]]
design = "one-sample"
contrast = "novel"

[[analysis]]
design = "paired"
contrast = "novel"
versus = "familiar"
"""


@pytest.fixture
def runs_dir(tmp_path):
    root = write_run_study(tmp_path / "study", LABELS, 1616, novel=0.4)
    (root / "study.toml").write_text(STUDY, encoding="utf-8")
    return root


def _extract_argv(root, out, *more):
    return ["extract", "--maps", str(root / EFFECT), "--variance", str(root / VARIANCE),
            "--atlas", str(root / "atlas.nii.gz"), "--labels", str(root / "atlas.tsv"), "--out", str(out), *more]


def _tsv(frame: pd.DataFrame) -> bytes:
    buffer = io.StringIO()
    frame.to_csv(buffer, sep="\t", index=False, na_rep="n/a", float_format="%.17g")
    return buffer.getvalue().encode()


def _sorted(table: pd.DataFrame) -> pd.DataFrame:
    keys = ["participant_id", "contrast", "region", "run_id"]
    table = table.astype({k: str for k in keys})
    return table.sort_values(keys).reset_index(drop=True)


# ------------------------------------------------------------------------------------------ command line = study
def test_command_line_and_study_file_give_identical_values(runs_dir, tmp_path):
    run = run_study(runs_dir / "study.toml", out=tmp_path / "results", figures=False)
    from_study = read_table(tmp_path / "results" / "region_values.tsv")
    out = tmp_path / "values.tsv"
    assert main(_extract_argv(runs_dir, out, "--functional", SPEC, "--quiet")) == 0
    from_cli = read_table(out)
    assert list(from_cli.columns) == list(from_study.columns)
    assert "run_id" in from_cli.columns and {"n_search", "selected_share", "n_folds"} <= set(from_cli.columns)
    froi = from_cli[from_cli["region"] == "novelty fROI"]
    # one row per participant and tested contrast (both are analysed), no run: the mean over the two folds
    assert len(froi) == len(LABELS) * 2 and froi["run_id"].isna().all() and (froi["n_folds"] == 2).all()
    # 20% of the 80 voxels of the right caudate, all valid: ceil(16) = 16 by construction
    assert (froi["n_voxels"] == 16).all() and (froi["n_search"] == 80).all()
    # the same definition on both paths: identical numbers, to 17 significant digits
    assert _tsv(_sorted(from_cli)) == _tsv(_sorted(from_study))
    # counts are written as whole numbers (n/a for the anatomical regions)
    text = out.read_text(encoding="utf-8").splitlines()
    assert any(line.endswith("\t80\t0.2\t2") for line in text)
    # and the written lines of every row are the same bytes on both paths
    study_text = (tmp_path / "results" / "region_values.tsv").read_text(encoding="utf-8").splitlines()
    assert text[0] == study_text[0] and sorted(text) == sorted(study_text)
    # the sidecar: functional columns described, the selection rule and every fold's voxels recorded
    sidecar = json.loads(out.with_suffix(".json").read_text())
    assert sidecar["n_search"]["Description"].startswith("Functional regions only")
    assert sidecar["run_id"]["Description"].startswith("Run label")
    prov = sidecar["GeneratedBy"][0]["provenance"]["functional"]
    assert prov["regions"][0]["selection"].startswith("top 20% of the valid voxels by novel within right caudate")
    assert prov["maps_read"] == 0 and prov["maps_from_extraction"] == len(LABELS) * 4  # no map read twice
    study_prov = run.values.attrs["roikit"]["functional"]["selections"]
    assert [s["folds"][0]["voxels"] for s in prov["selections"]] == [s["folds"][0]["voxels"] for s in study_prov]

    # by hand with nibabel: select the top 16 of run 2's localiser, measure run 1 (and the reverse), average
    import nibabel as nib

    atlas = np.asarray(nib.load(runs_dir / "atlas.nii.gz").dataobj).ravel(order="F")
    space = np.flatnonzero(atlas == 1)

    def voxels(run_, label, contrast):
        img = nib.load(runs_dir / "maps" / f"sub-{label}_run-{run_}_contrast-{contrast}_effect.nii.gz")
        return np.asarray(img.dataobj, dtype=float).ravel(order="F")[space]

    # (the localiser of one run alone is used as it is: a single training run needs no weighting)
    by_hand = np.mean([voxels(held, "02", "familiar")[np.argsort(-voxels(train, "02", "novel"),
                                                                 kind="stable")[:16]].mean()
                       for held, train in ((1, 2), (2, 1))])
    got = froi[(froi["participant_id"] == "sub-02") & (froi["contrast"] == "familiar")]["value"].iloc[0]
    assert got == pytest.approx(by_hand, rel=1e-9)


def test_parquet_output_holds_the_functional_rows(runs_dir, tmp_path):
    out = tmp_path / "values.parquet"
    assert main(_extract_argv(runs_dir, out, "--functional", SPEC, "--quiet")) == 0
    table = pd.read_parquet(out)
    assert (table["region"] == "novelty fROI").sum() == len(LABELS) * 2


def test_functional_contrasts_restrict_what_is_measured(runs_dir, tmp_path):
    out = tmp_path / "values.tsv"
    assert main(_extract_argv(runs_dir, out, "--functional", SPEC, "--functional-contrasts", "familiar",
                              "--quiet")) == 0
    froi = read_table(out).query("region == 'novelty fROI'")
    assert set(froi["contrast"]) == {"familiar"} and len(froi) == len(LABELS)


# ------------------------------------------------------------------------------------------ the guard
def test_the_guard_refuses_before_any_map_is_read_in_command_line_language(runs_dir, tmp_path, capsys):
    # a broken map: reading any map would fail with another message, so the guard must come first
    broken = runs_dir / "maps" / "sub-01_run-1_contrast-novel_effect.nii.gz"
    broken.write_bytes(b"not an image")
    out = tmp_path / "values.tsv"
    circular = "novelty fROI:within=right caudate,localiser=novel,top=20%"
    assert main(_extract_argv(runs_dir, out, "--functional", circular)) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("roikit extract: error: functional region 'novelty fROI'")
    for part in ("localiser 'novel'", "tested contrast 'novel'", "split=run to --functional", "--maps",
                 "independent runs", "circular_ok in --functional"):
        assert part in err
    assert "=True" not in err and 'split = "run"' not in err  # no Python or study-file spelling
    assert not out.exists()


def test_without_runs_the_localiser_itself_is_refused_another_contrast_cautioned(runs_dir, tmp_path, capsys):
    (tmp_path / "flat").mkdir()
    for contrast in ("novel", "familiar"):
        src = runs_dir / "maps" / f"sub-01_run-1_contrast-{contrast}_effect.nii.gz"
        for label in ("01", "02"):
            (tmp_path / "flat" / f"sub-{label}_contrast-{contrast}.nii.gz").write_bytes(src.read_bytes())
    argv = ["extract", "--maps", str(tmp_path / "flat" / "sub-{subject}_contrast-{contrast}.nii.gz"),
            "--atlas", str(runs_dir / "atlas.nii.gz"), "--labels", str(runs_dir / "atlas.tsv")]
    spec = "f:within=right caudate,localiser=novel,top=5"
    assert main([*argv, "--functional", spec, "--out", str(tmp_path / "a.tsv")]) == 2
    assert "tested contrast 'novel'" in capsys.readouterr().err
    # measuring only the other contrast: runs, with a caution (independence is the user's argument)
    assert main([*argv, "--functional", spec, "--functional-contrasts", "familiar",
                 "--out", str(tmp_path / "b.tsv")]) == 0
    assert "warning" in capsys.readouterr().err
    # split without runs: a usage error naming --maps
    assert main([*argv, "--functional", spec + ",split=run", "--out", str(tmp_path / "c.tsv")]) == 2
    assert "split=run needs maps with runs (a {run} placeholder in --maps" in capsys.readouterr().err
    # circular_ok alone: runs, and the region is listed as circular in the sidecar
    assert main([*argv, "--functional", spec + ",circular_ok", "--out", str(tmp_path / "d.tsv"), "--quiet"]) == 0
    sidecar = json.loads((tmp_path / "d.json").read_text())
    assert sidecar["GeneratedBy"][0]["provenance"]["circular_regions"] == ["f"]


# ------------------------------------------------------------------------------------------ the spelling
def test_the_spelling_of_functional():
    a, b = functional_from_args(["fROI, left:within=Frontal Pole, left,localiser=novel,threshold=3.1,circular_ok,"
                                 "minimum=4", "g:within=x,localiser=y,top=20"])
    # by construction: commas inside a region name stay in the name; circular_ok alone means true
    assert a == FunctionalRegion("fROI, left", "Frontal Pole, left", "novel", threshold=3.1, circular_ok=True,
                                 minimum=4)
    assert b.top == 20 and isinstance(b.top, int)
    assert functional_from_args(["h:within=x,localiser=y,top=12.5%"])[0].top == "12.5%"


@pytest.mark.parametrize("text, message", [
    ("nameonly", "expected NAME:within=REGION"),
    ("f:within=x", "give localiser="),
    ("f:within=x,localiser=y", "give top"),
    ("f:within=x,localiser=y,top=5,threshold=2", "one of them"),
    ("f:within=x,localiser=y,top=0%", "top must be a voxel count"),
    ("f:within=x,localiser=y,top=5,treshold=2", "did you mean 'threshold'"),
    ("f:within=x,localiser=y,top=5,split=runs", "did you mean 'run'"),
    ("f:within=x,localiser=y,top=5,minimum=0", "minimum must be an integer >= 1"),
    ("f:within=x,localiser=y,top=5,circular_ok=maybe", "circular_ok must be true or false"),
])
def test_bad_functional_texts_name_the_option(text, message):
    with pytest.raises(UsageError, match=message) as err:
        functional_from_args([text])
    assert str(err.value).startswith("--functional ")


def test_functional_options_come_from_the_options_table():
    from roikit._options import option
    from roikit.cli import build_parser

    assert option("functional", "regions").cli == "--functional"
    help_text = build_parser("extract").format_help() + build_parser("extract")._subparsers._group_actions[0] \
        .choices["extract"].format_help()
    assert "--functional NAME:KEY=VALUE" in help_text and "--functional-contrasts" in help_text


# ------------------------------------------------------------------------------------------ Python API
def test_extract_with_functional_equals_extract_functional_and_reads_once(runs_dir):
    maps = find_maps(EFFECT, variance=VARIANCE, root=runs_dir)
    regions = RegionSet([Atlas(runs_dir / "atlas.nii.gz", runs_dir / "atlas.tsv")])
    froi = FunctionalRegion("novelty fROI", "right caudate", "novel", top=7, split="run")
    table = extract(maps, regions, functional=[froi])
    alone = extract(maps, regions)
    from roikit.images import read_header

    direct = extract_functional(maps, regions.realise(read_header(maps.path[0]).grid), [froi])
    assert len(table) == len(alone) + len(direct)
    np.testing.assert_array_equal(table["value"].to_numpy()[len(alone):], direct["value"].to_numpy())
    np.testing.assert_array_equal(table["value"].to_numpy()[:len(alone)], alone["value"].to_numpy())
    assert table.attrs["roikit"]["functional"]["maps_read"] == 0
    with pytest.raises(UsageError, match=r'add split="run" \(maps'):  # Python spelling outside the command line
        extract(maps, regions, functional=[FunctionalRegion("f", "right caudate", "novel", top=3)])


# ------------------------------------------------------------------------------------------ stats on runs
def test_stats_on_a_per_run_table_gives_roikit_runs_results(runs_dir, tmp_path, capsys):
    run = run_study(runs_dir / "study.toml", out=tmp_path / "results", figures=False)
    values = tmp_path / "results" / "region_values.tsv"
    assert "run_id" in read_table(values).columns
    from_study = read_table(tmp_path / "results" / "group_results.tsv")
    argvs = [["--design", "one-sample", "--contrast", "novel"],
             ["--design", "paired", "--contrast", "novel", "--versus", "familiar"]]
    for number, argv in enumerate(argvs, start=1):
        out = tmp_path / f"cli-{number}.tsv"
        assert main(["stats", str(values), *argv, "--out", str(out)]) == 0
        assert "averaged over 2 runs" in capsys.readouterr().err
        cli_rows = read_table(out).dropna(axis=1, how="all")
        study_rows = from_study[from_study["analysis"] == number].drop(columns="analysis").dropna(axis=1, how="all")
        assert set(cli_rows.columns) == set(study_rows.columns)
        assert _tsv(cli_rows) == _tsv(study_rows[list(cli_rows.columns)].reset_index(drop=True)), argv
        # the functional region is analysed with the anatomical ones: one value per participant
        assert set(cli_rows["region"]) == {"right caudate", "left caudate", "novelty fROI"}
        assert (cli_rows["n"] == len(LABELS)).all()
        runs = json.loads(out.with_suffix(".json").read_text())["GeneratedBy"][0]["runs"]
        assert runs["averaged_over_runs"] and runs["runs"] == 2 and "mean over runs" in runs["note"]
    # the mean over runs by hand (pandas): one-sample estimate of the right caudate = mean of per-participant means
    table = read_table(values)
    rc = table[(table["region"] == "right caudate") & (table["contrast"] == "novel")]
    by_hand = rc.groupby("participant_id")["value"].mean().mean()
    got = read_table(tmp_path / "cli-1.tsv").set_index("region").loc["right caudate", "estimate"]
    assert got == pytest.approx(by_hand, rel=1e-12)
    assert len(run.per_analysis) == 2
