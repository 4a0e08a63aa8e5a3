"""APA tables in every format; descriptives."""

import docx
import numpy as np
import pytest

from roikit.errors import UsageError
from roikit.reporting.tables import (
    cell_formatters,
    descriptives,
    descriptives_table,
    results_table,
    results_tables,
)


def test_one_table_per_analysis_and_kind_of_test(results):
    tables = results_tables(results)
    titles = [t.title for t in tables]
    # glm has t rows and an F row: two tables
    assert len(tables) == 8
    assert any("omnibus" in t for t in titles)
    assert [t.number for t in tables] == list(range(1, 9))


def test_cells_equal_the_formatted_results(results_by_design):
    rows = results_by_design["paired"]
    table = results_table(rows)
    fmt = cell_formatters()
    for (_, r), cells, rid in zip(rows.iterrows(), table.rows, table.row_ids):
        assert rid["region"] == r["region"]
        for key in ("n", "estimate", "ci", "df", "statistic", "p", "p_holm", "p_fdr", "effect_size", "effect_ci"):
            assert cells[key] == fmt[key](r)
    # scipy.stats.ttest_1samp on the fixture's differences (left hippocampus); p below .001 -> "< .001"
    assert table.rows[0]["p"] == "< .001"
    assert table.headers("plain")[:4] == ["Region", "n", "M_diff", "95% CI"]


def test_note_names_correction_family_size_and_flags(results_by_design):
    table = results_table(results_by_design["one-sample"])
    note = table.note_text("plain")
    assert "across the 3 regions of each term (the primary correction)" in note
    assert "p_Holm = p after Holm (1979)" in note and "Also given: p_FDR, Benjamini–Hochberg (1995)" in note
    assert "sub-12" in note and "sub-05" in note and "sub-30" in note
    # flags are superscript letters on the region cell
    assert table.rows[0]["region"].endswith("^{a}")


def test_uncorrected_family_is_said(results_by_design):
    rows = results_by_design["one-sample"].drop(columns=["p_holm", "p_fdr"]).assign(correction="")
    note = results_table(rows).note_text("plain")
    assert "uncorrected for multiple comparisons (family of 3 regions per term)" in note


@pytest.mark.parametrize("primary", ["holm", "fdr", "bonferroni", "none"])
def test_note_and_columns_follow_the_primary_correction(results_by_design, primary):
    rows = results_by_design["one-sample"].copy()
    rows["p_bonferroni"] = np.minimum(1, rows["p"] * 3)
    rows["correction"] = f"{primary},holm,fdr" if primary != "none" else "none"
    table = results_table(rows)
    note = table.note_text("plain")
    keys = [c.key for c in table.columns]
    if primary == "none":
        assert "p values are uncorrected" in note and "family of 3 regions" in note
    else:
        name = {"holm": "Holm", "fdr": "FDR", "bonferroni": "Bonferroni"}[primary]
        assert f"p_{name} = p after" in note and "(the primary correction)" in note
        assert keys[keys.index("p") + 1] == f"p_{primary}"  # the primary adjusted p comes first


def test_fixed_effects_note(results_by_design):
    note = results_table(results_by_design["fixed-effects"]).note_text("plain")
    assert "does not generalise to the population" in note


def test_f_table_columns(results_by_design):
    f_table = [t for t in results_tables(results_by_design["glm"]) if "omnibus" in t.title][0]
    assert [c.key for c in f_table.columns] == ["region", "n", "df1", "df", "statistic", "p", "p_holm", "p_fdr",
                                               "effect_size"]
    # partial eta squared is bounded by 1: no leading zero (APA 7th ed. 6.36); 4.56 / (4.56 + 29) = .1359
    assert f_table.rows[0]["effect_size"] == ".14"


def test_precision_weighted_columns(results_by_design):
    table = results_table(results_by_design["precision-weighted"])
    keys = [c.key for c in table.columns]
    assert "tau2" in keys and "i2" in keys
    assert table.rows[0]["i2"] == "48.2%"
    assert "boundary" in table.note_text("plain")


def test_markdown_latex_html_tsv(results_by_design):
    table = results_table(results_by_design["two-group"])
    md = table.to_markdown()
    assert "| Region | *n* | *M*_diff |" in md and "<sub>" not in md  # no HTML tags in Markdown
    assert "22.82" in md  # Welch df kept to two decimals
    tex = table.to_latex()
    for part in (r"\toprule", r"\midrule", r"\bottomrule", r"\textit{t}", r"\begin{tabular}{lrrcrrrrrrc}"):
        assert part in tex
    html = table.to_html()
    assert '<th data-column="p" class="r"><i>p</i></th>' in html
    assert 'data-region="left hippocampus"' in html
    tsv = table.to_tsv().splitlines()
    assert tsv[0].split("\t")[:3] == ["Region", "n", "M_diff"]
    assert len(tsv) == 1 + 3


def test_html_print_keeps_short_region_names_whole(results_by_design):
    # printed, a table whose region names are short keeps them on one line (class read by the report's print CSS);
    # one with a name past 36 characters lets the names wrap, so the table still fits the page width
    table = results_table(results_by_design["two-group"])
    assert '<table class="apa whole-stub">' in table.to_html()
    name = "Juxtapositional Lobule Cortex (formerly Supplementary Motor Cortex)"
    table.rows[0]["region"] = name
    html = table.to_html()
    assert '<table class="apa">' in html and name in html


def test_word_table_reads_back(results_by_design, tmp_path):
    table = results_table(results_by_design["paired"])
    path = tmp_path / "paired.docx"
    table.to_docx(path)
    doc = docx.Document(str(path))
    word = doc.tables[0]
    assert len(word.rows) == 4
    assert [c.text for c in word.rows[0].cells][:3] == ["Region", "n", "Mdiff"]
    assert [c.text for c in word.rows[1].cells] == [
        "left hippocampusa", *[v.replace("-", "−") for v in table.cells("plain")[0][1:]]]
    # symbols are italic runs
    assert word.rows[0].cells[1].paragraphs[0].runs[0].italic
    with pytest.raises(Exception, match="exists"):
        table.to_docx(path)


def test_write_all_formats(results_by_design, tmp_path):
    paths = results_table(results_by_design["one-sample"]).write(tmp_path)
    assert sorted(p.suffix for p in paths) == [".docx", ".html", ".md", ".tex", ".tsv"]
    with pytest.raises(UsageError, match="table format"):
        results_table(results_by_design["one-sample"]).write(tmp_path, formats=("rtf",), overwrite=True)


def test_results_table_requires_one_analysis(results):
    with pytest.raises(UsageError, match="results hold 8 tables"):
        results_table(results)
    with pytest.raises(UsageError, match="lacks column"):
        results_tables(results.drop(columns=["p"]))


def test_descriptives_against_pandas(values, participants):
    desc = descriptives(values, participants=participants, group="group")
    merged = values.merge(participants, on="participant_id")
    part = merged[(merged.region == "retrosplenial cortex") & (merged.contrast == "novel") & (merged.group == "older")]
    row = desc[(desc.region == "retrosplenial cortex") & (desc.contrast == "novel") & (desc.group == "older")].iloc[0]
    # pandas Series.mean/std (ddof=1) skip the missing value
    assert row["n"] == part.value.notna().sum() == 15
    assert row["n_missing"] == 1
    assert row["mean"] == pytest.approx(part.value.mean())
    assert row["sd"] == pytest.approx(part.value.std(ddof=1))
    assert row["se"] == pytest.approx(part.value.std(ddof=1) / np.sqrt(15))
    assert row["coverage"] == pytest.approx(100 * (part.n_valid / part.n_voxels).mean())
    # regions, contrasts and groups in order of appearance
    assert list(desc.region.unique()) == ["left hippocampus", "right hippocampus", "retrosplenial cortex"]
    assert list(desc.group.unique()) == ["younger", "older"]


def test_descriptives_table_and_errors(values, participants):
    table = descriptives_table(values, participants=participants, group="group", contrasts=["novel"])
    # wide: regions as rows, one column per analysed contrast x group
    assert [c.key for c in table.columns] == ["region", "novel|younger", "novel|older", "coverage"]
    assert [r["region"] for r in table.rows] == ["left hippocampus", "right hippocampus", "retrosplenial cortex"]
    assert "missing" in table.note_text("plain") and "Only the contrasts analysed" in table.note_text("plain")
    with pytest.raises(UsageError, match="group column 'site'"):
        descriptives(values, group="site")
