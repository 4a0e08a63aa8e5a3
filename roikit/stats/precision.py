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
from typing import Literal, Sequence

import numpy as np
import pandas as pd
from scipy import stats as _st

from .._options import noun, plural
from ..errors import ConvergenceError, DesignError, DiagnosticWarning, UsageError
from ._common import COLUMN_DESCRIPTIONS, mergeable
from ._registry import register

__all__ = ["fit_precision_weighted", "precision_weighted", "sign_flip_precision", "TAU2_METHODS"]

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
    """Fisher scoring on tau2 for all regions at once, with step-halving and the boundary tau2 = 0.

    Each iteration works on the regions not yet converged only (a region's iterations do not depend on the others).
    """
    tau2 = np.maximum(tau2_start, 0.0).astype(float)
    ll = _loglik(y, v, X, mask, tau2, method)
    converged = np.zeros(tau2.shape, dtype=bool)
    for _ in range(_MAX_ITER):
        idx = np.flatnonzero(~converged)
        if not idx.size:
            break
        ya, va, ma, ta, la = y[:, idx], v[:, idx], mask[:, idx], tau2[idx], ll[idx]
        w = ma / (va + ta)
        b, A, e = _weighted_ls(ya, w, X)
        pe2 = ((w * e) ** 2).sum(0)  # y'PPy
        tr_p, tr_pp = _trace_terms(w, X, A)
        if method == "reml":
            score, info = 0.5 * (pe2 - tr_p), 0.5 * tr_pp
        else:
            score, info = 0.5 * (pe2 - w.sum(0)), 0.5 * (w**2).sum(0)
        step = score / info
        new = np.maximum(ta + step, 0.0)
        new_ll = _loglik(ya, va, X, ma, new, method)
        # step-halving: shorten a step until the (restricted) likelihood does not decrease
        for _h in range(30):
            worse = new_ll < la - 1e-12 * np.abs(la)
            if not worse.any():
                break
            step = np.where(worse, step / 2, step)
            new = np.where(worse, np.maximum(ta + step, 0.0), new)
            new_ll = np.where(worse, _loglik(ya, va, X, ma, new, method), new_ll)
        change = np.abs(new - ta)
        # at the boundary with a score pointing below zero, tau2 = 0 is the constrained maximum
        at_bound = (ta == 0) & (new == 0) & (score <= 0)
        converged[idx] = (change <= _TOL * np.maximum(1.0, ta)) | at_bound
        tau2[idx] = new
        ll[idx] = new_ll
    return tau2, converged


def _score_info(y, v, X, mask, tau2, method):
    """Score and expected information of the (restricted) log-likelihood in tau2, per region."""
    w = mask / (v + tau2)
    _, A, e = _weighted_ls(y, w, X)
    pe2 = ((w * e) ** 2).sum(0)
    if method == "reml":
        tr_p, tr_pp = _trace_terms(w, X, A)
        return 0.5 * (pe2 - tr_p), 0.5 * tr_pp
    return 0.5 * (pe2 - w.sum(0)), 0.5 * (w**2).sum(0)


def _bracketed_scoring(y, v, X, mask, method, tau2_start):
    """Safeguarded Fisher scoring: keep a bracket [lo, hi] around the root of the score and bisect whenever a
    scoring step would leave it. Used where plain scoring oscillates (an overshoot factor near -1 makes the
    iteration zig-zag around the maximum for hundreds of steps, seen with 16 participants and very unequal
    first-level variances)."""
    R = y.shape[1]
    s0, _ = _score_info(y, v, X, mask, np.zeros(R), method)
    at_zero = s0 <= 0  # the score falls from tau2 = 0: the constrained maximum is the boundary
    lo = np.zeros(R)
    hi = np.maximum(2 * np.maximum(tau2_start, 0), np.maximum(_wvar(y, mask), 1e-12))
    for _ in range(200):  # expand until the score is negative at hi
        s_hi, _ = _score_info(y, v, X, mask, hi, method)
        need = ~at_zero & (s_hi > 0)
        if not need.any():
            break
        lo = np.where(need, hi, lo)
        hi = np.where(need, hi * 4, hi)
    t = np.clip(np.maximum(tau2_start, 0), lo, hi)
    t = np.where((t <= lo) | (t >= hi), 0.5 * (lo + hi), t)
    converged = at_zero.copy()
    prev_t = prev_s = None
    for _ in range(_MAX_ITER):
        active = ~converged
        if not active.any():
            break
        score, info = _score_info(y, v, X, mask, t, method)
        lo = np.where(active & (score > 0), t, lo)
        hi = np.where(active & (score <= 0), t, hi)
        new = t + score / info
        if prev_t is not None:
            # secant on the score: the observed curvature, where the expected information misjudges it
            with np.errstate(invalid="ignore", divide="ignore"):
                slope = (score - prev_s) / (t - prev_t)
                secant = t - score / slope
            new = np.where(np.isfinite(secant) & (slope < 0), secant, new)
        prev_t, prev_s = t, score
        new = np.where((new <= lo) | (new >= hi), 0.5 * (lo + hi), new)
        done = active & ((np.abs(new - t) <= _TOL * np.maximum(1.0, t)) | (hi - lo <= _TOL * np.maximum(1.0, hi)))
        t = np.where(active, new, t)
        converged |= done
    return np.where(at_zero, 0.0, t), converged


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
    test: Literal["knapp-hartung", "knapp-hartung-truncated", "knha", "knha-truncated", "z"] = "knapp-hartung",
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
    test : {"knapp-hartung", "knapp-hartung-truncated", "z"}
        Inference on b: t with the Knapp-Hartung variance and df = k - p, the same with the variance factor
        truncated below at 1, or z (``knha`` and ``knha-truncated`` are accepted as short names).
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
    ``s2 = sum w e^2 / (k - p)`` and t on k - p df (Knapp & Hartung 2003); the truncated variant uses
    ``max(1, s2)``, so its standard error is never below the z test's (Roever, Knapp & Friede 2015, "modified
    Knapp-Hartung"; Jackson, Law, Rücker & Schwarzer 2017). ``I2 = tau2 / (tau2 + v_typical)``
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
        if not converged.all():
            redo = np.flatnonzero(~converged)
            t2, c2 = _bracketed_scoring(y[:, redo], v[:, redo], X, mask[:, redo], tau2_method, tau2[redo])
            tau2[redo], converged[redo] = t2, c2
        # the likelihood in tau2 can have two maxima (one at the boundary): keep the better of the two
        zero = np.zeros_like(tau2)
        better_at_zero = _loglik(y, v, X, mask, zero, tau2_method) > _loglik(y, v, X, mask, tau2, tau2_method)
        tau2 = np.where(better_at_zero, 0.0, tau2)
    boundary = tau2 <= 0

    w = mask / (v + tau2)
    b, A, e = _weighted_ls(y, w, X)
    var_b = np.einsum("rii->ri", A)
    df = (k - p).astype(float)
    test = {"knha": "knapp-hartung", "knha-truncated": "knapp-hartung-truncated"}.get(test, test)
    if test in ("knapp-hartung", "knapp-hartung-truncated"):
        s2 = (w * e**2).sum(0) / df
        if test == "knapp-hartung-truncated":
            s2 = np.maximum(s2, 1.0)
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
        raise UsageError(f"test: found {test!r}, expected 'knapp-hartung', 'knapp-hartung-truncated' or 'z'")
    with np.errstate(invalid="ignore", divide="ignore"):
        i2 = 100 * tau2 / (tau2 + v_typical)
    return {
        "b": b, "se": se, "statistic": stat, "p": pval,
        "ci_low": b - crit * se, "ci_high": b + crit * se,
        "df": df, "k": k, "tau2": tau2, "i2": i2, "q": q, "q_df": q_df, "q_p": q_p,
        "v_typical": v_typical, "boundary": boundary, "converged": converged,
    }


# --------------------------------------------------------------------------- formulas (shared with mixed)
def _formula_rhs(formula: str, *, parameter: str = "formula") -> str:
    """Right-hand side of ``'value ~ rhs'`` (or of a bare ``'rhs'``) after the formula gate accepted the formula."""
    from .formula import parse_formula

    parse_formula(formula, parameter=parameter)
    return formula.split("~", 1)[-1].strip()


def _required_variables(rhs: str, *, parameter: str = "formula") -> list[str]:
    """Columns named by a right-hand side (through the formula gate)."""
    from .formula import parse_formula

    return sorted(parse_formula(rhs, parameter=parameter).variables)


def _centre_numeric(frame: pd.DataFrame, variables: Sequence[str]) -> tuple[pd.DataFrame, list[str]]:
    """Mean-centre the numeric (non-boolean) variables; return the frame and the names centred."""
    frame = frame.copy()
    centred = []
    for name in variables:
        col = frame[name]
        if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
            frame[name] = col.astype(float) - col.astype(float).mean()
            centred.append(name)
    return frame, centred


def _design_matrix(rhs: str, frame: pd.DataFrame, *, parameter: str = "formula", center=False, groups=None,
                   means: dict | None = None):
    """Model matrix (ndarray), column names and term -> column indices for ``rhs`` on ``frame``.

    Built by the formula gate (:meth:`roikit.stats.formula.Formula.design`) from raw columns; ``center`` (True or
    the columns to centre) mean-centres numeric predictors there, after transforms such as ``log`` were applied;
    with ``groups`` (e.g. the region of each row) within each group, the means subtracted going into ``means``.
    """
    from .formula import parse_formula

    X, names, terms, _centred = parse_formula(rhs, parameter=parameter).design(frame, center=center, groups=groups,
                                                                                means=means)
    return X, names, terms


def _participant_frame(ids, participants, variables, *, context):
    """participants.tsv columns named in a formula, aligned to ``ids``; ids with a missing covariate listed."""
    from ._common import join_participants

    frame = join_participants(ids, participants, variables)
    for name in variables:
        col = frame[name]
        numeric = pd.to_numeric(col, errors="coerce")
        if col.notna().sum() and numeric.notna().sum() == col.notna().sum():
            frame[name] = numeric.astype(float)
        else:
            frame[name] = col.astype(object).where(col.notna(), None)
    missing = frame.isna().any(axis=1)
    return frame, [str(i) for i in frame.index[missing.to_numpy()]]


# --------------------------------------------------------------------------- the design
_EXTRA_DESCRIPTIONS = {
    "tau2_method": "estimator of tau2: reml, ml, dl (DerSimonian-Laird, truncated at 0) or pm (Paule-Mandel)",
    "q": "Cochran's Q (fixed-effect weights 1/v) on k - p df",
    "q_p": "p-value of Q (chi-square)",
    "boundary": "true where the estimate of the between-participant variance is at its boundary (0)",
    "converged": "true where the iterative fit converged",
}
for _name, _text in _EXTRA_DESCRIPTIONS.items():  # describe our columns in the results sidecar
    COLUMN_DESCRIPTIONS.setdefault(_name, _text)


_TESTS = ("knha", "knha-truncated", "z")
_TEST_NAMES = {"knha": "knapp-hartung", "knha-truncated": "knapp-hartung-truncated", "z": "z"}
COLUMN_DESCRIPTIONS.setdefault(
    "test", "precision-weighted inference: knha (Knapp-Hartung t on k - p df), knha-truncated (the same with its "
    "variance factor truncated below at 1; Roever, Knapp & Friede 2015) or z")
COLUMN_DESCRIPTIONS.setdefault(
    "p_permutation", "precision-weighted mean: two-sided sign-flip permutation p of the weighted statistic, tau2 "
    "re-estimated for every sign pattern (Follmann & Proschan 1999); n/a without --permutations")


def _resolve_test(test, df_method) -> str:
    if test is None:
        return "z" if df_method == "z" else "knha-truncated"
    name = str(test).strip().lower()
    if name not in _TESTS:
        from ._common import spelled

        raise spelled("test", "--test", UsageError, f"{{option}}: found {test!r}, expected one of "
                      "knha, knha-truncated (default), z")
    if df_method == "z" and name != "z":
        raise UsageError(f"test={test!r} contradicts df_method='z'; give one of them")
    return name


def _permute_precision(values: pd.DataFrame, *, participants=None, permutations: int, rng, contrast=None,
                       formula=None, tau2="reml", df_method="knapp-hartung", test=None, center=True, **_ignored):
    """Sign-flip permutation p (per region) and max-statistic family-wise p of the precision-weighted mean."""
    from ._common import pivot_contrast, region_order, spelled

    if formula is not None:
        raise spelled("permutations=0", "no --permutations", UsageError,
                      "precision-weighted: sign-flip permutations test the weighted mean only (no formula); with "
                      "a formula, use {option}")
    regions = region_order(values)
    y = pivot_contrast(values, contrast, regions=regions).to_numpy(float)
    v = pivot_contrast(values, contrast, column="variance", regions=regions).to_numpy(float)
    p_region, p_fwe, n_perm, exact = sign_flip_precision(y, v, permutations=permutations, rng=rng,
                                                         tau2_method=str(tau2).lower(),
                                                         test=_resolve_test(test, df_method))
    return {"mean": p_fwe, "_n_permutations": n_perm, "_exact": exact, "_scheme": "sign-flip (weighted)",
            "_columns": {"p_permutation": {"mean": p_region}}}


def sign_flip_precision(
    y: np.ndarray,
    v: np.ndarray,
    *,
    permutations: int,
    rng: np.random.Generator,
    tau2_method: Tau2Method = "reml",
    test: str = "knha-truncated",
    chunk_columns: int = 20000,
) -> tuple[np.ndarray, np.ndarray, int, bool]:
    """Sign-flip permutation test of the precision-weighted mean in every region (column).

    Under the null hypothesis of a zero mean and effects symmetric about it, each participant's value may change
    sign; for every sign pattern (the same for all regions) tau2 is re-estimated and the weighted statistic
    recomputed (Follmann & Proschan 1999). When ``2^n <= permutations`` all patterns are enumerated.

    Returns
    -------
    (p, p_fwe, n_permutations, exact)
        Per region the two-sided permutation p, the max-|statistic| family-wise p across regions, the number of
        sign patterns used and whether they were enumerated. Random patterns count the observed one:
        ``p = (1 + #{|t*| >= |t|}) / (B + 1)``; enumeration gives ``#{|t*| >= |t|} / 2^n``.
    """
    y = _as_2d(y)
    v = _as_2d(v)
    n, R = y.shape
    mask = np.isfinite(y) & np.isfinite(v)
    name = _TEST_NAMES.get(test, test)
    observed = np.abs(fit_precision_weighted(y, v, mask=mask, tau2_method=tau2_method, test=name)["statistic"][:, 0])
    exact = n <= 30 and 2**n <= permutations
    if exact:
        import itertools

        signs = np.array(list(itertools.product((1.0, -1.0), repeat=n)))
    else:
        signs = rng.choice(np.array([-1.0, 1.0]), size=(permutations, n))
    B = signs.shape[0]
    y0 = np.where(mask, y, 0.0)
    v0 = np.where(mask, v, 1.0)
    per = max(1, chunk_columns // max(R, 1))
    stats_perm = np.empty((B, R))
    for start in range(0, B, per):
        sg = signs[start:start + per]  # (b, n)
        b = sg.shape[0]
        yy = (sg[:, :, None] * y0[None]).transpose(1, 0, 2).reshape(n, b * R)
        vv = np.broadcast_to(v0[:, None, :], (n, b, R)).reshape(n, b * R)
        mm = np.broadcast_to(mask[:, None, :], (n, b, R)).reshape(n, b * R)
        fit = fit_precision_weighted(yy, vv, mask=mm, tau2_method=tau2_method, test=name)
        stats_perm[start:start + b] = np.abs(fit["statistic"][:, 0]).reshape(b, R)
    tol = 1e-9 * np.maximum(observed, 1e-300)
    hits = (stats_perm >= observed[None, :] - tol).sum(0)
    max_hits = (stats_perm.max(1)[:, None] >= observed[None, :] - tol).sum(0)
    if exact:
        return hits / B, max_hits / B, B, True
    return (1 + hits) / (B + 1), (1 + max_hits) / (B + 1), B, False


@register("precision-weighted", permutation=_permute_precision)
def precision_weighted(
    values: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    confidence: float = 0.95,
    contrast: str | None = None,
    formula: str | None = None,
    tau2: Tau2Method = "reml",
    df_method: Literal["knapp-hartung", "z"] = "knapp-hartung",
    test: Literal["knha", "knha-truncated", "z"] | None = None,
    center: bool = True,
) -> pd.DataFrame:
    """Precision-weighted two-level design: first-level variances known, between-participant variance estimated.

    Parameters
    ----------
    values : DataFrame
        Region values table with a ``variance`` column (extract with ``--variance``).
    participants : DataFrame, optional
        participants.tsv, needed when ``formula`` names its columns.
    confidence : float
        Level of the confidence intervals.
    contrast : str
        The contrast to test.
    formula : str, optional
        Meta-regression on participants.tsv columns, e.g. ``"value ~ age + group"``; numeric covariates are
        mean-centred (``center=False`` keeps them raw), so the intercept is the mean at the average covariate.
        Without a formula the model is intercept-only and the single row has term ``mean``.
    tau2 : {"reml", "ml", "dl", "pm"}
        Estimator of the between-participant variance: restricted maximum likelihood (default), maximum
        likelihood, DerSimonian-Laird (truncated at 0), Paule-Mandel.
    df_method : {"knapp-hartung", "z"}
        Knapp-Hartung t on n - p df (default, for small samples) or Wald z.
    test : {"knha", "knha-truncated", "z"}, optional
        The inference on the coefficients: Knapp-Hartung (Knapp & Hartung 2003), the same with its variance factor
        ``q = sum w e^2 / (k - p)`` truncated below at 1 (default; Roever, Knapp & Friede 2015; Jackson et al.
        2017), or z. ``df_method='z'`` is the same as ``test='z'``. With ``permutations`` (``run_design``) the
        weighted mean also gets a sign-flip permutation p (``p_permutation``; Follmann & Proschan 1999).
    center : bool
        Mean-centre numeric covariates of ``formula``.

    Returns
    -------
    DataFrame
        One row per region x coefficient with the contract's columns (region, design, term, n, estimate, se,
        df, statistic, statistic_type, p, ci_low, ci_high, confidence, effect_size, effect_size_type,
        effect_size_ci_low, effect_size_ci_high) and the common ones (contrast, formula, df_method, ...,
        excluded_ids), plus ``tau2``, ``i2`` (percent), ``q``, ``q_p``, ``tau2_method``, ``boundary``,
        ``converged``, ``centered``.

    Notes
    -----
    Model per region: ``y_i = x_i b + u_i + e_i``, ``u_i ~ N(0, tau2)``, ``e_i ~ N(0, v_i)``; see
    :func:`fit_precision_weighted` for the estimators and checks (BCG vaccine example of Viechtbauer 2010;
    equal variances reduce to ``scipy.stats.ttest_1samp``).

    Effect size: for the intercept-only model ``d_total = b / sqrt(tau2 + v_typical)``, the mean over the
    model-implied SD of one participant's value (between-participant plus typical first-level variance,
    ``v_typical`` as in I2). With equal first-level variances and tau2 > 0 it equals the one-sample ``d``
    (REML then gives ``tau2 + v = SD^2``). It has no interval here (n/a). For meta-regression coefficients no
    standardised effect is well defined without further choices, so ``effect_size`` and ``effect_size_type``
    are n/a.

    Examples
    --------
    >>> from roikit.stats import run_design
    >>> run_design(values, "precision-weighted", contrast="novel", tau2="reml")   # doctest: +SKIP
    """
    from ._common import (check_minimum_n, join_ids, low_coverage, pivot_contrast,
                          region_order, result_rows, warn_exclusions, warn_low_coverage)
    from .diagnostics import residual_diagnostics, warn_diagnostics

    context = "precision-weighted"
    if "variance" not in values.columns:
        raise DesignError(
            "precision-weighted: the region values table has no 'variance' column; this design needs the "
            "first-level variances; extract with --variance PATTERN (variance maps) or use the one-sample design"
        )
    tau2 = str(tau2).strip().lower()
    if "," in tau2:
        raise UsageError(f"tau2: choose one estimator, got {tau2!r}; expected one of reml, ml, dl, pm "
                         "(run the design once per estimator to compare them)")
    if tau2 not in TAU2_METHODS:
        raise UsageError(f"tau2: found {tau2!r}, expected one of reml, ml, dl, pm; fix: --tau2 reml")
    if df_method not in ("knapp-hartung", "z"):
        raise UsageError(f"df_method: found {df_method!r}, expected 'knapp-hartung' (default) or 'z'")
    test = _resolve_test(test, df_method)
    df_method = "z" if test == "z" else "knapp-hartung"
    regions = region_order(values)
    Y = pivot_contrast(values, contrast, regions=regions)
    Vdf = pivot_contrast(values, contrast, column="variance", regions=regions)
    ids = [str(i) for i in Y.index]
    bad = np.argwhere(np.isfinite(Vdf.to_numpy()) & ~(Vdf.to_numpy() > 0))
    if bad.size:
        listed = ", ".join(f"{ids[i]} in {regions[j]} ({Vdf.iat[i, j]:g})" for i, j in bad[:5])
        raise DesignError(
            f"precision-weighted: non-positive first-level {noun(len(bad), 'variance')} for "
            f"{plural(len(bad), 'participant-region value')}: "
            f"{listed}{' ...' if len(bad) > 5 else ''}; variances must be > 0; check the variance maps"
        )
    y = Y.to_numpy(float)
    v = Vdf.to_numpy(float)
    mask = np.isfinite(y) & np.isfinite(v)

    centred: list[str] = []
    if formula is None:
        X = np.ones((len(ids), 1))
        names, formula_text = ["mean"], None
    else:
        from .formula import parse_formula

        rhs = _formula_rhs(formula)
        variables = [c for c in _required_variables(rhs) if c != "value"]
        if variables:
            frame, miss_cov = _participant_frame(ids, participants, variables, context=context)
        else:
            frame, miss_cov = pd.DataFrame(index=ids), []
        if miss_cov:
            warn_exclusions(regions, [miss_cov] * len(regions), context=context,
                            reason=f"covariate of the formula missing ({', '.join(variables)})")
        keep = ~frame.index.isin(miss_cov)
        frame_keep = frame[keep].reset_index(drop=True)
        Xk, names, _terms, centred = parse_formula(rhs, parameter="formula").design(frame_keep, center=center)
        X = np.zeros((len(ids), Xk.shape[1]))
        X[keep] = Xk
        mask &= keep[:, None]
        formula_text = f"value ~ {rhs}"
    p = X.shape[1]
    k = mask.sum(0)
    excluded = [[ids[i] for i in np.flatnonzero(~mask[:, j])] for j in range(len(regions))]
    value_missing = [[ids[i] for i in np.flatnonzero(~(np.isfinite(y[:, j]) & np.isfinite(v[:, j])))]
                     for j in range(len(regions))]
    warn_exclusions(regions, value_missing, context=context, reason="value or variance missing")
    check_minimum_n(k, regions, minimum=p + 2, context=context)
    xtx = np.einsum("nr,np,nq->rpq", mask.astype(float), X, X)
    rank = np.linalg.matrix_rank(xtx)
    if np.any(rank < p):
        bad_r = [regions[j] for j in np.flatnonzero(rank < p)]
        raise DesignError(f"precision-weighted: the formula {formula_text!r} is not estimable (collinear or constant "
                          f"predictors) in {noun(bad_r, 'region')} {', '.join(bad_r[:10])}; simplify the formula")

    fit = fit_precision_weighted(y, v, X, mask=mask, tau2_method=tau2, test=_TEST_NAMES[test], confidence=confidence)
    if not fit["converged"].all():
        bad_r = [regions[j] for j in np.flatnonzero(~fit["converged"])]
        raise ConvergenceError(f"precision-weighted: Fisher scoring for tau2 ({tau2}) did not converge in "
                               f"{noun(bad_r, 'region')} {', '.join(bad_r[:10])}; try tau2='dl' or tau2='pm'")

    resid = np.where(mask, (np.where(mask, y, 0) - X @ fit["b"].T) / np.sqrt(np.where(mask, v, 1) + fit["tau2"]),
                     np.nan)
    diag = residual_diagnostics(resid, ids)
    coverage = low_coverage(values, contrast, regions=regions, ids=ids)
    warn_low_coverage(regions, coverage, context=context)
    frames = []
    for c, name in enumerate(names):
        if formula is None:
            es = fit["b"][:, 0] / np.sqrt(fit["tau2"] + fit["v_typical"])
            es_type = "d_total"
        else:
            es, es_type = np.nan, None
        frames.append(result_rows(
            regions, design="precision-weighted", term=name, confidence=confidence, n=k.astype(int),
            estimate=fit["b"][:, c], se=fit["se"][:, c], df=fit["df"], statistic=fit["statistic"][:, c],
            statistic_type="t" if df_method == "knapp-hartung" else "z", p=fit["p"][:, c],
            ci_low=fit["ci_low"][:, c], ci_high=fit["ci_high"][:, c], effect_size=es, effect_size_type=es_type,
            contrast=str(contrast), formula=formula_text, df_method=df_method, population_inference=True,
            excluded_ids=[join_ids(e) for e in excluded], n_low_coverage=[len(cv) for cv in coverage],
            low_coverage_ids=[join_ids(cv) for cv in coverage], **diag,
            tau2=fit["tau2"], i2=fit["i2"], q=fit["q"], q_p=fit["q_p"], tau2_method=tau2, test=test,
            boundary=fit["boundary"], converged=fit["converged"], centered=",".join(centred) if centred else None,
        ))
    out = pd.concat(frames, ignore_index=True)
    _warn_tau2_boundary(list(regions), [bool(b) for b in fit["boundary"]], context=context)
    warn_diagnostics(out, context=context)
    return out


@mergeable
def _warn_tau2_boundary(regions, boundary, *, context: str) -> None:
    if any(boundary):
        n_b = int(sum(boundary))
        warnings.warn(DiagnosticWarning(
            f"{context}: the between-participant variance tau2 is estimated at 0 (boundary) in "
            f"{n_b} region{'s' if n_b != 1 else ''}: {', '.join(r for r, b in zip(regions, boundary) if b)}; "
            "the test then weights participants by their first-level precision only", context=context,
            findings=[{"problem": "tau2 estimated at 0 (boundary): precision weights only", "region": r}
                      for r, b in zip(regions, boundary) if b]), stacklevel=4)
