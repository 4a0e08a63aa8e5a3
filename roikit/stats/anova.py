"""Univariate repeated-measures ANOVA with sphericity diagnostics, vectorised across regions.

The arithmetic behind ``--design repeated-measures``. Each region (or pair of regions, when a within factor is a
region property such as hemisphere) contributes a participants x cells array of values, the cells being the full
crossing of the within factors' levels. Every effect is tested through orthonormal contrasts of the cells (the
classical univariate approach, e.g. Maxwell & Delaney 2004, ch. 12): for the within factors ``S`` of an effect, the
cell values are multiplied by the Kronecker product of orthonormal Helmert contrasts (factors in ``S``) and
normalised averaging vectors (the other factors), giving ``q`` transformed scores per participant. With ``E`` the
pooled within-group sums of squares and cross-products of those scores (error df ``v = N - G``):

- within effect ``S``: ``SS = |m|^2 / c`` where ``m`` is the unweighted mean over groups of the group mean scores and
  ``c = sum_g (1/n_g) / G^2`` (``N |mean|^2`` with one group or equal groups; type III with unequal groups);
- ``S`` by between factor: ``SS = sum_g n_g |m_g - m_w|^2`` (``m_w`` the weighted mean), ``df1 = q (G - 1)``;
- between factor alone: the one-way ANOVA of the participants' cell averages;
- error ``SS = tr(E)``, ``df2 = q v``; ``F = (SS / df1) / (tr(E) / df2)``.

Sphericity (``q > 1`` only): Mauchly's ``W = det(E) / (tr(E) / q)^q`` with the chi-square approximation
``-(v - (2q^2 + q + 2) / (6q)) ln W`` on ``q(q+1)/2 - 1`` df (Mauchly 1940); Greenhouse-Geisser
``eps = tr(E)^2 / (q tr(E^2))`` (Greenhouse & Geisser 1959); Huynh-Feldt with Lecoutre's (1991) correction for
groups ``((v + 1) q eps - 2) / (q (v - q eps))``, capped at 1 (Huynh & Feldt 1976). Corrected p-values multiply
both df by epsilon.

Effect sizes: partial eta squared ``SS / (SS + SS_error)``; generalised eta squared (Olejnik & Algina 2003;
Bakeman 2005) ``SS / (SS + sum of every error stratum's SS + SS of measured-factor effects)``, where a between
factor is treated as measured (e.g. age group) unless ``between_observed=False`` says it was manipulated (assigned).

Checked against pingouin's ``rm_anova`` and ``mixed_anova`` on the data sets it ships (tests/stats/test_anova.py).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy import stats as sps

__all__ = ["Effect", "effects", "helmert", "rm_anova"]


def helmert(levels: int) -> np.ndarray:
    """Orthonormal Helmert contrasts, ``levels x (levels - 1)``; columns are orthonormal and sum to zero."""
    c = np.zeros((levels, levels - 1))
    for j in range(1, levels):
        c[:j, j - 1] = 1.0
        c[j, j - 1] = -float(j)
        c[:, j - 1] /= np.sqrt(j * (j + 1))
    return c


@dataclass(frozen=True)
class Effect:
    """One tested effect: the within factors it involves (indices) and whether it involves the between factor."""

    within: tuple[int, ...]
    between: bool

    def name(self, within_names: Sequence[str], between_name: str | None) -> str:
        parts = [within_names[i] for i in self.within]
        if self.between and between_name is not None:
            parts.append(between_name)
        return ":".join(parts)


def effects(n_within: int, has_between: bool) -> list[Effect]:
    """Effects in the usual table order: between, then each within subset (by size) followed by its interaction."""
    out: list[Effect] = [Effect((), True)] if has_between else []
    for size in range(1, n_within + 1):
        for subset in itertools.combinations(range(n_within), size):
            out.append(Effect(subset, False))
            if has_between:
                out.append(Effect(subset, True))
    return out


def _transform(levels: Sequence[int], subset: Sequence[int]) -> np.ndarray:
    """Cells x q matrix: Helmert contrasts for factors in ``subset``, averaging vectors for the others.

    Cells are ordered with the first factor varying slowest (``itertools.product`` order).
    """
    mat = np.ones((1, 1))
    for f, k in enumerate(levels):
        part = helmert(k) if f in subset else np.full((k, 1), 1.0 / np.sqrt(k))
        mat = np.kron(mat, part)
    return mat


def rm_anova(
    y: np.ndarray,
    levels: Sequence[int],
    *,
    groups: np.ndarray | None = None,
    between_observed: bool = True,
) -> dict[str, np.ndarray | list[Effect]]:
    """Repeated-measures ANOVA for many units at once.

    Parameters
    ----------
    y : array, shape (units, participants, cells)
        Complete data (no NaN): cells in ``itertools.product`` order of the within factors' levels.
    levels : sequence of int
        Number of levels of each within factor (their product is the number of cells).
    groups : array of int, shape (participants,), optional
        Between-participant group codes ``0..G-1`` (every group needs at least one participant).
    between_observed : bool
        Treat the between factor as measured (not assigned) in generalised eta squared.

    Returns
    -------
    dict
        ``effects`` (list of :class:`Effect`) and arrays of shape (effects, units): ``ss``, ``ss_error``, ``df1``,
        ``df2``, ``f``, ``p``, ``epsilon_gg``, ``epsilon_hf``, ``p_gg``, ``p_hf``, ``mauchly_w``, ``mauchly_p``,
        ``partial_eta2``, ``generalized_eta2``.
    """
    y = np.asarray(y, dtype=np.float64)
    units, n, cells = y.shape
    if int(np.prod(levels)) != cells:
        raise ValueError(f"{cells} cells for levels {list(levels)}")  # programming error, not user input
    g = np.zeros(n, dtype=int) if groups is None else np.asarray(groups, dtype=int)
    n_groups = int(g.max()) + 1
    counts = np.bincount(g, minlength=n_groups).astype(float)
    v = n - n_groups
    onehot = (g[:, None] == np.arange(n_groups)[None, :]).astype(float)          # n x G
    effs = effects(len(levels), groups is not None)

    keys = ("ss", "ss_error", "df1", "df2", "f", "p", "epsilon_gg", "epsilon_hf", "p_gg", "p_hf", "mauchly_w",
            "mauchly_p", "partial_eta2", "generalized_eta2")
    out = {k: np.full((len(effs), units), np.nan) for k in keys}
    strata: dict[tuple[int, ...], np.ndarray] = {}                               # error SS per within subset
    for e_index, eff in enumerate(effs):
        z = y @ _transform(levels, eff.within)                                    # units x n x q
        q = z.shape[-1]
        means = np.einsum("ung,unq->ugq", onehot[None], z) / counts[None, :, None]   # units x G x q
        resid = z - np.einsum("ng,ugq->unq", onehot, means)
        err = np.einsum("unq,unr->uqr", resid, resid)                             # units x q x q
        trace = np.einsum("uqq->u", err)
        strata[eff.within] = trace
        if eff.between:
            weighted = np.einsum("g,ugq->uq", counts, means) / n
            ss = np.einsum("g,ugq->u", counts, (means - weighted[:, None, :]) ** 2)
            df1 = q * (n_groups - 1)
        else:
            unweighted = means.mean(axis=1)
            c = np.sum(1.0 / counts) / n_groups**2
            ss = np.einsum("uq,uq->u", unweighted, unweighted) / c
            df1 = q
        df2 = q * v
        with np.errstate(divide="ignore", invalid="ignore"):
            f = (ss / df1) / (trace / df2)
        p = sps.f.sf(f, df1, df2)
        out["ss"][e_index], out["ss_error"][e_index] = ss, trace
        out["df1"][e_index], out["df2"][e_index] = df1, df2
        out["f"][e_index], out["p"][e_index] = f, p
        with np.errstate(divide="ignore", invalid="ignore"):
            out["partial_eta2"][e_index] = ss / (ss + trace)
        if q > 1:
            with np.errstate(divide="ignore", invalid="ignore"):
                eps_gg = trace**2 / (q * np.einsum("uqr,urq->u", err, err))
                eps_hf = np.minimum(1.0, ((v + 1) * q * eps_gg - 2) / (q * (v - q * eps_gg)))
                sign, logdet = np.linalg.slogdet(err)
                log_w = np.where(sign > 0, logdet - q * np.log(trace / q), -np.inf)
                w = np.exp(log_w)
                dfm = q * (q + 1) / 2 - 1
                chi2 = -(v - (2 * q**2 + q + 2) / (6 * q)) * log_w
                out["mauchly_w"][e_index] = w
                out["mauchly_p"][e_index] = sps.chi2.sf(chi2, dfm)
        else:
            eps_gg = eps_hf = np.ones(units)
        out["epsilon_gg"][e_index], out["epsilon_hf"][e_index] = eps_gg, eps_hf
        out["p_gg"][e_index] = sps.f.sf(f, df1 * eps_gg, df2 * eps_gg)
        out["p_hf"][e_index] = sps.f.sf(f, df1 * eps_hf, df2 * eps_hf)

    # the between-participant stratum (participants' averages) is an error term too
    if () not in strata:
        z = y @ _transform(levels, ())
        means = np.einsum("ung,unq->ugq", onehot[None], z) / counts[None, :, None]
        resid = z - np.einsum("ng,ugq->unq", onehot, means)
        strata[()] = np.einsum("unq,unq->u", resid, resid)
    error_total = sum(strata.values())
    measured = np.array([eff.between and between_observed for eff in effs])
    measured_ss = out["ss"][measured].sum(axis=0) if measured.any() else np.zeros(units)
    for e_index, eff in enumerate(effs):
        ss = out["ss"][e_index]
        extra = measured_ss - (ss if measured[e_index] else 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            out["generalized_eta2"][e_index] = ss / (ss + error_total + extra)
    out["effects"] = effs
    return out
