"""Write the whole report: tables, figures, methods text, a self-contained HTML page and provenance.

Examples
--------
>>> write_report(values, results, participants=participants, out="report")      # doctest: +SKIP
"""

from __future__ import annotations

import datetime as _dt
import html as _html
import os
import pickle
import re
import warnings
from dataclasses import dataclass
from functools import partial
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np
import pandas as pd


from .. import __version__
from .._outputs import FolderOutputs, check_folder
from .._tables import atomic_write_bytes, read_table, sha256_file, write_json
from ..errors import CautionWarning, UsageError
from ._common import (
    REQUIRED_RESULTS,
    REQUIRED_VALUES,
    Labels,
    family_size,
    is_intercept,
    number,
    primary_correction,
    read_sidecar_labels,
    term_label,
    analysis_title,
    check_columns,
    col,
    has_values,
    ids,
    ordered_unique,
    slug,
    split_analyses,
    text,
)
from .figures import (
    covariate_plot,
    forest_pages,
    interaction_pages,
    participant_pages,
    precision_plot,
    save_figure,
    stimulus_plot,
)
from .format import correction_name, corrected_p_symbol, escape_markup, format_percent, render
from ._parallel import OrderedTasks
from .html import ReportFigure, Section, figure_html, report_html
from .tables import ReportTable, descriptives_table, results_tables, word_document, write_latex_preamble
from .references import bibtex, reference_list
from .text import (
    SCOPE_STATEMENT,
    _analysed_contrasts,
    _ranges,
    assumptions,
    caution_details,
    cautions,
    methods_parts,
    results_parts,
    software_versions,
)

__all__ = ["write_report", "check_report_outputs", "REPORT_OUTPUTS"]

#: What ``write_report`` writes inside ``out``.
REPORT_OUTPUTS = ("tables", "figures", "methods.md", "methods.docx", "results.md", "results.docx", "references.bib",
                  "index.tsv", "report.html", "provenance.json")

#: Longest file name roikit writes (analysis number, design and kind keep names short and stable).
MAX_NAME = 40

_POINTS = ("Each point is one participant (horizontal jitter only); black markers and bars are the estimate and "
           "its 95% confidence interval; the dashed line marks zero.")
_FLAGS = (" Rings mark outliers (modified *z* > 3.5) and diamonds low-coverage participants (< 50% valid voxels); "
          "they are kept in the analysis.")


def _as_table(obj, what: str, required) -> pd.DataFrame | None:
    if obj is None:
        return None
    if isinstance(obj, (str, os.PathLike)):
        table = read_table(obj)
        return table
    if isinstance(obj, pd.DataFrame):
        return obj
    raise UsageError(f"{what} must be a DataFrame or a path, got {type(obj).__name__}")


def _without_attrs(table: pd.DataFrame | None) -> pd.DataFrame | None:
    """The table without ``attrs`` (a shallow copy; the caller's table keeps its own)."""
    if table is None or not table.attrs:
        return table
    table = table.copy(deep=False)
    table.attrs = {}
    return table


def _formula_columns(formula: str) -> list[str]:
    rhs = formula.split("~", 1)[1] if "~" in formula else formula
    return ordered_unique(w for w in re.findall(r"[A-Za-z_][A-Za-z0-9_.]*", rhs)
                          if w not in ("C", "I", "np", "log", "center", "scale", "Treatment"))


def _numeric_column(values: pd.DataFrame, participants: pd.DataFrame | None, name: str) -> bool | None:
    for table in (values, participants):
        if table is not None and name in table.columns and name not in ("value", "contrast", "region"):
            numeric = pd.to_numeric(table[name], errors="coerce")
            return bool(numeric.notna().sum() >= max(3, 0.8 * table[name].notna().sum()))
    return None


def _short(name: str, ext: str = ".png") -> str:
    """Cut a file stem so that stem + extension stays within MAX_NAME characters."""
    limit = MAX_NAME - len(ext)
    return name if len(name) <= limit else name[:limit].rstrip("-_")


def _term_slug(term: str) -> str:
    """``group[T.younger]`` -> ``group-younger``; ``C(sex)[T.M]:age`` -> ``sex-m-x-age``."""
    term = re.sub(r"\bC\(([^),]+)[^)]*\)", r"\1", str(term)).replace("[T.", "[").replace(":", "-x-")
    return slug(term)


def labels_from_sidecar(participants_tsv: str | os.PathLike | None) -> dict[str, str]:
    """Reader-facing names of participants.tsv columns from its JSON sidecar (BIDS layout).

    ``LongName`` when given, else the column name with spaces for underscores; ``Units`` appended in
    parentheses (``route_accuracy`` with ``"Units": "%"`` -> ``"route accuracy (%)"``).
    """
    if participants_tsv is None:
        return {}
    side = Path(participants_tsv).with_suffix(".json")
    try:
        import json

        data = json.loads(side.read_text(encoding="utf-8")) if side.is_file() else {}
    except (OSError, ValueError):
        return {}
    out = {}
    for name, entry in (data.items() if isinstance(data, dict) else []):
        if not isinstance(entry, dict):
            continue
        label = str(entry.get("LongName") or name.replace("_", " "))
        units = entry.get("Units")
        out[name] = f"{label} ({units})" if units and f"({units})" not in label else label
    return out


def _figure_plan(values: pd.DataFrame, results: pd.DataFrame, participants: pd.DataFrame | None,
                 correct: str | None = None, labels: Labels | None = None, value_label: str | None = None,
                 column_labels: dict[str, str] | None = None) -> list[dict]:
    """What to draw for each analysis: dicts with name, analysis, make (a picklable callable -> Figure or pages),
    caption."""
    plan: list[dict] = []
    labels = labels or Labels()
    contrasts_all = ordered_unique(values["contrast"].map(text))
    for i, (key, rows) in enumerate(split_analyses(results), start=1):
        design = key["design"]
        title = analysis_title(key, labels=labels)
        n_analysis = int(number(key["analysis"])) if np.isfinite(number(key.get("analysis"))) else i
        prefix = f"a{n_analysis}-{slug(design)}"
        primary = primary_correction(rows, correct)
        start = len(plan)
        contrast = key.get("contrast") or None
        if contrast is not None and contrast not in contrasts_all:
            contrast = None
        opts: dict[str, Any] = dict(results=results, value_label=value_label)
        flags = _FLAGS
        if design in ("one-sample", "fixed-effects") and contrast:
            note = (" The fixed-effects estimate describes only these participants and does not generalise to the "
                    "population." if design == "fixed-effects" else "")
            plan.append(dict(name=f"{prefix}_participants", caption=f"{escape_markup(title)}. {_POINTS}{flags}{note}",
                             make=partial(participant_pages, values, contrast=contrast, design=design, **opts)))
        elif design == "paired" and contrast and key.get("versus") in contrasts_all:
            plan.append(dict(name=f"{prefix}_participants", caption=(
                f"{escape_markup(title)}. Grey lines connect each participant's values; open points to the right are "
                f"the within-participant differences with their mean and CI (diamond). {_POINTS}{flags}"),
                make=partial(participant_pages, values, contrast=contrast, versus=key["versus"], **opts)))
        elif design == "two-group" and contrast and key.get("group_column"):
            levels = [s for s in key.get("levels", "").split(",") if s] or None
            plan.append(dict(name=f"{prefix}_participants", caption=(
                f"{escape_markup(title)}. Groups differ in colour and marker (Okabe–Ito palette); the diamond is the "
                f"difference between the group means with its CI. {_POINTS}{flags}"),
                make=partial(participant_pages, values, contrast=contrast, group=key["group_column"], levels=levels,
                             participants=participants, **opts)))
        elif design == "precision-weighted" and contrast:
            if "variance" in values.columns:
                plan.append(dict(name=f"{prefix}_precision", caption=(
                    f"{escape_markup(title)}. Point area is proportional to each participant's weight 1/(*v*_{{i}} + "
                    f"τ^{{2}}); the black marker is the precision-weighted estimate with its CI. {flags.strip()}"),
                    make=partial(participant_pages, values, contrast=contrast, plot=precision_plot, **opts)))
            else:
                plan.append(dict(name=f"{prefix}_participants", caption=f"{escape_markup(title)}. {_POINTS}",
                                 make=partial(participant_pages, values, contrast=contrast, **opts)))
        elif design == "glm" and contrast:
            drawn = False
            for term in _formula_columns(key.get("formula", "")):
                if _numeric_column(values, participants, term):
                    group = next((g for g in _formula_columns(key.get("formula", ""))
                                  if _numeric_column(values, participants, g) is False), None)
                    plan.append(dict(name=_short(f"{prefix}_covariate-{_term_slug(term)}"), caption=(
                        f"{escape_markup(title)}: region values against {escape_markup(labels.variable(term))}. The line is the simple "
                        "least-squares fit with its 95% confidence band; each panel's title quotes the model's "
                        "coefficient b, which is adjusted for the other terms."),
                        make=partial(participant_pages, values, contrast=contrast, covariate=term, group=group,
                                     participants=participants, plot=covariate_plot,
                                     covariate_label=(column_labels or {}).get(term) or labels.variable(term),
                                     **opts)))
                    drawn = True
            if not drawn:
                plan.append(dict(name=f"{prefix}_participants", caption=f"{escape_markup(title)}. {_POINTS}",
                                 make=partial(participant_pages, values, contrast=contrast, **opts)))
        elif design == "mixed":
            crossed = [c[3:] for c in rows.columns if c.startswith("sd_") and c not in ("sd_participant", "sd_residual")
                       and has_values(rows, c) and c[3:] in values.columns]
            words = _formula_columns(key.get("formula", ""))
            group = next((g for g in words if _numeric_column(values, participants, g) is False
                          and g not in ("contrast",)), None)
            # only the contrasts the model was fitted to (the `contrast` column lists them, comma-separated)
            listed = [c.strip() for v in col(rows, "contrast") for c in text(v).split(",") if c.strip()]
            model_values = values[values["contrast"].map(text).isin(listed)] if listed else values
            if "contrast" in words or crossed:
                stim = crossed[0] if crossed else "contrast"
                plan.append(dict(name=f"{prefix}_stimuli", caption=(
                    f"{escape_markup(title)}: per-{escape_markup(labels.variable(stim))} estimates (mean and 95% CI across participants, "
                    "black) with every participant's value behind them; the dotted line is the mean of the "
                    "per-stimulus means, the dashed line zero."),
                    make=partial(participant_pages, model_values, stimulus=stim, group=group,
                                 participants=participants, plot=stimulus_plot, **opts)))
        elif design == "repeated-measures" and has_values(rows, "cells"):
            within = ordered_unique(t for v in col(rows, "within") for t in text(v).split(",") if t)
            between = key.get("group_column") or ""
            plan.append(dict(name=f"{prefix}_interaction", caption=(
                f"{escape_markup(title)}: condition means with their 95% CIs (large markers, thick lines) over every "
                f"participant's values (thin lines), by {escape_markup(within[0]) if within else 'condition'}"
                + (f" and {escape_markup(' × '.join(within[1:]))} (colour and marker, Okabe–Ito palette)"
                   if len(within) > 1 else "")
                + (f"; one column per {escape_markup(between)}" if between else "")
                + ". Only participants with every cell (as in the test) are drawn; the dashed line marks zero."),
                make=partial(interaction_pages, values, rows, participants=participants, value_label=value_label)))
        # forest plots: one per term with an interval (intercepts of models left out)
        all_terms = ordered_unique(rows["term"].map(text))
        drawn_terms = [t for t in all_terms if not (is_intercept(t) and len(all_terms) > 1)]
        for term in all_terms:
            part = rows[rows["term"].map(text) == term]
            if term.lower() in ("intercept", "(intercept)") and design in ("glm", "mixed", "precision-weighted") \
                    and rows["term"].nunique() > 1:
                continue
            if not any(np.isfinite(pd.to_numeric(col(part, "estimate"), errors="coerce"))) and \
                    not has_values(part, "effect_size_ci_low"):
                continue
            if len(part) < 2:
                continue
            if design == "repeated-measures" and "F" in set(part["statistic_type"].map(text)):
                continue  # F effects: the interaction figure shows the pattern, the table the tests
            label = term_label(term, key, labels, participants, all_terms)
            size = family_size(part)
            if primary == "none":
                marks = (f"Filled squares have *p* < .05 without correction (uncorrected; family of {size} "
                         f"region{'s' if size != 1 else ''}); open squares do not.")
            else:
                marks = (f"Filled squares survive the {correction_name(primary, long=True)} correction across the "
                         f"{size} region{'s' if size != 1 else ''} ({corrected_p_symbol(primary)} < .05); open "
                         "squares do not.")
            name = f"{prefix}_forest" if len(drawn_terms) == 1 else _short(f"{prefix}_forest-{_term_slug(term)}")
            in_value_units = design not in ("glm", "mixed") or is_intercept(term)
            plan.append(dict(name=name, caption=(
                f"{escape_markup(title)}, {escape_markup(label)}: estimates with their 95% CIs across regions. "
                f"{marks} The dashed line marks zero."),
                make=partial(forest_pages, part, correction=primary,
                             value_label=value_label if in_value_units else None)))
        for item in plan[start:]:
            item["analysis"] = n_analysis
    return plan


@dataclass(frozen=True)
class _FigureTask:
    """One figure of the report (one or more pages), drawn and saved by :func:`_draw_figure` (picklable)."""

    make: Callable[[], Any]  # -> a Figure, a list of pages, or (pages, *extra) (functools.partial: picklable)
    name: str  # file stem
    label: str  # names the figure in "Figures not drawn"
    caption: str = ""
    analysis: Any = "n/a"
    pages: str = "_p"  # suffix of page k when there are several ("": always one page)
    catch: tuple = (UsageError,)  # reported as not drawn; anything else stops the report

    def page_name(self, k: int, n: int) -> str:
        if self.pages == "_p":
            suffix = f"_p{k}" if n > 1 else ""
            return _short(self.name, ".png" + suffix) + suffix  # the page number is never cut off
        return self.name + (f"{self.pages}{k}" if n > 1 else "")


def _draw_figure(task: _FigureTask, folder: Path, formats: tuple[str, ...], overwrite: bool) -> dict:
    """Draw one figure and save its pages into ``folder``: the same in a worker process and in this one.

    Returns the pages (file stem, files written, width in mm), what ``make`` returned beside the pages, the
    message of an expected failure (``task.catch``) and the warnings raised (category, message, file, line),
    which the caller raises again in order.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        error, extra, saved = None, None, []
        try:
            made = task.make()
        except task.catch as exc:
            error = str(exc)
        else:
            if isinstance(made, tuple):
                made, extra = made[0], made[1:]
            pages = made if isinstance(made, list) else [made]
            for k, fig in enumerate(pages, start=1):
                name = task.page_name(k, len(pages))
                paths = save_figure(fig, folder / name, width=None, formats=formats, overwrite=overwrite)
                saved.append({"name": name, "files": [p.name for p in paths],
                              "width_mm": float(fig.get_size_inches()[0] * 25.4)})
    found = []
    for w in caught:
        message = w.message if isinstance(w.message, Warning) else w.category(str(w.message))
        try:
            pickle.loads(pickle.dumps(message))
        except Exception:  # a warning that cannot travel between processes goes as a plain UserWarning
            message = UserWarning(f"{w.category.__name__}: {w.message}")
        found.append((type(message), message, w.filename, w.lineno))
    return {"pages": saved, "extra": extra, "error": error, "warnings": found}


def _functional_figure(regions, values_prov: dict, functional: dict):
    from .region_figure import functional_overlap_figure, regions_from_provenance

    return functional_overlap_figure(regions if regions is not None else regions_from_provenance(values_prov),
                                     functional)


def _region_figures(values: pd.DataFrame, values_prov: dict, regions, background) -> tuple[list, Any, str]:
    """Region figure pages, the realised regions and what the background is (raises UsageError if impossible)."""
    from .region_figure import mean_background, region_pages, regions_from_provenance

    if regions is None:
        try:
            regions = regions_from_provenance(values_prov)
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise UsageError(f"the regions could not be rebuilt from the values' provenance ({exc}); pass "
                             "regions= (the realised regions) to draw them") from exc
    names = [n for n in ordered_unique(values["region"].map(text)) if n in regions.names]
    if not names:
        raise UsageError("none of the values' regions is in the region set")
    image, what = None, "the regions' union (grey)"
    if isinstance(background, str) and background == "maps":
        paths = [i["path"] for i in values_prov.get("inputs", []) if isinstance(i, dict) and i.get("path")
                 and Path(i["path"]).is_file()]
        if paths:
            try:
                image = mean_background(paths, regions.grid)
            except (OSError, ValueError) as exc:  # a map that cannot be read: the regions are still drawn
                what = f"regions in grey (the maps could not be averaged: {exc})"
            else:
                used = min(len(paths), 100)
                what = (f"mean of the {used} maps" if used == len(paths)
                        else f"mean of {used} of the {len(paths)} maps")
    elif background is not None:
        image = background
        what = os.fspath(background) if isinstance(background, (str, os.PathLike)) else "the given image"
    drawn = names[:_MAX_REGIONS_DRAWN]
    pages = region_pages(regions, names=drawn, background=image, title=f"background: {what}")
    if len(names) > len(drawn):  # an atlas of hundreds of regions: the first pages, and say so
        what += (f"; the first {len(drawn)} of the {len(names)} regions are drawn (roikit regions ... --figure FILE "
                 "draws them all; the table lists them all)")
    return pages, regions.__class__(regions.grid, names, [regions.voxels[regions.names.index(n)] for n in names],
                                    [regions.weights[regions.names.index(n)] for n in names],
                                    [regions.sources[regions.names.index(n)] for n in names]), what


def _region_rows(regions) -> list[list[str]]:
    from .format import format_number

    rows = []
    for r in regions.summary().to_dict("records"):
        rows.append([str(r["region"]), str(r["source"]), format_number(r["n_voxels"], 0),
                     format_number(r["volume_mm3"], 0), format_number(r["x_mm"], 1), format_number(r["y_mm"], 1),
                     format_number(r["z_mm"], 1)])
    return rows


#: Regions drawn in the report's region figure (five pages at double width); the table lists them all.
_MAX_REGIONS_DRAWN = 50

_REGION_HEAD = ["Region", "Definition", "Voxels", "Volume (mm³)", "x (mm)", "y (mm)", "z (mm)"]


def _overlap_html(provenance: dict | None, regions: set) -> list[str]:
    """The voxels shared by overlapping regions, as a matrix (nothing when no region overlaps another)."""
    pairs = (provenance or {}).get("overlaps") if isinstance(provenance, dict) else None
    pairs = [p for p in pairs or [] if p.get("region_a") in regions and p.get("region_b") in regions]
    if not pairs:
        return []
    sizes = {r.get("region"): r.get("n_voxels") for r in (provenance.get("regions") or []) if isinstance(r, dict)}
    names = ordered_unique([p["region_a"] for p in pairs] + [p["region_b"] for p in pairs])
    shared = {(p["region_a"], p["region_b"]): p for p in pairs}
    esc = _html.escape
    head = "".join(f'<th class="r">{esc(str(n))}</th>' for n in names)
    rows = []
    for a in names:
        cells = []
        for b in names:
            p = shared.get((a, b)) or shared.get((b, a))
            if a == b:
                cells.append(f'<td class="r">{esc(str(sizes.get(a, "")))}</td>')
            elif p is None:
                cells.append('<td class="r">0</td>')
            else:
                share = p["share_of_a"] if p["region_a"] == a else p["share_of_b"]
                cells.append(f'<td class="r">{int(p["n_shared"])} ({format_percent(100 * share)})</td>')
        rows.append(f'<tr><td class="l">{esc(str(a))}</td>{"".join(cells)}</tr>')
    note = ("Voxels shared by regions that overlap (diagonal: the region's voxels; in brackets: the share of the "
            "row's region). Overlapping regions are tested separately and both count in each correction family, "
            "so their tests are not independent.")
    return [f'<figure class="table" id="region-overlap"><p class="scroll-hint" aria-hidden="true"></p><div class="table-scroll" tabindex="0" role="region" aria-label="Region overlap, scrolls sideways"><table class="apa"><thead><tr><th></th>{head}</tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table></div></figure>', f"<p>{esc(note)}</p>"]


#: The writer recorded in a report folder's manifest (:mod:`roikit._outputs`).
REPORT_WRITER = "roikit report"


def check_report_outputs(out: Path, overwrite: bool) -> None:
    """Raise OutputExistsError unless a report may be written into ``out`` without ``overwrite``.

    A missing or empty folder, or one holding an earlier report (its manifest says so, files unchanged), is fine.
    """
    check_folder(out, writer=REPORT_WRITER, overwrite=overwrite)


def _docx(path: Path, title: str, paragraphs: list[str], *, overwrite: bool, headings: dict | None = None) -> Path:
    """A Word document of markup paragraphs (italics, subscripts and superscripts as real runs)."""
    import io

    import docx
    from docx.shared import Pt

    from .format import _latex_number, _parse

    document = docx.Document()
    style = document.styles["Normal"]
    style.font.name = "Times New Roman"
    style.font.size = Pt(12)
    document.add_heading(title, level=1)
    for para in paragraphs:
        if headings and para in headings:
            document.add_heading(headings[para], level=2)
            continue
        p = document.add_paragraph()
        for content, kind in _parse(para):
            run = p.add_run(_latex_number(content))  # a true minus sign before numbers
            run.italic = kind == "i"
            run.font.subscript = kind == "sub"
            run.font.superscript = kind == "sup"
    buf = io.BytesIO()
    document.save(buf)
    return atomic_write_bytes(path, buf.getvalue(), overwrite=overwrite)


def _plain(markup: str) -> str:
    return render(markup, "plain").replace("\t", " ").replace("\n", " ")


def write_report(
    values: pd.DataFrame | str | os.PathLike,
    results: pd.DataFrame | str | os.PathLike,
    *,
    participants: pd.DataFrame | str | os.PathLike | None = None,
    out: str | os.PathLike,
    overwrite: bool = False,
    provenance: dict | None = None,
    title: str = "Region-of-interest group analysis",
    circular: Iterable[str] | None = None,
    figures: bool = True,
    figure_formats: tuple[str, ...] = ("pdf", "svg", "png"),
    correct: str | None = None,
    labels: dict | None = None,
    value_label: str | None = None,
    regions: Any = None,
    region_background: Any = "maps",
    column_labels: dict[str, str] | None = None,
    n_jobs: int | None = None,
    _staged: bool = False,
) -> dict[str, Any]:
    """Write tables, figures, methods and results text (Markdown and Word), references, an index, a
    self-contained ``report.html`` and ``provenance.json`` into ``out``.

    The report is written as one set: into a staging folder inside ``out`` first, then switched in; the
    files of an earlier report in ``out`` (listed in its manifest) are replaced or removed, the folder's other
    files are kept (see :mod:`roikit._outputs`).

    Parameters
    ----------
    values : DataFrame or path
        Region values table (``attrs["roikit"]`` or the sidecar's provenance describes the regions).
    results : DataFrame or path
        Group results table (one or several analyses).
    participants : DataFrame or path, optional
        participants.tsv (groups and covariates for the figures and the descriptives); given as a path, its
        JSON sidecar (``LongName``, ``Levels``) names variables and levels.
    out : path
        Output directory (created).
    overwrite : bool
        Write into a folder that holds files roikit did not write as a report (an earlier report there is
        replaced without it); without it, such a folder stops the run before work starts.
    provenance : dict, optional
        Extra provenance merged into ``provenance.json`` (e.g. the command line's input files with SHA-256,
        options) and, under ``"values"``, the extraction provenance when ``values`` has no ``attrs``.
    title : str
        Report title.
    circular : iterable of str, optional
        Regions defined from the same data (adds the circularity caution); also read from the provenance.
    figures : bool
        Draw the figures (False for a quick text-and-tables report).
    figure_formats : tuple of str
        Files written per figure (PNG is always written: the HTML embeds it).
    value_label : str, optional
        Axis label of the region values with their unit, e.g. ``"Parameter estimate (a.u.)"`` or
        ``"% signal change"`` (default "region value").
    regions : RealisedRegions, optional
        The realised regions, for the "Regions" section (each region on slices through its centre, with a
        table of centre and size); default: rebuilt from the values' provenance when it describes them.
    region_background : "maps", array, path or None
        Background of the region figure: ``"maps"`` (the mean of the maps listed in the values' provenance),
        an image on the regions' grid or a file, or None (the regions' union in grey).
    column_labels : dict, optional
        Reader-facing names of participants.tsv columns for axis labels (default: from the participants
        sidecar's ``LongName`` and ``Units`` when ``participants`` is a path; see :func:`labels_from_sidecar`).
    correct : str, optional
        The primary correction to report (text, table notes, figure markers) instead of each analysis's own
        (the first entry of its ``correction`` column); must be one the results carry, or ``none``.
    labels : dict, optional
        BIDS sidecar(s) describing participants.tsv / contrasts.tsv columns (``{"group": {"LongName": ...,
        "Levels": {...}}}``); merged over the participants sidecar.
    n_jobs : int, optional
        Worker processes that draw the figures, each figure in one, while this process writes the tables
        (default: one per usable core, at most one per figure); 1 draws them here, one after the other. The
        files are the same either way.

    Returns
    -------
    dict
        ``tables`` (paths), ``figures`` (paths), ``methods``, ``results``, ``references``, ``index``, ``html``,
        ``provenance`` (paths) and ``cautions`` (list of ``{"kind", "text", "participant"}``).

    Warns
    -----
    CautionWarning
        One warning listing the cautions, one short line each (also in the report).

    Notes
    -----
    Output names are short and stable: ``a<analysis>-<design>.<ext>`` for tables and
    ``a<analysis>-<design>_<kind>.<ext>`` for figures (never longer than 40 characters); ``index.tsv`` lists
    every written file with its analysis, kind and caption.
    """
    out = Path(out)
    if not _staged:  # write everything into a staging folder, then switch it in as one set
        options = dict(participants=participants, provenance=provenance, title=title, circular=circular,
                       figures=figures, figure_formats=figure_formats, correct=correct, labels=labels,
                       value_label=value_label, regions=regions, region_background=region_background,
                       column_labels=column_labels, n_jobs=n_jobs)
        with FolderOutputs(out, writer=REPORT_WRITER, overwrite=overwrite) as tx, \
                warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            written = write_report(values, results, out=tx.staging, overwrite=True, _staged=True, **options)
            tx.commit()
        moved = {}
        for key, item in written.items():
            if isinstance(item, Path):
                moved[key] = out / item.relative_to(tx.staging)
            elif isinstance(item, list) and all(isinstance(p, Path) for p in item):
                moved[key] = [out / p.relative_to(tx.staging) for p in item]
            else:
                moved[key] = item
        for w in caught:  # messages naming the staging folder name the output folder instead
            message = str(w.message).replace(str(tx.staging), str(out))
            warnings.warn_explicit(w.category(message) if message != str(w.message) else w.message, w.category,
                                   w.filename, w.lineno)
        return moved
    side = read_sidecar_labels(participants) if isinstance(participants, (str, os.PathLike)) else {}
    if column_labels is None:
        column_labels = labels_from_sidecar(participants) if isinstance(participants, (str, os.PathLike)) else {}
    values = _as_table(values, "values", REQUIRED_VALUES)
    results = _as_table(results, "results", REQUIRED_RESULTS)
    participants = _as_table(participants, "participants", ("participant_id",))
    check_columns(values, REQUIRED_VALUES, "region values table")
    check_columns(results, REQUIRED_RESULTS, "results table")
    if "run_id" in values.columns:
        # per-run values (maps with runs): one value per participant, the mean over runs, as the analyses used
        # (roikit run and roikit stats average runs the same way); descriptives and dots then count participants
        from ..functional import collapse_runs

        values = collapse_runs(values)
    if participants is not None:
        check_columns(participants, ("participant_id",), "participants table")
        participants = participants.copy()
        participants["participant_id"] = participants["participant_id"].astype(str)
    names = Labels(side, labels or {})
    for _key, rows in split_analyses(results):  # an unusable --correct stops here, before any work
        primary_correction(rows, correct, option="--correct" if correct else "correct")
    out.mkdir(parents=True, exist_ok=True)
    extra = dict(provenance or {})
    values_prov = values.attrs.get("roikit") or extra.get("values") or {}
    # pandas deep-copies ``attrs`` on every operation; the provenance (every map's path and hash) is read once
    # here, so the tables the report works on carry none (with it, copying took most of the report's time)
    values, results = _without_attrs(values), _without_attrs(results)
    participants = _without_attrs(participants)
    index: list[dict] = []

    def listed(path: Path, analysis, kind: str, caption: str) -> Path:
        index.append({"path": os.fspath(path.relative_to(out)), "analysis": analysis, "kind": kind,
                      "caption": _plain(caption)})
        return path

    # ---------------------------------------------------------------- figures (drawn while the tables are written)
    figure_items: list[ReportFigure] = []
    figure_paths: list[Path] = []
    figure_errors: list[str] = []
    region_items: list[ReportFigure] = []
    drawn_regions = None
    region_note = ""
    formats = tuple(dict.fromkeys(tuple(figure_formats) + ("png",)))
    tasks: list[_FigureTask] = []
    if figures and regions is None and not values_prov.get("region_sources"):
        region_note = ("The values carry no description of the regions (no extraction provenance), so the regions "
                       "are not drawn; pass the realised regions (regions=...) to draw them.")
    elif figures:
        # where the regions are (the manuscript's first region figure), then the analyses' figures
        tasks.append(_FigureTask(partial(_region_figures, values, values_prov, regions, region_background),
                                 "regions", "regions", pages="_page", catch=(UsageError, OSError, ValueError)))
        functional = values_prov.get("functional") if isinstance(values_prov.get("functional"), dict) else None
        if functional and functional.get("selections"):
            tasks.append(_FigureTask(partial(_functional_figure, regions, values_prov, functional),
                                     "functional_regions", "functional regions", pages="",
                                     catch=(UsageError, OSError, ValueError, KeyError, TypeError)))
    if figures:
        for item in _figure_plan(values, results, participants, correct=correct, labels=names,
                                 value_label=value_label, column_labels=column_labels):
            tasks.append(_FigureTask(item["make"], item["name"], item["name"], caption=item["caption"],
                                     analysis=item.get("analysis", "n/a")))

    def add_figure(page: dict, caption: str, alt: str, analysis) -> ReportFigure:
        paths = [out / "figures" / file for file in page["files"]]
        number_ = len(figure_items) + 1
        for p in paths:
            figure_paths.append(listed(p, analysis, f"figure ({p.suffix[1:]})", f"Figure {number_}. {caption}"))
        png_path = next(p for p in paths if p.suffix == ".png")
        item = ReportFigure(png=png_path.read_bytes(), alt=alt, caption=caption, number=number_, name=page["name"],
                            width_mm=page["width_mm"], file=png_path.relative_to(out).as_posix())
        figure_items.append(item)
        return item

    # worker processes draw and save the figures (one task per figure, in order) while this one writes the tables
    folder = (out / "figures").absolute()
    with OrderedTasks(_draw_figure, tasks, (folder, formats, overwrite), n_jobs=n_jobs) as drawn:
        # ------------------------------------------------------------ tables
        tables = results_tables(results, correct=correct, labels=names, participants=participants)
        from .text import circular_regions

        circ_tested = [n for n in circular_regions(values_prov, circular) if n in set(results["region"].map(text))]
        if circ_tested:  # the circularity caution travels with every results table (its note)
            for t in tables:
                t.note.append(f"Circular region definition: {escape_markup(', '.join(circ_tested))} "
                              f"{'was' if len(circ_tested) == 1 else 'were'} defined from the same data that are tested; "
                              "read these rows as descriptive (Kriegeskorte et al., 2009).")
        group_cols = [g for g in ordered_unique(text(v) for v in col(results, "group_column") if text(v))
                      if g in values.columns or (participants is not None and g in participants.columns)]
        desc = descriptives_table(values, participants=participants, group=group_cols[0] if group_cols else None,
                                  number=len(tables) + 1, contrasts=_analysed_contrasts(results), labels=names)
        all_tables: list[ReportTable] = tables + [desc]
        table_paths: list[Path] = []
        document = word_document()
        for t in all_tables:
            analysis = t.name.split("-", 1)[0][1:] if t.name.startswith("a") and t.name[1:2].isdigit() else "n/a"
            for path in t.write(out / "tables", overwrite=overwrite):
                table_paths.append(listed(path, analysis, f"table ({path.suffix[1:]})", f"Table {t.number}. {t.title}"))
            t.to_docx(document=document)
            document.add_paragraph()
        table_paths.append(listed(write_latex_preamble(out / "tables", all_tables, overwrite=overwrite), "n/a",
                                  "LaTeX preamble", "The LaTeX packages the tables need (input it in the preamble)"))
        import io

        buf = io.BytesIO()
        document.save(buf)
        path = atomic_write_bytes(out / "tables" / "all_tables.docx", buf.getvalue(), overwrite=overwrite)
        table_paths.append(listed(path, "all", "tables (docx)", "Every table in one Word document"))

        # ------------------------------------------------------------ figures
        for task, done in zip(tasks, drawn.results()):
            for category, message, filename, lineno in done["warnings"]:  # raised where the figure was drawn
                warnings.warn_explicit(message, category, filename, lineno)
            if done["error"] is not None:  # a figure that cannot be drawn is reported, never silently skipped
                figure_errors.append(f"{task.label}: {done['error']}")
                continue
            pages = done["pages"]
            if task.name == "regions":
                drawn_regions, background_text = done["extra"]
                for k, page in enumerate(pages, start=1):
                    caption = (f"The regions of interest, each on a sagittal, a coronal and an axial slice through its "
                               f"centre (world coordinates in mm; L, left; R, right) over the "
                               f"{escape_markup(background_text)}; one colour per region (Okabe–Ito palette, repeating "
                               "after seven)." + (f" (Page {k} of {len(pages)}.)" if len(pages) > 1 else ""))
                    region_items.append(add_figure(page, caption, f"Regions of interest on orthogonal slices, page "
                                                                  f"{k} of {len(pages)}", "all"))
            elif task.name == "functional_regions":
                caption = ("Each functional region's selected voxels: the share of participants whose selection "
                           "(from their own localiser maps; averaged over folds with a leave-one-run-out split) holds "
                           "each voxel of the search space (grey), on a sagittal, a coronal and an axial slice "
                           "through the voxel selected most often (world coordinates in mm; L, left; R, right).")
                region_items.append(add_figure(pages[0], caption,
                                               "Overlap of the participants' functional-region voxels", "all"))
            else:
                for k, page in enumerate(pages, start=1):
                    caption = task.caption + (f" (Page {k} of {len(pages)}.)" if len(pages) > 1 else "")
                    alt = render(caption, "plain").split(". ")[0]  # markup rendered: underscores in names stay
                    add_figure(page, caption, alt, task.analysis)

    # ---------------------------------------------------------------- text
    found = cautions(results, provenance=values_prov, circular=circular)
    details = caution_details(results)
    method_paragraphs, cited = methods_parts(values, results, participants=participants, provenance=values_prov,
                                             labels=names, correct=correct)
    result_paragraphs = results_parts(results, labels=names, participants=participants, correct=correct)
    references = reference_list(cited)
    cited_all = list(dict.fromkeys(cited + [k for c in found if c.get("cites") for k in c["cites"].split(",")]))
    md = ["# Methods", ""] + [render(p, "markdown") + "\n" for p in method_paragraphs]
    if drawn_regions is not None:
        md += ["## Regions", "", "| " + " | ".join(_REGION_HEAD) + " |", "|" + "---|" * len(_REGION_HEAD)]
        md += ["| " + " | ".join(escape_markup(c) for c in row) + " |" for row in _region_rows(drawn_regions)]
        md += ["", "Centre: centre of mass in world coordinates (mm). " + " ".join(
            f"Figure {f.number}." for f in region_items), ""]
    md += ["## References", ""] + [render(r, "markdown") + "\n" for r in references]
    methods_path = listed(atomic_write_bytes(out / "methods.md", "\n".join(md).encode("utf-8"), overwrite=overwrite),
                          "all", "methods (Markdown)", "Methods section with its reference list")
    docx_paragraphs = method_paragraphs + ["\x00refs"] + references
    methods_docx = listed(_docx(out / "methods.docx", "Methods", docx_paragraphs, overwrite=overwrite,
                                headings={"\x00refs": "References"}),
                          "all", "methods (Word)", "Methods section with its reference list")
    rmd = ["# Results", ""] + [render(p, "markdown") + "\n" for p in result_paragraphs]
    if found:
        rmd += ["## Cautions", ""] + [f"- {render(c['text'], 'markdown')}" for c in found] + [""]
        if len(details):
            rmd += ["| Participant | Problem | Region | Analyses |", "|:--|:--|:--|:--|"]
            rmd += [f"| {r.participant_id} | {r.problem} | {r.region} | {_ranges(ids(r.analyses))} |"
                    for r in details.itertuples()]
            rmd += [""]
    results_path = listed(atomic_write_bytes(out / "results.md", "\n".join(rmd).encode("utf-8"), overwrite=overwrite),
                          "all", "results (Markdown)", "Results in APA style, with the cautions")
    results_docx = listed(_docx(out / "results.docx", "Results", result_paragraphs, overwrite=overwrite),
                          "all", "results (Word)", "Results in APA style")
    bib_path = listed(atomic_write_bytes(out / "references.bib", bibtex(cited_all).encode("utf-8"), overwrite=overwrite),
                      "all", "references (BibTeX)", "The works the methods text cites, roikit included")
    assumption_lines = assumptions(results)

    # ---------------------------------------------------------------- html
    sections: list[Section] = []
    if found:
        detail_html = ""
        if len(details):
            detail_html = ('<figure class="table details" id="caution-details"><p class="scroll-hint" aria-hidden="true"></p>'
                           '<div class="table-scroll" tabindex="0" role="region" aria-label="Cautions in detail, '
                           'scrolls sideways"><table class="apa caution-details"><thead><tr><th>Participant</th><th>Problem</th>'
                           "<th>Region</th><th>Analyses</th></tr></thead><tbody>" + "".join(
                               "<tr>" + "".join(f"<td>{_html.escape(str(v))}</td>" for v in
                                                (*r[:3], _ranges(ids(r[3])))) + "</tr>"
                               for r in details.itertuples(index=False)) + "</tbody></table></div></figure>")
        sections.append(Section("cautions", "Cautions", ["<ul>" + "".join(
            f'<li data-kind="{c["kind"]}">{render(c["text"], "html")}</li>' for c in found) + "</ul>",
            detail_html], css_class="cautions"))
    sections.append(Section("methods", "Methods", ["\n".join(f"<p>{render(p, 'html')}</p>"
                                                              for p in method_paragraphs)]))
    if region_note:
        sections.append(Section("regions", "Regions", [f"<p>{_html.escape(region_note)}</p>"]))
    if drawn_regions is not None:
        head = "".join(f"<th>{_html.escape(h)}</th>" for h in _REGION_HEAD)
        rows_html = "".join("<tr>" + "".join(f"<td>{_html.escape(c)}</td>" for c in row) + "</tr>"
                            for row in _region_rows(drawn_regions))
        sections.append(Section("regions", "Regions", [figure_html(f) for f in region_items] + [
            '<figure class="table" id="region-table"><figcaption><span class="table-number">Regions</span><br>'
            '<span class="table-title">Centre (centre of mass, world mm) and size of each region</span></figcaption>'
            '<p class="scroll-hint" aria-hidden="true"></p><div class="table-scroll" tabindex="0" role="region" '
            f'aria-label="Regions, scrolls sideways"><table class="apa regions"><thead><tr>{head}</tr></thead>'
            f'<tbody>{rows_html}</tbody></table></div></figure>']))
    body = ["\n".join(f"<p>{render(p, 'html')}</p>" for p in result_paragraphs)]
    body += [t.to_html() for t in tables]
    sections.append(Section("results", "Results", body))
    analysis_items = [f for f in figure_items if all(f is not r for r in region_items)]
    if analysis_items:
        sections.append(Section("figures", "Figures", [figure_html(f) for f in analysis_items]))
    sections.append(Section("descriptives", "Descriptive statistics", [desc.to_html()]))
    if extra.get("warnings"):  # one line per problem (roikit.errors.summarise_warnings); every finding: warnings.tsv
        sections.append(Section("warnings", "Warnings", ["<ul>" + "".join(
            f"<li>{_html.escape(str(line))}</li>" for line in extra["warnings"]) + "</ul>",
            "<p>Every finding, one row per participant and region, is in warnings.tsv beside this report.</p>"]))
    overlap_html = _overlap_html(values_prov, set(values["region"].astype(str)))
    if overlap_html:
        sections.append(Section("overlap", "Region overlap", overlap_html))
    sections.append(Section("assumptions", "Assumptions and scope", [
        "<ul>" + "".join(f"<li>{render(a, 'html')}</li>" for a in assumption_lines) + "</ul>",
        f"<p>{_html.escape(SCOPE_STATEMENT)}</p>"]))
    sections.append(Section("references", "References", [
        "<ul class=\"references\">" + "".join(f"<li>{render(r, 'html')}</li>" for r in reference_list(cited_all))
        + "</ul>"]))
    if figure_errors:
        sections.append(Section("not-drawn", "Figures not drawn", [
            "<ul>" + "".join(f"<li>{_html.escape(e)}</li>" for e in figure_errors) + "</ul>"]))
    versions = software_versions()
    created = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    prov_items = "".join(f"<dt>{_html.escape(str(i.get('role', i.get('path', ''))))}</dt>"
                         f"<dd>{_html.escape(str(i.get('path', '')))}<br>sha256 {_html.escape(str(i.get('sha256', '')))}</dd>"
                         for i in extra.get("inputs", []) if isinstance(i, dict))
    sections.append(Section("provenance", "Provenance", [
        f'<dl class="provenance">{prov_items}<dt>software</dt><dd>'
        + _html.escape(", ".join(f"{k} {v}" for k, v in versions.items())) + "</dd></dl>",
        "<p>Full details (inputs with SHA-256, versions, options, seeds) are in provenance.json; every file of "
        "this report is listed in index.tsv.</p>"]))
    page = report_html(title=title, scope=SCOPE_STATEMENT, sections=sections,
                       footer=f"Written by roikit {__version__} on {created}.")
    html_path = listed(atomic_write_bytes(out / "report.html", page.encode("utf-8"), overwrite=overwrite),
                       "all", "report (HTML)", "The whole report in one self-contained page")

    # ---------------------------------------------------------------- provenance and index
    seeds = ordered_unique(text(v) for v in col(results, "seed") if text(v))
    outputs = table_paths + figure_paths + [methods_path, methods_docx, results_path, results_docx, bib_path,
                                            html_path]
    record = {
        "kind": "roikit report",
        "roikit_version": __version__,
        "created": created,
        "versions": versions,
        "inputs": extra.get("inputs", []),
        "options": {"title": title, "circular": list(circular or []), "figures": figures, "correct": correct,
                    "value_label": value_label,
                    **extra.get("options", {})},
        "seeds": seeds,
        "analyses": [dict(k, primary_correction=primary_correction(r, correct)) for k, r in split_analyses(results)],
        "cautions": [c["kind"] for c in found],
        "figures_not_drawn": figure_errors,
        "values_provenance": values_prov,
        "outputs": [{"path": os.fspath(p.relative_to(out)), "sha256": sha256_file(p)} for p in outputs],
    }
    prov_path = write_json(out / "provenance.json", record, overwrite=overwrite)
    listed(prov_path, "all", "provenance (JSON)", "Inputs with SHA-256, versions, options and seeds")
    index.append({"path": "index.tsv", "analysis": "all", "kind": "index (TSV)", "caption": "This list"})
    frame = pd.DataFrame(index, columns=["path", "analysis", "kind", "caption"])
    index_path = atomic_write_bytes(out / "index.tsv", frame.to_csv(sep="\t", index=False).encode("utf-8"),
                                    overwrite=overwrite)
    long_names = [p for p in frame["path"] if len(Path(p).name) > MAX_NAME]
    if long_names:  # a safety net: names are built short, so this means a bug
        raise RuntimeError(f"roikit wrote file names longer than {MAX_NAME} characters: {long_names}")
    if found:
        # one line on stderr (the per-participant lines are the warnings' own summaries; every caution is in the
        # report, results.md and warnings.tsv)
        kinds = ordered_unique(c["kind"] for c in found)
        warnings.warn(CautionWarning(
            f"the report carries {len(found)} caution{'s' if len(found) != 1 else ''} ({', '.join(kinds)}); "
            f"read them in {html_path}"), stacklevel=2)
    return {"tables": table_paths, "figures": figure_paths, "methods": methods_path, "methods_docx": methods_docx,
            "results": results_path, "results_docx": results_docx, "references": bib_path, "index": index_path,
            "html": html_path, "provenance": prov_path, "cautions": found}
