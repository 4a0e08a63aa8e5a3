"""Multiple-comparison corrections across regions (Bonferroni, Holm, Benjamini-Hochberg).

The family is the set of regions tested for one design and term; p-values that are NaN (region not tested) are
left out of the family and stay NaN.
"""

from __future__ import annotations

from typing import Literal, Sequence

import numpy as np

from ..errors import UsageError

__all__ = ["CORRECTIONS", "PRIMARY_CHOICES", "adjust", "bonferroni", "holm", "fdr_bh", "parse_corrections",
           "primary_correction", "correction_choices_text"]

Correction = Literal["bonferroni", "holm", "fdr"]

#: Corrections known to roikit, in the order their columns are written.
CORRECTIONS = ("holm", "fdr", "bonferroni")

#: Every name ``correct`` accepts; the first listed is the PRIMARY correction (the one text, notes, figure markers
#: and the run summary use). ``fwe`` is the max-statistic permutation family-wise p (needs permutations);
#: ``none`` means the primary report is uncorrected (the adjusted columns are still written).
PRIMARY_CHOICES = ("holm", "fdr", "bonferroni", "fwe", "none")

_ALIASES = {"bh": "fdr", "fdr_bh": "fdr", "benjamini-hochberg": "fdr", "permutation-fwe": "fwe",
            "permutation": "fwe", "maxt": "fwe"}


def correction_choices_text(python: bool = False) -> str:
    """The valid names and what ``fwe`` needs, for error messages."""
    need = "permutations=N" if python else "--permutations N"
    return (f"valid names: holm, fdr (Benjamini-Hochberg), bonferroni, fwe (max-statistic permutations; needs "
            f"{need}), none (uncorrected); list several separated by commas, the first is the primary one")


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
    """Normalise ``correct`` ("holm,fdr", ["fwe", "holm"], "none", None) to a tuple of known names (no duplicates).

    The order is kept: the first entry is the PRIMARY correction. ``none`` may only come first (an uncorrected
    primary report; later entries still get their columns). ``None`` or an empty string give ``()``. ``p_holm`` and
    ``p_fdr`` are written whatever is chosen (the contract's columns); ``bonferroni`` adds ``p_bonferroni`` and
    ``fwe`` needs permutations (``p_fwe``).
    """
    if correct is None:
        return ()
    if isinstance(correct, str):
        items = [c.strip() for c in correct.split(",") if c.strip()]
    else:
        items = [str(c).strip() for c in correct]
    out: list[str] = []
    for c in items:
        key = _ALIASES.get(c.lower(), c.lower())
        if key not in PRIMARY_CHOICES:
            raise UsageError(f"unknown correction {c!r}; {correction_choices_text()}")
        if key == "none" and out:
            raise UsageError(f"correction 'none' must come first (it makes the primary report uncorrected), got "
                             f"{', '.join(items)}; write \"none,{','.join(out)}\" or drop 'none'")
        if key not in out:
            out.append(key)
    return tuple(out)


def primary_correction(correct: str | Sequence[str] | None) -> str:
    """The primary correction of a ``correct`` value or of a results ``correction`` cell (``none`` when empty)."""
    items = parse_corrections(correct)
    return items[0] if items else "none"


def adjust(p: Sequence[float], method: Correction) -> np.ndarray:
    """Adjusted p-values by ``method`` ("bonferroni", "holm" or "fdr")."""
    try:
        return _FUNCTIONS[method](p)
    except KeyError:
        raise UsageError(f"unknown correction {method!r}; expected one of {', '.join(CORRECTIONS)}") from None
