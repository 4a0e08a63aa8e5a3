"""Repeated-measures ANOVA and region differences, checked against reference libraries.

Expected values come from pingouin (Vallat 2018, J Open Source Softw 3(31):1026), a general statistics library,
run on the data sets it ships (``rm_anova2``: 10 subjects x Time (2) x Metric (3); ``mixed_anova``: 60 subjects in
two groups x Time (3)), and from statsmodels OLS for unequal groups.
"""


import numpy as np
import pandas as pd
import pytest

import pingouin as pg  # noqa: E402 - reference library (test dependency)

from roikit.errors import DesignError, UsageError  # noqa: E402
from roikit.stats import run_design  # noqa: E402
from roikit.stats.anova import helmert, rm_anova  # noqa: E402


def _long(df, dv, subject, within, region="r1", shift=0.0):
    rows = []
    for _, r in df.iterrows():
        contrast = "-".join(str(r[w]) for w in within)
        rows.append(dict(participant_id=f"sub-{r[subject]}", contrast=contrast, region=region,
                         value=float(r[dv]) + shift, n_voxels=10, n_valid=10))
    return pd.DataFrame(rows)


def _contrasts(df, within):
    ct = df[within].drop_duplicates().astype(str)
    ct.insert(0, "contrast", ct.agg("-".join, axis=1))
    return ct


def test_helmert_is_orthonormal():
    for k in (2, 3, 5):
        c = helmert(k)
        np.testing.assert_allclose(c.T @ c, np.eye(k - 1), atol=1e-12)
        np.testing.assert_allclose(c.sum(axis=0), 0, atol=1e-12)


def test_two_within_factors_match_pingouin_rm_anova():
    df = pg.read_dataset("rm_anova2")
    values = _long(df, "Performance", "Subject", ["Time", "Metric"])
    res = run_design(values, "repeated-measures", within="Time,Metric", contrasts=_contrasts(df, ["Time", "Metric"]))
    got = res.set_index("term")
    # pingouin.rm_anova(data=rm_anova2, dv='Performance', within=['Time','Metric'], subject='Subject',
    # correction=True, effsize='ng2') as printed by pingouin 0.7.0:
    # Time F(1, 9) = 33.85228, p = 0.000254, ng2 = 0.254011
    # Metric F(2, 18) = 26.95919, p = 0.000004, p_GG = 0.000005, ng2 = 0.359335, eps = 0.969103, W = 0.968118,
    #   p_spher = 0.878442
    # Time * Metric F(2, 18) = 12.63227, p = 0.000373, p_GG = 0.001708, ng2 = 0.084420, eps = 0.727166,
    #   W = 0.624799, p_spher = 0.152392
    expected = {
        "Time": (1, 9, 33.85228, 0.000254, 0.000254, 0.254011, 1.0, np.nan, np.nan),
        "Metric": (2, 18, 26.95919, 0.000004, 0.000005, 0.359335, 0.969103, 0.968118, 0.878442),
        "Time:Metric": (2, 18, 12.63227, 0.000373, 0.001708, 0.084420, 0.727166, 0.624799, 0.152392),
    }
    for term, (df1, df2, f, p, p_gg, ges, eps, w, pw) in expected.items():
        row = got.loc[term]
        assert row["df1"] == df1 and row["df"] == df2
        assert row["statistic"] == pytest.approx(f, abs=1e-5)
        assert row["p"] == pytest.approx(p, abs=1e-6)
        assert row["p_gg"] == pytest.approx(p_gg, abs=1e-6)
        assert row["generalized_eta2"] == pytest.approx(ges, abs=1e-6)
        assert row["epsilon_gg"] == pytest.approx(eps, abs=1e-6)
        if np.isnan(w):
            assert np.isnan(row["mauchly_w"])
        else:
            assert row["mauchly_w"] == pytest.approx(w, abs=1e-6)
            assert row["mauchly_p"] == pytest.approx(pw, abs=1e-6)
    # partial eta squared, pingouin effsize='np2': Time 0.789976, Metric 0.749716, Time*Metric 0.583955
    assert got["effect_size"].tolist() == pytest.approx([0.789976, 0.749716, 0.583955], abs=1e-6)
    # Huynh-Feldt epsilon of the interaction: pingouin.epsilon(..., correction='hf')
    wide = df.pivot_table(index="Subject", columns=["Time", "Metric"], values="Performance")
    hf = pg.epsilon(df, dv="Performance", within=["Time", "Metric"], subject="Subject", correction="hf")
    assert got.loc["Time:Metric", "epsilon_hf"] == pytest.approx(min(1.0, hf), abs=1e-6)
    assert wide.shape == (10, 6)


def test_mixed_design_matches_pingouin_mixed_anova():
    df = pg.read_dataset("mixed_anova")
    values = _long(df, "Scores", "Subject", ["Time"])
    participants = df[["Subject", "Group"]].drop_duplicates().assign(
        participant_id=lambda d: "sub-" + d.Subject.astype(str))[["participant_id", "Group"]]
    res = run_design(values, "repeated-measures", within="Time", between="Group", participants=participants,
                     contrasts=_contrasts(df, ["Time"]), between_observed=False).set_index("term")
    # pingouin.mixed_anova(data=mixed_anova, dv='Scores', within='Time', between='Group', subject='Subject',
    # correction=True, effsize='ng2'|'np2'), pingouin 0.7.0:
    # Group F(1, 58) = 5.051709, p = 0.028420, ng2 = 0.030673, np2 = 0.080120
    # Time F(2, 116) = 4.027394, p = 0.020369, p_GG = 0.020438, ng2 = 0.042339, np2 = 0.064929, eps = 0.99812,
    #   W = 0.998117, p_spher = 0.947694
    # Interaction F(2, 116) = 2.727996, p = 0.069545, p_GG = 0.069655, ng2 = 0.029076, np2 = 0.044922
    for term, (df1, df2, f, p, ges, np2) in {
        "Group": (1, 58, 5.051709, 0.028420, 0.030673, 0.080120),
        "Time": (2, 116, 4.027394, 0.020369, 0.042339, 0.064929),
        "Time:Group": (2, 116, 2.727996, 0.069545, 0.029076, 0.044922),
    }.items():
        row = res.loc[term]
        assert (row["df1"], row["df"]) == (df1, df2)
        assert row["statistic"] == pytest.approx(f, abs=1e-5)
        assert row["p"] == pytest.approx(p, abs=1e-6)
        assert row["generalized_eta2"] == pytest.approx(ges, abs=1e-6)
        assert row["effect_size"] == pytest.approx(np2, abs=1e-6)
    assert res.loc["Time", "p_gg"] == pytest.approx(0.020438, abs=1e-6)
    assert res.loc["Time", "mauchly_w"] == pytest.approx(0.998117, abs=1e-6)
    assert res.loc["Time", "mauchly_p"] == pytest.approx(0.947694, abs=1e-6)


def test_unequal_groups_within_effect_is_type_iii():
    # A two-level within factor is a test on each participant's difference score: with unequal groups, type III
    # tests the unweighted mean of the group means, i.e. the intercept of OLS on sum-to-zero group coding
    # (statsmodels OLS, formula 'd ~ C(g, Sum)'); the interaction is the group term of the same model.
    import statsmodels.formula.api as sm
    rng = np.random.default_rng(11)
    n = [7, 12]
    g = np.repeat([0, 1], n)
    y = rng.normal(size=(sum(n), 2)) + np.array([0.0, 0.6]) + (g[:, None] * np.array([0, 0.8]))
    res = rm_anova(y[None], [2], groups=g)
    d = pd.DataFrame({"d": y[:, 0] - y[:, 1], "g": g})
    fit = sm.ols("d ~ C(g, Sum)", data=d).fit()
    names = [e.name(["route"], "group") for e in res["effects"]]
    assert names == ["group", "route", "route:group"]
    assert res["f"][1, 0] == pytest.approx(fit.tvalues["Intercept"] ** 2, rel=1e-10)
    assert res["f"][2, 0] == pytest.approx(fit.tvalues["C(g, Sum)[S.0]"] ** 2, rel=1e-10)
    assert res["df2"][1, 0] == sum(n) - 2


def test_region_factor_pairs_regions_and_names_them():
    df = pg.read_dataset("rm_anova2")
    left = _long(df, "Performance", "Subject", ["Time", "Metric"], region="hippocampus left")
    right = _long(df, "Performance", "Subject", ["Time", "Metric"], region="hippocampus right")
    rng = np.random.default_rng(3)
    right["value"] = right["value"] + np.where(right["contrast"].str.startswith("Post"), 3.0, 0.0) \
        + rng.normal(0, 2.0, len(right))
    values = pd.concat([left, right], ignore_index=True)
    regions = pd.DataFrame({"region": ["hippocampus left", "hippocampus right"],
                            "structure": ["hippocampus"] * 2, "hemisphere": ["left", "right"]})
    ct = _contrasts(df, ["Time", "Metric"])
    res = run_design(values, "repeated-measures", within="Time,Metric,hemisphere", contrasts=ct,
                     region_table=regions)
    assert set(res["region"]) == {"hippocampus (left, right)"}
    assert len(res) == 7 and "Time:Metric:hemisphere" in set(res["term"])
    # A 2 x 2 interaction averaged over the third factor has one df: its F is the square of the one-sample t of
    # each participant's (right - left) x (Post - Pre) score (scipy.stats.ttest_1samp as the reference).
    from scipy import stats

    wide = values.pivot_table(index="participant_id", columns=["region", "contrast"], values="value")
    diff = wide["hippocampus right"] - wide["hippocampus left"]
    post = diff[[c for c in diff.columns if c.startswith("Post")]].mean(axis=1)
    pre = diff[[c for c in diff.columns if c.startswith("Pre")]].mean(axis=1)
    ref = stats.ttest_1samp(post - pre, 0.0)
    row = res.set_index("term").loc["Time:hemisphere"]
    assert row["statistic"] == pytest.approx(ref.statistic**2, rel=1e-10)
    assert row["p"] == pytest.approx(ref.pvalue, rel=1e-8)


def test_missing_cell_excludes_participant_and_names_them():
    df = pg.read_dataset("rm_anova2")
    values = _long(df, "Performance", "Subject", ["Time", "Metric"])
    values = values[~((values.participant_id == "sub-3") & (values.contrast == "Post-Action"))]
    with pytest.warns(Warning, match="sub-3"):
        res = run_design(values, "repeated-measures", within="Time,Metric",
                         contrasts=_contrasts(df, ["Time", "Metric"]))
    assert (res["n"] == 9).all()
    assert (res["excluded_ids"] == "sub-3").all()


def test_errors_name_the_problem():
    df = pg.read_dataset("rm_anova2")
    values = _long(df, "Performance", "Subject", ["Time", "Metric"])
    ct = _contrasts(df, ["Time", "Metric"])
    with pytest.raises(UsageError, match="region_table=") as info:  # Python spelling in Python
        run_design(values, "repeated-measures", within="hemisphere", contrasts=ct)
    assert "--region-table FILE" in info.value.cli_message  # command-line spelling on the command line
    with pytest.raises(DesignError, match="same levels of Time"):
        run_design(values, "repeated-measures", within="Time", contrasts=ct)


def test_region_difference_is_the_paired_test_of_the_two_regions():
    from scipy import stats

    rng = np.random.default_rng(5)
    n = 15
    a, b = rng.normal(1, 1, n), rng.normal(0.4, 1, n)
    values = pd.DataFrame({
        "participant_id": [f"sub-{i:02d}" for i in range(n)] * 2, "contrast": "novel",
        "region": ["left hippocampus"] * n + ["right hippocampus"] * n, "value": np.r_[a, b],
        "n_voxels": 10, "n_valid": 10})
    res = run_design(values, "region-difference", regions="left hippocampus,right hippocampus", contrast="novel")
    # scipy.stats.ttest_rel is the reference for the paired t-test
    ref = stats.ttest_rel(a, b)
    assert res.loc[0, "statistic"] == pytest.approx(ref.statistic, rel=1e-12)
    assert res.loc[0, "p"] == pytest.approx(ref.pvalue, rel=1e-10)
    assert res.loc[0, "effect_size"] == pytest.approx(np.mean(a - b) / np.std(a - b, ddof=1), rel=1e-12)
    assert res.loc[0, "region"] == "left hippocampus - right hippocampus"


def test_posthoc_pairs_are_paired_tests_of_marginal_means_with_holm():
    from scipy import stats
    from statsmodels.stats.multitest import multipletests

    df = pg.read_dataset("rm_anova2")
    values = _long(df, "Performance", "Subject", ["Time", "Metric"])
    res = run_design(values, "repeated-measures", within="Time,Metric", contrasts=_contrasts(df, ["Time", "Metric"]),
                     posthoc=True)
    post = res[res["term"].str.startswith("Metric: ")].set_index("term")
    assert len(post) == 3 and (post["posthoc_family"] == 3).all()
    wide = df.groupby(["Subject", "Metric"])["Performance"].mean().unstack()
    # scipy.stats.ttest_rel on the participants' marginal means; statsmodels multipletests for Holm
    levels = list(dict.fromkeys(df["Metric"]))
    pairs = [(a, b) for i, a in enumerate(levels) for b in levels[i + 1:]]
    ref = [stats.ttest_rel(wide[a], wide[b]) for a, b in pairs]
    holm = multipletests([r.pvalue for r in ref], method="holm")[1]
    for (a, b), r, ph in zip(pairs, ref, holm):
        row = post.loc[f"Metric: {a} - {b}"]
        assert row["statistic"] == pytest.approx(r.statistic, rel=1e-10)
        assert row["p_posthoc"] == pytest.approx(ph, rel=1e-10)


def test_posthoc_and_region_corrections_follow_the_primary_correction():
    """run_design passes the primary correction to the post-hoc pairs, and corrects the GG p across regions."""
    from statsmodels.stats.multitest import multipletests

    df = pg.read_dataset("rm_anova2")
    values = pd.concat([_long(df, "Performance", "Subject", ["Time", "Metric"], region=r, shift=s)
                        for r, s in (("r1", 0.0), ("r2", 0.3))], ignore_index=True)
    rng = np.random.default_rng(1)
    values.loc[values["region"] == "r2", "value"] += rng.normal(0, 1.0, (values["region"] == "r2").sum())
    res = run_design(values, "repeated-measures", within="Time,Metric", contrasts=_contrasts(df, ["Time", "Metric"]),
                     posthoc=True, correct=["fdr", "holm"])
    post = res[res["term"].str.startswith("Metric: ")]
    assert (post["posthoc_correction"] == "fdr").all()
    for region, part in post.groupby("region"):
        # statsmodels multipletests(method="fdr_bh") over the three pairs of Metric in one region
        np.testing.assert_allclose(part["p_posthoc"], multipletests(part["p"], method="fdr_bh")[1], rtol=1e-12)
    metric = res[res["term"] == "Metric"]
    assert (metric["p_gg"] != metric["p"]).all()
    # Holm across the two regions acts on the Greenhouse-Geisser p (statsmodels multipletests, method="holm")
    np.testing.assert_allclose(metric["p_holm"], multipletests(metric["p_gg"], method="holm")[1], rtol=1e-12)


def test_regions_without_a_level_of_the_region_factor_are_left_out():
    df = pg.read_dataset("rm_anova2")
    values = pd.concat([_long(df, "Performance", "Subject", ["Time", "Metric"], region=r, shift=s)
                        for r, s in (("left a", 0.0), ("right a", 0.5), ("midline", 1.0))], ignore_index=True)
    regions = pd.DataFrame({"region": ["left a", "right a", "midline"], "structure": ["a", "a", "midline"],
                            "hemisphere": ["left", "right", None]})
    values["value"] += np.random.default_rng(2).normal(0, 1.0, len(values))  # no exactly constant difference
    values = values[values["contrast"].str.endswith(df["Metric"].iloc[0])]
    contrasts = _contrasts(df, ["Time", "Metric"])
    contrasts = contrasts[contrasts["Metric"] == str(df["Metric"].iloc[0])]
    res = run_design(values, "repeated-measures", within="Time,hemisphere", contrasts=contrasts, region_table=regions)
    assert set(res["region"]) == {"a (left, right)"}
    assert set(res["term"]) == {"Time", "hemisphere", "Time:hemisphere"}
