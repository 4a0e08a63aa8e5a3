"""Tests of the mixed design (roikit.stats.mixed)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import roikit.stats.mixed as mixed_mod
from roikit.errors import ConvergenceError, DesignError, UsageError
from roikit.stats import run_design
from roikit.stats.mixed import RandomFactor, fit_mixed, satterthwaite

_TOWNS = [f"town{j}" for j in range(1, 7)]


def _study(n=16, contrasts=("novel", "familiar"), regions=("left hippocampus",), sd_participant=1.0,
           sd_town=0.0, sd_slope=0.0, sessions=None, seed=0, group_effect=0.0):
    """Long values table of the wayfinding study with known structure, plus participants.tsv."""
    rng = np.random.default_rng(seed)
    ids = [f"sub-{i + 1:02d}" for i in range(n)]
    group = np.where(np.arange(n) < n // 2, "younger", "older")
    rows = []
    for r in regions:
        stim = dict(zip(contrasts, rng.normal(0, sd_town, len(contrasts))))
        for i, pid in enumerate(ids):
            u, s = rng.normal(0, sd_participant), rng.normal(0, sd_slope)
            for ses in (sessions or [None]):
                for k, c in enumerate(contrasts):
                    row = dict(participant_id=pid, contrast=c, region=r, n_voxels=80, n_valid=80,
                               value=0.2 + u + stim[c] + (0.4 + s) * (k == 0) + group_effect * (group[i] == "older")
                               + rng.normal(0, 1.0))
                    if ses is not None:
                        row["session_id"] = ses
                    rows.append(row)
    participants = pd.DataFrame({"participant_id": ids, "group": group, "age": rng.uniform(20, 80, n)})
    return pd.DataFrame(rows), participants


# ----------------------------------------------------------------------------- reference library
def test_random_intercept_agrees_with_statsmodels():
    import statsmodels.formula.api as smf

    values, participants = _study(n=14, sd_participant=1.5, seed=4)
    values = values.drop(index=[3, 10, 17]).reset_index(drop=True)  # unbalanced
    res = run_design(values, "mixed", formula="value ~ contrast", random="1")
    # statsmodels MixedLM (reference library), REML
    ref = smf.mixedlm("value ~ contrast", values, groups="participant_id").fit(reml=True)
    est = res.set_index("term")
    assert est["deviance"].iloc[0] == pytest.approx(-2 * ref.llf, rel=1e-8)
    assert est["sd_residual"].iloc[0] == pytest.approx(np.sqrt(ref.scale), rel=1e-4)
    assert est["sd_participant"].iloc[0] == pytest.approx(np.sqrt(ref.cov_re.iloc[0, 0]), rel=1e-4)
    # GLS covariance (X' V^-1 X)^-1 at statsmodels' variance estimates (statsmodels' own bse use the observed
    # information including fixed/variance cross terms, which differ from it by ~1e-3 in unbalanced data)
    X = np.column_stack([np.ones(len(values)), (values["contrast"] == "novel").to_numpy(float)])
    same = (values["participant_id"].to_numpy()[:, None] == values["participant_id"].to_numpy()[None, :])
    V = ref.cov_re.iloc[0, 0] * same + ref.scale * np.eye(len(values))
    se_gls = np.sqrt(np.diag(np.linalg.inv(X.T @ np.linalg.solve(V, X))))
    for j, name in enumerate(["Intercept", "contrast[T.novel]"]):
        assert est.loc[name, "estimate"] == pytest.approx(ref.fe_params[name], rel=1e-4, abs=1e-5)
        assert est.loc[name, "se"] == pytest.approx(se_gls[j], rel=1e-4)
        assert est.loc[name, "se"] == pytest.approx(ref.bse_fe[name], rel=3e-3)
    assert est["converged"].all() and not est["boundary"].any()


def test_ml_agrees_with_statsmodels():
    import statsmodels.formula.api as smf

    values, participants = _study(n=12, seed=9)
    data = values.merge(participants, on="participant_id")
    y = data["value"].to_numpy()
    X = np.column_stack([np.ones(len(y)), (data["contrast"] == "novel").to_numpy(float)])
    codes = pd.factorize(data["participant_id"])[0]
    fit = fit_mixed(y, X, [RandomFactor("participant", codes, np.ones((len(y), 1)), ["Intercept"])], reml=False)
    # statsmodels MixedLM (reference library), ML
    ref = smf.mixedlm("value ~ contrast", data, groups="participant_id").fit(reml=False)
    assert fit.sigma2 == pytest.approx(ref.scale, rel=1e-4)
    assert fit.covariances[0][0, 0] == pytest.approx(ref.cov_re.iloc[0, 0], rel=1e-4)
    # -2 log-likelihood = deviance (ML)
    assert fit.deviance == pytest.approx(-2 * ref.llf, rel=1e-7)


def test_random_slope_agrees_with_statsmodels():
    import statsmodels.formula.api as smf

    values, _ = _study(n=20, sessions=["ses-1", "ses-2"], sd_slope=0.8, seed=12)
    res = run_design(values, "mixed", formula="value ~ contrast", random="1 + contrast")
    # statsmodels MixedLM (reference library), random intercept and slope, unstructured covariance
    ref = smf.mixedlm("value ~ contrast", values, groups="participant_id", re_formula="1 + contrast").fit(reml=True)
    est = res.set_index("term")
    for name, b in ref.fe_params.items():
        assert est.loc[name, "estimate"] == pytest.approx(b, rel=1e-4, abs=1e-6)
    assert est["sd_participant_contrast_t_novel"].iloc[0] == pytest.approx(np.sqrt(ref.cov_re.iloc[1, 1]), rel=1e-3)
    # the REML criterion we minimise is at least as good as the reference fit's (we keep the best optimiser)
    assert est["deviance"].iloc[0] <= -2 * ref.llf + 1e-6


# ----------------------------------------------------------------------------- balanced-design facts
def test_satterthwaite_within_factor_equals_anova_df():
    n, k = 15, 4
    values, _ = _study(n=n, contrasts=tuple(_TOWNS[:k]), sd_participant=1.5, seed=21)
    res = run_design(values, "mixed", formula="value ~ contrast", random="1").set_index("term")
    # repeated-measures ANOVA df (n-1)(k-1) for a within-participant factor (textbook fact of balanced designs,
    # e.g. Maxwell & Delaney 2004, ch. 11; from memory)
    assert res.loc["contrast", "df"] == pytest.approx((n - 1) * (k - 1), rel=1e-6)
    assert res.loc["contrast", "df1"] == k - 1 and res.loc["contrast", "statistic_type"] == "F"
    assert np.isnan(res.loc["contrast", "estimate"])


def test_satterthwaite_split_plot_between_factor_equals_n_minus_g():
    n, g = 16, 2
    values, participants = _study(n=n, sd_participant=1.5, seed=5, group_effect=0.5)
    # split-plot ANOVA: between-participant factor on n - g df, within factor and interaction on (n - g)(k - 1)
    # (textbook fact of balanced designs, e.g. Maxwell & Delaney 2004, ch. 12; from memory)
    main = run_design(values, "mixed", formula="value ~ contrast + group", random="1",
                      participants=participants).set_index("term")
    assert main.loc["group[T.younger]", "df"] == pytest.approx(n - g, rel=1e-6)
    full = run_design(values, "mixed", formula="value ~ contrast * group", random="1",
                      participants=participants).set_index("term")
    assert full.loc["contrast[T.novel]:group[T.younger]", "df"] == pytest.approx((n - g) * 1, rel=1e-6)
    assert full.loc["contrast[T.novel]", "df"] == pytest.approx(n - g, rel=1e-6)
    # with treatment coding the group coefficient is the difference at the reference contrast: it mixes the
    # between and within strata, so its df lie between n - g and the total (not a fact to pin down exactly)
    assert n - g < full.loc["group[T.younger]", "df"] < 2 * n - g


def test_crossed_balanced_closed_form():
    n, k = 12, 6
    values, _ = _study(n=n, contrasts=tuple(_TOWNS), sd_participant=1.0, sd_town=0.8, seed=33)
    res = run_design(values, "mixed", formula="value ~ 1", random="1", crossed="contrast").iloc[0]
    Y = values.pivot(index="participant_id", columns="contrast", values="value").to_numpy()
    gm = Y.mean()
    ms_a = k * np.sum((Y.mean(1) - gm) ** 2) / (n - 1)
    ms_b = n * np.sum((Y.mean(0) - gm) ** 2) / (k - 1)
    e = Y - Y.mean(1, keepdims=True) - Y.mean(0, keepdims=True) + gm
    ms_e = np.sum(e**2) / ((n - 1) * (k - 1))
    # balanced two-way crossed random model without replication: E[MS_A] = s2_e + k s2_a, E[MS_B] = s2_e + n s2_b,
    # E[MS_E] = s2_e; REML equals these ANOVA estimators when all are positive (Searle, Casella & McCulloch 1992,
    # Variance Components, ch. 4 and 6; from memory)
    assert ms_a > ms_e and ms_b > ms_e
    assert res["sd_residual"] ** 2 == pytest.approx(ms_e, rel=1e-5)
    assert res["sd_participant"] ** 2 == pytest.approx((ms_a - ms_e) / k, rel=1e-5)
    assert res["sd_contrast"] ** 2 == pytest.approx((ms_b - ms_e) / n, rel=1e-5)
    # Var(grand mean) = (MS_A + MS_B - MS_E) / (n k) and its Satterthwaite (1946) df for a linear combination of
    # mean squares (same sources, from memory)
    combo = ms_a + ms_b - ms_e
    assert res["se"] == pytest.approx(np.sqrt(combo / (n * k)), rel=1e-5)
    df = combo**2 / (ms_a**2 / (n - 1) + ms_b**2 / (k - 1) + ms_e**2 / ((n - 1) * (k - 1)))
    assert res["df"] == pytest.approx(df, rel=1e-4)
    assert res["n_stimuli"] == k and res["n_participants"] == n and res["n_observations"] == n * k


def test_balanced_random_intercept_matches_anova_closed_form():
    n, k = 10, 3
    values, _ = _study(n=n, contrasts=tuple(_TOWNS[:k]), sd_participant=1.2, seed=44)
    res = run_design(values, "mixed", formula="value ~ contrast", random="1").iloc[0]
    Y = values.pivot(index="participant_id", columns="contrast", values="value").to_numpy()
    gm = Y.mean()
    ms_s = k * np.sum((Y.mean(1) - gm) ** 2) / (n - 1)
    e = Y - Y.mean(1, keepdims=True) - Y.mean(0, keepdims=True) + gm
    ms_e = np.sum(e**2) / ((n - 1) * (k - 1))
    # between-participant variance = max(0, (MS_participant - MS_error) / k) (closed form for balanced designs,
    # ../shared/MEASUREMENTS.md; Searle, Casella & McCulloch 1992, from memory)
    assert res["sd_participant"] ** 2 == pytest.approx(max(0.0, (ms_s - ms_e) / k), rel=1e-5)
    assert res["icc"] == pytest.approx(res["sd_participant"] ** 2 / (res["sd_participant"] ** 2 + ms_e), rel=1e-5)
    # Nakagawa & Schielzeth (2013): R2 conditional - R2 marginal = random variance share of the total
    assert 0 <= res["r2_marginal"] <= res["r2_conditional"] <= 1


def test_boundary_flagged_at_zero_participant_variance():
    values, _ = _study(n=12, contrasts=tuple(_TOWNS[:3]), sd_participant=0.0, seed=2)
    # make the participant means identical so the REML participant variance is exactly at zero
    values["value"] -= values.groupby("participant_id")["value"].transform("mean")
    with pytest.warns(Warning, match="boundary"):
        res = run_design(values, "mixed", formula="value ~ contrast", random="1")
    assert res["boundary"].all() and res["converged"].all()
    assert res["sd_participant"].iloc[0] < 1e-4 * res["sd_residual"].iloc[0]


# ----------------------------------------------------------------------------- options, errors, parallel
def test_z_option_and_parallel_match():
    values, _ = _study(n=10, regions=("left hippocampus", "caudate", "retrosplenial cortex"), seed=7)
    one = run_design(values, "mixed", formula="value ~ contrast", random="1")
    two = run_design(values, "mixed", formula="value ~ contrast", random="1", n_jobs=2)
    np.testing.assert_allclose(one["estimate"], two["estimate"], rtol=1e-12)
    np.testing.assert_allclose(one["df"], two["df"], rtol=1e-10)
    z = run_design(values, "mixed", formula="value ~ contrast", random="1", df_method="z")
    assert set(z["statistic_type"]) == {"z"} and set(one["df_method"]) == {"satterthwaite"}
    np.testing.assert_allclose(z["statistic"], one["statistic"], rtol=1e-12)
    assert (z["p"] <= one["p"]).all()  # a normal reference is never more conservative than t


def test_errors():
    values, participants = _study(n=8, seed=1)
    with pytest.raises(DesignError, match="random effects for 16 observations.*cannot support"):
        run_design(values, "mixed", formula="value ~ contrast", random="1 + contrast")
    with pytest.raises(DesignError, match="random slope 'group.*does not vary within"):
        run_design(values, "mixed", formula="value ~ contrast", random="1 + group", participants=participants)
    with pytest.raises(DesignError, match="holds 2 contrasts.*contrast="):
        run_design(values, "mixed", formula="value ~ 1", random="1")
    with pytest.raises(UsageError, match="no formula given"):
        run_design(values, "mixed", random="1")
    with pytest.raises(UsageError, match="left-hand side must be 'value'"):
        run_design(values, "mixed", formula="signal ~ contrast")
    with pytest.raises(DesignError, match="contrast town9 not found"):
        run_design(values, "mixed", formula="value ~ 1", contrast="town9")
    with pytest.raises(UsageError, match="needs participants.tsv"):
        run_design(values, "mixed", formula="value ~ contrast + age")


def test_convergence_error_names_region(monkeypatch):
    values, _ = _study(n=8, seed=3)
    monkeypatch.setattr(mixed_mod, "GRADIENT_TOL", -1.0)  # no optimiser can pass: the fit must refuse numbers
    with pytest.raises(ConvergenceError, match="left hippocampus.*did not converge with any optimiser"):
        run_design(values, "mixed", formula="value ~ contrast", random="1")


def test_missing_value_excluded_and_named():
    values, _ = _study(n=8, regions=("left hippocampus", "caudate"), seed=6)
    values.loc[(values["participant_id"] == "sub-03") & (values["region"] == "caudate")
               & (values["contrast"] == "novel"), "value"] = np.nan
    with pytest.warns(Warning, match="caudate: sub-03"):
        res = run_design(values, "mixed", formula="value ~ contrast", random="1")
    by = res[res["term"] == "Intercept"].set_index("region")
    assert by.loc["caudate", "excluded_ids"] == "sub-03" and by.loc["left hippocampus", "excluded_ids"] == ""
    assert by.loc["caudate", "n_observations"] == 15 and by.loc["caudate", "n_participants"] == 8


def test_satterthwaite_core_single_level():
    # one-way random intercept, balanced: df of the grand mean = n - 1 (textbook fact, from memory)
    rng = np.random.default_rng(0)
    n, k = 9, 4
    codes = np.repeat(np.arange(n), k)
    y = rng.normal(0, 1.5, n)[codes] + rng.normal(size=n * k)
    X = np.ones((n * k, 1))
    f = [RandomFactor("participant", codes, np.ones((n * k, 1)), ["Intercept"])]
    fit = fit_mixed(y, X, f)
    assert not fit.boundary
    df, _ = satterthwaite(fit, X, f, np.eye(1))
    assert df[0] == pytest.approx(n - 1, rel=1e-6)


def test_regions_on_a_dask_cluster_and_in_processes_match_the_serial_fit():
    import distributed  # part of the test install

    from roikit.stats import run_design

    rng = np.random.default_rng(8)
    rows = []
    for r in range(3):
        town = rng.normal(0, 0.3, 6)
        for i in range(12):
            u = rng.normal(0, 0.5)
            for t in range(6):
                rows.append({"participant_id": f"sub-{i + 1:02d}", "contrast": f"town{t + 1}", "region": f"region {r}",
                             "value": 0.2 + u + town[t] + rng.normal(0, 0.4), "n_voxels": 50, "n_valid": 50})
    values = pd.DataFrame(rows)
    options = dict(formula="value ~ 1", random="1", crossed="contrast")
    serial = run_design(values, "mixed", **options)
    procs = run_design(values, "mixed", n_jobs=2, **options)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as c:
        with distributed.Client(c) as client:
            remote = run_design(values, "mixed", executor=client.get_executor(), **options)
    pd.testing.assert_frame_equal(serial, procs)
    pd.testing.assert_frame_equal(serial, remote)
