"""Running a whole study: extraction (through the cache), every analysis, the report (``roikit run``)."""

from __future__ import annotations

import json
import os
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import pandas as pd

from .._options import plural
from .._outputs import FolderOutputs
from .._tables import sha256_file, sidecar_path, write_json, write_table
from .._typing import PathLike
from ..errors import (WARNING_COLUMNS, RoikitError, RoikitWarning, UsageError, summarise_warnings, summarised,
                      warning_records)
from ..extraction import VALUE_COLUMNS
from ..functional import FUNCTIONAL_COLUMNS
from ..stats import COLUMN_DESCRIPTIONS
from .cache import _extract_with_cache
from .schema import OUTPUTS, Study, _listing, load_study

@dataclass
class StudyRun:
    """What :func:`run_study` did.

    Attributes
    ----------
    study : Study
    out : Path
        The output folder.
    values : DataFrame
        The region values table (also ``out/region_values.tsv``).
    results : DataFrame
        Every analysis's rows, concatenated in file order (also ``out/group_results.tsv``); the column
        ``analysis`` holds the analysis number (from 1).
    per_analysis : list of DataFrame
    outputs : dict of str to Path
    extracted, reused : int
        Maps read in this run, and maps taken from the cache.
    warnings : list of dict
        Warnings raised during the run (``category``, ``message``); they are also re-issued.
    seconds : dict of str to float
    """

    study: Study
    out: Path
    values: pd.DataFrame
    results: pd.DataFrame
    per_analysis: list
    outputs: dict
    extracted: int
    reused: int
    warnings: list
    seconds: dict

    def summary(self, *, alpha: float = 0.05) -> str:
        """A short text: regions x designs, what survived correction, warnings, where the outputs are."""
        study = self.study
        n_part = self.values["participant_id"].nunique()
        n_regions = self.values["region"].nunique()
        lines = [
            f"roikit run: {study.title}",
            f"  {n_part} participants, {self.extracted + self.reused} maps ({self.extracted} extracted, "
            f"{self.reused} from the cache{_skipped(study, self.extracted + self.reused)}{_run_maps(self)}), "
            f"{plural(n_regions, 'region')} x {plural(len(study.analyses), 'analysis', 'analyses')}",
        ]
        for analysis, rows in zip(study.analyses, self.per_analysis):
            lines.append(f"  {analysis.label}:")
            for term, part in rows.groupby("term", sort=False):
                lines.append(f"    {term}: " + _survivors(part, alpha))
            if "population_inference" in rows.columns and not rows["population_inference"].astype(bool).all():
                lines.append("    caution: fixed effects describe these participants only (no population inference)")
        if study.circular:
            lines.append(f"  caution: circular region {'definition' if len(study.circular) == 1 else 'definitions'}: "
                         f"{', '.join(study.circular)}")
        if self.warnings:
            problems = list(dict.fromkeys(w["problem"] for w in self.warnings))
            lines.append(f"  warnings: {plural(len(problems), 'problem')} ({plural(len(self.warnings), 'finding')}; "
                         "listed in warnings.tsv and the report)")
        else:
            lines.append("  warnings: none")
        ext = ".parquet" if "group_results.parquet" in self.outputs else ".tsv"
        lines.append(f"  outputs: {self.out}{os.sep} (report.html, methods.md/.docx, results.md/.docx, "
                     f"references.bib, group_results{ext}, region_values{ext}, tables/, figures/, index.tsv, "
                     "warnings.tsv, provenance.json)")
        return "\n".join(lines)

def _primary_of(correct) -> str:
    from ..stats.corrections import primary_correction

    return primary_correction(correct)


def _run_maps(run) -> str:
    """'; 64 per-run maps for the functional regions, read' when the study has [maps] run_effect."""
    if run.study.run_maps is None:
        return ""
    info = (run.values.attrs.get("roikit") or {}).get("functional") or {}
    return (f"; {len(run.study.run_maps)} per-run maps for the functional regions, "
            f"{'from the cache' if info.get('from_cache') else 'read'}")


def _skipped(study: Study, used: int) -> str:
    """'; 96 maps of contrasts no analysis uses not read' when the analyses use only some contrasts."""
    rest = len(study.maps) - used
    return f"; {rest} maps of contrasts no analysis uses not read" if rest > 0 else ""


def _survivors(part: pd.DataFrame, alpha: float) -> str:
    """'p < .05 after Holm correction: k/n regions (names)' for one term of one analysis, by its PRIMARY correction
    (the first entry of the ``correction`` column; ``none``: uncorrected)."""
    from ..reporting.format import correction_name

    n = int(part["p"].notna().sum())
    cell = part["correction"].dropna().astype(str).iloc[0] if "correction" in part.columns and \
        part["correction"].notna().any() else "none"
    primary = _primary_of(cell)
    column = f"p_{primary}"
    if primary == "none" or column not in part.columns or part[column].isna().all():
        hit = part.loc[part["p"] < alpha, "region"].tolist()
        head = f"p < {alpha:g} uncorrected ({n} region{'s' if n != 1 else ''} tested)"
    else:
        hit = part.loc[part[column] < alpha, "region"].tolist()
        head = f"p < {alpha:g} after {correction_name(primary)} correction"
    return f"{head}: {len(hit)}/{n}" + (f" ({_listing(hit, 5)})" if hit else "")

#: The writer recorded in a results folder's manifest (:mod:`roikit._outputs`).
RUN_WRITER = "roikit run"


def _identity(study: Study, out: Path) -> dict:
    """What a results folder was written for: the study file (absolute, and relative to the folder)."""
    path = Path(os.path.abspath(study.path))
    try:
        relative = os.path.relpath(path, os.path.abspath(out)).replace(os.sep, "/")
    except ValueError:  # another drive (Windows)
        relative = None
    return {"study_file": os.fspath(path), "study_file_from_out": relative, "title": study.title,
            "study_sha256": sha256_file(path)}  # recorded, not compared: editing the study file keeps its folder


#: Identity keys that make a results folder "this study's" (either suffices: a moved project still matches).
_SAME_STUDY = ("study_file", "study_file_from_out")


def run_study(
    study: Study | PathLike,
    *,
    out: PathLike | None = None,
    overwrite: bool = False,
    progress: bool | None = None,
    figures: bool = True,
    figure_formats: Sequence[str] = ("pdf", "svg", "png"),
    client=None,
    table_format: str | None = None,
    figure_jobs: int | None = None,
) -> StudyRun:
    """Run a study file: extraction (with a cache), every analysis, the report, provenance.

    Parameters
    ----------
    study : Study or path
        A study (:func:`load_study`) or the path of a study file (validated first; nothing runs when it has
        problems).
    out : path, optional
        Output folder; default ``results`` beside the study file.
    overwrite : bool
        Write into a folder that roikit did not write for this study file (other files, or the outputs of
        another study or command). Not needed to re-run a study into its own results folder: the files the
        earlier run wrote (listed in the folder's manifest) are replaced as a set. Files roikit did not write
        are never replaced or removed, except a file with the very name of a new output, and only with
        ``overwrite=True``.
    progress : bool, optional
        Progress bar while extracting (default: only for 20 maps or more).
    figures : bool
        Draw the report's figures (False: tables and text only, much faster).
    figure_formats : sequence of {"pdf", "svg", "png"}
        Files written per figure (the HTML report embeds the PNG, drawn in any case).
    client : distributed.Client, optional
        Run extraction (the maps the cache lacks) and every analysis's per-region fits on a Dask cluster (optional
        ``distributed`` extra); the outputs are the same bytes as without it. The report is drawn here.
    table_format : {"tsv", "parquet"}, optional
        File format of ``region_values`` and ``group_results`` (default: the study file's ``[study] table_format``,
        else ``tsv``); Parquet tables have the same JSON sidecar.
    figure_jobs : int, optional
        Worker processes drawing the figures (see :func:`roikit.reporting.write_report`, ``n_jobs``).

    Returns
    -------
    StudyRun

    Notes
    -----
    Written into ``out``: ``region_values.tsv`` and ``group_results.tsv`` (with JSON sidecars),
    ``tables/``, ``figures/``, ``report.html``, ``methods.md`` (from :func:`roikit.reporting.write_report`)
    and ``provenance.json``. The extraction cache lives in ``out/.cache/``: a map whose file path, size and
    modification time (and those of its variance map) are unchanged, extracted with the same realised regions
    (SHA-256 of the grid, names, voxels and weights), statistic and zero rule, is not read again. The merged
    table equals a fresh extraction (tested). Only the contrasts the analyses use are extracted.

    Outputs are a transaction (:mod:`roikit._outputs`): a lock stops a second run into the same folder; all
    outputs are written into a staging folder inside ``out`` and then switched in as one set, replacing the
    earlier run's own files (its figures are removed even when this run draws none); a crash during the switch
    is finished by the next run.

    Examples
    --------
    >>> run = run_study("study/study.toml", out="results")   # doctest: +SKIP
    >>> print(run.summary())                                  # doctest: +SKIP
    """
    t_start = time.perf_counter()
    if not isinstance(study, Study):
        study = load_study(study)
    out = Path(out) if out is not None else study.default_out
    ext = _table_suffix(table_format or study.table_format)
    from ..reporting import write_report
    from ..reporting.report import labels_from_sidecar

    seconds: dict[str, float] = {}

    with warnings.catch_warnings(record=True) as caught, \
            FolderOutputs(out, writer=RUN_WRITER, identity=_identity(study, out), match=_SAME_STUDY,
                          overwrite=overwrite, what=f"study file {study.path}") as tx:
        warnings.simplefilter("always")
        t0 = time.perf_counter()
        values, cache_info = _extract_with_cache(study, out, progress=progress, client=client)
        seconds["extraction"] = time.perf_counter() - t0

        t0 = time.perf_counter()
        per_analysis = []
        from ..functional import collapse_runs

        analysed = collapse_runs(values)  # maps with runs: one value per participant (the mean over runs)
        for analysis in study.analyses:
            try:
                rows = analysis.run(analysed, study.participants, client=client)
            except RoikitError as exc:
                raise type(exc)(f"{analysis.label}: {exc}") from exc
            per_analysis.append(rows)
        results = pd.concat([r.assign(analysis=a.number) for a, r in zip(study.analyses, per_analysis)],
                            ignore_index=True, sort=False)
        seconds["statistics"] = time.perf_counter() - t0

        t0 = time.perf_counter()
        tmp = tx.staging
        written = [
            write_table(tmp / f"region_values{ext}", values,
                        sidecar={"columns": {c: {**VALUE_COLUMNS, **FUNCTIONAL_COLUMNS}.get(c, "")
                                             for c in values.columns},
                                 "provenance": values.attrs.get("roikit", {})}),
            write_table(tmp / f"group_results{ext}", results,
                        sidecar=_results_sidecar(study, results, per_analysis)),
        ]
        written += [sidecar_path(p) for p in written]
        inputs = [{"role": "study file", "path": os.fspath(study.path), "sha256": sha256_file(study.path)}]
        if study.participants_path is not None:
            inputs.append({"role": "participants", "path": os.fspath(study.participants_path),
                           "sha256": sha256_file(study.participants_path)})
        from ..reporting._common import read_sidecar_labels

        so_far = warning_records([w for w in list(study.load_warnings) + list(caught)
                                  if issubclass(w.category, RoikitWarning)])
        write_report(analysed, results, participants=study.participants, out=tmp, overwrite=True, _staged=True,
                     labels={**read_sidecar_labels(getattr(study, "contrasts_path", None)),
                             **read_sidecar_labels(study.participants_path)},
                     provenance={"inputs": inputs, "options": {"command": "roikit run", "out": os.fspath(out)},
                                 "warnings": summarise_warnings(so_far)},
                     title=study.title, circular=study.circular, figures=figures,
                     figure_formats=tuple(figure_formats), value_label=study.value_label, regions=study.realised,
                     column_labels=labels_from_sidecar(study.participants_path), n_jobs=figure_jobs)
        seconds["report"] = time.perf_counter() - t0
        for w in caught:  # messages naming the temporary folder name the output folder instead
            if str(tmp) in str(w.message):
                w.message = w.category(str(w.message).replace(str(tmp), str(out)))
        rows = warning_records([w for w in list(study.load_warnings) + list(caught)
                                if issubclass(w.category, RoikitWarning)])
        recorded = [{k: r[k] for k in WARNING_COLUMNS} for r in rows]
        written.append(write_table(tmp / "warnings.tsv", pd.DataFrame(recorded, columns=list(WARNING_COLUMNS)),
                                   sidecar={"description": "every warning of this run, one row per finding"}))
        seconds["total"] = time.perf_counter() - t_start
        _extend_provenance(tmp / "provenance.json", study, out, cache_info, per_analysis, recorded, seconds,
                           written, tmp)
        tx.commit()
    for w in caught:  # re-issue other libraries' warnings as they were, roikit's one per problem
        if not issubclass(w.category, RoikitWarning):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    for w in summarised(rows):
        warnings.warn(w, stacklevel=2)
    outputs = {name: out / name for name in OUTPUTS if (out / name).exists()}
    return StudyRun(study=study, out=out, values=values, results=results, per_analysis=per_analysis,
                    outputs=outputs, extracted=cache_info["extracted"], reused=cache_info["reused"],
                    warnings=recorded, seconds=seconds)

def _table_suffix(table_format: str) -> str:
    from .._options import check_value, option, spell

    problem = check_value(option("table_format", "study"), table_format)
    if problem:
        raise UsageError(f"{spell('table_format')} {problem}")
    return ".parquet" if table_format == "parquet" else ".tsv"


def _results_sidecar(study: Study, results: pd.DataFrame, per_analysis: list) -> dict:
    extra: dict = {}
    for rows in per_analysis:
        described = rows.attrs.get("column_descriptions", {}) if isinstance(rows.attrs, dict) else {}
        extra.update(described if isinstance(described, dict) else {})
    columns = {}
    for c in results.columns:
        if c == "analysis":
            columns[c] = "number of the [[analysis]] block in the study file (from 1)"
        else:
            columns[c] = extra.get(c, COLUMN_DESCRIPTIONS.get(c, "design-specific column (see roikit.stats)"))
    return {
        "description": f"roikit group results of study {study.title!r}: every [[analysis]] of {study.path.name}, "
                       "one row per analysis x region x term",
        "columns": columns,
        "analyses": [{"analysis": a.number, "design": a.design, **a.options, "correct": a.correct,
                      "primary_correction": _primary_of(a.correct),
                      "permutations": a.permutations, "seed": a.seed, "confidence": a.confidence}
                     for a in study.analyses],
        "note": "p_holm and p_fdr adjust across the regions of the same analysis and term (family_size). "
                "For research group analysis, not for clinical decisions.",
    }

def _analysis_records(study: Study, per_analysis: list) -> list[dict]:
    records = []
    for a, rows in zip(study.analyses, per_analysis):
        seeds = rows["seed"].dropna().unique().tolist() if "seed" in rows.columns else []
        records.append({"analysis": a.number, "design": a.design, "options": a.options, "correct": a.correct,
                        "permutations": a.permutations, "seed": seeds[0] if seeds else a.seed,
                        "confidence": a.confidence, "rows": len(rows), "terms": list(pd.unique(rows["term"]))})
    return records

def _extend_provenance(path: Path, study: Study, out: Path, cache_info: dict, per_analysis: list,
                       recorded: list, seconds: dict, written: list, tmp: Path) -> None:
    """Add the run's record (study file, analyses, cache, warnings) to the report's provenance.json."""
    try:
        with open(path, encoding="utf-8") as fh:
            record = json.load(fh)
    except (OSError, ValueError):
        record = {}
    record["kind"] = "roikit run"
    outputs = record.get("outputs", [])
    outputs += [{"path": os.fspath(p.relative_to(tmp)), "sha256": sha256_file(p)} for p in written]
    record["outputs"] = outputs
    record["run"] = {
        "study_file": os.fspath(study.path),
        "title": study.title,
        "study": study.raw,
        "out": os.fspath(out),
        "extraction": {"statistic": study.statistic, "keep_zeros": study.keep_zeros, "jobs": study.jobs,
                       "n_maps": cache_info.get("maps_analysed", len(study.maps)), "regions": list(study.realised.names), "cache": cache_info},
        "circular_regions": list(study.circular),
        "analyses": _analysis_records(study, per_analysis),
        "warnings": recorded,
        "seconds": seconds,
        "note": "For research group analysis, not for clinical decisions about an individual patient.",
    }
    write_json(path, record, overwrite=True)

