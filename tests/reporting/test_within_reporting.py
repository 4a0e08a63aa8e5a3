"""Reporting of repeated measures, region differences and evidence for absence: sentences, tables, cautions."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from roikit.reporting.references import REFERENCES
from roikit.reporting.tables import results_tables
from roikit.reporting.text import bf_evidence, caution_lines, results_text
from roikit.stats import run_design


def test_bayes_factor_words_follow_lee_and_wagenmakers_table():
    # Lee & Wagenmakers (2013, Table 7.1), adapting Jeffreys (1961, Appendix B): 1-3 anecdotal, 3-10 moderate,
    # 10-30 strong, 30-100 very strong, > 100 extreme; the same bands of 1/BF10 for the null
    cases = {150: "extreme evidence for an effect", 50: "very strong evidence for an effect",
             20: "strong evidence for an effect", 5: "moderate evidence for an effect",
             2: "anecdotal evidence for an effect", 1: "no evidence either way",
             0.5: "anecdotal evidence for no effect", 0.21: "moderate evidence for no effect",
             0.05: "strong evidence for no effect", 0.02: "very strong evidence for no effect",
             0.001: "extreme evidence for no effect"}
    for bf, words in cases.items():
        assert bf_evidence(bf, "one-sample") == words, bf
    assert bf_evidence(0.21, "paired") == "moderate evidence for no difference"
    assert bf_evidence(0.21, "two-group") == "moderate evidence for no difference"


def _values(n=20, seed=7):
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        u = rng.normal(0, 0.5)
        for c, contrast in enumerate(("a", "b", "c")):
            for region, effect in (("left hippocampus", 0.8), ("right hippocampus", 0.1), ("visual cortex", 0.0)):
                rows.append(dict(participant_id=f"sub-{i + 1:02d}", contrast=contrast, region=region,
                                 value=u + effect * (c == 0) + 0.3 * c * (region == "left hippocampus")
                                 + rng.normal(0, 0.6), n_voxels=10, n_valid=10))
    return pd.DataFrame(rows)


@pytest.fixture(scope="module")
def results():
    values = _values()
    contrasts = pd.DataFrame({"contrast": ["a", "b", "c"], "condition": ["a", "b", "c"]})
    regions = pd.DataFrame({"region": ["left hippocampus", "right hippocampus", "visual cortex"],
                            "structure": ["hippocampus", "hippocampus", "visual cortex"],
                            "hemisphere": ["left", "right", None]})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        parts = [
            run_design(values, "one-sample", contrast="a", equivalence=0.5, bayes_factor=True),
            run_design(values, "repeated-measures", within="condition,hemisphere", contrasts=contrasts,
                       region_table=regions),
            run_design(values, "region-difference", regions="left hippocampus,right hippocampus", contrast="a"),
        ]
    return pd.concat([p.assign(analysis=k) for k, p in enumerate(parts, start=1)], ignore_index=True)


def test_results_sentences_give_bayes_factor_equivalence_and_gg_corrected_f(results):
    text = results_text(results, style="plain").replace("\xa0", " ")
    one = results[results["analysis"] == 1].set_index("region")
    bf = one.loc["visual cortex", "bf10"]
    assert f"BF_10 = {bf:.2f}" in text or f"BF_10 = {bf:.3f}" in text
    assert bf_evidence(bf, "one-sample") in text
    assert "two one-sided tests" in text and "±0.50 d" in text
    # the three-level factor: df x epsilon_GG and p_GG in the sentence
    rm = results[(results["analysis"] == 2) & (results["term"] == "condition")].iloc[0]
    assert rm["epsilon_gg"] < 1
    df1, df2 = rm["df1"] * rm["epsilon_gg"], rm["df"] * rm["epsilon_gg"]
    assert f"F({df1:.2f}, {df2:.2f})" in text and "p_GG" in text
    assert "Left hippocampus - right hippocampus: M_diff = " in text


def test_methods_name_the_bayes_factor_scale_and_tost_sources(results):
    from roikit.reporting.text import methods_parts

    paragraphs, cited = methods_parts(_values(), results)
    joined = " ".join(paragraphs).replace("\xa0", " ")
    assert "Jeffreys (1961)" in joined and "Lee & Wagenmakers (2013)" in joined
    assert {"jeffreys1961", "lee2013", "rouder2009", "schuirmann1987", "lakens2017"} <= set(cited)


def test_f_table_gives_corrected_df_epsilon_and_generalised_eta(results):
    tables = results_tables(results)
    rm = next(t for t in tables if "repeated-measures" in t.name)
    heads = rm.headers("plain")
    assert "ε_GG" in heads and "p_GG" in heads and "η²_G" in heads
    row = results[(results["analysis"] == 2) & (results["term"] == "condition")].iloc[0]
    cells = rm.cells("plain")
    first = next(c for c in cells if c[heads.index("Term")] == "condition")
    assert first[heads.index("df_1")] == f"{row['df1'] * row['epsilon_gg']:.2f}"
    assert "Greenhouse–Geisser corrected" in rm.note_text("plain")
    one = next(t for t in tables if "one-sample" in t.name)
    assert "BF_10" in one.headers("plain") and "p_TOST" in one.headers("plain")
    assert "Lee & Wagenmakers, 2013" in one.note_text("plain")


def test_region_comparison_caution_points_to_the_region_difference_test(results):
    lines = caution_lines(results)
    line = next(x for x in lines if "side by side" in x).replace("\xa0", " ")
    assert "Analysis 1 shows" in line and "test it as analysis 3 does" in line and len(line) < 200
    assert "Gelman & Stern, 2006" in line and "Nieuwenhuis et al., 2011" in line
    assert REFERENCES["gelman2006"].in_text == "Gelman & Stern, 2006"
    # without a region-difference analysis, the caution names the design instead
    alone = caution_lines(results[results["analysis"] == 1])
    assert any("with the region-difference design" in x for x in alone)
    # one region, or F rows only: nothing shown side by side as t results
    assert not any("side by side" in x for x in caution_lines(results[results["analysis"] == 2]))
