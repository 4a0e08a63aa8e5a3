"""Power-curve figures (roikit.reporting.power): one line per effect, target marked, print sizes."""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.colors import to_hex
from statsmodels.stats.power import TTestPower

from roikit.errors import UsageError
from roikit.reporting.figures import OKABE_ITO, save_figure
from roikit.reporting.power import crossed_power_figure, power_curve
from roikit.stats.power import crossed_power, plan_t


def _texts(fig):
    return [t for t in fig.findobj(lambda a: hasattr(a, "get_fontsize") and hasattr(a, "get_text")) if t.get_text()]


def test_power_curve_lines_target_and_sizes(tmp_path):
    table = plan_t(design="paired", effect_size=[0.8, 0.5, -0.3], power=0.8, family_size=5)
    ax = power_curve(table)
    fig = ax.figure
    curves = [line for line in ax.lines if len(line.get_xdata()) > 2]
    assert len(curves) == 3
    # each curve is the exact power: statsmodels TTestPower.power at alpha .05 / 5
    x = np.asarray(curves[1].get_xdata())[[5, 20, 60]]
    ref = [TTestPower().power(0.5, n, 0.01) for n in x]
    np.testing.assert_allclose(np.asarray(curves[1].get_ydata())[[5, 20, 60]], ref, rtol=1e-7)
    # the target is a horizontal line; every colour is from the Okabe-Ito palette; distinct dash patterns
    assert any(np.allclose(line.get_ydata(), 0.8) for line in ax.lines if len(line.get_xdata()) == 2)
    palette = {v.lower() for v in OKABE_ITO.values()}
    assert {to_hex(c.get_color()) for c in curves} <= palette
    assert len({str(c._unscaled_dash_pattern) for c in curves}) == 3  # the line's dash pattern (offset, dashes)
    # journal column, every text at least 7 pt, a true minus sign
    assert fig.get_size_inches()[0] * 25.4 == pytest.approx(85)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any("\u22120.30" in t for t in labels) and not any("-0.30" in t for t in labels)
    sizes = [t.get_fontsize() for t in _texts(fig)]
    assert len(sizes) > 10 and min(sizes) >= 7
    written = save_figure(fig, tmp_path / "curve", overwrite=False)
    assert [p.suffix for p in written] == [".pdf", ".svg", ".png"]


def test_power_curve_refuses_tables_without_t_rows():
    grid = crossed_power(0.5, layout="fully-crossed", participants=[10], stimuli=[4], var_residual=1.0)
    with pytest.raises(UsageError, match="no t-design rows"):
        power_curve(grid)
    with pytest.raises(UsageError, match="lacks column"):
        power_curve(grid.drop(columns="alpha_per_test"))


def test_crossed_power_figure_marks_the_limit():
    grid = crossed_power(0.5, layout="stimuli-within-condition", participants=[10, 20, 40, 80], stimuli=[4, 8],
                         var_participant=0.3, var_stimulus=0.2, var_participant_slope=0.1, var_residual=1.0)
    ax = crossed_power_figure(grid)
    flat = {round(float(line.get_ydata()[0]), 6) for line in ax.lines if len(line.get_xdata()) == 2}
    assert {round(v, 6) for v in grid.groupby("n_stimuli")["power_limit"].first()} <= flat


def test_sensitivity_sentence_in_methods_text():
    import pandas as pd

    from roikit.reporting.power import sensitivity_sentence
    from roikit.reporting.text import methods_text

    rows = pd.DataFrame({"region": ["a", "b", "c", "d"], "design": "paired", "term": "novel - familiar",
                         "contrast": "novel", "versus": "familiar", "n": [32, 32, 30, 32], "estimate": 0.1,
                         "se": 0.05, "df": 31.0, "statistic": 2.0, "statistic_type": "t", "p": 0.05,
                         "ci_low": 0.0, "ci_high": 0.2, "confidence": 0.95, "effect_size": 0.3,
                         "effect_size_type": "d_z", "effect_size_ci_low": 0.0, "effect_size_ci_high": 0.6,
                         "p_holm": 0.2, "p_fdr": 0.05, "family_size": 4, "correction": "holm,fdr"})
    sentence = sensitivity_sentence(rows)
    # statsmodels TTestPower.solve_power(effect_size=None, nobs=30, alpha=.05 / 4, power=.8) = 0.6206...
    d = TTestPower().solve_power(None, nobs=30, alpha=0.0125, power=0.8)
    assert f"*d*_{{z}} = {d:.2f}" in sentence and "*n* = 30" in sentence and ".0125 per test" in sentence
    assert "Holm across 4 regions" in sentence
    text = methods_text(None, rows, style="plain").replace("\u00a0", " ")  # APA: no-break spaces around =
    assert "the smallest effect detectable with 80% power was d_z = " in text
    # designs without a closed form get no sentence
    assert sensitivity_sentence(rows.assign(design="mixed")) == ""
