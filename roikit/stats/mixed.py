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

from .._options import noun, plural, progress_bar, spell
from ..errors import ConvergenceError, DesignError, DiagnosticWarning, UsageError
from ._common import COLUMN_DESCRIPTIONS, mergeable
from ._registry import register
from .precision import _design_matrix, _formula_rhs, _required_variables

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


_CLI_SPELLING = (("drop it from random=, e.g. random='1'", "drop it from --random, e.g. --random 1"),
                 ("random='1'", "--random 1"), ("crossed='contrast'", "--crossed contrast"),
                 ("nested='run'", "--nested run"), ("crossed='participant_id'", "--crossed participant_id"),
                 ("nested='participant_id'", "--nested participant_id"))


def _both(exc_type: type, text: str) -> Exception:
    """An exception in Python spelling whose ``cli_message`` names the same options as the command line does."""
    exc = exc_type(text)
    cli = text
    for python, command_line in _CLI_SPELLING:
        cli = cli.replace(python, command_line)
    exc.cli_message = cli
    return exc


def _fit_region(payload: dict) -> dict:
    """Fit one region (top-level so worker processes can run it)."""
    y, X, factors = payload["y"], payload["X"], payload["factors"]
    fit = fit_mixed(y, X, factors, reml=payload["reml"])
    return _summarise_region(payload, fit)


def _summarise_region(payload: dict, fit: MixedFit) -> dict:
    """Tests of the fixed effects, variance summaries, R2 of one region's fit."""
    X, factors = payload["X"], payload["factors"]
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


# --------------------------------------------------------------------------- all regions at once (random intercept)
#: relative variance ratios (participant variance / residual variance) of the starting grid of the batched fit
_RATIO_GRID = np.concatenate([[0.0], np.logspace(-8, 6, 57)])


class _InterceptBatch:
    """Profiled (restricted) likelihood of many regions at once for ``y = X b + u_participant + e``.

    Every region keeps its own rows (missing values differ between regions); arrays are padded to the longest
    region, and padded rows carry zeros, so they add nothing. With ``s = sigma_u^2 / sigma^2`` and per
    participant ``k_i`` observations, sums ``S_X,i`` and ``S_y,i``, the relative precision is
    ``V_s^-1 = I - Z diag(c) Z'`` with ``c_i = s / (1 + s k_i)``, so every quantity the criterion needs is a
    participant-level sum: ``X'V^-1X = X'X - sum_i c_i S_X,i S_X,i'`` (= R_X'R_X), ``log|L|^2 = sum_i log(1 + s k_i)``,
    ``r2 = y'V^-1y - b'(X'V^-1X)^-1 b``. The derivative in ``s`` is analytic:
    ``d r2/ds = -sum_i (S_y,i - S_X,i'beta)^2 / (1 + s k_i)^2``,
    ``d log|R_X|^2/ds = -sum_i S_X,i'(X'V^-1X)^-1 S_X,i / (1 + s k_i)^2``, ``d log|L|^2/ds = sum_i k_i / (1 + s k_i)``.
    This is the criterion of :func:`fit_mixed` (Bates et al. 2015) for one scalar ``theta = sqrt(s)``; for a
    balanced design its minimum is the ANOVA closed form (between-participant variance
    ``max(0, (MS_participant - MS_error) / k)``), which the tests check.
    """

    def __init__(self, payloads: Sequence[dict], reml: bool):
        R = len(payloads)
        p = payloads[0]["X"].shape[1]
        n_max = max(len(pl["y"]) for pl in payloads)
        N = max(pl["factors"][0].n_levels for pl in payloads)
        X = np.zeros((R, n_max, p))
        y = np.zeros((R, n_max))
        onehot = np.zeros((R, n_max, N))
        n = np.empty(R)
        for r, pl in enumerate(payloads):
            m = len(pl["y"])
            X[r, :m] = pl["X"]
            y[r, :m] = pl["y"]
            onehot[r, np.arange(m), pl["factors"][0].codes] = 1.0
            n[r] = m
        self.R, self.p, self.N, self.reml = R, p, N, reml
        self.X, self.y, self.onehot, self.n = X, y, onehot, n
        self.dof = n - p if reml else n
        self.k = onehot.sum(1)
        self.SX = np.einsum("rnk,rnp->rkp", onehot, X)
        self.XtX = np.einsum("rnp,rnq->rpq", X, X)
        # the criterion from y centred where X holds a constant column (r2 unchanged, no precision lost)
        rows = np.arange(n_max)[None, :] < n[:, None]
        const = np.array([bool(np.any(np.all(pl["X"] == pl["X"][:1], axis=0) & (pl["X"][0] != 0)))
                          for pl in payloads])
        shift = np.where(const, y.sum(1) / n, 0.0)
        yc = np.where(rows, y - shift[:, None], 0.0)
        self._set_y(yc)
        self._raw = y

    def _set_y(self, y):
        self.Sy = np.einsum("rnk,rn->rk", self.onehot, y)
        self.Xty = np.einsum("rnp,rn->rp", self.X, y)
        self.yty = np.einsum("rn,rn->r", y, y)

    def evaluate(self, s: np.ndarray, *, grad: bool = True):
        """(criterion, d criterion / ds, beta, A = X'V_s^-1 X) for every region at its own ratio ``s``."""
        s = np.asarray(s, dtype=float)
        sk = s[:, None] * self.k
        d = 1.0 / (1.0 + sk)
        c = s[:, None] * d
        cSX = c[..., None] * self.SX
        A = self.XtX - np.swapaxes(cSX, 1, 2) @ self.SX
        b = self.Xty - (np.swapaxes(cSX, 1, 2) @ self.Sy[..., None])[..., 0]
        yvy = self.yty - (c * self.Sy**2).sum(1)
        sign, ldx = np.linalg.slogdet(A)
        ok = sign > 0
        A_safe = np.where(ok[:, None, None], A, np.eye(self.p)[None])
        beta = np.linalg.solve(A_safe, b[..., None])[..., 0]
        r2 = yvy - (b * beta).sum(1)
        ok &= r2 > 0
        with np.errstate(invalid="ignore", divide="ignore"):
            ldl = np.log1p(sk).sum(1)
            crit = ldl + self.dof * (1 + np.log(2 * np.pi * np.where(ok, r2, 1.0) / self.dof))
            if self.reml:
                crit = crit + ldx
        crit = np.where(ok, crit, np.inf)
        if not grad:
            return crit, None, beta, A_safe
        dc = d**2
        q = np.einsum("rkp,rkp->rk", self.SX, np.linalg.solve(A_safe, np.swapaxes(self.SX, 1, 2)).swapaxes(1, 2))
        resid = self.Sy - np.einsum("rkp,rp->rk", self.SX, beta)
        with np.errstate(invalid="ignore", divide="ignore"):
            deriv = (self.k * d).sum(1) - self.dof * (dc * resid**2).sum(1) / r2
            if self.reml:
                deriv = deriv - (dc * q).sum(1)
        return crit, np.where(ok, deriv, np.nan), beta, A_safe

    def minimise(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(s, criterion, max |gradient in theta|) per region: grid, then bisection on the analytic derivative."""
        grid = _RATIO_GRID
        values = np.stack([self.evaluate(np.full(self.R, g), grad=False)[0] for g in grid], axis=1)  # (R, G)
        j = np.argmin(values, axis=1)
        lo = grid[np.maximum(j - 1, 0)]
        hi = grid[np.minimum(j + 1, grid.size - 1)]
        _, d_lo, _, _ = self.evaluate(lo)
        _, d_hi, _, _ = self.evaluate(hi)
        bisect = (d_lo < 0) & (d_hi > 0)
        a, b = lo.copy(), hi.copy()
        for _ in range(80):
            mid = 0.5 * (a + b)
            _, dm, _, _ = self.evaluate(np.where(bisect, mid, lo))
            a = np.where(bisect & (dm < 0), mid, a)
            b = np.where(bisect & ~(dm < 0), mid, b)
            if np.all(~bisect | (b - a <= 1e-15 * np.maximum(b, 1e-300))):
                break
        candidates = np.stack([grid[j], np.where(bisect, 0.5 * (a + b), grid[j]), np.zeros(self.R)], axis=1)
        crits = np.stack([self.evaluate(candidates[:, t], grad=False)[0] for t in range(3)], axis=1)
        best = np.argmin(crits, axis=1)
        s = candidates[np.arange(self.R), best]
        crit, deriv, _, _ = self.evaluate(s)
        # gradient in theta = sqrt(s), as fit_mixed checks it (zero at the boundary, where only s > 0 is allowed)
        grad_theta = np.where(s > 0, 2 * np.sqrt(s) * np.abs(deriv), 0.0)
        at_edge = (j == grid.size - 1) | ~np.isfinite(crit)
        return s, crit, np.where(at_edge, np.inf, grad_theta)

    def finish(self, s: np.ndarray) -> dict[str, np.ndarray]:
        """Estimates at ``s``: beta (raw y), sigma2, the participant variance, cov(beta), deviance."""
        self._set_y(self._raw)
        crit, _, beta, A = self.evaluate(s, grad=False)
        sk = s[:, None] * self.k
        c = s[:, None] * (1.0 / (1.0 + sk))
        b = self.Xty - np.einsum("rk,rkp,rk->rp", c, self.SX, self.Sy)
        yvy = self.yty - (c * self.Sy**2).sum(1)
        r2 = yvy - (b * beta).sum(1)
        sigma2 = r2 / self.dof
        Ainv = np.linalg.inv(A)
        return {"beta": beta, "sigma2": sigma2, "var_u": s * sigma2, "cov_beta": sigma2[:, None, None] * Ainv,
                "deviance": crit, "s": s}

    def satterthwaite_parts(self, est: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(C, dC/dphi (R, 2, p, p), cov(phi) (R, 2, 2)) with phi = (participant variance, residual variance).

        The same quantities as :func:`_satterthwaite_parts`, from participant-level sums:
        ``V^-1 = (I - Z diag(c) Z') / sigma2``, ``G = V^-1 X``, ``Z'G = diag(d) S_X / sigma2`` (``d_i = 1/(1+s k_i)``),
        ``P = V^-1 - G C G'`` (ML: ``V^-1``); information ``I_11 = ||Z'PZ||^2 / 2``, ``I_12 = ||PZ||^2 / 2``,
        ``I_22 = ||P||^2 / 2`` (Frobenius norms).
        """
        s, sigma2, C = est["s"], est["sigma2"], est["cov_beta"]
        k, SX, onehot = self.k, self.SX, self.onehot
        d = 1.0 / (1.0 + s[:, None] * k)
        c = s[:, None] * d
        inv_s2 = 1.0 / sigma2
        G = (self.X - np.einsum("rnk,rk,rkp->rnp", onehot, c, SX)) * inv_s2[:, None, None]
        ZG = d[..., None] * SX * inv_s2[:, None, None]
        dC1 = C @ np.swapaxes(ZG, 1, 2) @ ZG @ C
        GtG = np.swapaxes(G, 1, 2) @ G
        dC2 = C @ GtG @ C
        # V^-1 Z: row i holds d[code_i] / sigma2 in its participant's column
        VZ = onehot * (d * inv_s2[:, None])[:, None, :]
        ZVZ = k * d * inv_s2[:, None]  # diagonal of Z'V^-1Z
        # ||V^-1||_F^2 = sum over participants of (k - 2 c k + c^2 k^2) / sigma2^2
        vv = (k - 2 * c * k + c**2 * k**2).sum(1) * inv_s2**2
        if self.reml:
            GC = G @ C
            PZ = VZ - GC @ np.swapaxes(ZG, 1, 2)
            ZPZ = -(ZG @ C @ np.swapaxes(ZG, 1, 2))
            ZPZ[:, np.arange(self.N), np.arange(self.N)] += ZVZ
            # G'V^-1G = (G'G - (Z'G)' diag(c) (Z'G)) / sigma2
            GVG = (GtG - np.swapaxes(ZG, 1, 2) @ (c[..., None] * ZG)) * inv_s2[:, None, None]
            CG = C @ GtG
            tr_pp = vv - 2 * np.einsum("rij,rji->r", C, GVG) + np.einsum("rij,rji->r", CG, CG)
        else:
            PZ = VZ
            ZPZ = np.zeros((self.R, self.N, self.N))
            ZPZ[:, np.arange(self.N), np.arange(self.N)] = ZVZ
            tr_pp = vv
        info = np.empty((self.R, 2, 2))
        info[:, 0, 0] = 0.5 * np.einsum("rij,rij->r", ZPZ, ZPZ)
        info[:, 0, 1] = info[:, 1, 0] = 0.5 * np.einsum("rij,rij->r", PZ, PZ)
        info[:, 1, 1] = 0.5 * tr_pp
        cov_phi = np.linalg.pinv(info)
        return C, np.stack([dC1, dC2], axis=1), cov_phi


def _fit_intercept_batch(payloads: Sequence[dict]) -> tuple[list[dict | None], dict]:
    """Fit every region's random-intercept model at once; ``None`` where the batched fit fails its checks
    (those regions go to :func:`fit_mixed`). Returns the per-region results (as :func:`_fit_region`) and timing-free
    diagnostics."""
    first = payloads[0]
    reml, df_method, level = first["reml"], first["df_method"], first["confidence"]
    batch = _InterceptBatch(payloads, reml)
    s, _, grad = batch.minimise()
    est = batch.finish(s)
    ok = np.isfinite(est["deviance"]) & (grad < GRADIENT_TOL) & np.isfinite(est["sigma2"]) & (est["sigma2"] > 0)
    C, dC, cov_phi = batch.satterthwaite_parts(est)
    R, p = batch.R, batch.p
    beta = est["beta"]
    out: list[dict | None] = []
    term_rows: list[list[dict]] = [[] for _ in range(R)]
    for term, idx in first["terms"].items():
        if len(idx) == 1:
            j = idx[0]
            b = beta[:, j]
            se = np.sqrt(C[:, j, j])
            stat = b / se
            if df_method == "satterthwaite":
                g = dC[:, :, j, j]
                with np.errstate(divide="ignore", invalid="ignore"):
                    df = 2 * C[:, j, j] ** 2 / np.einsum("rk,rkl,rl->r", g, cov_phi, g)
                crit = _st.t.ppf(0.5 + level / 2, df)
                pval = 2 * _st.t.sf(np.abs(stat), df)
            else:
                df = np.full(R, np.nan)
                crit = np.full(R, _st.norm.ppf(0.5 + level / 2))
                pval = 2 * _st.norm.sf(np.abs(stat))
            for r in range(R):
                term_rows[r].append(dict(term=first["names"][j], estimate=float(b[r]), se=float(se[r]),
                                         df=float(df[r]), statistic=float(stat[r]),
                                         statistic_type="t" if df_method == "satterthwaite" else "z",
                                         p=float(pval[r]), ci_low=float(b[r] - crit[r] * se[r]),
                                         ci_high=float(b[r] + crit[r] * se[r]), df1=np.nan))
        else:
            q = len(idx)
            ix = np.ix_(idx, idx)
            Cs = C[:, ix[0], ix[1]]
            bs = beta[:, idx]
            F = np.einsum("rq,rq->r", bs, np.linalg.solve(Cs, bs[..., None])[..., 0]) / q
            if df_method == "satterthwaite":
                lam, U = np.linalg.eigh(Cs)
                g = np.einsum("rqm,rkqt,rtm->rmk", U, dC[:, :, ix[0], ix[1]], U)  # (R, q, 2)
                with np.errstate(divide="ignore", invalid="ignore"):
                    nu = 2 * lam**2 / np.einsum("rmk,rkl,rml->rm", g, cov_phi, g)
                    E = np.where(nu > 2, nu / (nu - 2), 0.0).sum(1)
                df = np.where(E > q, 2 * E / (E - q), nu.min(1))
                pval = _st.f.sf(F, q, df)
            else:
                df = np.full(R, np.inf)
                pval = _st.chi2.sf(F * q, q)
            for r in range(R):
                term_rows[r].append(dict(term=term, estimate=np.nan, se=np.nan, df=float(df[r]),
                                         statistic=float(F[r]), statistic_type="F", p=float(pval[r]), ci_low=np.nan,
                                         ci_high=np.nan, df1=float(q)))
    for r in range(R):
        if not ok[r]:
            out.append(None)
            continue
        pl = payloads[r]
        X = pl["X"]
        var_u = float(est["var_u"][r])
        sigma2 = float(est["sigma2"][r])
        fit = MixedFit(beta=beta[r], cov_beta=C[r], sigma2=sigma2, covariances=[np.array([[var_u]])],
                       theta=np.array([np.sqrt(s[r])]), deviance=float(est["deviance"][r]), reml=reml,
                       converged=True, boundary=bool(np.sqrt(s[r]) < BOUNDARY_TOL), optimizer="batched-profiled",
                       n=int(batch.n[r]), p=p, attempts={"batched": {"max_abs_gradient": float(grad[r])}})
        var_fixed = float(np.var(X @ beta[r], ddof=1))
        total = var_fixed + var_u + sigma2
        out.append({"fit": fit, "terms": term_rows[r], "var_fixed": var_fixed, "var_random": [var_u],
                    "r2_marginal": var_fixed / total, "r2_conditional": (var_fixed + var_u) / total,
                    "icc": var_u / (var_u + sigma2)})
    return out, {"n_fallback": int((~ok).sum())}



# --------------------------------------------------------------------------- all regions at once (one grouping factor)
class _BlockBatch:
    """Profiled (restricted) likelihood of many regions at once for one grouping factor with ``r`` random effects
    (random intercept and slopes per participant, unstructured covariance).

    With a single grouping factor ``Lambda' Z'Z Lambda + I`` is block diagonal, one ``r x r`` block per
    participant, so the penalised least-squares system of Bates et al. (2015, eqs. 18-42) reduces to
    participant-level cross-products ``Z_i'Z_i``, ``Z_i'X_i``, ``Z_i'y_i``: with ``L_i L_i' = T'Z_i'Z_iT + I``,
    ``R_ZX,i = L_i^-1 T'Z_i'X_i``, ``c_u,i = L_i^-1 T'Z_i'y_i``: ``R_X'R_X = X'X - sum_i R_ZX,i'R_ZX,i``,
    ``r2 = y'y - sum_i |c_u,i|^2 - b'(R_X'R_X)^-1 b`` with ``b = X'y - sum_i R_ZX,i'c_u,i``,
    ``log|L|^2 = sum_i log|L_i|^2``. The same criterion as :func:`fit_mixed` evaluates, for every region at once.
    """

    def __init__(self, payloads: Sequence[dict], reml: bool):
        R = len(payloads)
        f0 = payloads[0]["factors"][0]
        p = payloads[0]["X"].shape[1]
        q = f0.r
        N = max(pl["factors"][0].n_levels for pl in payloads)
        self.R, self.p, self.q, self.N, self.reml = R, p, q, N, reml
        self.ZtZ = np.zeros((R, N, q, q))
        self.ZtX = np.zeros((R, N, q, p))
        self.Zty = np.zeros((R, N, q))
        self.XtX = np.zeros((R, p, p))
        self.Xty = np.zeros((R, p))
        self.yty = np.zeros(R)
        self.n = np.empty(R)
        for r, pl in enumerate(payloads):
            X, y, f = pl["X"], pl["y"], pl["factors"][0]
            if np.any(np.all(X == X[:1], axis=0) & (X[0] != 0)):
                y = y - y.mean()  # r2 unchanged where X holds a constant column; no precision lost to the mean
            onehot = np.zeros((len(y), N))
            onehot[np.arange(len(y)), f.codes] = 1.0
            Zw = onehot[:, :, None] * f.Z[:, None, :]  # (n, N, q)
            self.ZtZ[r] = np.einsum("nka,nb->kab", Zw, f.Z)
            self.ZtX[r] = np.einsum("nka,np->kap", Zw, X)
            self.Zty[r] = np.einsum("nka,n->ka", Zw, y)
            self.XtX[r] = X.T @ X
            self.Xty[r] = X.T @ y
            self.yty[r] = y @ y
            self.n[r] = len(y)
        self.dof = self.n - p if reml else self.n
        self.tri = _tril_index(q)
        self.diag = np.array([i == j for i, j in self.tri])

    def _T(self, theta):
        T = np.zeros((theta.shape[0], self.q, self.q))
        for t, (i, j) in enumerate(self.tri):
            T[:, i, j] = theta[:, t]
        return T

    def criterion(self, theta: np.ndarray, idx: np.ndarray | None = None) -> np.ndarray:
        """Profiled criterion of the regions ``idx`` (default all) at their ``theta`` (one row per region)."""
        ZtZ, ZtX, Zty, XtX, Xty, yty, dof = (self.ZtZ, self.ZtX, self.Zty, self.XtX, self.Xty, self.yty, self.dof)
        if idx is not None:
            ZtZ, ZtX, Zty, XtX, Xty, yty, dof = (a[idx] for a in (ZtZ, ZtX, Zty, XtX, Xty, yty, dof))
        T = self._T(theta)
        Tt = np.swapaxes(T, 1, 2)[:, None]
        M = Tt @ ZtZ @ T[:, None]
        M = M + np.eye(self.q)
        try:
            L = np.linalg.cholesky(M)
        except np.linalg.LinAlgError:
            return np.full(theta.shape[0], np.inf)
        ld_l = 2 * np.log(np.diagonal(L, axis1=2, axis2=3)).sum((1, 2))
        # one solve for [T'Z'X | T'Z'y] per participant block
        rhs = Tt @ np.concatenate([ZtX, Zty[..., None]], axis=3)
        sol = np.linalg.solve(L, rhs)
        R_, N_ = sol.shape[:2]
        flat = sol.reshape(R_, N_ * self.q, self.p + 1)
        G = np.swapaxes(flat, 1, 2) @ flat  # (R, p+1, p+1): [R_ZX'R_ZX, R_ZX'c_u; ., |c_u|^2]
        A = XtX - G[:, :self.p, :self.p]
        b = Xty - G[:, :self.p, self.p]
        cu2 = G[:, self.p, self.p]
        sign, ld_x = np.linalg.slogdet(A)
        ok = sign > 0
        A = np.where(ok[:, None, None], A, np.eye(self.p))
        beta = np.linalg.solve(A, b[..., None])[..., 0]
        r2 = yty - cu2 - (b * beta).sum(1)
        ok &= r2 > 0
        with np.errstate(invalid="ignore", divide="ignore"):
            crit = ld_l + dof * (1 + np.log(2 * np.pi * np.where(ok, r2, 1.0) / dof))
            if self.reml:
                crit = crit + ld_x
        return np.where(ok, crit, np.inf)

    def _gradient_hessian(self, theta, f0, h, idx):
        """Finite-difference gradient and Hessian of the regions ``idx`` (all of them per evaluation): central
        differences, forward ones for a diagonal element at its bound."""
        R, k = theta.shape
        at_bound = self.diag[None, :] & (theta < h)
        g = np.zeros((R, k))
        H = np.zeros((R, k, k))
        fp = np.zeros((R, k))
        for a in range(k):
            e = np.zeros(k)
            e[a] = h
            fp[:, a] = self.criterion(theta + e, idx)
            fm = self.criterion(np.where(at_bound[:, a:a + 1], theta + 2 * e, theta - e), idx)  # f(+2h) at a bound
            central = ~at_bound[:, a]
            g[:, a] = np.where(central, (fp[:, a] - fm) / (2 * h), (-3 * f0 + 4 * fp[:, a] - fm) / (2 * h))
            H[:, a, a] = np.where(central, (fp[:, a] - 2 * f0 + fm) / h**2, (fm - 2 * fp[:, a] + f0) / h**2)
        for a in range(k):
            for b in range(a + 1, k):
                e = np.zeros(k)
                e[a] = e[b] = h
                H[:, a, b] = H[:, b, a] = (self.criterion(theta + e, idx) - fp[:, a] - fp[:, b] + f0) / h**2
        return g, H

    def minimise(self, theta0: np.ndarray, *, iterations: int = 100) -> tuple[np.ndarray, np.ndarray]:
        """Damped Newton steps for every region at once, each region until it converges.

        The diagonal of T is bounded below by 0. A step moves at most 90% of the way to that bound (as interior
        methods do), so a region does not land on the boundary by accident; a diagonal element below 1e-7 whose
        gradient points outwards is set to 0 and held there.
        """
        theta = theta0.copy()
        k = theta.shape[1]
        f = self.criterion(theta)
        done = ~np.isfinite(f)
        for _ in range(iterations):
            idx = np.flatnonzero(~done)
            if not idx.size:
                break
            th, fa = theta[idx], f[idx]
            g, H = self._gradient_hessian(th, fa, 1e-6, idx)
            tiny = self.diag[None, :] & (th < 1e-7) & (g > 0)
            th = np.where(tiny, 0.0, th)
            fixed = self.diag[None, :] & (th <= 0) & (g > 0)
            free = ~fixed
            gf = np.where(free, g, 0.0)
            Hf = np.where(free[:, :, None] & free[:, None, :], H, 0.0)
            Hf = Hf + np.where(fixed[:, :, None], np.eye(k)[None], 0.0)
            w, V = np.linalg.eigh(Hf)
            w = np.maximum(np.abs(w), 1e-8 * np.maximum(np.abs(w).max(1, keepdims=True), 1.0))
            step = -np.einsum("rij,rj,rkj,rk->ri", V, 1 / w, V, gf)
            step = np.where(free, step, 0.0)
            with np.errstate(divide="ignore", invalid="ignore"):
                room = np.where(self.diag[None, :] & (step < 0) & (th > 0), 0.9 * th / -step, np.inf)
            t = np.minimum(1.0, room.min(1))
            fa = self.criterion(th, idx)
            new = np.maximum(th + t[:, None] * step, np.where(self.diag, 0.0, -np.inf))
            fn = self.criterion(new, idx)
            for _h in range(40):  # halve until the criterion does not increase
                worse = ~(fn <= fa)
                if not worse.any():
                    break
                t = np.where(worse, t / 2, t)
                new = np.where(worse[:, None], np.maximum(th + t[:, None] * step, np.where(self.diag, 0.0, -np.inf)),
                               new)
                fn = np.where(worse, self.criterion(new, idx), fn)
            # the full step projected onto the bound, taken where it is better still (reaches boundary optima in one
            # step instead of creeping towards them)
            proj = np.maximum(th + step, np.where(self.diag, 0.0, -np.inf))
            fp_ = self.criterion(proj, idx)
            take = fp_ < fn
            new = np.where(take[:, None], proj, new)
            fn = np.where(take, fp_, fn)
            improve = fn <= fa
            change = np.abs(np.where(improve[:, None], new, th) - th).max(1)
            gain = np.where(improve, fa - fn, 0.0)
            theta[idx] = np.where(improve[:, None], new, th)
            f[idx] = np.where(improve, fn, fa)
            done[idx] = (change < 1e-9) | ((gain < 1e-11) & (np.abs(gf).max(1) < 1e-6)) | ~improve
        return theta, f


#: largest number of array elements (regions x observations x participants) one batched fit may hold at once
_BATCH_ELEMENTS = 10_000_000


def _chunks(payloads: Sequence[dict]) -> list[Sequence[dict]]:
    """Regions in groups small enough for the batched fits' padded arrays (about 80 MB each at most)."""
    per_region = max(len(pl["y"]) * pl["factors"][0].n_levels * pl["factors"][0].r for pl in payloads)
    size = max(1, _BATCH_ELEMENTS // max(per_region, 1))
    return [payloads[i:i + size] for i in range(0, len(payloads), size)]


def _fit_block_batch(payloads: Sequence[dict]) -> list[dict | None]:
    """Fit every region's model with one grouping factor (random intercept and slopes) at once; ``None`` where the
    result fails the gradient check of :func:`fit_mixed` (those regions are refitted region by region)."""
    first = payloads[0]
    reml = first["reml"]
    factors0 = first["factors"]
    batch = _BlockBatch(payloads, reml)
    R = batch.R
    start = np.tile(_theta_start(factors0), (R, 1))
    best_theta, best_f = batch.minimise(start)
    for scale in (0.1, 3.0):  # further starts; keep each region's lowest criterion
        theta, f = batch.minimise(start * scale)
        better = f < best_f - 1e-10
        best_theta = np.where(better[:, None], theta, best_theta)
        best_f = np.where(better, f, best_f)
    out: list[dict | None] = []
    lower = _theta_lower(factors0)
    for r, pl in enumerate(payloads):
        y, X, factors = pl["y"], pl["X"], pl["factors"]
        theta = _normalise_theta(best_theta[r], factors)
        if not np.isfinite(best_f[r]):
            out.append(None)
            continue
        Zs = _build_Z(factors, len(y))
        fun = _CrossProducts(y, X, Zs, factors, reml)
        grad = _projected_gradient(theta, fun, lower)
        if not np.all(np.abs(grad) < GRADIENT_TOL):
            out.append(None)
            continue
        n, p = X.shape
        ld_l, ld_x, r2, beta, L, q = _pls(theta, y, X, Zs, factors)
        dev = _criterion(ld_l, ld_x, r2, X.shape, reml)
        sigma2 = r2 / (n - p) if reml else r2 / n
        cov_beta = sigma2 * _la.cho_solve((L[q:, q:], True), np.eye(p))
        Ts = _factor_T(theta, factors)
        fit = MixedFit(beta=beta, cov_beta=cov_beta, sigma2=sigma2, covariances=[sigma2 * T @ T.T for T in Ts],
                       theta=theta, deviance=float(dev), reml=reml, converged=True,
                       boundary=bool(any(np.any(np.abs(np.diag(T)) < BOUNDARY_TOL) for T in Ts)),
                       optimizer="batched-profiled", n=n, p=p,
                       attempts={"batched": {"deviance": float(dev), "max_abs_gradient": float(np.max(np.abs(grad)))}})
        out.append(_summarise_region(pl, fit))
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
                raise _both(
                    DesignError,
                    f"mixed: the random slope {term!r} does not vary within any level of {f.name!r} in region "
                    f"{region!r} (it is a between-{f.name} variable), so its variance cannot be separated from "
                    f"the random intercept; drop it from random=, e.g. random='1'"
                )
        if L * f.r >= n:
            raise _both(
                DesignError,
                f"mixed: region {region!r}: {L} levels of {f.name!r} x {plural(f.r, 'random effect')} "
                f"({', '.join(f.terms)}) = {L * f.r} random effects for {n} observations; the data cannot support "
                "this random structure (the random effects must be fewer than the observations); use fewer random "
                "terms, e.g. random='1'"
            )


_MIXED_DESCRIPTIONS = {
    "random": "random terms per participant (random intercept '1', slopes ...)",
    "crossed": "column whose levels (e.g. stimuli) get a crossed random intercept; n/a if none",
    "nested": "column whose levels get a random intercept within each participant (labels made unique per "
              "participant, as (1 | participant/column)); n/a if none",
    "estimation": "reml (restricted maximum likelihood) or ml",
    "converged": "true where an optimiser reached a point passing the gradient check (else ConvergenceError)",
    "boundary": "true where a random-effect SD is < 1e-4 x the residual SD (variance component at its boundary) or "
                "the participant covariance is singular; boundary_terms names which",
    "boundary_terms": "the variance components at the boundary, comma-separated, named as their columns "
                      "(sd_participant_load: SD < 1e-4 x residual SD; corr_participant_load: correlation at +-1; "
                      "'participant covariance': singular otherwise); empty if none",
    "sd_participant": "SD of the random participant intercept",
    "sd_residual": "residual SD",
    "icc": "participant variance / (all random-effect variances + residual variance)",
    "r2_marginal": "variance of the fixed-effect predictions / total variance (Nakagawa & Schielzeth 2013)",
    "r2_conditional": "(fixed + random-effect variance) / total variance (Nakagawa & Schielzeth 2013)",
    "n_participants": "participants with observations in this region",
    "n_stimuli": "levels of the crossed column with observations in this region (n/a without crossed)",
    "n_nested": "levels of the nested column within participants (participant x level pairs) in this region "
                "(n/a without nested)",
    "n_observations": "observations (rows) in this region's fit",
    "n_excluded_observations": "observations of this region left out (value or a model variable missing)",
    "n_excluded_participants": "participants left out of this region entirely (no complete observation); "
                               "excluded_ids also lists those with only some observations left out",
    "deviance": "minimised REML criterion (estimation reml) or -2 log-likelihood (ml)",
    "optimizer": "optimiser whose solution was kept: 'batched-profiled' (all regions' models with the participant "
                 "as the only grouping factor minimised together: a random intercept on the analytic derivative of "
                 "the profiled criterion, random slopes by damped Newton steps) or the scipy optimiser of the "
                 "region-by-region fit",
    "variance_total": "sum of the variance components (random intercepts, random slopes as they add to one "
                      "observation, residual): the denominator of effect_size d_wkj",
}
for _name, _text in _MIXED_DESCRIPTIONS.items():  # describe our columns in the results sidecar
    COLUMN_DESCRIPTIONS.setdefault(_name, _text)


def _describe_dynamic(columns: Sequence[str]) -> dict[str, str]:
    """Descriptions of the columns named after model terms (sd_participant_<slope>, corr_..., sd_<crossed>)."""
    out = {}
    for c in columns:
        if c.startswith("sd_participant_"):
            out[c] = f"SD of the random participant slope of {c[len('sd_participant_'):]}"
        elif c.startswith("corr_participant_") and "_with_" in c:
            a, b = c[len("corr_participant_"):].split("_with_", 1)
            out[c] = f"correlation of the random participant slopes of {a} and {b}"
        elif c.startswith("corr_participant_"):
            out[c] = f"correlation of the random participant intercept and slope of {c[len('corr_participant_'):]}"
        elif c.startswith("sd_") and c not in ("sd_participant", "sd_residual"):
            out[c] = f"SD of the random intercept of {c[3:]} (crossed, or nested within participant)"
    return out


@register("mixed")
def mixed(
    values: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    confidence: float = 0.95,
    formula: str | None = None,
    random: str = "1",
    crossed: str | None = None,
    nested: str | None = None,
    contrast: str | Sequence[str] | None = None,
    contrasts: pd.DataFrame | str | None = None,
    region_table: pd.DataFrame | str | None = None,
    estimation: Literal["reml", "ml"] | None = None,
    reml: bool = True,
    df_method: Literal["satterthwaite", "z"] = "satterthwaite",
    center: bool = True,
    n_jobs: int = 1,
    executor=None,
) -> pd.DataFrame:
    """Linear mixed model per region with random participant effects and optional crossed or nested intercepts.

    Parameters
    ----------
    values : DataFrame
        Region values table; several rows per participant (contrasts, sessions, stimuli).
    participants : DataFrame, optional
        participants.tsv; its columns may be named in ``formula``.
    confidence : float
        Level of the confidence intervals.
    formula : str
        Fixed effects, e.g. ``"value ~ contrast * group"`` or ``"value ~ load"``; terms may name any column of the
        values table, contrasts.tsv, regions.tsv or participants.tsv. Numeric variables are mean-centred within
        each region (``center=False`` keeps them raw).
    random : str
        Random terms per participant: ``"1"`` (random intercept, default) or e.g. ``"1 + load"`` (random
        slopes with an unstructured covariance).
    crossed : str, optional
        Column whose levels get a crossed random intercept, e.g. ``"contrast"`` when the contrasts are the six
        towns (stimuli), or a contrasts.tsv column such as ``"town"``.
    nested : str, optional
        Column whose levels get a random intercept within each participant (runs or sessions): its labels are
        made unique per participant, as ``(1 | participant/column)`` expands.
    contrast : str or sequence of str, optional
        Contrasts to include (comma-separated); default all. The model's variables must tell the contrasts'
        rows apart (``contrast`` itself, or per-contrast columns such as ``load``); otherwise select one.
    contrasts : DataFrame or path, optional
        contrasts.tsv: column ``contrast`` plus per-contrast columns the model may name.
    region_table : DataFrame or path, optional
        regions.tsv: column ``region`` plus per-region columns.
    estimation : {"reml", "ml"}, optional
        REML (default) or ML (for likelihood-ratio comparisons of fixed effects); overrides ``reml``.
    reml : bool
        The same choice as a flag (kept for compatibility).
    df_method : {"satterthwaite", "z"}
        Satterthwaite t/F (default) or Wald z / chi-square (never the default).
    center : bool
        Mean-centre numeric predictors of ``formula`` within each region (the mean is recorded in ``centered``).
    n_jobs : int
        Worker processes across regions for the models fitted region by region (1: in this process).
    executor : concurrent.futures.Executor, optional
        Fit those regions on this executor instead; ``n_jobs`` is then ignored. Results are identical.

    Returns
    -------
    DataFrame
        One row per region x fixed effect (a single-column term gives a t row named by its coefficient; a
        multi-column term one F row with ``df1`` the numerator and ``df`` the denominator df). Contract columns
        (``n`` is the number of participants; t rows carry ``effect_size`` of type ``d_wkj``), common columns,
        and random, crossed, nested, estimation, converged, boundary, boundary_terms, sd_participant,
        sd_participant_<slope>, corr_participant_<slope>, sd_<crossed>, sd_<nested>, sd_residual,
        variance_total, icc, r2_marginal, r2_conditional, n_participants, n_stimuli, n_nested, n_observations,
        n_excluded_observations, n_excluded_participants, deviance, optimizer, centered.

    Notes
    -----
    Models whose only grouping factor is the participant are fitted for all regions at once: a random intercept
    by :class:`_InterceptBatch` (the profiled criterion from participant-level sums, minimised on its analytic
    derivative after a grid), random slopes by :class:`_BlockBatch` (the block-diagonal profiled criterion,
    damped Newton steps from three starts, the lowest criterion kept). Every batched result must pass the
    gradient check of :func:`fit_mixed`; a region that does not is refitted by :func:`fit_mixed` (several
    optimisers, best restricted likelihood kept; a ConvergenceError names the region when none passes). Crossed
    and nested structures are fitted region by region (``n_jobs``, ``executor``).
    Satterthwaite df from :func:`satterthwaite`; multi-df F after Fai & Cornelius (1996). R2 after Nakagawa &
    Schielzeth (2013), random-slope variance after Johnson (2014).

    Effect size ``d_wkj = b / sqrt(variance_total)`` with ``variance_total`` the sum of the variance components:
    every random intercept variance, every random slope's average contribution to one observation's variance
    (Johnson 2014), and the residual variance (after Westfall, Kenny & Judd 2014, who standardise a mean
    difference by the square root of the summed variance components). For a 0/1 (treatment) coded contrast it is
    the difference in SD units of one observation; its interval is n/a.

    Checked against statsmodels ``MixedLM``, lme4's sleepstudy, Penicillin and Pastes fits (Bates et al. 2015),
    the repeated-measures and split-plot ANOVA df and the ANOVA closed forms of balanced designs.

    Examples
    --------
    >>> from roikit.stats import run_design
    >>> run_design(values, "mixed", formula="value ~ load", random="1 + load",
    ...            contrasts="contrasts.tsv")   # doctest: +SKIP
    """
    from ._common import (attach_columns, join_ids, region_order, result_rows, side_table, spelled,
                          warn_dropped_observations)

    context = "mixed"
    if formula is None:
        raise UsageError(f"mixed: no formula given; pass {spell('formula', example='value ~ contrast * group')}")
    if df_method not in ("satterthwaite", "z"):
        raise UsageError(f"df_method: found {df_method!r}, expected 'satterthwaite' (default) or 'z'")
    if isinstance(n_jobs, bool) or not isinstance(n_jobs, (int, np.integer)) or n_jobs < 1:
        raise UsageError(f"n_jobs: expected a positive integer, got {n_jobs!r}")
    if estimation is not None:
        est_name = str(estimation).strip().lower()
        if est_name not in ("reml", "ml"):
            raise spelled("estimation", "--estimation", UsageError,
                          f"{{option}}: found {estimation!r}, expected 'reml' (default) or 'ml'")
        if reml is not True and (est_name == "reml") != bool(reml):
            raise UsageError(f"estimation={estimation!r} contradicts reml={reml!r}; give one of them")
        reml = est_name == "reml"
    reml = bool(reml)
    rhs = _formula_rhs(formula)
    random = "1" if random is None else str(random)
    random_rhs = _formula_rhs(random, parameter="random")
    fixed_vars = sorted((v for v in _required_variables(rhs) if v != "value"), key=lambda v: (rhs.find(v), v))
    random_vars = _required_variables(random_rhs, parameter="random")
    for option, column in (("crossed", crossed), ("nested", nested)):
        if column is not None and str(column) == "participant_id":
            raise _both(DesignError, f"mixed: {option}='participant_id' repeats the participant random effect; name "
                        "another column (e.g. crossed='contrast' for stimuli, nested='run' for runs)")
    crossed = None if crossed is None else str(crossed)
    nested = None if nested is None else str(nested)
    if crossed is not None and crossed == nested:
        raise UsageError(f"mixed: {crossed!r} is given as both crossed and nested; choose one")
    contrasts_table = side_table(contrasts, kind="contrasts")
    regions_table = side_table(region_table, kind="regions")
    selected = _split_list(contrast, parameter="contrast")
    data = values
    if selected is not None:
        unknown = [c for c in selected if c not in set(values["contrast"])]
        if unknown:
            raise DesignError(f"mixed: {noun(unknown, 'contrast')} {', '.join(unknown)} not found; available: "
                              f"{', '.join(map(str, pd.unique(values['contrast'])))}")
        data = values[values["contrast"].isin(selected)]
    extra = [c for c in (crossed, nested) if c is not None]
    used = list(dict.fromkeys(fixed_vars + random_vars + extra))
    data = data.reset_index(drop=True)
    data, _sources = attach_columns(data, used, participants=participants, contrasts=contrasts_table,
                                    region_table=regions_table, context=context)
    present = list(pd.unique(data["contrast"]))
    if len(present) > 1 and "contrast" not in used:
        _check_distinguishable(data, used, present)
    frame = data.copy()
    numeric_cols = []
    for name in used:
        col = frame[name]
        num = pd.to_numeric(col, errors="coerce") if name not in ("participant_id", "contrast", "region",
                                                                  "session_id", crossed, nested) else None
        if num is not None and col.notna().sum() and num.notna().sum() == col.notna().sum() \
                and not pd.api.types.is_bool_dtype(col):
            frame[name] = num.astype(float)
            numeric_cols.append(name)
        else:
            frame[name] = col.astype(object).where(col.notna(), None).map(lambda x: x if x is None else str(x))
    complete = frame[used].notna().all(axis=1).to_numpy() & np.isfinite(frame["value"].to_numpy(float))
    regions = region_order(data)  # the regions of the selected contrasts
    # exclusions per region: observations, participants with some / all of their observations left out
    region_codes = pd.Index(regions).get_indexer(data["region"])
    n_dropped = np.bincount(region_codes[~complete], minlength=len(regions))
    partly: list[list[str]] = [[] for _ in regions]
    wholly: list[list[str]] = [[] for _ in regions]
    if n_dropped.any():
        pid_codes_all, pid_names = pd.factorize(data["participant_id"])
        pair = region_codes.astype(np.int64) * len(pid_names) + pid_codes_all
        kept_pairs = set(np.unique(pair[complete]).tolist())
        for code in pd.unique(pair[~complete]):  # in order of first appearance
            r, i = divmod(int(code), len(pid_names))
            partly[r].append(str(pid_names[i]))
            if code not in kept_pairs:
                wholly[r].append(str(pid_names[i]))
    warn_dropped_observations(regions, n_dropped, partly, wholly, context=context,
                              reason="value or a model variable missing")
    frame = frame[complete].reset_index(drop=True)
    # centring within each region (after transforms such as log): each region's fit depends on its own data only
    means: dict[str, pd.Series] = {}
    centred = [v for v in numeric_cols if v in fixed_vars] if center else []
    X_all, names, terms = _design_matrix(rhs, frame, center=centred, groups=frame["region"], means=means)
    Zr_all, rnames, _ = _design_matrix(random_rhs, frame, parameter="random", center=centred, groups=frame["region"])

    payloads = []
    region_meta = []
    region_of_row = pd.Index(regions).get_indexer(frame["region"])
    order = np.argsort(region_of_row, kind="stable")
    bounds = np.searchsorted(region_of_row[order], np.arange(len(regions) + 1))
    pid_all = frame["participant_id"].to_numpy()
    pid_global, _ = pd.factorize(pid_all)
    for index, r in enumerate(regions):
        rows = order[bounds[index]:bounds[index + 1]]
        if rows.size == 0:
            raise DesignError(f"mixed: no complete observations in region {r!r}; check the missing values")
        uniq, first = np.unique(pid_global[rows], return_index=True)
        levels_in_order = uniq[np.argsort(first)]  # participants in order of first appearance, as pd.factorize
        remap = np.empty(pid_global.max() + 1, dtype=np.int64)
        remap[levels_in_order] = np.arange(levels_in_order.size)
        pid_codes, pid_levels = remap[pid_global[rows]], levels_in_order
        factors = [RandomFactor("participant", pid_codes.astype(int), Zr_all[rows], rnames)]
        n_stim = n_nest = np.nan
        if crossed is not None:
            c_codes, c_levels = pd.factorize(frame[crossed].to_numpy()[rows])
            factors.append(RandomFactor(crossed, c_codes.astype(int), np.ones((rows.size, 1)), ["Intercept"]))
            n_stim = len(c_levels)
        if nested is not None:
            pairs = pd.Series(pid_all[rows]).astype(str) + "\x1f" + frame[nested].iloc[rows].astype(str).to_numpy()
            n_codes, n_levels = pd.factorize(pairs.to_numpy())
            factors.append(RandomFactor(nested, n_codes.astype(int), np.ones((rows.size, 1)), ["Intercept"]))
            n_nest = len(n_levels)
        X = X_all[rows]
        _check_support(r, factors, X, names)
        payloads.append({"y": frame["value"].to_numpy(float)[rows], "X": X, "factors": factors, "reml": reml,
                         "df_method": df_method, "confidence": confidence, "terms": terms, "names": names})
        region_meta.append({"n_participants": len(pid_levels), "n_stimuli": n_stim, "n_nested": n_nest,
                            "n_observations": rows.size})
    if crossed is not None:
        _warn_crossed_looks_nested(frame, crossed, regions)

    if crossed is None and nested is None:
        from threadpoolctl import threadpool_limits

        with threadpool_limits(limits=1, user_api="blas"):  # small matrices: threads only cost (see below)
            fit_batch = (lambda chunk: _fit_intercept_batch(chunk)[0]) if rnames == ["Intercept"] else _fit_block_batch
            results = []
            for chunk in _chunks(payloads):
                results.extend(fit_batch(chunk))
        redo = [i for i, res in enumerate(results) if res is None]
        if redo:
            again = _run_regions([payloads[i] for i in redo], [regions[i] for i in redo], n_jobs, executor)
            for i, res in zip(redo, again):
                results[i] = res
    else:
        results = _run_regions(payloads, regions, n_jobs, executor)

    var_cols = _variance_columns(results, payloads, crossed, nested)
    variance_total = [float(sum(res["var_random"]) + res["fit"].sigma2) for res in results]
    boundary_terms = [_boundary_terms(res["fit"], payloads[0]["factors"], crossed, nested) for res in results]
    centred_text = []
    for r in regions:
        parts = [f"{name} (mean {means[name].get(r, np.nan):.10g})" for name in means]
        centred_text.append(", ".join(parts) if parts else None)

    frames = []
    n_terms = len(results[0]["terms"])
    for t in range(n_terms):
        cols: dict[str, list] = {}
        for res in results:
            for key, val in res["terms"][t].items():
                cols.setdefault(key, []).append(val)
        term = cols.pop("term")[0]
        is_t = cols["statistic_type"][0] in ("t", "z")
        es = (np.asarray(cols["estimate"], dtype=float) / np.sqrt(variance_total)) if is_t else np.nan
        frames.append(result_rows(
            regions, design="mixed", term=term, confidence=confidence,
            n=[m["n_participants"] for m in region_meta], effect_size=es, effect_size_type="d_wkj" if is_t else None,
            contrast=",".join(map(str, selected if selected is not None else present)),
            formula=f"value ~ {rhs}", df_method=df_method, population_inference=True,
            excluded_ids=[join_ids(e) for e in partly], **cols,
            random=random_rhs, crossed=crossed, nested=nested, estimation="reml" if reml else "ml",
            converged=[res["fit"].converged for res in results],
            boundary=[res["fit"].boundary or bool(bt) for res, bt in zip(results, boundary_terms)],
            boundary_terms=[",".join(bt) for bt in boundary_terms],
            **var_cols, variance_total=variance_total,
            icc=[res["icc"] for res in results], r2_marginal=[res["r2_marginal"] for res in results],
            r2_conditional=[res["r2_conditional"] for res in results],
            n_participants=[m["n_participants"] for m in region_meta],
            n_stimuli=[m["n_stimuli"] for m in region_meta],
            n_nested=[m["n_nested"] for m in region_meta],
            n_observations=[m["n_observations"] for m in region_meta],
            n_excluded_observations=[int(x) for x in n_dropped],
            n_excluded_participants=[len(w) for w in wholly],
            deviance=[res["fit"].deviance for res in results], optimizer=[res["fit"].optimizer for res in results],
            centered=centred_text,
        ))
    out = pd.concat(frames, ignore_index=True)
    out.attrs["column_descriptions"] = _describe_dynamic(out.columns)
    for name, text in out.attrs["column_descriptions"].items():
        COLUMN_DESCRIPTIONS.setdefault(name, text)
    _warn_singular(list(regions), [bt if res["fit"].boundary or bt else None
                                   for res, bt in zip(results, boundary_terms)], context=context)
    return out


@mergeable
def _warn_singular(regions, terms, *, context: str) -> None:
    """terms: per region, the boundary terms of a singular fit (None where the fit is not singular)."""
    flagged = [(r, bt) for r, bt in zip(regions, terms) if bt is not None]
    if flagged:
        warnings.warn(DiagnosticWarning(
            f"{context}: a random-effect variance is at its boundary (SD < {BOUNDARY_TOL:g} x residual SD, or a "
            f"correlation at +-1) in {len(flagged)} region{'s' if len(flagged) != 1 else ''}: "
            + "; ".join(f"{r} ({', '.join(bt) or 'participant covariance'})" for r, bt in flagged)
            + "; the model is singular there (columns 'boundary', 'boundary_terms'); consider a simpler random "
            "structure", context=context,
            findings=[{"problem": "random-effect variance at its boundary (singular fit; columns boundary, "
                       "boundary_terms)", "region": r} for r, _bt in flagged]), stacklevel=4)


def _check_distinguishable(data: pd.DataFrame, used: Sequence[str], present: Sequence[str]) -> None:
    """DesignError when two contrasts' rows have the same values of every model variable (they would be pooled
    as replicates of one condition), for one participant in one region."""
    from ._common import spelled

    keys = ["participant_id", "region"] + [v for v in used if v not in ("participant_id", "region")]
    frame = data[keys + ["contrast"]].astype(object).where(data[keys + ["contrast"]].notna(), "\x00n/a")
    frame = frame.astype(str)
    counts = frame.groupby(keys, sort=False)["contrast"].nunique()
    bad = counts[counts > 1]
    if bad.empty:
        return
    first = bad.index[0]
    first = first if isinstance(first, tuple) else (first,)
    mask = np.ones(len(frame), dtype=bool)
    for k, v in zip(keys, first):
        mask &= (frame[k] == v).to_numpy()
    pooled = list(pd.unique(frame.loc[mask, "contrast"]))
    what = ", ".join(used) if used else "none besides the intercept"
    raise spelled(
        "contrast='" + str(pooled[0]) + "'", "--contrast " + str(pooled[0]), DesignError,
        f"mixed: the values table holds {len(present)} contrasts ({', '.join(map(str, present))}) and the model's "
        f"variables ({what}) do not tell contrasts {', '.join(map(str, pooled[:4]))} apart (participant "
        f"{first[0]}, region {first[1]!r}): their rows would be pooled as replicates; select the contrasts to "
        f"model with {{option}}, add contrast to the formula, or name a per-contrast column that distinguishes them"
    )


def _warn_crossed_looks_nested(frame: pd.DataFrame, crossed: str, regions: Sequence[str]) -> None:
    """Warn when a crossed factor behaves as if nested within participant.

    Crossing means a level is the same entity for every participant, so its effect repeats across participants.
    Where cells (participant x level) hold replicate observations, a two-way ANOVA on the cells tells: if the
    participant x level interaction is large against the replicate error (F test p < .01) while the level main
    effect is not larger than the interaction, the labels carry no shared effect: they look like labels that
    restart within each participant (a, b, c in every participant), which is nesting.
    """
    flagged = []
    for r in regions:
        sub = frame.loc[frame["region"] == r, ["participant_id", crossed, "value"]]
        cells = sub.groupby(["participant_id", crossed], sort=False, observed=True)["value"]
        n_cell = cells.size()
        if n_cell.min() < 2 or sub["participant_id"].nunique() < 2 or sub[crossed].nunique() < 2:
            continue
        m = cells.mean().unstack()
        if m.isna().any().any():
            continue
        a, b = m.shape
        gm = m.to_numpy().mean()
        inter = m.to_numpy() - m.to_numpy().mean(1, keepdims=True) - m.to_numpy().mean(0, keepdims=True) + gm
        ms_int = (inter**2).sum() / ((a - 1) * (b - 1))
        ms_lev = a * ((m.to_numpy().mean(0) - gm) ** 2).sum() / (b - 1)
        within = sub["value"] - cells.transform("mean")
        df_e = len(sub) - a * b
        if df_e < 1:
            continue
        ms_e = float((within**2).sum()) / df_e
        hm = float(len(n_cell) / (1.0 / n_cell).sum())  # harmonic mean cell size
        f_int = hm * ms_int / ms_e if ms_e > 0 else np.inf
        if _st.f.sf(f_int, (a - 1) * (b - 1), df_e) < 0.01 and ms_lev <= ms_int:
            flagged.append(r)
    _warn_looks_nested(list(regions), [r in flagged for r in regions], crossed=crossed)


@mergeable
def _warn_looks_nested(regions, looks_nested, *, crossed: str) -> None:
    flagged = [r for r, f in zip(regions, looks_nested) if f]
    if flagged:
        warnings.warn(
            f"mixed: the crossed column {crossed!r} looks nested within participant in "
            f"{plural(len(flagged), 'region')} "
            f"({', '.join(flagged[:6])}{' ...' if len(flagged) > 6 else ''}): its levels' effects do not repeat "
            "across participants (large participant x level variation, no larger level effect); if its labels "
            f"restart within each participant, model it as nested={crossed!r} (--nested {crossed})",
            DiagnosticWarning, stacklevel=4)


def _boundary_terms(fit: MixedFit, factors: Sequence[RandomFactor], crossed, nested) -> list[str]:
    """Names (as the result columns) of the variance components at the boundary of the parameter space."""
    out = []
    sigma = np.sqrt(fit.sigma2)
    for f, S in zip(factors, fit.covariances):
        if f.name == "participant":
            names = ["sd_participant" if t == "Intercept" else f"sd_participant_{_snake(t)}" for t in f.terms]
        else:
            names = [f"sd_{_snake(f.name)}"]
        sd = np.sqrt(np.clip(np.diag(S), 0, None))
        small = sd < BOUNDARY_TOL * sigma
        out.extend(n for n, s in zip(names, small) if s)
        if f.r > 1:
            corr_hit = False
            for i in range(f.r):
                for j in range(i + 1, f.r):
                    if small[i] or small[j]:
                        continue
                    rho = S[i, j] / (sd[i] * sd[j])
                    if abs(rho) > 1 - 1e-6:
                        out.append(_corr_name(f.terms[i], f.terms[j]))
                        corr_hit = True
            if not corr_hit and not small.any():
                T = _la.cholesky(S + 0.0 * np.eye(f.r), lower=True, check_finite=False) if np.all(
                    np.linalg.eigvalsh(S) > 0) else None
                if T is None or np.any(np.abs(np.diag(T)) < BOUNDARY_TOL * sigma):
                    out.append("participant covariance")
    return out


def _corr_name(a: str, b: str) -> str:
    if a == "Intercept":
        return f"corr_participant_{_snake(b)}"
    return f"corr_participant_{_snake(a)}_with_{_snake(b)}"


def _variance_columns(results, payloads, crossed, nested=None) -> dict[str, list]:
    cols: dict[str, list] = {}
    factors = payloads[0]["factors"]
    pf = factors[0]
    for a, term in enumerate(pf.terms):
        name = "sd_participant" if term == "Intercept" else f"sd_participant_{_snake(term)}"
        cols[name] = [float(np.sqrt(res["fit"].covariances[0][a, a])) for res in results]
    if "sd_participant" not in cols:
        cols["sd_participant"] = [np.nan] * len(results)
    for a in range(pf.r):
        for b in range(a + 1, pf.r):
            vals = []
            for res in results:
                S = res["fit"].covariances[0]
                den = np.sqrt(S[a, a] * S[b, b])
                vals.append(float(S[a, b] / den) if den > 0 else np.nan)
            cols[_corr_name(pf.terms[a], pf.terms[b])] = vals
    for f_index, f in enumerate(factors[1:], start=1):
        cols[f"sd_{_snake(f.name)}"] = [float(np.sqrt(res["fit"].covariances[f_index][0, 0])) for res in results]
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
        return _both(type(exc), f"mixed: region {region!r}: {exc}")

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
