"""Standardised effect sizes and their confidence intervals, vectorised across regions.

- ``d`` (one-sample) = mean / SD; ``d_z`` (paired) = mean(diff) / SD(diff); interval by inverting the noncentral t
  distribution of t = d sqrt(n) (Steiger & Fouladi 1997).
- ``g`` (two groups) = J(df) (M1 - M2) / S_pooled with the exact small-sample factor
  J(df) = Gamma(df/2) / (sqrt(df/2) Gamma((df - 1)/2)), df = n1 + n2 - 2 (Hedges 1981); interval from the
  noncentral t of the pooled t with ncp = d / sqrt(1/n1 + 1/n2), scaled by J.
- ``partial_eta2`` = F df1 / (F df1 + df2); interval by inverting the noncentral F distribution in its
  noncentrality lambda and converting with eta2 = lambda / (lambda + df1 + df2 + 1) (Steiger 2004).

The inversions run on all regions at once: an adaptive bracket (doubling outwards until the target is crossed)
followed by vectorised bisection refined by the secant method. scipy's noncentral t cdf returns NaN far in the tails;
there the normal approximation of Abramowitz & Stegun (1964, 26.7.10) stands in, which is accurate to far better than
the bracket needs and never influences a limit where the exact cdf is finite.
"""

from __future__ import annotations

import numpy as np
from scipy import special, stats

__all__ = [
    "hedges_j",
    "nct_ncp_interval",
    "ncf_lambda_interval",
    "d_interval",
    "g_interval",
    "partial_eta2",
    "partial_eta2_interval",
]


def hedges_j(df: np.ndarray | float) -> np.ndarray:
    """Exact small-sample correction J(df) = Gamma(df/2) / (sqrt(df/2) Gamma((df - 1)/2)) (Hedges 1981)."""
    df = np.asarray(df, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.exp(special.gammaln(df / 2) - 0.5 * np.log(df / 2) - special.gammaln((df - 1) / 2))


def _nct_cdf(t: np.ndarray, df: np.ndarray, ncp: np.ndarray) -> np.ndarray:
    """Noncentral t cdf with a normal-approximation stand-in where scipy returns NaN (far tails)."""
    with np.errstate(all="ignore"):
        out = stats.nct.cdf(t, df, ncp)
    bad = ~np.isfinite(out)
    if np.any(bad):
        tb, dfb, nb = (np.broadcast_to(a, out.shape)[bad] for a in (t, df, ncp))
        # Abramowitz & Stegun (1964) 26.7.10
        z = (tb * (1 - 1 / (4 * dfb)) - nb) / np.sqrt(1 + tb**2 / (2 * dfb))
        out = out.copy()
        out[bad] = stats.norm.cdf(z)
    return out


def _invert_decreasing(cdf, x, target, start_lo, start_hi, *, floor=None, xtol=1e-10, maxiter=200):
    """Solve cdf(x, theta) = target for theta, cdf decreasing in theta, elementwise.

    Brackets adaptively (the interval grows outwards geometrically until the target is crossed), then bisects
    with a secant step inside the bracket (regula falsi with the Illinois modification).
    """
    target = np.asarray(target, dtype=float)
    lo = np.array(start_lo, dtype=float, copy=True)
    hi = np.array(start_hi, dtype=float, copy=True)
    lo, hi, target, x = np.broadcast_arrays(lo, hi, target, x)
    lo, hi, target = lo.copy(), hi.copy(), target.copy()
    # cdf(lo) must be >= target and cdf(hi) <= target (decreasing in theta)
    f_lo = cdf(x, lo) - target
    step = np.maximum(1e-3, np.abs(hi - lo))
    for _ in range(200):
        need = f_lo < 0
        if floor is not None:
            need &= lo > floor
        if not need.any():
            break
        lo[need] = lo[need] - step[need]
        if floor is not None:
            lo = np.maximum(lo, floor)
        step[need] *= 2
        f_lo[need] = cdf(x[need], lo[need]) - target[need]
    f_hi = cdf(x, hi) - target
    step = np.maximum(1e-3, np.abs(hi - lo))
    for _ in range(200):
        need = f_hi > 0
        if not need.any():
            break
        hi[need] = hi[need] + step[need]
        step[need] *= 2
        f_hi[need] = cdf(x[need], hi[need]) - target[need]
    root = np.where(f_lo <= 0, lo, np.nan)  # only possible at the floor: target not reachable -> floor
    active = (f_lo > 0) & (f_hi < 0)
    root = np.where(f_lo == 0, lo, root)
    root = np.where(f_hi == 0, hi, root)
    side = np.zeros(lo.shape)
    for _ in range(maxiter):
        if not active.any():
            break
        a, b, fa, fb = lo[active], hi[active], f_lo[active], f_hi[active]
        # Illinois regula falsi, with a bisection fallback every other stalled step
        m = b - fb * (b - a) / (fb - fa)
        m = np.where(np.isfinite(m) & (m > a) & (m < b), m, 0.5 * (a + b))
        fm = cdf(x[active], m) - target[active]
        s = side[active]
        left = fm > 0  # root is above m
        a_new = np.where(left, m, a)
        fa_new = np.where(left, fm, np.where(s == -1, fa / 2, fa))
        b_new = np.where(left, b, m)
        fb_new = np.where(left, np.where(s == 1, fb / 2, fb), fm)
        s_new = np.where(left, 1.0, -1.0)
        idx = np.flatnonzero(active)
        lo[idx], hi[idx], f_lo[idx], f_hi[idx], side[idx] = a_new, b_new, fa_new, fb_new, s_new
        done = (np.abs(b_new - a_new) <= xtol * (1 + np.abs(m))) | (fm == 0)
        root[idx[done]] = np.where(fm[done] == 0, m[done], 0.5 * (a_new[done] + b_new[done]))
        active[idx[done]] = False
    if active.any():
        root[active] = 0.5 * (lo[active] + hi[active])
    return root


def nct_ncp_interval(t, df, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Confidence limits of the noncentrality parameter of a noncentral t, given the observed t.

    Lower limit: ncp with P(T <= t | ncp) = 1 - alpha/2; upper: P(T <= t | ncp) = alpha/2 (Steiger & Fouladi 1997).
    NaN where t or df is not finite.
    """
    t, df = np.broadcast_arrays(np.asarray(t, dtype=float), np.asarray(df, dtype=float))
    alpha = 1 - confidence
    ok = np.isfinite(t) & np.isfinite(df) & (df > 0)
    lo = np.full(t.shape, np.nan)
    hi = np.full(t.shape, np.nan)
    if ok.any():
        tt, dd = t[ok], df[ok]
        lo[ok] = _invert_nct(tt, dd, 1 - alpha / 2)
        hi[ok] = _invert_nct(tt, dd, alpha / 2)
    return lo, hi


def _invert_nct(t: np.ndarray, df: np.ndarray, target: float) -> np.ndarray:
    index = np.arange(t.size)

    def cdf(idx, ncp):
        return _nct_cdf(t[idx], df[idx], ncp)

    # start from the normal approximation (Abramowitz & Stegun 26.7.10) with a narrow bracket; the adaptive
    # bracketing widens it geometrically wherever the approximation is off (small df)
    spread = np.sqrt(1 + t**2 / (2 * df))
    guess = t * (1 - 1 / (4 * df)) - stats.norm.ppf(target) * spread
    width = 0.05 * spread + 0.01
    return _invert_decreasing(cdf, index, target, guess - width, guess + width)


def ncf_lambda_interval(f, df1, df2, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Confidence limits of the noncentrality lambda of a noncentral F, given the observed F (lambda >= 0).

    Lower: P(F' <= f | lambda) = 1 - alpha/2, upper: = alpha/2; a limit is 0 when even lambda = 0 leaves the
    cdf below the target.
    """
    f, df1, df2 = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (f, df1, df2)))
    alpha = 1 - confidence
    ok = np.isfinite(f) & np.isfinite(df1) & np.isfinite(df2) & (df1 > 0) & (df2 > 0)
    lo = np.full(f.shape, np.nan)
    hi = np.full(f.shape, np.nan)
    if ok.any():
        ff, d1, d2 = f[ok], df1[ok], df2[ok]
        index = np.arange(ff.size)

        def cdf(idx, lam):
            with np.errstate(all="ignore"):
                central = stats.f.cdf(ff[idx], d1[idx], d2[idx])
                value = stats.ncf.cdf(ff[idx], d1[idx], d2[idx], np.maximum(lam, 1e-300))
            return np.where(lam <= 0, central, value)

        c0 = stats.f.cdf(ff, d1, d2)
        guess = np.maximum(ff * d1 - d1, 0.0)
        for target, out in ((1 - alpha / 2, lo), (alpha / 2, hi)):
            res = np.zeros(ff.size)
            positive = c0 > target
            if positive.any():
                sel = index[positive]
                start_hi = guess[sel] + 1.0 + 2 * np.sqrt(2 * (d1[sel] + 2 * guess[sel]))
                res[positive] = _invert_decreasing(
                    cdf, sel, target, np.zeros(sel.size), start_hi, floor=0.0
                )
            out[ok] = res
    return lo, hi


def d_interval(t, n, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``d`` (or ``d_z``) = t / sqrt(n) with its noncentral-t interval; df = n - 1."""
    t = np.asarray(t, dtype=float)
    n = np.asarray(n, dtype=float)
    lo, hi = nct_ncp_interval(t, n - 1, confidence)
    root = np.sqrt(n)
    return t / root, lo / root, hi / root


def g_interval(t_pooled, n1, n2, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Hedges' ``g`` from the pooled-variance t, with the noncentral-t interval scaled by J (df = n1 + n2 - 2)."""
    t = np.asarray(t_pooled, dtype=float)
    n1 = np.asarray(n1, dtype=float)
    n2 = np.asarray(n2, dtype=float)
    df = n1 + n2 - 2
    scale = np.sqrt(1 / n1 + 1 / n2)
    j = hedges_j(df)
    lo, hi = nct_ncp_interval(t, df, confidence)
    return j * t * scale, j * lo * scale, j * hi * scale


def partial_eta2(f, df1, df2) -> np.ndarray:
    """Partial eta squared from F: F df1 / (F df1 + df2)."""
    f = np.asarray(f, dtype=float)
    return f * df1 / (f * df1 + df2)


def partial_eta2_interval(f, df1, df2, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Partial eta squared with the noncentral-F interval, eta2 = lambda / (lambda + df1 + df2 + 1)."""
    f = np.asarray(f, dtype=float)
    df1 = np.asarray(df1, dtype=float)
    df2 = np.asarray(df2, dtype=float)
    lam_lo, lam_hi = ncf_lambda_interval(f, df1, df2, confidence)
    total = df1 + df2 + 1
    return partial_eta2(f, df1, df2), lam_lo / (lam_lo + total), lam_hi / (lam_hi + total)
