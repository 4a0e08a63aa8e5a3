"""Permutation family-wise error by the maximum statistic across regions.

For each permutation the test statistic is recomputed in every region and the maximum across regions kept; the
family-wise p of a region is the share of permutations whose maximum reaches the region's observed statistic
(Westfall & Young 1993; Nichols & Holmes 2002). Schemes:

- sign flipping (one-sample, paired): under H0 each participant's value is symmetric about zero, so its sign may be
  flipped; done as one matrix product (signs x data) per chunk of permutations, in float32;
- label permutation (two-group): group labels are exchangeable under H0;
- Freedman-Lane (glm terms; Freedman & Lane 1983, Winkler et al. 2014): residuals of the reduced model (the model
  without the tested part, X (I - C C+)) are permuted and added back to its fitted values.

Random permutations include the identity implicitly: p = (1 + #{max >= observed}) / (B + 1). When the number of
distinct permutations (2^n sign patterns, C(n, n1) labelings, n! orderings) is at most the number asked for, all of
them are enumerated and p = #{max >= observed} / (number of permutations).

Missing values: sign flipping and label permutation handle them exactly with per-region masks (a missing value
contributes nothing, n is per region, the same permutation of participants is applied to all regions).
Freedman-Lane needs complete data and raises a :class:`DesignError` otherwise.

A permuted statistic within a relative 1e-5 (float32 paths) or 1e-9 (float64 paths) of the observed one counts as
reaching it, so that rounding cannot drop the identity permutation from its own count.
"""

from __future__ import annotations

import itertools
import math
from typing import Sequence

import numpy as np

from ..errors import DesignError

__all__ = ["sign_flip_max_t", "label_max_t", "freedman_lane_max"]

_CHUNK = 1000


def _p_from_max(max_stats: np.ndarray, observed: np.ndarray, *, exact: bool, rtol: float) -> np.ndarray:
    max_sorted = np.sort(max_stats)
    threshold = np.abs(observed) * (1 - rtol)
    reach = max_sorted.size - np.searchsorted(max_sorted, threshold, side="left")
    if exact:
        p = reach / max_sorted.size
    else:
        p = (1 + reach) / (max_sorted.size + 1)
    return np.where(np.isfinite(observed), p, np.nan)


def _flip_t(sums: np.ndarray, n: np.ndarray, sumsq: np.ndarray) -> np.ndarray:
    mean = sums / n
    var = (sumsq - n * mean * mean) / (n - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return mean / np.sqrt(np.maximum(var, 0) / n)


def sign_flip_max_t(
    y: np.ndarray, *, permutations: int, rng: np.random.Generator, chunk: int = _CHUNK
) -> tuple[np.ndarray, int, bool]:
    """Family-wise p of the one-sample t in each column by max-|t| sign flipping.

    Parameters
    ----------
    y : ndarray, participants x regions
        Values (NaN = participant not in that region's test).
    permutations : int
        Random sign patterns to draw; all 2^n are enumerated when 2^n <= permutations.
    rng : numpy Generator

    Returns
    -------
    p_fwe : ndarray (regions,)
    n_permutations : int
        Number of sign patterns used (2^n when exact).
    exact : bool
    """
    y = np.asarray(y, dtype=float)
    mask = ~np.isnan(y)
    y = y[mask.any(axis=1)]
    mask = mask[mask.any(axis=1)]
    n_part = y.shape[0]
    y0 = np.where(mask, y, 0.0)
    n = mask.sum(axis=0).astype(np.float32)
    with np.errstate(divide="ignore", invalid="ignore"):
        rms = np.sqrt((y0**2).sum(axis=0) / np.maximum(n, 1))
    rms[~(rms > 0)] = 1.0
    ys = (y0 / rms).astype(np.float32)  # t is scale-invariant; unit RMS keeps float32 well conditioned
    sumsq = (ys.astype(np.float64) ** 2).sum(axis=0).astype(np.float32)
    observed = _flip_t(ys.sum(axis=0, dtype=np.float64).astype(np.float32), n, sumsq)
    exact = n_part < 63 and 2**n_part <= permutations
    total = 2**n_part if exact else int(permutations)
    max_stats = np.empty(total, dtype=np.float64)
    bits = np.arange(n_part, dtype=np.int64)
    for start in range(0, total, chunk):
        stop = min(total, start + chunk)
        if exact:
            codes = np.arange(start, stop, dtype=np.int64)[:, None]
            signs = (1 - 2 * ((codes >> bits) & 1)).astype(np.float32)
        else:
            signs = (1 - 2 * rng.integers(0, 2, size=(stop - start, n_part), dtype=np.int8)).astype(np.float32)
        t = _flip_t(signs @ ys, n, sumsq)
        max_stats[start:stop] = np.nanmax(np.abs(t), axis=1)
    return _p_from_max(max_stats, observed, exact=exact, rtol=1e-5), total, exact


def _two_group_t(s1, q1, n1, s2, q2, n2, welch):
    with np.errstate(divide="ignore", invalid="ignore"):
        m1 = s1 / n1
        m2 = s2 / n2
        ss1 = np.maximum(q1 - n1 * m1 * m1, 0)
        ss2 = np.maximum(q2 - n2 * m2 * m2, 0)
        if welch:
            se = np.sqrt(ss1 / (n1 - 1) / n1 + ss2 / (n2 - 1) / n2)
        else:
            se = np.sqrt((ss1 + ss2) / (n1 + n2 - 2) * (1 / n1 + 1 / n2))
        t = (m1 - m2) / se
    t[(n1 < 2) | (n2 < 2)] = np.nan
    return t


def label_max_t(
    y: np.ndarray,
    in_first: np.ndarray,
    *,
    welch: bool,
    permutations: int,
    rng: np.random.Generator,
    chunk: int = _CHUNK,
) -> tuple[np.ndarray, int, bool]:
    """Family-wise p of the two-group t in each column by max-|t| label permutation.

    ``y`` holds only the participants of the two groups (rows), ``in_first`` marks the first group. Labels are
    permuted across all these participants (the same permutation for every region); missing values are masked.
    """
    y = np.asarray(y, dtype=float)
    in_first = np.asarray(in_first, dtype=bool)
    mask = ~np.isnan(y)
    with np.errstate(invalid="ignore"):
        centre = np.nanmean(y, axis=0)
    y0 = np.where(mask, y - centre, 0.0)  # t is shift-invariant; centring avoids cancellation
    y2 = y0**2
    m = mask.astype(float)
    tot_s, tot_q, tot_n = y0.sum(0), y2.sum(0), m.sum(0)
    g = in_first.astype(float)
    observed = _two_group_t(g @ y0, g @ y2, g @ m, tot_s - g @ y0, tot_q - g @ y2, tot_n - g @ m, welch)
    n_all, n_first = in_first.size, int(in_first.sum())
    distinct = math.comb(n_all, n_first)
    exact = distinct <= permutations
    total = distinct if exact else int(permutations)
    max_stats = np.empty(total)
    combos = itertools.combinations(range(n_all), n_first) if exact else None
    stacked = np.concatenate([y0, y2, m], axis=1)
    k = y.shape[1]
    for start in range(0, total, chunk):
        stop = min(total, start + chunk)
        groups = np.zeros((stop - start, n_all))
        if exact:
            for row, combo in enumerate(itertools.islice(combos, stop - start)):
                groups[row, list(combo)] = 1.0
        else:
            for row in range(stop - start):
                groups[row, rng.permutation(n_all)[:n_first]] = 1.0
        prod = groups @ stacked
        s1, q1, n1 = prod[:, :k], prod[:, k : 2 * k], prod[:, 2 * k :]
        t = _two_group_t(s1, q1, n1, tot_s - s1, tot_q - q1, tot_n - n1, welch)
        with np.errstate(invalid="ignore"):
            max_stats[start:stop] = np.nanmax(np.abs(np.where(np.isnan(t), -np.inf, t)), axis=1)
    return _p_from_max(max_stats, observed, exact=exact, rtol=1e-9), total, exact


def freedman_lane_max(
    x: np.ndarray,
    y: np.ndarray,
    tests: Sequence[tuple[str, np.ndarray]],
    *,
    permutations: int,
    rng: np.random.Generator,
    chunk: int = 256,
) -> tuple[dict[str, np.ndarray], int, bool]:
    """Family-wise p per test (|t| for one-row contrasts, F otherwise) by Freedman-Lane permutation.

    Parameters
    ----------
    x : ndarray, participants x coefficients
        Full-rank design matrix.
    y : ndarray, participants x regions
        Complete data (no NaN).
    tests : sequence of (name, L)
        L is a (q x p) contrast matrix; H0: L beta = 0.

    Notes
    -----
    With C = L', the reduced model is Z = X (I - C C+), whose column space is {X b : L b = 0}. Residuals
    R = (I - H_Z) Y are permuted: Y* = H_Z Y + P R. Because L X+ H_Z Y = 0 and (I - H_X) H_Z = 0, the full-model
    numerator is L X+ P R and the residual sum of squares is ||R||^2 - ||Q' P R||^2 (Q an orthonormal basis of X),
    so each permutation costs one product of permuted (q + p) x n rows with R.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if np.isnan(y).any():
        raise DesignError(
            "permutations for glm (Freedman-Lane) need complete data, but some regions have missing values; "
            "drop the participants or regions with missing values, or run without permutations"
        )
    n, p = x.shape
    df = n - p
    q_basis, _ = np.linalg.qr(x)
    x_pinv = np.linalg.pinv(x)
    xtx_inv = x_pinv @ x_pinv.T
    exact = n <= 20 and math.factorial(n) <= permutations
    total = math.factorial(n) if exact else int(permutations)
    out: dict[str, np.ndarray] = {}
    prepared = []
    for name, lmat in tests:
        lmat = np.atleast_2d(np.asarray(lmat, dtype=float))
        c = lmat.T
        z = x @ (np.eye(p) - c @ np.linalg.pinv(c))
        hz = z @ np.linalg.pinv(z)
        resid = y - hz @ y
        a = lmat @ x_pinv
        v = lmat @ xtx_inv @ lmat.T
        prepared.append((name, lmat.shape[0], a, np.linalg.inv(v), resid, (resid**2).sum(0)))
    perms_all = None
    if exact:
        perms_all = np.array(list(itertools.permutations(range(n))), dtype=np.int64)
    results = {name: np.empty(total) for name, *_ in prepared}
    observed = {}
    for name, q, a, vinv, resid, rss in prepared:
        # identity permutation: L b = L X+ R and SSE = ||R||^2 - ||Q'R||^2 (see Notes)
        observed[name] = _fl_stat(a[None], q_basis.T[None], vinv, resid, rss, df, q)
    for start in range(0, total, chunk):
        stop = min(total, start + chunk)
        if exact:
            idx = perms_all[start:stop]
        else:
            idx = np.stack([rng.permutation(n) for _ in range(stop - start)])
        inv = np.argsort(idx, axis=1)  # (P R)[i] = R[idx[i]]  =>  rows of A and Q' are permuted by inv
        for name, q, a, vinv, resid, rss in prepared:
            a_perm = a[:, inv].transpose(1, 0, 2)  # (c, q, n)
            qt_perm = q_basis.T[:, inv].transpose(1, 0, 2)  # (c, p, n)
            stat = _fl_stat(a_perm, qt_perm, vinv, resid, rss, df, q)
            with np.errstate(invalid="ignore"):
                results[name][start:stop] = np.nanmax(np.abs(stat), axis=1)
    for name, *_ in prepared:
        out[name] = _p_from_max(results[name], np.abs(observed[name][0]), exact=exact, rtol=1e-9)
    return out, total, exact


def _fl_stat(a_perm, qt_perm, vinv, resid, rss, df, q):
    num = a_perm @ resid  # (c, q, k)
    proj = qt_perm @ resid  # (c, p, k)
    sse = rss - (proj**2).sum(axis=1)
    sigma2 = np.maximum(sse, 0) / df
    with np.errstate(divide="ignore", invalid="ignore"):
        if q == 1:
            return num[:, 0, :] / np.sqrt(sigma2 / vinv[0, 0])
        quad = np.einsum("cqk,qr,crk->ck", num, vinv, num)
        return quad / (q * sigma2)
