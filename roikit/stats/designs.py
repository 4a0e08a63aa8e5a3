"""Summary-statistics random-effects designs: one-sample, paired, two-group, glm.

Each design pivots the region values table to a participants x regions matrix for its contrast(s) and computes the
test for every region at once (a region is a column). A participant whose value is missing in a region is excluded
for that region only; ``n`` is per region and the exclusions are named in ``excluded_ids`` and in one
:class:`MissingValueWarning`. Diagnostics are columns plus one :class:`DiagnosticWarning`.

Use them through :func:`roikit.stats.run_design`, which adds the corrections across regions.
"""

from __future__ import annotations

import warnings
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import linalg, stats

from .._options import noun, plural, spell
from ..errors import DesignError, MissingValueWarning, UsageError
from ._common import (
    check_minimum_n,
    check_values,
    check_variance,
    join_ids,
    join_participants,
    low_coverage,
    missing_by_region,
    pivot_contrast,
    result_rows,
    warn_exclusions,
    warn_low_coverage,
)
from ._registry import register
from .diagnostics import brown_forsythe, residual_diagnostics, warn_diagnostics
from .effect_sizes import d_interval, g_interval, partial_eta2_interval
from .permutation import freedman_lane_max, label_max_t, sign_flip_max_t

__all__ = ["one_sample", "paired", "two_group", "glm", "one_sample_matrix", "two_group_matrix", "ols_matrix"]


# --------------------------------------------------------------------------------------------------------------------
# Vectorised cores (participants x regions, NaN = not in this region's test)
# --------------------------------------------------------------------------------------------------------------------


def one_sample_matrix(y: np.ndarray, confidence: float = 0.95) -> dict[str, np.ndarray]:
    """One-sample t-test of every column against 0, NaN-aware.

    Returns a dict of arrays (one value per column): n, mean, sd, se, df, t, p, ci_low, ci_high, d, d_low, d_high.

    Notes
    -----
    t = mean / (SD / sqrt(n)), df = n - 1; CI = mean +/- t_{1-alpha/2, df} SE; d = mean / SD with the
    noncentral-t interval. Checked against scipy.stats.ttest_1samp and R's t.test (sleep data) in the tests.
    """
    y = np.asarray(y, dtype=float)
    mask = ~np.isnan(y)
    n = mask.sum(axis=0).astype(float)
    y0 = np.where(mask, y, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = y0.sum(axis=0) / n
        dev = np.where(mask, y - mean, 0.0)
        sd = np.sqrt((dev * dev).sum(axis=0) / (n - 1))
        se = sd / np.sqrt(n)
        t = mean / se
    df = n - 1
    p = 2 * stats.t.sf(np.abs(t), df)
    crit = stats.t.ppf(0.5 + confidence / 2, df)
    d, d_low, d_high = d_interval(t, n, confidence)
    return {
        "n": n, "mean": mean, "sd": sd, "se": se, "df": df, "t": t, "p": p,
        "ci_low": mean - crit * se, "ci_high": mean + crit * se, "d": d, "d_low": d_low, "d_high": d_high,
    }  # fmt: skip


def two_group_matrix(
    y1: np.ndarray, y2: np.ndarray, *, welch: bool = False, confidence: float = 0.95
) -> dict[str, np.ndarray]:
    """Two-sample t-test (Student or Welch) of every column, NaN-aware, with Hedges' g.

    Returns a dict of arrays: n1, n2, mean1, mean2, diff, se, df, t, p, ci_low, ci_high, t_pooled, g, g_low, g_high.

    Notes
    -----
    Student: S_pooled^2 = ((n1-1)s1^2 + (n2-1)s2^2)/(n1+n2-2), SE = S_pooled sqrt(1/n1 + 1/n2), df = n1+n2-2.
    Welch: SE = sqrt(s1^2/n1 + s2^2/n2), df = SE^4 / ((s1^2/n1)^2/(n1-1) + (s2^2/n2)^2/(n2-1)).
    g always uses the pooled SD (Hedges 1981). Checked against scipy.stats.ttest_ind and R's t.test in the tests.
    """
    out = {}
    parts = []
    for y in (y1, y2):
        y = np.asarray(y, dtype=float)
        mask = ~np.isnan(y)
        n = mask.sum(axis=0).astype(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            mean = np.where(mask, y, 0.0).sum(axis=0) / n
            var = (np.where(mask, y - mean, 0.0) ** 2).sum(axis=0) / (n - 1)
        parts.append((n, mean, var))
    (n1, m1, v1), (n2, m2, v2) = parts
    diff = m1 - m2
    with np.errstate(divide="ignore", invalid="ignore"):
        df_pooled = n1 + n2 - 2
        sp2 = ((n1 - 1) * v1 + (n2 - 1) * v2) / df_pooled
        se_pooled = np.sqrt(sp2 * (1 / n1 + 1 / n2))
        t_pooled = diff / se_pooled
        if welch:
            a1, a2 = v1 / n1, v2 / n2
            se = np.sqrt(a1 + a2)
            df = (a1 + a2) ** 2 / (a1**2 / (n1 - 1) + a2**2 / (n2 - 1))
        else:
            se, df = se_pooled, df_pooled
        t = diff / se
    p = 2 * stats.t.sf(np.abs(t), df)
    crit = stats.t.ppf(0.5 + confidence / 2, df)
    g, g_low, g_high = g_interval(t_pooled, n1, n2, confidence)
    out.update(
        n1=n1, n2=n2, mean1=m1, mean2=m2, var1=v1, var2=v2, diff=diff, se=se, df=df, t=t, p=p,
        ci_low=diff - crit * se, ci_high=diff + crit * se, t_pooled=t_pooled, sd_pooled=np.sqrt(sp2),
        g=g, g_low=g_low, g_high=g_high,
    )  # fmt: skip
    return out


def ols_matrix(x: np.ndarray, y: np.ndarray) -> dict[str, np.ndarray]:
    """Ordinary least squares of every column of ``y`` (complete, participants x regions) on full-rank ``x``.

    Returns beta (p x k), resid (n x k), sigma2 (k), df (int), xtx_inv (p x p), hat (n) (leverages).
    """
    n, p = x.shape
    q, r = np.linalg.qr(x)
    beta = linalg.solve_triangular(r, q.T @ y)
    resid = y - x @ beta
    df = n - p
    sigma2 = (resid**2).sum(axis=0) / df
    r_inv = linalg.solve_triangular(r, np.eye(p))
    xtx_inv = r_inv @ r_inv.T
    hat = (q**2).sum(axis=1)
    return {"beta": beta, "resid": resid, "sigma2": sigma2, "df": df, "xtx_inv": xtx_inv, "hat": hat}


# --------------------------------------------------------------------------------------------------------------------
# Shared preparation
# --------------------------------------------------------------------------------------------------------------------


def _require(option: str, value: object, design: str, flag: str) -> None:
    if value is None or (isinstance(value, str) and not value.strip()):
        raise UsageError(f"design {design!r} needs {spell(option)}; none was given")


def _diagnostic_columns(resid: pd.DataFrame) -> dict:
    return residual_diagnostics(resid)


def _coverage(values, contrasts, regions, y: pd.DataFrame, context: str, warn: bool) -> dict:
    present = values[values["value"].notna()]
    flagged = low_coverage(present, contrasts, regions=regions, ids=list(y.index))
    if warn:
        warn_low_coverage(regions, flagged, context=context, stacklevel=5)
    return {"n_low_coverage": [len(f) for f in flagged], "low_coverage_ids": [join_ids(f) for f in flagged]}


def _prepare_one(values, contrast, *, design: str, warn: bool = True):
    _require("contrast", contrast, design, "--contrast")
    y = pivot_contrast(values, contrast)
    regions = list(y.columns)
    excluded = missing_by_region(y)
    if warn:
        warn_exclusions(regions, excluded, context=f"{design} on {contrast!r}", stacklevel=5)
    return y, regions, excluded


def _prepare_paired(values, contrast, versus, *, warn: bool = True):
    _require("contrast", contrast, "paired", "--contrast")
    _require("versus", versus, "paired", "--versus")
    if str(contrast) == str(versus):
        raise UsageError(f"paired design needs two different contrasts; got contrast = versus = {contrast!r}")
    a = pivot_contrast(values, contrast)
    b = pivot_contrast(values, versus)
    regions = [r for r in a.columns if r in set(b.columns)]
    dropped = [r for r in list(a.columns) + list(b.columns) if r not in regions]
    if dropped:
        raise DesignError(
            f"paired design: {noun(dropped, 'region')} {', '.join(dict.fromkeys(dropped))} with values for only one of "
            f"{contrast!r} and {versus!r}; both contrasts need the same regions"
        )
    ids = list(dict.fromkeys(list(a.index) + list(b.index)))
    diff = a.reindex(index=ids, columns=regions) - b.reindex(index=ids, columns=regions)
    excluded = missing_by_region(diff)
    if warn:
        warn_exclusions(
            regions, excluded, context=f"paired {contrast!r} - {versus!r}",
            reason="value missing for either contrast", stacklevel=5,
        )  # fmt: skip
    return diff, regions, excluded


# --------------------------------------------------------------------------------------------------------------------
# one-sample and paired
# --------------------------------------------------------------------------------------------------------------------


def _one_sample_rows(y, regions, excluded, *, design, term, confidence, effect_type, extra, coverage, context):
    check_minimum_n(y.notna().sum(axis=0).to_numpy(), regions, context=context)
    r = one_sample_matrix(y.to_numpy(float), confidence)
    check_variance(r["sd"], regions, context=context)
    diag = _diagnostic_columns(y - r["mean"])
    rows = result_rows(
        regions, design=design, term=term, confidence=confidence,
        n=r["n"].astype(int), estimate=r["mean"], se=r["se"], df=r["df"], statistic=r["t"], statistic_type="t",
        p=r["p"], ci_low=r["ci_low"], ci_high=r["ci_high"], effect_size=r["d"], effect_size_type=effect_type,
        effect_size_ci_low=r["d_low"], effect_size_ci_high=r["d_high"], df_method="student",
        excluded_ids=[join_ids(e) for e in excluded], **diag, **coverage, **extra,
    )  # fmt: skip
    warn_diagnostics(rows, context=context, stacklevel=4)
    return rows


def _one_sample_permutation(values, *, participants, permutations, rng, contrast=None, **_):
    y, regions, _ex = _prepare_one(check_values(values), contrast, design="one-sample", warn=False)
    p, total, exact = sign_flip_max_t(y.to_numpy(float), permutations=permutations, rng=rng)
    return {"mean": p, "_n_permutations": total, "_exact": exact, "_scheme": "sign-flip"}


@register("one-sample", permutation=_one_sample_permutation)
def one_sample(
    values: pd.DataFrame, *, participants: pd.DataFrame | None = None, confidence: float = 0.95, contrast: str
) -> pd.DataFrame:
    """One-sample t-test of a contrast's mean across participants, in every region.

    Parameters
    ----------
    values : DataFrame
        Region values table.
    participants : DataFrame, optional
        Not used (accepted for a uniform signature).
    confidence : float
        Confidence level.
    contrast : str
        Contrast tested.

    Returns
    -------
    DataFrame
        One row per region, term ``mean``: n, estimate (mean), se, df = n - 1, statistic (t), p, ci_low, ci_high,
        effect_size ``d`` = mean / SD with its noncentral-t interval, df_method ``student``, excluded_ids,
        n_outliers, outlier_ids, shapiro_w, shapiro_p, n_low_coverage, low_coverage_ids.

    Notes
    -----
    t = mean / (SD / sqrt(n)). Checked against scipy.stats.ttest_1samp and R's t.test (sleep data).

    Examples
    --------
    >>> run_design(values, "one-sample", contrast="novel")  # doctest: +SKIP
    """
    values = check_values(values)
    y, regions, excluded = _prepare_one(values, contrast, design="one-sample")
    context = f"one-sample on {contrast!r}"
    coverage = _coverage(values, [contrast], regions, y, context, True)
    return _one_sample_rows(
        y, regions, excluded, design="one-sample", term="mean", confidence=confidence, effect_type="d",
        extra={"contrast": contrast}, coverage=coverage, context=context,
    )  # fmt: skip


def _paired_permutation(values, *, participants, permutations, rng, contrast=None, versus=None, **_):
    diff, regions, _ex = _prepare_paired(check_values(values), contrast, versus, warn=False)
    p, total, exact = sign_flip_max_t(diff.to_numpy(float), permutations=permutations, rng=rng)
    return {f"{contrast} - {versus}": p, "_n_permutations": total, "_exact": exact, "_scheme": "sign-flip"}


@register("paired", permutation=_paired_permutation)
def paired(
    values: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    confidence: float = 0.95,
    contrast: str,
    versus: str,
) -> pd.DataFrame:
    """Paired t-test of contrast A minus contrast B within participants, in every region.

    Parameters
    ----------
    values : DataFrame
        Region values table with both contrasts.
    participants : DataFrame, optional
        Not used.
    confidence : float
        Confidence level.
    contrast, versus : str
        A and B; the term is ``"A - B"``.

    Returns
    -------
    DataFrame
        As :func:`one_sample` on the differences, with effect_size ``d_z`` = mean(diff) / SD(diff) and
        ``versus`` = B. A participant missing either contrast in a region is excluded for that region.

    Notes
    -----
    Checked against scipy.stats.ttest_rel and R's t.test(paired = TRUE) on the sleep data.

    Examples
    --------
    >>> run_design(values, "paired", contrast="novel", versus="familiar")  # doctest: +SKIP
    """
    values = check_values(values)
    diff, regions, excluded = _prepare_paired(values, contrast, versus)
    context = f"paired {contrast!r} - {versus!r}"
    coverage = _coverage(values, [contrast, versus], regions, diff, context, True)
    return _one_sample_rows(
        diff, regions, excluded, design="paired", term=f"{contrast} - {versus}", confidence=confidence,
        effect_type="d_z", extra={"contrast": contrast, "versus": versus}, coverage=coverage, context=context,
    )  # fmt: skip


# --------------------------------------------------------------------------------------------------------------------
# two-group
# --------------------------------------------------------------------------------------------------------------------


def _parse_levels(levels) -> list[str] | None:
    if levels is None:
        return None
    if isinstance(levels, str):
        items = [s.strip() for s in levels.split(",") if s.strip()]
    else:
        items = [str(s).strip() for s in levels]
    if len(items) != 2 or items[0] == items[1]:
        raise UsageError(f"levels must name two different groups, e.g. 'younger,older'; got {levels!r}")
    return items


def _group_labels(series: pd.Series) -> pd.Series:
    """Group column as strings (numbers like 1.0 written as '1'), NaN kept."""

    def fmt(v):
        if v is None or (isinstance(v, float) and np.isnan(v)):
            return None
        if isinstance(v, (float, np.floating)) and float(v).is_integer():
            return str(int(v))
        return str(v)

    return series.map(fmt)


def _prepare_two_group(values, participants, contrast, group, levels, *, warn: bool = True):
    _require("contrast", contrast, "two-group", "--contrast")
    _require("group", group, "two-group", "--group")
    y = pivot_contrast(values, contrast)
    regions = list(y.columns)
    labels = _group_labels(join_participants(list(y.index), participants, [group])[group])
    observed_levels = list(pd.unique(labels.dropna()))
    levels = _parse_levels(levels)
    if levels is None:
        if len(observed_levels) != 2:
            raise UsageError(
                f"column {group!r} has {plural(len(observed_levels), 'level')} ({', '.join(observed_levels)}); "
                f"pass {spell('levels', example='L1,L2')} to choose the two groups compared"
            )
        levels = observed_levels
    for lev in levels:
        if lev not in observed_levels:
            raise DesignError(
                f"level {lev!r} not found in participants column {group!r} for contrast {contrast!r}; "
                f"found {', '.join(observed_levels) or 'none'}"
            )
    no_group = list(labels.index[labels.isna()])
    if no_group and warn:
        warnings.warn(
            f"two-group on {contrast!r}: {plural(len(no_group), 'participant')} without a value in participants column "
            f"{group!r} (or absent from participants.tsv) excluded from every region: {', '.join(no_group)}",
            MissingValueWarning,
            stacklevel=4,
        )
    others = labels[labels.notna() & ~labels.isin(levels)]
    if len(others) and warn:
        by_level = "; ".join(f"{lev}: {', '.join(map(str, others.index[others == lev]))}"
                             for lev in pd.unique(others))
        warnings.warn(
            f"two-group on {contrast!r}: {plural(len(others), 'participant')} in "
            f"{noun(pd.unique(others), 'a level', 'levels')} of column {group!r} other than {levels[0]!r} and "
            f"{levels[1]!r} left out of this comparison: {by_level}",
            MissingValueWarning,
            stacklevel=4,
        )
    keep = labels.isin(levels).to_numpy()
    y = y[keep]
    in_first = (labels[keep] == levels[0]).to_numpy()
    missing = missing_by_region(y)
    excluded = [list(no_group) + list(e) for e in missing]  # excluded_ids: also those without a group value
    if warn:
        warn_exclusions(regions, missing, context=f"two-group on {contrast!r}", stacklevel=5)
    return y, regions, excluded, in_first, levels


def _two_group_permutation(
    values, *, participants, permutations, rng, contrast=None, group=None, levels=None, welch=False, **_
):
    y, regions, _ex, in_first, levels = _prepare_two_group(
        check_values(values), participants, contrast, group, levels, warn=False
    )
    p, total, exact = label_max_t(y.to_numpy(float), in_first, welch=bool(welch), permutations=permutations, rng=rng)
    return {f"{levels[0]} - {levels[1]}": p, "_n_permutations": total, "_exact": exact, "_scheme": "label"}


@register("two-group", permutation=_two_group_permutation)
def two_group(
    values: pd.DataFrame,
    *,
    participants: pd.DataFrame | None,
    confidence: float = 0.95,
    contrast: str,
    group: str,
    levels: str | Sequence[str] | None = None,
    welch: bool = False,
) -> pd.DataFrame:
    """Two-group t-test (Student, or Welch with ``welch=True``) of a contrast, in every region.

    Parameters
    ----------
    values : DataFrame
        Region values table.
    participants : DataFrame
        participants.tsv with the ``group`` column.
    confidence : float
        Confidence level.
    contrast : str
        Contrast tested.
    group : str
        participants.tsv column holding the groups.
    levels : str or pair of str, optional
        The two levels compared, ``"L1,L2"``; the term is ``"L1 - L2"``. Required when the column has more than
        two levels.
    welch : bool
        Welch's unequal-variance t-test (fractional df).

    Returns
    -------
    DataFrame
        One row per region: n (both groups), estimate = M1 - M2, se, df, statistic (t), p, CI, effect_size ``g``
        (pooled SD, exact J; noncentral-t interval scaled by J), df_method ``student``/``welch``, group_column,
        levels, n_first, n_second, brown_forsythe_p and the common diagnostics (on residuals from the group means).

    Notes
    -----
    Checked against scipy.stats.ttest_ind (equal_var True/False) and R's t.test on the sleep data.

    Examples
    --------
    >>> run_design(values, "two-group", contrast="novel", group="group", levels="younger,older")  # doctest: +SKIP
    """
    values = check_values(values)
    y, regions, excluded, in_first, levels = _prepare_two_group(values, participants, contrast, group, levels)
    context = f"two-group on {contrast!r} ({levels[0]} - {levels[1]})"
    y1, y2 = y[in_first], y[~in_first]
    for name, part in ((levels[0], y1), (levels[1], y2)):
        check_minimum_n(
            part.notna().sum(axis=0).to_numpy(), regions, minimum=2, what=f"members of group {name!r}",
            context=context,
        )  # fmt: skip
    r = two_group_matrix(y1.to_numpy(float), y2.to_numpy(float), welch=bool(welch), confidence=confidence)
    check_variance(r["sd_pooled"], regions, context=context, what="values within groups")
    resid = pd.concat([y1 - r["mean1"], y2 - r["mean2"]]).reindex(y.index)
    diag = _diagnostic_columns(resid)
    coverage = _coverage(values, [contrast], regions, y, context, True)
    rows = result_rows(
        regions, design="two-group", term=f"{levels[0]} - {levels[1]}", confidence=confidence,
        n=(r["n1"] + r["n2"]).astype(int), estimate=r["diff"], se=r["se"], df=r["df"], statistic=r["t"],
        statistic_type="t", p=r["p"], ci_low=r["ci_low"], ci_high=r["ci_high"], effect_size=r["g"],
        effect_size_type="g", effect_size_ci_low=r["g_low"], effect_size_ci_high=r["g_high"],
        df_method="welch" if welch else "student", contrast=contrast, group_column=group, levels=",".join(levels),
        excluded_ids=[join_ids(e) for e in excluded], **diag, **coverage,
        n_first=r["n1"].astype(int), n_second=r["n2"].astype(int), sd_pooled=r["sd_pooled"],
        brown_forsythe_p=brown_forsythe(y1.to_numpy(float), y2.to_numpy(float)),
    )  # fmt: skip
    warn_diagnostics(rows, context=context, stacklevel=4)
    return rows


# --------------------------------------------------------------------------------------------------------------------
# glm
# --------------------------------------------------------------------------------------------------------------------

_REGION_VARYING = ("n_voxels", "n_valid", "variance", "session_id")


def _collinear_message(x: np.ndarray, names: Sequence[str], where: str) -> str:
    _, r, piv = linalg.qr(x, pivoting=True, mode="economic")
    diag = np.abs(np.diag(r))
    tol = diag.max() * max(x.shape) * np.finfo(float).eps if diag.size else 0
    rank = int(np.sum(diag > tol))
    independent = list(piv[:rank])
    parts = []
    for j in piv[rank:]:
        coef, *_ = np.linalg.lstsq(x[:, independent], x[:, j], rcond=None)
        involved = [names[independent[i]] for i in np.flatnonzero(np.abs(coef) > 1e-8)]
        if involved:
            parts.append(f"{names[j]!r} = a combination of {', '.join(repr(c) for c in involved)}")
        else:
            parts.append(f"{names[j]!r} is constant zero")
    return (
        f"glm design matrix{where} is rank deficient (rank {rank} for {x.shape[1]} columns): "
        + "; ".join(parts)
        + "; remove one of the collinear terms from the formula (or a level with no participants)"
    )


def _parse_formula(formula: str):
    from .formula import parse_formula

    return parse_formula(formula, parameter="formula", tilde=True)


def _prepare_glm(values, participants, contrast, formula, *, center=True, warn=True):
    _require("contrast", contrast, "glm", "--contrast")
    _require("formula", formula, "glm", "--formula")

    parsed = _parse_formula(formula)
    y = pivot_contrast(values, contrast)
    regions = list(y.columns)
    variables = sorted(parsed.variables)
    p_columns = [] if participants is None else [c for c in participants.columns if c != "participant_id"]
    unknown = [v for v in variables if v not in p_columns]
    varying = [v for v in unknown if v in _REGION_VARYING or v in values.columns]
    if varying:
        raise DesignError(
            f"glm formula {formula!r} names {', '.join(varying)}, a column of the region values table that varies "
            "by region or session; glm fits one value per participant with participant-level predictors; use "
            "the mixed design for such terms"
        )
    if unknown:
        raise UsageError(
            f"glm formula {formula!r} names {', '.join(unknown)}, not a column of participants.tsv"
            + (f" (available: {', '.join(p_columns)})" if p_columns else f" (pass {spell('participants')})")
        )
    data = (
        join_participants(list(y.index), participants, variables)
        if variables
        else pd.DataFrame(index=pd.Index(list(y.index), name="participant_id"))
    )
    incomplete = data.isna().any(axis=1).to_numpy()
    if incomplete.any() and warn:
        warnings.warn(
            f"glm on {contrast!r}: {plural(int(incomplete.sum()), 'participant')} with missing "
            f"{', '.join(variables)} in "
            f"participants.tsv (or absent from it) excluded from every region: "
            f"{', '.join(np.asarray(y.index)[incomplete])}",
            MissingValueWarning,
            stacklevel=4,
        )
    data = data[~incomplete]
    y = y[~incomplete]
    x, names, term_columns, centered = parsed.design(data.reset_index(drop=True), center=center,
                                                     context=f"glm formula {formula!r}")
    if np.linalg.matrix_rank(x) < x.shape[1]:
        raise DesignError(_collinear_message(x, names, ""))
    excluded = missing_by_region(y)
    if warn:
        warn_exclusions(regions, excluded, context=f"glm on {contrast!r}", stacklevel=5)
    return y, regions, excluded, x, names, term_columns, centered


def _missing_patterns(ymat: np.ndarray) -> dict:
    """Regions (columns) grouped by their pattern of missing participants: groups in order of first appearance,
    regions ascending within a group. (A groupby with one key per participant did the same in 1.6 s for 5,000
    participants x 16 regions, linear in participants: benchmarks/bench_cluster.py.)"""
    if not ymat.shape[0]:
        return {}
    packed = np.packbits(np.isnan(ymat), axis=0).T  # regions x bytes of the participants' missing flags
    _, first, inverse = np.unique(packed, axis=0, return_index=True, return_inverse=True)
    inverse = np.asarray(inverse).reshape(-1)
    return {int(g): np.flatnonzero(inverse == g) for g in np.argsort(first, kind="stable")}


def _glm_tests(names, term_columns, f_tests) -> list[tuple[str, np.ndarray, bool]]:
    """(term, L, is_f) for every coefficient (t) and every multi-column term or user contrast (F)."""
    p = len(names)
    tests = []
    for j, name in enumerate(names):
        lmat = np.zeros((1, p))
        lmat[0, j] = 1.0
        tests.append((name, lmat, False))
    for term, cols in term_columns.items():
        if len(cols) > 1:
            lmat = np.zeros((len(cols), p))
            lmat[np.arange(len(cols)), cols] = 1.0
            tests.append((term, lmat, True))
    for label, spec in (f_tests or {}).items():
        if label in names or label in term_columns:
            raise UsageError(f"f_tests name {label!r} clashes with a model term; choose another name")
        if isinstance(spec, (list, tuple)) and spec and all(isinstance(s, str) for s in spec):
            unknown = [s for s in spec if s not in names]
            if unknown:
                raise UsageError(
                    f"f_tests[{label!r}] names {', '.join(unknown)}; expected coefficient names among "
                    f"{', '.join(names)}"
                )
            lmat = np.zeros((len(spec), p))
            for i, s in enumerate(spec):
                lmat[i, names.index(s)] = 1.0
        else:
            lmat = np.atleast_2d(np.asarray(spec, dtype=float))
            if lmat.shape[1] != p:
                raise UsageError(
                    f"f_tests[{label!r}] has {lmat.shape[1]} columns; expected {p} (one per coefficient: "
                    f"{', '.join(names)})"
                )
            if np.linalg.matrix_rank(lmat) < lmat.shape[0]:
                raise UsageError(f"f_tests[{label!r}]: the contrast rows are linearly dependent; drop redundant rows")
        tests.append((label, lmat, True))
    return tests


def _glm_permutation(
    values, *, participants, permutations, rng, contrast=None, formula=None, center=True, f_tests=None, **_
):
    y, regions, excluded, x, names, term_columns, centered = _prepare_glm(
        check_values(values), participants, contrast, formula, center=center, warn=False
    )
    tests = _glm_tests(names, term_columns, f_tests)
    incomplete = [r for r, e in zip(regions, excluded) if e]
    if incomplete:
        raise DesignError(
            f"permutations for glm (Freedman-Lane) need complete data; {noun(incomplete, 'region')} "
            f"{', '.join(incomplete[:10])} with missing values; drop those participants or regions, or run without "
            "permutations"
        )
    out, total, exact = freedman_lane_max(
        x, y.to_numpy(float), [(name, lmat) for name, lmat, _f in tests], permutations=permutations, rng=rng
    )
    return {**out, "_n_permutations": total, "_exact": exact, "_scheme": "freedman-lane"}


@register("glm", permutation=_glm_permutation)
def glm(
    values: pd.DataFrame,
    *,
    participants: pd.DataFrame | None,
    confidence: float = 0.95,
    contrast: str,
    formula: str,
    center: bool = True,
    f_tests: Mapping[str, Sequence[str] | np.ndarray] | None = None,
) -> pd.DataFrame:
    """Ordinary least squares of a contrast's region values on participant-level predictors, in every region.

    Parameters
    ----------
    values : DataFrame
        Region values table.
    participants : DataFrame
        participants.tsv with the columns the formula names.
    confidence : float
        Confidence level.
    contrast : str
        Contrast modelled.
    formula : str
        Wilkinson formula, e.g. ``"value ~ age + group"`` (roikit's grammar, :mod:`roikit.stats.formula`:
        ``C(site)``, ``age:group``, ``log(age)``, ``(a + b)**2`` ...; never run as code).
    center : bool
        Mean-centre the numeric covariates (over the participants in the model) before building the design, so
        the intercept is the mean response at the average covariate value. Categorical columns are not centred.
    f_tests : mapping, optional
        Extra F tests: name -> list of coefficient names tested jointly = 0, or a (q x p) contrast matrix over the
        coefficients.

    Returns
    -------
    DataFrame
        One row per region x coefficient (t rows, intercept included) and per multi-column term or f_tests entry
        (F rows: estimate/se/ci n/a, df = residual df, df1 = q). effect_size ``partial_eta2`` = F df1 /
        (F df1 + df2) (t rows: F = t^2, df1 = 1) with its noncentral-F interval; df_method ``residual``; formula;
        centered; max_leverage; max_cooks_d; the common diagnostics (on the residuals).

    Notes
    -----
    b = (X'X)^-1 X'y, SE_j = sqrt(sigma^2 [(X'X)^-1]_jj), sigma^2 = RSS / (n - p); F = (Lb)' [L (X'X)^-1 L']^-1 (Lb)
    / (q sigma^2). Regions with missing values are fitted on their own rows (regions sharing a missingness pattern
    are fitted together); the covariates are centred once, over all participants with complete predictors.
    Checked against statsmodels OLS (params, bse, tvalues, pvalues, f_test).

    Examples
    --------
    >>> run_design(values, "glm", contrast="novel", formula="value ~ age + group",
    ...            participants=participants)  # doctest: +SKIP
    """
    values = check_values(values)
    y, regions, excluded, x, names, term_columns, centered = _prepare_glm(
        values, participants, contrast, formula, center=center
    )
    context = f"glm on {contrast!r} ({formula})"
    tests = _glm_tests(names, term_columns, f_tests)
    n_obs = y.notna().sum(axis=0).to_numpy()
    p = x.shape[1]
    check_minimum_n(n_obs, regions, minimum=max(3, p + 1), what="participants (more than the coefficients)",
                    context=context)  # fmt: skip
    k = len(regions)
    ymat = y.to_numpy(float)
    # per test: numerator, standard error (t) or F
    est = {name: np.full(k, np.nan) for name, _l, _f in tests}
    se = {name: np.full(k, np.nan) for name, _l, _f in tests}
    fstat = {name: np.full(k, np.nan) for name, _l, _f in tests}
    df = np.full(k, np.nan)
    resid = np.full(ymat.shape, np.nan)
    max_lev = np.full(k, np.nan)
    max_cook = np.full(k, np.nan)
    patterns = _missing_patterns(ymat)
    for _key, cols in patterns.items():
        cols = np.asarray(cols)
        rows = ~np.isnan(ymat[:, cols[0]])
        xs = x[rows]
        if np.linalg.matrix_rank(xs) < p:
            where = (f" for {noun(cols, 'region')} {', '.join(regions[c] for c in cols[:5])} "
                     "(after excluding missing values)")
            raise DesignError(_collinear_message(xs, names, where))
        fit = ols_matrix(xs, ymat[np.ix_(rows, cols)])
        check_variance(np.sqrt(fit["sigma2"]), [regions[c] for c in cols], context=context, what="residuals")
        df[cols] = fit["df"]
        resid[np.ix_(rows, cols)] = fit["resid"]
        hat = fit["hat"]
        max_lev[cols] = hat.max()
        with np.errstate(divide="ignore", invalid="ignore"):
            cook = fit["resid"] ** 2 / (p * fit["sigma2"]) * (hat / (1 - hat) ** 2)[:, None]
        max_cook[cols] = np.nanmax(cook, axis=0)
        for name, lmat, is_f in tests:
            lb = lmat @ fit["beta"]
            v = lmat @ fit["xtx_inv"] @ lmat.T
            if is_f:
                quad = np.einsum("qk,qr,rk->k", lb, np.linalg.inv(v), lb)
                fstat[name][cols] = quad / (lmat.shape[0] * fit["sigma2"])
            else:
                est[name][cols] = lb[0]
                se[name][cols] = np.sqrt(fit["sigma2"] * v[0, 0])
    diag = _diagnostic_columns(pd.DataFrame(resid, index=y.index, columns=regions))
    coverage = _coverage(values, [contrast], regions, y, context, True)
    common = dict(
        n=n_obs.astype(int), df_method="residual", contrast=contrast, formula=formula,
        excluded_ids=[join_ids(e) for e in excluded], centered=",".join(centered), max_leverage=max_lev,
        max_cooks_d=max_cook, **diag, **coverage,
    )  # fmt: skip
    crit = stats.t.ppf(0.5 + confidence / 2, df)
    frames = []
    for name, lmat, is_f in tests:
        if is_f:
            q = lmat.shape[0]
            f = fstat[name]
            pval = stats.f.sf(f, q, df)
            es, es_lo, es_hi = partial_eta2_interval(f, q, df, confidence)
            frames.append(result_rows(
                regions, design="glm", term=name, confidence=confidence, df=df, statistic=f, statistic_type="F",
                p=pval, effect_size=es, effect_size_type="partial_eta2", effect_size_ci_low=es_lo,
                effect_size_ci_high=es_hi, df1=float(q), **common,
            ))  # fmt: skip
        else:
            t = est[name] / se[name]
            pval = 2 * stats.t.sf(np.abs(t), df)
            es, es_lo, es_hi = partial_eta2_interval(t**2, 1.0, df, confidence)
            frames.append(result_rows(
                regions, design="glm", term=name, confidence=confidence, estimate=est[name], se=se[name], df=df,
                statistic=t, statistic_type="t", p=pval, ci_low=est[name] - crit * se[name],
                ci_high=est[name] + crit * se[name], effect_size=es, effect_size_type="partial_eta2",
                effect_size_ci_low=es_lo, effect_size_ci_high=es_hi, **common,
            ))  # fmt: skip
    rows = pd.concat(frames, ignore_index=True)
    warn_diagnostics(rows, context=context, stacklevel=4)
    return rows

