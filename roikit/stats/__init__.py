"""Group statistics across regions: summary-statistics random effects, effect sizes, corrections.

Participants are a random sample, so group inference rests on the between-participant variability of their
first-level estimates. Every design runs on all regions at once (a region is a column).

Examples
--------
>>> from roikit.stats import run_design
>>> results = run_design(values, "one-sample", contrast="novel")          # doctest: +SKIP
>>> results[["region", "estimate", "p", "p_holm", "effect_size"]]         # doctest: +SKIP
"""

from __future__ import annotations

import inspect
import os
from typing import Sequence

import numpy as np
import pandas as pd

from .._options import _ENTRY, flag, spell
from .._tables import read_table
from .._typing import Seed
from ..errors import UsageError
from ._common import (
    resolve_seed as _resolve_seed,
    COLUMN_DESCRIPTIONS,
    check_confidence,
    check_values,
    order_columns,
)
from ._chunks import fit_regions
from ._registry import DESIGNS, PERMUTATIONS, available_designs, get_design, register
from .corrections import adjust, parse_corrections
from .evidence import add_evidence
from . import designs  # noqa: F401 - registers one-sample, paired, two-group, glm
from . import precision  # noqa: F401,E402 - registers precision-weighted
from . import mixed  # noqa: F401,E402 - registers mixed
from . import fixed  # noqa: F401,E402 - registers fixed-effects
from . import repeated  # noqa: F401,E402 - registers repeated-measures, region-difference

__all__ = ["run_design", "DESIGNS", "register", "available_designs", "COLUMN_DESCRIPTIONS"]


def _participants_table(participants) -> pd.DataFrame | None:
    if participants is None or isinstance(participants, pd.DataFrame):
        return participants
    if isinstance(participants, (str, os.PathLike)):
        return read_table(participants, label_columns=("participant_id",))
    raise UsageError(
        f"participants must be a DataFrame or the path of participants.tsv, got {type(participants).__name__}"
    )


def _flag(name: str) -> str:
    """A design option as the user spells it where they are (``--jobs`` on the command line, ``n_jobs`` in
    Python)."""
    return flag(name) if _ENTRY.get() == "cli" else name


def _check_options(func, design: str, options: dict) -> None:
    """Raise :class:`UsageError` for an option the design does not take (named as on the command line)."""
    parameters = inspect.signature(func).parameters
    required = [n for n, p in parameters.items() if p.kind is inspect.Parameter.KEYWORD_ONLY
                and p.default is inspect.Parameter.empty and n not in ("participants", "confidence")]
    lacking = [n for n in required if n not in options]
    if lacking:
        raise UsageError(
            f"design {design!r} needs {', '.join(spell(n) for n in lacking)}; none was given"
        )
    if any(p.kind is inspect.Parameter.VAR_KEYWORD for p in parameters.values()):
        return
    accepted = [n for n, p in parameters.items() if p.kind is inspect.Parameter.KEYWORD_ONLY
                and n not in ("participants", "confidence")]
    unknown = [k for k in options if k not in accepted]
    if unknown:
        raise UsageError(
            f"{'option' if len(unknown) == 1 else 'options'} {', '.join(_flag(k) for k in unknown)} "
            f"{'does' if len(unknown) == 1 else 'do'} not apply to design {design!r}; "
            f"it takes {', '.join(_flag(k) for k in accepted) or 'no options'}"
        )


def _gate_formulas(options: dict) -> None:
    """Every formula option passes the formula gate (:mod:`roikit.stats.formula`) before a design sees it."""
    from .formula import parse_formula

    for name in ("formula", "random"):
        if name in options:
            parse_formula(options[name], parameter=name)
    for name in ("crossed", "group"):
        value = options.get(name)
        if value is not None and not isinstance(value, str):
            raise UsageError(f"{name}: expected a column name (a string), got {value!r}")


def run_design(
    values: pd.DataFrame,
    design: str,
    *,
    participants: pd.DataFrame | str | os.PathLike | None = None,
    correct: str | Sequence[str] | None = ("holm", "fdr"),
    permutations: int = 0,
    seed: Seed = None,
    confidence: float = 0.95,
    client=None,
    chunk_regions: int | None = None,
    **options,
) -> pd.DataFrame:
    """Run a group design on every region at once and correct across regions.

    Parameters
    ----------
    values : DataFrame
        Region values table (participant_id, [session_id], contrast, region, value, n_voxels, n_valid,
        [variance]), as written by ``roikit extract``.
    design : str
        A registered design: ``one-sample``, ``paired``, ``two-group``, ``glm`` (and, when installed,
        ``precision-weighted``, ``mixed``, ``fixed-effects``).
    participants : DataFrame or path, optional
        participants.tsv (keyed by participant_id), needed for groups and covariates.
    correct : str or sequence of str
        Corrections across regions within design and term, the first being the PRIMARY one (used by the text,
        table notes, figure markers and run summary): ``holm``, ``fdr`` (Benjamini-Hochberg), ``bonferroni``,
        ``fwe`` (max-statistic permutations; needs ``permutations``) or ``none`` (uncorrected primary report).
        ``p_holm`` and ``p_fdr`` are always written; ``bonferroni`` adds ``p_bonferroni``, permutations ``p_fwe``.
        The ``correction`` column lists what the rows carry, primary first.
    permutations : int
        Number of permutations for the max-statistic family-wise p (``p_fwe``); 0 for none. When the number of
        distinct permutations is at most this, they are enumerated exactly.
    seed : int, numpy Generator or None
        Seed of the permutations; recorded in the ``seed`` column (drawn and recorded when None).
    confidence : float
        Confidence level of the intervals.
    client : distributed.Client, optional
        Fit the regions on a Dask cluster (optional ``distributed`` extra): one task per chunk of regions, gathered
        in region order; permutations run as one task. Results are identical to a run without it.
    chunk_regions : int, optional
        Regions per chunk (default 16). Designs that test each region on its own rows (all but repeated-measures
        and region-difference) are fitted chunk by chunk, here or on the cluster alike, so both give the same
        numbers; corrections across regions are applied afterwards, on the whole family.
    **options
        Design options, as the command-line options in snake_case: contrast, versus, group, levels, welch,
        formula, tau2, random, crossed.

    Returns
    -------
    DataFrame
        One row per region x term. Contract columns (region, design, term, n, estimate, se, df, statistic,
        statistic_type, p, ci_low, ci_high, confidence, effect_size, effect_size_type, effect_size_ci_low,
        effect_size_ci_high, p_holm, p_fdr, [p_fwe], [p_bonferroni]) followed by the choices and diagnostics
        (contrast, versus, group_column, levels, formula, df_method, df1, family_size, correction, permutations,
        seed, population_inference, excluded_ids, n_outliers, outlier_ids, shapiro_w, shapiro_p, n_low_coverage,
        low_coverage_ids) and design-specific columns; see ``COLUMN_DESCRIPTIONS``.

    Notes
    -----
    Corrections treat the regions of one design and term as the family (repeated-measures rows correct the
    Greenhouse-Geisser p, ``p_gg``, where there is one: the p the report gives for F tests); regions whose p is n/a are not counted
    in ``family_size``. Holm and Benjamini-Hochberg are checked against statsmodels' ``multipletests``.
    """
    func = get_design(design)
    confidence = check_confidence(confidence)
    corrections = parse_corrections(correct) or ("none",)
    if isinstance(permutations, (bool, np.bool_)) or not isinstance(permutations, (int, np.integer)) or permutations < 0:
        raise UsageError(f"permutations must be a non-negative integer, got {permutations!r}")
    permutations = int(permutations)
    if "fwe" in corrections and not permutations:
        raise UsageError(
            "correction 'fwe' (max-statistic permutation family-wise p) needs permutations: pass permutations=N "
            "(--permutations N, e.g. 5000), or choose holm, fdr, bonferroni or none")
    given, values = values, check_values(values)
    participants = _participants_table(participants)
    options = {k: v for k, v in options.items() if v is not None}
    evidence = {k: options.pop(k) for k in ("equivalence", "bayes_factor", "prior_scale") if k in options}
    _check_options(func, design, options)
    _gate_formulas(options)
    if "posthoc_correction" in inspect.signature(func).parameters and "posthoc_correction" not in options:
        # post-hoc pairs are corrected with the analysis' primary correction (fwe has no post-hoc form: Holm)
        options["posthoc_correction"] = corrections[0] if corrections[0] in ("holm", "fdr", "bonferroni",
                                                                             "none") else "holm"

    results = fit_regions(func, design, values, participants=participants, confidence=confidence,
                          options=options, client=client, chunk_regions=chunk_regions, given=given)
    results = results.reset_index(drop=True)
    if evidence:
        results = add_evidence(results, design=design, **evidence)

    # corrections across regions, per term (the design is constant within one call)
    for column in ("p_holm", "p_fdr", "p_bonferroni"):
        if column != "p_bonferroni" or "bonferroni" in corrections:
            results[column] = np.nan
    results["family_size"] = 0
    for term, index in results.groupby("term", sort=False).groups.items():
        p = results.loc[index, "p"].to_numpy(float)
        if "p_gg" in results.columns:  # repeated measures: correct the Greenhouse-Geisser p the report gives
            p_gg = results.loc[index, "p_gg"].to_numpy(float)
            p = np.where(np.isfinite(p_gg), p_gg, p)
        results.loc[index, "family_size"] = int(np.sum(~np.isnan(p)))
        results.loc[index, "p_holm"] = adjust(p, "holm")
        results.loc[index, "p_fdr"] = adjust(p, "fdr")
        if "bonferroni" in corrections:
            results.loc[index, "p_bonferroni"] = adjust(p, "bonferroni")
    # primary first, in the order asked; then what else the rows carry (permutations add fwe)
    applied = list(corrections)
    if permutations and "fwe" not in applied:
        applied.append("fwe")
    results["correction"] = ",".join(applied)

    if permutations:
        permute = PERMUTATIONS.get(design)
        if permute is None:
            raise UsageError(
                f"design {design!r} does not support permutations; use {spell('permutations', 0)} or one "
                f"of: {', '.join(d for d in available_designs() if d in PERMUTATIONS)}"
            )
        recorded_seed, rng = _resolve_seed(seed)
        if client is None:
            out = permute(values, participants=participants, permutations=permutations, rng=rng, **options)
        else:  # one task: the maximum statistic spans every region (the same generator state, the same draws)
            from ._chunks import remote_options, replay, submit_captured, validated

            out, stream = submit_captured(client, validated, permute, given, participants=participants,
                                          permutations=permutations, rng=rng, **remote_options(options)).result()
            replay([stream])
        results["p_fwe"] = np.nan
        for term, index in results.groupby("term", sort=False).groups.items():
            if term in out:
                results.loc[index, "p_fwe"] = np.asarray(out[term], dtype=float)
        for name, per_term in out.get("_columns", {}).items():  # per-region permutation p a design may add
            results[name] = np.nan
            for term, index in results.groupby("term", sort=False).groups.items():
                if term in per_term:
                    results.loc[index, name] = np.asarray(per_term[term], dtype=float)
        results["permutations"] = int(out["_n_permutations"])
        results["permutation_exact"] = bool(out["_exact"])
        results["permutation_scheme"] = out.get("_scheme")
        results["seed"] = None if out["_exact"] else recorded_seed
    else:
        results["permutations"] = 0
    results["design"] = design
    return order_columns(results)

