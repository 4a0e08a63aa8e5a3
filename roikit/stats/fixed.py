"""Fixed-effects design (teaching comparison only): inverse-variance weighted mean tested against
within-participant error alone.

A fixed-effects test ignores the true differences between participants, so its result describes only the
participants measured and does not generalise to the population they were drawn from. roikit never uses it as
a default; its rows carry ``population_inference = false`` and a caution in words.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import stats as _st

from .._options import noun, plural
from ..errors import CautionWarning, DesignError
from ._common import COLUMN_DESCRIPTIONS, mergeable
from ._registry import register

__all__ = ["fit_fixed_effects", "fixed_effects", "CAUTION"]

#: The words every fixed-effects row carries (column ``caution``) and its warning repeats.
CAUTION = ("fixed-effects result: tested against within-participant (first-level) error only, so it describes "
           "only these participants and does not generalise to the population; use the one-sample or "
           "precision-weighted design for population inference")


for _name, _text in {
    "fixed_effects_only": "true: the row tests against within-participant error only (fixed-effects design)",
    "caution": "words that must accompany a fixed-effects result: it does not generalise to the population",
}.items():
    COLUMN_DESCRIPTIONS.setdefault(_name, _text)


def fit_fixed_effects(y: np.ndarray, v: np.ndarray, *, mask: np.ndarray | None = None,
                      confidence: float = 0.95) -> dict[str, np.ndarray]:
    """Inverse-variance weighted mean and its z test, for every column (region) at once.

    Parameters
    ----------
    y, v : ndarray, shape (n, R) or (n,)
        Values and their first-level sampling variances.
    mask : ndarray of bool, optional
        True where a participant enters (default: both finite).
    confidence : float
        Level of the confidence interval.

    Returns
    -------
    dict of ndarray (R,)
        ``b``, ``se``, ``z``, ``p``, ``ci_low``, ``ci_high``, ``k``.

    Notes
    -----
    ``w_i = 1 / v_i``, ``b = sum w y / sum w``, ``se = 1 / sqrt(sum w)``, ``z = b / se``, ``p = 2 (1 - Phi(|z|))``.
    When participants truly differ (between-participant variance tau2 > 0) and ``v_i = v``, the false-positive
    rate under a true mean of zero is ``2 (1 - Phi(z_crit / sqrt(1 + tau2 / v)))``, far above the nominal level;
    checked by a seeded simulation in the tests.
    """
    y = np.asarray(y, dtype=float)
    v = np.asarray(v, dtype=float)
    if y.ndim == 1:
        y, v = y[:, None], v[:, None]
    if mask is None:
        mask = np.isfinite(y) & np.isfinite(v)
    w = np.where(mask, 1.0 / np.where(mask, v, 1.0), 0.0)
    sw = w.sum(0)
    b = (w * np.where(mask, y, 0.0)).sum(0) / sw
    se = 1.0 / np.sqrt(sw)
    z = b / se
    crit = _st.norm.ppf(0.5 + confidence / 2)
    return {"b": b, "se": se, "z": z, "p": 2 * _st.norm.sf(np.abs(z)), "ci_low": b - crit * se,
            "ci_high": b + crit * se, "k": mask.sum(0)}


@register("fixed-effects")
def fixed_effects(
    values: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    confidence: float = 0.95,
    contrast: str | None = None,
) -> pd.DataFrame:
    """Fixed-effects comparison: weighted mean across these participants against within-participant error only.

    For teaching: it shows how much smaller a p-value gets when the differences between participants are
    ignored. It says nothing about the population; every row says so (``population_inference`` false,
    ``caution``) and a :class:`~roikit.errors.CautionWarning` is issued.

    Parameters
    ----------
    values : DataFrame
        Region values table with a ``variance`` column (extract with ``--variance``).
    participants : DataFrame, optional
        Unused (accepted for a uniform design signature).
    confidence : float
        Level of the confidence interval.
    contrast : str
        The contrast to summarise.

    Returns
    -------
    DataFrame
        One row per region, term ``mean``: the contract's columns (estimate = weighted mean, se, df n/a,
        statistic z, p, ci_low, ci_high; effect_size n/a: no population effect size exists for this design)
        and the common ones (``population_inference`` false, ``df_method`` ``z``, ``excluded_ids`` ...), plus
        ``fixed_effects_only`` (true) and ``caution`` (the words above).

    Notes
    -----
    See :func:`fit_fixed_effects`. Checked by seeded simulation against the exact false-positive rate
    ``2 (1 - Phi(z_crit / sqrt(lambda)))``, ``lambda = 1 + tau2 / v``.

    Examples
    --------
    >>> from roikit.stats import run_design
    >>> run_design(values, "fixed-effects", contrast="novel")   # doctest: +SKIP
    """
    from ._common import (check_minimum_n, join_ids, low_coverage, pivot_contrast, region_order, result_rows,
                          warn_exclusions, warn_low_coverage)

    context = "fixed-effects"
    if "variance" not in values.columns:
        raise DesignError(
            "fixed-effects: the region values table has no 'variance' column; this design needs the first-level "
            "variances; extract with --variance PATTERN (variance maps)"
        )
    regions = region_order(values)
    Y = pivot_contrast(values, contrast, regions=regions)
    V = pivot_contrast(values, contrast, column="variance", regions=regions).to_numpy(float)
    ids = [str(i) for i in Y.index]
    y = Y.to_numpy(float)
    bad = np.argwhere(np.isfinite(V) & ~(V > 0))
    if bad.size:
        listed = ", ".join(f"{ids[i]} in {regions[j]} ({V[i, j]:g})" for i, j in bad[:5])
        raise DesignError(f"fixed-effects: non-positive first-level {noun(len(bad), 'variance')} for "
                          f"{plural(len(bad), 'participant-region value')}: {listed}; variances must be > 0; check "
                          "the variance maps")
    mask = np.isfinite(y) & np.isfinite(V)
    excluded = [[ids[i] for i in np.flatnonzero(~mask[:, j])] for j in range(len(regions))]
    warn_exclusions(regions, excluded, context=context, reason="value or variance missing")
    check_minimum_n(mask.sum(0), regions, minimum=1, context=context)
    fit = fit_fixed_effects(y, V, mask=mask, confidence=confidence)
    coverage = low_coverage(values, contrast, regions=regions, ids=ids)
    warn_low_coverage(regions, coverage, context=context)
    out = result_rows(
        regions, design="fixed-effects", term="mean", confidence=confidence, n=fit["k"].astype(int),
        estimate=fit["b"], se=fit["se"], df=np.nan, statistic=fit["z"], statistic_type="z", p=fit["p"],
        ci_low=fit["ci_low"], ci_high=fit["ci_high"], effect_size=np.nan, effect_size_type=None,
        contrast=str(contrast), df_method="z", population_inference=False,
        excluded_ids=[join_ids(e) for e in excluded], n_low_coverage=[len(c) for c in coverage],
        low_coverage_ids=[join_ids(c) for c in coverage], fixed_effects_only=True, caution=CAUTION,
    )
    _warn_caution(list(regions), contrast=contrast, n_participants=len(ids))
    return out


@mergeable
def _warn_caution(regions, *, contrast, n_participants: int) -> None:
    warnings.warn(f"{CAUTION} (contrast {contrast!r}, {n_participants} participants, {plural(len(regions), 'region')})",
                  CautionWarning, stacklevel=4)
