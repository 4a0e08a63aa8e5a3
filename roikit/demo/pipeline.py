"""``roikit demo``: write the invented wayfinding study and run the pipeline on it.

The study goes to ``DIR/study`` (see :func:`roikit.demo.make_study`); the pipeline's outputs go
to ``DIR/results``. All data are invented.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from .._typing import PathLike, Seed
from ..errors import OutputExistsError
from ..extraction import extract, find_maps, write_values
from ..regions import Atlas, RegionSet, Sphere
from .generate import DEFAULT_SEED, PRIOR_PEAK, DemoStudy, _is_demo_study, _umask, make_study

__all__ = ["DemoRun", "run_demo", "demo_regions", "demo_maps"]

#: Steps of the demo pipeline, in order (shown by the progress bar).
STEPS = ("generate the study", "extract region values")


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
    outputs : dict of str to Path
        Main files written, by name.
    seconds : dict of str to float
        Wall time per step.
    """

    out: Path
    study: DemoStudy
    results: Path
    values: pd.DataFrame
    outputs: dict[str, Path] = field(default_factory=dict)
    seconds: dict[str, float] = field(default_factory=dict)


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


def run_demo(
    out: PathLike,
    *,
    seed: Seed = DEFAULT_SEED,
    n_per_group: int = 16,
    overwrite: bool = False,
    progress: bool = True,
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

    Returns
    -------
    DemoRun
        Paths, the generated study with its ground truth, the region values table and timings.

    Notes
    -----
    Steps: generate the study (:func:`make_study`); extract the mean of every atlas region and of
    the prior-peak sphere from every effect map, with the region-level variance from the variance
    maps, zeros treated as missing (:func:`roikit.extraction.extract`), written to
    ``results/region_values.tsv`` with its JSON sidecar. The tests check the extracted values
    against the ground truth written by the generator.

    Examples
    --------
    >>> run = run_demo("roikit-demo", progress=False)  # doctest: +SKIP
    >>> run.outputs["region_values"]  # doctest: +SKIP
    PosixPath('roikit-demo/results/region_values.tsv')
    """
    from tqdm.auto import tqdm

    out = Path(out)
    _check_targets(out, overwrite)
    out.mkdir(parents=True, exist_ok=True)
    results = out / "results"
    seconds: dict[str, float] = {}
    bar = tqdm(total=len(STEPS), desc="roikit demo", unit="step", disable=not progress, leave=False)
    try:
        bar.set_postfix_str(STEPS[0])
        t0 = time.perf_counter()
        study = make_study(out / "study", seed=seed, n_per_group=n_per_group, overwrite=overwrite,
                           progress=progress)
        seconds[STEPS[0]] = time.perf_counter() - t0
        bar.update()

        # results are written to a temporary folder and renamed into place when complete
        tmp = Path(tempfile.mkdtemp(prefix=".results.tmp-", dir=out))
        try:
            bar.set_postfix_str(STEPS[1])
            t0 = time.perf_counter()
            values = extract(demo_maps(study.path), demo_regions(study.path), statistic="mean", keep_zeros=False,
                             progress=progress)
            write_values(tmp / "region_values.tsv", values)
            seconds[STEPS[1]] = time.perf_counter() - t0
            bar.update()
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
    outputs = {
        "study": study.path,
        "study_file": study.path / "study.toml",
        "ground_truth": study.path / "ground_truth.json",
        "region_values": results / "region_values.tsv",
    }
    return DemoRun(out=out, study=study, results=results, values=values, outputs=outputs, seconds=seconds)
