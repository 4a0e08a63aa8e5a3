"""Precision-weighted two-level design (known first-level variances).

Model, per region: ``y_i = x_i b + u_i + e_i`` with ``u_i ~ N(0, tau2)`` (true
between-participant differences) and ``e_i ~ N(0, v_i)`` (first-level
measurement error, ``v_i`` taken from the values table's ``variance`` column).

The numerical core (:func:`fit_precision_weighted`) works on arrays with one
column per region and fits all regions at once: a region is a column, every
step of Fisher scoring is a batched matrix operation.
"""

from __future__ import annotations

import warnings
from typing import Literal

import numpy as np
import pandas as pd
from scipy import stats as _st

from ..errors import DesignError, DiagnosticWarning, UsageError

__all__ = ["fit_precision_weighted", "precision_weighted", "TAU2_METHODS"]

Tau2Method = Literal["reml", "ml", "dl", "pm"]
TAU2_METHODS: tuple[str, ...] = ("reml", "ml", "dl", "pm")

_MAX_ITER = 200
_TOL = 1e-10


# --------------------------------------------------------------------------- core helpers
def _as_2d(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a, dtype=float)
    return a[:, None] if a.ndim == 1 else a


def _weighted_ls(y, w, X):
    """Batched weighted least squares over regions.

    y, w: (n, R); X: (n, p). Returns b (R, p), A = (X'WX)^-1 (R, p, p), residuals (n, R).
    """
    xtwx = np.einsum("nr,np,nq->rpq", w, X, X)
    xtwy = np.einsum("nr,np,nr->rp", w, X, y)
    A = np.linalg.inv(xtwx)
    b = np.einsum("rpq,rq->rp", A, xtwy)
    e = y - X @ b.T
    return b, A, e


def _trace_terms(w, X, A):
    """tr(P) and tr(PP) for P = W - W X A X' W, batched over regions."""
    xw2x = np.einsum("nr,np,nq->rpq", w**2, X, X)
    xw3x = np.einsum("nr,np,nq->rpq", w**3, X, X)
    ab = A @ xw2x
    tr_p = w.sum(0) - np.einsum("rii->r", ab)
    tr_pp = (w**2).sum(0) - 2 * np.einsum("rij,rji->r", A, xw3x) + np.einsum("rij,rji->r", ab, ab)
    return tr_p, tr_pp


def _loglik(y, v, X, mask, tau2, method):
    """Log-likelihood (ML) or restricted log-likelihood (REML) per region, up to the 2*pi constant."""
    w = mask / (v + tau2)
    b, A, e = _weighted_ls(y, w, X)
    with np.errstate(divide="ignore"):
        ll = -0.5 * (np.where(mask > 0, np.log(v + tau2), 0.0).sum(0) + (w * e**2).sum(0))
    if method == "reml":
        ll = ll - 0.5 * np.linalg.slogdet(np.linalg.inv(A))[1]
    return ll


def _fisher_scoring(y, v, X, mask, method, tau2_start):
    """Fisher scoring on tau2 for all regions at once, with step-halving and the boundary tau2 = 0."""
    tau2 = np.maximum(tau2_start, 0.0).astype(float)
    ll = _loglik(y, v, X, mask, tau2, method)
    converged = np.zeros(tau2.shape, dtype=bool)
    for _ in range(_MAX_ITER):
        active = ~converged
        if not active.any():
            break
        w = mask / (v + tau2)
        b, A, e = _weighted_ls(y, w, X)
        pe2 = ((w * e) ** 2).sum(0)  # y'PPy
        tr_p, tr_pp = _trace_terms(w, X, A)
        if method == "reml":
            score, info = 0.5 * (pe2 - tr_p), 0.5 * tr_pp
        else:
            score, info = 0.5 * (pe2 - w.sum(0)), 0.5 * (w**2).sum(0)
        step = np.where(active, score / info, 0.0)
        new = np.maximum(tau2 + step, 0.0)
        new_ll = _loglik(y, v, X, mask, new, method)
        # step-halving: shorten a step until the (restricted) likelihood does not decrease
        for _h in range(30):
            worse = active & (new_ll < ll - 1e-12 * np.abs(ll))
            if not worse.any():
                break
            step = np.where(worse, step / 2, step)
            new = np.where(worse, np.maximum(tau2 + step, 0.0), new)
            new_ll = np.where(worse, _loglik(y, v, X, mask, new, method), new_ll)
        change = np.abs(new - tau2)
        # at the boundary with a score pointing below zero, tau2 = 0 is the constrained maximum
        at_bound = (tau2 == 0) & (new == 0) & (score <= 0)
        converged |= active & ((change <= _TOL * np.maximum(1.0, tau2)) | at_bound)
        tau2 = np.where(active, new, tau2)
        ll = np.where(active, new_ll, ll)
    return tau2, converged


def _dl(y, v, X, mask):
    w = mask / v
    _, A, e = _weighted_ls(y, w, X)
    q = (w * e**2).sum(0)
    k = mask.sum(0)
    p = X.shape[1]
    tr_p, _ = _trace_terms(w, X, A)
    return np.maximum((q - (k - p)) / tr_p, 0.0)


def _q_gen(y, v, X, mask, tau2):
    w = mask / (v + tau2)
    _, _, e = _weighted_ls(y, w, X)
    return (w * e**2).sum(0)


def _pm(y, v, X, mask):
    """Paule-Mandel: the tau2 >= 0 at which the generalised Q equals k - p (bisection, vectorised)."""
    target = mask.sum(0) - X.shape[1]
    lo = np.zeros(y.shape[1])
    q0 = _q_gen(y, v, X, mask, lo)
    at_zero = q0 <= target
    vmax = np.where(mask > 0, v, 0).max(0)
    hi = np.maximum(10 * np.maximum(_wvar(y, mask), vmax), 1e-12)
    for _ in range(200):  # expand the bracket until Q(hi) < k - p
        need = (~at_zero) & (_q_gen(y, v, X, mask, hi) > target)
        if not need.any():
            break
        hi = np.where(need, hi * 4, hi)
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        above = _q_gen(y, v, X, mask, mid) > target
        lo = np.where(above, mid, lo)
        hi = np.where(above, hi, mid)
        if np.all(hi - lo <= 1e-13 * np.maximum(1.0, hi)):
            break
    return np.where(at_zero, 0.0, 0.5 * (lo + hi))


def _wvar(y, mask):
    k = mask.sum(0)
    m = (y * mask).sum(0) / k
    return ((y - m) ** 2 * mask).sum(0) / np.maximum(k - 1, 1)


def fit_precision_weighted(
    y: np.ndarray,
    v: np.ndarray,
    X: np.ndarray | None = None,
    *,
    mask: np.ndarray | None = None,
    tau2_method: Tau2Method = "reml",
    test: Literal["knapp-hartung", "z"] = "knapp-hartung",
    confidence: float = 0.95,
) -> dict[str, np.ndarray]:
    """Fit the random-effects (precision-weighted) model to every region at once.

    Parameters
    ----------
    y, v : ndarray, shape (n, R) or (n,)
        Values and their known first-level sampling variances, one column per region.
    X : ndarray, shape (n, p), optional
        Design matrix shared by all regions (default: a column of ones, the intercept-only model).
    mask : ndarray of bool, shape (n, R), optional
        True where a participant enters a region's fit (default: where ``y`` and ``v`` are finite).
    tau2_method : {"reml", "ml", "dl", "pm"}
        Estimator of the between-participant variance tau2.
    test : {"knapp-hartung", "z"}
        Inference on b: t with the Knapp-Hartung variance and df = k - p, or z.
    confidence : float
        Level of the confidence intervals.

    Returns
    -------
    dict of ndarray
        ``b``, ``se``, ``statistic``, ``p``, ``ci_low``, ``ci_high`` (R, p); ``df``, ``k``, ``tau2``,
        ``i2`` (percent), ``q``, ``q_df``, ``q_p``, ``v_typical``, ``boundary``, ``converged`` (R,).

    Notes
    -----
    Weights ``w_i = 1 / (v_i + tau2)``; ``b = (X'WX)^-1 X'Wy``. REML and ML maximise the (restricted)
    likelihood by Fisher scoring on tau2 (score ``(y'PPy - tr P)/2``, information ``tr(PP)/2`` for REML,
    ``P = W - WX(X'WX)^-1X'W``) with step-halving; a step that would go below zero is cut at zero and
    ``boundary`` is True where tau2 = 0. DerSimonian-Laird is ``max(0, (Q - (k-p)) / tr P_FE)``;
    Paule-Mandel solves ``Q(tau2) = k - p``. Knapp-Hartung: ``se^2 = s2 diag((X'WX)^-1)`` with
    ``s2 = sum w e^2 / (k - p)`` (not truncated at 1) and t on k - p df. ``I2 = tau2 / (tau2 + v_typical)``
    with ``v_typical = (k - p) / tr P_FE`` (Higgins & Thompson 2002). Checked against the BCG vaccine
    example of Viechtbauer (2010) and, for equal variances, against ``scipy.stats.ttest_1samp``.
    """
    y = _as_2d(y)
    v = _as_2d(v)
    n, R = y.shape
    if X is None:
        X = np.ones((n, 1))
    X = np.asarray(X, dtype=float)
    if mask is None:
        mask = np.isfinite(y) & np.isfinite(v)
    mask = _as_2d(mask).astype(float)
    if tau2_method not in TAU2_METHODS:
        raise UsageError(f"tau2: found {tau2_method!r}, expected one of {', '.join(TAU2_METHODS)}; "
                         "fix: pass tau2='reml' (the default)")
    y = np.where(mask > 0, y, 0.0)
    v = np.where(mask > 0, v, 1.0)
    p = X.shape[1]
    k = mask.sum(0)

    # fixed-effect quantities: Q, its df, the typical within-participant variance
    w_fe = mask / v
    _, A_fe, e_fe = _weighted_ls(y, w_fe, X)
    q = (w_fe * e_fe**2).sum(0)
    tr_p_fe, _ = _trace_terms(w_fe, X, A_fe)
    q_df = k - p
    q_p = _st.chi2.sf(q, q_df)
    v_typical = q_df / tr_p_fe

    converged = np.ones(R, dtype=bool)
    if tau2_method == "dl":
        tau2 = _dl(y, v, X, mask)
    elif tau2_method == "pm":
        tau2 = _pm(y, v, X, mask)
    else:
        tau2, converged = _fisher_scoring(y, v, X, mask, tau2_method, _dl(y, v, X, mask))
    boundary = tau2 <= 0

    w = mask / (v + tau2)
    b, A, e = _weighted_ls(y, w, X)
    var_b = np.einsum("rii->ri", A)
    df = (k - p).astype(float)
    if test == "knapp-hartung":
        s2 = (w * e**2).sum(0) / df
        se = np.sqrt(var_b * s2[:, None])
        stat = b / se
        pval = 2 * _st.t.sf(np.abs(stat), df[:, None])
        crit = _st.t.ppf(0.5 + confidence / 2, df)[:, None]
    elif test == "z":
        se = np.sqrt(var_b)
        stat = b / se
        pval = 2 * _st.norm.sf(np.abs(stat))
        crit = np.full((R, 1), _st.norm.ppf(0.5 + confidence / 2))
        df = np.full(R, np.nan)
    else:
        raise UsageError(f"test: found {test!r}, expected 'knapp-hartung' or 'z'")
    with np.errstate(invalid="ignore", divide="ignore"):
        i2 = 100 * tau2 / (tau2 + v_typical)
    return {
        "b": b, "se": se, "statistic": stat, "p": pval,
        "ci_low": b - crit * se, "ci_high": b + crit * se,
        "df": df, "k": k, "tau2": tau2, "i2": i2, "q": q, "q_df": q_df, "q_p": q_p,
        "v_typical": v_typical, "boundary": boundary, "converged": converged,
    }
