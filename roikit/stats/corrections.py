"""Multiple-comparison corrections across regions (Bonferroni, Holm, Benjamini-Hochberg).

The family is the set of regions tested for one design and term; p-values that are NaN (region not tested) are
left out of the family and stay NaN.
"""

from __future__ import annotations

from typing import Literal, Sequence

import numpy as np

from ..errors import UsageError

__all__ = ["CORRECTIONS", "adjust", "bonferroni", "holm", "fdr_bh", "parse_corrections"]

Correction = Literal["bonferroni", "holm", "fdr"]

#: Corrections known to roikit, in the order their columns are written.
CORRECTIONS = ("holm", "fdr", "bonferroni")


def _prepare(p: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
    p = np.asarray(p, dtype=float)
    if np.any((p < 0) | (p > 1)):
        raise UsageError(f"p-values must lie in [0, 1]; got min {np.nanmin(p)}, max {np.nanmax(p)}")
    return p, ~np.isnan(p)


def bonferroni(p: Sequence[float]) -> np.ndarray:
    """Bonferroni: min(1, m p), m = number of non-missing p-values.

    Notes
    -----
    Checked against statsmodels.stats.multitest.multipletests(method="bonferroni") in the tests.
    """
    p, ok = _prepare(p)
    out = np.full(p.shape, np.nan)
    out[ok] = np.minimum(1.0, p[ok] * ok.sum())
    return out


def holm(p: Sequence[float]) -> np.ndarray:
    """Holm (1979) step-down: adj_(i) = max_{j <= i} min(1, (m - j + 1) p_(j)).

    Notes
    -----
    Checked against statsmodels.stats.multitest.multipletests(method="holm") in the tests.
    """
    p, ok = _prepare(p)
    out = np.full(p.shape, np.nan)
    q = p[ok]
    m = q.size
    if m == 0:
        return out
    order = np.argsort(q, kind="mergesort")
    scaled = (m - np.arange(m)) * q[order]
    adj = np.minimum(1.0, np.maximum.accumulate(scaled))
    res = np.empty(m)
    res[order] = adj
    out[ok] = res
    return out


def fdr_bh(p: Sequence[float]) -> np.ndarray:
    """Benjamini & Hochberg (1995) step-up: adj_(i) = min_{j >= i} min(1, m p_(j) / j).

    Notes
    -----
    Checked against statsmodels.stats.multitest.multipletests(method="fdr_bh") in the tests.
    """
    p, ok = _prepare(p)
    out = np.full(p.shape, np.nan)
    q = p[ok]
    m = q.size
    if m == 0:
        return out
    order = np.argsort(q, kind="mergesort")
    scaled = q[order] * m / np.arange(1, m + 1)
    adj = np.minimum(1.0, np.minimum.accumulate(scaled[::-1])[::-1])
    res = np.empty(m)
    res[order] = adj
    out[ok] = res
    return out


_FUNCTIONS = {"bonferroni": bonferroni, "holm": holm, "fdr": fdr_bh}


def parse_corrections(correct: str | Sequence[str] | None) -> tuple[str, ...]:
    """Normalise ``correct`` ("holm,fdr", ["holm", "fdr"], "none", None) to a tuple of known names (no duplicates).

    ``p_holm`` and ``p_fdr`` are written whatever is chosen (the contract's columns); the choice is recorded in the
    ``correction`` column and decides whether ``p_bonferroni`` is added.
    """
    if correct is None:
        return ()
    if isinstance(correct, str) and correct.strip().lower() in ("", "none"):
        return ()
    if isinstance(correct, str):
        items = [c.strip() for c in correct.split(",") if c.strip()]
    else:
        items = [str(c).strip() for c in correct]
    out: list[str] = []
    for c in items:
        key = c.lower()
        if key in ("bh", "fdr_bh", "benjamini-hochberg"):
            key = "fdr"
        if key not in _FUNCTIONS:
            raise UsageError(f"unknown correction {c!r}; expected a comma-separated list of {', '.join(CORRECTIONS)}")
        if key not in out:
            out.append(key)
    return tuple(out)


def adjust(p: Sequence[float], method: Correction) -> np.ndarray:
    """Adjusted p-values by ``method`` ("bonferroni", "holm" or "fdr")."""
    try:
        return _FUNCTIONS[method](p)
    except KeyError:
        raise UsageError(f"unknown correction {method!r}; expected one of {', '.join(CORRECTIONS)}") from None
