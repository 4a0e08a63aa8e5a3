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
    REQUIRED_RESULTS,
    REQUIRED_VALUES,
    Labels,
    analysis_title,
    check_columns,
    col,
    compress_labels,
    count,
    family_size,
    flag,
    has_values,
    ids,
    is_intercept,
    join_words,
    number,
    ordered_unique,
    primary_correction,
    split_analyses,
    term_label,
    text,
)
from .format import (
    Style,
    corrected_p_symbol,
    correction_name,
    escape_markup,
    format_df,
    effect_symbol,
    format_number,
    format_p,
    in_text,
    is_missing,
    render,
)
from .power import sensitivity_sentence
from .tables import _format_bf
from .references import Citations, reference_list

__all__ = [
    "SCOPE_STATEMENT",
    "methods_text",
    "methods_parts",
    "results_text",
    "results_parts",
    "cautions",
    "caution_lines",
    "caution_details",
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


# --------------------------------------------------------------------------------------------- helpers
_NBSP = "\u00a0"


def _nbsp(markup: str) -> str:
    """Non-breaking spaces around ``=``, ``<`` and ``>`` (a statistic never splits across lines)."""
    for op in ("=", "<", ">", "≥", "≤"):
        markup = markup.replace(f" {op} ", f"{_NBSP}{op}{_NBSP}")
    return markup


def _analysis_number(rows: pd.DataFrame, fallback: int) -> int:
    a = [number(v) for v in col(rows, "analysis")]
    a = [v for v in a if np.isfinite(v)]
    return int(a[0]) if a else fallback


def _numbered(results: pd.DataFrame) -> list[tuple[int, dict, pd.DataFrame]]:
    return [(_analysis_number(rows, i), key, rows) for i, (key, rows) in enumerate(split_analyses(results), start=1)]


def _ranges(numbers: Sequence[int]) -> str:
    """``[1, 2, 3, 5] -> "1–3 and 5"``."""
    numbers = sorted(set(int(n) for n in numbers))
    parts, i = [], 0
    while i < len(numbers):
        j = i
        while j + 1 < len(numbers) and numbers[j + 1] == numbers[j] + 1:
            j += 1
        parts.append(f"{numbers[i]}–{numbers[j]}" if j - i >= 2 else ", ".join(map(str, numbers[i:j + 1])))
        i = j + 1
    return join_words(", ".join(parts).split(", "))


def _analyses_phrase(numbers: Sequence[int], total: int) -> str:
    if len(set(numbers)) == total and total > 1:
        return "In every analysis"
    if len(set(numbers)) == 1:
        return f"In analysis {numbers[0]}"
    return f"In analyses {_ranges(numbers)}"


def _cap(s: str) -> str:
    return s[:1].upper() + s[1:] if s else s


def _contrast_label(name: str, labels: Labels) -> str:
    return escape_markup(labels.level("contrast", name))


def _analysed_contrasts(results: pd.DataFrame) -> list[str]:
    out: list[str] = []
    for a, b in zip(col(results, "contrast"), col(results, "versus")):  # each analysis's contrast, then versus
        out += [c.strip() for v in (a, b) for c in text(v).split(",") if c.strip()]
    return ordered_unique(out)


def _design_short(design: str) -> str:
    return {"one-sample": "one-sample t-tests", "paired": "paired t-tests", "two-group": "two-group comparison",
            "glm": "general linear model", "precision-weighted": "precision-weighted model",
            "mixed": "mixed-effects model", "fixed-effects": "fixed-effects combination",
            "repeated-measures": "repeated-measures ANOVA",
            "region-difference": "region difference"}.get(design, design)


# --------------------------------------------------------------------------------------------- cautions
def _who_regions(regions: list[str]) -> str:
    shown = f" ({join_words(regions)})" if len(regions) <= 2 else ""
    return count(len(regions), "region") + shown


def caution_details(results: pd.DataFrame) -> pd.DataFrame:
    """Every participant-level flag of the results, one row per participant x problem x region.

    Returns
    -------
    DataFrame
        ``participant_id``, ``problem`` (``robust outlier``, ``low coverage``, ``missing value``), ``region``,
        ``analyses`` (comma-separated analysis numbers).
    """
    check_columns(results, REQUIRED_RESULTS, "results table")
    found: dict[tuple[str, str, str], list[int]] = {}
    for number_, _key, rows in _numbered(results):
        for problem, column in (("robust outlier", "outlier_ids"), ("low coverage", "low_coverage_ids"),
                                ("missing value", "excluded_ids")):
            for region, cell in zip(rows["region"].map(text), col(rows, column)):
                for who in ids(cell):
                    where = found.setdefault((who, problem, region), [])
                    if number_ not in where:
                        where.append(number_)
    rows_out = [{"participant_id": who, "problem": problem, "region": region,
                 "analyses": ",".join(map(str, where))} for (who, problem, region), where in found.items()]
    out = pd.DataFrame(rows_out, columns=["participant_id", "problem", "region", "analyses"])
    order = {"robust outlier": 0, "low coverage": 1, "missing value": 2}
    if len(out):
        out = out.assign(_o=out["problem"].map(order)).sort_values(["participant_id", "_o"], kind="stable")
        out = out.drop(columns="_o").reset_index(drop=True)
    return out


_PROBLEM_TEXT = {
    "robust outlier": ("robust outlier (modified *z* > 3.5)", "kept in the tests; check for artefacts"),
    "low coverage": ("fewer than half of the region's voxels valid", "kept in the tests"),
    "missing value": ("missing value", "left out of those regions' tests only"),
}


def cautions(
    results: pd.DataFrame,
    *,
    provenance: dict | None = None,
    circular: Iterable[str] | None = None,
) -> list[dict[str, str]]:
    """Cautions that apply to these results, each one short line: ``{"kind", "text"}`` (text in markup).

    One line per problem and participant (``sub-25: robust outlier (modified z > 3.5) in 6 regions, 5 analyses;
    kept in the tests``), one per analysis for model problems; :func:`caution_details` lists every region.
    Kinds: ``circular``, ``uncorrected`` (a family of several regions reported without correction),
    ``region-comparison`` (t results of several regions shown side by side: a difference between regions needs
    the region-difference test),
    ``fixed-effects`` (no population inference), ``non-convergence``, ``boundary``, ``outliers``,
    ``low-coverage``, ``excluded`` (missing values). Each dict also has ``participant`` (or ``""``).
    """
    check_columns(results, REQUIRED_RESULTS, "results table")
    out: list[dict[str, str]] = []
    circ = circular_regions(provenance, circular)
    tested = set(results["region"].map(text))
    circ_tested = [c for c in circ if c in tested] or circ
    if circ_tested:
        out.append({"kind": "circular", "participant": "", "text": (
            f"Circular region definition: {escape_markup(join_words(circ_tested))} "
            f"{'was' if len(circ_tested) == 1 else 'were'} defined from the same data that are tested; read "
            f"{'its' if len(circ_tested) == 1 else 'their'} results as descriptive or confirm them in independent "
            "data (Kriegeskorte et al., 2009)."), "cites": "kriegeskorte2009"})
    numbered = _numbered(results)
    for number_, key, rows in numbered:
        name = f"Analysis {number_} ({_design_short(key.get('design', ''))})"
        uncorrected = []
        for term in ordered_unique(rows["term"].map(text)):
            part = rows[rows["term"].map(text) == term]
            if primary_correction(part) == "none" and family_size(part) > 1:
                uncorrected.append(family_size(part))
        if uncorrected:
            k = max(uncorrected)
            out.append({"kind": "uncorrected", "participant": "", "text": (
                f"{name}: {count(k, 'region')} reported without correction for multiple comparisons; about "
                f"{format_number(0.05 * k, 2)} false positives are expected at α = .05 when no region has an "
                "effect.")})
        if any(flag(v) is False for v in col(rows, "population_inference")) or key.get("design") == "fixed-effects":
            n = ordered_unique(col(rows, "n"))
            n_text = f"these {format_df(n[0])} participants" if len(n) == 1 else "these participants"
            out.append({"kind": "fixed-effects", "participant": "", "text": (
                f"{name}: fixed effects describe {n_text} only; no inference about the population.")})
        bad = ordered_unique(r for r, c in zip(rows["region"].map(text), col(rows, "converged")) if flag(c) is False)
        if bad:
            out.append({"kind": "non-convergence", "participant": "", "text": (
                f"{name}: the fit did not converge in {escape_markup(_who_regions(bad))}; its estimates are "
                "unreliable.")})
        edge = ordered_unique(r for r, c in zip(rows["region"].map(text), col(rows, "boundary")) if flag(c) is True)
        if edge:
            terms = ordered_unique(t for v in col(rows, "boundary_terms") for t in ids(v))
            what = (f"the variance of {join_words(_component_name(t, rows) for t in terms)}" if terms
                    else "the between-participant variance *τ*^{2}" if key.get("design") == "precision-weighted"
                    else "a variance component")
            out.append({"kind": "boundary", "participant": "", "text": (
                f"{name}: {what} estimated at zero in {escape_markup(_who_regions(edge))}; a singular fit, so the "
                "model reduces to a simpler one there.")})
    side_by_side = [n for n, key, rows in numbered if key.get("design") != "region-difference"
                    and "t" in set(rows["statistic_type"].map(text))
                    and any(len(ordered_unique(part["region"].map(text))) > 1
                            for _, part in rows.groupby(rows["term"].map(text), sort=False))]
    if side_by_side:
        tested = [n for n, key, _rows in numbered if key.get("design") == "region-difference"]
        where = (f"as analysis {_ranges(tested)} does" if len(tested) == 1 else
                 f"as analyses {_ranges(tested)} do" if tested else "with the region-difference design")
        out.append({"kind": "region-comparison", "participant": "", "text": (
            f"{'Analysis ' + str(side_by_side[0]) + ' shows' if len(side_by_side) == 1 else 'Analyses ' + _ranges(side_by_side) + ' show'} "
            "regions side by side; significant in one, not in another, is not a difference (Gelman & Stern, 2006; "
            f"Nieuwenhuis et al., 2011): test it {where}."),
            "cites": "gelman2006,nieuwenhuis2011"})
    details = caution_details(results)
    kinds = {"robust outlier": "outliers", "low coverage": "low-coverage", "missing value": "excluded"}
    for (who, problem), part in details.groupby(["participant_id", "problem"], sort=False):
        regions = ordered_unique(part["region"])
        analyses = ordered_unique(a for cell in part["analyses"] for a in ids(cell))
        what, then = _PROBLEM_TEXT[problem]
        out.append({"kind": kinds[problem], "participant": who, "text": (
            f"{escape_markup(who)}: {what} in {escape_markup(_who_regions(regions))}, "
            f"{count(len(analyses), 'analysis', 'analyses')}; {then}.")})
    return out


def caution_lines(
    results: pd.DataFrame,
    *,
    provenance: dict | None = None,
    circular: Iterable[str] | None = None,
    style: Style = "plain",
) -> list[str]:
    """The cautions as short lines, ready for stderr (``style="plain"``) or a report (any style).

    This is the aggregation the report and the command line share: one line per problem and participant
    (``sub-25: robust outlier (modified z > 3.5) in 6 regions, 5 analyses; kept in the tests; check for
    artefacts.``) and one per analysis for model problems; details per region are in :func:`caution_details`.
    """
    return [render(c["text"], style) for c in cautions(results, provenance=provenance, circular=circular)]


# --------------------------------------------------------------------------------------------- methods
def _file_name(path) -> str:
    """The file name as the user knows it (folders dropped: methods text names files, not machines)."""
    from pathlib import PurePath

    return PurePath(str(path)).name if path else ""


def _voxel_size(prov: dict) -> str:
    grid = prov.get("grid") if isinstance(prov.get("grid"), dict) else {}
    affine = grid.get("affine")
    try:
        a = np.asarray(affine, dtype=float)[:3, :3]
        sizes = np.sqrt((a ** 2).sum(axis=0))
    except (TypeError, ValueError, IndexError):
        return ""
    if not np.all(np.isfinite(sizes)) or sizes.size != 3:
        return ""
    if np.allclose(sizes, sizes[0], atol=1e-3):
        return f"{format_number(sizes[0], 1).rstrip('0').rstrip('.')} mm isotropic voxels"
    return " × ".join(format_number(v, 1).rstrip("0").rstrip(".") for v in sizes) + " mm voxels"


def _voxels(n: Any) -> str:
    return count(int(n), "voxel") if not is_missing(n) and np.isfinite(number(n)) else ""


def _region_sentences(prov: dict, values: pd.DataFrame | None, cite: Citations) -> list[str]:
    voxels: dict[str, int] = {}
    if values is not None and "n_voxels" in values.columns:
        for region, part in values.groupby("region", sort=False, observed=True):
            nv = pd.to_numeric(part["n_voxels"], errors="coerce").dropna()
            if len(nv):
                voxels[str(region)] = int(nv.median())
    records = [r for r in prov.get("regions", []) or [] if isinstance(r, dict)]
    size = _voxel_size(prov)
    groups: dict[tuple, dict] = {}
    for rec in records:
        name = str(rec.get("region", rec.get("name", "")))
        src = rec.get("source") if isinstance(rec.get("source"), dict) else rec
        kind = str(src.get("kind", rec.get("kind", "region")))
        n = rec.get("n_voxels", voxels.get(name))
        if kind == "atlas":
            gkey = ("atlas", str(src.get("image", "")), str(src.get("labels", "")))
        elif kind == "probability":
            gkey = ("probability", str(src.get("image", "")), str(src.get("threshold", "")))
        else:
            gkey = (kind, name)
        g = groups.setdefault(gkey, {"kind": kind, "src": src, "items": []})
        g["items"].append((name, n))
    out = []
    for gkey, g in groups.items():
        src, kind = g["src"], g["kind"]
        space = src.get("space")
        where = f"in {escape_markup(str(space))} space" if space else "on the maps' grid"
        ref = f" ({escape_markup(str(src['citation']))})" if src.get("citation") else ""
        items = [f"{escape_markup(n)} ({_voxels(v)})" if _voxels(v) else escape_markup(n) for n, v in g["items"]]
        k = len(g["items"])
        if kind == "atlas":
            out.append(f"{_cap(count(k, 'region', words=True))} came from the atlas image "
                       f"{escape_markup(_file_name(src.get('image')))}{ref} with its label table "
                       f"{escape_markup(_file_name(src.get('labels')))}, {where}: {join_words(items)}.")
        elif kind == "sphere":
            c = src.get("center_mm", src.get("center"))
            r = src.get("radius_mm", src.get("radius"))
            shape = (f"a sphere of radius {format_number(r, 1).rstrip('0').rstrip('.')} mm centred at "
                     f"({', '.join(format_number(v, 1).rstrip('0').rstrip('.') for v in c)}) mm"
                     if c is not None and r is not None else "a sphere")
            world = f"{escape_markup(str(space))} coordinates" if space else "the maps' world coordinates"
            n = _voxels(g["items"][0][1])
            out.append(f"The region {escape_markup(g['items'][0][0])}{f' ({n})' if n else ''} was {shape} in "
                       f"{world}{ref}.")
        elif kind == "mask":
            n = _voxels(g["items"][0][1])
            out.append(f"The region {escape_markup(g['items'][0][0])} was the mask image "
                       f"{escape_markup(_file_name(src.get('image')))}{ref}, {where}{', ' + n if n else ''}.")
        elif kind == "probability":
            thr = src.get("threshold")
            out.append(f"{_cap(count(k, 'region', words=True))} came from the probability map "
                       f"{escape_markup(_file_name(src.get('image')))}{ref}, {where}, thresholded at "
                       f"{escape_markup(str(thr))}: {join_words(items)}.")
        else:
            out.append(f"{_cap(count(k, 'region', words=True))} were derived ({escape_markup(kind)}): "
                       f"{join_words(items)}.")
    out += _functional_sentences(prov, values, cite)
    if not records and voxels:
        out.append("The regions had " + join_words(f"{escape_markup(r)} ({count(n, 'voxel')})"
                                                   for r, n in voxels.items())
                   + " on the maps' grid (how they were defined was not recorded with the values table).")
    if size:
        out.append(f"The maps' grid had {size}.")
    for rec in prov.get("resampling", []) or []:
        if isinstance(rec, dict):
            what = escape_markup(str(rec.get("what", rec.get("region", "region image"))))
            image = escape_markup(_file_name(rec.get("image", "")))
            out.append(f"The {what} image {image} was resampled onto the maps' grid by nearest-neighbour "
                       "interpolation.".replace("  ", " "))
    return out


def _functional_sentences(prov: dict, values: pd.DataFrame | None, cite: Citations) -> list[str]:
    """Methods sentences for participant-specific functional regions (``provenance["functional"]``)."""
    info = prov.get("functional") if isinstance(prov.get("functional"), dict) else {}
    out = []
    for rec in info.get("regions", []) or []:
        if not isinstance(rec, dict):
            continue
        name = str(rec.get("name", ""))
        within, localiser = escape_markup(str(rec.get("within", ""))), escape_markup(str(rec.get("localiser", "")))
        if rec.get("threshold") is not None:
            how = f"the voxels whose {localiser} value exceeded {escape_markup(str(rec['threshold']))}"
        elif isinstance(rec.get("top"), str):
            how = f"the {escape_markup(rec['top'].strip())} of its valid voxels with the largest {localiser} values"
        else:
            how = f"the {rec.get('top')} voxels with the largest {localiser} values"
        s = (f"The functional region {escape_markup(name)} was defined for each participant within {within}, from "
             f"that participant's own maps: {how} (ties went to the voxel with the smaller index)")
        if values is not None and {"region", "n_voxels"} <= set(values.columns):
            nv = pd.to_numeric(values.loc[values["region"].astype(str) == name, "n_voxels"], errors="coerce").dropna()
            if len(nv):
                s += (f"; the selections held {format_number(float(nv.median()), 0)} voxels at the median "
                      f"(range {int(nv.min())}–{int(nv.max())})")
        if rec.get("split") == "run":
            combined = "precision-weighted mean" if str(info.get("localiser_runs_combined_by", "")).startswith(
                "precision") else "mean"
            trained = {len(fold.get("train_runs") or []) for sel in info.get("selections", []) or []
                       if isinstance(sel, dict) and sel.get("region") == name
                       for fold in sel.get("folds", []) or [] if isinstance(fold, dict)}
            source = (f"the {combined} localiser map of all runs but one" if trained != {1}
                      else "the localiser map of the other run")  # two runs: one run trains, the other is measured
            s += (f". Voxels were selected on {source} and the tested contrast was "
                  "measured on the held-out run; each participant's value was the mean over the held-out runs, so "
                  f"selection and measurement used independent data ({cite.cite('kriegeskorte2009')}).")
        else:
            s += (". Selection and measurement used the same runs, so the values of this region are not independent "
                  f"of its definition ({cite.cite('kriegeskorte2009')}).")
        out.append(s)
    return out


_DF_TEXT = {
    "student": "Student's *t* distribution",
    "welch": "Welch–Satterthwaite degrees of freedom",
    "residual": "the model's residual degrees of freedom",
    "knapp-hartung": "the Knapp–Hartung adjustment",
    "knha": "the Knapp–Hartung adjustment",
    "knha-truncated": "the Knapp–Hartung adjustment with its scaling factor truncated below at 1",
    "knapp-hartung-truncated": "the Knapp–Hartung adjustment with its scaling factor truncated below at 1",
    "z": "the standard normal distribution",
    "satterthwaite": "Satterthwaite degrees of freedom",
    "kenward-roger": "Kenward–Roger degrees of freedom",
}
_TAU2_TEXT = {"reml": ("restricted maximum likelihood", "viechtbauer2005"),
              "ml": ("maximum likelihood", "viechtbauer2005"),
              "dl": ("the DerSimonian–Laird estimator", "dersimonian1986"),
              "pm": ("the Paule–Mandel estimator", "paule1982")}


def _df_phrase(rows: pd.DataFrame, cite: Citations) -> str:
    parts = []
    tests = ordered_unique(text(v).lower() for v in col(rows, "test") if text(v))
    methods = ordered_unique(text(v).lower() for v in col(rows, "df_method") if text(v))
    if tests and all(m.startswith("kn") for m in methods):  # precision-weighted: the test column is more precise
        methods = tests
    for m in methods:
        phrase = _DF_TEXT.get(m, escape_markup(m))
        if m in ("welch",):
            phrase += f" ({cite.cite('welch1947', 'satterthwaite1946')})"
        elif m == "satterthwaite":
            phrase += f" ({cite.cite('satterthwaite1946')})"
        elif m.startswith("kn"):
            phrase += f" ({cite.cite('knapp2003')})"
        parts.append(phrase)
    return join_words(parts)


def _predictors(formula: str, rows: pd.DataFrame, key: dict, labels: Labels,
                participants: pd.DataFrame | None) -> str:
    terms = [t for t in ordered_unique(rows["term"].map(text)) if not is_intercept(t)]
    names = [term_label(t, key, labels, participants, terms) for t in terms]
    return join_words(escape_markup(n) for n in names) if names else "an intercept only"


def _component_name(column: str, rows: pd.DataFrame, labels: Labels | None = None) -> str:
    """A variance-component column (``sd_participant``, ``sd_participant_load``, ``sd_town``) in words."""
    labels = labels or Labels()
    column = str(column)
    if not column.startswith("sd_"):
        return escape_markup(column)
    rest = column[3:]
    if rest == "participant":
        return "the by-participant intercept"
    if rest == "residual":
        return "the residual"
    if rest.startswith("participant_"):
        return f"the by-participant slope of {escape_markup(labels.variable(rest[len('participant_'):]))}"
    kind = "nested" if rest in {text(v) for v in col(rows, "nested")} else "crossed"
    inside = " within participant" if kind == "nested" else ""
    return f"the {kind} intercept for {escape_markup(labels.variable(rest))}{inside}"


def _random_phrase(rows: pd.DataFrame, labels: Labels) -> str:
    parts = []
    for cell in ordered_unique(text(v) for v in col(rows, "random") if text(v)):
        bits = [b.strip() for b in cell.replace("-", "+").split("+") if b.strip()]
        if "0" not in bits:
            parts.append("a by-participant intercept")
        for b in bits:
            if b not in ("0", "1"):
                parts.append(f"a by-participant slope of {escape_markup(labels.variable(b))}")
    if not parts and "sd_participant" in rows.columns:
        parts.append("a by-participant intercept")
    for column, what in (("crossed", "crossed"), ("nested", "nested")):
        for cell in ordered_unique(text(v) for v in col(rows, column) if text(v)):
            for c in ids(cell):
                inside = " within participant" if what == "nested" else ""
                parts.append(f"a {what} intercept for {escape_markup(labels.variable(c))}{inside}")
    s = join_words(parts)
    corr = [c for c in rows.columns if c.startswith("corr_participant_") and has_values(rows, c)]
    if corr:
        slopes = [escape_markup(labels.variable(c[len("corr_participant_"):])) for c in corr]
        r = pd.to_numeric(pd.concat([rows[c] for c in corr]), errors="coerce").dropna()
        rng = (f"; across regions *r* ranged from {format_number(r.min(), 2, leading_zero=False)} to "
               f"{format_number(r.max(), 2, leading_zero=False)}" if len(r) else "")
        s += (f", with the correlation between the by-participant intercept and slope of {join_words(slopes)} "
              f"estimated{rng}")
    return s


def _design_sentence(number_: int, key: dict, rows: pd.DataFrame, labels: Labels,
                     participants: pd.DataFrame | None, cite: Citations) -> str:
    design = key.get("design", "")
    contrast = _contrast_label(key.get("contrast", ""), labels) if key.get("contrast") else ""
    contrasts = [c for c in text(key.get("contrast")).split(",") if c]
    df = _df_phrase(rows, cite)
    lead = f"Analysis {number_}"
    formula = key.get("formula", "")
    if design == "one-sample":
        s = (f"{lead} tested the mean {contrast} value against zero in each region with one-sample *t*-tests "
             "(*df* = *n* − 1)")
    elif design == "paired":
        s = (f"{lead} compared {contrast} with {_contrast_label(key.get('versus', ''), labels)} within participants "
             "with paired *t*-tests, one-sample tests of each participant's difference (*df* = *n* − 1)")
    elif design == "two-group":
        g = key.get("group_column", "")
        levels = [labels.level(g, lv) for lv in key.get("levels", "").split(",") if lv]
        gname = labels.description(g) or labels.variable(g)
        welch = "welch" in [text(m).lower() for m in col(rows, "df_method")]
        test = "Welch's unequal-variance *t*-tests" if welch else "Student's two-sample *t*-tests (pooled variance)"
        s = (f"{lead} compared {escape_markup(join_words(levels))} participants ({escape_markup(gname)}) on "
             f"{contrast} with {test}")
        if welch:
            s += f" and Welch–Satterthwaite degrees of freedom ({cite.cite('welch1947', 'satterthwaite1946')})"
        if has_values(rows, "brown_forsythe_p"):
            s += f"; the Brown–Forsythe test ({cite.cite('brown1974')}) checked the equality of variances"
        df = ""
    elif design == "glm":
        centred = [escape_markup(labels.variable(c)) for v in col(rows, "centered") for c in ids(v)]
        centred = ordered_unique(centred)
        s = (f"{lead} regressed the {contrast} values of each region on "
             f"{_predictors(formula, rows, key, labels, participants)} by ordinary least squares")
        if centred:
            s += f" ({join_words(centred)} mean-centred)"
        s += ", testing each coefficient with a *t* test on the residual degrees of freedom"
        df = ""
    elif design == "precision-weighted":
        tau = ordered_unique(text(v).lower() for v in col(rows, "tau2_method") if text(v)) or ["reml"]
        est = join_words(f"{_TAU2_TEXT[t][0]} ({cite.cite(_TAU2_TEXT[t][1])})" if t in _TAU2_TEXT
                         else escape_markup(t) for t in tau)
        s = (f"{lead} combined the {contrast} values of each region in a precision-weighted random-effects model, "
             "weighting each participant by 1/(*v*_{i} + *τ*^{2}), where *v*_{i} is the participant's first-level "
             f"sampling variance and *τ*^{{2}} the between-participant variance, estimated by {est}")
        if formula and [t for t in rows["term"].map(text) if t not in ("mean",) and not is_intercept(t)]:
            s += f", with {_predictors(formula, rows, key, labels, participants)} as moderators"
    elif design == "mixed":
        est = ordered_unique(text(v).lower() for v in col(rows, "estimation") if text(v)) or ["reml"]
        how = "restricted maximum likelihood (REML)" if est[0] == "reml" else "maximum likelihood"
        what = (f"the {escape_markup(join_words(compress_labels([labels.level('contrast', c) for c in contrasts])))} values"
                if contrasts else "the values")
        s = (f"{lead} fitted a linear mixed-effects model to {what} of each region by {how}, with "
             f"{_predictors(formula, rows, key, labels, participants)} as fixed "
             f"{'effect' if len([t for t in ordered_unique(rows['term'].map(text)) if not is_intercept(t)]) == 1 else 'effects'}"
             f" and, as random effects, {_random_phrase(rows, labels)}")
    elif design == "repeated-measures":
        effects = [escape_markup(term_label(t, key, labels, participants, [])) for t in
                   ordered_unique(rows["term"].map(text))]
        what = (f"the {escape_markup(join_words(compress_labels([labels.level('contrast', c) for c in contrasts])))} "
                "values" if contrasts else "the values")
        within = ordered_unique(f for v in col(rows, "within") for f in text(v).split(",") if f)
        between = ordered_unique(text(v) for v in col(rows, "group_column") if text(v))
        factors = (f" with {escape_markup(join_words([labels.variable(f) for f in within]))} within participants"
                   + (f" and {escape_markup(labels.variable(between[0]))} between them" if between else "")
                   if within else "")
        s = (f"{lead} tested {join_words(effects)} in a repeated-measures analysis of variance of {what} of each "
             f"region{factors} (participants as the random factor; complete cases only)")
        checks = []
        if has_values(rows, "mauchly_p"):
            checks.append(f"sphericity was checked with Mauchly's test ({cite.cite('mauchly1940')})")
        if has_values(rows, "p_gg"):
            checks.append("*p* values were also computed with the Greenhouse–Geisser "
                          f"({cite.cite('greenhouse1959')}) and Huynh–Feldt ({cite.cite('huynh1976')}) corrections "
                          "of the degrees of freedom" if has_values(rows, "p_hf") else
                          f"*p* values were also computed with the Greenhouse–Geisser correction "
                          f"({cite.cite('greenhouse1959')})")
        if has_values(rows, "generalized_eta2"):
            checks.append(f"generalized *η*^{{2}} ({cite.cite('olejnik2003')}) is reported beside partial *η*^{{2}}")
        if checks:
            s += "; " + "; ".join(checks)
        df = ""
    elif design == "region-difference":
        pairs = [escape_markup(t.replace(" - ", " − ")) for t in ordered_unique(rows["term"].map(text))]
        s = (f"{lead} compared regions within participants ({join_words(pairs)}) on {contrast} with paired *t*-tests "
             "of each participant's difference between the two regions")
        df = ""
    elif design == "fixed-effects":
        s = (f"For comparison only, analysis {number_} combined the {contrast} values in a fixed-effects "
             "(inverse-variance) model that treats the participants as fixed; it describes these participants "
             "only and makes no inference about the population")
    else:
        s = f"{lead} applied the {escape_markup(design)} design to the {contrast or 'region'} values"
    if has_values(rows, "bf10"):
        scale = ordered_unique(number(v) for v in col(rows, "prior_scale") if np.isfinite(number(v)))
        s += (f"; JZS Bayes factors *BF*_{{10}} ({cite.cite('rouder2009')}) used a Cauchy prior on the standardised "
              f"effect with scale *r* = {format_number(scale[0], 3, leading_zero=False) if scale else '.707'} and "
              f"are classified on the scale of {cite.year('jeffreys1961')} as adapted by {cite.year('lee2013')}")
    if has_values(rows, "p_equivalence"):
        bound = ordered_unique(number(v) for v in col(rows, "equivalence_bound") if np.isfinite(number(v)))
        s += (f"; equivalence was tested with two one-sided tests ({cite.cite('schuirmann1987', 'lakens2017')}) against "
              f"±{format_number(bound[0], 2) if bound else 'the bound'} in standardised effect-size units")
    if df and design in ("precision-weighted", "fixed-effects"):
        s += f"; the test used {df}"
    elif df and design == "mixed":
        s += f"; fixed effects were tested with {df}"
    elif df and design not in ("one-sample", "paired", "two-group", "glm"):
        s += f"; the reference distribution was {df}"
    sensitivity = sensitivity_sentence(rows)  # the smallest effect detectable with 80% power (t designs)
    return f"{s}. {sensitivity}" if sensitivity else s + "."


def _correction_phrase(method: str, rows: pd.DataFrame, cite: Citations) -> str:
    if method == "holm":
        return f"Holm's step-down method ({cite.cite('holm1979')})"
    if method == "fdr":
        return f"the Benjamini–Hochberg false discovery rate procedure ({cite.cite('benjamini1995')})"
    if method == "bonferroni":
        return f"the Bonferroni method ({cite.cite('dunn1961')})"
    if method == "fwe":
        perms = ordered_unique(int(number(v)) for v in col(rows, "permutations") if number(v) > 0)
        schemes = ordered_unique(text(v) for v in col(rows, "permutation_scheme") if text(v))
        exact = any(flag(v) is True for v in col(rows, "permutation_exact"))
        seeds = ordered_unique(text(v) for v in col(rows, "seed") if text(v) and text(v) != "generator")
        detail = []
        if perms:
            detail.append(("all " if exact else "") + f"{perms[0]:,} {escape_markup(schemes[0]) + ' ' if schemes else ''}"
                          f"permutation{'s' if perms[0] != 1 else ''}")
        if seeds and not exact:
            detail.append(f"random seed {escape_markup(seeds[0])}" if len(seeds[0]) <= 10 else
                          "random seed recorded in the results table")
        return (f"the maximum-statistic permutation method ({cite.cite('westfall1993')}"
                + (f"; {', '.join(detail)}" if detail else "") + ")")
    return escape_markup(method)


def _correction_sentences(numbered, cite: Citations, override: str | None) -> list[str]:
    """One sentence per correction method (not one per analysis); family sizes per analysis in brackets, and one
    sentence for analyses whose families hold a single region (nothing to adjust)."""
    settings: dict[tuple, list[tuple[int, tuple]]] = {}
    rows_of: dict[tuple, pd.DataFrame] = {}
    for number_, _key, rows in numbered:
        method = primary_correction(rows, override)
        sizes = tuple(sorted({family_size(rows[rows["term"].map(text) == t])
                              for t in ordered_unique(rows["term"].map(text))}))
        perms = tuple(ordered_unique(text(v) for v in col(rows, "permutations"))) if method == "fwe" else ()
        k = (method, perms)
        settings.setdefault(k, []).append((number_, sizes))
        rows_of.setdefault(k, rows)
    total = len(numbered)
    out = []
    also = ordered_unique(m for _n, _k, rows in numbered for m in ("holm", "fdr", "bonferroni")
                          if has_values(rows, f"p_{m}") and m not in [k[0] for k in settings])
    single: list[int] = []
    for (method, perms), items in settings.items():
        multi = [(n, sz) for n, sz in items if sz != (1,)]
        single += [n for n, sz in items if sz == (1,)]
        if not multi:
            continue
        numbers = [n for n, _ in multi]
        where = _analyses_phrase(numbers, total) if total > 1 else ""
        lead = f"{where}, *p* values" if where else "The *p* values"
        by_size: dict[tuple, list[int]] = {}
        for n, sz in multi:
            by_size.setdefault(sz, []).append(n)

        def fam_of(sz: tuple) -> str:
            return count(sz[0], "region") if len(sz) == 1 else f"{join_words(map(str, sz), 'or')} regions"

        if len(by_size) == 1:
            fam = f"the {fam_of(next(iter(by_size)))} tested for each term"
        else:
            fam = "the regions tested for each term (" + "; ".join(
                f"{fam_of(sz)} in {_analyses_phrase(ns, 0)[3:]}" for sz, ns in by_size.items()) + ")"
        if method == "none":
            held = (f"each family held {fam_of(next(iter(by_size)))}" if len(by_size) == 1 else "families held " +
                    "; ".join(f"{fam_of(sz)} in {_analyses_phrase(ns, 0)[3:]}" for sz, ns in by_size.items()))
            out.append(f"{lead} were not corrected for multiple comparisons (uncorrected; {held}).")
        else:
            out.append(f"{lead} were adjusted across {fam} with "
                       f"{_correction_phrase(method, rows_of[(method, perms)], cite)}.")
    if single:
        numbers = sorted(set(single))
        who = f"Analysis {numbers[0]}" if len(numbers) == 1 else f"Analyses {_ranges(numbers)}"
        out.append(f"{who} tested one region (or one pair of regions) per term, so no adjustment across regions "
                   "applied.")
    if also:
        out.append("The tables also give *p* values adjusted with "
                   + join_words(_correction_phrase(m, numbered[0][2], cite) for m in also) + ".")
    return out


_EFFECT_DEFS = {
    "d": "*d* = *M*/*SD*, the mean divided by the standard deviation across participants",
    "d_z": "*d*_{z} = *M*_{diff}/*SD*_{diff}, the mean within-participant difference divided by the standard "
           "deviation of the differences",
    "g": "Hedges' *g* = *J* × (*M*_{1} − *M*_{2})/*S*_{pooled}, with the exact small-sample factor *J* ({hedges})",
    "partial_eta2": "partial *η*^{2} = *SS*_{effect}/(*SS*_{effect} + *SS*_{error})",
    "d_total": "*d*_{total} = the estimate divided by √(*τ*^{2} + *v̄*), with *v̄* the typical first-level "
               "sampling variance (no interval)",
    "generalized_eta2": "generalized *η*^{2}",
    "d_wkj": "*d*_{WKJ} = the estimate divided by the square root of the sum of the model's variance components "
             "({westfall}; no interval)",
}


def _symbols_sentence(results: pd.DataFrame, cite: Citations, primaries: list[str]) -> str | None:
    rows = results[~results["term"].map(is_intercept)] if len(results) else results
    types = ordered_unique(text(v) for v in col(rows, "effect_size_type") if text(v))
    defs = []
    for t in types:
        d = _EFFECT_DEFS.get(t)
        if d is None:
            continue
        if "{hedges}" in d:
            d = d.replace("{hedges}", cite.cite("hedges1981"))
        if "{westfall}" in d:
            d = d.replace("{westfall}", cite.cite("westfall2014"))
        defs.append(d)
    designs = set(results["design"].map(text))
    symbols = []
    if designs & {"one-sample", "fixed-effects", "precision-weighted"}:
        symbols.append("*M* = mean")
    posthoc = has_values(results, "p_posthoc")
    if designs & {"paired", "two-group", "region-difference"} or posthoc:
        symbols.append("*M*_{diff} = mean difference")
    if designs & {"glm", "mixed", "precision-weighted"} and any(
            not is_intercept(t) and t != "mean" for t in results["term"].map(text)):
        symbols.append("*b* = regression coefficient")
    for m in ordered_unique(primaries):
        if m != "none":
            symbols.append(f"{corrected_p_symbol(m)} = *p* adjusted by the {correction_name(m, long=True)} method"
                           .replace("by the no method", "uncorrected"))
    if posthoc:
        symbols.append("*p*_{pairs} = post-hoc *p* adjusted across a factor's pairs of levels within each region")
    if has_values(results, "bf10"):
        symbols.append("*BF*_{10} = Bayes factor of an effect against none")
    symbols.append("CI = confidence interval")
    s = "Symbols: " + "; ".join(symbols) + "."
    if defs:
        s += " Effect sizes: " + "; ".join(defs)
        if any(t in ("d", "d_z", "g") for t in types) and has_values(rows, "effect_size_ci_low"):
            s += (f". Their confidence intervals invert the noncentral *t* distribution "
                  f"({cite.cite('steiger1997')})")
        s += "."
    return s


def methods_parts(
    values: pd.DataFrame | None,
    results: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    provenance: dict | None = None,
    labels: Labels | dict | None = None,
    correct: str | None = None,
) -> tuple[list[str], list[str]]:
    """The methods paragraphs (markup) and the keys of the works they cite (see :mod:`.references`)."""
    check_columns(results, REQUIRED_RESULTS, "results table")
    if values is not None:
        check_columns(values, REQUIRED_VALUES, "region values table")
    labels = labels if isinstance(labels, Labels) else Labels(labels or {})
    prov = _prov(provenance if provenance is not None else (values.attrs.get("roikit") if values is not None else None))
    cite = Citations()
    numbered = _numbered(results)
    paragraphs: list[str] = []
    # participants, exclusions, contrasts
    s = ""
    analysed = _analysed_contrasts(results)
    if values is not None:
        used = values[values["contrast"].map(text).isin(analysed)] if analysed else values
        ids_all = ordered_unique(used["participant_id"].map(text))
        s = f"Region values were available for {count(len(ids_all), 'participant')}"
        group_cols = ordered_unique(text(v) for v in col(results, "group_column") if text(v))
        if not group_cols and participants is not None:
            group_cols = [c for c in ("group",) if c in participants.columns]
        if participants is not None and group_cols and group_cols[0] in participants.columns:
            gc = group_cols[0]
            sub = participants[participants["participant_id"].astype(str).isin(ids_all)]
            counts = sub[gc].map(text).value_counts(sort=False)
            gname = labels.description(gc) or labels.variable(gc)
            s += (f" ({escape_markup(gname)}: " + "; ".join(
                f"{escape_markup(labels.level(gc, k))}, *n* = {v}" for k, v in counts.items()) + ")")
        s += "."
    details = caution_details(results)
    missing = details[details["problem"] == "missing value"] if len(details) else details
    if len(missing):
        for who, part in missing.groupby("participant_id", sort=False):
            regions = ordered_unique(part["region"])
            reason = "had no valid voxel or no map"
            if values is not None and "n_valid" in values.columns:
                v = values[(values["participant_id"].map(text) == who) & values["region"].map(text).isin(regions)]
                if len(v) and (pd.to_numeric(v["n_valid"], errors="coerce").fillna(0) == 0).all():
                    reason = "had no valid voxel"
            s += (f" {escape_markup(who)} {reason} in {escape_markup(join_words(regions))} and was left out of "
                  f"{'that region’s' if len(regions) == 1 else 'those regions’'} tests only.")
    elif values is not None:
        s += " No participant was excluded from any test."
    if analysed:
        shown = compress_labels([labels.level("contrast", c) for c in analysed])
        s += (f" The analyses used the first-level {'contrast' if len(analysed) == 1 else 'contrasts'} "
              f"{escape_markup(join_words(shown))}.")
    if s:
        paragraphs.append(s.strip())
    # regions and extraction
    region_sentences = _region_sentences(prov, values, cite)
    statistic = _STATISTICS.get(str(prov.get("statistic", "mean")), escape_markup(str(prov.get("statistic", "mean"))))
    keep_zeros = flag(prov.get("keep_zeros"))
    rule = "voxels with non-finite values" + ("" if keep_zeros else " or values of exactly zero")
    extraction = (f"Each participant's value in a region was {statistic} of the first-level contrast estimates over "
                  f"the region's valid voxels; {rule} were treated as missing, and a participant without any valid "
                  "voxel had a missing value for that region.")
    if not prov:
        extraction += " The extraction settings were not recorded with the values table; the defaults are assumed."
    flagged = []
    if "n_outliers" in results.columns or "outlier_ids" in results.columns:
        flagged.append(f"values with a modified *z* score above 3.5 ({cite.cite('iglewicz1993')})")
    if "n_low_coverage" in results.columns or "low_coverage_ids" in results.columns:
        flagged.append("participants with valid data in fewer than half of a region's voxels")
    if flagged:
        extraction += f" In every test, {join_words(flagged)} were flagged and kept in the analysis."
    paragraphs.append(" ".join(region_sentences + [extraction]))
    # designs: one sentence each, then one sentence per correction setting
    designs = [_design_sentence(n, key, rows, labels, participants, cite) for n, key, rows in numbered]
    primaries = [primary_correction(rows, correct) for _, _, rows in numbered]
    paragraphs.append(" ".join(designs + _correction_sentences(numbered, cite, correct)))
    sym = _symbols_sentence(results, cite, primaries)
    if sym:
        paragraphs.append(sym)
    versions = software_versions()
    versions.pop("roikit", None)
    from .. import __version__

    names = {"python": "Python", "numpy": "NumPy", "scipy": "SciPy", "pandas": "pandas",
             "statsmodels": "statsmodels", "nibabel": "NiBabel", "matplotlib": "Matplotlib"}
    paragraphs.append(
        f"Analyses were run with roikit {escape_markup(__version__)} ({cite.cite('roikit')}) in "
        + join_words(f"{names.get(k, escape_markup(k))} {escape_markup(str(v))}" for k, v in versions.items())
        + ".")
    return [_nbsp(p) for p in paragraphs], list(cite.keys)


def methods_text(
    values: pd.DataFrame | None,
    results: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    provenance: dict | None = None,
    style: Style = "markdown",
    labels: Labels | dict | None = None,
    correct: str | None = None,
    references: bool = False,
) -> str:
    """A methods section generated from what was run: participants and exclusions, the analysed contrasts,
    regions (source, space, voxel size and counts), extraction, one sentence per design, one per correction
    setting, symbols and effect sizes, software.

    Parameters
    ----------
    values : DataFrame or None
        Region values table; its ``attrs["roikit"]`` provenance is used unless ``provenance`` is given.
    results : DataFrame
        Group results table.
    participants : DataFrame, optional
        participants.tsv (group sizes, reference levels of factors).
    provenance : dict, optional
        Extraction provenance (the values sidecar's ``provenance``); absent parts are left out gracefully.
    style : {"markdown", "html", "plain", "latex"}
    labels : dict or Labels, optional
        BIDS sidecar(s) of participants.tsv / contrasts.tsv (``LongName``, ``Levels``) for human names.
    correct : str, optional
        Primary correction to report instead of the results' own (must be one the table carries).
    references : bool
        Append the reference list of the works cited.

    Returns
    -------
    str
        Paragraphs separated by blank lines (HTML: ``<p>`` elements).
    """
    paragraphs, keys = methods_parts(values, results, participants=participants, provenance=provenance,
                                     labels=labels, correct=correct)
    if references:
        paragraphs = paragraphs + ["References"] + reference_list(keys)
    return _join(paragraphs, style)


def _join(paragraphs: Sequence[str], style: Style) -> str:
    if style == "html":
        return "\n".join(f"<p>{render(p, 'html')}</p>" for p in paragraphs) + "\n"
    return "\n\n".join(render(p, style) for p in paragraphs) + "\n"


# --------------------------------------------------------------------------------------------- results
def _posthoc_sentences(term: str, part: pd.DataFrame, alpha: float, labels: Labels) -> str:
    """A post-hoc pair of a repeated-measures factor: its paired test in each region, *p* adjusted across the
    factor's pairs within the region (``p_posthoc``, ``posthoc_correction``, ``posthoc_family``)."""
    factor, _, pair = term.partition(": ")
    first, _, second = pair.partition(" - ")
    what = (f"{escape_markup(labels.level(factor, first))} − {escape_markup(labels.level(factor, second))}"
            if second else escape_markup(pair))
    method = text(part["posthoc_correction"].iloc[0]) if "posthoc_correction" in part.columns else "holm"
    pairs = int(number(part["posthoc_family"].iloc[0])) if "posthoc_family" in part.columns else 0
    name = {"holm": "with the Holm method", "fdr": "for the Benjamini–Hochberg false discovery rate",
            "bonferroni": "with the Bonferroni method"}.get(method, escape_markup(method))
    lead = (f"Post-hoc pair {what} ({escape_markup(labels.variable(factor))}), paired *t*-tests in each region: "
            f"*p* values were adjusted {name} across the {count(pairs, 'pair')} of "
            f"{escape_markup(labels.variable(factor))} within each region (*p*_{{pairs}}).")
    sentences = [lead]
    for _, r in part.iterrows():
        row = r.copy()
        row[f"p_{method}"] = row["p_posthoc"]
        body = _row_body(row, method, alpha).replace(corrected_p_symbol(method) + " ", "*p*_{pairs} ", 1)
        sentences.append(f"{_cap(escape_markup(text(r['region'])))}: {body}.")
    surv = [text(r["region"]) for _, r in part.iterrows() if number(r["p_posthoc"]) < alpha]
    a_txt = format_number(alpha, 3 if alpha * 100 % 1 else 2, leading_zero=False)
    sentences.append(f"The pair differs after correction (α = {a_txt}) in {escape_markup(join_words(surv))}."
                     if surv else f"The pair differs after correction (α = {a_txt}) in no region.")
    return " ".join(sentences)


def _family_lead(method: str, size: int, term: str | None) -> str:
    where = (f"For {'the ' if term == 'intercept' else ''}{escape_markup(term)}, across" if term else "Across")
    regions = count(size, "region")
    if method == "none":
        return f"{where} the {regions}, *p* values are uncorrected (family of {regions})."
    name = {"holm": "with the Holm method", "fdr": "for the Benjamini–Hochberg false discovery rate",
            "bonferroni": "with the Bonferroni method",
            "fwe": "for the family-wise error by maximum-statistic permutation"}.get(method, escape_markup(method))
    return f"{where} the {regions}, *p* values were adjusted {name} ({corrected_p_symbol(method)})."


#: Classification of Bayes factors: Jeffreys (1961, Appendix B) as adapted by Lee & Wagenmakers (2013, Table 7.1).
_BF_SCALE = ((100.0, "extreme"), (30.0, "very strong"), (10.0, "strong"), (3.0, "moderate"), (1.0, "anecdotal"))


def bf_evidence(bf10: float, design: str = "") -> str:
    """Words for a Bayes factor BF10 (``moderate evidence for no difference``) on Jeffreys' (1961) scale as adapted
    by Lee & Wagenmakers (2013, Table 7.1): 1-3 anecdotal, 3-10 moderate, 10-30 strong, 30-100 very strong,
    above 100 extreme, and the same for 1/BF10 in favour of the null.

    >>> bf_evidence(0.21, "paired")
    'moderate evidence for no difference'
    >>> bf_evidence(12.0, "one-sample")
    'strong evidence for an effect'
    """
    bf = float(bf10)
    if not np.isfinite(bf) or bf <= 0:
        return "no Bayes factor"
    if bf == 1.0:
        return "no evidence either way"
    effect, null = (("a difference", "no difference") if design in ("paired", "two-group", "region-difference")
                    else ("an effect", "no effect"))
    ratio, side = (bf, effect) if bf > 1 else (1.0 / bf, null)
    word = next(w for bound, w in _BF_SCALE if ratio > bound or bound == 1.0)
    return f"{word} evidence for {side}"


def _row_body(row: pd.Series, corr: str, alpha: float) -> str:
    """One region's APA clause: the test (an F test with its Greenhouse-Geisser df and p when sphericity is in
    question), then the Bayes factor and the equivalence test when the row carries them."""
    row = row.copy()
    gg = None
    eps = number(row.get("epsilon_gg"))
    if text(row.get("statistic_type")) == "F" and np.isfinite(eps) and eps < 1 and np.isfinite(number(row.get("p_gg"))):
        gg = eps
        row["df1"], row["df"], row["p"] = number(row["df1"]) * eps, number(row["df"]) * eps, number(row["p_gg"])
    body = in_text(row, style="markup", estimate=True, correction=None if corr == "none" else corr)
    if gg is not None:
        body = body.replace("*p* ", "*p*_{GG} ", 1) + f", *ε*_{{GG}} = {format_number(gg, 2, leading_zero=False)}"
    bf = number(row.get("bf10"))
    if np.isfinite(bf):
        body += f", *BF*_{{10}} = {_format_bf(bf)}, {bf_evidence(bf, text(row.get('design')))}"
    p_eq = number(row.get("p_equivalence"))
    bound = number(row.get("equivalence_bound"))
    if np.isfinite(p_eq) and np.isfinite(bound):
        what = f"±{format_number(bound, 2)} {effect_symbol(row.get('effect_size_type'))}"
        verdict = (f"equivalent within {what}" if p_eq < alpha else f"equivalence within {what} not shown")
        p_txt = format_p(p_eq)
        body += f"; {verdict} (two one-sided tests, *p* {p_txt if p_txt[0] in '<>' else '= ' + p_txt})"
    return body


def results_parts(
    results: pd.DataFrame,
    *,
    alpha: float = 0.05,
    labels: Labels | dict | None = None,
    participants: pd.DataFrame | None = None,
    correct: str | None = None,
    intercept_effect_sizes: bool = False,
) -> list[str]:
    """The results paragraphs (markup), one per analysis; see :func:`results_text`."""
    check_columns(results, REQUIRED_RESULTS, "results table")
    labels = labels if isinstance(labels, Labels) else Labels(labels or {})
    a_txt = format_number(alpha, 3 if alpha * 100 % 1 else 2, leading_zero=False)
    paragraphs = []
    for number_, key, rows in _numbered(results):
        terms = ordered_unique(rows["term"].map(text))
        parts = []
        for term in terms:
            part = rows[rows["term"].map(text) == term]
            if "p_posthoc" in part.columns and part["p_posthoc"].map(lambda v: not is_missing(v)).all():
                parts.append(_posthoc_sentences(term, part, alpha, labels))
                continue
            corr = primary_correction(part, correct)
            size = family_size(part)
            label = term_label(term, key, labels, participants, terms) if len(terms) > 1 else None
            sentences = [_family_lead(corr, size, label)]
            for _, r in part.iterrows():
                row = r.copy()
                if is_intercept(term) and not intercept_effect_sizes:
                    row["effect_size"] = np.nan
                body = _row_body(row, corr, alpha)
                sentences.append(f"{_cap(escape_markup(text(r['region'])))}: {body}.")
            pcol = "p" if corr == "none" else f"p_{corr}"
            surv = [text(r["region"]) for _, r in part.iterrows() if number(r.get(pcol)) < alpha]
            if corr == "none":
                verdict = (f"Without correction, {len(surv)} of the {count(size, 'region')} had *p* < {a_txt}"
                           + (f": {escape_markup(join_words(surv))}." if surv else "."))
            elif surv:
                verdict = (f"{_cap(join_words(escape_markup(x) for x in surv))} "
                           f"{'remains' if len(surv) == 1 else 'remain'} significant after correction "
                           f"(α = {a_txt}; {len(surv)} of {size}).")
            else:
                verdict = f"No region remains significant after correction (α = {a_txt})."
            parts.append(" ".join(sentences + [verdict]))
        title = escape_markup(analysis_title(key, labels=labels))
        paragraphs.append(_nbsp(f"*Analysis {number_}: {title}.* " + " ".join(parts)))
    return paragraphs


def results_text(
    results: pd.DataFrame,
    *,
    style: Style = "markdown",
    alpha: float = 0.05,
    labels: Labels | dict | None = None,
    participants: pd.DataFrame | None = None,
    correct: str | None = None,
    intercept_effect_sizes: bool = False,
) -> str:
    """APA results, one paragraph per analysis: for each term (a family) one sentence naming the primary
    correction and the family size, then one sentence per region in the table's order (estimate and CI,
    statistic, *p*, the primary adjusted *p*, the effect size and its CI), then which regions survive.

    Parameters
    ----------
    correct : str, optional
        Primary correction instead of the results' own (first entry of ``correction``); ``none`` reports
        uncorrected *p* with the family size.
    intercept_effect_sizes : bool
        Give effect sizes for intercept terms (left out by default: they rarely mean anything).

    Notes
    -----
    Non-breaking spaces surround ``=``, ``<`` and ``>`` (APA 7th ed., 6.43-6.46 number formats).
    """
    return _join(results_parts(results, alpha=alpha, labels=labels, participants=participants, correct=correct,
                               intercept_effect_sizes=intercept_effect_sizes), style)


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
