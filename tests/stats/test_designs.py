"""one-sample, paired, two-group and glm against scipy.stats and statsmodels on seeded random data."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats

from roikit.errors import DesignError, MissingValueWarning, UsageError
from roikit.stats import run_design

from stats_data import participants_table, values_table

N, K = 24, 5


@pytest.fixture
def data():
    rng = np.random.default_rng(20240401)
    novel = rng.normal(0.4, 1.0, (N, K))
    familiar = novel * 0.5 + rng.normal(0.0, 1.0, (N, K))
    return novel, familiar


def _quiet(fn, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fn(*args, **kwargs)


def test_one_sample_matches_scipy(data):
    novel, _ = data
    res = _quiet(run_design, values_table({"novel": novel}), "one-sample", contrast="novel", confidence=0.9)
    # scipy.stats.ttest_1samp (statistic, pvalue, df, confidence_interval)
    ref = stats.ttest_1samp(novel, 0.0, axis=0)
    ci = ref.confidence_interval(0.9)
    np.testing.assert_allclose(res["statistic"], ref.statistic, rtol=1e-12)
    np.testing.assert_allclose(res["p"], ref.pvalue, rtol=1e-10)
    np.testing.assert_allclose(res["df"], ref.df)
    np.testing.assert_allclose(res["ci_low"], ci.low, rtol=1e-12)
    np.testing.assert_allclose(res["ci_high"], ci.high, rtol=1e-12)
    np.testing.assert_allclose(res["estimate"], novel.mean(0), rtol=1e-12)
    # d = mean / SD (contract definition)
    np.testing.assert_allclose(res["effect_size"], novel.mean(0) / novel.std(0, ddof=1), rtol=1e-12)
    assert (res["n"] == N).all() and (res["term"] == "mean").all()
    assert list(res["region"]) == ["left hippocampus", "right hippocampus", "caudate", "retrosplenial cortex",
                                   "primary visual cortex"]


def test_one_sample_missing_value_excluded_for_that_region_only(data):
    novel, _ = data
    y = novel.copy()
    y[3, 1] = np.nan
    y[7, 1] = np.nan
    with pytest.warns(MissingValueWarning, match="right hippocampus: sub-04, sub-08"):
        res = run_design(values_table({"novel": y}), "one-sample", contrast="novel")
    # scipy.stats.ttest_1samp on the region's remaining values
    ref = stats.ttest_1samp(y[~np.isnan(y[:, 1]), 1], 0.0)
    assert res.loc[1, "statistic"] == pytest.approx(ref.statistic, rel=1e-12)
    assert res.loc[1, "n"] == N - 2 and res.loc[1, "excluded_ids"] == "sub-04,sub-08"
    assert res.loc[0, "n"] == N and res.loc[0, "excluded_ids"] == ""


def test_paired_matches_scipy(data):
    novel, familiar = data
    values = values_table({"novel": novel, "familiar": familiar})
    res = _quiet(run_design, values, "paired", contrast="novel", versus="familiar")
    # scipy.stats.ttest_rel
    ref = stats.ttest_rel(novel, familiar, axis=0)
    ci = ref.confidence_interval(0.95)
    np.testing.assert_allclose(res["statistic"], ref.statistic, rtol=1e-12)
    np.testing.assert_allclose(res["p"], ref.pvalue, rtol=1e-10)
    np.testing.assert_allclose(res["ci_low"], ci.low, rtol=1e-12)
    np.testing.assert_allclose(res["ci_high"], ci.high, rtol=1e-12)
    assert (res["versus"] == "familiar").all() and (res["effect_size_type"] == "d_z").all()


def test_paired_participant_missing_a_contrast_is_named():
    rng = np.random.default_rng(3)
    a, b = rng.normal(size=(8, 2)), rng.normal(size=(8, 2))
    values = values_table({"novel": a, "familiar": b})
    values = values[~((values["participant_id"] == "sub-05") & (values["contrast"] == "familiar"))]
    with pytest.warns(MissingValueWarning, match="sub-05"):
        res = run_design(values, "paired", contrast="novel", versus="familiar")
    assert (res["n"] == 7).all() and (res["excluded_ids"] == "sub-05").all()


@pytest.mark.parametrize("welch", [False, True])
def test_two_group_matches_scipy(data, welch):
    novel, _ = data
    novel = novel.copy()
    novel[N // 2 :] *= 2.0
    parts = participants_table(N)
    res = _quiet(
        run_design, values_table({"novel": novel}), "two-group", contrast="novel", group="group",
        levels="younger,older", welch=welch, participants=parts,
    )
    young, old = novel[: N // 2], novel[N // 2 :]
    # scipy.stats.ttest_ind (equal_var=not welch)
    ref = stats.ttest_ind(young, old, axis=0, equal_var=not welch)
    ci = ref.confidence_interval(0.95)
    np.testing.assert_allclose(res["statistic"], ref.statistic, rtol=1e-12)
    np.testing.assert_allclose(res["p"], ref.pvalue, rtol=1e-10)
    np.testing.assert_allclose(res["df"], ref.df, rtol=1e-12)
    np.testing.assert_allclose(res["ci_low"], ci.low, rtol=1e-12)
    np.testing.assert_allclose(res["ci_high"], ci.high, rtol=1e-12)
    # scipy.stats.levene(center="median") is the Brown-Forsythe test
    bf = [stats.levene(young[:, j], old[:, j], center="median").pvalue for j in range(K)]
    np.testing.assert_allclose(res["brown_forsythe_p"], bf, rtol=1e-10)
    assert (res["term"] == "younger - older").all() and (res["levels"] == "younger,older").all()


def test_two_group_errors():
    rng = np.random.default_rng(5)
    values = values_table({"novel": rng.normal(size=(6, 2))})
    parts = participants_table(6)
    parts.loc[parts.index[1:], "group"] = "older"
    with pytest.raises(DesignError, match="fewer than 2 members of group 'younger'"):
        run_design(values, "two-group", contrast="novel", group="group", levels="younger,older",
                   participants=parts)
    with pytest.raises(DesignError, match="level 'middle' not found"):
        run_design(values, "two-group", contrast="novel", group="group", levels="younger,middle",
                   participants=parts)
    with pytest.raises(UsageError, match="lacks column"):
        run_design(values, "two-group", contrast="novel", group="cohort", participants=parts)
    with pytest.raises(UsageError, match="needs participants.tsv"):
        run_design(values, "two-group", contrast="novel", group="group")


def _glm_data():
    rng = np.random.default_rng(77)
    n = 30
    parts = participants_table(n, seed=1)
    age = parts["age"].to_numpy()
    site = parts["site"].to_numpy()
    y = (0.02 * (age - 50))[:, None] + (site == "b")[:, None] * 0.8 + rng.normal(size=(n, 4))
    return values_table({"novel": y}), parts, y


def test_glm_matches_statsmodels_ols():
    values, parts, y = _glm_data()
    res = _quiet(run_design, values, "glm", contrast="novel", formula="value ~ age + group + site",
                 participants=parts)
    frame = parts.copy()
    frame["age"] = frame["age"] - frame["age"].mean()  # roikit centres covariates by default
    for j, region in enumerate(pd.unique(values["region"])):
        frame["value"] = y[:, j]
        # statsmodels OLS via the formula interface (patsy), same treatment coding
        fit = smf.ols("value ~ age + group + site", data=frame).fit()
        rows = res[(res["region"] == region) & (res["statistic_type"] == "t")].set_index("term")
        names = {"Intercept": "Intercept", "age": "age", "group[T.younger]": "group[T.younger]",
                 "site[T.b]": "site[T.b]", "site[T.c]": "site[T.c]"}
        for ours, theirs in names.items():
            assert rows.loc[ours, "estimate"] == pytest.approx(fit.params[theirs], rel=1e-9, abs=1e-12)
            assert rows.loc[ours, "se"] == pytest.approx(fit.bse[theirs], rel=1e-9)
            assert rows.loc[ours, "statistic"] == pytest.approx(fit.tvalues[theirs], rel=1e-9, abs=1e-10)
            assert rows.loc[ours, "p"] == pytest.approx(fit.pvalues[theirs], rel=1e-8)
            ci = fit.conf_int(0.05).loc[theirs]
            assert rows.loc[ours, "ci_low"] == pytest.approx(ci[0], rel=1e-9, abs=1e-12)
        # statsmodels f_test of the two site coefficients
        ftest = fit.f_test("site[T.b] = 0, site[T.c] = 0")
        frow = res[(res["region"] == region) & (res["term"] == "site")].iloc[0]
        assert frow["statistic_type"] == "F" and frow["df1"] == 2
        assert frow["statistic"] == pytest.approx(float(np.squeeze(ftest.fvalue)), rel=1e-9)
        assert frow["p"] == pytest.approx(float(ftest.pvalue), rel=1e-8)
        assert frow["df"] == fit.df_resid
        # Cook's distance and leverage: statsmodels OLSInfluence
        infl = fit.get_influence()
        assert rows["max_cooks_d"].iloc[0] == pytest.approx(infl.cooks_distance[0].max(), rel=1e-8)
        assert rows["max_leverage"].iloc[0] == pytest.approx(infl.hat_matrix_diag.max(), rel=1e-10)
    assert (res["centered"] == "age").all()


def test_glm_user_f_test_and_missing_values_match_statsmodels():
    values, parts, y = _glm_data()
    values.loc[(values["participant_id"] == "sub-03") & (values["region"] == "caudate"), "value"] = np.nan
    with pytest.warns(MissingValueWarning, match="caudate: sub-03"):
        res = run_design(values, "glm", contrast="novel", formula="value ~ age + site", participants=parts,
                         f_tests={"age and site b": ["age", "site[T.b]"]})
    frame = parts.copy()
    frame["age"] = frame["age"] - frame["age"].mean()
    frame["value"] = y[:, 2]
    # statsmodels OLS on the region's complete rows (participant sub-03 dropped)
    fit = smf.ols("value ~ age + site", data=frame.drop(index=2)).fit()
    row = res[(res["region"] == "caudate") & (res["term"] == "age")].iloc[0]
    assert row["estimate"] == pytest.approx(fit.params["age"], rel=1e-9)
    assert row["n"] == 29
    ftest = fit.f_test("age = 0, site[T.b] = 0")
    frow = res[(res["region"] == "caudate") & (res["term"] == "age and site b")].iloc[0]
    assert frow["statistic"] == pytest.approx(float(np.squeeze(ftest.fvalue)), rel=1e-9)


def test_glm_rank_deficient_names_columns():
    values, parts, _ = _glm_data()
    parts = parts.assign(age_months=parts["age"] * 12)
    with pytest.raises(DesignError, match=r"rank deficient.*'age(_months)?' = a combination of 'age(_months)?'"):
        run_design(values, "glm", contrast="novel", formula="value ~ age + age_months", participants=parts)


def test_glm_errors():
    values, parts, _ = _glm_data()
    with pytest.raises(UsageError, match="not a column of participants.tsv"):
        run_design(values, "glm", contrast="novel", formula="value ~ handedness", participants=parts)
    with pytest.raises(DesignError, match="varies by region"):
        run_design(values, "glm", contrast="novel", formula="value ~ n_valid", participants=parts)
    with pytest.raises(UsageError, match="left-hand side must be 'value'"):
        run_design(values, "glm", contrast="novel", formula="age ~ group", participants=parts)


def test_design_errors():
    rng = np.random.default_rng(9)
    y = rng.normal(size=(5, 2))
    y[2:, 1] = np.nan
    with pytest.raises(DesignError, match=r"fewer than 3 participants .*right hippocampus \(n = 2\)"):
        _quiet(run_design, values_table({"novel": y}), "one-sample", contrast="novel")
    flat = np.ones((6, 2))
    with pytest.raises(DesignError, match="zero variance.*left hippocampus"):
        run_design(values_table({"novel": flat}), "one-sample", contrast="novel")
    with pytest.raises(DesignError, match="contrast 'town9' not found"):
        run_design(values_table({"novel": flat}), "one-sample", contrast="town9")
    with pytest.raises(UsageError, match="needs contrast="):
        run_design(values_table({"novel": flat}), "one-sample")


def test_low_coverage_and_outliers_are_columns():
    rng = np.random.default_rng(11)
    y = rng.normal(size=(20, 2))
    y[4, 0] = 25.0  # a gross outlier
    values = values_table({"novel": y}, n_valid=lambda i, j: 30 if (i, j) == (6, 1) else 100)
    with pytest.warns(Warning) as record:
        res = run_design(values, "one-sample", contrast="novel")
    kinds = {type(w.message).__name__ for w in record}
    assert {"CoverageWarning", "DiagnosticWarning"} <= kinds
    assert res.loc[0, "n_outliers"] == 1 and res.loc[0, "outlier_ids"] == "sub-05"
    assert res.loc[1, "n_low_coverage"] == 1 and res.loc[1, "low_coverage_ids"] == "sub-07"
    # scipy.stats.shapiro on the region's values
    assert res.loc[1, "shapiro_w"] == pytest.approx(stats.shapiro(y[:, 1]).statistic, rel=1e-12)


def test_no_valid_voxel_is_an_exclusion_not_low_coverage():
    rng = np.random.default_rng(12)
    y = rng.normal(size=(12, 1))
    y[3, 0] = np.nan  # extraction wrote n/a: no valid voxel
    values = values_table({"novel": y}, n_valid=lambda i, j: 0 if i == 3 else (40 if i == 5 else 100))
    with pytest.warns(Warning):
        res = run_design(values, "one-sample", contrast="novel")
    assert res.loc[0, "n"] == 11 and res.loc[0, "excluded_ids"] == "sub-04"
    assert res.loc[0, "n_low_coverage"] == 1 and res.loc[0, "low_coverage_ids"] == "sub-06"
