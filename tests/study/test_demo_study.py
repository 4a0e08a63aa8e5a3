"""`roikit run` on the demo's study file reproduces the demo's results exactly."""

from __future__ import annotations

import contextlib
import io

import pandas as pd
import pytest

from roikit._tables import read_table
from roikit.cli import main
from roikit.demo import run_demo


@pytest.mark.slow
def test_run_on_the_demo_study_reproduces_the_demo(tmp_path):
    demo = run_demo(tmp_path / "demo", progress=False, figures=False)
    out = tmp_path / "run"
    stdout = io.StringIO()
    with contextlib.redirect_stdout(stdout):
        status = main(["run", str(demo.study.path / "study.toml"), "--out", str(out), "--no-figures"])
    assert status == 0
    assert ("32 participants, 288 maps (288 extracted, 0 from the cache; 64 per-run maps for the functional regions, "
            "read), 11 regions x 8 analyses") in stdout.getvalue()
    # the region values: the same bytes
    assert (out / "region_values.tsv").read_bytes() == (demo.results / "region_values.tsv").read_bytes()
    # the group results: the same table, row for row (the demo runs the study file through run_study too)
    ours = read_table(out / "group_results.tsv")
    theirs = read_table(demo.results / "group_results.tsv")
    pd.testing.assert_frame_equal(ours, theirs)
    assert len(theirs) > 0 and theirs["design"].nunique() == 8
    assert theirs["analysis"].tolist() == sorted(theirs["analysis"].tolist())
