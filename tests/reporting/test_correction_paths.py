"""Every correction path is reported as run: results text, figure legend, table note, run summary.

The primary correction is the first entry of ``correct`` (contract: stats --correct). Names as published: Holm
(1979), Benjamini & Hochberg (1995), Bonferroni (Dunn, 1961), max-statistic permutations (Westfall & Young, 1993).
"""

from __future__ import annotations

import warnings

import matplotlib
import pytest

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

from roikit.errors import UsageError  # noqa: E402
from roikit.reporting import write_report  # noqa: E402
from roikit.reporting.report import _figure_plan  # noqa: E402
from roikit.reporting.tables import results_table  # noqa: E402
from roikit.reporting.text import methods_text, results_text  # noqa: E402
from roikit.stats import run_design  # noqa: E402
from roikit.study.run import _survivors  # noqa: E402

# what each path must say: (results text, legend of survivors, methods text, run summary)
EXPECTED = {
    "holm": ("adjusted with the Holm method (p_Holm)", "survives Holm", "Holm's step-down method (Holm, 1979)",
             "after Holm correction"),
    "fdr": ("adjusted for the Benjamini–Hochberg false discovery rate (p_FDR)", "survives FDR",
            "Benjamini–Hochberg false discovery rate procedure (Benjamini & Hochberg, 1995)", "after FDR correction"),
    "bonferroni": ("adjusted with the Bonferroni method (p_Bonferroni)", "survives Bonferroni",
                   "the Bonferroni method (Dunn, 1961)", "after Bonferroni correction"),
    "fwe": ("adjusted for the family-wise error by maximum-statistic permutation (p_FWE)", "survives FWE",
            "maximum-statistic permutation method (Westfall & Young, 1993; 200 sign-flip permutations, random seed 5)", "after FWE correction"),
    "none": ("p values are uncorrected (family of 3 regions)", "(uncorrected)",
             "were not corrected for multiple comparisons (uncorrected; each family held 3 regions)",
             "uncorrected (3 regions tested)"),
}
OTHER_NAMES = ("Holm", "FDR", "Bonferroni", "FWE")


def _run(values, correct):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return run_design(values, "one-sample", contrast="novel", correct=correct,
                          permutations=200 if correct.startswith("fwe") else 0, seed=5)


def _legend_texts(fig) -> list[str]:
    return [t.get_text() for ax in fig.axes if ax.get_legend() for t in ax.get_legend().get_texts()]


@pytest.mark.parametrize("primary", ["holm", "fdr", "bonferroni", "fwe", "none"])
def test_each_correction_is_reported_as_run(values, participants, primary):
    results = _run(values, primary if primary in ("holm", "none") else f"{primary},holm")
    assert results["correction"].iloc[0].split(",")[0] == primary
    words, legend_word, methods_words, summary_words = EXPECTED[primary]
    # results text
    text = results_text(results, style="plain").replace("\u00a0", " ")
    assert words in text
    named = [n for n in OTHER_NAMES if f"p_{n}" in text]
    assert named == ([] if primary == "none" else [{"fdr": "FDR", "fwe": "FWE"}.get(primary, primary.capitalize())])
    # methods text
    methods = methods_text(values, results, participants=participants, style="plain").replace("\u00a0", " ")
    assert methods_words in methods
    # figure legend of the forest plot the report draws (walk the matplotlib legend texts)
    forest = [item for item in _figure_plan(values, results, participants) if "_forest" in item["name"]]
    assert [item["name"] for item in forest] == ["a1-one-sample_forest"]
    (fig,) = forest[0]["make"]()  # one page: 10 regions
    legend = _legend_texts(fig)
    plt.close(fig)
    assert legend and any(legend_word in t for t in legend), legend
    assert not any(n in t for t in legend for n in OTHER_NAMES if n not in legend_word)
    # table note and run summary
    note = results_table(results).note_text("plain")
    assert ("uncorrected" in note) if primary == "none" else ("(the primary correction)" in note)
    assert summary_words in _survivors(results, 0.05)


def test_report_correct_chooses_another_carried_correction(tmp_path, values, participants):
    results = _run(values, "holm,fdr")
    text = results_text(results, style="plain", correct="fdr").replace("\u00a0", " ")
    assert "(p_FDR)" in text and "Holm" not in text
    with pytest.raises(UsageError, match="no p_bonferroni values.*carries: holm, fdr, none"):
        results_text(results, correct="bonferroni")
    with pytest.raises(UsageError, match="unknown correction; valid names: holm, fdr, bonferroni, fwe .*permutations"):
        results_text(results, correct="sidak")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        written = write_report(values, results, participants=participants, out=tmp_path / "r", correct="none",
                               figure_formats=("png",))
    md = written["results"].read_text()
    assert "uncorrected" in md and "p_Holm" not in md


def test_cli_correct_errors(tmp_path, values):
    from roikit._tables import write_table
    from roikit.cli import main

    path = tmp_path / "values.tsv"
    write_table(path, values)
    base = ["stats", str(path), "--design", "one-sample", "--contrast", "novel", "--out", str(tmp_path / "r.tsv")]
    assert main(base + ["--correct", "fwe"]) == 2
    assert main(base + ["--correct", "sidak"]) == 2


def test_cli_records_the_primary_correction_in_the_sidecar(tmp_path, values):
    import json

    from roikit._tables import write_table
    from roikit.cli import main

    path = tmp_path / "values.tsv"
    write_table(path, values)
    out = tmp_path / "r.tsv"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["stats", str(path), "--design", "one-sample", "--contrast", "novel", "--out", str(out),
                     "--correct", "bonferroni,holm"]) == 0
    from roikit._tables import read_sidecar

    sidecar = read_sidecar(out)  # BIDS layout: the options sit in the GeneratedBy entry
    assert sidecar["options"]["primary_correction"] == "bonferroni"
    assert json.loads(out.with_suffix(".json").read_text())["GeneratedBy"][0]["options"]["primary_correction"] \
        == "bonferroni"


def test_contrast_labels_from_a_contrasts_sidecar(values, results_by_design, participants):
    # BIDS sidecar "Levels" of the contrast column: short codes get their names
    labels = {"contrast": {"Levels": {"nov": "novel routes"}}}
    rows = results_by_design["one-sample"].assign(contrast="nov")
    v = values.assign(contrast=values["contrast"].replace({"novel": "nov"}))
    text = methods_text(v, rows, participants=participants, labels=labels, style="plain")
    assert "tested the mean novel routes value" in text and "first-level contrast novel routes" in text
