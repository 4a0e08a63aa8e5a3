"""Planning the next study: power, sample size and sensitivity.

Three kinds of design:

- **t designs** (one-sample, paired, two-group): exact power by the noncentral t distribution; solve for the power
  at a given n, for the smallest n reaching a target power, or for the smallest effect detectable with a given n
  and power (sensitivity). The alpha per test comes from the family of regions tested (Bonferroni; Holm is
  planned as Bonferroni, the threshold Holm applies to the smallest p-value of the family).
- **from a pilot**: the effect size of every region of a ``roikit stats`` results table gives the n needed, and the
  lower confidence limit of that effect size gives the n for "safeguard power" (Perugini, Gallucci & Costantini
  2014), because an observed effect, above all one picked for being large, overstates the true one.
- **designs without a closed form**: the precision-weighted design by seeded simulation (pilot tau2 and the
  distribution of first-level variances, fitted with :func:`roikit.stats.precision.fit_precision_weighted`,
  replicates as columns), and the crossed participants x stimuli mixed design by the exact balanced-design
  noncentrality and Satterthwaite degrees of freedom (Westfall, Kenny & Judd 2014), with a seeded simulation
  through the mixed-model fitter to check it.

Every function returns or accepts plain numbers and arrays; :func:`plan_t`, :func:`plan_from_results`,
:func:`simulate_precision_weighted` and :func:`crossed_power` return tidy tables with one row per plan.
"""

from __future__ import annotations

import math
import sys
from typing import Literal, Sequence

import numpy as np
import pandas as pd
from scipy import optimize, stats

from .._options import noun
from .._typing import Seed
from ..errors import ConvergenceError, DesignError, UsageError
from .effect_sizes import _nct_cdf, d_interval, hedges_j, nct_ncp_interval

__all__ = [
    "T_DESIGNS",
    "LAYOUTS",
    "EFFECT_SIZE_TYPES",
    "PLAN_COLUMNS",
    "HOLM_NOTE",
    "INFLATION_NOTE",
    "alpha_per_test",
    "t_power",
    "solve_n",
    "detectable_effect",
    "plan_t",
    "plan_from_results",
    "sensitivity",
    "simulate_precision_weighted",
    "crossed_variance",
    "crossed_power",
    "simulate_crossed",
]

TDesign = Literal["one-sample", "paired", "two-group"]
Alternative = Literal["two-sided", "greater", "less"]
Correction = Literal["none", "bonferroni", "holm"]
Layout = Literal["fully-crossed", "stimuli-within-condition", "participants-within-condition",
                 "both-within-condition"]

T_DESIGNS: tuple[str, ...] = ("one-sample", "paired", "two-group")
#: Balanced participants x stimuli layouts of Westfall, Kenny & Judd (2014) handled by :func:`crossed_power`.
LAYOUTS: tuple[str, ...] = ("fully-crossed", "stimuli-within-condition", "participants-within-condition",
                            "both-within-condition")
#: The standardised effect size each t design plans with.
EFFECT_SIZE_TYPES = {"one-sample": "d", "paired": "d_z", "two-group": "d"}
#: The contract's PLAN.tsv columns, first in every plan table.
PLAN_COLUMNS = ("design", "effect_size", "effect_size_type", "n", "power", "alpha", "alpha_per_test",
                "family_size", "correction")

HOLM_NOTE = ("Holm is planned as Bonferroni: alpha / K is the threshold Holm applies to the smallest p-value of a "
             "family of K regions, so the plan holds for the strongest region and is conservative for the others.")
INFLATION_NOTE = ("Effect sizes observed in a pilot overstate the true ones, and more so when the regions or the "
                  "pilot were picked because the effect looked large (selection on a noisy estimate); plan with "
                  "the safeguard n (the lower confidence limit of the effect) or with an effect size justified "
                  "independently of this pilot.")

_MAX_N = 10_000_000


# ------------------------------------------------------------------------------------------------ checks
def _check_fraction(value, name: str, example: str, what: str = "a number") -> float:
    """``value`` as a float strictly between 0 and 1, or a UsageError naming ``name``."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        x = float("nan")
    if not 0 < x < 1:
        raise UsageError(f"{name}: expected {what} between 0 and 1 (e.g. {example}), got {value!r}")
    return x


def _check_alpha(alpha: float, name: str = "alpha") -> float:
    return _check_fraction(alpha, name, "0.05")


def _check_power(power: float) -> float:
    return _check_fraction(power, "power", "0.8", what="a target")


def _check_design(design: str) -> str:
    if design not in T_DESIGNS:
        raise UsageError(f"design: found {design!r}, expected one of {', '.join(T_DESIGNS)}")
    return design


def _check_alternative(alternative: str) -> str:
    if alternative not in ("two-sided", "greater", "less"):
        raise UsageError(f"alternative: found {alternative!r}, expected two-sided (default), greater or less")
    return alternative


def _check_ratio(ratio: float) -> float:
    try:
        r = float(ratio)
    except (TypeError, ValueError):
        raise UsageError(f"ratio: expected the second group's size over the first's (e.g. 1.5), got {ratio!r}") \
            from None
    if not (math.isfinite(r) and r > 0):
        raise UsageError(f"ratio: expected a positive number (second group / first group), got {ratio!r}")
    return r


def alpha_per_test(alpha: float = 0.05, *, family_size: int = 1, correction: Correction = "bonferroni") -> float:
    """The alpha each region's test is planned at, given a family of ``family_size`` regions.

    Parameters
    ----------
    alpha : float
        Family-wise error rate (or, with ``correction="none"``, the per-test alpha).
    family_size : int
        Number of regions K tested in the same design and term.
    correction : {"bonferroni", "holm", "none"}
        ``bonferroni`` and ``holm`` give ``alpha / K`` (Holm planned as Bonferroni: the threshold Holm applies to
        the smallest p-value, see :data:`HOLM_NOTE`); ``none`` gives ``alpha`` (an uncorrected family).

    Returns
    -------
    float

    Examples
    --------
    >>> alpha_per_test(0.05, family_size=10, correction="holm")
    0.005
    """
    alpha = _check_alpha(alpha)
    if isinstance(family_size, bool) or not isinstance(family_size, (int, np.integer)) or family_size < 1:
        raise UsageError(f"family_size: expected a positive whole number of regions, got {family_size!r}")
    if correction not in ("bonferroni", "holm", "none"):
        raise UsageError(f"correction: found {correction!r}, expected bonferroni, holm or none")
    return alpha if correction == "none" else alpha / int(family_size)


# ------------------------------------------------------------------------------------------------ t designs
def _df_ncp(effect_size, n, design, n_second=None, ratio=1.0):
    """Degrees of freedom and noncentrality of the t statistic (arrays broadcast)."""
    d = np.asarray(effect_size, dtype=float)
    n = np.asarray(n, dtype=float)
    if design == "two-group":
        n2 = np.ceil(n * ratio - 1e-9) if n_second is None else np.asarray(n_second, dtype=float)
        return n + n2 - 2, d / np.sqrt(1 / n + 1 / n2), n2
    return n - 1, d * np.sqrt(n), None


def _cdf(x, df, ncp):
    """Noncentral t cdf on arrays of any shape (0-d included), with the far-tail stand-in of effect_sizes."""
    x, df, ncp = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (x, df, ncp)))
    return _nct_cdf(x.ravel(), df.ravel(), ncp.ravel()).reshape(x.shape)


def _power_from(df, ncp, alpha, alternative):
    df, ncp = np.broadcast_arrays(np.asarray(df, dtype=float), np.asarray(ncp, dtype=float))
    if alternative == "two-sided":
        crit = stats.t.ppf(1 - alpha / 2, df)
        return 1 - _cdf(crit, df, ncp) + _cdf(-crit, df, ncp), crit
    crit = stats.t.ppf(1 - alpha, df)
    if alternative == "greater":
        return 1 - _cdf(crit, df, ncp), crit
    return _cdf(-crit, df, ncp), crit


def t_power(
    effect_size: float | np.ndarray,
    n: int | np.ndarray,
    *,
    design: TDesign = "one-sample",
    alpha: float = 0.05,
    alternative: Alternative = "two-sided",
    n_second: int | np.ndarray | None = None,
    ratio: float = 1.0,
) -> np.ndarray:
    """Exact power of a one-sample, paired or two-group t-test (noncentral t).

    Parameters
    ----------
    effect_size : float or array
        ``d`` (one-sample: mean / SD; two-group: (M1 - M2) / pooled SD) or ``d_z`` (paired: mean(diff) /
        SD(diff)), the population value assumed.
    n : int or array
        Participants (two-group: in the first group).
    design : {"one-sample", "paired", "two-group"}
    alpha : float
        Alpha of this test (already divided by the family, see :func:`alpha_per_test`).
    alternative : {"two-sided", "greater", "less"}
    n_second : int or array, optional
        Two-group: participants in the second group (default ``ceil(ratio * n)``).
    ratio : float
        Two-group: second group size over the first's when ``n_second`` is not given (1: equal groups).

    Returns
    -------
    ndarray
        Probability of rejecting the null hypothesis, broadcast over the inputs.

    Notes
    -----
    One-sample and paired: ``T ~ t'(n - 1, d sqrt(n))``; two-group (pooled variance): ``T ~ t'(n1 + n2 - 2,
    d / sqrt(1/n1 + 1/n2))``. Two-sided power is ``P(T > c) + P(T < -c)`` with ``c = t_{1 - alpha/2}(df)``.
    Checked against Cohen (1988, Table 2.4.1) and statsmodels ``TTestPower`` / ``TTestIndPower`` in the tests.

    Examples
    --------
    >>> round(float(t_power(0.5, 64, design="two-group")), 3)
    0.801
    """
    design = _check_design(design)
    alpha = _check_alpha(alpha)
    alternative = _check_alternative(alternative)
    ratio = _check_ratio(ratio)
    n_arr = np.asarray(n, dtype=float)
    if np.any(n_arr < 2) or (n_second is not None and np.any(np.asarray(n_second, dtype=float) < 2)):
        raise UsageError(f"n: at least 2 participants (per group) are needed for a t-test, got {n!r}")
    df, ncp, _ = _df_ncp(effect_size, n_arr, design, n_second, ratio)
    power, _ = _power_from(df, ncp, alpha, alternative)
    return power


def solve_n(
    effect_size: float,
    power: float = 0.8,
    *,
    design: TDesign = "one-sample",
    alpha: float = 0.05,
    alternative: Alternative = "two-sided",
    ratio: float = 1.0,
) -> int:
    """Smallest whole n (two-group: in the first group) whose exact power reaches ``power``.

    Parameters
    ----------
    effect_size, design, alpha, alternative, ratio
        As in :func:`t_power`.
    power : float
        Target power.

    Returns
    -------
    int

    Raises
    ------
    DesignError
        When the effect is 0 or points away from a one-sided alternative, or needs more than 10 million.

    Examples
    --------
    >>> solve_n(0.5, 0.8, design="two-group")
    64
    """
    target = _check_power(power)
    d = float(effect_size)
    if not math.isfinite(d) or d == 0 or (alternative == "greater" and d < 0) or (alternative == "less" and d > 0):
        raise DesignError(f"effect_size {effect_size!r}: no sample size gives power {target} for this effect with "
                          f"alternative={alternative!r}; give a non-zero effect in the tested direction")

    def pw(n: int) -> float:
        return float(t_power(d, n, design=design, alpha=alpha, alternative=alternative, ratio=ratio))

    lo = 2
    if pw(lo) >= target:
        return lo
    hi = 4
    while pw(hi) < target:
        lo, hi = hi, hi * 2
        if hi > _MAX_N:
            raise DesignError(f"effect_size {d:g}: more than {_MAX_N:,} participants would be needed for power "
                              f"{target}; the effect is too small to plan for")
    while hi - lo > 1:  # power is increasing in n: pw(lo) < target <= pw(hi)
        mid = (lo + hi) // 2
        if pw(mid) >= target:
            hi = mid
        else:
            lo = mid
    return hi


def detectable_effect(
    n: int,
    power: float = 0.8,
    *,
    design: TDesign = "one-sample",
    alpha: float = 0.05,
    alternative: Alternative = "two-sided",
    n_second: int | None = None,
    ratio: float = 1.0,
) -> float:
    """Smallest effect size detectable with probability ``power`` at this n (sensitivity).

    Parameters
    ----------
    n, design, alpha, alternative, n_second, ratio
        As in :func:`t_power`.
    power : float
        Target power.

    Returns
    -------
    float
        ``d`` (or ``d_z``); positive, negative for ``alternative="less"``.

    Examples
    --------
    >>> round(detectable_effect(32, 0.8, design="paired"), 3)
    0.511
    """
    target = _check_power(power)
    alpha = _check_alpha(alpha)
    sign = -1.0 if alternative == "less" else 1.0

    def gap(d: float) -> float:
        return float(t_power(sign * d, n, design=design, alpha=alpha, alternative=alternative,
                             n_second=n_second, ratio=ratio)) - target

    floor = alpha / 2 if alternative == "two-sided" else alpha
    if target <= floor:
        raise UsageError(f"power: a target of {target} is not above alpha ({floor:g}); every effect reaches it")
    hi = 1.0
    while gap(hi) < 0:
        hi *= 2
        if hi > 1e6:
            raise DesignError(f"n {n!r}: no effect size reaches power {target}; check n and alpha")
    root = float(optimize.brentq(gap, 0.0, hi, xtol=1e-12, rtol=1e-12))
    for _ in range(20):  # the smallest effect that reaches the target, not one a rounding error short of it
        if gap(root) >= 0:
            break
        root += 1e-12 * max(1.0, root)
    return sign * root


def _as_list(x, name: str, kind=float) -> list:
    if x is None:
        return []
    items = list(x) if isinstance(x, (list, tuple, np.ndarray, pd.Series)) else [x]
    out = []
    for item in items:
        try:
            value = kind(item)
        except (TypeError, ValueError):
            raise UsageError(f"{name}: expected numbers, got {item!r}") from None
        if kind is int and float(item) != value:
            raise UsageError(f"{name}: expected whole numbers, got {item!r}")
        out.append(value)
    return out


def plan_t(
    *,
    design: TDesign,
    effect_size: float | Sequence[float] | None = None,
    n: int | Sequence[int] | None = None,
    power: float | None = None,
    alpha: float = 0.05,
    family_size: int = 1,
    correction: Correction = "holm",
    alternative: Alternative = "two-sided",
    ratio: float = 1.0,
) -> pd.DataFrame:
    """Plan a one-sample, paired or two-group study: power, sample size or sensitivity, one row per answer.

    Parameters
    ----------
    design : {"one-sample", "paired", "two-group"}
    effect_size : float or sequence of float, optional
        Assumed population ``d`` (one-sample, two-group) or ``d_z`` (paired).
    n : int or sequence of int, optional
        Participants (two-group: in the first group; the second has ``ceil(ratio * n)``).
    power : float, optional
        Target power.
    alpha : float
        Family-wise alpha across the ``family_size`` regions.
    family_size : int
        Regions K tested (the family of the correction).
    correction : {"holm", "bonferroni", "none"}
        Used when ``family_size > 1``; Holm is planned as Bonferroni (:data:`HOLM_NOTE`).
    alternative : {"two-sided", "greater", "less"}
    ratio : float
        Two-group: second group size over the first's.

    Returns
    -------
    DataFrame
        Given ``effect_size`` and ``power``: the n needed (``solved_for = "n"``); given ``effect_size`` and ``n``:
        the power (``solved_for = "power"``); given ``n`` and ``power``: the smallest detectable effect
        (``solved_for = "effect_size"``); with all three, the power rows and the sensitivity rows. Columns:
        design, effect_size, effect_size_type, n (per group for two-group: the first group), power, alpha,
        alpha_per_test, family_size, correction, then solved_for, target_power, n_second (two-group only),
        n_total, df, ncp, critical_t, alternative, ratio (two-group only).

    Notes
    -----
    Exact noncentral t (see :func:`t_power`); n is the smallest integer reaching the target. Checked against
    Cohen (1988), statsmodels ``TTestPower`` and ``TTestIndPower`` in the tests.

    Examples
    --------
    >>> plan_t(design="paired", effect_size=0.5, power=0.8)[["n", "power"]].round(3).to_dict("records")
    [{'n': 34, 'power': 0.808}]
    """
    design = _check_design(design)
    alternative = _check_alternative(alternative)
    ratio = _check_ratio(ratio)
    effects = _as_list(effect_size, "effect_size")
    ns = _as_list(n, "n", int)
    if power is not None:
        power = _check_power(power)
    if any(v < 2 for v in ns):
        raise UsageError(f"n: at least 2 participants (per group) are needed, got {min(ns)}")
    if family_size < 1:
        raise UsageError(f"family_size: expected at least 1 region, got {family_size}")
    corr = correction if family_size > 1 else "none"
    a_test = alpha_per_test(alpha, family_size=family_size, correction=corr)
    rows = []

    def row(d, n1, solved, target):
        df, ncp, n2 = _df_ncp(d, n1, design, None, ratio)
        pw, crit = _power_from(df, ncp, a_test, alternative)
        n2v = int(n2) if n2 is not None else None
        rows.append({
            "design": design, "effect_size": float(d), "effect_size_type": EFFECT_SIZE_TYPES[design],
            "n": int(n1), "power": float(pw), "alpha": float(alpha), "alpha_per_test": a_test,
            "family_size": int(family_size), "correction": corr, "solved_for": solved, "target_power": target,
            "n_second": n2v, "n_total": int(n1) + (n2v or 0), "df": float(df), "ncp": float(ncp),
            "critical_t": float(crit), "alternative": alternative, "ratio": ratio,
        })

    if effects and power is not None and not ns:
        for d in effects:
            row(d, solve_n(d, power, design=design, alpha=a_test, alternative=alternative, ratio=ratio), "n", power)
    elif effects and ns:
        for d in effects:
            for n1 in ns:
                row(d, n1, "power", np.nan)
    elif not (ns and power is not None):
        raise UsageError("give two of effect_size, n and power (--effect-size, --n, --power): effect size and "
                         "power give n, effect size and n give power, n and power give the detectable effect")
    if ns and power is not None:
        for n1 in ns:
            d = detectable_effect(n1, power, design=design, alpha=a_test, alternative=alternative, ratio=ratio)
            row(d, n1, "effect_size", power)
    out = pd.DataFrame(rows)
    return out if design == "two-group" else out.drop(columns=["n_second", "ratio"])


# ------------------------------------------------------------------------------------------------ from a pilot
def _pilot_design(results: pd.DataFrame) -> str:
    designs = list(pd.unique(results["design"].astype(str)))
    if len(designs) != 1:
        raise DesignError(f"results: one design per plan; the table holds {', '.join(designs)}; select the rows "
                          "of one design first")
    return designs[0]


def plan_from_results(
    results: pd.DataFrame,
    *,
    power: float = 0.8,
    alpha: float = 0.05,
    family_size: int | None = None,
    correction: Correction = "holm",
    safeguard: float = 0.60,
    term: str | None = None,
    alternative: Alternative = "two-sided",
) -> pd.DataFrame:
    """n per region for the next study from a pilot's effect sizes, with the safeguard n.

    Parameters
    ----------
    results : DataFrame
        A ``roikit stats`` results table of a one-sample, paired or two-group design (columns region, design,
        term, n, statistic, effect_size, effect_size_type; two-group also n_first, n_second).
    power : float
        Target power.
    alpha : float
        Family-wise alpha.
    family_size : int, optional
        Regions in the next study's family (default: the regions of the table).
    correction : {"holm", "bonferroni", "none"}
        Correction planned across the family (Holm planned as Bonferroni).
    safeguard : float
        Two-sided confidence level whose lower limit is the safeguard effect size (0.60, the level Perugini,
        Gallucci & Costantini 2014 recommend; that limit is the effect exceeded with 80% confidence).
    term : str, optional
        The term to plan for, when the table has several.
    alternative : {"two-sided", "greater", "less"}

    Returns
    -------
    DataFrame
        One row per region: the contract columns (effect_size is the pilot's observed effect, n the n needed for
        it, power the power that n reaches), then region, term, pilot_n, pilot_effect_size_type, solved_for,
        target_power, n_second (two-group), n_total, safeguard_confidence, safeguard_effect_size, safeguard_n,
        safeguard_n_second (two-group), safeguard_power, alternative, note.

    Notes
    -----
    The pilot's effect size and its noncentral-t interval at the safeguard level come from the t and n of each
    row: one-sample ``d`` and paired ``d_z`` by :func:`roikit.stats.effect_sizes.d_interval`; two-group from the
    pooled t recovered from Hedges' ``g`` (``t = g / (J sqrt(1/n1 + 1/n2))``); the plan uses the bias-corrected
    ``g`` and its J-scaled limit as ``d``. The safeguard effect is the limit nearer zero; when the interval
    includes zero no safeguard n exists (n/a, with a note). Safeguard power: Perugini, Gallucci & Costantini
    (2014, Perspectives on Psychological Science 9, 319-332).
    """
    target = _check_power(power)
    if not 0 < float(safeguard) < 1:
        raise UsageError(f"safeguard: expected a confidence level between 0 and 1 (e.g. 0.60), got {safeguard!r}")
    needed = {"region", "design", "term", "n", "effect_size"}
    missing = sorted(needed - set(results.columns))
    if missing:
        raise DesignError(f"results: {noun(missing, 'column')} {', '.join(missing)} missing; expected a `roikit "
                          "stats` results table")
    design = _pilot_design(results)
    if design not in T_DESIGNS:
        raise DesignError(f"results: design {design!r} has no closed-form plan by effect size; the t designs "
                          f"({', '.join(T_DESIGNS)}) do (precision-weighted: simulate_precision_weighted; mixed: "
                          "crossed_power)")
    rows = results
    terms = list(pd.unique(rows["term"].astype(str)))
    if term is not None:
        rows = rows[rows["term"].astype(str) == str(term)]
        if rows.empty:
            raise DesignError(f"term {term!r} not in the results; available: {', '.join(terms)}")
    elif len(terms) > 1:
        raise UsageError(f"results hold several terms ({', '.join(terms)}); choose one with term= (--term)")
    rows = rows.reset_index(drop=True)
    K = int(family_size) if family_size is not None else len(rows)
    corr = correction if K > 1 else "none"
    a_test = alpha_per_test(alpha, family_size=K, correction=corr)
    es = rows["effect_size"].to_numpy(float)
    n_pilot = rows["n"].to_numpy(float)
    if design == "two-group":
        if not {"n_first", "n_second"} <= set(rows.columns):
            raise DesignError("results: two-group rows need n_first and n_second (written by roikit stats)")
        n1 = rows["n_first"].to_numpy(float)
        n2 = rows["n_second"].to_numpy(float)
        j = hedges_j(n1 + n2 - 2)
        scale = np.sqrt(1 / n1 + 1 / n2)
        t_pooled = es / (j * scale)
        lo, hi = nct_ncp_interval(t_pooled, n1 + n2 - 2, float(safeguard))
        lo, hi = j * lo * scale, j * hi * scale
    else:
        _, lo, hi = d_interval(es * np.sqrt(n_pilot), n_pilot, float(safeguard))
    out = []
    for i, region in enumerate(rows["region"].astype(str)):
        d = es[i]
        ratio = float(rows["n_second"].iat[i] / rows["n_first"].iat[i]) if design == "two-group" else 1.0
        ratio = 1.0 if not (math.isfinite(ratio) and ratio > 0) else ratio
        safe = lo[i] if d > 0 else hi[i]
        note = []
        rec = {"design": design, "effect_size": d, "effect_size_type": EFFECT_SIZE_TYPES[design], "n": None,
               "power": np.nan, "alpha": float(alpha), "alpha_per_test": a_test, "family_size": K,
               "correction": corr, "region": region, "term": str(rows["term"].iat[i]), "pilot_n": int(n_pilot[i]),
               "pilot_effect_size_type": str(rows["effect_size_type"].iat[i]) if "effect_size_type" in rows else None,
               "solved_for": "n", "target_power": target, "n_second": None, "n_total": None,
               "safeguard_confidence": float(safeguard), "safeguard_effect_size": safe, "safeguard_n": None,
               "safeguard_n_second": None, "safeguard_power": np.nan, "alternative": alternative}
        wrong_way = (alternative == "greater" and d < 0) or (alternative == "less" and d > 0)
        if not math.isfinite(d) or d == 0:
            note.append("no effect size in the pilot")
        elif wrong_way:
            note.append(f"the pilot's effect points away from the alternative ({alternative}): no n")
        else:
            n_need = solve_n(d, target, design=design, alpha=a_test, alternative=alternative, ratio=ratio)
            df, ncp, n2 = _df_ncp(d, n_need, design, None, ratio)
            rec["n"] = n_need
            rec["power"] = float(_power_from(df, ncp, a_test, alternative)[0])
            rec["n_second"] = int(n2) if n2 is not None else None
            rec["n_total"] = n_need + (rec["n_second"] or 0)
            if not math.isfinite(safe) or np.sign(safe) != np.sign(d) or safe == 0:
                note.append(f"the {safeguard:.0%} interval of the effect includes zero: no safeguard n")
                rec["safeguard_effect_size"] = safe if math.isfinite(safe) else np.nan
            else:
                n_safe = solve_n(safe, target, design=design, alpha=a_test, alternative=alternative, ratio=ratio)
                df, ncp, n2 = _df_ncp(safe, n_safe, design, None, ratio)
                rec["safeguard_n"] = n_safe
                rec["safeguard_n_second"] = int(n2) if n2 is not None else None
                rec["safeguard_power"] = float(_power_from(df, ncp, a_test, alternative)[0])
        rec["note"] = "; ".join(note) if note else None
        out.append(rec)
    table = pd.DataFrame(out)
    for name in ("n", "n_second", "n_total", "safeguard_n", "safeguard_n_second"):
        table[name] = table[name].astype("Int64")  # whole numbers, n/a where no n exists
    return table if design == "two-group" else table.drop(columns=["n_second", "safeguard_n_second"])


def sensitivity(results: pd.DataFrame, *, power: float = 0.8, alpha: float = 0.05) -> pd.DataFrame:
    """The smallest effect each analysis of a results table could detect, at its corrected alpha.

    Parameters
    ----------
    results : DataFrame
        A ``roikit stats`` results table (one or several analyses); rows of the one-sample, paired and two-group
        designs are used, others are left out.
    power : float
        Power the effect is detected with (0.8: "80% power").
    alpha : float
        Family-wise alpha of the analysis.

    Returns
    -------
    DataFrame
        One row per design x term (x contrast when present): design, term, contrast, effect_size (the smallest
        detectable), effect_size_type, n (the smallest n over the regions; two-group: first group), n_second
        (two-group), power, alpha, alpha_per_test, family_size, correction (the primary one: the first of the
        results' ``correction``), solved_for (``effect_size``).

    Notes
    -----
    The alpha per test is ``alpha / family_size`` for any correction (Holm, Bonferroni, Benjamini-Hochberg,
    permutation family-wise): the threshold each applies to the smallest p-value of the family, so the effect is the
    one the best-placed region could detect; ``alpha`` when the family was not corrected. The smallest n over the
    regions makes the statement hold for every region.
    """
    if results.empty or "design" not in results:
        return pd.DataFrame()
    rows = results[results["design"].astype(str).isin(T_DESIGNS)]
    keys = [c for c in ("design", "term", "contrast") if c in rows.columns]
    out = []
    for key, part in rows.groupby(keys, sort=False, dropna=False):
        key = dict(zip(keys, key if isinstance(key, tuple) else (key,)))
        design = str(key["design"])
        family = pd.to_numeric(part.get("family_size", pd.Series([len(part)])), errors="coerce").max()
        family = int(family) if np.isfinite(family) and family >= 1 else len(part)
        methods = [m.strip() for m in str(part["correction"].iat[0]).split(",")] if "correction" in part else []
        primary = methods[0] if methods and methods[0] not in ("", "nan") else "none"
        a_test = alpha / family if (primary != "none" and family > 1) else alpha
        if design == "two-group" and {"n_first", "n_second"} <= set(part.columns):
            n1 = int(pd.to_numeric(part["n_first"], errors="coerce").min())
            n2 = int(pd.to_numeric(part["n_second"], errors="coerce").min())
        else:
            n1 = int(pd.to_numeric(part["n"], errors="coerce").min())
            n2 = n1 if design == "two-group" else None
            if design == "two-group":  # only the total is known: equal halves
                n1 = n2 = n1 // 2
        if n1 < 2 or (n2 is not None and n2 < 2):
            continue
        d = detectable_effect(n1, power, design=design, alpha=a_test, n_second=n2)
        out.append({**key, "effect_size": d, "effect_size_type": EFFECT_SIZE_TYPES[design], "n": n1,
                    "n_second": n2, "power": float(power), "alpha": float(alpha), "alpha_per_test": a_test,
                    "family_size": family, "correction": primary if family > 1 else "none",
                    "solved_for": "effect_size"})
    return pd.DataFrame(out)


# ------------------------------------------------------------------------------------------------ simulation helpers
def _rng(seed: Seed) -> tuple[object, np.random.Generator]:
    from ._common import resolve_seed

    return resolve_seed(seed)


def _progress(total: int, desc: str, progress: bool | None):
    from tqdm.auto import tqdm

    show = sys.stderr.isatty() if progress is None else bool(progress)
    return tqdm(total=total, desc=desc, unit="sim", leave=False, disable=not show)


def _check_simulations(simulations) -> int:
    if isinstance(simulations, bool) or not isinstance(simulations, (int, np.integer)) or simulations < 10:
        raise UsageError(f"simulations: expected a whole number of at least 10 (e.g. 2000), got {simulations!r}")
    return int(simulations)


# ------------------------------------------------------------------------------------------------ precision-weighted
def simulate_precision_weighted(
    mean: float,
    *,
    tau2: float,
    variances: Sequence[float],
    n: int | Sequence[int],
    alpha: float = 0.05,
    family_size: int = 1,
    correction: Correction = "holm",
    simulations: int = 2000,
    seed: Seed = None,
    tau2_method: str = "reml",
    test: Literal["knapp-hartung-truncated", "knapp-hartung", "z"] = "knapp-hartung-truncated",
    chunk: int = 1000,
    progress: bool | None = None,
) -> pd.DataFrame:
    """Power of the precision-weighted one-sample test by seeded simulation, for each n.

    Parameters
    ----------
    mean : float
        Population mean of the region value assumed (the pilot's estimate, in the values' units).
    tau2 : float
        Between-participant variance (the pilot's tau2).
    variances : sequence of float
        First-level sampling variances to draw from (with replacement): the pilot's distribution of them.
    n : int or sequence of int
        Participants per simulated study.
    alpha, family_size, correction
        As in :func:`plan_t`; the test is two-sided at :func:`alpha_per_test`.
    simulations : int
        Simulated studies per n.
    seed : int, numpy Generator or None
        Seed (recorded in the ``seed`` column; drawn and recorded when None).
    tau2_method, test
        Passed to :func:`roikit.stats.precision.fit_precision_weighted`; the default test is the precision-weighted
        design's default (Knapp-Hartung with its scaling factor truncated below at 1), so the plan simulates the
        test that will be run.
    chunk : int
        Simulated studies fitted at once (one column each).
    progress : bool or None
        Progress bar on stderr (None: only when stderr is a terminal).

    Returns
    -------
    DataFrame
        One row per n: design (``precision-weighted``), effect_size (``d_total = mean / sqrt(tau2 + mean v)``),
        effect_size_type, n, power (share of simulated studies with p < alpha_per_test), alpha, alpha_per_test,
        family_size, correction, then solved_for (``power``), method (``simulation``), mc_se
        (``sqrt(power (1 - power) / simulations)``), simulations, seed, mean, tau2, mean_variance,
        power_t_approx (exact one-sample t power at ``d_total``, for comparison), null_rejection (share of the
        same simulated studies, with the mean set to 0, that reject: the test's actual size, to compare with
        alpha_per_test) and null_rejection_mc_se.

    Notes
    -----
    Each simulated participant draws a first-level variance ``v_i`` from ``variances`` and a value
    ``y_i ~ N(mean, tau2 + v_i)``; every study is fitted by the kit's own estimator (REML tau2, Knapp-Hartung t
    on n - 1 df by default), all studies of a chunk at once. With equal variances the test is the one-sample t
    test, so the simulated power must match :func:`t_power` within Monte Carlo error (checked in the tests).
    """
    from .precision import fit_precision_weighted

    v_pool = np.asarray(variances, dtype=float)
    v_pool = v_pool[np.isfinite(v_pool)]
    if v_pool.size == 0 or np.any(v_pool <= 0):
        raise UsageError("variances: expected positive first-level variances (the pilot's `variance` column)")
    if not (math.isfinite(float(tau2)) and float(tau2) >= 0):
        raise UsageError(f"tau2: expected a between-participant variance >= 0, got {tau2!r}")
    ns = _as_list(n, "n", int)
    if not ns or min(ns) < 3:
        raise UsageError(f"n: expected participant counts of at least 3, got {n!r}")
    sims = _check_simulations(simulations)
    recorded, rng = _rng(seed)
    corr = correction if family_size > 1 else "none"
    a_test = alpha_per_test(alpha, family_size=family_size, correction=corr)
    v_mean = float(v_pool.mean())
    d_total = float(mean) / math.sqrt(float(tau2) + v_mean)
    rows = []
    bar = _progress(sims * len(ns), "precision-weighted power", progress)
    try:
        for n1 in ns:
            hits = null_hits = 0
            done = 0
            while done < sims:
                m = min(chunk, sims - done)
                v = rng.choice(v_pool, size=(n1, m), replace=True)
                noise = rng.standard_normal((n1, m)) * np.sqrt(float(tau2) + v)
                # the same draws with the mean at 0 and at the assumed value: the test's size and its power
                both = np.concatenate([noise, float(mean) + noise], axis=1)
                fit = fit_precision_weighted(both, np.concatenate([v, v], axis=1), tau2_method=tau2_method,
                                             test=test)
                reject = fit["p"][:, 0] < a_test
                null_hits += int(np.sum(reject[:m]))
                hits += int(np.sum(reject[m:]))
                done += m
                bar.update(m)
            pw = hits / sims
            size = null_hits / sims
            rows.append({
                "design": "precision-weighted", "effect_size": d_total, "effect_size_type": "d_total", "n": n1,
                "power": pw, "alpha": float(alpha), "alpha_per_test": a_test, "family_size": int(family_size),
                "correction": corr, "solved_for": "power", "method": "simulation",
                "mc_se": math.sqrt(pw * (1 - pw) / sims), "simulations": sims, "seed": recorded,
                "mean": float(mean), "tau2": float(tau2), "mean_variance": v_mean,
                "power_t_approx": float(t_power(d_total, n1, design="one-sample", alpha=a_test)),
                "null_rejection": size, "null_rejection_mc_se": math.sqrt(size * (1 - size) / sims),
            })
    finally:
        bar.close()
    return pd.DataFrame(rows)


# ------------------------------------------------------------------------------------------------ crossed design
def _check_layout(layout: str) -> str:
    if layout not in LAYOUTS:
        raise UsageError(f"layout: found {layout!r}, expected one of {', '.join(LAYOUTS)}")
    return layout


def crossed_variance(
    *,
    layout: Layout,
    participants: int | np.ndarray,
    stimuli: int | np.ndarray,
    var_participant: float = 0.0,
    var_stimulus: float = 0.0,
    var_participant_slope: float = 0.0,
    var_stimulus_slope: float = 0.0,
    var_residual: float = 1.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Sampling variance of the condition difference and its Satterthwaite df in a balanced crossed design.

    Parameters
    ----------
    layout : {"fully-crossed", "stimuli-within-condition", "participants-within-condition", "both-within-condition"}
        Which factor the two conditions vary within (Westfall, Kenny & Judd 2014): *fully crossed* -- every
        participant sees every stimulus in both conditions; *stimuli within condition* -- every participant sees
        every stimulus, each stimulus belongs to one condition (e.g. novel vs familiar towns); *participants
        within condition* -- each participant is in one condition (a group), every participant sees every
        stimulus; *both within condition* -- each participant sees only the stimuli of their condition.
    participants, stimuli : int or array
        Participants p and stimuli q in all (balanced: p/2 or q/2 per condition where nested).
    var_participant, var_stimulus : float
        Random intercept variances of participants and stimuli.
    var_participant_slope, var_stimulus_slope : float
        Variances of the participant-by-condition and stimulus-by-condition random slopes (condition coded
        -1/2, +1/2, so the slope is the participant's or stimulus's own condition difference).
    var_residual : float
        Residual variance: participant-by-stimulus interaction plus error, one observation per pair (fully
        crossed: the error of one participant x stimulus x condition cell; a participant-by-stimulus
        interaction that is the same in both conditions cancels from the difference).

    Returns
    -------
    (variance, df) : tuple of ndarray
        ``Var(b)`` of the estimated condition difference ``b`` and the Satterthwaite df of its test.

    Notes
    -----
    With ``w`` the residual variance, ``P' = var_participant + var_participant_slope / 4`` and
    ``S' = var_stimulus + var_stimulus_slope / 4`` (a nested factor's intercept and slope cannot be told
    apart), the estimated difference of condition means has

    - fully crossed: ``Var = sP/p + sS/q + 2w/(pq)`` (slopes sP, sS), from the P x S table of differences;
      mean squares P (p-1 df), S (q-1), P x S ((p-1)(q-1));
    - stimuli within condition: ``Var = sP/p + 4S'/q + 4w/(pq)``; mean squares P x C (p-1), S(C) (q-2),
      P x S(C) ((p-1)(q-2));
    - participants within condition: ``Var = 4P'/p + sS/q + 4w/(pq)``; mean squares S x C (q-1), P(C) (p-2),
      S x P(C) ((q-1)(p-2));
    - both within condition: ``Var = 4P'/p + 4S'/q + 8w/(pq)``; mean squares P(C) (p-2), S(C) (q-2), P x S(C)
      (p-2)(q-2)/2).

    In each case ``Var = c (E[MS_a] + E[MS_b] - E[MS_ab])``, the quasi-F denominator, and the df are
    Satterthwaite's (1946) for that combination of mean squares at their expected values. A source whose own
    variance is zero is taken as absent from the analysis model: its mean square pools with the error, the test
    becomes an exact F on the other source (e.g. participants within condition without a stimulus-by-condition
    variance is the two-sample t on participant means, df p - 2). This is the balanced
    -design approach of Westfall, Kenny & Judd (2014, J Exp Psychol Gen 143, 2020-2045; the noncentrality
    ``delta = b / sqrt(Var)`` and the df of their designs, pp. 2024-2027 from memory); the expressions here were
    derived afresh from the expected mean squares and are checked in the tests against the two-sample t
    (stimulus variances zero) and against a seeded simulation through the kit's mixed-model fitter.
    """
    layout = _check_layout(layout)
    p = np.asarray(participants, dtype=float)
    q = np.asarray(stimuli, dtype=float)
    comps = dict(var_participant=var_participant, var_stimulus=var_stimulus,
                 var_participant_slope=var_participant_slope, var_stimulus_slope=var_stimulus_slope,
                 var_residual=var_residual)
    for name, value in comps.items():
        if not (math.isfinite(float(value)) and float(value) >= 0):
            raise UsageError(f"{name}: expected a variance >= 0, got {value!r}")
    if float(var_residual) <= 0:
        raise UsageError(f"var_residual: expected a residual variance > 0, got {var_residual!r}")
    w = float(var_residual)
    sp, ss = float(var_participant_slope), float(var_stimulus_slope)
    P_ = float(var_participant) + sp / 4
    S_ = float(var_stimulus) + ss / 4
    nested_p = layout in ("participants-within-condition", "both-within-condition")
    nested_s = layout in ("stimuli-within-condition", "both-within-condition")
    even = "an even number of at least 4 (half per condition)"
    if np.any(p < (4 if nested_p else 2)) or (nested_p and np.any(p % 2)):
        raise UsageError(f"participants: expected {even if nested_p else 'at least 2'} for layout {layout!r}, "
                         f"got {participants!r}")
    if np.any(q < (4 if nested_s else 2)) or (nested_s and np.any(q % 2)):
        raise UsageError(f"stimuli: expected {even if nested_s else 'at least 2'} for layout {layout!r}, "
                         f"got {stimuli!r}")
    if layout == "fully-crossed":
        # differences D_ij = y_ij1 - y_ij2: a P x S table with row variance sp, column variance ss, error 2w
        ea, da = 2 * w + q * sp, p - 1
        eb, db = 2 * w + p * ss, q - 1
        ec, dc = 2 * w, (p - 1) * (q - 1)
        c = 1 / (p * q)
    elif layout == "stimuli-within-condition":
        ea, da = w + q * sp / 4, p - 1            # P x C
        eb, db = w + p * S_, q - 2                # S(C)
        ec, dc = w, (p - 1) * (q - 2)             # P x S(C)
        c = 4 / (p * q)
    elif layout == "participants-within-condition":
        ea, da = w + p * ss / 4, q - 1            # S x C
        eb, db = w + q * P_, p - 2                # P(C)
        ec, dc = w, (q - 1) * (p - 2)             # S x P(C)
        c = 4 / (p * q)
    else:  # both within condition: two independent P x S blocks of p/2 x q/2
        ea, da = w + q * P_ / 2, p - 2            # P(C)
        eb, db = w + p * S_ / 2, q - 2            # S(C)
        ec, dc = w, (p - 2) * (q - 2) / 2         # P x S(C)
        c = 8 / (p * q)
    has_a = {"fully-crossed": sp, "stimuli-within-condition": sp, "participants-within-condition": ss,
             "both-within-condition": P_}[layout] > 0
    has_b = {"fully-crossed": ss, "stimuli-within-condition": S_, "participants-within-condition": P_,
             "both-within-condition": S_}[layout] > 0
    if has_a and has_b:  # quasi-F: both random sources count, Satterthwaite df
        var = c * (ea + eb - ec)
        df = (ea + eb - ec) ** 2 / (ea**2 / da + eb**2 / db + ec**2 / dc)
    elif has_a:  # the other source has no variance (not in the model): its mean square pools with the error
        var, df = c * ea, da
    elif has_b:
        var, df = c * eb, db
    else:
        var, df = c * ec, da + db + dc
    return np.broadcast_to(var, np.broadcast(p, q).shape) * 1.0, np.broadcast_to(df, np.broadcast(p, q).shape) * 1.0


def crossed_power(
    effect: float,
    *,
    layout: Layout,
    participants: int | Sequence[int],
    stimuli: int | Sequence[int],
    var_participant: float = 0.0,
    var_stimulus: float = 0.0,
    var_participant_slope: float = 0.0,
    var_stimulus_slope: float = 0.0,
    var_residual: float = 1.0,
    alpha: float = 0.05,
    family_size: int = 1,
    correction: Correction = "holm",
    simulations: int = 0,
    seed: Seed = None,
    progress: bool | None = None,
) -> pd.DataFrame:
    """Power of the condition effect in a balanced participants x stimuli design, on a grid of both counts.

    Parameters
    ----------
    effect : float
        Condition difference assumed (raw units of the values; e.g. the pilot's estimate).
    layout, var_participant, var_stimulus, var_participant_slope, var_stimulus_slope, var_residual
        See :func:`crossed_variance`.
    participants, stimuli : int or sequence of int
        The grid (every participants count with every stimuli count).
    alpha, family_size, correction
        As in :func:`plan_t`; two-sided test at :func:`alpha_per_test`.
    simulations : int
        When above 0, simulate that many balanced studies per grid point and test each by the quasi-F (mean
        squares of the study, Satterthwaite df from them), all studies at once: ``power`` is then the share of
        studies that reject (method ``simulation``, with mc_se, simulations, seed) and ``power_exact_balanced``
        keeps the approximation. Recommended for small designs (see Notes).
    seed : int, numpy Generator or None
        Seed of the simulation (recorded; drawn and recorded when None).
    progress : bool or None
        Progress bar over the grid on stderr (None: only on a terminal).

    Returns
    -------
    DataFrame
        One row per participants x stimuli: design (``crossed``), effect_size (``d`` = effect over the SD of
        one observation within a condition), effect_size_type, n (participants), power, alpha, alpha_per_test,
        family_size, correction, then solved_for, method (``exact-balanced``, or ``simulation``), n_participants,
        n_stimuli, layout, effect, se, df, ncp, power_limit (the power with unlimited participants at this number of
        stimuli: the limit a finite stimulus sample sets however many participants take part; at finite n the
        participants' mean square still adds degrees of freedom, so power can approach the limit from above),
        mc_se (n/a without simulations); with
        ``simulations``: power_exact_balanced, simulations, seed.

    Notes
    -----
    ``delta = effect / sqrt(Var)``, power ``P(|T| > t_{1-alpha/2}(df))`` with ``T ~ t'(df, delta)``; ``Var`` and
    ``df`` from :func:`crossed_variance`. With unlimited participants ``Var -> (stimulus terms) / q`` and the df
    tend to the stimulus df, so power stays below 1 whenever the stimulus (or stimulus-by-condition) variance
    that does not cancel is above zero (Westfall, Kenny & Judd 2014).

    The noncentral t with Satterthwaite df taken at the *expected* mean squares is an approximation to the power
    of the quasi-F test, good when both sources have several df and optimistic when one has few: with 20,000
    simulated studies it overstated the quasi-F's power by 0.004 with 16 participants and 8 stimuli (participants
    within condition; 0.536 against 0.532), by 0.02 with 12 and 8 (0.439 against 0.418), and by 0.07 with 10
    participants and 4 stimuli (stimuli within condition, 2 df for stimuli; 0.093 against 0.019, 2,000
    studies). With ``simulations`` the table reports the simulated power and keeps the approximation beside it.

    The simulated test is the balanced-design quasi-F, which treats a stimulus's intercept and its condition
    slope as uncorrelated. A REML fit with an unstructured intercept-slope covariance (:func:`simulate_crossed`)
    reached the same decision in 196 of 200 simulated studies (12 participants x 8 stimuli, participants within
    condition) and had less power over 700 studies (0.363, MC SE 0.018, against 0.418 for the quasi-F): the
    price of estimating the correlation. The kit's ``mixed`` design gives a crossed factor a random intercept only
    (``--crossed``), so where a stimulus-by-condition variance matters (fully crossed and participants-within
    layouts) its model leaves it out and overstates the evidence; plan with the variance to see what a model
    that includes it needs.

    Examples
    --------
    >>> grid = crossed_power(0.5, layout="stimuli-within-condition", participants=[20, 40], stimuli=[8, 16],
    ...                      var_participant=0.5, var_stimulus=0.1, var_participant_slope=0.1, var_residual=1.0)
    >>> grid[["n_participants", "n_stimuli", "power", "power_limit"]].shape
    (4, 4)
    """
    layout = _check_layout(layout)
    ps = _as_list(participants, "participants", int)
    qs = _as_list(stimuli, "stimuli", int)
    if not ps or not qs:
        raise UsageError("participants and stimuli: give at least one count of each")
    corr = correction if family_size > 1 else "none"
    a_test = alpha_per_test(alpha, family_size=family_size, correction=corr)
    comps = dict(var_participant=var_participant, var_stimulus=var_stimulus,
                 var_participant_slope=var_participant_slope, var_stimulus_slope=var_stimulus_slope,
                 var_residual=var_residual)
    total = (float(var_participant) + float(var_stimulus) + (float(var_participant_slope)
             + float(var_stimulus_slope)) / 4 + float(var_residual))
    sims = _check_simulations(simulations) if simulations else 0
    recorded, rng = _rng(seed) if sims else (None, None)
    bar = _progress(sims * len(ps) * len(qs), "crossed-design power", progress) if sims else None
    rows = []
    for p in ps:
        for q in qs:
            var, df = crossed_variance(layout=layout, participants=p, stimuli=q, **comps)
            ncp = float(effect) / math.sqrt(float(var))
            pw, _ = _power_from(df, ncp, a_test, "two-sided")
            rows.append({
                "design": "crossed", "effect_size": float(effect) / math.sqrt(total), "effect_size_type": "d",
                "n": p, "power": float(pw), "alpha": float(alpha), "alpha_per_test": a_test,
                "family_size": int(family_size), "correction": corr, "solved_for": "power",
                "method": "exact-balanced", "n_participants": p, "n_stimuli": q, "layout": layout,
                "effect": float(effect), "se": math.sqrt(float(var)), "df": float(df), "ncp": ncp,
                "power_limit": _power_limit(effect, layout, q, a_test, **comps), "mc_se": np.nan,
            })
            if sims:
                hits = _quasi_f_rejections(rng, layout, p, q, float(effect), comps, a_test, sims, bar)
                ps_ = hits / sims
                rows[-1].update({"power": ps_, "method": "simulation", "mc_se": math.sqrt(ps_ * (1 - ps_) / sims),
                                 "power_exact_balanced": float(pw), "simulations": sims, "seed": recorded})
    if bar is not None:
        bar.close()
    return pd.DataFrame(rows)


def _two_way(y):
    """Two-way table with one observation per cell, batched: y (R, a, b) -> MS rows, MS columns, residual SS."""
    _, a, b = y.shape
    grand = y.mean((1, 2), keepdims=True)
    row = y.mean(2, keepdims=True)
    col = y.mean(1, keepdims=True)
    ms_row = b * ((row - grand) ** 2).sum((1, 2)) / (a - 1)
    ms_col = a * ((col - grand) ** 2).sum((1, 2)) / (b - 1)
    ss_res = ((y - row - col + grand) ** 2).sum((1, 2))
    return ms_row, ms_col, ss_res


def _quasi_f_rejections(rng, layout, p, q, effect, comps, alpha, sims, bar, *, cells=2_000_000) -> int:
    """Simulate balanced studies of a layout and count the two-sided quasi-F rejections (all studies at once)."""
    sd = {k: math.sqrt(float(v)) for k, v in comps.items()}
    sp, ss = float(comps["var_participant_slope"]), float(comps["var_stimulus_slope"])
    P_ = float(comps["var_participant"]) + sp / 4
    S_ = float(comps["var_stimulus"]) + ss / 4
    has_a = {"fully-crossed": sp, "stimuli-within-condition": sp, "participants-within-condition": ss,
             "both-within-condition": P_}[layout] > 0
    has_b = {"fully-crossed": ss, "stimuli-within-condition": S_, "participants-within-condition": P_,
             "both-within-condition": S_}[layout] > 0
    hits = done = 0
    step = max(1, cells // (p * q * (2 if layout == "fully-crossed" else 1)))
    while done < sims:
        R = min(step, sims - done)
        z = rng.standard_normal
        u0, u1 = z((R, p, 1)) * sd["var_participant"], z((R, p, 1)) * sd["var_participant_slope"]
        s0, s1 = z((R, 1, q)) * sd["var_stimulus"], z((R, 1, q)) * sd["var_stimulus_slope"]
        if layout == "fully-crossed":
            # differences between the two conditions of each participant x stimulus cell: P, S, P x S cancel
            D = effect + u1 + s1 + z((R, p, q)) * math.sqrt(2.0) * sd["var_residual"]
            b = D.mean((1, 2))
            ma, mb, ss_res = _two_way(D)
            mc, (da, db, dc), c = ss_res / ((p - 1) * (q - 1)), (p - 1, q - 1, (p - 1) * (q - 1)), 1 / (p * q)
        elif layout == "stimuli-within-condition":
            cond = np.where(np.arange(q) < q // 2, -0.5, 0.5)[None, None, :]
            y = effect * cond + u0 + u1 * cond + s0 + s1 * cond + z((R, p, q)) * sd["var_residual"]
            A, B = y[:, :, : q // 2], y[:, :, q // 2:]
            b = B.mean((1, 2)) - A.mean((1, 2))
            Di = B.mean(2) - A.mean(2)
            ma = (q / 4) * ((Di - Di.mean(1, keepdims=True)) ** 2).sum(1) / (p - 1)          # P x C
            ssA, ssB = _two_way(A), _two_way(B)
            mb = (ssA[1] * (q // 2 - 1) + ssB[1] * (q // 2 - 1)) / (q - 2)                # S(C)
            mc = (ssA[2] + ssB[2]) / ((p - 1) * (q - 2))                                  # P x S(C)
            (da, db, dc), c = (p - 1, q - 2, (p - 1) * (q - 2)), 4 / (p * q)
        elif layout == "participants-within-condition":
            cond = np.where(np.arange(p) < p // 2, -0.5, 0.5)[None, :, None]
            y = effect * cond + u0 + u1 * cond + s0 + s1 * cond + z((R, p, q)) * sd["var_residual"]
            A, B = y[:, : p // 2], y[:, p // 2:]
            b = B.mean((1, 2)) - A.mean((1, 2))
            Dj = B.mean(1) - A.mean(1)
            ma = (p / 4) * ((Dj - Dj.mean(1, keepdims=True)) ** 2).sum(1) / (q - 1)          # S x C
            ssA, ssB = _two_way(A), _two_way(B)
            mb = (ssA[0] * (p // 2 - 1) + ssB[0] * (p // 2 - 1)) / (p - 2)                # P(C)
            mc = (ssA[2] + ssB[2]) / ((q - 1) * (p - 2))                                  # S x P(C)
            (da, db, dc), c = (q - 1, p - 2, (q - 1) * (p - 2)), 4 / (p * q)
        else:  # both within condition: two independent blocks of p/2 participants x q/2 stimuli
            h, k = p // 2, q // 2
            blocks = []
            for sign in (-0.5, 0.5):
                blocks.append(effect * sign + z((R, h, 1)) * math.sqrt(P_) + z((R, 1, k)) * math.sqrt(S_)
                              + z((R, h, k)) * sd["var_residual"])
            A, B = blocks
            b = B.mean((1, 2)) - A.mean((1, 2))
            ssA, ssB = _two_way(A), _two_way(B)
            ma = (ssA[0] + ssB[0]) * (h - 1) / (p - 2)                                     # P(C)
            mb = (ssA[1] + ssB[1]) * (k - 1) / (q - 2)                                     # S(C)
            mc = (ssA[2] + ssB[2]) / ((p - 2) * (q - 2) / 2)                               # P x S(C)
            (da, db, dc), c = (p - 2, q - 2, (p - 2) * (q - 2) / 2), 8 / (p * q)
        if has_a and has_b:
            # a negative quasi-F denominator (rare) is replaced by the smaller of the two sources, conservatively
            comb = np.maximum(ma + mb - mc, np.minimum(ma, mb))
            df = comb**2 / (ma**2 / da + mb**2 / db + mc**2 / dc)
        elif has_a:  # the absent source pools with the error, as in crossed_variance
            comb, df = ma, np.full(R, float(da))
        elif has_b:
            comb, df = mb, np.full(R, float(db))
        else:
            comb, df = (ma * da + mb * db + mc * dc) / (da + db + dc), np.full(R, float(da + db + dc))
        t = b / np.sqrt(c * comb)
        hits += int(np.sum(2 * stats.t.sf(np.abs(t), df) < alpha))
        done += R
        if bar is not None:
            bar.update(R)
    return hits


def _power_limit(effect, layout, q, a_test, *, var_participant, var_stimulus, var_participant_slope,
                 var_stimulus_slope, var_residual) -> float:
    """Power with unlimited participants at q stimuli (the limit the stimulus sample sets)."""
    if layout in ("fully-crossed", "participants-within-condition"):
        var, df = float(var_stimulus_slope) / q, q - 1
    else:
        var, df = 4 * (float(var_stimulus) + float(var_stimulus_slope) / 4) / q, q - 2
    if var <= 0:
        return 1.0
    return float(_power_from(df, float(effect) / math.sqrt(var), a_test, "two-sided")[0])


def _crossed_data(rng, layout, p, q, effect, sd):
    """One simulated balanced study: y, condition code (-1/2, +1/2), participant and stimulus codes."""
    if layout == "fully-crossed":
        pid, sid, cond = (a.ravel() for a in np.meshgrid(np.arange(p), np.arange(q), [-0.5, 0.5], indexing="ij"))
    elif layout == "stimuli-within-condition":
        pid, sid = (a.ravel() for a in np.meshgrid(np.arange(p), np.arange(q), indexing="ij"))
        cond = np.where(sid < q // 2, -0.5, 0.5)
    elif layout == "participants-within-condition":
        pid, sid = (a.ravel() for a in np.meshgrid(np.arange(p), np.arange(q), indexing="ij"))
        cond = np.where(pid < p // 2, -0.5, 0.5)
    else:
        half = [np.meshgrid(np.arange(p // 2) + k * (p // 2), np.arange(q // 2) + k * (q // 2), indexing="ij")
                for k in (0, 1)]
        pid = np.concatenate([h[0].ravel() for h in half])
        sid = np.concatenate([h[1].ravel() for h in half])
        cond = np.where(pid < p // 2, -0.5, 0.5)
    u0, u1 = rng.standard_normal(p) * sd[0], rng.standard_normal(p) * sd[2]
    s0, s1 = rng.standard_normal(q) * sd[1], rng.standard_normal(q) * sd[3]
    # one residual per observation (fully crossed: per participant x stimulus x condition cell)
    e = rng.standard_normal(pid.size) * sd[4]
    y = effect * cond + u0[pid] + s0[sid] + (u1[pid] + s1[sid]) * cond + e
    return y, cond, pid, sid


def simulate_crossed(
    effect: float,
    *,
    layout: Layout,
    participants: int,
    stimuli: int,
    var_participant: float = 0.0,
    var_stimulus: float = 0.0,
    var_participant_slope: float = 0.0,
    var_stimulus_slope: float = 0.0,
    var_residual: float = 1.0,
    alpha: float = 0.05,
    simulations: int = 200,
    seed: Seed = None,
    progress: bool | None = None,
) -> dict:
    """Power of the crossed design by seeded simulation through the kit's mixed-model fitter (slow; a check).

    Each simulated study is fitted by :func:`roikit.stats.mixed.fit_mixed` (REML) with the random effects the
    layout can identify (participant intercept, plus the participant slope when condition varies within
    participants; stimulus intercept, plus the stimulus slope when condition varies within stimuli) and the
    condition effect is tested with Satterthwaite df. 0.1-0.2 s per study on the development machine. The slope and
    intercept of a factor get an unstructured covariance (more general than the quasi-F of :func:`crossed_power`).

    Parameters
    ----------
    effect, layout, participants, stimuli, var_*, alpha
        As in :func:`crossed_power` (one grid point).
    simulations : int
    seed : int, numpy Generator or None
    progress : bool or None
        Progress bar on stderr (None: only on a terminal).

    Returns
    -------
    dict
        ``power``, ``mc_se``, ``simulations``, ``failed`` (studies whose fit raised; not counted), ``seed``.
    """
    from .mixed import RandomFactor, fit_mixed, satterthwaite

    layout = _check_layout(layout)
    sims = _check_simulations(simulations)
    recorded, rng = _rng(seed)
    crossed_variance(layout=layout, participants=participants, stimuli=stimuli, var_residual=var_residual)
    sd = np.sqrt([var_participant, var_stimulus, var_participant_slope, var_stimulus_slope, var_residual])
    p_slope = layout in ("fully-crossed", "stimuli-within-condition") and var_participant_slope > 0
    s_slope = layout in ("fully-crossed", "participants-within-condition") and var_stimulus_slope > 0
    hits = failed = 0
    L = np.array([[0.0, 1.0]])
    bar = _progress(sims, "crossed-design power", progress)
    try:
        for _ in range(sims):
            y, cond, pid, sid = _crossed_data(rng, layout, participants, stimuli, float(effect), sd)
            X = np.column_stack([np.ones(y.size), cond])
            one = np.ones((y.size, 1))
            factors = [RandomFactor("participant", pid, np.column_stack([one, cond]) if p_slope else one,
                                    ["Intercept", "condition"] if p_slope else ["Intercept"]),
                       RandomFactor("stimulus", sid, np.column_stack([one, cond]) if s_slope else one,
                                    ["Intercept", "condition"] if s_slope else ["Intercept"])]
            try:
                fit = fit_mixed(y, X, factors)
                df, _ = satterthwaite(fit, X, factors, L)
            except (ConvergenceError, DesignError, ValueError, np.linalg.LinAlgError):  # counted, not hidden
                failed += 1
                bar.update(1)
                continue
            t = fit.beta[1] / math.sqrt(fit.cov_beta[1, 1])
            hits += int(2 * stats.t.sf(abs(t), float(df[0])) < alpha)
            bar.update(1)
    finally:
        bar.close()
    used = sims - failed
    pw = hits / used if used else float("nan")
    return {"power": pw, "mc_se": math.sqrt(pw * (1 - pw) / used) if used else float("nan"),
            "simulations": used, "failed": failed, "seed": recorded}
