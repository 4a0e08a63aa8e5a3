"""Methods, results and cautions text."""

import pandas as pd

from roikit.reporting.format import render
from roikit.reporting.text import (
    SCOPE_STATEMENT,
    assumptions,
    cautions,
    circular_regions,
    methods_text,
    results_text,
)


def test_methods_text_from_provenance(values, results, participants):
    text = methods_text(values, results, participants=participants, style="plain").replace("\u00a0", " ")
    assert "32 participants (group: younger, n = 16; older, n = 16)" in text
    assert "sub-30 had no valid voxel" in text and "left out of that region’s tests only" in text  # with its reason
    assert "atlas image wayfinding_atlas.nii.gz with its label table wayfinding_atlas.tsv, on the maps' grid" in text
    assert "left hippocampus (412 voxels)" in text
    assert "retrosplenial cortex (655 voxels) was a sphere of radius 6 mm centred at (8, -52, 12) mm in the maps' world coordinates." in text
    assert "resampled onto the maps' grid by nearest-neighbour interpolation" in text
    assert "the mean of the first-level contrast estimates" in text
    assert "Welch's unequal-variance t-tests and Welch–Satterthwaite degrees of freedom (Welch, 1947" in text
    assert "Knapp–Hartung adjustment (Knapp & Hartung, 2003)" in text
    assert "estimated by restricted maximum likelihood (Viechtbauer, 2005)" in text
    # one correction sentence for all analyses, not one per analysis
    assert text.count("Holm's step-down method (Holm, 1979)") == 1 and "In every analysis" in text
    assert "NumPy" in text and "SciPy" in text and "roikit developers, 2026" in text
    # only the analysed contrasts; no formula syntax, no Python names, no research-use block
    assert "The analyses used the first-level contrasts novel and familiar." in text
    assert "[T." not in text and "~" not in text and "clinical" not in text and "1 regions" not in text
    # every effect size symbol used is defined; none for intercepts
    assert "d_z = M_diff/SD_diff" in text and "Hedges' g" in text


def test_methods_text_labels_and_random_effects(values, results_by_design, participants):
    rows = results_by_design["mixed"].copy()
    rows["random"] = "1 + load"
    rows["crossed"] = "town"
    rows["corr_participant_load"] = [0.21, -0.35, 0.10][: len(rows)] * (len(rows) // 3) + [0.0] * (len(rows) % 3)
    labels = {"load": {"LongName": "memory load"}, "town": {"LongName": "town"}}
    text = methods_text(values, rows, participants=participants, style="plain", labels=labels)
    assert ("as random effects, a by-participant intercept, a by-participant slope of memory load and a crossed "
            "intercept for town") in text
    assert "correlation between the by-participant intercept and slope of memory load estimated" in text
    assert "r ranged from -.35 to .21" in text


def test_methods_text_without_provenance(values, results):
    bare = values.copy()
    bare.attrs = {}
    text = methods_text(bare, results, style="plain")
    assert "left hippocampus (412 voxels)" in text
    assert "not recorded with the values table" in text


def test_results_text_apa(results_by_design):
    text = results_text(results_by_design["paired"], style="plain").replace("\u00a0", " ")
    # one sentence per region, in the table's order; APA 7th ed. 6.43-6.46 number formats
    assert ("Right hippocampus: M_diff = 0.20, 95% CI [0.03, 0.38], t(31) = 2.35, p = .025, p_Holm = .050, "
            "d_z = 0.42, 95% CI [0.05, 0.79].") in text
    assert text.index("Left hippocampus:") < text.index("Right hippocampus:") < text.index("Retrosplenial cortex:")
    # the primary correction is named once per family, with the family size
    assert text.count("Holm method") == 1 and "Across the 3 regions, p values were adjusted with the Holm method" in text
    assert "Left hippocampus remains significant after correction (α = .05; 1 of 3)." in text
    html = results_text(results_by_design["paired"], style="html")
    assert "<i>d</i><sub>z</sub>" in html
    plain = results_text(results_by_design["paired"], style="plain")
    assert "t(31)\u00a0=\u00a02.35" in plain and "p\u00a0<\u00a0.001" in plain  # non-breaking spaces


def test_results_text_no_effect_size_for_intercepts(results_by_design):
    glm = results_by_design["glm"].copy()
    glm.loc[glm.term == "Intercept", ["effect_size", "effect_size_type"]] = [0.5, "partial_eta2"]
    text = results_text(glm, style="plain").replace("\u00a0", " ")
    intercept = text[text.index("For the intercept"):text.index("For age")]
    assert "η²" not in intercept and "b = 0.42" in intercept
    with_effects = results_text(glm, style="plain", intercept_effect_sizes=True)
    assert with_effects.count("η²") > text.count("η²")


def _kinds(found):
    return [c["kind"] for c in found]


def test_cautions(results, values):
    found = cautions(results, provenance=values.attrs["roikit"])
    kinds = _kinds(found)
    for kind in ("circular", "fixed-effects", "low-coverage", "outliers", "excluded", "non-convergence", "boundary"):
        assert kind in kinds
    fixed = [c["text"] for c in found if c["kind"] == "fixed-effects"][0]
    assert "describe these participants only" in fixed and "no inference about the population" in fixed
    # one short line per problem and participant
    outlier = [c["text"] for c in found if c["kind"] == "outliers"]
    assert outlier == ["sub-12: robust outlier (modified *z* > 3.5) in 1 region (left hippocampus), 4 analyses; "
                       "kept in the tests; check for artefacts."]
    assert all(len(render(c["text"])) < 200 for c in found)
    circ = [c["text"] for c in found if c["kind"] == "circular"][0]
    assert "retrosplenial cortex" in circ
    assert "uncorrected" not in kinds


def test_uncorrected_family_caution(results_by_design):
    rows = results_by_design["one-sample"].drop(columns=["p_holm", "p_fdr"]).assign(correction="")
    found = cautions(rows)
    text = [render(c["text"]) for c in found if c["kind"] == "uncorrected"][0]
    assert "3 regions reported without correction" in text
    # no circularity without a flag
    assert "circular" not in _kinds(found)


def test_circular_flag_from_arguments_and_sidecar_shape():
    assert circular_regions(None, ["left hippocampus"]) == ["left hippocampus"]
    sidecar = {"columns": {}, "provenance": {"regions": [{"region": "caudate", "source": {
        "kind": "mask", "defined_from_same_data": True}}], "circular_regions": ["putamen"]}}
    assert circular_regions(sidecar) == ["putamen", "caudate"]


def test_assumptions_and_scope(results):
    lines = assumptions(results)
    assert any("Brown–Forsythe" in a for a in lines)
    assert any("upper bound" in a for a in lines)
    assert "clinical decisions about an individual patient" in SCOPE_STATEMENT
    assert "ethics approval and local clinical practice" in SCOPE_STATEMENT


def test_methods_sentences_for_round_two_columns(values, results_by_design, participants):
    import numpy as np

    one = results_by_design["one-sample"].copy()
    one[["bf10", "prior_scale", "p_equivalence", "equivalence_bound"]] = [3.2, np.sqrt(2) / 2, 0.2, 0.3]
    rm = results_by_design["one-sample"].copy()
    rm[["design", "term", "statistic_type", "contrast"]] = ["repeated-measures", "route:group", "F", "novel,familiar"]
    rm[["mauchly_p", "p_gg", "p_hf", "generalized_eta2"]] = [0.3, 0.01, 0.01, 0.1]
    text = methods_text(values, pd.concat([one, rm]), participants=participants, style="plain")
    text = text.replace("\u00a0", " ")
    # prior scale sqrt(2)/2 = .707 (bounded by nothing, but APA writes r without a leading zero)
    assert "JZS Bayes factors BF_10 (Rouder et al., 2009) used a Cauchy prior" in text and "r = .707" in text
    assert "two one-sided tests (Schuirmann, 1987; Lakens, 2017) against ±0.30" in text
    assert "tested route × group in a repeated-measures analysis of variance of the novel and familiar values" in text
    assert "Mauchly's test (Mauchly, 1940)" in text and "Greenhouse–Geisser (Greenhouse & Geisser, 1959)" in text
    assert "BF_10 = Bayes factor" in text


def test_large_and_tiny_bayes_factors_are_written_with_a_power_of_ten():
    """A Bayes factor of 4.3e15 is not written with sixteen digits; the markup renders per format."""
    from roikit.reporting.format import render
    from roikit.reporting.tables import _format_bf

    assert _format_bf(4320086568325880.0) == "4.32 × 10^{15}"
    assert _format_bf(2.1e-5) == "2.10 × 10^{-5}"
    assert _format_bf(12345.6) == "12,346"
    assert _format_bf(0.05) == "0.050"
    assert render(_format_bf(4.32e15), "plain") == "4.32 × 10^15"
    assert render(_format_bf(4.32e15), "html") == "4.32 × 10<sup>15</sup>"
    assert render(_format_bf(4.32e15), "markdown") == "4.32 × 10¹⁵"
    assert "\\textsuperscript{15}" in render(_format_bf(4.32e15), "latex")
