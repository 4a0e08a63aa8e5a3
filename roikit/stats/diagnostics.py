"""Per-region diagnostics as data: robust outliers, normality, equal variances, leverage.

All functions take a participants x regions matrix (NaN = not in this region's test) and return one value per region.
"""

from __future__ import annotations

import warnings
from typing import Sequence

import numpy as np
import pandas as pd
from scipy import stats

from .._options import plural, spell
from ..errors import DiagnosticWarning
from ._common import join_ids, mergeable

__all__ = [
    "modified_z",
    "robust_outliers",
    "shapiro_columns",
    "brown_forsythe",
    "residual_diagnostics",
    "warn_diagnostics",
]

#: Iglewicz & Hoaglin (1993) recommend flagging |modified z| > 3.5.
OUTLIER_THRESHOLD = 3.5


def modified_z(matrix: np.ndarray) -> np.ndarray:
    """Modified z-scores per column: 0.6745 (x - median) / MAD (Iglewicz & Hoaglin 1993), NaN-aware.

    Where the MAD is zero the mean absolute deviation from the median scaled by 1.253314 replaces it (common
    practice, no source); where that is zero too the scores are 0.
    """
    x = np.asarray(matrix, dtype=float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        med = np.nanmedian(x, axis=0)
        dev = np.abs(x - med)
        mad = np.nanmedian(dev, axis=0)
        meanad = np.nanmean(dev, axis=0)
    z = np.zeros_like(x)
    with np.errstate(divide="ignore", invalid="ignore"):
        z_mad = 0.6745 * (x - med) / mad
        z_mean = (x - med) / (1.253314 * meanad)
    use_mad = mad > 0
    use_mean = ~use_mad & (meanad > 0)
    z[:, use_mad] = z_mad[:, use_mad]
    z[:, use_mean] = z_mean[:, use_mean]
    z[np.isnan(x)] = np.nan
    return z


def robust_outliers(matrix: np.ndarray, ids: Sequence[str]) -> tuple[np.ndarray, list[str]]:
    """Count and name participants with |modified z| > 3.5 in each column."""
    z = modified_z(matrix)
    flag = np.abs(np.nan_to_num(z)) > OUTLIER_THRESHOLD
    ids_arr = np.asarray(list(ids), dtype=object)
    counts = flag.sum(axis=0)
    names = [join_ids(ids_arr[flag[:, j]]) for j in range(flag.shape[1])]
    return counts.astype(int), names


def shapiro_columns(matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Shapiro-Wilk W and p per column ignoring NaN (NaN where fewer than 3 values or constant)."""
    x = np.asarray(matrix, dtype=float)
    k = x.shape[1]
    w = np.full(k, np.nan)
    p = np.full(k, np.nan)
    for j in range(k):  # no closed form across columns; scipy's W is a per-sample computation
        col = x[:, j]
        col = col[~np.isnan(col)]
        if col.size < 3 or np.ptp(col) == 0:
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # p may be inaccurate for n > 5000 (scipy warns)
            res = stats.shapiro(col)
        w[j], p[j] = res.statistic, res.pvalue
    return w, p


def brown_forsythe(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Brown-Forsythe test (Levene on absolute deviations from the group medians) per column; p-values.

    Vectorised: a one-way ANOVA of |x - median(group)| with two groups, per column, NaN-aware. Checked against
    scipy.stats.levene(center="median") in the tests.
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        za = np.abs(a - np.nanmedian(a, axis=0))
        zb = np.abs(b - np.nanmedian(b, axis=0))
        na = np.sum(~np.isnan(a), axis=0)
        nb = np.sum(~np.isnan(b), axis=0)
        ma = np.nanmean(za, axis=0)
        mb = np.nanmean(zb, axis=0)
        grand = (np.nansum(za, axis=0) + np.nansum(zb, axis=0)) / (na + nb)
        between = na * (ma - grand) ** 2 + nb * (mb - grand) ** 2
        within = np.nansum((za - ma) ** 2, axis=0) + np.nansum((zb - mb) ** 2, axis=0)
        df2 = na + nb - 2
        f = between / (within / df2)
    p = stats.f.sf(f, 1, df2)
    p = np.where(within > 0, p, np.nan)
    return p


def residual_diagnostics(residuals: np.ndarray | pd.DataFrame, ids: Sequence[str] | None = None) -> dict:
    """``n_outliers``, ``outlier_ids``, ``shapiro_w``, ``shapiro_p`` per region from a residual matrix.

    Pass a DataFrame indexed by participant_id or an array with ``ids``.
    """
    if isinstance(residuals, pd.DataFrame):
        ids = list(residuals.index)
        residuals = residuals.to_numpy(float)
    counts, names = robust_outliers(residuals, ids)
    w, p = shapiro_columns(residuals)
    return {"n_outliers": counts, "outlier_ids": names, "shapiro_w": w, "shapiro_p": p}


@mergeable
def warn_diagnostics(results: pd.DataFrame, *, context: str, alpha: float = 0.05, stacklevel: int = 3) -> None:
    """One :class:`DiagnosticWarning` summarising the diagnostic columns of a results table (nothing if clean)."""
    parts = []
    findings: list[dict] = []
    rows = results.drop_duplicates("region") if "region" in results.columns else results
    if "n_outliers" in rows.columns:
        flagged = rows[pd.to_numeric(rows["n_outliers"], errors="coerce").fillna(0) > 0]
        findings += [{"problem": "robust outlier (modified z > 3.5), kept", "participant_id": pid.strip(),
                      "region": r} for r, ids in zip(flagged["region"], flagged["outlier_ids"])
                     for pid in str(ids).split(",") if pid.strip()]
        if len(flagged):
            parts.append(
                f"robust outliers (modified z > 3.5) in {plural(len(flagged), 'region')}: "
                + "; ".join(f"{r}: {ids}" for r, ids in zip(flagged["region"], flagged["outlier_ids"]))
            )
    if "shapiro_p" in rows.columns:
        sp = pd.to_numeric(rows["shapiro_p"], errors="coerce")
        bad = rows.loc[sp < alpha, "region"]
        if len(bad):
            parts.append(f"Shapiro-Wilk p < {alpha} in {plural(len(bad), 'region')}: {', '.join(map(str, bad))}")
            findings += [{"problem": f"residuals not normal (Shapiro-Wilk p < {alpha})", "region": r} for r in bad]
    if "brown_forsythe_p" in rows.columns:
        bp = pd.to_numeric(rows["brown_forsythe_p"], errors="coerce")
        bad = rows.loc[bp < alpha, "region"]
        if len(bad):
            parts.append(
                f"unequal group variances (Brown-Forsythe p < {alpha}) in {plural(len(bad), 'region')}: "
                f"{', '.join(map(str, bad))} (consider {spell('welch', True)})"
            )
            findings += [{"problem": f"unequal group variances (Brown-Forsythe p < {alpha}; consider "
                                     f"{spell('welch', True)})", "region": r} for r in bad]
    if "max_cooks_d" in rows.columns:
        cd = pd.to_numeric(rows["max_cooks_d"], errors="coerce")
        bad = rows.loc[cd > 1.0, "region"]
        if len(bad):
            parts.append(f"Cook's distance > 1 in {plural(len(bad), 'region')}: {', '.join(map(str, bad))}")
            findings += [{"problem": "Cook's distance > 1", "region": r} for r in bad]
    if parts:
        warnings.warn(DiagnosticWarning(f"{context}: " + " | ".join(parts), findings=findings, context=context),
                      stacklevel=stacklevel)
