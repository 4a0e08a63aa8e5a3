"""Study files: a whole analysis (maps, participants, regions, designs) described as data, run in one go.

A study file is TOML whose keys mirror the command-line options (see the contract)::

    [study]
    title = "Wayfinding study"
    participants = "participants.tsv"          # optional

    [maps]
    effect = "maps/sub-{subject}_contrast-{contrast}_effect.nii.gz"
    variance = "maps/sub-{subject}_contrast-{contrast}_variance.nii.gz"   # optional
    # or: list = "maps.tsv"                     (a map list: participant_id, contrast, path, ...)

    [regions]
    atlas = "atlas.nii.gz"
    labels = "atlas.tsv"
    # optional: split_hemispheres = true (or a list of region names), within = "brain_mask.nii.gz",
    #           select = [...], rename = {old = "new"}, circular = ["prior peak"]
    [[regions.sphere]]
    name = "prior peak"
    center = [30.0, -20.0, -14.0]
    radius = 6.0
    [[regions.mask]]
    name = "my mask"
    image = "mask.nii.gz"
    [[regions.probability]]
    image = "prob.nii.gz"
    threshold = 0.5
    name = "my region"                          # or labels = "prob.tsv" for a 4D image

    [extraction]                                # optional
    statistic = "mean"                          # mean, median, trimmed-mean, weighted-mean
    keep_zeros = false
    jobs = 1

    [[analysis]]
    design = "two-group"
    contrast = "novel"
    group = "group"
    levels = ["younger", "older"]
    # any of: versus, welch, formula, random, crossed, tau2, correct, permutations, seed, confidence

Paths are relative to the study file. :func:`load_study` validates the *whole* file before any work starts
and reports every problem at once, each with its key path (``analysis[2].levels: ...``; blocks are counted
from 1 in file order), in one :class:`StudyError`. :func:`run_study` extracts (reusing a cache of earlier
runs), runs every analysis, writes the report and prints nothing; :meth:`StudyRun.summary` is the short
text ``roikit run`` prints.

A study file is data and never runs code: formulas (``formula``, ``random``) are checked token by token
(:func:`check_formula`) before they reach the formula library.

Region operations are applied in this order: hemisphere split, intersection with ``within``, ``select``,
``rename``.

The package is split by job: :mod:`~roikit.study.schema` (keys, validation, the checked :class:`Study`),
:mod:`~roikit.study.cache` (the extraction cache, :func:`extract_study`) and :mod:`~roikit.study.run`
(:func:`run_study`, :class:`StudyRun`); :mod:`~roikit.study.init` writes a first study file from a folder of maps
(:func:`write_study_file`, ``roikit init``) and :mod:`~roikit.study.reference` the study-file reference page.
"""

from .cache import extract_study
from .init import Proposal, propose_study, write_study_file
from .run import StudyRun, run_study
from .schema import (
    CACHE_FOLDER,
    FORMULA_TRANSFORMS,
    OUTPUTS,
    STUDY_KEYS,
    Analysis,
    Study,
    StudyError,
    check_formula,
    load_study,
)

__all__ = [
    "StudyError",
    "Analysis",
    "Study",
    "StudyRun",
    "load_study",
    "run_study",
    "extract_study",
    "propose_study",
    "write_study_file",
    "Proposal",
    "check_formula",
    "FORMULA_TRANSFORMS",
    "STUDY_KEYS",
    "OUTPUTS",
    "CACHE_FOLDER",
]
