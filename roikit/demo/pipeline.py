"""``roikit demo``: write the invented wayfinding study and run the pipeline on it.

The study goes to ``DIR/study`` (see :func:`roikit.demo.make_study`); the pipeline's outputs go
to ``DIR/results``. All data are invented.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from .._outputs import consent_hint, consent_option
from .._options import progress_bar
from .._typing import PathLike, Seed
from ..errors import OutputExistsError
from ..extraction import find_maps
from ..regions import Atlas, RegionSet, Sphere
from ..study import run_study
from .generate import DEFAULT_SEED, PRIOR_PEAK, DemoStudy, _is_demo_study, make_study

__all__ = ["DemoRun", "run_demo", "demo_regions", "demo_maps"]

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
            f"{existing[0]}: exists; {consent_hint()} to replace an earlier demo (its study is generated "
            "again), or choose another output folder"
        )
    if study.exists() and not _is_demo_study(study):
        raise OutputExistsError(
            f"{study}: exists and is not a roikit demo study (no ground_truth.json written by roikit.demo); "
            f"refusing to replace it even with {consent_option()}; choose another output folder"
        )
    if results.exists() and not study.exists():
        raise OutputExistsError(
            f"{results}: exists but {study} does not, so it is not an earlier demo's results; refusing to "
            f"replace it even with {consent_option()}; choose another output folder"
        )


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
    2. run that study file exactly as ``roikit run study/study.toml --out results`` does
       (:func:`roikit.study.run_study`): extract the mean of every atlas region and of the prior-peak
       sphere from every effect map with the region-level variance from the variance maps, zeros treated
       as missing -> ``results/region_values.tsv``; every analysis of the study file (Holm and
       Benjamini-Hochberg across regions) -> ``results/group_results.tsv``; the report ->
       ``results/tables/``, ``results/figures/`` (PNG only, to keep the demo quick), ``results/methods.md``,
       ``results/report.html``, ``results/provenance.json``.

    The tests check the extracted values against the ground truth written by the generator, and that
    ``roikit run`` on the study file reproduces the demo's results.

    Examples
    --------
    >>> run = run_demo("roikit-demo", progress=False)  # doctest: +SKIP
    >>> run.outputs["report"]  # doctest: +SKIP
    PosixPath('roikit-demo/results/report.html')
    """
    out = Path(out)
    _check_targets(out, overwrite)
    out.mkdir(parents=True, exist_ok=True)
    results = out / "results"
    seconds: dict[str, float] = {}
    bar = progress_bar(show=progress, total=2, desc="roikit demo", unit="step", leave=False)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            bar.set_postfix_str(STEPS[0])
            t0 = time.perf_counter()
            study = make_study(out / "study", seed=seed, n_per_group=n_per_group, overwrite=overwrite,
                               progress=progress)
            seconds[STEPS[0]] = time.perf_counter() - t0
            bar.update()
            bar.set_postfix_str("roikit run study/study.toml")
            # the demo is a study like any other: `roikit run` does the rest (extraction, analyses, report)
            run = run_study(study.path / "study.toml", out=results, overwrite=overwrite, progress=progress,
                            figures=figures, figure_formats=FIGURE_FORMATS)
            bar.update()
        finally:
            bar.close()
    seconds[STEPS[1]] = run.seconds.get("extraction", float("nan"))
    seconds[STEPS[2]] = run.seconds.get("statistics", float("nan"))
    seconds[STEPS[3]] = run.seconds.get("report", float("nan"))
    messages = []
    for w in caught:  # shown after the progress bar has gone
        messages.append(str(w.message))
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    outputs = {
        "study": study.path,
        "study_file": study.path / "study.toml",
        "ground_truth": study.path / "ground_truth.json",
        "region_values": results / "region_values.tsv",
        "group_results": results / "group_results.tsv",
        "report": results / "report.html",
        "methods": results / "methods.md",
    }
    report = {"html": results / "report.html", "methods": results / "methods.md",
              "tables": sorted((results / "tables").glob("*")),
              "figures": sorted((results / "figures").glob("*"))}
    return DemoRun(out=out, study=study, results=results, values=run.values, group_results=run.results,
                   report=report, outputs=outputs, seconds=seconds, warnings=messages)
