"""Tests of the fixed-effects design (roikit.stats.fixed)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from roikit.errors import CautionWarning, DesignError
from roikit.stats import run_design
from roikit.stats.fixed import fit_fixed_effects
import roikit.stats.fixed  # noqa: F401  (registers the design)
from roikit.stats.precision import fit_precision_weighted


def test_weighted_mean_by_hand():
    y = np.array([1.0, 2.0, 4.0])
    v = np.array([1.0, 0.5, 2.0])
    r = fit_fixed_effects(y, v)
    # inverse-variance weighted mean, by hand: (1/1 + 2/0.5 + 4/2) / (1 + 2 + 0.5) = 7 / 3.5 = 2
    assert r["b"][0] == pytest.approx(2.0)
    # se = 1 / sqrt(sum of weights) = 1 / sqrt(3.5), by hand
    assert r["se"][0] == pytest.approx(1 / np.sqrt(3.5))


def test_simulation_false_positive_rates():
    # 20 participants, true mean 0, between-participant SD > 0, equal known first-level variance v
    rng = np.random.default_rng(20240501)
    n, reps, v, tau2 = 20, 20000, 1.0, 1.0
    y = rng.normal(0.0, np.sqrt(tau2), size=(n, reps)) + rng.normal(0.0, np.sqrt(v), size=(n, reps))
    vv = np.full_like(y, v)
    alpha = 0.05
    rfx = fit_precision_weighted(y, vv, tau2_method="reml")  # random effects: REML + Knapp-Hartung t
    ffx = fit_fixed_effects(y, vv)
    rate_rfx = np.mean(rfx["p"][:, 0] < alpha)
    rate_ffx = np.mean(ffx["p"] < alpha)
    mc_se = lambda p: np.sqrt(p * (1 - p) / reps)  # noqa: E731
    # nominal level of a valid test (definition)
    assert abs(rate_rfx - alpha) < 3 * mc_se(alpha)
    # exact fixed-effects rate 2 (1 - Phi(z_crit / sqrt(lambda))), lambda = 1 + tau2 / v (issue 5; normal theory,
    # common practice, no source): the z statistic has variance lambda under the two-level model
    lam = 1 + tau2 / v
    exact = 2 * stats.norm.sf(stats.norm.ppf(1 - alpha / 2) / np.sqrt(lam))
    assert abs(rate_ffx - exact) < 3 * mc_se(exact)
    assert exact > 0.15  # the fixed-effects test is far from nominal here


def _values(y, v):
    regions = ["left hippocampus", "caudate"]
    rows = [dict(participant_id=f"sub-{i + 1:02d}", contrast="novel", region=r, value=y[i, j], n_voxels=40,
                 n_valid=40, variance=v[i, j]) for i in range(y.shape[0]) for j, r in enumerate(regions)]
    return pd.DataFrame(rows)


def test_design_rows_flagged_and_caution():
    rng = np.random.default_rng(1)
    y = rng.normal(0.2, 1.0, size=(12, 2))
    v = rng.uniform(0.2, 0.6, size=(12, 2))
    with pytest.warns(CautionWarning, match="describes only these participants and does not generalise"):
        res = run_design(_values(y, v), "fixed-effects", contrast="novel")
    assert not res["population_inference"].any()
    assert res["fixed_effects_only"].all()
    assert set(res["statistic_type"]) == {"z"} and set(res["term"]) == {"mean"}
    assert res["caution"].str.contains("does not generalise to the population").all()
    np.testing.assert_allclose(res["estimate"], (y / v).sum(0) / (1 / v).sum(0), rtol=1e-12)


def test_design_errors():
    rng = np.random.default_rng(2)
    y = rng.normal(size=(6, 2))
    v = np.full((6, 2), 0.5)
    with pytest.raises(DesignError, match="no 'variance' column"):
        run_design(_values(y, v).drop(columns="variance"), "fixed-effects", contrast="novel")
    v[1, 0] = -1.0
    with pytest.raises(DesignError, match="non-positive first-level variance.*sub-02 in left hippocampus"):
        run_design(_values(y, v), "fixed-effects", contrast="novel")
