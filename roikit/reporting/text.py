"""Methods and results paragraphs generated from what was actually run, with the cautions that apply.

All text is produced in roikit's small markup (see :mod:`roikit.reporting.format`) and rendered to Markdown,
HTML, LaTeX or plain text; numbers go through the same APA formatters as the tables.

Examples
--------
>>> print(methods_text(values, results, participants=participants))      # doctest: +SKIP
>>> for c in cautions(results, provenance=values.attrs.get("roikit")):  # doctest: +SKIP
...     print(c["kind"], c["text"])
"""

from __future__ import annotations

import platform
from importlib import metadata
from typing import Any, Iterable, Sequence

import numpy as np
import pandas as pd

from ._common import (
    DESIGN_NAMES,
    REQUIRED_RESULTS,
    REQUIRED_VALUES,
    analysis_title,
    check_columns,
    col,
    flag,
    has_values,
    ids,
    number,
    ordered_unique,
    split_analyses,
    text,
)
from .format import Style, escape_markup, format_df, format_number, in_text, is_missing, render
from .tables import CORRECTION_TEXT, DF_METHOD_TEXT

__all__ = [
    "SCOPE_STATEMENT",
    "methods_text",
    "results_text",
    "cautions",
    "assumptions",
    "software_versions",
    "circular_regions",
]

#: Printed at the top of every report.
SCOPE_STATEMENT = (
    "roikit is for research group analysis of imaging studies. It is not a medical device and must not be used "
    "for clinical decisions about an individual patient; anything clinical falls under the study's ethics "
    "approval and local clinical practice."
)

_STATISTICS = {
    "mean": "the mean",
    "median": "the median",
    "trimmed-mean": "the trimmed mean",
    "weighted-mean": "the probability-weighted mean",
}

_PACKAGES = ("roikit", "numpy", "scipy", "pandas", "statsmodels", "nibabel", "matplotlib")


def software_versions() -> dict[str, str]:
    """Versions of Python and the packages behind the computations (installed now)."""
    out = {"python": platform.python_version()}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            continue
    return out


def _prov(provenance: dict | None) -> dict:
    if not isinstance(provenance, dict):
        return {}
    # a values sidecar (BIDS layout) keeps it in its GeneratedBy entry, nested under "provenance"
    generated = provenance.get("GeneratedBy")
    if isinstance(generated, list) and generated and isinstance(generated[0], dict):
        provenance = generated[0]
    if "provenance" in provenance and isinstance(provenance["provenance"], dict) and "regions" not in provenance:
        return provenance["provenance"]
    return provenance


def circular_regions(provenance: dict | None, extra: Iterable[str] | None = None) -> list[str]:
    """Regions marked as defined from the same data that are tested (circular).

    Read from ``provenance["circular_regions"]`` (list of names), a region record's ``circular`` or
    ``defined_from_same_data`` flag (on the record or its ``source``), plus ``extra`` names.
    """
    prov = _prov(provenance)
    names = [str(n) for n in prov.get("circular_regions", []) or []]
    for rec in prov.get("regions", []) or []:
        if not isinstance(rec, dict):
            continue
        src = rec.get("source") if isinstance(rec.get("source"), dict) else {}
        if any(flag(d.get(k)) for d in (rec, src) for k in ("circular", "defined_from_same_data")):
            names.append(str(rec.get("region", rec.get("name", ""))))
    names += [str(n) for n in (extra or [])]
    return ordered_unique(n for n in names if n)


# --------------------------------------------------------------------------------------------- cautions
def cautions(
    results: pd.DataFrame,
    *,
    provenance: dict | None = None,
    circular: Iterable[str] | None = None,
) -> list[dict[str, str]]:
    """Cautions that apply to these results, each ``{"kind", "text"}`` (text in markup).

    Kinds: ``circular`` (region defined from the same data), ``uncorrected`` (a family of several regions
    without adjusted p), ``fixed-effects`` (no population inference), ``low-coverage``, ``non-convergence``,
    ``boundary``, ``outliers``, ``excluded`` (missing values).
    """
    check_columns(results, REQUIRED_RESULTS, "results table")
    out: list[dict[str, str]] = []
    circ = circular_regions(provenance, circular)
    tested = set(results["region"].map(text))
    circ_tested = [c for c in circ if c in tested] or circ
    if circ_tested:
        out.append({"kind": "circular", "text": (
            f"Circular region definition: {escape_markup(', '.join(circ_tested))} "
            f"{'was' if len(circ_tested) == 1 else 'were'} defined from the same data that are tested here. "
            "Selecting a region because of an effect and then testing that effect in the same data inflates the "
            "estimate and the false-positive rate (Kriegeskorte et al., 2009); read these results as descriptive "
            "or confirm them in independent data.")})
    pooled: dict[str, dict[str, list[str]]] = {}
    analyses = split_analyses(results)
    for key, rows in analyses:
        title = escape_markup(analysis_title(key))
        for term in ordered_unique(rows["term"].map(text)):
            part = rows[rows["term"].map(text) == term]
            size = ordered_unique(col(part, "family_size"))
            family = int(number(size[0])) if size and np.isfinite(number(size[0])) else part["region"].nunique()
            corrected = any(has_values(part, f"p_{m}") for m in ("holm", "fdr", "fwe", "bonferroni"))
            methods = [m for cell in col(part, "correction") for m in ids(cell) if m not in ("none",)]
            if family > 1 and not corrected and not methods:
                out.append({"kind": "uncorrected", "text": (
                    f"Uncorrected family ({title}, term {escape_markup(term)}): {family} regions were tested "
                    "without correction for multiple comparisons, so at the 5% level about "
                    f"{format_number(0.05 * family, 2)} false positives are expected when no region has an "
                    "effect; report the adjusted *p* values or justify each region a priori.")})
        if any(flag(v) is False for v in col(rows, "population_inference")) or key.get("design") == "fixed-effects":
            n = ordered_unique(col(rows, "n"))
            n_text = f"{format_df(n[0])} " if len(n) == 1 else ""
            out.append({"kind": "fixed-effects", "text": (
                f"Fixed-effects result ({title}): it describes only these {n_text}participants and does not "
                "generalise to the population they were drawn from, because it ignores the variability between "
                "participants. Use it for teaching or for single-group description, not for claims about people "
                "in general; population inference needs a random-effects design (e.g. one-sample).")})
        for kind, column in (("low-coverage", "low_coverage_ids"), ("outliers", "outlier_ids"),
                             ("excluded", "excluded_ids")):
            for region in ordered_unique(rows["region"].map(text)):
                who = ordered_unique(i for v in col(rows[rows["region"].map(text) == region], column) for i in ids(v))
                if who:
                    item = f"{escape_markup(region)} ({escape_markup(', '.join(who))})"
                    pooled.setdefault(kind, {}).setdefault(item, []).append(title)
        bad = ordered_unique(r for r, c in zip(rows["region"].map(text), col(rows, "converged")) if flag(c) is False)
        if bad:
            out.append({"kind": "non-convergence", "text": (
                f"Non-convergence ({title}): the fit did not converge for {escape_markup(', '.join(bad))}; its "
                "estimates and standard errors are unreliable. Simplify the random-effects structure or check the "
                "data.")})
        edge = ordered_unique(r for r, c in zip(rows["region"].map(text), col(rows, "boundary")) if flag(c) is True)
        if edge:
            out.append({"kind": "boundary", "text": (
                f"Boundary fit ({title}): a variance component was estimated at zero for "
                f"{escape_markup(', '.join(edge))} (a singular fit). The model is then equivalent to a simpler one; "
                "the between-participant variability may be too small to estimate with these data.")})
    for kind in ("low-coverage", "outliers", "excluded"):
        if kind not in pooled:
            continue
        items = "; ".join(item + ("" if len(where) == len(analyses) else f" [{', '.join(where)}]")
                          for item, where in pooled[kind].items())
        if kind == "low-coverage":
            sentence = (f"Low coverage: participants with valid data in fewer than half of the region's voxels: {items}. "
                        "Their values rest on a part of the region; they are kept in the tests and marked in the "
                        "figures.")
        elif kind == "outliers":
            sentence = (f"Outliers: values with modified *z* > 3.5 (Iglewicz & Hoaglin, 1993): {items}. They are kept "
                        "in the tests and marked in the figures; check them for artefacts before interpreting.")
        else:
            sentence = (f"Missing values: participants left out of a region's tests because their value is missing: "
                        f"{items}.")
        out.append({"kind": kind, "text": sentence})
    return out


# --------------------------------------------------------------------------------------------- methods
def _file_name(path) -> str:
    """The file name as the user knows it (folders dropped: methods text names files, not machines)."""
    from pathlib import PurePath

    return PurePath(str(path)).name if path else ""


def _region_sentences(prov: dict, values: pd.DataFrame | None) -> list[str]:
    voxels: dict[str, int] = {}
    if values is not None and "n_voxels" in values.columns:
        for region, part in values.groupby("region", sort=False):
            nv = pd.to_numeric(part["n_voxels"], errors="coerce").dropna()
            if len(nv):
                voxels[str(region)] = int(nv.median())
    records = [r for r in prov.get("regions", []) or [] if isinstance(r, dict)]
    by_kind: dict[str, list[str]] = {}
    atlases: dict[tuple[str, str], list[str]] = {}
    for rec in records:
        name = str(rec.get("region", rec.get("name", "")))
        src = rec.get("source") if isinstance(rec.get("source"), dict) else rec
        kind = str(src.get("kind", rec.get("kind", "region")))
        n = rec.get("n_voxels", voxels.get(name))
        vox = f", {int(n):,} voxels" if not is_missing(n) else ""
        if kind == "atlas":
            label = f"label {src['index']}" if not is_missing(src.get("index")) else ""
            inner = (label + vox).lstrip(", ")
            atlases.setdefault((str(src.get("image", "")), str(src.get("labels", ""))), []).append(
                f"{escape_markup(name)}" + (f" ({inner})" if inner else ""))
        elif kind == "sphere":
            c = src.get("center_mm", src.get("center"))
            r = src.get("radius_mm", src.get("radius"))
            where = (f"a sphere of radius {format_number(r, 1)} mm centred at ({', '.join(format_number(v, 1) for v in c)}) mm"
                     if c is not None and r is not None else "a sphere")
            by_kind.setdefault("sphere", []).append(f"{escape_markup(name)}: {where}{vox}")
        elif kind in ("mask", "probability"):
            image = escape_markup(_file_name(src.get("image", "")))
            extra = f" thresholded at {src['threshold']}" if kind == "probability" and "threshold" in src else ""
            by_kind.setdefault(kind, []).append(f"{escape_markup(name)}: {kind} image {image}{extra}{vox}")
        else:
            by_kind.setdefault("other", []).append(f"{escape_markup(name)} ({escape_markup(kind)}{vox})")
    out = []
    for (image, labels), names in atlases.items():
        image, labels = _file_name(image), _file_name(labels)
        out.append(f"From the atlas image {escape_markup(image)} with the label table {escape_markup(labels)}: "
                   + "; ".join(names) + ".")
    if by_kind.get("sphere"):
        out.append("Spheres (world coordinates as given by the user): " + "; ".join(by_kind["sphere"]) + ".")
    for kind in ("mask", "probability", "other"):
        if by_kind.get(kind):
            out.append(f"{kind.capitalize()} regions: " + "; ".join(by_kind[kind]) + ".")
    if not records and voxels:
        out.append("Region sizes on the maps' grid: " + "; ".join(
            f"{escape_markup(r)} ({n:,} voxels)" for r, n in voxels.items()) + ". (How the regions were defined "
            "was not recorded with the values table.)")
    for rec in prov.get("resampling", []) or []:
        if isinstance(rec, dict):
            what = escape_markup(str(rec.get("what", rec.get("region", "a region image"))))
            image = escape_markup(_file_name(rec.get("image", "")))
            method = escape_markup(str(rec.get("method", "nearest neighbour")))
            out.append(f"The {what} {image} was resampled onto the maps' grid by {method} interpolation.".replace(
                "  ", " "))
    return out


def _design_sentence(key: dict, rows: pd.DataFrame) -> str:
    design = key.get("design", "")
    contrast = escape_markup(key.get("contrast", ""))
    methods = ordered_unique(col(rows, "df_method"))
    df_text = "; ".join(DF_METHOD_TEXT.get(text(m), escape_markup(text(m))) for m in methods)
    formula = escape_markup(key.get("formula", ""))
    if design == "one-sample":
        s = f"One-sample *t*-tests compared the mean {contrast} value with zero in each region"
    elif design == "paired":
        s = (f"Paired *t*-tests compared {contrast} with {escape_markup(key.get('versus', ''))} within "
             "participants in each region (the test of the mean within-participant difference against zero)")
    elif design == "two-group":
        levels = key.get("levels", "").split(",")
        welch = "welch" in [text(m) for m in methods]
        s = (f"{'Welch' if welch else 'Student'} two-sample *t*-tests compared {escape_markup(' and '.join(levels))} "
             f"participants (column {escape_markup(key.get('group_column', ''))}) on the {contrast} contrast")
        if has_values(rows, "brown_forsythe_p"):
            s += "; equality of variances was checked with the Brown–Forsythe test"
    elif design == "glm":
        centred = ordered_unique(i for v in col(rows, "centered") for i in ids(v))
        s = (f"A general linear model ({formula}) was fitted to the {contrast} values of each region by ordinary "
             "least squares")
        if centred:
            s += f", with {escape_markup(', '.join(centred))} mean-centred"
        s += "; leverage and Cook's distance were computed for every participant"
    elif design == "precision-weighted":
        tau = ordered_unique(col(rows, "tau2_method"))
        s = (f"A precision-weighted random-effects model{f' ({formula})' if formula else ''} combined the "
             f"{contrast} values, weighting each participant by 1/(*v*_{{i}} + τ^{{2}}) with *v*_{{i}} the "
             "first-level sampling variance and τ^{2} the between-participant variance "
             f"(estimated by {escape_markup(', '.join(str(t).upper() for t in tau) or 'REML')})")
    elif design == "mixed":
        sds = [c[3:] for c in rows.columns if c.startswith("sd_") and c not in ("sd_participant", "sd_residual")
               and has_values(rows, c)]
        s = (f"A linear mixed-effects model ({formula}) with random effects per participant"
             f"{' and a crossed random intercept for ' + escape_markup(', '.join(sds)) if sds else ''} was fitted "
             "to each region by restricted maximum likelihood (REML)")
    elif design == "fixed-effects":
        s = (f"For comparison only, a fixed-effects combination of the {contrast} values was computed; it treats the "
             "participants as fixed and describes only them, not the population")
    else:
        s = f"The {escape_markup(design)} design was applied to the {contrast} values"
    if df_text:
        s += f" ({df_text})"
    s += "."
    corrections = ordered_unique(m for v in col(rows, "correction") for m in ids(v))
    sizes = ordered_unique(int(number(v)) for v in col(rows, "family_size") if np.isfinite(number(v)))
    if corrections and corrections != ["none"]:
        names = "; ".join(CORRECTION_TEXT.get(m, escape_markup(m)) for m in corrections)
        s += (f" *p* values were adjusted across the {', '.join(map(str, sizes)) or rows['region'].nunique()} "
              f"regions of the family ({names}).")
    else:
        s += " *p* values were not adjusted for multiple comparisons."
    perms = ordered_unique(int(number(v)) for v in col(rows, "permutations") if number(v) > 0)
    if perms:
        seeds = ordered_unique(text(v) for v in col(rows, "seed"))
        s += (f" Family-wise *p* values came from {perms[0]:,} permutations (maximum statistic across regions; "
              f"seed {escape_markup(', '.join(seeds) or 'not recorded')}).")
    return s


def methods_text(
    values: pd.DataFrame | None,
    results: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    provenance: dict | None = None,
    style: Style = "markdown",
) -> str:
    """A methods section: participants and exclusions, regions, summary statistic, designs, software.

    Parameters
    ----------
    values : DataFrame or None
        Region values table; its ``attrs["roikit"]`` provenance is used unless ``provenance`` is given.
    results : DataFrame
        Group results table.
    participants : DataFrame, optional
        participants.tsv (group sizes).
    provenance : dict, optional
        Extraction provenance (the values sidecar's ``provenance``); absent parts are left out gracefully.
    style : {"markdown", "html", "plain", "latex"}

    Returns
    -------
    str
        Paragraphs separated by blank lines (HTML: ``<p>`` elements).
    """
    check_columns(results, REQUIRED_RESULTS, "results table")
    if values is not None:
        check_columns(values, REQUIRED_VALUES, "region values table")
    prov = _prov(provenance if provenance is not None else (values.attrs.get("roikit") if values is not None else None))
    paragraphs: list[str] = []
    # participants
    if values is not None:
        ids_all = ordered_unique(values["participant_id"].map(text))
        s = f"Region values were available for {len(ids_all)} participants"
        group_cols = ordered_unique(text(v) for v in col(results, "group_column") if text(v))
        if participants is not None and group_cols and group_cols[0] in participants.columns:
            gc = group_cols[0]
            sub = participants[participants["participant_id"].astype(str).isin(ids_all)]
            counts = sub[gc].map(text).value_counts(sort=False)
            s += " (" + ", ".join(f"{escape_markup(k)}: *n* = {v}" for k, v in counts.items()) + ")"
        s += "."
        contrasts = ordered_unique(values["contrast"].map(text))
        s += f" Contrasts: {escape_markup(', '.join(contrasts))}."
    else:
        s = ""
    excluded = ordered_unique(i for v in col(results, "excluded_ids") for i in ids(v))
    if excluded:
        s += (f" {len(excluded)} participant{'s' if len(excluded) > 1 else ''} "
              f"({escape_markup(', '.join(excluded))}) lacked a value in at least one region and "
              f"{'were' if len(excluded) > 1 else 'was'} left out of that region's tests only.")
    elif values is not None:
        s += " No participant was excluded."
    if s:
        paragraphs.append(s.strip())
    # regions and extraction
    region_sentences = _region_sentences(prov, values)
    statistic = _STATISTICS.get(str(prov.get("statistic", "mean")), escape_markup(str(prov.get("statistic", "mean"))))
    keep_zeros = flag(prov.get("keep_zeros"))
    rule = ("voxels with non-finite values" + ("" if keep_zeros else " or exactly zero") +
            " were treated as missing")
    extraction = (f"Each participant's value in a region was {statistic} of the first-level contrast estimates over "
                  f"the region's valid voxels ({rule}); a participant without any valid voxel has a missing value. "
                  "Coverage is the share of the region's voxels that were valid.")
    if not prov:
        extraction += " (The extraction settings were not recorded with the values table; the defaults are assumed.)"
    paragraphs.append(" ".join(region_sentences + [extraction]))
    # designs
    for key, rows in split_analyses(results):
        paragraphs.append(_design_sentence(key, rows))
    effect_types = ordered_unique(text(v) for v in col(results, "effect_size_type") if text(v))
    if effect_types:
        defs = {"d": "*d* = *M*/*SD*", "d_z": "*d*_{z} = mean difference/*SD* of the differences",
                "g": "Hedges' *g* with the exact small-sample correction (Hedges, 1981)",
                "partial_eta2": "partial *η*^{2}"}
        s = "Effect sizes: " + "; ".join(defs.get(t, escape_markup(t)) for t in effect_types)
        if any(t in ("d", "d_z", "g") for t in effect_types):
            s += "; confidence intervals for *d*, *d*_{z} and *g* invert the noncentral *t* distribution " \
                 "(Steiger & Fouladi, 1997)"
        paragraphs.append(s + ".")
    versions = dict(prov.get("versions", {}) or {})
    versions.update({k: v for k, v in software_versions().items() if k not in versions})
    if prov.get("roikit_version"):
        versions["roikit (extraction)"] = prov["roikit_version"]
    paragraphs.append("Software: " + ", ".join(f"{escape_markup(k)} {escape_markup(str(v))}"
                                               for k, v in versions.items()) + ".")
    return _join(paragraphs, style)


def _join(paragraphs: Sequence[str], style: Style) -> str:
    if style == "html":
        return "\n".join(f"<p>{render(p, 'html')}</p>" for p in paragraphs) + "\n"
    return "\n\n".join(render(p, style) for p in paragraphs) + "\n"


# --------------------------------------------------------------------------------------------- results
def _primary_correction(rows: pd.DataFrame) -> str | None:
    for cell in col(rows, "correction"):
        for m in ids(cell):
            if has_values(rows, f"p_{m}"):
                return m
    for m in ("holm", "fdr", "fwe"):
        if has_values(rows, f"p_{m}"):
            return m
    return None


def results_text(results: pd.DataFrame, *, style: Style = "markdown", alpha: float = 0.05) -> str:
    """One APA results paragraph per analysis, each region's test in words and numbers.

    Each region gets its in-text string (estimate and CI, statistic, *p*, the primary adjusted *p* and the
    effect size with its CI); the paragraph ends with which regions survive the correction at ``alpha``.
    """
    check_columns(results, REQUIRED_RESULTS, "results table")
    paragraphs = []
    for key, rows in split_analyses(results):
        corr = _primary_correction(rows)
        heading = escape_markup(analysis_title(key))
        parts = []
        for term in ordered_unique(rows["term"].map(text)):
            part = rows[rows["term"].map(text) == term]
            lead = f"Term {escape_markup(term)}: " if rows["term"].map(text).nunique() > 1 else ""
            items = [f"{escape_markup(text(r['region']))}, {in_text(r, style='markup', estimate=True, correction=corr)}"
                     for _, r in part.iterrows()]
            pcol = f"p_{corr}" if corr else "p"
            surv = [text(r["region"]) for _, r in part.iterrows() if number(r.get(pcol)) < alpha]
            name = {"holm": "Holm", "fdr": "FDR", "fwe": "FWE"}.get(corr or "", "")
            if corr:
                verdict = (f"After {name} correction across the {len(part)} regions, "
                           + (f"{escape_markup(', '.join(surv))} {'remains' if len(surv) == 1 else 'remain'} "
                              f"significant at α = {format_number(alpha, 2, leading_zero=False)}."
                              if surv else "no region remains significant at α = "
                              f"{format_number(alpha, 2, leading_zero=False)}."))
            else:
                verdict = "These *p* values are uncorrected."
            parts.append(lead + "; ".join(items) + ". " + verdict)
        paragraphs.append(f"*{heading}.* " + " ".join(parts))
    return _join(paragraphs, style)


# --------------------------------------------------------------------------------------------- assumptions
def assumptions(results: pd.DataFrame) -> list[str]:
    """What each design used here assumes, with the diagnostics that speak to it (markup sentences)."""
    check_columns(results, REQUIRED_RESULTS, "results table")
    designs = ordered_unique(results["design"].map(text))
    out = ["All designs assume that participants are independent of one another and that the first-level "
           "contrast maps are in the same space and units for everyone."]
    text_by = {
        "one-sample": "One-sample *t*-tests assume the region values are roughly normal across participants "
                      "(Shapiro–Wilk *W* is reported in the results table; with *n* ≥ 30 the test is robust to "
                      "moderate skew) and test whether the population mean is zero.",
        "paired": "Paired *t*-tests assume the within-participant differences are roughly normal across "
                  "participants (Shapiro–Wilk on the differences is reported).",
        "two-group": "Two-group *t*-tests assume roughly normal values within each group; Student's test also "
                     "assumes equal variances (Brown–Forsythe *p* is reported), Welch's does not.",
        "glm": "The general linear model assumes a linear relation to each covariate, normal residuals with equal "
               "variance, and no participant dominating the fit (maximum leverage and Cook's distance are "
               "reported).",
        "precision-weighted": "The precision-weighted model treats the first-level variances as known; roikit's "
                              "region variance is the mean voxel variance, an upper bound on the variance of the "
                              "region mean under positive spatial correlation, so weights are conservative.",
        "mixed": "The mixed model assumes normal random effects and residuals; a fit that did not converge or "
                 "that sits on the boundary (a variance of zero) is flagged.",
        "fixed-effects": "The fixed-effects combination ignores between-participant variability; it makes no claim "
                         "beyond these participants.",
    }
    out += [text_by[d] for d in designs if d in text_by]
    return out
