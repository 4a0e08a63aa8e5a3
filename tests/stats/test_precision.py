"""Tests of the precision-weighted design (roikit.stats.precision)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from roikit.stats.precision import fit_precision_weighted

# BCG vaccine trials (Colditz et al. 1994) as listed in Viechtbauer (2010), J Stat Softw 36(3):
# tpos, tneg, cpos, cneg, ablat
_BCG = np.array(
    [(4, 119, 11, 128, 44), (6, 300, 29, 274, 55), (3, 228, 11, 209, 42), (62, 13536, 248, 12619, 52),
     (33, 5036, 47, 5761, 13), (180, 1361, 372, 1079, 44), (8, 2537, 10, 619, 19), (505, 87886, 499, 87892, 13),
     (29, 7470, 45, 7232, 27), (17, 1699, 65, 1600, 42), (186, 50448, 141, 27197, 18), (5, 2493, 3, 2338, 33),
     (27, 16886, 29, 17825, 33)], dtype=float)


@pytest.fixture
def bcg():
    tpos, tneg, cpos, cneg, ablat = _BCG.T
    y = np.log(tpos / (tpos + tneg)) - np.log(cpos / (cpos + cneg))
    v = 1 / tpos - 1 / (tpos + tneg) + 1 / cpos - 1 / (cpos + cneg)
    return y, v, ablat


def test_bcg_reml(bcg):
    y, v, _ = bcg
    r = fit_precision_weighted(y, v, tau2_method="reml", test="z")
    # Viechtbauer (2010), J Stat Softw 36(3), BCG example, REML: tau2, estimate, SE, CI, I2 (as quoted in issue 5)
    expected = [0.313243258, -0.714532342, 0.179781516, -1.066897639, -0.362167046, 92.22]
    got = [r["tau2"][0], r["b"][0, 0], r["se"][0, 0], r["ci_low"][0, 0], r["ci_high"][0, 0], r["i2"][0]]
    np.testing.assert_allclose(got[:5], expected[:5], rtol=1e-6)
    assert got[5] == pytest.approx(expected[5], abs=0.005)
    assert not r["boundary"][0] and r["converged"][0]


def test_bcg_dl_pm_ml(bcg):
    y, v, _ = bcg
    dl = fit_precision_weighted(y, v, tau2_method="dl", test="z")
    # Viechtbauer (2010), BCG, DerSimonian-Laird: tau2, estimate, SE (as quoted in issue 5)
    np.testing.assert_allclose([dl["tau2"][0], dl["b"][0, 0], dl["se"][0, 0]],
                               [0.308760263, -0.714117222, 0.178742090], rtol=1e-6)
    pm = fit_precision_weighted(y, v, tau2_method="pm", test="z")
    # Viechtbauer (2010), BCG, Paule-Mandel tau2 (as quoted in issue 5)
    assert pm["tau2"][0] == pytest.approx(0.318068452, rel=1e-6)
    # ML maximises the full likelihood: its tau2 must beat REML's tau2 on the ML criterion (property of ML)
    ml = fit_precision_weighted(y, v, tau2_method="ml", test="z")
    from roikit.stats.precision import _loglik
    ll = lambda t: _loglik(y[:, None], v[:, None], np.ones((13, 1)), np.ones((13, 1)), np.array([t]), "ml")[0]
    assert ll(ml["tau2"][0]) >= ll(ml["tau2"][0] * 1.01) and ll(ml["tau2"][0]) >= ll(ml["tau2"][0] * 0.99)
    assert ml["tau2"][0] < 0.313243258


def test_bcg_meta_regression(bcg):
    y, v, ablat = bcg
    X = np.column_stack([np.ones_like(ablat), ablat])
    r = fit_precision_weighted(y, v, X, tau2_method="reml", test="z")
    # Viechtbauer (2010), BCG meta-regression on absolute latitude (REML): tau2, intercept (SE), slope (SE)
    np.testing.assert_allclose([r["tau2"][0], *r["b"][0], *r["se"][0]],
                               [0.076347964, 0.251468210, -0.029101725, 0.249095397, 0.007195327], rtol=1e-5)


def test_equal_variances_reduce_to_one_sample_t():
    rng = np.random.default_rng(5)
    n, R = 24, 40
    y = rng.normal(0.3, 1.0, size=(n, R))
    v = np.full((n, R), 0.2)  # equal first-level variances, tau2 > 0 in nearly every region
    r = fit_precision_weighted(y, v, tau2_method="reml")
    # scipy.stats.ttest_1samp (reference library): the one-sample t-test on the same values
    ref = stats.ttest_1samp(y, 0.0, axis=0)
    np.testing.assert_allclose(r["b"][:, 0], y.mean(0), rtol=1e-12)
    np.testing.assert_allclose(r["statistic"][:, 0], ref.statistic, rtol=1e-9)
    np.testing.assert_allclose(r["p"][:, 0], ref.pvalue, rtol=1e-8)
    assert np.all(r["df"] == n - 1)
    assert (r["tau2"] > 0).sum() >= R - 2


def test_boundary_flagged_and_vectorised_matches_single():
    rng = np.random.default_rng(11)
    n, R = 15, 30
    v = rng.uniform(0.5, 2.0, size=(n, R))
    tau2_true = np.where(np.arange(R) < 10, 0.0, 1.0)
    y = rng.normal(0, np.sqrt(v + tau2_true))
    r = fit_precision_weighted(y, v)
    assert r["boundary"].any()  # some of the null-tau2 regions hit zero
    assert np.all(r["tau2"][r["boundary"]] == 0)
    assert r["converged"].all()
    for j in (0, 5, 20):
        single = fit_precision_weighted(y[:, j], v[:, j])
        assert single["tau2"][0] == pytest.approx(r["tau2"][j], rel=1e-8, abs=1e-12)
        assert single["b"][0, 0] == pytest.approx(r["b"][j, 0], rel=1e-10)


def test_reml_at_boundary_is_constrained_maximum():
    # values much less spread than their first-level variances: the REML maximum is at tau2 = 0
    y = np.array([0.1, -0.1, 0.05, 0.0, 0.02, -0.03])
    v = np.full(6, 1.0)
    r = fit_precision_weighted(y, v)
    assert r["tau2"][0] == 0 and r["boundary"][0]


def test_missing_values_masked():
    rng = np.random.default_rng(2)
    y = rng.normal(size=(12, 3))
    v = rng.uniform(0.5, 1.5, size=(12, 3))
    y[0, 1] = np.nan
    r = fit_precision_weighted(y, v)
    single = fit_precision_weighted(y[1:, 1], v[1:, 1])
    assert r["k"][1] == 11 and r["df"][1] == 10
    assert r["b"][1, 0] == pytest.approx(single["b"][0, 0], rel=1e-10)


# ----------------------------------------------------------------------------- the design through run_design

import pandas as pd  # noqa: E402

from roikit.errors import DesignError, MissingValueWarning, UsageError  # noqa: E402
from roikit.stats import run_design  # noqa: E402
import roikit.stats.precision  # noqa: E402,F401  (registers the design)

_REGIONS = ["left hippocampus", "right hippocampus", "caudate"]


def _values(y, v, contrast="novel", regions=_REGIONS):
    n = y.shape[0]
    ids = [f"sub-{i + 1:02d}" for i in range(n)]
    rows = [dict(participant_id=ids[i], contrast=contrast, region=r, value=y[i, j], n_voxels=50, n_valid=50,
                 variance=v[i, j]) for i in range(n) for j, r in enumerate(regions)]
    return pd.DataFrame(rows), ids


def test_design_bcg_meta_regression_centred(bcg):
    y, v, ablat = bcg
    values, ids = _values(y[:, None], v[:, None], regions=["left hippocampus"])
    participants = pd.DataFrame({"participant_id": ids, "ablat": ablat})
    res = run_design(values, "precision-weighted", contrast="novel", formula="value ~ ablat",
                     participants=participants, tau2="reml", df_method="z")
    by = res.set_index("term")
    # Viechtbauer (2010), BCG meta-regression (REML): slope -0.029101725 (SE 0.007195327), tau2 0.076347964
    assert by.loc["ablat", "estimate"] == pytest.approx(-0.029101725, rel=1e-5)
    assert by.loc["ablat", "se"] == pytest.approx(0.007195327, rel=1e-5)
    assert by.loc["ablat", "tau2"] == pytest.approx(0.076347964, rel=1e-5)
    # centring moves the intercept to the mean latitude: 0.251468210 + (-0.029101725) * mean(ablat)
    assert by.loc["Intercept", "estimate"] == pytest.approx(0.251468210 - 0.029101725 * ablat.mean(), rel=1e-5)
    assert by.loc["ablat", "centered"] == "ablat"
    assert by.loc["ablat", "effect_size_type"] is None and np.isnan(by.loc["ablat", "effect_size"])


def test_design_equal_variances_one_sample_t_and_d():
    rng = np.random.default_rng(8)
    y = rng.normal(0.4, 1.0, size=(20, 3))
    values, _ = _values(y, np.full_like(y, 0.1))
    res = run_design(values, "precision-weighted", contrast="novel")
    # scipy.stats.ttest_1samp (reference library)
    ref = stats.ttest_1samp(y, 0.0, axis=0)
    np.testing.assert_allclose(res["statistic"], ref.statistic, rtol=1e-9)
    np.testing.assert_allclose(res["p"], ref.pvalue, rtol=1e-8)
    assert list(res["term"]) == ["mean"] * 3 and list(res["statistic_type"]) == ["t"] * 3
    # one-sample d = mean / SD (contract); d_total equals it when tau2 > 0 and variances are equal
    np.testing.assert_allclose(res["effect_size"], y.mean(0) / y.std(0, ddof=1), rtol=1e-7)
    assert set(res["effect_size_type"]) == {"d_total"}
    assert res["population_inference"].all() and set(res["df_method"]) == {"knapp-hartung"}


def test_design_missing_value_excluded_and_named():
    rng = np.random.default_rng(3)
    y = rng.normal(size=(10, 3))
    v = rng.uniform(0.5, 1.0, size=(10, 3))
    y[2, 1] = np.nan
    values, ids = _values(y, v)
    with pytest.warns(MissingValueWarning, match="right hippocampus: sub-03"):
        res = run_design(values, "precision-weighted", contrast="novel")
    assert list(res["n"]) == [10, 9, 10]
    assert list(res["excluded_ids"]) == ["", "sub-03", ""]


def test_design_errors():
    rng = np.random.default_rng(4)
    y = rng.normal(size=(8, 3))
    v = rng.uniform(0.5, 1.0, size=(8, 3))
    values, _ = _values(y, v)
    with pytest.raises(DesignError, match="no 'variance' column.*--variance"):
        run_design(values.drop(columns="variance"), "precision-weighted", contrast="novel")
    bad = values.copy()
    bad.loc[4, "variance"] = 0.0
    with pytest.raises(DesignError, match="non-positive first-level variance.*sub-02 in right hippocampus"):
        run_design(bad, "precision-weighted", contrast="novel")
    with pytest.raises(UsageError, match="tau2: found 'bayes'"):
        run_design(values, "precision-weighted", contrast="novel", tau2="bayes")
    with pytest.raises(UsageError, match="choose one estimator"):
        run_design(values, "precision-weighted", contrast="novel", tau2="reml,dl")
    with pytest.raises(DesignError, match="contrast 'familiar' not found"):
        run_design(values, "precision-weighted", contrast="familiar")


def test_design_z_and_estimators_recorded():
    rng = np.random.default_rng(6)
    y = rng.normal(size=(12, 3))
    v = rng.uniform(0.5, 1.0, size=(12, 3))
    values, _ = _values(y, v)
    for method in ("reml", "ml", "dl", "pm"):
        res = run_design(values, "precision-weighted", contrast="novel", tau2=method, df_method="z")
        assert set(res["tau2_method"]) == {method} and set(res["statistic_type"]) == {"z"}
        # z test: p = 2 (1 - Phi(|z|)) (definition)
        np.testing.assert_allclose(res["p"], 2 * stats.norm.sf(np.abs(res["statistic"])), rtol=1e-12)


@pytest.mark.parametrize("method", ["reml", "ml"])
def test_tau2_is_the_global_maximum_with_very_unequal_variances(method):
    # 16 participants, first-level SDs from 0.05 to 3: plain Fisher scoring zig-zags here, and the ML
    # likelihood can have a second maximum at the boundary. Reference: a brute-force grid maximisation of
    # the (restricted) likelihood (common practice, no source), 0.0001 apart.
    from roikit.stats.precision import _loglik, fit_precision_weighted

    rng = np.random.default_rng(0)
    n, regions = 16, 400
    v = rng.uniform(0.05, 3.0, (n, regions)) ** 2
    y = rng.normal(0, np.sqrt(0.2 + v))
    fit = fit_precision_weighted(y, v, tau2_method=method)
    assert fit["converged"].all()
    grid = np.linspace(0, 12, 12001)
    ones = np.ones((n, 1))
    for j in range(regions):
        ll = _loglik(np.repeat(y[:, [j]], len(grid), 1), np.repeat(v[:, [j]], len(grid), 1), ones,
                     np.ones((n, len(grid))), grid, method)
        at_fit = _loglik(y[:, [j]], v[:, [j]], ones, np.ones((n, 1)), fit["tau2"][[j]], method)[0]
        assert at_fit >= ll.max() - 1e-9, (j, fit["tau2"][j], grid[ll.argmax()])
