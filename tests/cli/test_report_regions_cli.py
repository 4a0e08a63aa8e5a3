"""`roikit report --regions A,B`, and values and results that must cover the same regions."""

from __future__ import annotations

import numpy as np
import pandas as pd

from roikit._tables import write_table
from roikit.cli import main


def _files(tmp_path):
    rng = np.random.default_rng(7)
    regions = ["left hippocampus", "right hippocampus", "retrosplenial cortex"]
    ids = [f"sub-{i:02d}" for i in range(1, 9)]
    values = pd.DataFrame([{"participant_id": p, "contrast": "novel", "region": r, "value": rng.normal(1, 1),
                            "n_voxels": 20, "n_valid": 20} for p in ids for r in regions])
    vpath = tmp_path / "values.tsv"
    write_table(vpath, values)
    rpath = tmp_path / "results.tsv"
    assert main(["stats", str(vpath), "--design", "one-sample", "--contrast", "novel", "--out", str(rpath),
                 "--quiet"]) == 0
    return vpath, rpath, values


def test_report_on_chosen_regions(tmp_path, capsys):
    vpath, rpath, _ = _files(tmp_path)
    out = tmp_path / "report"
    assert main(["report", "--values", str(vpath), "--results", str(rpath), "--out", str(out),
                 "--regions", "left hippocampus,right hippocampus", "--quiet"]) == 0
    html = (out / "report.html").read_text()
    assert "left hippocampus" in html and "retrosplenial cortex" not in html
    assert main(["report", "--values", str(vpath), "--results", str(rpath), "--out", str(tmp_path / "r2"),
                 "--regions", "left hipocampus"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "did you mean 'left hippocampus'" in err


def test_values_and_results_must_cover_the_same_regions(tmp_path, capsys):
    vpath, rpath, values = _files(tmp_path)
    fewer = tmp_path / "one_region.tsv"
    write_table(fewer, values[values["region"] == "left hippocampus"])
    assert main(["report", "--values", str(fewer), "--results", str(rpath), "--out", str(tmp_path / "r")]) == 2
    err = capsys.readouterr().err
    assert "do not cover the same regions (only in --results: right hippocampus, retrosplenial cortex)" in err
    assert err.count("\n") == 1


def test_report_shows_the_overlap_of_regions(tmp_path):
    # provenance of a values table whose regions overlap: 30 of the sphere's 33 voxels lie in region A (80 voxels)
    vpath, rpath, values = _files(tmp_path)
    provenance = {"regions": [{"region": "left hippocampus", "n_voxels": 80},
                              {"region": "right hippocampus", "n_voxels": 33}],
                  "overlaps": [{"region_a": "left hippocampus", "region_b": "right hippocampus", "n_shared": 30,
                                "share_of_a": 30 / 80, "share_of_b": 30 / 33, "share_of_smaller": 30 / 33}]}
    write_table(vpath, values, sidecar={"provenance": provenance}, overwrite=True)
    out = tmp_path / "report"
    assert main(["report", "--values", str(vpath), "--results", str(rpath), "--out", str(out), "--quiet"]) == 0
    html = (out / "report.html").read_text()
    assert "Region overlap" in html and "30 (37.5%)" in html and "30 (90.9%)" in html
