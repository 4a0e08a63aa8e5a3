"""Effect-size intervals against independent scalar inversions with scipy's noncentral distributions."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, stats

from roikit.stats.effect_sizes import (
    d_interval,
    hedges_j,
    nct_ncp_interval,
    partial_eta2,
    partial_eta2_interval,
)


def test_hedges_j_exact():
    for df in (2.0, 9.0, 18.0, 50.0):
        # Hedges (1981): J(df) = Gamma(df/2) / (sqrt(df/2) Gamma((df-1)/2)), evaluated with math.gamma
        expected = math.gamma(df / 2) / (math.sqrt(df / 2) * math.gamma((df - 1) / 2))
        assert hedges_j(df) == pytest.approx(expected, rel=1e-12)
    # Hedges (1981) approximation J ~ 1 - 3 / (4 df - 1); the exact J for df = 18 agrees to 3e-4 (common practice)
    assert hedges_j(18.0) == pytest.approx(1 - 3 / (4 * 18 - 1), abs=3e-4)


@pytest.mark.parametrize("t,df", [(2.5, 9), (-4.06, 9), (0.3, 30), (8.0, 15), (15.8, 999), (-1.2, 3)])
def test_nct_interval_matches_independent_brentq(t, df):
    lo, hi = nct_ncp_interval(np.array([t]), np.array([float(df)]), 0.95)
    # independent inversion: scipy.optimize.brentq on scipy.stats.nct.cdf, bracket t -/+ (4 s + 1) with
    # s = sqrt(1 + t^2 / (2 df)) (the spread of the normal approximation, Abramowitz & Stegun 26.7.10)
    f = lambda ncp, target: stats.nct.cdf(t, df, ncp) - target  # noqa: E731
    w = 4 * np.sqrt(1 + t**2 / (2 * df)) + 1
    ref_lo = optimize.brentq(f, t - w, t + w, args=(0.975,), xtol=1e-12)
    ref_hi = optimize.brentq(f, t - w, t + w, args=(0.025,), xtol=1e-12)
    assert lo[0] == pytest.approx(ref_lo, abs=1e-7)
    assert hi[0] == pytest.approx(ref_hi, abs=1e-7)


def test_nct_interval_far_tails_are_finite():
    # scipy's nct cdf is NaN at t = -40, df = 9, ncp = 10 (observed with scipy 1.17): the inversion must still work
    lo, hi = nct_ncp_interval(np.array([-40.0, 60.0, 300.0]), np.array([9.0, 9.0, 999.0]), 0.95)
    assert np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))
    assert np.all(lo < np.array([-40.0, 60.0, 300.0])) and np.all(hi > np.array([-40.0, 60.0, 300.0]))
    # checked by scalar brentq on the finite-cdf region around the roots
    ref = optimize.brentq(lambda c: stats.nct.cdf(60.0, 9, c) - 0.025, 60, 200, xtol=1e-10)
    assert hi[1] == pytest.approx(ref, rel=1e-6)


def test_t_zero_symmetric_interval():
    # P(T <= 0 | ncp) = Phi(-ncp) exactly, so the limits are -/+ z_0.975 = 1.959963985 (scipy.stats.norm.ppf)
    lo, hi = nct_ncp_interval(np.array([0.0]), np.array([9.0]))
    assert lo[0] == pytest.approx(-1.959963985, abs=1e-8)
    assert hi[0] == pytest.approx(1.959963985, abs=1e-8)


@pytest.mark.parametrize("f,df1,df2", [(5.0, 1, 30), (12.0, 2, 27), (0.4, 3, 40), (80.0, 1, 10), (1.5, 2, 100)])
def test_partial_eta2_interval_matches_independent_ncf_inversion(f, df1, df2):
    es, lo, hi = partial_eta2_interval(np.array([f]), df1, df2, 0.95)
    assert es[0] == pytest.approx(f * df1 / (f * df1 + df2), rel=1e-12)

    # independent numerical inversion: scipy.optimize.brentq on scipy.stats.ncf.cdf in lambda, then
    # eta2 = lambda / (lambda + df1 + df2 + 1) (Steiger 2004); a limit is 0 when F's central cdf is below target
    def limit(target):
        if stats.f.cdf(f, df1, df2) <= target:
            return 0.0
        lam = optimize.brentq(lambda L: stats.ncf.cdf(f, df1, df2, L) - target, 1e-10, 4 * f * df1 + 100, xtol=1e-12)
        return lam / (lam + df1 + df2 + 1)

    assert lo[0] == pytest.approx(limit(0.975), abs=1e-7)
    assert hi[0] == pytest.approx(limit(0.025), abs=1e-7)


def test_d_interval_vectorised_equals_scalar_calls():
    rng = np.random.default_rng(4)
    t = rng.normal(1, 3, 50)
    n = rng.integers(4, 60, 50).astype(float)
    d, lo, hi = d_interval(t, n)
    for i in range(0, 50, 7):
        di, li, hi_i = d_interval(t[i : i + 1], n[i : i + 1])
        assert (d[i], lo[i], hi[i]) == pytest.approx((di[0], li[0], hi_i[0]), rel=1e-9)
    assert partial_eta2(0.0, 1, 10) == 0.0
