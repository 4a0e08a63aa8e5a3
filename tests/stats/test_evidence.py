"""Equivalence tests, JZS Bayes factors and the sphericity correction under simulation.

References: R BayesFactor ``ttestBF`` on the sleep data (from memory of the package's documentation: paired
BF10 = 17.26), pingouin ``bayesfactor_ttest`` (a general statistics library implementing Rouder et al. 2009), an
independent numerical integration of Rouder et al.'s eq. 1 written here, and scipy one-sided t-tests for TOST.
"""

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from roikit.errors import UsageError
from roikit.stats import run_design
from roikit.stats.anova import rm_anova
from roikit.stats.evidence import jzs_bf10

from stats_data import values_table

# Cushny & Peebles (1905), as distributed with R as `sleep`
GROUP1 = np.array([0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0])
GROUP2 = np.array([1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4])


def _bf_direct(t, n, v, r):
    """Rouder et al. (2009) eq. 1 integrated over g on split intervals (independent of the log-g form)."""
    f = lambda g: ((1 + n * g * r * r) ** -0.5 * (1 + t * t / ((1 + n * g * r * r) * v)) ** (-(v + 1) / 2)  # noqa
                   * (2 * np.pi) ** -0.5 * g ** -1.5 * np.exp(-1 / (2 * g)))
    total = sum(integrate.quad(f, a, b, limit=200)[0] for a, b in ((0, 0.1), (0.1, 1), (1, 10), (10, np.inf)))
    return total / (1 + t * t / v) ** (-(v + 1) / 2)


def _two_groups():
    y = np.concatenate([GROUP1, GROUP2])[:, None]
    values = values_table({"novel": y}, regions=["left hippocampus"])
    participants = pd.DataFrame({"participant_id": [f"sub-{i + 1:02d}" for i in range(20)],
                                 "group": ["younger"] * 10 + ["older"] * 10})
    return values, participants


def test_paired_bayes_factor_on_the_sleep_data():
    values = values_table({"novel": GROUP1[:, None], "familiar": GROUP2[:, None]}, regions=["left hippocampus"])
    row = run_design(values, "paired", contrast="novel", versus="familiar", bayes_factor=True).iloc[0]
    # R BayesFactor: ttestBF(sleep$extra[1:10], sleep$extra[11:20], paired = TRUE) -> 17.26 (from memory)
    assert row["bf10"] == pytest.approx(17.26, abs=0.005)
    assert row["bf10"] == pytest.approx(_bf_direct(row["statistic"], 10, 9, np.sqrt(2) / 2), rel=1e-7)
    import pingouin as pg  # noqa: E402 - reference library (test dependency)
    # pingouin.bayesfactor_ttest(t, 10, paired=True): its integration is looser (agrees to about 5e-5)
    assert row["bf10"] == pytest.approx(pg.bayesfactor_ttest(row["statistic"], 10, paired=True), rel=1e-4)
    assert row["prior_scale"] == pytest.approx(np.sqrt(2) / 2)


@pytest.mark.parametrize("t,n,r", [(0.3, 30, 0.707), (2.5, 12, 1.0), (-1.1, 50, 0.5)])
def test_one_sample_bayes_factor_matches_independent_integration(t, n, r):
    import pingouin as pg  # noqa: E402 - reference library (test dependency)
    assert jzs_bf10(t, n, n - 1, r) == pytest.approx(_bf_direct(t, n, n - 1, r), rel=1e-7)
    assert jzs_bf10(t, n, n - 1, r) == pytest.approx(pg.bayesfactor_ttest(t, n, r=r), rel=1e-6)


def test_two_group_bayes_factor_uses_student_t_even_for_welch():
    values, participants = _two_groups()
    a = run_design(values, "two-group", contrast="novel", group="group", levels="younger,older",
                   participants=participants, bayes_factor=True, prior_scale=1.0).iloc[0]
    b = run_design(values, "two-group", contrast="novel", group="group", levels="younger,older",
                   participants=participants, bayes_factor=True, prior_scale=1.0, welch=True).iloc[0]
    t_student = stats.ttest_ind(GROUP1, GROUP2).statistic
    assert a["bf10"] == pytest.approx(_bf_direct(t_student, 5.0, 18, 1.0), rel=1e-7)
    assert b["bf10"] == pytest.approx(a["bf10"], rel=1e-12)


def test_tost_one_sample_and_paired_match_two_scipy_one_sided_tests():
    rng = np.random.default_rng(8)
    x = rng.normal(0.05, 1, 40)
    values = values_table({"novel": x[:, None]}, regions=["r"])
    row = run_design(values, "one-sample", contrast="novel", equivalence=0.4).iloc[0]
    raw = 0.4 * x.std(ddof=1)
    lower = stats.ttest_1samp(x, -raw, alternative="greater").pvalue
    upper = stats.ttest_1samp(x, raw, alternative="less").pvalue
    assert row["p_equivalence"] == pytest.approx(max(lower, upper), rel=1e-10)
    assert row["equivalence_bound"] == 0.4


@pytest.mark.parametrize("welch", [False, True])
def test_tost_two_group_bounds_in_g_units(welch):
    from roikit.stats.effect_sizes import hedges_j

    values, participants = _two_groups()
    row = run_design(values, "two-group", contrast="novel", group="group", levels="younger,older",
                     participants=participants, equivalence=0.5, welch=welch).iloc[0]
    sp = np.sqrt(((GROUP1.var(ddof=1) + GROUP2.var(ddof=1)) * 9) / 18)
    raw = 0.5 * sp / hedges_j(18)
    lower = stats.ttest_ind(GROUP1 + raw, GROUP2, equal_var=not welch, alternative="greater").pvalue
    upper = stats.ttest_ind(GROUP1 - raw, GROUP2, equal_var=not welch, alternative="less").pvalue
    assert row["p_equivalence"] == pytest.approx(max(lower, upper), rel=1e-9)


def test_evidence_options_are_checked():
    values = values_table({"novel": GROUP1[:, None]}, regions=["r"])
    with pytest.raises(UsageError, match="positive number"):
        run_design(values, "one-sample", contrast="novel", equivalence=-1)
    with pytest.raises(UsageError, match="bayes_factor"):
        run_design(values, "one-sample", contrast="novel", prior_scale=0.5)


@pytest.mark.filterwarnings("ignore")
def test_tost_type_i_error_at_the_bound():
    # Seeded simulation: a true standardised effect exactly at the bound must be declared equivalent at most
    # alpha of the time (within 3 Monte Carlo SE). 4000 studies of n = 20, bound 0.5, alpha .05.
    rng = np.random.default_rng(2026)
    n, k, bound = 20, 4000, 0.5
    y = rng.normal(bound, 1.0, size=(n, k))
    values = values_table({"novel": y}, regions=[f"r{i}" for i in range(k)])
    res = run_design(values, "one-sample", contrast="novel", equivalence=bound)
    rate = float(np.mean(res["p_equivalence"] < 0.05))
    assert rate <= 0.05 + 3 * np.sqrt(0.05 * 0.95 / k)
    assert rate > 0.01       # not trivially conservative


def test_greenhouse_geisser_holds_the_rate_when_sphericity_fails():
    # Seeded simulation: 4 within levels with very unequal variances and correlations (sphericity violated),
    # no effect. Uncorrected F rejects too often; the GG-corrected p stays within 3 MC SE of .05 (or below).
    rng = np.random.default_rng(7)
    n, units = 12, 4000
    cov = np.diag([1.0, 1.0, 4.0, 12.0])
    cov[0, 1] = cov[1, 0] = 0.9
    y = rng.multivariate_normal(np.zeros(4), cov, size=(units, n))
    res = rm_anova(y, [4])
    se = np.sqrt(0.05 * 0.95 / units)
    raw = float(np.mean(res["p"][0] < 0.05))
    gg = float(np.mean(res["p_gg"][0] < 0.05))
    assert raw > 0.05 + 3 * se
    assert gg <= 0.05 + 3 * se
