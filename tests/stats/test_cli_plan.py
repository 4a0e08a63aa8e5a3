"""`roikit plan` end to end: tables, sidecars, figures, cautions, exit codes."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.power import TTestIndPower, TTestPower

from roikit._tables import read_table, write_table
from roikit.cli import main
from roikit.stats import run_design
from roikit.stats.power import PLAN_COLUMNS

from stats_data import values_table


def test_plan_sample_size_with_family_and_figure(tmp_path, capsys):
    out = tmp_path / "plan.tsv"
    code = main(["plan", "--design", "paired", "--effect-size", "0.3,0.5,0.8", "--power", "0.8", "--regions", "10",
                 "--out", str(out), "--figure", str(tmp_path / "power_curve.png")])
    assert code == 0
    table = read_table(out)
    assert list(table.columns[: len(PLAN_COLUMNS)]) == list(PLAN_COLUMNS)
    for row in table.itertuples():
        # statsmodels TTestPower.solve_power at alpha .05 / 10 (Holm planned as Bonferroni)
        assert row.n == math.ceil(TTestPower().solve_power(row.effect_size, nobs=None, alpha=0.005, power=0.8))
    assert (table["correction"] == "holm").all() and (table["family_size"] == 10).all()
    side = json.loads(out.with_suffix(".json").read_text())
    assert all("Description" in side[c] for c in table.columns)
    assert side["GeneratedBy"]["Name"] == "roikit" and side["GeneratedBy"]["Options"]["regions"] == 10
    assert any("Holm is planned as Bonferroni" in n for n in side["GeneratedBy"]["Notes"])
    for ext in ("png", "pdf", "svg"):
        assert (tmp_path / f"power_curve.{ext}").stat().st_size > 1000
    err = capsys.readouterr().err
    assert "Holm is planned as Bonferroni" in err and "n = 58" in err


def test_plan_power_and_sensitivity(tmp_path, capsys):
    out = tmp_path / "plan.tsv"
    assert main(["plan", "--design", "two-group", "--effect-size", "0.5", "--n", "20,40", "--power", "0.8",
                 "--out", str(out)]) == 0
    table = read_table(out)
    assert list(table["solved_for"]) == ["power", "power", "effect_size", "effect_size"]
    # statsmodels TTestIndPower.power and solve_power(effect_size=None)
    np.testing.assert_allclose(table["power"].iloc[:2], [TTestIndPower().power(0.5, n, 0.05) for n in (20, 40)],
                               rtol=1e-7)
    np.testing.assert_allclose(table["effect_size"].iloc[2:],
                               [TTestIndPower().solve_power(None, nobs1=n, alpha=0.05, power=0.8) for n in (20, 40)],
                               rtol=1e-6)
    side = json.loads(out.with_suffix(".json").read_text())
    assert any("family of 1 region" in n for n in side["GeneratedBy"]["Notes"])


def test_plan_uncorrected_family_is_flagged(tmp_path, capsys):
    out = tmp_path / "plan.tsv"
    # the command line prints roikit's warnings as one line each on stderr ("roikit: warning: ...")
    assert main(["plan", "--design", "one-sample", "--effect-size", "0.5", "--power", "0.8", "--regions", "5",
                 "--correct", "none", "--out", str(out)]) == 0
    assert "uncorrected" in capsys.readouterr().err
    assert read_table(out)["alpha_per_test"].iat[0] == 0.05


@pytest.fixture
def pilot(tmp_path):
    rng = np.random.default_rng(21)
    novel = rng.normal([0.8, 0.4, 0.0], 1.0, (20, 3))
    values = values_table({"novel": novel, "familiar": novel - rng.normal([0.6, 0.2, 0.0], 0.8, (20, 3))})
    res = run_design(values, "paired", contrast="novel", versus="familiar")
    other = run_design(values, "one-sample", contrast="novel")
    both = write_table(tmp_path / "group_results.tsv", pd.concat([res, other], ignore_index=True))
    return tmp_path, both, res


def test_plan_from_pilot_with_safeguard_and_caution(pilot, capsys):
    tmp, path, res = pilot
    out = tmp / "plan.tsv"
    # the table holds two designs: --design chooses
    assert main(["plan", "--from", str(path), "--power", "0.8", "--out", str(out)]) == 2
    assert "several designs" in capsys.readouterr().err
    assert main(["plan", "--from", str(path), "--design", "paired", "--power", "0.8", "--out", str(out)]) == 0
    err = capsys.readouterr().err  # on the command line: "roikit: warning: ..." on stderr
    assert "safeguard" in err and "overstate" in err
    table = read_table(out)
    assert list(table["region"]) == list(res["region"]) and (table["family_size"] == 3).all()
    assert {"safeguard_n", "safeguard_effect_size", "safeguard_confidence"} <= set(table.columns)
    ok = table["safeguard_n"].notna()
    assert ok.any() and (table.loc[ok, "safeguard_n"] > table.loc[ok, "n"]).all()
    side = json.loads(out.with_suffix(".json").read_text())
    assert any("overstate" in n for n in side["GeneratedBy"]["Notes"])
    assert side["GeneratedBy"]["Inputs"]["results"]["sha256"]


def test_plan_precision_weighted_simulation(tmp_path, capsys):
    rng = np.random.default_rng(2)
    y = rng.normal(0.4, 0.8, (16, 2))
    values = values_table({"novel": y})
    values["variance"] = rng.gamma(2.0, 0.1, len(values))
    vpath = write_table(tmp_path / "region_values.tsv", values)
    res = run_design(values, "precision-weighted", contrast="novel")
    rpath = write_table(tmp_path / "group_results.tsv", res)
    out = tmp_path / "plan.tsv"
    assert main(["plan", "--from", str(rpath), "--values", str(vpath), "--n", "10,20", "--simulations", "200",
                 "--seed", "9", "--power", "0.8", "--out", str(out)]) == 0
    assert "overstate" in capsys.readouterr().err
    table = read_table(out)
    assert len(table) == 4 and set(table["region"]) == set(res["region"])
    assert (table["method"] == "simulation").all() and (table["seed"] == 9).all()
    assert (table["mc_se"] > 0).all() and (table["simulations"] == 200).all()
    # the same seed gives the same table
    out2 = tmp_path / "plan2.tsv"
    assert main(["plan", "--from", str(rpath), "--values", str(vpath), "--n", "10,20", "--simulations", "200",
                 "--seed", "9", "--power", "0.8", "--out", str(out2)]) == 0
    assert "overstate" in capsys.readouterr().err
    assert read_table(out2)["power"].tolist() == table["power"].tolist()
    # the figure: simulated power per region
    fig = tmp_path / "pw.png"
    assert main(["plan", "--from", str(rpath), "--values", str(vpath), "--n", "10,20", "--simulations", "50",
                 "--seed", "9", "--out", str(tmp_path / "plan3.tsv"), "--figure", str(fig)]) == 0
    assert "roikit: warning:" in capsys.readouterr().err
    assert fig.stat().st_size > 1000
    # without --values: a usage error naming the option
    assert main(["plan", "--from", str(rpath), "--n", "10", "--out", str(tmp_path / "x.tsv")]) == 2
    assert "--values" in capsys.readouterr().err


def test_plan_crossed_grid_and_figure(tmp_path, capsys):
    out = tmp_path / "plan.tsv"
    assert main(["plan", "--design", "crossed", "--layout", "stimuli-within-condition", "--effect-size", "0.5",
                 "--n", "10,20,40", "--stimuli", "4,8,16", "--sd-participant", "0.6", "--sd-stimulus", "0.4",
                 "--sd-participant-slope", "0.3", "--sd-residual", "1", "--power", "0.8", "--out", str(out),
                 "--figure", str(tmp_path / "crossed")]) == 0
    table = read_table(out)
    assert len(table) == 9 and set(table["n_stimuli"]) == {4, 8, 16}
    assert (table["power_limit"] < 1).all() and (table["method"] == "simulation").all()
    assert (table["simulations"] == 2000).all() and (table["mc_se"] > 0).all()
    assert {"power_exact_balanced", "seed"} <= set(table.columns)
    assert (tmp_path / "crossed.png").is_file()
    # seeded: the same seed, the same simulated power
    out2 = tmp_path / "sim.tsv"
    for path in (out2, tmp_path / "sim2.tsv"):
        assert main(["plan", "--design", "crossed", "--layout", "participants-within-condition", "--effect-size",
                     "1", "--n", "8", "--stimuli", "4", "--sd-participant", "0.5", "--sd-residual", "1",
                     "--simulations", "500", "--seed", "3", "--out", str(path)]) == 0
    sim = read_table(out2)
    assert sim["simulations"].iat[0] == 500 and sim["seed"].iat[0] == 3
    assert sim["power"].tolist() == read_table(tmp_path / "sim2.tsv")["power"].tolist()
    # no stimulus-by-condition variance: the test is the two-sample t on participant means (4 per group,
    # d = 1 / sqrt(0.25 + 1/4)); statsmodels TTestIndPower.power, within 3 MC SE of the simulation
    exact = TTestIndPower().power(1 / math.sqrt(0.25 + 0.25), 4, 0.05)
    assert sim["power_exact_balanced"].iat[0] == pytest.approx(exact, rel=1e-7)
    assert abs(sim["power"].iat[0] - exact) < 3 * sim["mc_se"].iat[0]


def test_plan_usage_and_data_errors(tmp_path, capsys):
    out = str(tmp_path / "plan.tsv")
    assert main(["plan", "--effect-size", "0.5", "--power", "0.8", "--out", out]) == 2
    assert "--design" in capsys.readouterr().err
    assert main(["plan", "--design", "paired", "--effect-size", "0.5", "--out", out]) == 2
    assert "two of" in capsys.readouterr().err
    assert main(["plan", "--design", "paired", "--effect-size", "0.5,x", "--power", "0.8", "--out", out]) == 2
    assert "--effect-size" in capsys.readouterr().err
    assert main(["plan", "--from", str(tmp_path / "missing.tsv"), "--power", "0.8", "--out", out]) == 1
    assert "not found" in capsys.readouterr().err
    assert main(["plan", "--design", "crossed", "--effect-size", "0.5", "--n", "10", "--stimuli", "4",
                 "--out", out]) == 2
    assert "--layout" in capsys.readouterr().err
    for extra, name in ((["--ratio", "2"], "--ratio"), (["--stimuli", "4"], "--stimuli")):
        assert main(["plan", "--design", "paired", "--effect-size", "0.5", "--power", "0.8", "--out", out,
                     *extra]) == 2
        assert name in capsys.readouterr().err
    # no overwrite without consent
    assert main(["plan", "--design", "paired", "--effect-size", "0.5", "--power", "0.8", "--out", out]) == 0
    assert main(["plan", "--design", "paired", "--effect-size", "0.5", "--power", "0.8", "--out", out]) == 1
    assert "--overwrite" in capsys.readouterr().err
