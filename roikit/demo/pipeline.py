"""``roikit demo``: write the invented wayfinding study and run the pipeline on it.

The study goes to ``DIR/study`` (see :func:`roikit.demo.make_study`); the pipeline's outputs go
to ``DIR/results``. All data are invented.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from .. import __version__
from .._tables import read_table, sha256_file, write_table
from .._typing import PathLike, Seed
from ..errors import OutputExistsError
from ..extraction import extract, find_maps, write_values
from ..regions import Atlas, RegionSet, Sphere
from ..reporting import write_report
from ..stats import COLUMN_DESCRIPTIONS, run_design
from ..stats import mixed as _mixed  # noqa: F401 - registers the mixed design
from ..stats import precision as _precision  # noqa: F401 - registers the precision-weighted design
from .generate import DEFAULT_SEED, DEMO_ANALYSES, PRIOR_PEAK, DemoStudy, _is_demo_study, _umask, make_study

__all__ = ["DemoRun", "run_demo", "run_analyses", "demo_regions", "demo_maps"]

#: Steps of the demo pipeline, in order (shown by the progress bar).
STEPS = ("generate the study", "extract region values", "group statistics", "report")
#: Figure files of the demo's report (PNG only, embedded in report.html; ``roikit report`` writes PDF and SVG too).
FIGURE_FORMATS = ("png",)


@dataclass
class DemoRun:
    """What :func:`run_demo` did.

    Attributes
    ----------
    out : Path
        The demo folder.
    study : DemoStudy
        The generated study (``out / "study"``) with its ground truth.
    results : Path
        The results folder (``out / "results"``).
    values : DataFrame
        The region values table written to ``results / "region_values.tsv"``.
    group_results : DataFrame
        The group results of every analysis of the study file (``results / "group_results.tsv"``).
    report : dict
        What :func:`roikit.reporting.write_report` returned (paths, cautions).
    outputs : dict of str to Path
        Main files written, by name.
    seconds : dict of str to float
        Wall time per step.
    warnings : list of str
        Warnings raised by the pipeline (also re-issued after the progress bar closes).
    """

    out: Path
    study: DemoStudy
    results: Path
    values: pd.DataFrame
    group_results: pd.DataFrame
    report: dict
    outputs: dict[str, Path] = field(default_factory=dict)
    seconds: dict[str, float] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)


def demo_regions(study: PathLike) -> RegionSet:
    """The demo's region set: the atlas with its label table, then the prior-peak sphere."""
    study = Path(study)
    return RegionSet([
        Atlas(study / "atlas.nii.gz", labels=study / "atlas.tsv"),
        Sphere(PRIOR_PEAK["name"], center=PRIOR_PEAK["center"], radius=PRIOR_PEAK["radius"]),
    ])


def demo_maps(study: PathLike) -> pd.DataFrame:
    """The demo's maps table (effect and variance maps of every participant and contrast)."""
    return find_maps(
        "maps/sub-{subject}_contrast-{contrast}_effect.nii.gz",
        variance="maps/sub-{subject}_contrast-{contrast}_variance.nii.gz",
        root=Path(study),
    )


def _check_targets(out: Path, overwrite: bool) -> None:
    """Fail before any work if outputs exist and may not (or must not) be replaced."""
    study, results = out / "study", out / "results"
    existing = [p for p in (study, results) if p.exists()]
    if existing and not overwrite:
        raise OutputExistsError(
            f"{existing[0]}: exists; pass --overwrite (overwrite=True) to replace an earlier demo, "
            "or choose another --out folder"
        )
    if study.exists() and not _is_demo_study(study):
        raise OutputExistsError(
            f"{study}: exists and is not a roikit demo study (no ground_truth.json written by roikit.demo); "
            "refusing to replace it even with --overwrite; choose another --out folder"
        )
    if results.exists() and not study.exists():
        raise OutputExistsError(
            f"{results}: exists but {study} does not, so it is not an earlier demo's results; refusing to "
            "replace it even with --overwrite; choose another --out folder"
        )


def run_analyses(values: pd.DataFrame, *, participants: pd.DataFrame | None,
                 analyses=DEMO_ANALYSES) -> tuple[pd.DataFrame, dict[str, str]]:
    """Run each analysis (a dict with ``design`` and its options, as in the study file) on every region.

    Parameters
    ----------
    values : DataFrame
        Region values table (the contract's columns).
    participants : DataFrame or None
        participants.tsv as a table (groups and covariates).
    analyses : sequence of dict
        ``{"design": ..., **options}`` with the options of :func:`roikit.stats.run_design`; default the
        demo's analyses (those written to ``study.toml``).

    Returns
    -------
    results : DataFrame
        The group results of all analyses stacked, in order (the contract's group results columns plus
        each design's own; a column a design does not fill is n/a).
    columns : dict of str to str
        A description of every column, for the JSON sidecar.
    """
    frames, described = [], {}
    for analysis in analyses:
        options = dict(analysis)
        design = options.pop("design")
        result = run_design(values, design, participants=participants, **options)
        attrs = result.attrs.get("column_descriptions", {}) if isinstance(result.attrs, dict) else {}
        for column in result.columns:
            described.setdefault(column, attrs.get(column, COLUMN_DESCRIPTIONS.get(
                column, "design-specific column (see roikit.stats)")))
        frames.append(result)
    results = pd.concat(frames, ignore_index=True, sort=False)
    return results, {c: described[c] for c in results.columns}


def run_demo(
    out: PathLike,
    *,
    seed: Seed = DEFAULT_SEED,
    n_per_group: int = 16,
    overwrite: bool = False,
    progress: bool = True,
    figures: bool = True,
) -> DemoRun:
    """Write the invented wayfinding study to ``out/study`` and run the pipeline into ``out/results``.

    Parameters
    ----------
    out : path
        Demo folder (created if needed).
    seed : int, numpy Generator or None
        Seed of the generator (see :func:`roikit.demo.make_study`); the same seed gives the same
        study and the same results.
    n_per_group : int
        Participants per age group (16 in the demo).
    overwrite : bool
        Replace an earlier demo in ``out`` (never anything else).
    progress : bool
        Show progress bars (tqdm, on stderr).
    figures : bool
        Draw the report's figures (PNG; False for a quicker text-and-tables report).

    Returns
    -------
    DemoRun
        Paths, the generated study with its ground truth, the region values, the group results,
        the report's outputs, timings and warnings.

    Notes
    -----
    Steps, each through roikit's public API:

    1. generate the study (:func:`make_study`), including ``study/study.toml``;
    2. extract the mean of every atlas region and of the prior-peak sphere from every effect map,
       with the region-level variance from the variance maps, zeros treated as missing
       (:func:`roikit.extraction.extract`) -> ``results/region_values.tsv``;
    3. run every analysis listed in the study file (:func:`roikit.stats.run_design`, Holm and
       Benjamini-Hochberg corrections across regions) -> ``results/group_results.tsv``;
    4. write the report (:func:`roikit.reporting.write_report`) -> ``results/tables/``,
       ``results/figures/``, ``results/methods.md``, ``results/report.html``,
       ``results/provenance.json``.

    The results folder is assembled in a temporary folder and renamed into place when complete.
    The tests check the extracted values against the ground truth written by the generator.

    Examples
    --------
    >>> run = run_demo("roikit-demo", progress=False)  # doctest: +SKIP
    >>> run.outputs["report"]  # doctest: +SKIP
    PosixPath('roikit-demo/results/report.html')
    """
    from tqdm.auto import tqdm

    out = Path(out)
    _check_targets(out, overwrite)
    out.mkdir(parents=True, exist_ok=True)
    results = out / "results"
    seconds: dict[str, float] = {}
    bar = tqdm(total=len(STEPS), desc="roikit demo", unit="step", disable=not progress, leave=False)

    def step(k: int) -> float:
        bar.set_postfix_str(STEPS[k])
        return time.perf_counter()

    def done(k: int, t0: float) -> None:
        seconds[STEPS[k]] = time.perf_counter() - t0
        bar.update()

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            t0 = step(0)
            study = make_study(out / "study", seed=seed, n_per_group=n_per_group, overwrite=overwrite,
                               progress=progress)
            done(0, t0)

            tmp = Path(tempfile.mkdtemp(prefix=".results.tmp-", dir=out))
            try:
                t0 = step(1)
                values = extract(demo_maps(study.path), demo_regions(study.path), statistic="mean",
                                 keep_zeros=False, progress=progress)
                write_values(tmp / "region_values.tsv", values)
                done(1, t0)

                t0 = step(2)
                participants = read_table(study.path / "participants.tsv", label_columns=("participant_id",))
                group_results, columns = run_analyses(values, participants=participants)
                write_table(tmp / "group_results.tsv", group_results, sidecar={
                    "description": "roikit group results of the demo's analyses (study/study.toml), one row per "
                                   "analysis x region x term",
                    "columns": columns,
                    "analyses": list(DEMO_ANALYSES),
                    "software": {"roikit": __version__},
                    "note": "All data are invented (roikit demo). p_holm and p_fdr adjust across the regions of "
                            "the same design and term (family_size). For research group analysis, not for "
                            "clinical decisions.",
                })
                done(2, t0)

                t0 = step(3)
                report = write_report(
                    values, group_results, participants=participants, out=tmp, overwrite=True,
                    title="Wayfinding study (invented demo data)", figures=figures,
                    figure_formats=FIGURE_FORMATS,
                    provenance={
                        "demo": {"generator": "roikit.demo", "seed": study.ground_truth["seed"],
                                 "n_per_group": n_per_group, "note": "All data are invented."},
                        "inputs": {name: {"path": str(study.path / name), "sha256": sha256_file(study.path / name)}
                                   for name in ("study.toml", "participants.tsv", "atlas.nii.gz", "atlas.tsv")},
                    },
                )
                done(3, t0)

                os.chmod(tmp, 0o777 & ~_umask())  # mkdtemp creates 0700
                if results.exists():
                    trash = Path(tempfile.mkdtemp(prefix=".results.old-", dir=out))
                    os.replace(results, trash / "results")
                    os.replace(tmp, results)
                    shutil.rmtree(trash, ignore_errors=True)
                else:
                    os.replace(tmp, results)
            except BaseException:
                shutil.rmtree(tmp, ignore_errors=True)
                raise
        finally:
            bar.close()
    # warnings are shown after the progress bar has gone (paths in them point to the final folder)
    messages = []
    for w in caught:
        text = str(w.message).replace(str(tmp), str(results))
        messages.append(text)
        warnings.warn_explicit(text, w.category, w.filename, w.lineno)

    def moved(path) -> Path:
        return results / Path(path).relative_to(tmp)

    report = {
        key: ([moved(p) for p in value] if isinstance(value, list) and key in ("tables", "figures")
              else moved(value) if isinstance(value, Path) else value)
        for key, value in report.items()
    }
    outputs = {
        "study": study.path,
        "study_file": study.path / "study.toml",
        "ground_truth": study.path / "ground_truth.json",
        "region_values": results / "region_values.tsv",
        "group_results": results / "group_results.tsv",
        "report": results / "report.html",
        "methods": results / "methods.md",
    }
    return DemoRun(out=out, study=study, results=results, values=values, group_results=group_results,
                   report=report, outputs=outputs, seconds=seconds, warnings=messages)
