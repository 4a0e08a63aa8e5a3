"""Checks against published worked examples: Student's sleep data as distributed with R (`sleep`)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from roikit.stats import run_design

from stats_data import values_table

# Cushny & Peebles (1905), as distributed with R as `sleep` (extra hours of sleep, drug 1 and drug 2)
GROUP1 = np.array([0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0])
GROUP2 = np.array([1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4])


@pytest.fixture
def paired_values():
    return values_table({"novel": GROUP1[:, None], "familiar": GROUP2[:, None]}, regions=["left hippocampus"])


@pytest.fixture
def two_group_values():
    y = np.concatenate([GROUP1, GROUP2])[:, None]
    values = values_table({"novel": y}, regions=["left hippocampus"])
    participants = pd.DataFrame(
        {"participant_id": [f"sub-{i + 1:02d}" for i in range(20)], "group": ["younger"] * 10 + ["older"] * 10}
    )
    return values, participants


def test_sleep_paired_matches_r(paired_values):
    row = run_design(paired_values, "paired", contrast="novel", versus="familiar").iloc[0]
    # R 4.x: t.test(sleep$extra[1:10], sleep$extra[11:20], paired = TRUE) (issue 4 text)
    assert row["statistic"] == pytest.approx(-4.062127683, abs=1e-8)
    assert row["df"] == 9
    assert row["p"] == pytest.approx(0.002832890, abs=1e-9)
    assert row["ci_low"] == pytest.approx(-2.459885763, abs=1e-8)
    assert row["ci_high"] == pytest.approx(-0.700114237, abs=1e-8)
    assert row["estimate"] == pytest.approx(-1.58, abs=1e-12)
    # issue 4: d_z and its 95% CI by noncentral-t inversion, verified there by two independent inversions
    assert row["effect_size"] == pytest.approx(-1.284557563, abs=1e-8)
    assert row["effect_size_ci_low"] == pytest.approx(-2.118016514, abs=1e-7)
    assert row["effect_size_ci_high"] == pytest.approx(-0.414627756, abs=1e-7)
    assert row["effect_size_type"] == "d_z"
    assert row["term"] == "novel - familiar"


def test_sleep_welch_matches_r(two_group_values):
    values, participants = two_group_values
    row = run_design(
        values, "two-group", contrast="novel", group="group", levels="younger,older", welch=True,
        participants=participants,
    ).iloc[0]
    # R 4.x: t.test(extra ~ group, data = sleep) (Welch, the default; issue 4 text)
    assert row["statistic"] == pytest.approx(-1.860813467, abs=1e-8)
    assert row["df"] == pytest.approx(17.776473516, abs=1e-8)
    assert row["p"] == pytest.approx(0.079394140, abs=1e-9)
    assert row["ci_low"] == pytest.approx(-3.365483231, abs=1e-8)
    assert row["ci_high"] == pytest.approx(0.205483231, abs=1e-8)
    assert row["df_method"] == "welch"
    # issue 4: pooled-SD g with exact J and its 95% CI (noncentral-t inversion, two independent checks)
    assert row["effect_size"] == pytest.approx(-0.796935239, abs=1e-8)
    assert row["effect_size_ci_low"] == pytest.approx(-1.665171791, abs=1e-7)
    assert row["effect_size_ci_high"] == pytest.approx(0.091407733, abs=1e-7)
    assert row["effect_size_type"] == "g"


def test_sleep_student_matches_r(two_group_values):
    values, participants = two_group_values
    row = run_design(
        values, "two-group", contrast="novel", group="group", levels="younger,older", participants=participants
    ).iloc[0]
    # R: t.test(extra ~ group, data = sleep, var.equal = TRUE): t = -1.8608, df = 18, p-value = 0.07919,
    # 95% CI -3.363874 0.203874 (from memory of R's printed output, 4-7 significant digits)
    assert row["statistic"] == pytest.approx(-1.8608, abs=1e-4)
    assert row["df"] == 18
    assert row["p"] == pytest.approx(0.07919, abs=1e-5)
    assert row["ci_low"] == pytest.approx(-3.363874, abs=1e-6)
    assert row["ci_high"] == pytest.approx(0.203874, abs=1e-6)
