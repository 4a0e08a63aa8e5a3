"""Linear mixed models: random participant intercepts and slopes, crossed random intercepts (e.g. stimuli).

The numerical core is a profiled (restricted) likelihood written here, following the penalised least-squares
formulation of Bates, Maechler, Bolker & Walker (2015, J Stat Softw 67(1)): for relative covariance factors
``theta`` the fixed effects and the residual variance are profiled out, and only ``theta`` is optimised, with
several optimisers whose best restricted likelihood is kept. Satterthwaite degrees of freedom come from the
analytic derivatives of the fixed-effect covariance with respect to the variance parameters and their expected
(restricted) information.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Literal, Sequence

import numpy as np
import pandas as pd
from scipy import linalg as _la
from scipy import optimize as _opt
from scipy import stats as _st

from .._options import progress_bar, spell
from ..errors import ConvergenceError, DesignError, DiagnosticWarning, UsageError
from ._common import COLUMN_DESCRIPTIONS
from ._registry import register
from .precision import _centre_numeric, _design_matrix, _formula_rhs, _required_variables

__all__ = ["RandomFactor", "MixedFit", "fit_mixed", "satterthwaite", "mixed"]

#: relative SD (random-effect SD / residual SD) below which a variance component is flagged as at the boundary
BOUNDARY_TOL = 1e-4
#: largest absolute (projected) gradient of the deviance in theta accepted as converged
GRADIENT_TOL = 2e-3


@dataclass
class RandomFactor:
    """One grouping factor with its random-effect covariates.

    Attributes
    ----------
    name : str
        Name used in output columns (``participant`` or the crossed column).
    codes : ndarray of int, shape (n,)
        Level index (0..L-1) of every observation.
    Z : ndarray, shape (n, r)
        Random-effect covariates (a column of ones for a random intercept).
    terms : list of str
        Names of the ``r`` covariates (``Intercept``, ``contrast[T.novel]`` ...).
    """

    name: str
    codes: np.ndarray
    Z: np.ndarray
    terms: list[str]

    @property
    def n_levels(self) -> int:
        return int(self.codes.max()) + 1 if self.codes.size else 0

    @property
    def r(self) -> int:
        return self.Z.shape[1]

    @property
    def n_theta(self) -> int:
        return self.r * (self.r + 1) // 2


@dataclass
class MixedFit:
    """Result of :func:`fit_mixed` (all quantities on the original scale)."""

    beta: np.ndarray
    cov_beta: np.ndarray
    sigma2: float
    covariances: list[np.ndarray]  # per factor, r x r covariance of the random effects
    theta: np.ndarray
    deviance: float
    reml: bool
    converged: bool
    boundary: bool
    optimizer: str
    n: int
    p: int
    attempts: dict = field(default_factory=dict)


# --------------------------------------------------------------------------- theta <-> covariance factors
def _tril_index(r: int):
    # column-major lower triangle: (0,0), (1,0), ..., (r-1,0), (1,1), ...
    return [(i, j) for j in range(r) for i in range(j, r)]


def _theta_start(factors: Sequence[RandomFactor]) -> np.ndarray:
    return np.concatenate([[1.0 if i == j else 0.0 for i, j in _tril_index(f.r)] for f in factors])


def _theta_lower(factors: Sequence[RandomFactor]) -> list[float | None]:
    return [0.0 if i == j else None for f in factors for i, j in _tril_index(f.r)]


def _factor_T(theta: np.ndarray, factors: Sequence[RandomFactor]) -> list[np.ndarray]:
    out, pos = [], 0
    for f in factors:
        T = np.zeros((f.r, f.r))
        for (i, j) in _tril_index(f.r):
            T[i, j] = theta[pos]
            pos += 1
        out.append(T)
    return out


def _normalise_theta(theta: np.ndarray, factors: Sequence[RandomFactor]) -> np.ndarray:
    """Flip column signs so every diagonal element is >= 0 (T T' is unchanged)."""
    Ts = _factor_T(theta, factors)
    out = []
    for T in Ts:
        s = np.where(np.diag(T) < 0, -1.0, 1.0)
        T = T * s[None, :]
        out.extend(T[i, j] for i, j in _tril_index(T.shape[0]))
    return np.asarray(out, dtype=float)


def _build_Z(factors: Sequence[RandomFactor], n: int) -> list[np.ndarray]:
    """Dense random-effects design per factor (columns level-major, then covariate)."""
    blocks = []
    for f in factors:
        Zf = np.zeros((n, f.n_levels * f.r))
        rows = np.arange(n)
        for a in range(f.r):
            Zf[rows, f.codes * f.r + a] = f.Z[:, a]
        blocks.append(Zf)
    return blocks


def _z_lambda(theta, Zs, factors):
    """Z Lambda(theta) without forming Lambda: per factor, (n, L, r) @ T."""
    blocks = []
    for Zf, f, T in zip(Zs, factors, _factor_T(theta, factors)):
        n = Zf.shape[0]
        blocks.append((Zf.reshape(n, f.n_levels, f.r) @ T).reshape(n, f.n_levels * f.r))
    return np.hstack(blocks) if len(blocks) > 1 else blocks[0]


def _pls(theta, y, X, Zs, factors):
    """Penalised least squares at theta: (logdet L^2, logdet RX^2, r2, beta, cholesky factor, q)."""
    ZL = _z_lambda(theta, Zs, factors)
    q = ZL.shape[1]
    p = X.shape[1]
    M = np.empty((q + p, q + p))
    M[:q, :q] = ZL.T @ ZL
    M[:q, :q].flat[:: q + 1] += 1.0
    M[:q, q:] = ZL.T @ X
    M[q:, :q] = M[:q, q:].T
    M[q:, q:] = X.T @ X
    L = np.linalg.cholesky(M)
    c = np.concatenate([ZL.T @ y, X.T @ y])
    sol = _la.cho_solve((L, True), c)
    u, beta = sol[:q], sol[q:]
    resid = y - X @ beta - ZL @ u
    r2 = float(resid @ resid + u @ u)
    d = np.diag(L)
    return 2 * np.log(d[:q]).sum(), 2 * np.log(d[q:]).sum(), r2, beta, L, q


def _deviance(theta, y, X, Z, factors, reml):
    """Profiled criterion from the direct residuals (used at the optimum and in tests)."""
    try:
        ld_l, ld_x, r2, *_ = _pls(theta, y, X, Z, factors)
    except np.linalg.LinAlgError:
        return np.inf
    return _criterion(ld_l, ld_x, r2, X.shape, reml)


def _criterion(ld_l, ld_x, r2, shape, reml):
    n, p = shape
    if not r2 > 0:
        return np.inf
    if reml:
        m = n - p
        return ld_l + ld_x + m * (1 + np.log(2 * np.pi * r2 / m))
    return ld_l + n * (1 + np.log(2 * np.pi * r2 / n))


class _CrossProducts:
    """Profiled criterion from precomputed cross-products: per evaluation only (q+p)-square matrices.

    When X holds a constant column, y is centred first (r2 is unchanged and no precision is lost to the mean).
    """

    def __init__(self, y, X, Zs, factors, reml):
        Z = np.hstack(Zs)
        if np.any(np.all(X == X[:1], axis=0) & (X[0] != 0)):
            y = y - y.mean()
        self.factors, self.reml, self.shape = factors, reml, X.shape
        self.ZtZ, self.ZtX, self.XtX = Z.T @ Z, Z.T @ X, X.T @ X
        self.Zty, self.Xty, self.yty = Z.T @ y, X.T @ y, float(y @ y)
        self.q = Z.shape[1]
        # positions of the theta elements inside the block-diagonal Lambda
        rows, cols, which = [], [], []
        off, pos = 0, 0
        for f in factors:
            tri = _tril_index(f.r)
            for g in range(f.n_levels):
                for t, (i, j) in enumerate(tri):
                    rows.append(off + g * f.r + i)
                    cols.append(off + g * f.r + j)
                    which.append(pos + t)
            off += f.n_levels * f.r
            pos += len(tri)
        self.rows, self.cols, self.which = np.array(rows), np.array(cols), np.array(which)
        self.diagonal = all(f.r == 1 for f in factors)

    def __call__(self, theta):
        q = self.q
        p = self.shape[1]
        if self.diagonal:  # Lambda is diagonal: scale rows and columns
            lam = np.asarray(theta, dtype=float)[self.which]
            A = self.ZtZ * np.outer(lam, lam)
            B = self.ZtX * lam[:, None]
            cz = self.Zty * lam
        else:
            Lam = np.zeros((q, q))
            Lam[self.rows, self.cols] = np.asarray(theta, dtype=float)[self.which]
            A = Lam.T @ self.ZtZ @ Lam
            B = Lam.T @ self.ZtX
            cz = Lam.T @ self.Zty
        M = np.empty((q + p, q + p))
        M[:q, :q] = A
        M[:q, :q].flat[:: q + 1] += 1.0
        M[:q, q:] = B
        M[q:, :q] = B.T
        M[q:, q:] = self.XtX
        try:
            L = np.linalg.cholesky(M)
        except np.linalg.LinAlgError:
            return np.inf
        c = np.concatenate([cz, self.Xty])
        w = _la.solve_triangular(L, c, lower=True, check_finite=False)
        r2 = self.yty - float(w @ w)  # y'y - c' M^-1 c
        d = np.diag(L)
        return _criterion(2 * np.log(d[:q]).sum(), 2 * np.log(d[q:]).sum(), r2, self.shape, self.reml)


def _projected_gradient(theta, fun, lower, h=1e-5):
    g = np.zeros_like(theta)
    f0 = fun(theta)
    for k in range(theta.size):
        e = np.zeros_like(theta)
        e[k] = h
        if lower[k] is not None and theta[k] - h < lower[k]:
            gk = (fun(theta + e) - f0) / h
            g[k] = min(gk, 0.0) if theta[k] <= lower[k] + h else gk  # at the bound only descent directions count
        else:
            g[k] = (fun(theta + e) - fun(theta - e)) / (2 * h)
    return g


def fit_mixed(
    y: np.ndarray,
    X: np.ndarray,
    factors: Sequence[RandomFactor],
    *,
    reml: bool = True,
    optimizers: Sequence[str] = ("Nelder-Mead", "L-BFGS-B", "Powell"),
) -> MixedFit:
    """Fit a linear mixed model by profiled REML (or ML), trying several optimisers.

    Parameters
    ----------
    y : ndarray, shape (n,)
        Response.
    X : ndarray, shape (n, p)
        Fixed-effects design (full column rank).
    factors : sequence of RandomFactor
        Grouping factors, each with an unstructured covariance of its random effects (crossed or nested).
    reml : bool
        Restricted maximum likelihood (default) or maximum likelihood.
    optimizers : sequence of str
        scipy.optimize.minimize methods tried in turn; the best (restricted) likelihood is kept. The later ones
        are skipped once a fit passes the gradient check and a second optimiser agrees with it.

    Returns
    -------
    MixedFit

    Raises
    ------
    ConvergenceError
        If no optimiser reaches a point whose projected gradient passes the check.

    Notes
    -----
    With ``Lambda(theta)`` the relative covariance factor, the penalised least-squares problem
    ``min ||y - X b - Z Lambda u||^2 + ||u||^2`` gives ``r2(theta)``; the profiled REML criterion is
    ``log|L|^2 + log|R_X|^2 + (n-p)(1 + log(2 pi r2 / (n-p)))`` (Bates et al. 2015, eqs. 34-42; ML:
    ``log|L|^2 + n(1 + log(2 pi r2 / n))``), ``sigma2 = r2 / (n - p)`` (ML: ``/ n``) and
    ``cov(b) = sigma2 (R_X' R_X)^-1``.
    """
    y = np.asarray(y, dtype=float)
    X = np.asarray(X, dtype=float)
    n, p = X.shape
    Z = _build_Z(factors, n)
    lower = _theta_lower(factors)
    fun = _CrossProducts(y, X, Z, factors, reml)
    start = _theta_start(factors)
    best = None
    attempts: dict[str, dict] = {}
    passing: list[tuple[float, np.ndarray]] = []
    for method in optimizers:
        if len(passing) >= 2 and abs(passing[0][0] - passing[1][0]) < 1e-6:
            break
        x0 = start if best is None or method == optimizers[0] else best[1]
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                if method == "L-BFGS-B":
                    res = _opt.minimize(fun, x0, method=method, bounds=[(lo, None) for lo in lower],
                                        options={"maxiter": 1000, "ftol": 1e-12, "gtol": 1e-8})
                elif method == "Nelder-Mead":
                    res = _opt.minimize(fun, x0, method=method,
                                        options={"maxiter": 4000, "xatol": 1e-8, "fatol": 1e-10, "adaptive": True})
                else:
                    res = _opt.minimize(fun, x0, method=method, options={"maxiter": 4000, "xtol": 1e-8, "ftol": 1e-12})
        except (ValueError, np.linalg.LinAlgError) as exc:  # pragma: no cover - reported in attempts
            attempts[method] = {"error": str(exc)}
            continue
        theta = _normalise_theta(np.asarray(res.x, dtype=float), factors)
        dev = fun(theta)
        grad = _projected_gradient(theta, fun, lower) if np.isfinite(dev) else np.full(theta.size, np.inf)
        ok = bool(np.isfinite(dev) and np.all(np.abs(grad) < GRADIENT_TOL))
        attempts[method] = {"deviance": float(dev), "max_abs_gradient": float(np.max(np.abs(grad))) if grad.size
                            else 0.0, "passed": ok, "message": str(getattr(res, "message", ""))}
        if ok:
            passing.append((dev, theta))
            passing.sort(key=lambda t: t[0])
        if np.isfinite(dev) and (best is None or dev < best[0] - 1e-10):
            best = (dev, theta, method, ok)
    if best is None:
        raise ConvergenceError("mixed model: every optimiser failed (" + "; ".join(
            f"{m}: {a.get('error', a.get('message'))}" for m, a in attempts.items()) + ")")
    dev, theta, method, ok = best
    if not ok and passing:
        # the lowest deviance failed the gradient check; a passing point within numerical noise is accepted
        if passing[0][0] <= dev + 1e-6:
            dev, theta = passing[0]
            ok = True
    if not ok:
        raise ConvergenceError(
            "mixed model did not converge with any optimiser ("
            + "; ".join(f"{m}: deviance {a.get('deviance', np.nan):.6g}, max |gradient| "
                        f"{a.get('max_abs_gradient', np.nan):.2g}" for m, a in attempts.items())
            + f"; gradient tolerance {GRADIENT_TOL}); simplify the random structure (e.g. random='1')"
        )
    ld_l, ld_x, r2, beta, L, q = _pls(theta, y, X, Z, factors)
    dev = _criterion(ld_l, ld_x, r2, X.shape, reml)  # from the direct residuals
    sigma2 = r2 / (n - p) if reml else r2 / n
    RX = L[q:, q:]
    cov_beta = sigma2 * _la.cho_solve((RX, True), np.eye(p))
    covs = [sigma2 * T @ T.T for T in _factor_T(theta, factors)]
    boundary = any(np.any(np.abs(np.diag(T)) < BOUNDARY_TOL) for T in _factor_T(theta, factors))
    return MixedFit(beta=beta, cov_beta=cov_beta, sigma2=sigma2, covariances=covs, theta=theta,
                    deviance=float(dev), reml=reml, converged=True, boundary=bool(boundary), optimizer=method,
                    n=n, p=p, attempts=attempts)


# --------------------------------------------------------------------------- Satterthwaite
def _phi(fit: MixedFit) -> np.ndarray:
    vals = []
    for S in fit.covariances:
        vals.extend(S[i, j] for i, j in _tril_index(S.shape[0]))
    vals.append(fit.sigma2)
    return np.asarray(vals, dtype=float)


def _satterthwaite_parts(fit: MixedFit, X: np.ndarray, factors: Sequence[RandomFactor]):
    """(C, dC/dphi, cov(phi)) at the fit, computed once and cached on the fit."""
    cached = fit.attempts.get("_satterthwaite")
    if cached is not None:
        return cached
    n = X.shape[0]
    Zs = _build_Z(factors, n)
    # V^-1 through Woodbury: V = sigma2 (I + ZL ZL'), ZL = Z Lambda(theta); avoids an n x n inversion
    ZL = _z_lambda(fit.theta, Zs, factors)
    A = _la.cho_factor(ZL.T @ ZL + np.eye(ZL.shape[1]), lower=True)
    Vinv = (np.eye(n) - ZL @ _la.cho_solve(A, ZL.T)) / fit.sigma2
    VX = Vinv @ X
    C = np.linalg.inv(X.T @ VX)
    P = Vinv - VX @ C @ VX.T if fit.reml else Vinv
    # every dV/dphi_k is a sum of low-rank products U W' (U, W: n x L covariate-by-level blocks, or I for the
    # residual), so traces and derivatives need only P @ U, never an n x n x n product
    mats: list[np.ndarray] = []
    pairs: list[list[tuple[int, int]]] = []
    for f, Zf in zip(factors, Zs):
        base = len(mats)
        L = f.n_levels
        for i in range(f.r):
            mats.append(Zf[:, i::f.r] if f.r > 1 else Zf)  # n x L: covariate i at each level
        for (i, j) in _tril_index(f.r):
            pairs.append([(base + i, base + j)] if i == j else [(base + i, base + j), (base + j, base + i)])
        del L
    IDENT = -1
    pairs.append([(IDENT, IDENT)])
    PZ = [P @ Z for Z in mats]

    def m(a: int, b: int) -> np.ndarray:  # a' P b
        if a == IDENT and b == IDENT:
            return P
        if a == IDENT:
            return PZ[b]
        if b == IDENT:
            return PZ[a].T
        return mats[a].T @ PZ[b]

    K = len(pairs)
    info = np.empty((K, K))
    for k in range(K):
        for l in range(k, K):
            tr = 0.0
            for (u, w) in pairs[k]:
                for (u2, w2) in pairs[l]:
                    tr += float(np.sum(m(w, u2) * m(w2, u).T))
            info[k, l] = info[l, k] = 0.5 * tr
    cov_phi = np.linalg.pinv(info)
    VXZ = [VX.T @ Z for Z in mats]

    def xb(a: int) -> np.ndarray:  # VX' a
        return VX.T if a == IDENT else VXZ[a]

    dC = np.stack([C @ sum(xb(u) @ xb(w).T for (u, w) in pr) @ C for pr in pairs])  # (K, p, p)
    fit.attempts["_satterthwaite"] = (C, dC, cov_phi)
    return C, dC, cov_phi


def satterthwaite(
    fit: MixedFit, X: np.ndarray, factors: Sequence[RandomFactor], L: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Satterthwaite degrees of freedom for each row of ``L`` (contrasts of the fixed effects).

    Returns ``(df, jacobians)`` where ``jacobians[m, k] = l_m' dC/dphi_k l_m``.

    Notes
    -----
    ``V(phi) = sum_k phi_k V_k``; ``C = (X' V^-1 X)^-1``; ``dC/dphi_k = C X'V^-1 V_k V^-1 X C``; the asymptotic
    covariance of ``phi`` is the inverse of the expected restricted information
    ``I_kl = tr(P V_k P V_l) / 2`` (``P = V^-1 - V^-1 X C X' V^-1``; for ML fits ``V^-1`` replaces ``P``);
    ``df = 2 (l'Cl)^2 / (g' I^-1 g)`` with ``g_k = l' dC/dphi_k l`` (Satterthwaite 1946; Giesbrecht & Burns 1985).
    """
    C, dC, cov_phi = _satterthwaite_parts(fit, X, factors)
    L = np.atleast_2d(L)
    var = np.einsum("mi,ij,mj->m", L, C, L)
    g = np.einsum("mi,kij,mj->mk", L, dC, L)
    denom = np.einsum("mk,kl,ml->m", g, cov_phi, g)
    with np.errstate(divide="ignore", invalid="ignore"):
        df = 2 * var**2 / denom
    return df, g


def _fai_cornelius(fit: MixedFit, X, factors, idx: Sequence[int]) -> tuple[float, float]:
    """F statistic and denominator df (Fai & Cornelius 1996) for the coefficients ``idx`` (numerator df len(idx))."""
    b = fit.beta[list(idx)]
    C = fit.cov_beta[np.ix_(idx, idx)]
    q = len(idx)
    F = float(b @ np.linalg.solve(C, b)) / q
    d, U = np.linalg.eigh(C)
    L = np.zeros((q, fit.p))
    L[:, list(idx)] = U.T
    nu, _ = satterthwaite(fit, X, factors, L)
    big = nu > 2
    E = float(np.sum(nu[big] / (nu[big] - 2)))
    df = 2 * E / (E - q) if E > q else float(np.min(nu))  # fallback: the most conservative single-direction df
    return F, df


# --------------------------------------------------------------------------- variance summaries
def _random_variance(f: RandomFactor, S: np.ndarray) -> float:
    """Mean over observations of z_i' S z_i (Johnson 2014): the variance this factor adds to one observation."""
    return float(np.mean(np.einsum("ni,ij,nj->n", f.Z, S, f.Z)))


def _snake(text: str) -> str:
    import re

    out = re.sub(r"[^0-9a-zA-Z]+", "_", str(text)).strip("_").lower()
    return out or "term"


def _fit_region(payload: dict) -> dict:
    """Fit one region (top-level so worker processes can run it)."""
    y, X, factors = payload["y"], payload["X"], payload["factors"]
    fit = fit_mixed(y, X, factors, reml=payload["reml"])
    out = {"fit": fit, "terms": []}
    df_method = payload["df_method"]
    level = payload["confidence"]
    for term, idx in payload["terms"].items():
        if len(idx) == 1:
            j = idx[0]
            est = fit.beta[j]
            se = float(np.sqrt(fit.cov_beta[j, j]))
            if df_method == "satterthwaite":
                L = np.zeros((1, fit.p))
                L[0, j] = 1.0
                df = float(satterthwaite(fit, X, factors, L)[0][0])
                dist = _st.t(df)
            else:
                df, dist = np.nan, _st.norm()
            stat = est / se
            crit = dist.ppf(0.5 + level / 2)
            out["terms"].append(dict(term=payload["names"][j], estimate=est, se=se, df=df, statistic=stat,
                                     statistic_type="t" if df_method == "satterthwaite" else "z",
                                     p=float(2 * dist.sf(abs(stat))), ci_low=est - crit * se, ci_high=est + crit * se,
                                     df1=np.nan))
        else:
            if df_method == "satterthwaite":
                F, df = _fai_cornelius(fit, X, factors, idx)
                p = float(_st.f.sf(F, len(idx), df))
            else:
                b = fit.beta[list(idx)]
                F = float(b @ np.linalg.solve(fit.cov_beta[np.ix_(idx, idx)], b)) / len(idx)
                df, p = np.inf, float(_st.chi2.sf(F * len(idx), len(idx)))
            out["terms"].append(dict(term=term, estimate=np.nan, se=np.nan, df=df, statistic=F, statistic_type="F",
                                     p=p, ci_low=np.nan, ci_high=np.nan, df1=float(len(idx))))
    # variance components, ICC, R2 (Nakagawa & Schielzeth 2013; random slopes: Johnson 2014)
    var_fixed = float(np.var(X @ fit.beta, ddof=1))
    var_random = [_random_variance(f, S) for f, S in zip(factors, fit.covariances)]
    total = var_fixed + sum(var_random) + fit.sigma2
    out["var_fixed"] = var_fixed
    out["var_random"] = var_random
    out["r2_marginal"] = var_fixed / total
    out["r2_conditional"] = (var_fixed + sum(var_random)) / total
    out["icc"] = var_random[0] / (sum(var_random) + fit.sigma2)
    return out


# --------------------------------------------------------------------------- the design
def _split_list(option, *, parameter: str) -> list[str] | None:
    if option is None:
        return None
    if isinstance(option, str):
        items = [s.strip() for s in option.split(",") if s.strip()]
    else:
        items = [str(s).strip() for s in option]
    if not items:
        raise UsageError(f"{parameter}: empty list; give one or more labels, e.g. 'novel,familiar'")
    return items


def _check_support(region, factors: Sequence[RandomFactor], X: np.ndarray, names: Sequence[str]) -> None:
    """DesignError when the data of a region cannot support the fixed or random structure."""
    n, p = X.shape
    if np.linalg.matrix_rank(X) < p:
        raise DesignError(f"mixed: in region {region!r} the fixed effects ({', '.join(names)}) are not estimable "
                          "(collinear or constant columns, e.g. a factor level without observations); simplify the "
                          "formula or select contrasts")
    if n - p < 1:
        raise DesignError(f"mixed: region {region!r} has {n} observations for {p} fixed effects; need more")
    for f in factors:
        L = f.n_levels
        if L < 2:
            raise DesignError(f"mixed: the random effects of {f.name!r} need at least 2 levels in region {region!r}, "
                              f"found {L}")
        for a, term in enumerate(f.terms):
            col = f.Z[:, a]
            if np.all(col == col[0]):
                continue  # intercept-like column
            means = np.bincount(f.codes, weights=col, minlength=L) / np.bincount(f.codes, minlength=L)
            if np.allclose(col, means[f.codes]):
                raise DesignError(
                    f"mixed: the random slope {term!r} does not vary within any level of {f.name!r} in region "
                    f"{region!r} (it is a between-{f.name} variable), so its variance cannot be separated from "
                    f"the random intercept; drop it from random=, e.g. random='1'"
                )
        if L * f.r >= n:
            raise DesignError(
                f"mixed: region {region!r}: {L} levels of {f.name!r} x {f.r} random effect(s) "
                f"({', '.join(f.terms)}) = {L * f.r} random effects for {n} observations; the data cannot support "
                "this random structure (the random effects must be fewer than the observations); use fewer random "
                "terms, e.g. random='1'"
            )


_MIXED_DESCRIPTIONS = {
    "random": "random terms per participant (random intercept '1', slopes ...)",
    "crossed": "column whose levels (e.g. stimuli) get a crossed random intercept; n/a if none",
    "estimation": "reml (restricted maximum likelihood) or ml",
    "converged": "true where an optimiser reached a point passing the gradient check (else ConvergenceError)",
    "boundary": "true where a random-effect SD is < 1e-4 x the residual SD (variance component at its boundary)",
    "sd_participant": "SD of the random participant intercept",
    "sd_residual": "residual SD",
    "icc": "participant variance / (all random-effect variances + residual variance)",
    "r2_marginal": "variance of the fixed-effect predictions / total variance (Nakagawa & Schielzeth 2013)",
    "r2_conditional": "(fixed + random-effect variance) / total variance (Nakagawa & Schielzeth 2013)",
    "n_participants": "participants with observations in this region",
    "n_stimuli": "levels of the crossed column with observations in this region (n/a without crossed)",
    "n_observations": "observations (rows) in this region's fit",
    "deviance": "minimised REML criterion (estimation reml) or -2 log-likelihood (ml)",
    "optimizer": "scipy optimiser whose solution was kept",
}
for _name, _text in _MIXED_DESCRIPTIONS.items():  # describe our columns in the results sidecar
    COLUMN_DESCRIPTIONS.setdefault(_name, _text)


@register("mixed")
def mixed(
    values: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    confidence: float = 0.95,
    formula: str | None = None,
    random: str = "1",
    crossed: str | None = None,
    contrast: str | Sequence[str] | None = None,
    reml: bool = True,
    df_method: Literal["satterthwaite", "z"] = "satterthwaite",
    center: bool = True,
    n_jobs: int = 1,
    executor=None,
) -> pd.DataFrame:
    """Linear mixed model per region with random participant effects and an optional crossed random intercept.

    Parameters
    ----------
    values : DataFrame
        Region values table; several rows per participant (contrasts, sessions, stimuli).
    participants : DataFrame, optional
        participants.tsv; its columns may be named in ``formula``.
    confidence : float
        Level of the confidence intervals.
    formula : str
        Fixed effects, e.g. ``"value ~ contrast * group"``; terms may name any column of the values table or of
        participants.tsv. Numeric variables are mean-centred (``center=False`` keeps them raw).
    random : str
        Random terms per participant: ``"1"`` (random intercept, default) or e.g. ``"1 + contrast"`` (random
        slopes with an unstructured covariance).
    crossed : str, optional
        Column (of the values table or participants.tsv) whose levels get a crossed random intercept, e.g.
        ``"contrast"`` when the contrasts are the six towns (stimuli).
    contrast : str or sequence of str, optional
        Contrasts to include (comma-separated); default all. Required when the table holds several contrasts and
        neither ``formula`` nor ``crossed`` names ``contrast``.
    reml : bool
        REML (default) or ML (for likelihood-ratio comparisons of fixed effects).
    df_method : {"satterthwaite", "z"}
        Satterthwaite t/F (default) or Wald z / chi-square (never the default).
    center : bool
        Mean-centre numeric predictors of ``formula``.
    n_jobs : int
        Worker processes across regions (1: in this process).
    executor : concurrent.futures.Executor, optional
        Fit the regions on this executor instead (e.g. ``client.get_executor()`` of a Dask cluster);
        ``n_jobs`` is then ignored. Results are identical to a serial run.

    Returns
    -------
    DataFrame
        One row per region x fixed effect (a single-column term gives a t row named by its coefficient; a
        multi-column term, such as a factor with three or more levels, one F row named by the term with
        ``df1`` the numerator and ``df`` the denominator df; estimate/se/ci n/a). Contract columns (``n`` is the
        number of participants; effect_size n/a: no standardised effect is defined here), common columns
        (formula, df_method, df1, excluded_ids = participants with at least one observation left out ...), and
        random, crossed, estimation, converged, boundary, sd_participant, sd_participant_<slope>,
        sd_<crossed>, sd_residual, icc, r2_marginal, r2_conditional, n_participants, n_stimuli, n_observations,
        deviance, optimizer, centered.

    Notes
    -----
    Fitted by profiled REML (:func:`fit_mixed`; several optimisers, best restricted likelihood kept; a
    ConvergenceError names the region when none passes the gradient check). Satterthwaite df from
    :func:`satterthwaite`; multi-df F after Fai & Cornelius (1996). R2 after Nakagawa & Schielzeth (2013),
    random-slope variance after Johnson (2014). Checked against statsmodels ``MixedLM`` (random intercept), the
    repeated-measures and split-plot ANOVA df of balanced designs, and the ANOVA expected mean squares of a
    balanced crossed design.

    Examples
    --------
    >>> from roikit.stats import run_design
    >>> run_design(values, "mixed", formula="value ~ contrast * group", random="1 + contrast",
    ...            contrast="novel,familiar", participants="participants.tsv")   # doctest: +SKIP
    """
    from ._common import join_ids, join_participants, region_order, result_rows, warn_exclusions

    context = "mixed"
    if formula is None:
        raise UsageError(f"mixed: no formula given; pass {spell('formula', example='value ~ contrast * group')}")
    if df_method not in ("satterthwaite", "z"):
        raise UsageError(f"df_method: found {df_method!r}, expected 'satterthwaite' (default) or 'z'")
    if isinstance(n_jobs, bool) or not isinstance(n_jobs, (int, np.integer)) or n_jobs < 1:
        raise UsageError(f"n_jobs: expected a positive integer, got {n_jobs!r}")
    rhs = _formula_rhs(formula)
    random = "1" if random is None else str(random)
    random_rhs = _formula_rhs(random, parameter="random")
    fixed_vars = [v for v in _required_variables(rhs) if v != "value"]
    random_vars = _required_variables(random_rhs, parameter="random")
    if crossed is not None:
        crossed = str(crossed)
        if crossed == "participant_id":
            raise DesignError("mixed: crossed 'participant_id' repeats the participant random effect; name another "
                              f"column (e.g. {spell('crossed', example='contrast')} for stimuli)")
    contrasts = _split_list(contrast, parameter="contrast")
    data = values
    if contrasts is not None:
        unknown = [c for c in contrasts if c not in set(values["contrast"])]
        if unknown:
            raise DesignError(f"mixed: contrast(s) {', '.join(unknown)} not found; available: "
                              f"{', '.join(map(str, pd.unique(values['contrast'])))}")
        data = values[values["contrast"].isin(contrasts)]
    used = set(fixed_vars) | set(random_vars) | ({crossed} if crossed else set())
    present = list(pd.unique(data["contrast"]))
    if len(present) > 1 and "contrast" not in used:
        raise DesignError(
            f"mixed: the values table holds {len(present)} contrasts ({', '.join(map(str, present))}) but neither "
            "formula, random nor crossed names 'contrast'; select the contrasts to model with "
            f"{spell('contrast', example='novel')} or add contrast to the formula"
        )
    data = data.reset_index(drop=True)
    from_participants = [v for v in sorted(used) if v not in data.columns]
    if from_participants:
        joined = join_participants(list(data["participant_id"].unique()), participants, from_participants)
        data = data.join(joined, on="participant_id")
    frame = data.copy()
    numeric_cols = []
    for name in sorted(used):
        col = frame[name]
        num = pd.to_numeric(col, errors="coerce") if name not in ("participant_id", "contrast", "region",
                                                                  "session_id") else None
        if num is not None and col.notna().sum() and num.notna().sum() == col.notna().sum() \
                and name != crossed:
            frame[name] = num.astype(float)
            numeric_cols.append(name)
        else:
            frame[name] = col.astype(object).where(col.notna(), None).map(lambda x: x if x is None else str(x))
    complete = frame[sorted(used)].notna().all(axis=1).to_numpy() & np.isfinite(frame["value"].to_numpy(float))
    regions = region_order(values)
    frame = frame[complete].reset_index(drop=True)
    centred: list[str] = []
    if center:
        frame, centred = _centre_numeric(frame, [v for v in numeric_cols if v in fixed_vars])
    X_all, names, terms = _design_matrix(rhs, frame)
    Zr_all, rnames, _ = _design_matrix(random_rhs, frame, parameter="random")
    # excluded observations, per region, named by participant
    dropped = data.loc[~complete, ["participant_id", "region"]]
    excluded = [list(pd.unique(dropped.loc[dropped["region"] == r, "participant_id"])) for r in regions]
    warn_exclusions(regions, excluded, context=context, reason="value or a formula variable missing")

    payloads = []
    region_meta = []
    for r in regions:
        rows = np.flatnonzero(frame["region"].to_numpy() == r)
        if rows.size == 0:
            raise DesignError(f"mixed: no complete observations in region {r!r}; check the missing values")
        pid_codes, pid_levels = pd.factorize(frame["participant_id"].to_numpy()[rows])
        factors = [RandomFactor("participant", pid_codes.astype(int), Zr_all[rows], rnames)]
        n_stim = np.nan
        if crossed is not None:
            c_codes, c_levels = pd.factorize(frame[crossed].to_numpy()[rows])
            factors.append(RandomFactor(crossed, c_codes.astype(int), np.ones((rows.size, 1)), ["Intercept"]))
            n_stim = len(c_levels)
        X = X_all[rows]
        _check_support(r, factors, X, names)
        payloads.append({"y": frame["value"].to_numpy(float)[rows], "X": X, "factors": factors, "reml": bool(reml),
                         "df_method": df_method, "confidence": confidence, "terms": terms, "names": names})
        region_meta.append({"n_participants": len(pid_levels), "n_stimuli": n_stim, "n_observations": rows.size})

    results = _run_regions(payloads, regions, n_jobs, executor)

    frames = []
    n_terms = len(results[0]["terms"])
    for t in range(n_terms):
        cols: dict[str, list] = {}
        for res in results:
            for key, val in res["terms"][t].items():
                cols.setdefault(key, []).append(val)
        term = cols.pop("term")[0]
        extra = _variance_columns(results, payloads, crossed)
        frames.append(result_rows(
            regions, design="mixed", term=term, confidence=confidence,
            n=[m["n_participants"] for m in region_meta], effect_size=np.nan, effect_size_type=None,
            contrast=",".join(map(str, contrasts if contrasts is not None else present)),
            formula=f"value ~ {rhs}", df_method=df_method, population_inference=True,
            excluded_ids=[join_ids(e) for e in excluded], **cols,
            random=random_rhs, crossed=crossed, estimation="reml" if reml else "ml",
            converged=[res["fit"].converged for res in results], boundary=[res["fit"].boundary for res in results],
            **extra,
            icc=[res["icc"] for res in results], r2_marginal=[res["r2_marginal"] for res in results],
            r2_conditional=[res["r2_conditional"] for res in results],
            n_participants=[m["n_participants"] for m in region_meta],
            n_stimuli=[m["n_stimuli"] for m in region_meta],
            n_observations=[m["n_observations"] for m in region_meta],
            deviance=[res["fit"].deviance for res in results], optimizer=[res["fit"].optimizer for res in results],
            centered=",".join(centred) if centred else None,
        ))
    out = pd.concat(frames, ignore_index=True)
    flagged = [r for r, res in zip(regions, results) if res["fit"].boundary]
    if flagged:
        warnings.warn(DiagnosticWarning(
            f"{context}: a random-effect variance is at its boundary (SD < {BOUNDARY_TOL:g} x residual SD) in "
            f"{len(flagged)} region{'s' if len(flagged) != 1 else ''}: {', '.join(flagged)}; the model is singular "
            "there (column 'boundary'); consider a simpler random structure", context=context,
            findings=[{"problem": "random-effect variance at its boundary (singular fit; column boundary)",
                       "region": r} for r in flagged]), stacklevel=3)
    return out


def _variance_columns(results, payloads, crossed) -> dict[str, list]:
    cols: dict[str, list] = {}
    pf = payloads[0]["factors"][0]
    for a, term in enumerate(pf.terms):
        name = "sd_participant" if term == "Intercept" else f"sd_participant_{_snake(term)}"
        cols[name] = [float(np.sqrt(res["fit"].covariances[0][a, a])) for res in results]
    if "sd_participant" not in cols:
        cols["sd_participant"] = [np.nan] * len(results)
    if crossed is not None:
        cols[f"sd_{_snake(crossed)}"] = [float(np.sqrt(res["fit"].covariances[1][0, 0])) for res in results]
    cols["sd_residual"] = [float(np.sqrt(res["fit"].sigma2)) for res in results]
    return cols


def _fit_region_one_thread(payload: dict) -> dict:
    """Fit one region with BLAS limited to one thread: these matrices are small, and threaded BLAS on
    small matrices was 3-4x slower on a busy 2-core machine (benchmarks/bench_mixed.py)."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        return _fit_region(payload)


def _run_regions(payloads: list[dict], regions: Sequence[str], n_jobs: int, executor=None) -> list[dict]:
    def _named(region, exc):
        return type(exc)(f"mixed: region {region!r}: {exc}")

    bar = progress_bar(show=len(payloads) >= 20, total=len(payloads), desc="mixed models", unit="region", leave=False)
    try:
        if executor is not None:
            return _collect(regions, [executor.submit(_fit_region_one_thread, p) for p in payloads], _named, bar)
        if n_jobs == 1 or len(payloads) == 1:
            out = []
            for region, payload in zip(regions, payloads):
                try:
                    out.append(_fit_region_one_thread(payload))
                except (ConvergenceError, DesignError) as exc:
                    raise _named(region, exc) from None
                bar.update(1)
            return out
        from concurrent.futures import ProcessPoolExecutor

        with ProcessPoolExecutor(max_workers=min(n_jobs, len(payloads))) as pool:
            return _collect(regions, [pool.submit(_fit_region_one_thread, p) for p in payloads], _named, bar)
    finally:
        bar.close()


def _collect(regions, futures, named, bar) -> list[dict]:
    """Results of per-region futures, in region order; a region's fitting error is raised with its name."""
    out = []
    for region, fut in zip(regions, futures):
        try:
            out.append(fut.result())
        except (ConvergenceError, DesignError) as exc:
            raise named(region, exc) from None
        bar.update(1)
    return out
