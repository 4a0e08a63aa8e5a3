"""Evidence for the absence of an effect: equivalence tests and default Bayes factors.

A p-value above .05 is not evidence of no effect. Two ways to argue for absence are added to the one-sample,
paired and two-group designs (columns added by :func:`add_evidence`, called from ``run_design``):

- **Equivalence** (two one-sided tests, TOST; Schuirmann 1987; Lakens 2017): is the effect inside ``-D..+D``,
  with ``D`` in the design's standardised units (``d``, ``d_z``, ``g``)? The bound is converted to the raw scale
  with the sample's own standardiser (SD, SD of the differences, pooled SD / J), as Lakens (2017) does; each
  one-sided test is a t-test against one bound with the design's df (Welch df for Welch designs);
  ``p_equivalence`` is the larger of the two one-sided p-values. Equivalence is declared when it is below alpha.
- **JZS Bayes factor** (Rouder, Speckman, Sun, Morey & Iverson 2009, eq. 1): ``bf10`` for a Cauchy prior on the
  standardised effect with scale ``r`` (default sqrt(2)/2), computed by numerical integration over ``g`` from the
  t statistic (Student's t for two groups, also when Welch's test was run), with effective sample size ``n`` (one
  sample, paired) or ``n1 n2 / (n1 + n2)`` and ``df = n1 + n2 - 2`` (two groups).

Checked against pingouin's ``bayesfactor_ttest`` and an independent TOST from scipy one-sided t-tests
(tests/stats/test_evidence.py).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import integrate
from scipy import stats as sps

from ..errors import UsageError
from .effect_sizes import hedges_j

__all__ = ["DEFAULT_PRIOR_SCALE", "EVIDENCE_DESIGNS", "jzs_bf10", "tost_p", "add_evidence"]

#: Default Cauchy prior scale of the JZS Bayes factor ("medium", sqrt(2)/2).
DEFAULT_PRIOR_SCALE = float(np.sqrt(2) / 2)

#: Designs that take ``equivalence`` and ``bayes_factor``.
EVIDENCE_DESIGNS = ("one-sample", "paired", "two-group")


def jzs_bf10(t: float, n_eff: float, df: float, r: float = DEFAULT_PRIOR_SCALE) -> float:
    """JZS Bayes factor BF10 from a t statistic (Rouder et al. 2009, eq. 1, with prior scale ``r``).

    ``BF10 = int_0^inf (1 + N g r^2)^(-1/2) (1 + t^2 / ((1 + N g r^2) v))^(-(v+1)/2)
    (2 pi)^(-1/2) g^(-3/2) exp(-1 / (2 g)) dg / (1 + t^2 / v)^(-(v+1)/2)``, ``N`` the effective sample size and
    ``v`` the df. The integral is taken over ``log g`` for numerical stability.
    """
    if not (np.isfinite(t) and n_eff > 0 and df > 0):
        return float("nan")
    v = float(df)
    log_null = -(v + 1) / 2 * np.log1p(t * t / v)

    def integrand(log_g: float) -> float:
        g = np.exp(log_g)
        a = 1 + n_eff * g * r * r
        log_f = (-0.5 * np.log(a) - (v + 1) / 2 * np.log1p(t * t / (a * v)) - 0.5 * np.log(2 * np.pi)
                 - 1.5 * log_g - 1 / (2 * g) + log_g)            # + log_g: dg = g dlog_g
        return np.exp(log_f - log_null)

    value, _ = integrate.quad(integrand, -30, 30, limit=200, epsabs=0, epsrel=1e-10)
    return float(value)


def tost_p(t: np.ndarray, shift: np.ndarray, df: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Two one-sided tests from a t statistic and the bound in t units (``shift = D_raw / SE``).

    Returns (p for "effect > -D", p for "effect < +D", their maximum).
    """
    t, shift, df = (np.asarray(x, dtype=float) for x in (t, shift, df))
    p_low = sps.t.sf(t + shift, df)
    p_high = sps.t.cdf(t - shift, df)
    return p_low, p_high, np.fmax(p_low, p_high)


def _check(design: str, equivalence, bayes_factor, prior_scale) -> tuple[float | None, bool, float]:
    if design not in EVIDENCE_DESIGNS:
        given = [n for n, v in (("equivalence", equivalence), ("bayes_factor", bayes_factor)) if v]
        raise UsageError(
            f"{' and '.join(given)} apply to {', '.join(EVIDENCE_DESIGNS)} only, not to design {design!r}"
        )
    if equivalence is not None:
        if isinstance(equivalence, bool) or not isinstance(equivalence, (int, float, np.floating, np.integer)) \
                or not np.isfinite(equivalence) or equivalence <= 0:
            raise UsageError(f"equivalence must be a positive number (a bound in standardised units, e.g. 0.3), "
                             f"got {equivalence!r}")
        equivalence = float(equivalence)
    if prior_scale is None:
        prior_scale = DEFAULT_PRIOR_SCALE
    elif not bayes_factor:
        raise UsageError("prior_scale applies to the Bayes factor; add bayes_factor=True (--bayes-factor)")
    if isinstance(prior_scale, bool) or not isinstance(prior_scale, (int, float, np.floating, np.integer)) \
            or not np.isfinite(prior_scale) or prior_scale <= 0:
        raise UsageError(f"prior_scale must be a positive number (e.g. 0.707), got {prior_scale!r}")
    return equivalence, bool(bayes_factor), float(prior_scale)


def add_evidence(
    results: pd.DataFrame,
    *,
    design: str,
    equivalence: float | None = None,
    bayes_factor: bool = False,
    prior_scale: float | None = None,
) -> pd.DataFrame:
    """Add ``p_equivalence``/``equivalence_bound`` and ``bf10``/``prior_scale`` to a design's result rows.

    Uses only the rows' own columns: ``statistic`` (t), ``se``, ``df``, ``n`` and, for two groups, ``n_first``,
    ``n_second``, ``estimate`` and ``sd_pooled`` (Student's pooled SD, which the two-group rows carry).
    """
    equivalence, bayes_factor, prior_scale = _check(design, equivalence, bayes_factor, prior_scale)
    if equivalence is None and not bayes_factor:
        return results
    out = results.copy()
    t = out["statistic"].to_numpy(float)
    df = out["df"].to_numpy(float)
    se = out["se"].to_numpy(float)
    if design == "two-group":
        n1 = out["n_first"].to_numpy(float)
        n2 = out["n_second"].to_numpy(float)
        sd_pooled = out["sd_pooled"].to_numpy(float)
        df_pooled = n1 + n2 - 2
        j = hedges_j(df_pooled)
        standardiser = sd_pooled / j            # g = J (M1 - M2) / S  =>  g = D  <=>  M1 - M2 = D S / J
        t_student = out["estimate"].to_numpy(float) / (sd_pooled * np.sqrt(1 / n1 + 1 / n2))
        n_eff = n1 * n2 / (n1 + n2)
    else:
        n = out["n"].to_numpy(float)
        standardiser = se * np.sqrt(n)         # the SD (of the differences, for paired)
        t_student = t
        n_eff = n
        df_pooled = n - 1
    if equivalence is not None:
        _, _, p_eq = tost_p(t, equivalence * standardiser / se, df)
        out["p_equivalence"] = p_eq
        out["equivalence_bound"] = equivalence
    if bayes_factor:
        out["bf10"] = [jzs_bf10(a, b, c, prior_scale) for a, b, c in zip(t_student, n_eff, df_pooled)]
        out["prior_scale"] = prior_scale
    return out
