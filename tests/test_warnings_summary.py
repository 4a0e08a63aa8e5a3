"""Warnings: one line per problem (<= 200 characters), every finding kept as a row; options spelled per entry
point."""

from __future__ import annotations

import argparse
import warnings


from roikit import _options
from roikit._options import Option, add_arguments, plural
from roikit.errors import (CoverageWarning, DiagnosticWarning, MissingValueWarning, summarise_warnings, summarised,
                           warning_records)
from roikit.stats._common import warn_exclusions


def _caught(*messages):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for m in messages:
            warnings.warn(m)
    return caught


def test_one_line_per_problem_naming_each_participant_once():
    # the same outlier reported by five analyses, in six regions: one line, sub-25 named once
    findings = [{"problem": "robust outlier", "participant_id": "sub-25", "region": f"r{k}"} for k in range(6)]
    messages = [DiagnosticWarning(f"analysis {a}: outliers ...", findings=findings, context=f"analysis {a}")
                for a in range(5)]
    messages.append(CoverageWarning("low coverage", findings=[{"problem": "low coverage", "participant_id": "sub-07",
                                                               "region": "left hippocampus"}]))
    rows = warning_records(_caught(*messages))
    assert len(rows) == 5 * 6 + 1
    assert {r["kind"] for r in rows} == {"diagnostic", "coverage"}
    lines = summarise_warnings(rows, prefix="roikit: warning: ")
    assert lines == ["roikit: warning: robust outlier: sub-25 (6 regions); in 5 analyses",
                     "roikit: warning: low coverage: sub-07 (left hippocampus)"]
    # summarising the summarised warnings again gives the same lines (run_study re-issues them)
    again = warning_records(_caught(*summarised(rows)))
    assert summarise_warnings(again, prefix="roikit: warning: ") == lines


def test_long_lists_are_cut_to_200_characters():
    rows = [{"kind": "coverage", "problem": "no valid voxel: value n/a", "participant_id": f"sub-{i:03d}",
             "region": "a rather long region name", "context": ""} for i in range(200)]
    (line,) = summarise_warnings(rows, prefix="roikit: warning: ")
    assert len(line) <= 200 and line.endswith("more")


def test_a_participant_missing_everywhere_is_one_finding():
    regions = [f"region {k}" for k in range(10)]
    excluded = [["sub-03", "sub-05"] if k == 0 else ["sub-03"] for k in range(10)]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        warn_exclusions(regions, excluded, context="paired 'novel' - 'familiar'")
    rows = warning_records(caught)
    assert [r["participant_id"] for r in rows if r["participant_id"] == "sub-03"] == ["sub-03"]
    assert any(r["participant_id"] == "sub-05" and r["region"] == "region 0" for r in rows)
    assert issubclass(caught[0].category, MissingValueWarning)


def test_true_plurals():
    assert plural(1, "region") == "1 region" and plural(2, "region") == "2 regions"
    assert plural(1, "analysis", "analyses") == "1 analysis" and plural(3, "analysis", "analyses") == "3 analyses"


def test_a_new_option_is_one_table_entry(monkeypatch):
    # a "--no-x" flag for an option whose default is True stores False; not given, it stays unset (None)
    extra = Option("shrink", "analysis", "bool", "shrink the estimates", default=True, flag="--no-shrink",
                   design_option=True)
    monkeypatch.setattr(_options, "OPTIONS", _options.OPTIONS + (extra,))
    parser = argparse.ArgumentParser()
    add_arguments(parser, "analysis", only_design=True)
    assert parser.parse_args(["--no-shrink"]).shrink is False
    assert parser.parse_args([]).shrink is None
    assert "shrink" in _options.study_keys()["analysis"]


def test_progress_bars_only_on_a_terminal():
    import io

    from roikit._options import progress_bar

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    for stream, shown in ((io.StringIO(), False), (Terminal(), True)):
        bar = progress_bar(total=3, file=stream, desc="extracting")
        bar.update(3)
        bar.close()
        assert ("extracting" in stream.getvalue()) is shown
    hidden = io.StringIO()
    progress_bar(show=False, total=3, file=hidden).close()
    assert hidden.getvalue() == ""
