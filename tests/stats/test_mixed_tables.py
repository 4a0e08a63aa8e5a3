"""Mixed design, round 2: per-contrast tables, centring per region, variance reporting, the batched fit."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from roikit.errors import DesignError, MissingValueWarning, UsageError
from roikit.stats import run_design
from roikit.stats._common import attach_columns, side_table
from roikit.stats.mixed import RandomFactor, _fai_cornelius, fit_mixed, satterthwaite

LOADS = {f"load{j}": float(j) for j in range(1, 5)}


def _load_study(n=20, regions=("left hippocampus",), seed=0, slope_sd=0.0, sd_participant=1.0):
    """Working-memory-like load levels as contrasts: value = 0.5 + 0.3 load + u + s load + e."""
    rng = np.random.default_rng(seed)
    ids = [f"sub-{i + 1:02d}" for i in range(n)]
    rows = []
    for r in regions:
        for pid in ids:
            u, s = rng.normal(0, sd_participant), rng.normal(0, slope_sd)
            for c, load in LOADS.items():
                rows.append(dict(participant_id=pid, contrast=c, region=r, n_voxels=50, n_valid=50,
                                 value=0.5 + (0.3 + s) * load + u + rng.normal(0, 0.7)))
    participants = pd.DataFrame({"participant_id": ids, "age": rng.uniform(20, 80, n)})
    contrasts = pd.DataFrame({"contrast": list(LOADS), "load": list(LOADS.values())})
    return pd.DataFrame(rows), participants, contrasts


def test_per_contrast_covariate_accepted_and_indistinguishable_rows_refused_in_python_language():
    values, participants, contrasts = _load_study(seed=1)
    res = run_design(values, "mixed", formula="value ~ load", random="1", contrasts=contrasts).set_index("term")
    assert res.loc["load", "n_observations"] == 80
    # the same model by hand: the load column joined by contrast (statsmodels MixedLM, reference library)
    import statsmodels.formula.api as smf

    data = values.merge(contrasts, on="contrast")
    data["load"] -= data["load"].mean()
    ref = smf.mixedlm("value ~ load", data, groups="participant_id").fit(reml=True)
    assert res.loc["load", "estimate"] == pytest.approx(ref.fe_params["load"], rel=1e-6)
    assert res.loc["load", "deviance"] <= -2 * ref.llf + 1e-8
    with pytest.raises(DesignError, match=r"do not tell contrasts load1, load2.*contrast='load1'") as info:
        run_design(values, "mixed", formula="value ~ 1", random="1")
    assert "--contrast" not in str(info.value)
    with pytest.raises(DesignError, match="contrasts.tsv has no row for contrast load4"):
        run_design(values, "mixed", formula="value ~ load", contrasts=contrasts.iloc[:3])
    with pytest.raises(UsageError, match="listed more than once"):
        run_design(values, "mixed", formula="value ~ load", contrasts=pd.concat([contrasts, contrasts.iloc[:1]]))


def test_side_tables_join_on_their_keys():
    values, _, contrasts = _load_study(n=3, regions=("a", "b"))
    regions = side_table(pd.DataFrame({"region": ["a", "b"], "hemisphere": ["left", "right"]}), kind="regions")
    out, sources = attach_columns(values, ["load", "hemisphere", "value"], contrasts=side_table(contrasts,
                                  kind="contrasts"), region_table=regions)
    assert sources == {"value": "values", "load": "contrasts.tsv", "hemisphere": "regions.tsv"}
    assert (out["load"] == out["contrast"].map(LOADS)).all()
    assert (out.loc[out["region"] == "b", "hemisphere"] == "right").all()


def test_centring_per_region_region_alone_equals_region_beside_others_with_missing_values():
    values, participants, contrasts = _load_study(n=14, regions=("left hippocampus", "caudate"), seed=2)
    rng = np.random.default_rng(3)
    caudate = np.flatnonzero(values["region"] == "caudate")
    values.loc[rng.choice(caudate, 15, replace=False), "value"] = np.nan
    participants.loc[participants.index[:2], "age"] = np.nan  # missing covariate: all their rows dropped
    opts = dict(formula="value ~ load + age", random="1", contrasts=contrasts, participants=participants)
    with pytest.warns(MissingValueWarning, match="left out entirely: sub-01, sub-02"):
        alone = run_design(values[values["region"] == "left hippocampus"], "mixed", **opts)
    with pytest.warns(MissingValueWarning, match=r"observations excluded"):
        both = run_design(values, "mixed", **opts)
    both_lh = both[both["region"] == "left hippocampus"].reset_index(drop=True)
    for column in ("estimate", "se", "df", "p", "sd_participant", "sd_residual", "deviance", "effect_size"):
        np.testing.assert_allclose(both_lh[column], alone[column], rtol=1e-9, err_msg=column)
    assert both_lh["centered"].iloc[0] == alone["centered"].iloc[0]
    mean_age = participants["age"].dropna().mean()
    assert alone["centered"].iloc[0] == f"load (mean 2.5), age (mean {mean_age:.10g})"
    # the caudate's means are its own complete rows'
    cau = both[both["region"] == "caudate"].iloc[0]
    assert cau["centered"] != alone["centered"].iloc[0]


def test_no_center_keeps_the_raw_scale():
    values, _, contrasts = _load_study(seed=4)
    raw = run_design(values, "mixed", formula="value ~ load", contrasts=contrasts, center=False).set_index("term")
    cen = run_design(values, "mixed", formula="value ~ load", contrasts=contrasts).set_index("term")
    assert raw.loc["load", "estimate"] == pytest.approx(cen.loc["load", "estimate"], rel=1e-10)
    # intercept at load 0 = intercept at the mean load (2.5) - 2.5 x slope (exact identity of the linear model)
    assert raw.loc["Intercept", "estimate"] == pytest.approx(
        cen.loc["Intercept", "estimate"] - 2.5 * cen.loc["load", "estimate"], rel=1e-9)
    assert raw["centered"].isna().all()


def test_exclusion_counts_observations_and_participants():
    values, _, contrasts = _load_study(n=10, regions=("a", "b"), seed=5)
    drop = (values["region"] == "b") & values["participant_id"].isin(["sub-01", "sub-02"])
    values.loc[drop, "value"] = np.nan  # 8 observations, two participants left out entirely
    values.loc[(values["region"] == "b") & (values["participant_id"] == "sub-03")
               & (values["contrast"] == "load1"), "value"] = np.nan
    with pytest.warns(MissingValueWarning, match=r"9 observations excluded in 1 region .*b: sub-01, sub-02, "
                                                 r"sub-03 \(9 observations of 3 participants; 2 of them left "
                                                 r"out entirely: sub-01, sub-02\)"):
        res = run_design(values, "mixed", formula="value ~ load", contrasts=contrasts)
    by = res[res["term"] == "load"].set_index("region")
    assert by.loc["b", "n_excluded_observations"] == 9 and by.loc["b", "n_excluded_participants"] == 2
    assert by.loc["b", "n"] == 8 and by.loc["b", "n_observations"] == 31
    assert by.loc["a", "n_excluded_observations"] == 0 and by.loc["b", "excluded_ids"] == "sub-01,sub-02,sub-03"


def _unbalanced(seed, regions=6):
    rng = np.random.default_rng(seed)
    towns = [f"town{j}" for j in range(1, 4)]
    rows = []
    for r in range(regions):
        sd_u = [0.0, 0.3, 1.0, 2.0, 0.05, 0.6][r % 6]
        for i in range(15):
            u = rng.normal(0, sd_u)
            for t in towns:
                rows.append(dict(participant_id=f"sub-{i + 1:02d}", contrast=t, region=f"region {r}", n_voxels=9,
                                 n_valid=9, value=u + 0.2 * (t == "town2") + rng.normal(0, 1)))
    values = pd.DataFrame(rows)
    values.loc[rng.choice(len(values), 25, replace=False), "value"] = np.nan
    return values


@pytest.mark.parametrize("estimation", ["reml", "ml"])
def test_batched_fit_equals_the_region_by_region_fit(estimation):
    values = _unbalanced(6)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_design(values, "mixed", formula="value ~ contrast", random="1", estimation=estimation)
    assert set(res["optimizer"]) == {"batched-profiled"}
    for region, sub in values.dropna(subset=["value"]).groupby("region", sort=False):
        y = sub["value"].to_numpy()
        X = np.column_stack([np.ones(len(y)), sub["contrast"] == "town2", sub["contrast"] == "town3"]).astype(float)
        codes = pd.factorize(sub["participant_id"])[0]
        f = [RandomFactor("participant", codes, np.ones((len(y), 1)), ["Intercept"])]
        ref = fit_mixed(y, X, f, reml=estimation == "reml")
        row = res[res["region"] == region].set_index("term")
        # never worse than the optimisers' fit; equal within its tolerance
        assert row["deviance"].iloc[0] <= ref.deviance + 1e-9
        assert row["deviance"].iloc[0] == pytest.approx(ref.deviance, abs=1e-6)
        assert row.loc["contrast", "df1"] == 2
        df_ref = satterthwaite(ref, X, f, np.eye(3))[0]
        for j, name in enumerate(["Intercept"]):
            assert row.loc[name, "estimate"] == pytest.approx(ref.beta[j], rel=1e-5, abs=1e-7)
            assert row.loc[name, "se"] == pytest.approx(np.sqrt(ref.cov_beta[j, j]), rel=1e-4)
            assert row.loc[name, "df"] == pytest.approx(df_ref[j], rel=1e-3)
        F, df = _fai_cornelius(ref, X, f, [1, 2])
        assert row.loc["contrast", "statistic"] == pytest.approx(F, rel=1e-4)
        assert row.loc["contrast", "df"] == pytest.approx(df, rel=1e-3)
    assert set(res["estimation"]) == {estimation}


def test_boundary_terms_correlations_and_effect_size():
    values, _, contrasts = _load_study(n=24, seed=7, slope_sd=0.0, sd_participant=1.0)
    with pytest.warns(Warning, match="boundary"):
        res = run_design(values, "mixed", formula="value ~ load", random="1 + load", contrasts=contrasts)
    row = res.set_index("term").loc["load"]
    assert "corr_participant_load" in res.columns
    # a true slope SD of zero: either the slope SD is at zero or its correlation with the intercept at +-1
    assert row["boundary"] and row["boundary_terms"] in ("sd_participant_load", "corr_participant_load")
    # d_wkj = b / sqrt(sum of variance components); with a random slope its contribution is the mean of
    # z' S z over the observations (Johnson 2014), here from the columns
    assert row["effect_size"] == pytest.approx(row["estimate"] / np.sqrt(row["variance_total"]), rel=1e-12)
    assert row["effect_size_type"] == "d_wkj"
    values2, _, _ = _load_study(n=24, seed=8, sd_participant=1.0)
    ri = run_design(values2, "mixed", formula="value ~ load", contrasts=contrasts).set_index("term").loc["load"]
    assert ri["variance_total"] == pytest.approx(ri["sd_participant"] ** 2 + ri["sd_residual"] ** 2, rel=1e-12)
    assert ri["boundary_terms"] != ri["boundary_terms"] or ri["boundary_terms"] == ""


def test_batched_random_slopes_equal_the_region_by_region_fit():
    values, _, contrasts = _load_study(n=18, regions=("a", "b", "c", "d"), seed=9, slope_sd=0.25)
    values.loc[values.sample(12, random_state=1).index, "value"] = np.nan  # regions differ in their rows
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_design(values, "mixed", formula="value ~ load", random="1 + load", contrasts=contrasts,
                         center=False)
    assert "batched-profiled" in set(res["optimizer"])
    data = values.dropna(subset=["value"]).merge(contrasts, on="contrast")
    for region, sub in data.groupby("region", sort=False):
        y = sub["value"].to_numpy()
        X = np.column_stack([np.ones(len(y)), sub["load"].to_numpy()])
        codes = pd.factorize(sub["participant_id"])[0]
        f = [RandomFactor("participant", codes, X.copy(), ["Intercept", "load"])]
        ref = fit_mixed(y, X, f)
        row = res[res["region"] == region].set_index("term")
        assert row["deviance"].iloc[0] <= ref.deviance + 1e-7
        assert row["deviance"].iloc[0] == pytest.approx(ref.deviance, abs=1e-5)
        assert row.loc["load", "estimate"] == pytest.approx(ref.beta[1], rel=1e-4, abs=1e-6)
        assert row.loc["load", "sd_participant_load"] == pytest.approx(np.sqrt(ref.covariances[0][1, 1]),
                                                                      rel=1e-3, abs=1e-4)
        assert row.loc["load", "df"] == pytest.approx(satterthwaite(ref, X, f, np.eye(2)[1:])[0][0], rel=1e-3)


def test_batched_fit_in_chunks_equals_one_batch(monkeypatch):
    import roikit.stats.mixed as mixed_mod

    values = _unbalanced(11, regions=5)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        one = run_design(values, "mixed", formula="value ~ contrast", random="1")
        monkeypatch.setattr(mixed_mod, "_BATCH_ELEMENTS", 1)  # one region per batch
        chunked = run_design(values, "mixed", formula="value ~ contrast", random="1")
    for column in ("estimate", "se", "df", "deviance", "sd_participant"):
        np.testing.assert_allclose(chunked[column], one[column], rtol=1e-9, err_msg=column)
