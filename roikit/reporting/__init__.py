"""Reporting: APA tables, participant-level figures, methods and results text, a self-contained HTML report.

The only layer that rounds numbers. Everything starts from the tidy tables the other layers write: the
region values table and the group results table (plus participants.tsv).

Names follow one rule (one name per kind of thing returned): ``*_plot`` draws one panel on an Axes
(``participant_plot``, ``forest_plot``); ``*_figure`` returns a whole Figure of panels (``participant_figure``);
a bare noun returns numbers as a DataFrame (``descriptives``); ``*_table``/``*_tables`` return formatted
:class:`ReportTable` objects ready to write (``descriptives_table``, ``results_tables``; ``results_table`` is the
single-table shortcut and refuses results that need several).

Examples
--------
>>> from roikit.reporting import write_report, in_text, results_tables, participant_plot
>>> in_text({"statistic_type": "t", "df": 31, "statistic": 3.12, "p": 0.0042})
't(31) = 3.12, p = .004'
>>> write_report(values, results, participants=participants, out="report")      # doctest: +SKIP

roikit is for research group analysis, not for clinical decisions about an individual patient.
"""

from __future__ import annotations

from .._tables import read_table, write_table
from .figures import (
    GROUP_COLORS,
    GROUP_MARKERS,
    JOURNAL_WIDTHS_MM,
    MAX_HEIGHT_MM,
    OKABE_ITO,
    covariate_plot,
    forest_pages,
    interaction_pages,
    interaction_plot,
    forest_plot,
    participant_figure,
    participant_pages,
    participant_plot,
    precision_plot,
    save_figure,
    stimulus_plot,
    style,
)
from .format import format_ci, format_df, format_number, format_p, in_text
from .html import report_html
from .region_figure import mean_background, region_figure, region_pages
from .report import labels_from_sidecar, write_report
from .tables import ReportTable, descriptives, descriptives_table, results_table, results_tables
from .text import (
    SCOPE_STATEMENT,
    assumptions,
    caution_details,
    caution_lines,
    cautions,
    methods_text,
    results_text,
)

__all__ = [
    "write_report",
    "in_text",
    "format_number",
    "format_p",
    "format_df",
    "format_ci",
    "ReportTable",
    "results_tables",
    "results_table",
    "descriptives",
    "descriptives_table",
    "participant_plot",
    "participant_figure",
    "participant_pages",
    "forest_plot",
    "forest_pages",
    "interaction_pages",
    "interaction_plot",
    "region_figure",
    "region_pages",
    "mean_background",
    "style",
    "read_table",
    "write_table",
    "labels_from_sidecar",
    "precision_plot",
    "stimulus_plot",
    "covariate_plot",
    "save_figure",
    "OKABE_ITO",
    "GROUP_COLORS",
    "GROUP_MARKERS",
    "JOURNAL_WIDTHS_MM",
    "MAX_HEIGHT_MM",
    "methods_text",
    "results_text",
    "cautions",
    "caution_lines",
    "caution_details",
    "assumptions",
    "SCOPE_STATEMENT",
    "report_html",
]
