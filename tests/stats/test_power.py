"""Power, sample size and sensitivity (roikit.stats.power) against handbook tables and reference libraries."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.power import TTestIndPower, TTestPower

from roikit.errors import DesignError, UsageError
from roikit.stats import run_design
from roikit.stats import power as pw

from stats_data import participants_table, values_table

_SM_ALT = {"two-sided": "two-sided", "greater": "larger", "less": "smaller"}


def _nct_cdf_by_integration(x, df, ncp):
    """P(T <= x) for T = (Z + ncp) / sqrt(V / df), Z normal, V chi-square(df): the definition of the noncentral t,
    integrated numerically (scipy.integrate.quad); used where statsmodels returns NaN far in a tail."""
    from scipy import integrate

    f = lambda v: stats.norm.cdf(x * np.sqrt(v / df) - ncp) * stats.chi2.pdf(v, df)
    return integrate.quad(f, 0, np.inf, limit=500, epsabs=1e-14)[0]


def _power_by_integration(df, ncp, alpha, alternative):
    if alternative == "two-sided":
        c = stats.t.ppf(1 - alpha / 2, df)
        return 1 - _nct_cdf_by_integration(c, df, ncp) + _nct_cdf_by_integration(-c, df, ncp)
    c = stats.t.ppf(1 - alpha, df)
    if alternative == "greater":
        return 1 - _nct_cdf_by_integration(c, df, ncp)
    return _nct_cdf_by_integration(-c, df, ncp)


# ------------------------------------------------------------------------------------------------ handbook values
@pytest.mark.parametrize(
    "d, expected",
    [
        # Cohen (1988), Statistical Power Analysis for the Behavioral Sciences, 2nd ed., Table 2.4.1
        # (n per group, two-sample t, alpha .05 two-sided, power .80): d = .50 -> 64
        (0.5, 64),
        # Cohen (1988), Table 2.4.1: d = .80 -> 26
        (0.8, 26),
    ],
)
def test_two_group_n_matches_cohen_table(d, expected):
    assert pw.solve_n(d, 0.8, design="two-group", alpha=0.05) == expected


def test_two_group_small_effect_cohen_393_vs_exact_394():
    n = pw.solve_n(0.2, 0.8, design="two-group")
    # Cohen (1988), Table 2.4.1: d = .20 -> 393 (his tables use an approximation to the noncentral t); the exact
    # noncentral t needs one more: statsmodels TTestIndPower.solve_power gives 393.41, so 394 is the smallest integer
    assert abs(n - 393) <= 1
    assert n == math.ceil(TTestIndPower().solve_power(0.2, nobs1=None, alpha=0.05, power=0.8))
    assert pw.t_power(0.2, n - 1, design="two-group") < 0.8 <= pw.t_power(0.2, n, design="two-group")


@pytest.mark.parametrize("design", ["one-sample", "paired"])
def test_one_sample_and_paired_d_half_needs_34(design):
    # issue 17 (exact noncentral t); statsmodels TTestPower.solve_power(0.5, power=.8, alpha=.05) = 33.37 -> 34
    assert pw.solve_n(0.5, 0.8, design=design) == 34
    assert math.ceil(TTestPower().solve_power(0.5, nobs=None, alpha=0.05, power=0.8)) == 34


# ------------------------------------------------------------------------------------------------ reference library
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize("alpha", [0.01, 0.05, 0.005])
def test_one_sample_power_matches_statsmodels(alpha, alternative):
    ns = np.array([3, 5, 10, 20, 50, 120])
    for d in (0.2, 0.5, 1.0, -0.4):
        ours = pw.t_power(d, ns, design="one-sample", alpha=alpha, alternative=alternative)
        # statsmodels.stats.power.TTestPower.power (a general-purpose reference library)
        ref = np.array([TTestPower().power(d, n, alpha, alternative=_SM_ALT[alternative]) for n in ns])
        # statsmodels returns NaN where scipy's noncentral t fails in a far tail: there, the definition integrated
        ref = np.where(np.isfinite(ref), ref,
                       [_power_by_integration(n - 1, d * np.sqrt(n), alpha, alternative) for n in ns])
        np.testing.assert_allclose(ours, ref, rtol=1e-7, atol=1e-10)


@pytest.mark.parametrize("ratio", [1.0, 1.5, 0.5])
@pytest.mark.parametrize("alpha", [0.05, 0.001])
def test_two_group_power_matches_statsmodels(alpha, ratio):
    ns = np.array([4, 10, 20, 40, 100])
    for d in (0.3, 0.8, -0.5):
        ours = pw.t_power(d, ns, design="two-group", alpha=alpha, n_second=ns * ratio)
        # statsmodels.stats.power.TTestIndPower.power(effect, nobs1, alpha, ratio): nobs2 = ratio * nobs1
        ref = np.array([TTestIndPower().power(d, n, alpha, ratio=ratio) for n in ns])
        ref = np.where(np.isfinite(ref), ref,
                       [_power_by_integration(n * (1 + ratio) - 2, d / np.sqrt(1 / n + 1 / (n * ratio)), alpha,
                                              "two-sided") for n in ns])
        np.testing.assert_allclose(ours, ref, rtol=1e-7, atol=1e-10)


@pytest.mark.parametrize("d", [0.25, 0.5, 0.9])
@pytest.mark.parametrize("alpha", [0.05, 0.0125])
def test_solve_n_is_ceiling_of_statsmodels_solution(d, alpha):
    for design in ("one-sample", "two-group"):
        ours = pw.solve_n(d, 0.9, design=design, alpha=alpha)
        ref_class = TTestPower() if design == "one-sample" else TTestIndPower()
        kw = {"nobs": None} if design == "one-sample" else {"nobs1": None}
        # statsmodels solve_power (continuous n); the plan is the smallest whole n reaching the target
        ref = ref_class.solve_power(d, alpha=alpha, power=0.9, **kw)
        assert ours == math.ceil(ref - 1e-9)


def test_detectable_effect_matches_statsmodels_and_issue_example():
    d = pw.detectable_effect(32, 0.8, design="paired")
    # statsmodels TTestPower.solve_power(effect_size=None, nobs=32, alpha=.05, power=.8) = 0.5113
    assert d == pytest.approx(TTestPower().solve_power(None, nobs=32, alpha=0.05, power=0.8), rel=1e-6)
    # issue 17's sentence: "with n = 32 the smallest effect detectable with 80% power was d_z = 0.51"
    assert round(d, 2) == 0.51
    assert pw.t_power(d, 32, design="paired") == pytest.approx(0.8, abs=1e-9)
    less = pw.detectable_effect(20, 0.8, design="two-group", alternative="less", alpha=0.01)
    # statsmodels TTestIndPower.solve_power, alternative="smaller"
    ref = TTestIndPower().solve_power(None, nobs1=20, alpha=0.01, power=0.8, alternative="smaller")
    assert less == pytest.approx(ref, rel=1e-6) and less < 0


def test_noncentral_t_formula_by_hand():
    # the noncentral t formula itself: power = P(T > c) + P(T < -c), T ~ t'(n - 1, d sqrt(n)) (scipy.stats.nct)
    n, d, a = 25, 0.6, 0.05
    c = stats.t.ppf(1 - a / 2, n - 1)
    expected = stats.nct.sf(c, n - 1, d * np.sqrt(n)) + stats.nct.cdf(-c, n - 1, d * np.sqrt(n))
    assert float(pw.t_power(d, n)) == pytest.approx(expected, rel=1e-12)


# ------------------------------------------------------------------------------------------------ family of regions
def test_alpha_per_test_bonferroni_and_holm():
    # Bonferroni alpha / K (common practice, no source); Holm's first step uses the same threshold (Holm 1979)
    assert pw.alpha_per_test(0.05, family_size=10, correction="bonferroni") == pytest.approx(0.005)
    assert pw.alpha_per_test(0.05, family_size=10, correction="holm") == pytest.approx(0.005)
    assert pw.alpha_per_test(0.05, family_size=10, correction="none") == 0.05
    with pytest.raises(UsageError, match="family_size"):
        pw.alpha_per_test(0.05, family_size=0)
    with pytest.raises(UsageError, match="correction"):
        pw.alpha_per_test(0.05, family_size=3, correction="fdr")


def test_plan_t_rows_and_columns():
    table = pw.plan_t(design="paired", effect_size=[0.5], n=[20, 40], power=0.8, family_size=6)
    assert list(table.columns[: len(pw.PLAN_COLUMNS)]) == list(pw.PLAN_COLUMNS)
    assert list(table["solved_for"]) == ["power", "power", "effect_size", "effect_size"]
    assert np.allclose(table["alpha_per_test"], 0.05 / 6)
    assert (table["correction"] == "holm").all() and (table["family_size"] == 6).all()
    # power rows: statsmodels TTestPower at alpha / 6
    ref = [TTestPower().power(0.5, n, 0.05 / 6) for n in (20, 40)]
    np.testing.assert_allclose(table["power"].iloc[:2], ref, rtol=1e-7)
    # sensitivity rows reach the target exactly; the larger n detects a smaller effect
    np.testing.assert_allclose(table["power"].iloc[2:], 0.8, atol=1e-9)
    assert table["effect_size"].iat[3] < table["effect_size"].iat[2]
    # a single test is uncorrected whatever the correction asked for
    single = pw.plan_t(design="one-sample", effect_size=0.5, power=0.8)
    assert single["correction"].iat[0] == "none" and single["alpha_per_test"].iat[0] == 0.05
    assert "n_second" not in single.columns


def test_plan_t_two_group_ratio():
    table = pw.plan_t(design="two-group", effect_size=0.5, power=0.8, ratio=2.0)
    n1, n2 = int(table["n"].iat[0]), int(table["n_second"].iat[0])
    assert n2 == math.ceil(2 * n1)
    # statsmodels TTestIndPower.solve_power with ratio = 2 (continuous n1)
    assert n1 == math.ceil(TTestIndPower().solve_power(0.5, nobs1=None, alpha=0.05, power=0.8, ratio=2.0))


def test_plan_t_errors():
    with pytest.raises(UsageError, match="give two of effect_size, n and power"):
        pw.plan_t(design="paired", effect_size=0.5)
    with pytest.raises(UsageError, match="design"):
        pw.plan_t(design="three-group", effect_size=0.5, power=0.8)
    with pytest.raises(UsageError, match="power"):
        pw.plan_t(design="paired", effect_size=0.5, power=1.2)
    with pytest.raises(DesignError, match="non-zero effect"):
        pw.solve_n(0.0, 0.8)
    with pytest.raises(DesignError, match="tested direction"):
        pw.solve_n(0.5, 0.8, alternative="less")
    with pytest.raises(UsageError, match="at least 2"):
        pw.t_power(0.5, 1)


# ------------------------------------------------------------------------------------------------ from a pilot
@pytest.fixture
def pilot_one_sample():
    rng = np.random.default_rng(17)
    m = rng.normal([0.9, 0.5, 0.05], 1.0, (24, 3))
    return run_design(values_table({"novel": m}), "one-sample", contrast="novel")


def test_plan_from_results_one_sample(pilot_one_sample):
    res = pilot_one_sample
    plan = pw.plan_from_results(res, power=0.8)
    assert list(plan["region"]) == list(res["region"])
    assert (plan["family_size"] == 3).all() and np.allclose(plan["alpha_per_test"], 0.05 / 3)
    for row, d, n_pilot in zip(plan.itertuples(), res["effect_size"], res["n"]):
        assert row.n == math.ceil(TTestPower().solve_power(abs(d), nobs=None, alpha=0.05 / 3, power=0.8) - 1e-9)
        if pd.isna(row.safeguard_n):
            assert "includes zero" in row.note
            continue
        # safeguard effect: the lower limit of the two-sided 60% interval of d (Perugini, Gallucci & Costantini
        # 2014), i.e. the noncentrality at which the observed t is the 80th percentile: scipy.stats.nct.cdf = .80
        # (for a negative effect the limit nearer zero is the upper one: the 20th percentile)
        t_obs = d * math.sqrt(n_pilot)
        expected = 0.8 if d > 0 else 0.2
        assert stats.nct.cdf(t_obs, n_pilot - 1, row.safeguard_effect_size * math.sqrt(n_pilot)) == pytest.approx(
            expected)
        assert 0 < abs(row.safeguard_effect_size) < abs(d) and np.sign(row.safeguard_effect_size) == np.sign(d)
        assert row.safeguard_n > row.n
        assert row.safeguard_n == math.ceil(
            TTestPower().solve_power(abs(row.safeguard_effect_size), nobs=None, alpha=0.05 / 3, power=0.8) - 1e-9)
    # the region whose effect is near zero (d = 0.02 in this draw) has no safeguard n and says why
    near_zero = int(np.argmin(np.abs(res["effect_size"].to_numpy())))
    assert pd.isna(plan["safeguard_n"].iat[near_zero]) and "includes zero" in plan["note"].iat[near_zero]
    assert plan["safeguard_n"].notna().sum() == 2
    # one-sided: a region whose effect points the other way gets no n, and a note saying why
    greater = pw.plan_from_results(res, power=0.8, alternative="greater")
    negative = int(np.argmin(res["effect_size"].to_numpy()))
    assert pd.isna(greater["n"].iat[negative]) and "points away" in greater["note"].iat[negative]
    # statsmodels TTestPower.solve_power(alternative="larger") for the positive region
    assert greater["n"].iat[0] == math.ceil(TTestPower().solve_power(
        res["effect_size"].iat[0], nobs=None, alpha=0.05 / 3, power=0.8, alternative="larger"))


def test_plan_from_results_two_group_and_errors():
    rng = np.random.default_rng(5)
    m = rng.normal(0, 1, (30, 2))
    m[:15] += [0.9, -0.7]
    values = values_table({"novel": m})
    res = run_design(values, "two-group", contrast="novel", group="group", levels="younger,older",
                     participants=participants_table(30))
    plan = pw.plan_from_results(res, power=0.9, family_size=4, correction="bonferroni", safeguard=0.5)
    assert (plan["family_size"] == 4).all() and (plan["correction"] == "bonferroni").all()
    for row in plan.itertuples():
        assert row.n_second == row.n  # 15 and 15 in the pilot: equal groups
        # statsmodels TTestIndPower.solve_power at the pilot's g (planned as d)
        assert row.n == math.ceil(TTestIndPower().solve_power(abs(row.effect_size), nobs1=None, alpha=0.0125,
                                                              power=0.9) - 1e-9)
        assert abs(row.safeguard_effect_size) < abs(row.effect_size)
    with pytest.raises(DesignError, match="closed-form"):
        pw.plan_from_results(res.assign(design="glm"), power=0.8)
    with pytest.raises(UsageError, match="safeguard"):
        pw.plan_from_results(res, power=0.8, safeguard=60)


# ------------------------------------------------------------------------------------------------ precision-weighted
def test_precision_weighted_simulation_equal_variances_matches_exact_t():
    # equal first-level variances: the precision-weighted test with untruncated Knapp-Hartung is the one-sample t
    # test, so the simulated power must lie within 3 Monte Carlo SE of the exact noncentral t (statsmodels
    # TTestPower.power); the truncated variant (the design's default) is conservative there by construction
    table = pw.simulate_precision_weighted(0.5, tau2=0.2, variances=[0.3], n=[12, 24], simulations=3000, seed=11,
                                           progress=False, test="knapp-hartung")
    for row in table.itertuples():
        exact = TTestPower().power(0.5 / math.sqrt(0.5), row.n, 0.05)
        assert abs(row.power - exact) < 3 * row.mc_se
        assert row.power_t_approx == pytest.approx(exact, rel=1e-7)
        assert abs(row.null_rejection - 0.05) < 3 * row.null_rejection_mc_se
    assert (table["seed"] == 11).all() and (table["simulations"] == 3000).all()


def test_precision_weighted_simulation_is_seeded_and_gains_from_unequal_variances():
    rng = np.random.default_rng(3)
    v = rng.gamma(1.5, 0.2, 300)
    a = pw.simulate_precision_weighted(0.3, tau2=0.05, variances=v, n=[20], simulations=500, seed=4, progress=False)
    b = pw.simulate_precision_weighted(0.3, tau2=0.05, variances=v, n=[20], simulations=500, seed=4, progress=False)
    pd.testing.assert_frame_equal(a, b)
    # weighting by precision helps when first-level variances differ a lot (common practice, no source)
    assert a["power"].iat[0] > a["power_t_approx"].iat[0]
    with pytest.raises(UsageError, match="variances"):
        pw.simulate_precision_weighted(0.3, tau2=0.05, variances=[0.1, -1], n=[20], simulations=100)


# ------------------------------------------------------------------------------------------------ crossed design
def test_crossed_reduces_to_two_sample_t_without_stimulus_variance():
    # participants within condition, no stimulus-by-condition variance: the test is the two-sample t on the
    # participants' means (variance P + w/q), p/2 per group -- statsmodels TTestIndPower.power
    grid = pw.crossed_power(0.5, layout="participants-within-condition", participants=[20, 40], stimuli=[6, 12],
                            var_participant=0.3, var_stimulus=0.4, var_residual=1.0)
    for row in grid.itertuples():
        d = 0.5 / math.sqrt(0.3 + 1.0 / row.n_stimuli)
        assert row.power == pytest.approx(TTestIndPower().power(d, row.n_participants // 2, 0.05), rel=1e-7)
        assert row.df == row.n_participants - 2 and row.power_limit == 1.0


def test_crossed_stimuli_within_condition_reduces_to_two_sample_t_on_stimuli():
    # stimuli within condition, no participant-by-condition variance: the two-sample t on the stimuli's means
    # (variance S + w/p), q/2 per condition -- statsmodels TTestIndPower.power
    grid = pw.crossed_power(0.4, layout="stimuli-within-condition", participants=[10, 30], stimuli=[8, 16],
                            var_participant=0.5, var_stimulus=0.2, var_residual=1.0)
    for row in grid.itertuples():
        d = 0.4 / math.sqrt(0.2 + 1.0 / row.n_participants)
        assert row.power == pytest.approx(TTestIndPower().power(d, row.n_stimuli // 2, 0.05), rel=1e-7)


def test_crossed_fully_crossed_reduces_to_paired_t():
    # fully crossed, no stimulus slope: the paired t on each participant's mean difference (variance sP + 2w/q)
    # -- statsmodels TTestPower.power
    grid = pw.crossed_power(0.3, layout="fully-crossed", participants=[15], stimuli=[4, 10],
                            var_participant=0.5, var_stimulus=0.5, var_participant_slope=0.2, var_residual=1.0)
    for row in grid.itertuples():
        d = 0.3 / math.sqrt(0.2 + 2 * 1.0 / row.n_stimuli)
        assert row.power == pytest.approx(TTestPower().power(d, 15, 0.05), rel=1e-7)


def test_crossed_stimulus_ceiling():
    # Westfall, Kenny & Judd (2014): with stimulus variance, more participants cannot push power past the limit
    # that the stimulus sample sets; more stimuli raise it
    kw = dict(layout="stimuli-within-condition", var_participant=0.3, var_stimulus=0.2,
              var_participant_slope=0.1, var_residual=1.0)
    grid = pw.crossed_power(0.5, participants=[10, 100, 10_000], stimuli=[8, 32], **kw)
    limit8 = grid.loc[grid["n_stimuli"] == 8, "power_limit"].iat[0]
    limit32 = grid.loc[grid["n_stimuli"] == 32, "power_limit"].iat[0]
    assert limit8 < 0.5 < limit32 < 1
    far = grid[(grid["n_participants"] == 10_000)]
    np.testing.assert_allclose(far["power"], far["power_limit"], atol=2e-3)
    # a total-n view misleads: 8 stimuli x 10,000 participants has less power than 32 stimuli x 100
    assert far["power"].iat[0] < grid[(grid["n_participants"] == 100) & (grid["n_stimuli"] == 32)]["power"].iat[0]
    with pytest.raises(UsageError, match="even number"):
        pw.crossed_power(0.5, participants=[10], stimuli=[7], **kw)
    with pytest.raises(UsageError, match="layout"):
        pw.crossed_power(0.5, participants=[10], stimuli=[8], **{**kw, "layout": "nested"})


def test_crossed_exact_matches_simulation_through_the_mixed_fitter():
    # the balanced-design noncentrality and Satterthwaite df (quasi-F) against a seeded simulation in which each
    # study is fitted by the kit's REML mixed model with Satterthwaite df: within 3 Monte Carlo SE
    kw = dict(layout="stimuli-within-condition", participants=12, stimuli=8, var_participant=0.3,
              var_stimulus=0.15, var_participant_slope=0.2, var_residual=1.0)
    exact = pw.crossed_power(0.8, **kw)["power"].iat[0]
    sim = pw.simulate_crossed(0.8, simulations=100, seed=7, progress=False, **kw)  # about 0.2 s per study
    assert sim["failed"] == 0 and sim["simulations"] == 100
    assert abs(sim["power"] - exact) < 3 * sim["mc_se"]


# ------------------------------------------------------------------------------------------------ sensitivity
def test_sensitivity_of_a_results_table(pilot_one_sample):
    res = pilot_one_sample.copy()
    res.loc[1, "n"] = 20  # a region with fewer participants: the statement must hold for every region
    table = pw.sensitivity(res)
    assert len(table) == 1 and table["n"].iat[0] == 20 and table["family_size"].iat[0] == 3
    assert table["correction"].iat[0] == "holm"
    # statsmodels TTestPower.solve_power(effect_size=None, nobs=20, alpha=.05 / 3, power=.8)
    assert table["effect_size"].iat[0] == pytest.approx(
        TTestPower().solve_power(None, nobs=20, alpha=0.05 / 3, power=0.8), rel=1e-6)
    assert pw.sensitivity(res.assign(design="glm")).empty


def test_far_tail_scalar_inputs():
    # scipy's noncentral t cdf returns NaN far in the lower tail for small df (here df = 5, ncp = 9.8): the power is
    # still computed (the tail term is ~0), for scalars as for arrays -- the noncentral t definition integrated
    # numerically (scipy.integrate.quad)
    value = float(pw.t_power(4.0, 6, design="one-sample", alpha=0.005))
    assert value == pytest.approx(_power_by_integration(5, 4.0 * np.sqrt(6), 0.005, "two-sided"), rel=1e-7)
    assert np.isfinite(pw.detectable_effect(6, 0.8, alpha=0.005))


@pytest.mark.parametrize("layout", pw.LAYOUTS)
def test_crossed_variance_matches_simulated_sampling_variance(layout):
    # the sampling variance of the condition difference, derived from the expected mean squares, against the
    # variance of the difference over simulated balanced studies (no source: a check by construction); the relative
    # SE of a variance from R draws is sqrt(2 / (R - 1)), 4 SE allowed
    comps = dict(var_participant=0.3, var_stimulus=0.2, var_participant_slope=0.25, var_stimulus_slope=0.15,
                 var_residual=1.0)
    p, q, R = 8, 6, 4000
    rng = np.random.default_rng(12)
    sd = np.sqrt([comps[k] for k in ("var_participant", "var_stimulus", "var_participant_slope",
                                     "var_stimulus_slope", "var_residual")])
    b = np.empty(R)
    for r in range(R):
        y, cond, _, _ = pw._crossed_data(rng, layout, p, q, 0.5, sd)
        b[r] = y[cond > 0].mean() - y[cond < 0].mean()
    var, _ = pw.crossed_variance(layout=layout, participants=p, stimuli=q, **comps)
    assert abs(b.mean() - 0.5) < 4 * math.sqrt(float(var) / R)
    assert b.var(ddof=1) == pytest.approx(float(var), rel=4 * math.sqrt(2 / (R - 1)))


def test_crossed_quasi_f_power_by_simulation():
    # participants within condition with stimulus-by-condition variance: simulate the quasi-F test itself (mean
    # squares from each simulated study, Satterthwaite df from the observed mean squares; Westfall, Kenny & Judd
    # 2014 analyse these designs the same way) and compare its rejection rate with the exact-balanced power.
    # The Satterthwaite df are an approximation: 3 MC SE plus 0.015 allowed
    p, q, R, eff = 16, 8, 20000, 0.8
    vP, vS, vSC, w = 0.3, 0.15, 0.2, 1.0
    exact = pw.crossed_power(eff, layout="participants-within-condition", participants=p, stimuli=q,
                             var_participant=vP, var_stimulus=vS, var_stimulus_slope=vSC, var_residual=w)
    rng = np.random.default_rng(0)
    cond = np.where(np.arange(p) < p // 2, -0.5, 0.5)[None, :, None]
    y = (eff * cond + rng.standard_normal((R, p, 1)) * np.sqrt(vP) + rng.standard_normal((R, 1, q)) * np.sqrt(vS)
         + rng.standard_normal((R, 1, q)) * np.sqrt(vSC) * cond + rng.standard_normal((R, p, q)) * np.sqrt(w))
    g1, g2 = y[:, : p // 2], y[:, p // 2:]
    b = g2.mean((1, 2)) - g1.mean((1, 2))
    dq = g2.mean(1) - g1.mean(1)
    ms_sc = (p / 4) * ((dq - dq.mean(1, keepdims=True)) ** 2).sum(1) / (q - 1)
    pm1, pm2 = g1.mean(2), g2.mean(2)
    ms_pc = q * (((pm1 - pm1.mean(1, keepdims=True)) ** 2).sum(1)
                 + ((pm2 - pm2.mean(1, keepdims=True)) ** 2).sum(1)) / (p - 2)

    def resid(g):
        return g - g.mean(1, keepdims=True) - g.mean(2, keepdims=True) + g.mean((1, 2), keepdims=True)

    ms_e = ((resid(g1) ** 2).sum((1, 2)) + (resid(g2) ** 2).sum((1, 2))) / ((q - 1) * (p - 2))
    comb = np.maximum(ms_sc + ms_pc - ms_e, 1e-12)
    df = comb**2 / (ms_sc**2 / (q - 1) + ms_pc**2 / (p - 2) + ms_e**2 / ((q - 1) * (p - 2)))
    power = np.mean(2 * stats.t.sf(np.abs(b / np.sqrt(4 / (p * q) * comb)), df) < 0.05)
    assert abs(power - exact["power"].iat[0]) < 3 * math.sqrt(0.25 / R) + 0.015


@pytest.mark.parametrize("layout", ["fully-crossed", "stimuli-within-condition", "participants-within-condition",
                                    "both-within-condition"])
def test_crossed_simulated_quasi_f_agrees_with_exact_tests(layout):
    # where one random source is absent the quasi-F becomes an exact t: the simulated power (the kit's vectorised
    # quasi-F) must match the exact noncentral t power within 3 MC SE -- fully crossed: paired t on participants'
    # mean differences (statsmodels TTestPower); stimuli within: two-sample t on stimulus means; participants
    # within: two-sample t on participant means (statsmodels TTestIndPower); both within: two-sample t on
    # participant means too (no stimulus variance)
    comps = {"fully-crossed": dict(var_participant_slope=0.3),
             "stimuli-within-condition": dict(var_stimulus=0.3),
             "participants-within-condition": dict(var_participant=0.3),
             "both-within-condition": dict(var_participant=0.3)}[layout]
    p, q = 12, 8
    grid = pw.crossed_power(0.7, layout=layout, participants=p, stimuli=q, var_residual=1.0, simulations=4000,
                            seed=2, progress=False, **comps)
    row = grid.iloc[0]
    if layout == "fully-crossed":
        exact = TTestPower().power(0.7 / math.sqrt(0.3 + 2 / q), p, 0.05)
    elif layout == "stimuli-within-condition":
        exact = TTestIndPower().power(0.7 / math.sqrt(0.3 + 1 / p), q // 2, 0.05)
    elif layout == "participants-within-condition":
        exact = TTestIndPower().power(0.7 / math.sqrt(0.3 + 1 / q), p // 2, 0.05)
    else:  # each participant sees q/2 stimuli
        exact = TTestIndPower().power(0.7 / math.sqrt(0.3 + 2 / q), p // 2, 0.05)
    assert row["power_exact_balanced"] == pytest.approx(exact, rel=1e-7)
    assert abs(row["power"] - exact) < 3 * row["mc_se"]
    assert row["method"] == "simulation" and row["seed"] == 2
