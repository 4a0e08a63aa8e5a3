"""Max-statistic permutation family-wise p against brute-force enumerations written independently here."""

from __future__ import annotations

import itertools
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from roikit.errors import DesignError, UsageError
from roikit.stats import run_design
from roikit.stats.permutation import freedman_lane_max, label_max_t, sign_flip_max_t

from stats_data import participants_table, values_table


def _brute_sign_flip(y):
    """All 2^n sign patterns, t by scipy.stats.ttest_1samp, max |t| over columns (independent implementation)."""
    n = y.shape[0]
    maxima = []
    for signs in itertools.product([1.0, -1.0], repeat=n):
        t = stats.ttest_1samp(y * np.array(signs)[:, None], 0.0, axis=0).statistic
        maxima.append(np.max(np.abs(t)))
    maxima = np.array(maxima)
    observed = np.abs(stats.ttest_1samp(y, 0.0, axis=0).statistic)
    return np.array([(maxima >= o - 1e-9).mean() for o in observed])


def test_sign_flip_exact_equals_full_enumeration_n10():
    rng = np.random.default_rng(2024)
    y = rng.normal(0.5, 1.0, (10, 4))
    p, total, exact = sign_flip_max_t(y, permutations=5000, rng=np.random.default_rng(0))
    assert exact and total == 1024
    # brute force over all 1024 sign patterns with scipy.stats.ttest_1samp
    np.testing.assert_allclose(p, _brute_sign_flip(y), rtol=0, atol=1e-12)


def test_sign_flip_random_close_to_exact_and_seeded():
    rng = np.random.default_rng(7)
    y = rng.normal(0.6, 1.0, (10, 3))
    exact_p, *_ = sign_flip_max_t(y, permutations=2000, rng=np.random.default_rng(0))
    p1, total, exact = sign_flip_max_t(y, permutations=1000, rng=np.random.default_rng(5))
    p2, *_ = sign_flip_max_t(y, permutations=1000, rng=np.random.default_rng(5))
    assert not exact and total == 1000
    np.testing.assert_array_equal(p1, p2)
    # Monte Carlo SE of a proportion with 1000 draws is at most 0.016; allow 4 SE (common practice, no source)
    np.testing.assert_allclose(p1, exact_p, atol=0.064)


def test_sign_flip_missing_values_use_masks():
    rng = np.random.default_rng(8)
    y = rng.normal(0.5, 1.0, (8, 3))
    y[2, 1] = np.nan
    p, total, _ = sign_flip_max_t(y, permutations=1000, rng=np.random.default_rng(0))
    # brute force: per-region scipy t on present values, same sign pattern for all regions
    maxima = []
    for signs in itertools.product([1.0, -1.0], repeat=8):
        flipped = y * np.array(signs)[:, None]
        t = [stats.ttest_1samp(flipped[~np.isnan(flipped[:, j]), j], 0.0).statistic for j in range(3)]
        maxima.append(np.max(np.abs(t)))
    maxima = np.array(maxima)
    obs = [abs(stats.ttest_1samp(y[~np.isnan(y[:, j]), j], 0.0).statistic) for j in range(3)]
    np.testing.assert_allclose(p, [(maxima >= o - 1e-9).mean() for o in obs], atol=1e-12)


@pytest.mark.parametrize("welch", [False, True])
def test_label_exact_equals_enumeration(welch):
    rng = np.random.default_rng(10)
    y = rng.normal(size=(9, 3))
    y[:4] += 1.0
    first = np.arange(9) < 4
    p, total, exact = label_max_t(y, first, welch=welch, permutations=500, rng=np.random.default_rng(0))
    assert exact and total == 126  # C(9, 4)
    # brute force with scipy.stats.ttest_ind over all 126 labelings
    maxima = []
    for combo in itertools.combinations(range(9), 4):
        g = np.zeros(9, bool)
        g[list(combo)] = True
        maxima.append(np.max(np.abs(stats.ttest_ind(y[g], y[~g], equal_var=not welch).statistic)))
    maxima = np.array(maxima)
    obs = np.abs(stats.ttest_ind(y[first], y[~first], equal_var=not welch).statistic)
    np.testing.assert_allclose(p, [(maxima >= o - 1e-9).mean() for o in obs], atol=1e-12)


def test_freedman_lane_exact_equals_brute_force_statsmodels():
    rng = np.random.default_rng(21)
    n = 7
    age = rng.normal(size=n)
    grp = np.array([0, 0, 0, 1, 1, 1, 1], float)
    x = np.column_stack([np.ones(n), age, grp])
    y = rng.normal(size=(n, 3)) + age[:, None] * 0.8
    tests = [("age", np.array([[0.0, 1.0, 0.0]]))]
    out, total, exact = freedman_lane_max(x, y, tests, permutations=6000, rng=np.random.default_rng(0))
    assert exact and total == 5040
    # brute force: reduced model by statsmodels OLS on [1, grp], permute its residuals, refit full model, max |t|
    z = x[:, [0, 2]]
    fitted = np.column_stack([sm.OLS(y[:, j], z).fit().fittedvalues for j in range(3)])
    resid = y - fitted
    maxima = []
    for perm in itertools.permutations(range(n)):
        ystar = fitted + resid[list(perm)]
        maxima.append(max(abs(sm.OLS(ystar[:, j], x).fit().tvalues[1]) for j in range(3)))
    maxima = np.array(maxima)
    obs = [abs(sm.OLS(y[:, j], x).fit().tvalues[1]) for j in range(3)]
    np.testing.assert_allclose(out["age"], [(maxima >= o - 1e-9).mean() for o in obs], atol=1e-12)


def test_run_design_permutations_recorded_and_reproducible():
    rng = np.random.default_rng(31)
    values = values_table({"novel": rng.normal(0.3, 1, (16, 5))})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        a = run_design(values, "one-sample", contrast="novel", permutations=300, seed=11)
        b = run_design(values, "one-sample", contrast="novel", permutations=300, seed=11)
    np.testing.assert_array_equal(a["p_fwe"], b["p_fwe"])
    assert (a["permutations"] == 300).all() and (a["seed"] == 11).all()
    assert (a["permutation_scheme"] == "sign-flip").all() and not a["permutation_exact"].any()
    assert (a["p_fwe"] >= a["p"] - 1e-12).all()  # max-statistic p is never below the uncorrected permutation p
    assert a["correction"].iloc[0].split(",")[-1] == "fwe"


def test_glm_permutations_need_complete_data_and_two_group_runs():
    rng = np.random.default_rng(32)
    y = rng.normal(size=(12, 3))
    y[0, 2] = np.nan
    parts = participants_table(12)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(DesignError, match="Freedman-Lane.*complete data.*retrosplenial cortex|caudate"):
            run_design(values_table({"novel": y}), "glm", contrast="novel", formula="value ~ age",
                       participants=parts, permutations=50, seed=1)
        res = run_design(values_table({"novel": y}), "two-group", contrast="novel", group="group",
                         levels="younger,older", participants=parts, permutations=200, seed=1)
    assert res["p_fwe"].between(0, 1).all() and (res["permutation_scheme"] == "label").all()


def test_permutations_argument_checked():
    values = values_table({"novel": np.random.default_rng(1).normal(size=(6, 2))})
    with pytest.raises(UsageError, match="permutations must be a non-negative integer"):
        run_design(values, "one-sample", contrast="novel", permutations=-5)
