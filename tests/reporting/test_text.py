"""Methods, results and cautions text."""

import pandas as pd
import pytest

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
    text = methods_text(values, results, participants=participants, style="plain")
    assert "32 participants (younger: n = 16, older: n = 16)" in text
    assert "sub-30" in text  # exclusion named
    assert "wayfinding_atlas.nii.gz with the label table wayfinding_atlas.tsv" in text
    assert "left hippocampus (label 1, 412 voxels)" in text
    assert "radius 6.0 mm centred at (8.0, -52.0, 12.0) mm, 655 voxels" in text
    assert "resampled onto the maps' grid by nearest neighbour" in text
    assert "the mean of the first-level contrast estimates" in text
    assert "Welch two-sample t-tests" in text and "Knapp–Hartung" in text and "REML" in text
    assert "adjusted across the 3 regions" in text
    assert "numpy" in text and "scipy" in text


def test_methods_text_without_provenance(values, results):
    bare = values.copy()
    bare.attrs = {}
    text = methods_text(bare, results, style="plain")
    assert "left hippocampus (412 voxels)" in text
    assert "not recorded with the values table" in text


def test_results_text_apa(results_by_design):
    text = results_text(results_by_design["paired"], style="plain")
    row = results_by_design["paired"].iloc[1]
    assert "right hippocampus, M_diff = 0.20, 95% CI [0.03, 0.38], t(31) = 2.35, p = .025, p_Holm = .050" in text
    assert "After Holm correction across the 3 regions, left hippocampus remains significant" in text
    html = results_text(results_by_design["paired"], style="html")
    assert "<i>d</i><sub>z</sub>" in html


def _kinds(found):
    return [c["kind"] for c in found]


def test_cautions(results, values):
    found = cautions(results, provenance=values.attrs["roikit"])
    kinds = _kinds(found)
    for kind in ("circular", "fixed-effects", "low-coverage", "outliers", "excluded", "non-convergence", "boundary"):
        assert kind in kinds
    fixed = [c["text"] for c in found if c["kind"] == "fixed-effects"][0]
    assert "describes only these" in fixed and "does not generalise to the population" in fixed
    circ = [c["text"] for c in found if c["kind"] == "circular"][0]
    assert "retrosplenial cortex" in circ
    assert "uncorrected" not in kinds


def test_uncorrected_family_caution(results_by_design):
    rows = results_by_design["one-sample"].drop(columns=["p_holm", "p_fdr"]).assign(correction="")
    found = cautions(rows)
    text = [render(c["text"]) for c in found if c["kind"] == "uncorrected"][0]
    assert "3 regions were tested without correction" in text
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
