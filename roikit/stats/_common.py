"""Shared helpers for group designs (private).

Every design works on a participants x regions matrix for one contrast (a region is a column, missing values are
NaN) and assembles its result rows with :func:`result_rows`, which fills the contract's columns and the optional
columns agreed in the interfaces (defaults where a design has nothing to say). The helpers here:

- :func:`check_values` validates the region values table; :func:`region_order` gives regions in order of first
  appearance;
- :func:`pivot_contrast` pivots one contrast to participants x regions (NaN for missing);
- :func:`join_participants` aligns participants.tsv columns to a list of participant ids;
- :func:`missing_by_region` / :func:`warn_exclusions` implement the missing-value rule (a participant missing for
  one region is excluded for that region only; exclusions are named in one warning and in ``excluded_ids``);
- :func:`low_coverage` lists participants whose ``n_valid / n_voxels < 0.5`` per region (carried from extraction);
- :func:`check_minimum_n` / :func:`check_variance` raise clear :class:`DesignError` s.
"""

from __future__ import annotations

import warnings
from typing import Iterable, Sequence

import numpy as np
import pandas as pd

from .._options import noun, plural, spell
from ..errors import CoverageWarning, DesignError, MissingValueWarning, UsageError

__all__ = [
    "CONTRACT_COLUMNS",
    "COMMON_COLUMNS",
    "COLUMN_DESCRIPTIONS",
    "LOW_COVERAGE_THRESHOLD",
    "check_values",
    "check_confidence",
    "region_order",
    "participant_order",
    "pivot_contrast",
    "join_participants",
    "missing_by_region",
    "join_ids",
    "warn_exclusions",
    "low_coverage",
    "warn_low_coverage",
    "check_minimum_n",
    "check_variance",
    "result_rows",
    "side_table",
    "attach_columns",
    "warn_dropped_observations",
    "spelled",
    "order_columns",
]

#: Required columns of the region values table.
VALUES_COLUMNS = ("participant_id", "contrast", "region", "value", "n_voxels", "n_valid")

#: The contract's result columns, in order (p_holm/p_fdr/p_fwe are added by ``run_design``).
CONTRACT_COLUMNS = (
    "region",
    "design",
    "term",
    "n",
    "estimate",
    "se",
    "df",
    "statistic",
    "statistic_type",
    "p",
    "ci_low",
    "ci_high",
    "confidence",
    "effect_size",
    "effect_size_type",
    "effect_size_ci_low",
    "effect_size_ci_high",
    "p_holm",
    "p_fdr",
    "p_fwe",
)

#: Optional columns every design carries (interfaces.md), with their defaults.
COMMON_COLUMNS: dict[str, object] = {
    "contrast": None,
    "versus": None,
    "group_column": None,
    "levels": None,
    "formula": None,
    "df_method": None,
    "df1": np.nan,
    "family_size": np.nan,
    "correction": None,
    "permutations": 0,
    "seed": None,
    "population_inference": True,
    "excluded_ids": "",
    "n_outliers": np.nan,
    "outlier_ids": "",
    "shapiro_w": np.nan,
    "shapiro_p": np.nan,
    "n_low_coverage": 0,
    "low_coverage_ids": "",
}

#: Participants whose n_valid / n_voxels falls below this are flagged as low coverage.
LOW_COVERAGE_THRESHOLD = 0.5

#: Description of each result column, for JSON sidecars (designs may add their own).
COLUMN_DESCRIPTIONS: dict[str, str] = {
    "region": "region name, in the order of the region values table",
    "design": "group design (one-sample, paired, two-group, glm, precision-weighted, mixed, fixed-effects)",
    "term": "what was tested: 'mean', 'A - B', 'L1 - L2', or a model coefficient / factor",
    "n": "participants in this test for this region, after exclusions",
    "estimate": "the estimate (mean, mean difference or coefficient); n/a for F rows",
    "se": "standard error of the estimate; n/a for F rows",
    "df": "degrees of freedom (denominator df for F rows; fractional for Welch/Satterthwaite)",
    "statistic": "test statistic",
    "statistic_type": "kind of statistic: t, z or F",
    "p": "two-sided p-value (F: upper tail)",
    "ci_low": "lower limit of the confidence interval of the estimate",
    "ci_high": "upper limit of the confidence interval of the estimate",
    "confidence": "confidence level of the intervals",
    "effect_size": "standardised effect size (see effect_size_type)",
    "effect_size_type": "d = mean/SD; d_z = mean(diff)/SD(diff); g = J x (M1-M2)/S_pooled (Hedges 1981, exact J); "
    "partial_eta2 = F df1 / (F df1 + df2); d_total = b / sqrt(tau2 + typical first-level variance) "
    "(precision-weighted); d_wkj = coefficient / sqrt(sum of the variance components: every random intercept and "
    "slope variance as it adds to one observation, plus the residual variance; Westfall, Kenny & Judd 2014) (mixed)",
    "effect_size_ci_low": "lower limit of the effect size interval (noncentral t or F inversion)",
    "effect_size_ci_high": "upper limit of the effect size interval (noncentral t or F inversion)",
    "p_holm": "Holm-adjusted p across the regions of the same design and term",
    "p_fdr": "Benjamini-Hochberg adjusted p (false discovery rate) across the regions of the same design and term",
    "p_bonferroni": "Bonferroni-adjusted p across the regions of the same design and term",
    "p_fwe": "permutation family-wise p (maximum statistic across the regions of the same design and term)",
    "contrast": "the contrast tested (paired: the first one)",
    "versus": "paired: the contrast subtracted; n/a otherwise",
    "group_column": "participants.tsv column defining the groups (two-group); n/a otherwise",
    "levels": "the two group levels compared, 'L1,L2' (two-group); n/a otherwise",
    "formula": "model formula (glm, precision-weighted, mixed); n/a otherwise",
    "df_method": "degrees-of-freedom method: student, welch, residual, knapp-hartung, z, satterthwaite",
    "df1": "numerator degrees of freedom of an F row; n/a otherwise",
    "family_size": "number of regions in the correction family (same design and term)",
    "correction": "multiple-comparison corrections across regions, comma-separated; the first is the primary one "
                  "(the one text, table notes, figures and summaries use; 'none' = uncorrected)",
    "permutations": "number of permutations used for p_fwe (0 if none)",
    "seed": "random seed of the permutations (n/a if none or exact enumeration)",
    "population_inference": "true for random/mixed-effects designs (generalise to the population); false for "
    "fixed-effects",
    "excluded_ids": "participant_ids left out of this region's test because a value was missing",
    "n_outliers": "participants with robust modified z > 3.5 (Iglewicz & Hoaglin 1993) on the residuals",
    "outlier_ids": "participant_ids of those outliers",
    "shapiro_w": "Shapiro-Wilk W of the residuals",
    "shapiro_p": "Shapiro-Wilk p of the residuals",
    "n_low_coverage": "participants whose n_valid / n_voxels is above 0 but below 0.5 in this region (from "
                      "extraction); those with no valid voxel are among the exclusions",
    "low_coverage_ids": "participant_ids of those low-coverage participants",
    "brown_forsythe_p": "Brown-Forsythe test of equal variances between the two groups (two-group)",
    "max_leverage": "largest hat-matrix diagonal among the participants (glm)",
    "max_cooks_d": "largest Cook's distance among the participants (glm)",
    "centered": "covariates mean-centred before fitting, comma-separated (glm, precision-weighted); mixed: each with "
                "the mean subtracted in this region, e.g. 'load (mean 2.5)'",
    "tau2": "between-participant variance (precision-weighted designs)",
    "i2": "heterogeneity I^2 (precision-weighted designs)",
    "q": "Cochran's Q heterogeneity statistic (precision-weighted)",
    "q_p": "p-value of Q (precision-weighted)",
    "tau2_method": "estimator of tau2: reml, ml, dl or pm (precision-weighted)",
    "boundary": "a variance estimate sits at zero (the boundary of the parameter space)",
    "converged": "the iterative fit converged",
    "sd_participant": "between-participant standard deviation (mixed)",
    "sd_residual": "residual standard deviation (mixed)",
    "icc": "intraclass correlation (mixed)",
    "r2_marginal": "variance explained by the fixed effects (mixed)",
    "r2_conditional": "variance explained by fixed and random effects (mixed)",
    "n_participants": "participants in the model (mixed)",
    "n_stimuli": "levels of the crossed factor (mixed)",
    "n_observations": "observations in the model (mixed)",
    "fixed_effects_only": "the result does not generalise to the population (fixed effects)",
    "n_first": "two-group: participants of the first level in this region's test",
    "n_second": "two-group: participants of the second level in this region's test",
    "permutation_exact": "all distinct permutations were enumerated (p_fwe exact)",
    "permutation_scheme": "permutation scheme: sign-flip, label or freedman-lane",
    "epsilon_gg": "repeated-measures: Greenhouse-Geisser epsilon (1 for one-df effects)",
    "epsilon_hf": "repeated-measures: Huynh-Feldt epsilon, capped at 1",
    "p_gg": "repeated-measures: p with Greenhouse-Geisser corrected df (df1 x epsilon_gg, df x epsilon_gg); the "
            "corrections across regions adjust this p",
    "p_hf": "repeated-measures: p with Huynh-Feldt corrected df",
    "mauchly_w": "repeated-measures: Mauchly's W (n/a for one-df effects)",
    "mauchly_p": "repeated-measures: p of Mauchly's test of sphericity",
    "generalized_eta2": "repeated-measures: generalised eta squared (Olejnik & Algina 2003; Bakeman 2005)",
    "within": "repeated-measures: the within-participant factors, in order",
    "cells": "repeated-measures: JSON list of [contrast, region, [within levels]], one per cell of the unit "
             "(what the interaction figure draws)",
    "p_posthoc": "repeated-measures post-hoc pair: p corrected across the pairs of one factor in one region",
    "posthoc_correction": "repeated-measures post-hoc pair: the correction of p_posthoc (the primary one)",
    "posthoc_family": "repeated-measures post-hoc pair: number of pairs of the factor",
    "regions_compared": "region-difference: the two regions, A,B (the term is A - B)",
    "p_equivalence": "equivalence: larger p of the two one-sided tests against -D and +D (TOST)",
    "equivalence_bound": "equivalence: the bound D in the effect size's units",
    "bf10": "JZS Bayes factor for an effect against none (Rouder et al. 2009)",
    "prior_scale": "scale r of the Bayes factor's Cauchy prior on the standardised effect",
}


def check_values(values: pd.DataFrame, *, variance: bool = False) -> pd.DataFrame:
    """Validate the region values table; return it with label columns as strings.

    Raises :class:`UsageError` when ``values`` is not a DataFrame or lacks a contract column.
    """
    if not isinstance(values, pd.DataFrame):
        raise UsageError(
            f"values must be a pandas DataFrame (the region values table), got {type(values).__name__}; "
            "read it with roikit._tables.read_table"
        )
    required = list(VALUES_COLUMNS) + (["variance"] if variance else [])
    missing = [c for c in required if c not in values.columns]
    if missing:
        raise UsageError(
            f"region values table lacks {noun(missing, 'column')} {', '.join(missing)}; found "
            f"{', '.join(map(str, values.columns))}; "
            f"expected {', '.join(required)} (as written by roikit extract)"
        )
    values = values.copy(deep=False)
    values.attrs = {}  # the extraction provenance is not needed here; pandas would deep-copy it on every operation
    for column in ("participant_id", "session_id", "contrast", "region"):
        if column in values.columns and not pd.api.types.is_string_dtype(values[column]):
            col = values[column]
            values[column] = col.astype(str).astype(object).where(col.notna(), None)
    for column in ("value", "n_voxels", "n_valid") + (("variance",) if "variance" in values.columns else ()):
        if values[column].dtype == np.float64:
            continue
        try:
            values[column] = pd.to_numeric(values[column]).astype(float)
        except (TypeError, ValueError) as exc:
            raise UsageError(f"column {column!r} of the region values table must be numeric ({exc})") from None
    return values


def check_confidence(confidence: float) -> float:
    """Validate a confidence level (0 < confidence < 1)."""
    try:
        c = float(confidence)
    except (TypeError, ValueError):
        raise UsageError(f"confidence must be a number between 0 and 1, got {confidence!r}") from None
    if not 0.0 < c < 1.0:
        raise UsageError(f"confidence must be between 0 and 1 (e.g. 0.95), got {confidence!r}")
    return c


def region_order(values: pd.DataFrame) -> list[str]:
    """Regions in order of first appearance."""
    return list(pd.unique(values["region"]))


def participant_order(values: pd.DataFrame) -> list[str]:
    """Participants in order of first appearance."""
    return list(pd.unique(values["participant_id"]))


def _single_session(values: pd.DataFrame, contrast: str) -> None:
    if "session_id" in values.columns and values["session_id"].nunique(dropna=True) > 1:
        per = values.groupby(["participant_id", "region"], observed=True)["session_id"].nunique()
        if (per > 1).any():
            raise DesignError(
                f"contrast {contrast!r} has several sessions per participant "
                f"({', '.join(map(str, pd.unique(values['session_id'].dropna())))}); this design expects one value "
                "per participant and region; select one session, average the sessions per participant first, or "
                "use the mixed design"
            )


def pivot_contrast(
    values: pd.DataFrame,
    contrast: str,
    *,
    column: str = "value",
    regions: Sequence[str] | None = None,
) -> pd.DataFrame:
    """Pivot one contrast to a participants x regions matrix (float64, NaN for missing).

    Parameters
    ----------
    values : DataFrame
        Region values table (validated by :func:`check_values`).
    contrast : str
        Contrast label to select.
    column : str
        Column to pivot (``value``, ``variance``, ``n_valid`` ...).
    regions : sequence of str, optional
        Column order; default the regions this contrast has, in the table's order of first appearance.

    Returns
    -------
    DataFrame
        Index ``participant_id`` (order of first appearance), one column per region.
    """
    if contrast is None:
        raise UsageError(
            f"no contrast given; expected one of {', '.join(map(str, pd.unique(values['contrast'])))} "
            "(pass contrast=... or --contrast)"
        )
    sub = values[values["contrast"] == str(contrast)]
    if sub.empty:
        raise DesignError(
            f"contrast {contrast!r} not found in the region values table; available: "
            f"{', '.join(map(str, pd.unique(values['contrast'])))}"
        )
    _single_session(sub, contrast)
    if regions is None:
        present = set(pd.unique(sub["region"]))
        regions = [r for r in region_order(values) if r in present]
    pid_codes, pids = pd.factorize(sub["participant_id"])  # order of first appearance
    region_index = pd.Index(list(regions))
    reg_codes = region_index.get_indexer(sub["region"])
    keep = reg_codes >= 0
    pid_codes, reg_codes = pid_codes[keep], reg_codes[keep]
    flat = pid_codes.astype(np.int64) * len(region_index) + reg_codes
    if flat.size and np.bincount(flat, minlength=len(pids) * len(region_index)).max() > 1:
        dup = sub[keep][pd.Series(flat).duplicated().to_numpy()].iloc[0]
        raise DesignError(
            f"contrast {contrast!r}: participant {dup['participant_id']} has more than one row for region "
            f"{dup['region']!r}; expected one value per participant, contrast and region"
        )
    data = np.full((len(pids), len(region_index)), np.nan)
    data[pid_codes, reg_codes] = sub[column].to_numpy(dtype=float)[keep]
    matrix = pd.DataFrame(
        data,
        index=pd.Index(np.asarray(pids, dtype=object), name="participant_id"),
        columns=pd.Index(list(region_index), name="region", dtype=object),
    )
    return matrix


def join_participants(
    ids: Sequence[str],
    participants: pd.DataFrame | None,
    columns: Iterable[str],
) -> pd.DataFrame:
    """Columns of participants.tsv aligned to ``ids`` (rows of participants not found are NaN).

    Raises :class:`UsageError` when ``participants`` is missing, lacks ``participant_id`` or a requested column,
    or lists a participant twice.
    """
    columns = list(columns)
    if participants is None:
        raise UsageError(
            f"this design needs participants.tsv {noun(columns, 'column')} {', '.join(columns)}; pass "
            f"{spell('participants')}"
        )
    if not isinstance(participants, pd.DataFrame):
        raise UsageError(f"participants must be a DataFrame, got {type(participants).__name__}")
    if "participant_id" not in participants.columns:
        raise UsageError(
            f"participants table lacks column 'participant_id'; found {', '.join(map(str, participants.columns))}"
        )
    missing = [c for c in columns if c not in participants.columns]
    if missing:
        raise UsageError(
            f"participants table lacks {noun(missing, 'column')} {', '.join(missing)}; available: "
            f"{', '.join(c for c in map(str, participants.columns) if c != 'participant_id')}"
        )
    table = participants.copy()
    table["participant_id"] = table["participant_id"].astype(str)
    dup = table["participant_id"].duplicated()
    if dup.any():
        raise UsageError(
            f"participants table lists {', '.join(table.loc[dup, 'participant_id'])} more than once; "
            "expected one row per participant"
        )
    return table.set_index("participant_id").reindex(list(ids))[columns]


def join_ids(ids: Iterable[str]) -> str:
    """Comma-separated participant ids ('' for none)."""
    return ",".join(map(str, ids))


def missing_by_region(matrix: pd.DataFrame) -> list[list[str]]:
    """For each region (column), the participant ids whose value is NaN."""
    mask = matrix.isna().to_numpy()
    ids = np.asarray(matrix.index, dtype=object)
    return [list(ids[mask[:, j]]) for j in range(mask.shape[1])]


def warn_exclusions(
    regions: Sequence[str],
    excluded: Sequence[Sequence[str]],
    *,
    context: str,
    reason: str = "value missing",
    stacklevel: int = 3,
) -> None:
    """One :class:`MissingValueWarning` naming every exclusion (nothing if there is none)."""
    parts = [f"{r}: {', '.join(ids)}" for r, ids in zip(regions, excluded) if len(ids)]
    if not parts:
        return
    total = sum(len(ids) for ids in excluded)
    # a participant with no value in any region (e.g. no map for the contrast) is one finding, not one per region
    everywhere = set.intersection(*(set(ids) for ids in excluded)) if len(regions) > 1 else set()
    findings = [{"problem": f"no value in any region ({reason}; no map?), left out", "participant_id": pid}
                for pid in sorted(everywhere)]
    findings += [{"problem": f"{reason}, left out of that region's test", "participant_id": pid, "region": r}
                 for r, ids in zip(regions, excluded) for pid in ids if pid not in everywhere]
    warnings.warn(MissingValueWarning(
        f"{context}: {total} participant-region value{'s' if total != 1 else ''} excluded ({reason}), each for "
        "its region only: " + "; ".join(parts), findings=findings, context=context),
        stacklevel=stacklevel,
    )


def low_coverage(
    values: pd.DataFrame,
    contrast: str | Sequence[str],
    *,
    regions: Sequence[str],
    ids: Sequence[str] | None = None,
    threshold: float = LOW_COVERAGE_THRESHOLD,
) -> list[list[str]]:
    """Participants whose ``0 < n_valid / n_voxels < threshold`` per region.

    A participant with no valid voxel has no value (n/a): it is excluded from the test and named among
    the exclusions (``excluded_ids``), not counted again here.

    ``contrast`` may be several contrasts (e.g. paired): a participant is flagged if any of them is low.
    ``ids`` restricts the participants considered.
    """
    contrasts = [contrast] if isinstance(contrast, str) else list(contrast)
    sub = values[values["contrast"].isin([str(c) for c in contrasts])]
    if ids is not None:
        sub = sub[sub["participant_id"].isin(list(ids))]
    with np.errstate(divide="ignore", invalid="ignore"):
        fraction = sub["n_valid"].to_numpy(float) / sub["n_voxels"].to_numpy(float)
    low = (fraction > 0) & (fraction < threshold)
    flagged = sub.loc[low, ["participant_id", "region"]]
    by_region: dict[str, list[str]] = {}
    for pid, region in zip(flagged["participant_id"], flagged["region"]):
        lst = by_region.setdefault(region, [])
        if pid not in lst:
            lst.append(pid)
    return [by_region.get(r, []) for r in regions]


def warn_low_coverage(
    regions: Sequence[str], flagged: Sequence[Sequence[str]], *, context: str, stacklevel: int = 3
) -> None:
    """One :class:`CoverageWarning` naming the low-coverage participants per region (nothing if none)."""
    parts = [f"{r}: {', '.join(ids)}" for r, ids in zip(regions, flagged) if len(ids)]
    if not parts:
        return
    problem = f"fewer than {LOW_COVERAGE_THRESHOLD:.0%} valid voxels in a region (kept)"
    warnings.warn(CoverageWarning(
        f"{context}: participants with fewer than {LOW_COVERAGE_THRESHOLD:.0%} valid voxels "
        f"(n_valid / n_voxels) in a region: " + "; ".join(parts),
        findings=[{"problem": problem, "participant_id": pid, "region": r}
                  for r, ids in zip(regions, flagged) for pid in ids], context=context),
        stacklevel=stacklevel,
    )


def check_minimum_n(
    n: np.ndarray, regions: Sequence[str], *, minimum: int = 3, what: str = "participants", context: str = ""
) -> None:
    """Raise :class:`DesignError` naming the regions where ``n < minimum``."""
    n = np.asarray(n)
    bad = np.flatnonzero(n < minimum)
    if bad.size:
        listed = ", ".join(f"{regions[j]} (n = {int(n[j])})" for j in bad[:10])
        more = f" and {bad.size - 10} more" if bad.size > 10 else ""
        raise DesignError(
            f"{context + ': ' if context else ''}fewer than {minimum} {what} with values in {noun(bad.size, 'region')} "
            f"{listed}{more}; at least {minimum} are needed; check the missing values or drop these regions"
        )


def check_variance(sd: np.ndarray, regions: Sequence[str], *, context: str = "", what: str = "values") -> None:
    """Raise :class:`DesignError` naming the regions whose SD is zero (or not finite)."""
    sd = np.asarray(sd, dtype=float)
    bad = np.flatnonzero(~(sd > 0) | ~np.isfinite(sd))
    if bad.size:
        listed = ", ".join(str(regions[j]) for j in bad[:10])
        more = f" and {bad.size - 10} more" if bad.size > 10 else ""
        raise DesignError(
            f"{context + ': ' if context else ''}zero variance of the {what} in {noun(bad.size, 'region')} "
            f"{listed}{more}; "
            "a t statistic needs spread across participants; check the extraction (constant maps?)"
        )


def result_rows(
    regions: Sequence[str],
    *,
    design: str,
    term: str | Sequence[str],
    confidence: float,
    **columns: object,
) -> pd.DataFrame:
    """Assemble result rows (one per region) for one term with the contract and common columns.

    Every keyword becomes a column (arrays of length ``len(regions)`` or scalars). Columns not given take the
    defaults of :data:`COMMON_COLUMNS`; contract columns not given are n/a. p_holm/p_fdr/p_fwe are left to
    ``run_design``.
    """
    k = len(regions)
    data: dict[str, object] = {"region": list(regions), "design": design, "term": term}
    for name in CONTRACT_COLUMNS[3:]:
        if name in ("p_holm", "p_fdr", "p_fwe"):
            continue
        if name == "confidence":
            data[name] = float(confidence)
        elif name in ("statistic_type", "effect_size_type"):
            data[name] = columns.pop(name, None)
        else:
            data[name] = columns.pop(name, np.nan)
    for name, default in COMMON_COLUMNS.items():
        data[name] = columns.pop(name, default)
    data.update(columns)
    frame = pd.DataFrame({name: _broadcast(v, k) for name, v in data.items()})
    return frame


def _broadcast(v: object, k: int) -> object:
    if isinstance(v, (list, tuple, np.ndarray, pd.Series)):
        arr = list(v) if not isinstance(v, np.ndarray) else v
        if len(arr) != k:
            raise ValueError(f"column of length {len(arr)} for {k} regions")  # programming error, not user input
        return arr
    return [v] * k


def order_columns(frame: pd.DataFrame, *, extra_first: Sequence[str] = ()) -> pd.DataFrame:
    """Contract columns first (those present), then the common optional ones, then the rest as they come."""
    order = [c for c in CONTRACT_COLUMNS if c in frame.columns]
    order += [c for c in ("p_bonferroni", "tau2", "i2") if c in frame.columns and c not in order]
    order += [c for c in extra_first if c in frame.columns and c not in order]
    order += [c for c in COMMON_COLUMNS if c in frame.columns and c not in order]
    order += [c for c in frame.columns if c not in order]
    return frame[order]



# --------------------------------------------------------------------------- tables describing contrasts, regions
#: (key column, command-line option, Python parameter, file name in messages) of each side table.
_SIDE_TABLES = {
    "contrasts": ("contrast", "--contrasts", "contrasts", "contrasts.tsv"),
    "regions": ("region", "--region-table", "region_table", "regions.tsv"),
    "participants": ("participant_id", "--participants", "participants", "participants.tsv"),
}


def spelled(python: str, cli: str, exc_type: type, message: str) -> Exception:
    """An exception whose message names an option as Python (``python``) and, on the command line, as ``cli``.

    ``message`` holds ``{option}`` where the option's spelling goes; the command line shows ``cli_message``
    (set on the exception), Python callers see the ``python`` spelling.
    """
    exc = exc_type(message.format(option=python))
    exc.cli_message = message.format(option=cli)
    return exc


def side_table(table, *, kind: str) -> pd.DataFrame | None:
    """Read and validate contrasts.tsv (``kind='contrasts'``) or regions.tsv (``kind='regions'``).

    ``table`` is a DataFrame, a path or None. The key column (``contrast`` / ``region``) is kept as strings and
    must list each label once.
    """
    if table is None:
        return None
    key, option, parameter, name = _SIDE_TABLES[kind]
    if not isinstance(table, pd.DataFrame):
        import os

        from .._tables import read_table

        if not isinstance(table, (str, os.PathLike)):
            raise UsageError(f"{parameter}: expected a DataFrame or the path of {name}, got {type(table).__name__}")
        path = table
        table = read_table(path, label_columns=(key,))
        where = f"{path}"
    else:
        where = f"{name} ({parameter}=)"
    if key not in table.columns:
        raise UsageError(f"{where}: no column {key!r}; found {', '.join(map(str, table.columns))}; expected "
                         f"{key!r} plus per-{key} columns (e.g. {'load' if key == 'contrast' else 'hemisphere'})")
    table = table.copy()
    table[key] = table[key].astype(str)
    dup = table[key].duplicated()
    if dup.any():
        raise UsageError(f"{where}: {key} {', '.join(pd.unique(table.loc[dup, key]))} listed more than once; "
                         f"expected one row per {key}")
    return table


def attach_columns(
    data: pd.DataFrame,
    variables: Iterable[str],
    *,
    participants: pd.DataFrame | None = None,
    contrasts: pd.DataFrame | None = None,
    region_table: pd.DataFrame | None = None,
    context: str = "",
) -> tuple[pd.DataFrame, dict[str, str]]:
    """Join the columns a model names onto the (long) values table.

    Each variable not already a column of ``data`` is looked up, in this order, in contrasts.tsv (joined on
    ``contrast``), regions.tsv (on ``region``) and participants.tsv (on ``participant_id``). Tables are those
    validated by :func:`side_table` (participants: a DataFrame keyed by ``participant_id``).

    Returns
    -------
    (DataFrame, dict)
        ``data`` with the joined columns, and where each variable came from (``values``, ``contrasts.tsv``,
        ``regions.tsv``, ``participants.tsv``).

    Raises
    ------
    UsageError
        When a variable is in none of the tables (the message lists the tables searched and the fix).
    """
    prefix = f"{context}: " if context else ""
    sources: dict[str, str] = {}
    data = data.copy(deep=False)
    wanted = [v for v in dict.fromkeys(variables)]
    for v in wanted:
        if v in data.columns:
            sources[v] = "values"
    lookups = [(contrasts, "contrasts"), (region_table, "regions")]
    for table, kind in lookups:
        if table is None:
            continue
        key, _, _, name = _SIDE_TABLES[kind]
        cols = [v for v in wanted if v not in sources and v in table.columns and v != key]
        if not cols:
            continue
        mapped = table.set_index(key)[cols]
        labels = data[key].astype(object)
        listed = set(mapped.index)
        absent = [str(x) for x in pd.unique(labels.dropna()) if str(x) not in listed]
        if absent:
            raise DesignError(
                f"{prefix}{name} has no row for {key} {', '.join(absent[:8])}{' ...' if len(absent) > 8 else ''} "
                f"(the model uses its {noun(cols, 'column')} {', '.join(cols)}); add those rows, or select the "
                f"{key}s that it describes"
            )
        joined = mapped.reindex(labels.astype(str).to_numpy())
        for c in cols:
            data[c] = joined[c].to_numpy()
            sources[c] = name
    rest = [v for v in wanted if v not in sources]
    no_side_tables = contrasts is None and region_table is None
    if rest and (no_side_tables or participants is not None and all(v in participants.columns for v in rest)):
        # participants.tsv is the only table left: its own messages name what is missing
        joined = join_participants(list(data["participant_id"].unique()), participants, rest)
        data = data.join(joined, on="participant_id")
        for v in rest:
            sources[v] = "participants.tsv"
        rest = []
    if rest:
        searched = ["the region values table"] + [name for t, k in lookups if t is not None
                                                  for name in [_SIDE_TABLES[k][3]]]
        if participants is not None:
            searched.append("participants.tsv")
            rest_p = [v for v in rest if v not in participants.columns]
        else:
            rest_p = rest
        exc = spelled(
            "contrasts=..., region_table=... or participants=...",
            "--contrasts FILE, --region-table FILE or --participants FILE", UsageError,
            f"{prefix}the model names {', '.join(repr(v) for v in rest_p)}, found in none of "
            f"{', '.join(searched)}; give the table that holds it ({{option}}) or correct the name")
        raise exc
    return data, sources


def warn_dropped_observations(
    regions: Sequence[str],
    n_observations: Sequence[int],
    partly: Sequence[Sequence[str]],
    wholly: Sequence[Sequence[str]],
    *,
    context: str,
    reason: str,
    stacklevel: int = 3,
) -> None:
    """One :class:`MissingValueWarning` counting dropped observations and participants per region.

    ``partly`` lists, per region, the participants with at least one observation dropped; ``wholly`` those
    dropped entirely (no observation left in that region).
    """
    parts = []
    for r, n_obs, some, whole in zip(regions, n_observations, partly, wholly):
        if not n_obs:
            continue
        text = f"{r}: {', '.join(some)} ({plural(n_obs, 'observation')} of {plural(len(some), 'participant')}"
        if len(whole):
            text += f"; {len(whole)} of them left out entirely: {', '.join(whole)}"
        parts.append(text + ")")
    if not parts:
        return
    total = int(sum(n_observations))
    n_regions = sum(1 for n in n_observations if n)
    warnings.warn(
        f"{context}: {plural(total, 'observation')} excluded in {plural(n_regions, 'region')} ({reason}), each for "
        "its region "
        "only: " + "; ".join(parts),
        MissingValueWarning,
        stacklevel=stacklevel,
    )


def resolve_seed(seed) -> tuple[object, np.random.Generator]:
    """(recorded seed, generator). ``None`` draws fresh entropy and records it so the run can be repeated."""
    if isinstance(seed, np.random.Generator):
        return "generator", seed
    if seed is None:
        entropy = int(np.random.SeedSequence().entropy % (2**63))
        return entropy, np.random.default_rng(entropy)
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise UsageError(f"seed must be a non-negative integer, a numpy Generator or None, got {seed!r}")
    return int(seed), np.random.default_rng(int(seed))
