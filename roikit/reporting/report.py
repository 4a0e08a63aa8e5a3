"""Write the whole report: tables, figures, methods text, a self-contained HTML page and provenance.

Examples
--------
>>> write_report(values, results, participants=participants, out="report")      # doctest: +SKIP
"""

from __future__ import annotations

import datetime as _dt
import html as _html
import os
import re
import warnings
from pathlib import Path
from typing import Any, Iterable

import numpy as np
import pandas as pd

from .._options import spell

from .. import __version__
from .._tables import atomic_write_bytes, check_output, read_table, sha256_file, write_json
from ..errors import CautionWarning, OutputExistsError, UsageError
from ._common import (
    REQUIRED_RESULTS,
    REQUIRED_VALUES,
    analysis_title,
    check_columns,
    col,
    has_values,
    ordered_unique,
    slug,
    split_analyses,
    text,
)
from .figures import (
    covariate_plot,
    forest_plot,
    participant_figure,
    precision_plot,
    save_figure,
    stimulus_plot,
)
from .format import escape_markup, format_percent, render
from .html import ReportFigure, Section, figure_html, report_html
from .tables import ReportTable, descriptives_table, results_tables
from .text import SCOPE_STATEMENT, assumptions, cautions, methods_text, results_text, software_versions

__all__ = ["write_report", "check_report_outputs", "REPORT_OUTPUTS"]

#: What ``write_report`` writes inside ``out``.
REPORT_OUTPUTS = ("tables", "figures", "methods.md", "report.html", "provenance.json")

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


def _figure_plan(values: pd.DataFrame, results: pd.DataFrame, participants: pd.DataFrame | None) -> list[dict]:
    """What to draw for each analysis: dicts with name, make (callable -> Figure), caption, alt, width."""
    plan: list[dict] = []
    contrasts_all = ordered_unique(values["contrast"].map(text))
    for key, rows in split_analyses(results):
        design = key["design"]
        title = analysis_title(key)
        base = slug(title)
        contrast = key.get("contrast") or None
        if contrast is not None and contrast not in contrasts_all:
            contrast = None
        opts: dict[str, Any] = dict(results=results)
        flags = _FLAGS
        if design in ("one-sample", "fixed-effects") and contrast:
            note = (" The fixed-effects estimate describes only these participants and does not generalise to the "
                    "population." if design == "fixed-effects" else "")
            plan.append(dict(name=f"participants_{base}", caption=f"{escape_markup(title)}. {_POINTS}{flags}{note}",
                             make=lambda c=contrast, d=design: participant_figure(values, contrast=c, design=d,
                                                                                  **opts)))
        elif design == "paired" and contrast and key.get("versus") in contrasts_all:
            plan.append(dict(name=f"participants_{base}", caption=(
                f"{escape_markup(title)}. Grey lines connect each participant's values; open points to the right are "
                f"the within-participant differences with their mean and CI (diamond). {_POINTS}{flags}"),
                make=lambda c=contrast, v=key["versus"]: participant_figure(values, contrast=c, versus=v, **opts)))
        elif design == "two-group" and contrast and key.get("group_column"):
            levels = [s for s in key.get("levels", "").split(",") if s] or None
            plan.append(dict(name=f"participants_{base}", caption=(
                f"{escape_markup(title)}. Groups differ in colour and marker (Okabe–Ito palette); the diamond is the "
                f"difference between the group means with its CI. {_POINTS}{flags}"),
                make=lambda c=contrast, g=key["group_column"], lv=levels: participant_figure(
                    values, contrast=c, group=g, levels=lv, participants=participants, **opts)))
        elif design == "precision-weighted" and contrast:
            if "variance" in values.columns:
                plan.append(dict(name=f"precision_{base}", caption=(
                    f"{escape_markup(title)}. Point area is proportional to each participant's weight 1/(*v*_{{i}} + "
                    f"τ^{{2}}); the black marker is the precision-weighted estimate with its CI. {flags.strip()}"),
                    make=lambda c=contrast: participant_figure(values, contrast=c, plot=precision_plot, **opts)))
            else:
                plan.append(dict(name=f"participants_{base}", caption=f"{escape_markup(title)}. {_POINTS}",
                                 make=lambda c=contrast: participant_figure(values, contrast=c, **opts)))
        elif design == "glm" and contrast:
            drawn = False
            for term in _formula_columns(key.get("formula", "")):
                if _numeric_column(values, participants, term):
                    group = next((g for g in _formula_columns(key.get("formula", ""))
                                  if _numeric_column(values, participants, g) is False), None)
                    plan.append(dict(name=f"covariate_{slug(term)}_{base}", caption=(
                        f"{escape_markup(title)}: region values against {escape_markup(term)}. The line is the simple "
                        "least-squares fit with its 95% confidence band; each panel's title quotes the model's "
                        "coefficient b, which is adjusted for the other terms."),
                        make=lambda t=term, c=contrast, g=group: participant_figure(
                            values, contrast=c, covariate=t, group=g, participants=participants, plot=covariate_plot,
                            **opts)))
                    drawn = True
            if not drawn:
                plan.append(dict(name=f"participants_{base}", caption=f"{escape_markup(title)}. {_POINTS}",
                                 make=lambda c=contrast: participant_figure(values, contrast=c, **opts)))
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
                plan.append(dict(name=f"stimuli_{base}", caption=(
                    f"{escape_markup(title)}: per-{escape_markup(stim)} estimates (mean and 95% CI across participants, "
                    "black) with every participant's value behind them; the dotted line is the mean of the "
                    "per-stimulus means, the dashed line zero."),
                    make=lambda s=stim, g=group, v=model_values: participant_figure(v, stimulus=s, group=g,
                                                                    participants=participants, plot=stimulus_plot,
                                                                    **opts)))
        # forest plots: one per term with an interval (intercepts of models left out)
        for term in ordered_unique(rows["term"].map(text)):
            part = rows[rows["term"].map(text) == term]
            if term.lower() in ("intercept", "(intercept)") and design in ("glm", "mixed", "precision-weighted") \
                    and rows["term"].nunique() > 1:
                continue
            if not any(np.isfinite(pd.to_numeric(col(part, "estimate"), errors="coerce"))) and \
                    not has_values(part, "effect_size_ci_low"):
                continue
            if len(part) < 2:
                continue
            plan.append(dict(name=f"forest_{slug(term)}_{base}", width="single", caption=(
                f"{escape_markup(title)}, term {escape_markup(term)}: estimates with their 95% CIs across regions. "
                "Filled squares survive the correction for the number of regions (family-wise or false discovery "
                "rate, as named in the legend); open squares do not. The dashed line marks zero."),
                make=lambda pt=part: forest_plot(pt).figure))
    return plan


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
    return [f'<div class="table-wrap"><table class="apa"><thead><tr><th></th>{head}</tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table></div>', f"<p>{esc(note)}</p>"]


def check_report_outputs(out: Path, overwrite: bool) -> None:
    """Raise OutputExistsError if any report output exists in ``out`` and ``overwrite`` is false."""
    if overwrite:
        return
    existing = [name for name in REPORT_OUTPUTS if (out / name).exists()]
    if existing:
        raise OutputExistsError(
            f"{out}: report output(s) {', '.join(existing)} already exist; pass {spell('overwrite', True)} "
            "to replace them, or choose another output folder")


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
) -> dict[str, Any]:
    """Write tables, figures, ``methods.md``, ``report.html`` and ``provenance.json`` into ``out``.

    Parameters
    ----------
    values : DataFrame or path
        Region values table (``attrs["roikit"]`` or the sidecar's provenance describes the regions).
    results : DataFrame or path
        Group results table (one or several analyses).
    participants : DataFrame or path, optional
        participants.tsv (groups and covariates for the figures and the descriptives).
    out : path
        Output directory (created).
    overwrite : bool
        Replace existing outputs; without it, any existing output stops the run before work starts.
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

    Returns
    -------
    dict
        ``tables`` (paths), ``figures`` (paths), ``methods``, ``html``, ``provenance`` (paths) and
        ``cautions`` (list of ``{"kind", "text"}``).

    Warns
    -----
    CautionWarning
        One summary when any caution applies (the cautions are written in the report).
    """
    out = Path(out)
    values = _as_table(values, "values", REQUIRED_VALUES)
    results = _as_table(results, "results", REQUIRED_RESULTS)
    participants = _as_table(participants, "participants", ("participant_id",))
    check_columns(values, REQUIRED_VALUES, "region values table")
    check_columns(results, REQUIRED_RESULTS, "results table")
    if participants is not None:
        check_columns(participants, ("participant_id",), "participants table")
        participants = participants.copy()
        participants["participant_id"] = participants["participant_id"].astype(str)
    check_report_outputs(out, overwrite)
    out.mkdir(parents=True, exist_ok=True)
    extra = dict(provenance or {})
    values_prov = values.attrs.get("roikit") or extra.get("values") or {}

    # ---------------------------------------------------------------- tables
    tables = results_tables(results)
    group_cols = [g for g in ordered_unique(text(v) for v in col(results, "group_column") if text(v))
                  if g in values.columns or (participants is not None and g in participants.columns)]
    desc = descriptives_table(values, participants=participants, group=group_cols[0] if group_cols else None,
                              number=len(tables) + 1)
    all_tables: list[ReportTable] = tables + [desc]
    table_paths: list[Path] = []
    import docx

    document = docx.Document()
    for t in all_tables:
        table_paths += t.write(out / "tables", overwrite=overwrite)
        t.to_docx(document=document)
        document.add_paragraph()
    import io

    buf = io.BytesIO()
    document.save(buf)
    table_paths.append(atomic_write_bytes(out / "tables" / "all_tables.docx", buf.getvalue(), overwrite=overwrite))

    # ---------------------------------------------------------------- figures
    figure_items: list[ReportFigure] = []
    figure_paths: list[Path] = []
    figure_errors: list[str] = []
    if figures:
        for i, item in enumerate(_figure_plan(values, results, participants), start=1):
            try:
                fig = item["make"]()
            except UsageError as exc:  # a figure that cannot be drawn is reported, never silently skipped
                figure_errors.append(f"{item['name']}: {exc}")
                continue
            formats = tuple(dict.fromkeys(tuple(figure_formats) + ("png",)))
            paths = save_figure(fig, out / "figures" / item["name"], width=item.get("width"), formats=formats,
                                overwrite=overwrite)
            figure_paths += paths
            png = next(p for p in paths if p.suffix == ".png").read_bytes()
            alt = re.sub(r"[*_{}^\\]", "", item["caption"]).split(". ")[0]
            figure_items.append(ReportFigure(png=png, alt=alt, caption=item["caption"], number=len(figure_items) + 1,
                                             name=item["name"], width_mm=float(fig.get_size_inches()[0] * 25.4)))

    # ---------------------------------------------------------------- text
    found = cautions(results, provenance=values_prov, circular=circular)
    methods_md = methods_text(values, results, participants=participants, provenance=values_prov, style="markdown")
    results_md = results_text(results, style="markdown")
    assumption_lines = assumptions(results)
    md = [f"# {title}", "", f"> {SCOPE_STATEMENT}", "", "## Methods", "", methods_md, "## Results", "", results_md]
    if found:
        md += ["## Cautions", ""] + [f"- {render(c['text'], 'markdown')}" for c in found] + [""]
    md += ["## Assumptions", ""] + [f"- {render(a, 'markdown')}" for a in assumption_lines] + [""]
    if figure_errors:
        md += ["## Figures not drawn", ""] + [f"- {e}" for e in figure_errors] + [""]
    methods_path = atomic_write_bytes(out / "methods.md", "\n".join(md).encode("utf-8"), overwrite=overwrite)

    # ---------------------------------------------------------------- html
    sections: list[Section] = []
    if found:
        sections.append(Section("cautions", "Cautions", ["<ul>" + "".join(
            f'<li data-kind="{c["kind"]}">{render(c["text"], "html")}</li>' for c in found) + "</ul>"],
            css_class="cautions"))
    sections.append(Section("methods", "Methods", [methods_text(values, results, participants=participants,
                                                                provenance=values_prov, style="html")]))
    body = [results_text(results, style="html")]
    body += [f'<div class="table-wrap">{t.to_html()}</div>' for t in tables]
    sections.append(Section("results", "Results", body))
    if figure_items:
        sections.append(Section("figures", "Figures", [figure_html(f) for f in figure_items]))
    sections.append(Section("descriptives", "Descriptive statistics", [f'<div class="table-wrap">{desc.to_html()}</div>']))
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
        "<p>Full details (inputs with SHA-256, versions, options, seeds) are in provenance.json.</p>"]))
    page = report_html(title=title, scope=SCOPE_STATEMENT, sections=sections,
                       footer=f"Written by roikit {__version__} on {created}.")
    html_path = atomic_write_bytes(out / "report.html", page.encode("utf-8"), overwrite=overwrite)

    # ---------------------------------------------------------------- provenance
    seeds = ordered_unique(text(v) for v in col(results, "seed") if text(v))
    outputs = [p for p in table_paths + figure_paths + [methods_path, html_path]]
    record = {
        "kind": "roikit report",
        "roikit_version": __version__,
        "created": created,
        "versions": versions,
        "inputs": extra.get("inputs", []),
        "options": {"title": title, "circular": list(circular or []), "figures": figures,
                    **extra.get("options", {})},
        "seeds": seeds,
        "analyses": [dict(k) for k, _ in split_analyses(results)],
        "cautions": [c["kind"] for c in found],
        "figures_not_drawn": figure_errors,
        "values_provenance": values_prov,
        "outputs": [{"path": os.fspath(p.relative_to(out)), "sha256": sha256_file(p)} for p in outputs],
    }
    prov_path = write_json(out / "provenance.json", record, overwrite=overwrite)
    if found:
        kinds = ordered_unique(c["kind"] for c in found)
        warnings.warn(CautionWarning(
            f"the report carries {len(found)} caution{'s' if len(found) != 1 else ''} ({', '.join(kinds)}); "
            f"read them in {html_path}"),
            stacklevel=2)
    return {"tables": table_paths, "figures": figure_paths, "methods": methods_path, "html": html_path,
            "provenance": prov_path, "cautions": found}
