"""Study files carry per-contrast tables and the mixed / precision-weighted options (`roikit run`)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from helpers import SMALL_SHAPE, save_nifti
from roikit._tables import read_table
from roikit.cli import main
from roikit.stats import run_design

STUDY = """\
[study]
title = "Wayfinding load (tiny)"
contrasts = "contrasts.tsv"

[maps]
effect = "maps/sub-{{subject}}_contrast-{{contrast}}_effect.nii.gz"

[regions]
atlas = "atlas.nii.gz"
labels = "atlas.tsv"

[[analysis]]
design = "mixed"
formula = "value ~ load"
random = "1"
estimation = "{estimation}"
center = {center}
"""


@pytest.fixture
def study(tmp_path):
    root = tmp_path / "study"
    (root / "maps").mkdir(parents=True)
    rng = np.random.default_rng(5)
    atlas = np.zeros(SMALL_SHAPE, dtype=np.int16)
    atlas[2:6, 3:8, 4:8] = 1
    atlas[12:18, 10:14, 6:10] = 2
    save_nifti(root / "atlas.nii.gz", atlas, dtype=np.int16)
    pd.DataFrame({"index": [1, 2], "name": ["left hippocampus", "caudate"]}).to_csv(root / "atlas.tsv", sep="\t",
                                                                                  index=False)
    loads = {"route1": 1.0, "route2": 2.0, "route3": 4.0}
    for i in range(8):
        u = rng.normal(0, 0.5)
        for contrast, load in loads.items():
            data = (u + 0.3 * load + rng.normal(0, 1.0, SMALL_SHAPE)).astype(np.float32)
            save_nifti(root / "maps" / f"sub-{i + 1:02d}_contrast-{contrast}_effect.nii.gz", data)
    pd.DataFrame({"contrast": list(loads), "load": list(loads.values())}).to_csv(root / "contrasts.tsv", sep="\t",
                                                                                 index=False)
    return root


def test_study_file_with_a_contrasts_table_runs_the_mixed_model(study):
    (study / "study.toml").write_text(STUDY.format(estimation="ml", center="false"), encoding="utf-8")
    out = study / "results"
    assert main(["run", str(study / "study.toml"), "--out", str(out)]) == 0
    res = read_table(out / "group_results.tsv")
    load = res[res["term"] == "load"]
    assert set(load["estimation"]) == {"ml"} and load["centered"].isna().all()
    # the same model through the Python API on the values the run extracted
    values = read_table(out / "region_values.tsv")
    ref = run_design(values, "mixed", formula="value ~ load", estimation="ml", center=False,
                     contrasts=read_table(study / "contrasts.tsv", label_columns=("contrast",)))
    np.testing.assert_allclose(load["estimate"].to_numpy(), ref.loc[ref["term"] == "load", "estimate"], rtol=1e-9)


def test_study_file_checks_the_new_keys(study, capsys):
    (study / "study.toml").write_text(STUDY.format(estimation="restricted", center="\"no\"")
                                      + 'nested = "run"\ntest = "knha"\n', encoding="utf-8")
    assert main(["run", str(study / "study.toml"), "--out", str(study / "results")]) == 2
    err = capsys.readouterr().err
    assert "analysis[1].estimation: must be one of reml, ml, found 'restricted'" in err
    assert "analysis[1].center: must be true or false" in err
    assert "analysis[1].nested: must be a column" in err
    assert "analysis[1].test: does not apply to design 'mixed'" in err
