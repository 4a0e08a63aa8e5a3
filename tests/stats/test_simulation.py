"""Coverage and type I error by seeded simulation, within 3 Monte Carlo standard errors.

Replicates are columns (the designs are vectorised across regions), so thousands of replicates cost milliseconds.
The Monte Carlo SE of a rate r over R replicates is sqrt(r (1 - r) / R) (common practice, no source).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import stats

from roikit.stats import run_design
from roikit.stats.designs import one_sample_matrix, two_group_matrix
from roikit.stats.effect_sizes import hedges_j, ncf_lambda_interval
from roikit.stats.permutation import sign_flip_max_t

from stats_data import participants_table, values_table

R = 4000


def _within(rate, target, reps):
    se = np.sqrt(target * (1 - target) / reps)
    assert abs(rate - target) <= 3 * se, f"rate {rate:.4f} vs {target} (3 SE = {3 * se:.4f})"


def test_one_sample_type_i_and_coverage():
    rng = np.random.default_rng(101)
    null = one_sample_matrix(rng.normal(0.0, 1.0, (12, R)))
    _within(np.mean(null["p"] < 0.05), 0.05, R)
    effect = one_sample_matrix(rng.normal(0.5, 2.0, (12, R)), confidence=0.9)
    _within(np.mean((effect["ci_low"] <= 0.5) & (0.5 <= effect["ci_high"])), 0.9, R)
    # d = 0.5 / 2 = 0.25; the noncentral-t interval is exact for normal data (Steiger & Fouladi 1997)
    _within(np.mean((effect["d_low"] <= 0.25) & (0.25 <= effect["d_high"])), 0.9, R)


def test_welch_type_i_with_unequal_variances_and_g_coverage():
    rng = np.random.default_rng(102)
    r = two_group_matrix(rng.normal(0, 1, (8, R)), rng.normal(0, 3, (20, R)), welch=True)
    _within(np.mean(r["p"] < 0.05), 0.05, R)
    r = two_group_matrix(rng.normal(0.8, 1, (10, R)), rng.normal(0.0, 1, (10, R)))
    # the interval of delta is the g interval divided by J (contract: g's interval is scaled by J)
    j = hedges_j(18.0)
    covered = (r["g_low"] / j <= 0.8) & (0.8 <= r["g_high"] / j)
    _within(np.mean(covered), 0.95, R)
    _within(np.mean((r["ci_low"] <= 0.8) & (0.8 <= r["ci_high"])), 0.95, R)


def test_noncentral_f_interval_coverage():
    rng = np.random.default_rng(103)
    reps, lam = 1500, 6.0
    f = stats.ncf.rvs(2, 30, lam, size=reps, random_state=rng)
    lo, hi = ncf_lambda_interval(f, 2.0, 30.0, 0.9)
    _within(np.mean((lo <= lam) & (lam <= hi)), 0.9, reps)


def test_glm_type_i_through_run_design():
    rng = np.random.default_rng(104)
    reps, n = 1500, 20
    values = values_table({"novel": rng.normal(size=(n, reps))})
    parts = participants_table(n, seed=3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_design(values, "glm", contrast="novel", formula="value ~ age + group", participants=parts)
    age = res[res["term"] == "age"]
    _within(np.mean(age["p"] < 0.05), 0.05, reps)
    _within(np.mean((age["ci_low"] <= 0) & (0 <= age["ci_high"])), 0.95, reps)


@pytest.mark.parametrize("n", [10])
def test_sign_flip_family_wise_error(n):
    rng = np.random.default_rng(105)
    reps = 400
    hits = 0
    for _ in range(reps):
        y = rng.normal(size=(n, 5))
        p, _total, exact = sign_flip_max_t(y, permutations=2000, rng=rng)
        hits += np.min(p) <= 0.05
    # exact permutation test: FWE <= 0.05; check it is not above 0.05 + 3 SE (nor implausibly conservative)
    rate = hits / reps
    se = np.sqrt(0.05 * 0.95 / reps)
    assert rate <= 0.05 + 3 * se and rate >= 0.05 - 3 * se - 0.01, rate
