"""The `roikit extract` and `roikit regions` commands, run as a user would."""

import json
import subprocess
import sys

import pandas as pd
import pytest

from roikit.cli import main



def _sources(study):
    return ["--atlas", str(study["atlas"]), "--labels", str(study["labels"])]


def test_extract_writes_the_contract_table_and_sidecar(tiny_study, tmp_path, capsys):
    out = tmp_path / "values.tsv"
    code = main(["extract", "--maps", tiny_study["pattern"], "--variance", tiny_study["variance"],
                 *_sources(tiny_study), "--sphere", "prior peak=0,0,0,5", "--out", str(out), "--quiet"])
    assert code == 0
    table = pd.read_csv(out, sep="\t", dtype={"participant_id": str}, na_values="n/a", keep_default_na=False)
    assert list(table.columns) == ["participant_id", "contrast", "region", "value", "n_voxels", "n_valid", "variance"]
    assert len(table) == 4 * 2 * 4
    assert table["region"].unique().tolist() == ["right caudate", "left caudate", "retrosplenial cortex", "prior peak"]
    side = json.loads(out.with_suffix(".json").read_text())["GeneratedBy"][0]
    assert side["provenance"]["statistic"] == "mean"
    assert {r["region"] for r in side["provenance"]["regions"]} == set(table["region"])
    assert all(len(i["sha256"]) == 64 for i in side["provenance"]["inputs"])


def test_extract_reruns_but_refuses_foreign_files_in_one_line(tiny_study, tmp_path, capsys):
    out = tmp_path / "values.tsv"
    args = ["extract", "--maps", tiny_study["pattern"], *_sources(tiny_study), "--out", str(out), "--quiet"]
    assert main(args) == 0
    capsys.readouterr()
    assert main(args) == 0  # its own earlier output: a rerun replaces it
    mine = tmp_path / "mine.tsv"
    mine.write_text("my own table\n")
    foreign = args[:-2] + [str(mine), "--quiet"]
    assert main(foreign) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "file exists and is not an unchanged output of roikit extract; pass " \
        "--overwrite" in err and "overwrite=True" not in err
    assert mine.read_text() == "my own table\n"
    assert main(foreign + ["--overwrite"]) == 0


@pytest.mark.parametrize("args, code, message", [
    (["--maps", "nowhere/sub-{subject}_{contrast}.nii.gz", "--sphere", "s=0,0,0,4"], 1, "matched no file"),
    (["--maps", "x/{contrast}.nii.gz", "--sphere", "s=0,0,0,4"], 2, "no {subject} placeholder"),
    (["--maps", "{pattern}", "--sphere", "bad=1,2,3"], 2, "expected NAME=X,Y,Z,RADIUS"),
    (["--maps", "{pattern}", "--sphere", "far=900,0,0,5"], 1, "no voxel on the maps' grid"),
    (["--maps", "{pattern}", "--labels", "{atlas}"], 2, "--labels goes with --atlas IMAGE"),
    (["--maps", "{pattern}", "--atlas", "{atlas}", "--statistic", "mode"], 2, "--statistic must be one of mean, median"),
    (["--maps", "{pattern}", "--mask", "m={root}/missing.nii.gz"], 1, "missing.nii.gz: file not found"),
    (["--maps", "{pattern}", "--sphere", "s=0,0,0,4", "--jobs", "0"], 2, "--jobs must be an integer >= 1, found 0"),
    (["--sphere", "s=0,0,0,4"], 2, "exactly one of --maps PATTERN or --map-list"),
])
def test_extract_errors_are_one_clear_line(tiny_study, tmp_path, capsys, args, code, message):
    fill = {"pattern": tiny_study["pattern"], "atlas": str(tiny_study["atlas"]), "root": str(tiny_study["root"])}
    args = [fill[a[1:-1]] if a in ("{pattern}", "{atlas}") else a.replace("{root}", fill["root"]) for a in args]
    assert main(["extract", *args, "--out", str(tmp_path / "v.tsv"), "--quiet"]) == code
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0] and err[0].startswith("roikit extract: error:")


def test_regions_lists_name_voxels_volume_and_centre(tiny_study, tmp_path, capsys):
    assert main(["regions", *_sources(tiny_study), "--sphere", "prior peak=0,0,0,5"]) == 0
    out = capsys.readouterr().out
    assert "4 regions on shape 20x24x18" in out
    assert "right caudate" in out and "640.0" in out and "prior peak" in out
    assert main(["regions", "--sphere", "prior peak=0,0,0,5"]) == 2  # spheres alone have no grid
    assert "give --like MAP" in capsys.readouterr().err
    like = tiny_study["maps"][("sub-01", "novel")][0]
    assert main(["regions", "--sphere", "prior peak=0,0,0,5", "--like", str(like), "--out",
                 str(tmp_path / "r.tsv")]) == 0
    table = pd.read_csv(tmp_path / "r.tsv", sep="\t")
    assert table.loc[0, "n_voxels"] == 81 and table.loc[0, ["x_mm", "y_mm", "z_mm"]].tolist() == [0, 0, 0]


def test_console_script_entry_point_runs(tiny_study, tmp_path):
    # the installed command, in a subprocess, as a user would call it
    result = subprocess.run([sys.executable, "-m", "roikit", "regions", *_sources(tiny_study)],
                            capture_output=True, text=True, check=False)
    assert result.returncode == 0, result.stderr
    assert "retrosplenial cortex" in result.stdout
    bad = subprocess.run([sys.executable, "-m", "roikit", "extract", "--out", "x.tsv", "--bogus"], capture_output=True, text=True)
    assert bad.returncode == 2 and "unrecognized arguments" in bad.stderr


def test_extract_on_a_dask_scheduler_matches_the_local_run(tiny_study, tmp_path):
    import distributed  # part of the test install

    local, remote = tmp_path / "local.tsv", tmp_path / "remote.tsv"
    common = ["--maps", tiny_study["pattern"], *_sources(tiny_study), "--quiet"]
    assert main(["extract", *common, "--out", str(local)]) == 0
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as c:
        assert main(["extract", *common, "--scheduler", c.scheduler_address, "--out", str(remote)]) == 0
    assert local.read_text() == remote.read_text()


def test_extract_to_parquet_then_stats_from_it_give_the_tsv_results(tiny_study, tmp_path, capsys):
    from roikit._tables import read_table

    results = {}
    for suffix in ("tsv", "parquet"):
        values = tmp_path / suffix / f"values.{suffix}"
        assert main(["extract", "--maps", tiny_study["pattern"], "--variance", tiny_study["variance"],
                     *_sources(tiny_study), "--out", str(values)]) == 0
        assert f"-> {values} (24 rows, 0 n/a)" in capsys.readouterr().err
        out = tmp_path / suffix / f"one-sample.{suffix}"
        assert main(["stats", str(values), "--design", "one-sample", "--contrast", "novel", "--out", str(out),
                     "--quiet"]) == 0
        results[suffix] = read_table(out)
        assert (tmp_path / suffix / "values.json").is_file()
    assert (tmp_path / "parquet" / "values.parquet").read_bytes()[:4] == b"PAR1"
    a, b = results["tsv"], results["parquet"]
    assert list(a.columns) == list(b.columns)
    for c in a.columns:
        x, y = a[c].tolist(), b[c].tolist()
        # TSV cannot tell an empty text from n/a (both read back as missing); Parquet keeps the empty text
        assert [None if pd.isna(v) or v == "" else v for v in x] == [None if pd.isna(v) or v == "" else v for v in y], c
