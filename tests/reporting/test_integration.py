"""The report on results computed by roikit.stats.run_design (every design), checked cell by cell."""

import warnings

import pandas as pd
import pytest

from roikit.errors import CautionWarning
from roikit.reporting import participant_plot, results_tables, write_report
from roikit.reporting.tables import cell_formatters
from roikit.stats import run_design


@pytest.fixture(scope="module")
def stats_results(values, participants):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        towns = values[values.contrast.str.startswith("town")]
        return pd.concat([
            run_design(values, "one-sample", contrast="novel"),
            run_design(values, "paired", contrast="novel", versus="familiar"),
            run_design(values, "two-group", contrast="novel", group="group", levels="younger,older",
                       participants=participants, welch=True),
            run_design(values, "glm", contrast="novel", formula="value ~ age + group", participants=participants),
            run_design(values, "precision-weighted", contrast="novel"),
            run_design(towns, "mixed", formula="value ~ contrast", random="1"),
            run_design(values, "fixed-effects", contrast="novel"),
        ], ignore_index=True)


def test_tables_from_run_design(stats_results):
    tables = results_tables(stats_results)
    fmt = cell_formatters()
    n_rows = 0
    for table in tables:
        for rid, cells in zip(table.row_ids, table.rows):
            match = stats_results[(stats_results.design == rid["design"]) & (stats_results.region == rid["region"])
                                  & (stats_results.term == rid["term"])
                                  & (stats_results.statistic_type == rid["statistic-type"])]
            assert len(match) == 1
            several_terms = len({r["term"] for r in table.row_ids}) > 1
            for key, cell in cells.items():
                if key in ("effect_size", "effect_ci") and several_terms and rid["term"].lower() in (
                        "intercept", "(intercept)"):
                    assert cell == "—"  # no effect size for a model's intercept
                elif key in fmt:
                    assert cell == fmt[key](match.iloc[0])
            n_rows += 1
    assert n_rows == len(stats_results)


def test_fixed_effects_figure_uses_the_fixed_effects_row(values, stats_results):
    ax = participant_plot(values, region="left hippocampus", contrast="novel", results=stats_results,
                          design="fixed-effects")
    fixed = stats_results[(stats_results.design == "fixed-effects") & (stats_results.region == "left hippocampus")]
    est = [line for line in ax.lines if line.get_label().startswith("mean and")][0]
    assert est.get_ydata()[0] == pytest.approx(fixed.estimate.iloc[0])


def test_report_from_run_design(tmp_path, values, participants, stats_results):
    with pytest.warns(CautionWarning, match="fixed-effects"):
        written = write_report(values, stats_results, participants=participants, out=tmp_path / "r",
                               figure_formats=("png",))
    html = written["html"].read_text()
    assert "does not generalise to the population" in html
    assert len([p for p in written["figures"] if p.suffix == ".png"]) >= 10
    assert "Figures not drawn" not in html
