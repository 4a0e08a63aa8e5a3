"""Designs within participants across contrasts and regions: repeated-measures ANOVA and region differences.

``repeated-measures`` runs a univariate repeated-measures ANOVA (:mod:`roikit.stats.anova`) in every region, with
within-participant factors taken from contrasts.tsv columns (e.g. ``route`` = novel/familiar) and from regions.tsv
columns (e.g. ``hemisphere``: then the regions that differ only in that column are analysed together, and the
result's ``region`` names the set, e.g. ``hippocampus (left, right)``), and an optional between-participant column
of participants.tsv.

``region-difference`` tests the within-participant difference between two regions on one contrast (or the region x
contrast interaction with ``versus``): the test that licenses a claim that two regions differ, which a significant
result in one region and a non-significant one in the other does not (Gelman & Stern 2006; Nieuwenhuis, Forstmann &
Wagenmakers 2011).
"""

from __future__ import annotations

import itertools
import json
import warnings
from typing import Sequence

import numpy as np
import pandas as pd

from .._options import noun, plural
from ..errors import DesignError, MissingValueWarning, UsageError
from ._common import (
    check_minimum_n,
    check_values,
    join_ids,
    join_participants,
    pivot_contrast,
    region_order,
    result_rows,
)
from ._common import side_table, spelled
from ._registry import register
from .anova import rm_anova
from .designs import _group_labels
from .effect_sizes import partial_eta2_interval

__all__ = ["repeated_measures", "region_difference"]


def _split(names: str | Sequence[str] | None) -> list[str]:
    if names is None:
        return []
    if isinstance(names, str):
        return [n.strip() for n in names.split(",") if n.strip()]
    return [str(n) for n in names]


def _levels_in_order(series: pd.Series) -> list[str]:
    """Levels in order of first appearance (the table's order is the user's order)."""
    return [str(v) for v in pd.unique(series.dropna())]


def _plan_units(region_table, region_factors, regions):
    """Region units: lists of (region, within-level tuple) keyed by a display name."""
    if not region_factors:
        return {r: [(r, ())] for r in regions}
    if region_table is None:
        raise spelled("region_table=...", "--region-table FILE", UsageError,
                      f"within {noun(region_factors, 'factor')} {', '.join(region_factors)} not among the "
                      "contrasts.tsv columns; a region factor needs regions.tsv ({option})")
    table = region_table[region_table["region"].isin(regions)].copy()
    for f in region_factors:
        table[f] = _group_labels(table[f])
    # regions with n/a in a region factor (e.g. midline regions without a hemisphere) are not part of it
    table = table.dropna(subset=list(region_factors))
    others = [c for c in table.columns if c not in ("region", *region_factors)]
    units: dict[str, list] = {}
    if others:
        keys = table[others].astype(str).agg(" ".join, axis=1)
    else:
        keys = pd.Series("all regions", index=table.index)
    for key, part in table.groupby(keys, sort=False):
        levels = [_levels_in_order(part[f]) for f in region_factors]
        name = f"{key} ({'; '.join(', '.join(lv) for lv in levels)})"
        units[name] = [(r, tuple(part.loc[part["region"] == r, region_factors].iloc[0])) for r in part["region"]]
    return units


@register("repeated-measures")
def repeated_measures(
    values: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    confidence: float = 0.95,
    within: str | Sequence[str],
    between: str | None = None,
    contrasts: pd.DataFrame | None = None,
    region_table: pd.DataFrame | None = None,
    between_observed: bool = True,
    posthoc: bool = False,
    posthoc_correction: str = "holm",
) -> pd.DataFrame:
    """Repeated-measures ANOVA in every region (or set of regions), with sphericity corrections.

    Parameters
    ----------
    values : DataFrame
        Region values table.
    participants : DataFrame, optional
        participants.tsv, needed for ``between``.
    confidence : float
        Confidence level of the partial eta squared intervals.
    within : str or sequence of str
        Within-participant factors: columns of contrasts.tsv (levels are contrasts) or of regions.tsv (levels are
        regions), e.g. ``"route,hemisphere"``.
    between : str, optional
        participants.tsv column holding a between-participant factor (e.g. ``group``).
    contrasts, region_table : DataFrame, optional
        contrasts.tsv (column ``contrast`` plus factors) and regions.tsv (column ``region`` plus factors).
    between_observed : bool
        Whether the between factor is measured (e.g. age group; the default) rather than assigned; it enters
        generalised eta squared differently (Olejnik & Algina 2003).
    posthoc : bool
        Add pairwise comparisons of every within factor's levels: paired t-tests of the participants' marginal
        means (averaged over the other within factors), rows with term ``"route: novel - familiar"``.
    posthoc_correction : str
        Correction across the pairs of one factor in one region (``holm``, ``fdr``, ``bonferroni``, ``none``),
        written to ``p_posthoc`` with the number of pairs in ``posthoc_family``; ``run_design`` passes the
        analysis' primary correction.

    Returns
    -------
    DataFrame
        One row per region unit and effect (``route``, ``route:group`` ...), statistic_type ``F``: n (complete
        participants), df1, df (denominator), statistic, p (sphericity assumed), epsilon_gg, epsilon_hf, p_gg,
        p_hf, mauchly_w, mauchly_p (n/a for one-df effects), effect_size ``partial_eta2`` with its noncentral-F
        interval, generalized_eta2, excluded_ids (participants without every cell), within, between.

    Notes
    -----
    Formulas in :mod:`roikit.stats.anova`. Only complete cases enter (a participant missing any cell of a unit is
    excluded from that unit and named). Checked against pingouin ``rm_anova`` / ``mixed_anova`` on the data sets it
    ships, and against statsmodels OLS for a two-level factor with unequal groups.

    Examples
    --------
    >>> run_design(values, "repeated-measures", within="route,hemisphere", between="group",
    ...            contrasts=contrasts, region_table=regions, participants=participants)  # doctest: +SKIP
    """
    values = check_values(values)
    factors = _split(within)
    if not factors:
        raise UsageError("repeated-measures needs at least one within factor (within='route', --within route)")
    if len(set(factors)) != len(factors):
        raise UsageError(f"within factors repeat a name: {', '.join(factors)}")
    contrasts = side_table(contrasts, kind="contrasts")
    region_table = side_table(region_table, kind="regions")
    contrast_factors = [f for f in factors if contrasts is not None and f in contrasts.columns and f != "contrast"]
    region_factors = [f for f in factors if f not in contrast_factors]
    if region_factors and (region_table is None or any(f not in region_table.columns for f in region_factors)):
        missing = [f for f in region_factors if region_table is None or f not in region_table.columns]
        raise spelled("contrasts=... or region_table=...", "--contrasts FILE or --region-table FILE", UsageError,
                      f"within {noun(missing, 'factor')} {', '.join(missing)} found in neither contrasts.tsv nor "
                      "regions.tsv; give the table that holds them ({option})")
    if between is not None and between in factors:
        raise UsageError(f"{between!r} is both a within and the between factor")

    # contrast cells
    if contrast_factors:
        ctab = contrasts.copy()
        for f in contrast_factors:
            ctab[f] = _group_labels(ctab[f])
        ctab = ctab.dropna(subset=contrast_factors)
        ctab = ctab[ctab["contrast"].isin(set(values["contrast"].astype(str)))]
        c_levels = [_levels_in_order(ctab[f]) for f in contrast_factors]
        cell_of = {tuple(row[f] for f in contrast_factors): row["contrast"] for _, row in ctab.iterrows()}
        dup = ctab.duplicated(subset=contrast_factors, keep=False)
        if dup.any():
            raise DesignError(
                f"contrasts {', '.join(ctab.loc[dup, 'contrast'])} share the same levels of "
                f"{', '.join(contrast_factors)}; each combination of within levels must be one contrast"
            )
        absent = [c for c in itertools.product(*c_levels) if c not in cell_of]
        if absent:
            raise DesignError(
                f"no contrast in the values table for {', '.join('/'.join(a) for a in absent[:6])} of "
                f"{', '.join(contrast_factors)}; the within factors must be fully crossed"
            )
    else:
        if values["contrast"].nunique() != 1:
            raise UsageError(
                "the values table holds several contrasts but no within factor comes from contrasts.tsv; "
                "select one contrast first or give contrasts.tsv (--contrasts FILE) with a factor column"
            )
        c_levels, cell_of = [], {(): str(values["contrast"].iloc[0])}

    regions = region_order(values)
    units = _plan_units(region_table, region_factors, regions)
    r_levels = [list(dict.fromkeys(lv[i] for unit in units.values() for _, lv in unit)) for i in
                range(len(region_factors))]
    levels_all = [len(lv) for lv in c_levels] + [len(lv) for lv in r_levels]
    names_all = contrast_factors + region_factors
    if any(k < 2 for k in levels_all):
        one = [n for n, k in zip(names_all, levels_all) if k < 2]
        raise DesignError(f"within {noun(one, 'factor')} {', '.join(one)}: fewer than two levels in the data")

    mats = {c: pivot_contrast(values, c) for c in dict.fromkeys(cell_of.values())}
    ids = list(dict.fromkeys(pid for m in mats.values() for pid in m.index))
    groups = None
    group_levels: list[str] = []
    if between is not None:
        labels = _group_labels(join_participants(ids, participants, [between])[between])
        group_levels = _levels_in_order(labels)
        if len(group_levels) < 2:
            raise DesignError(f"between column {between!r} has {plural(len(group_levels), 'level')}; need at least two")
        groups = labels

    unit_names, arrays, kept, excluded, cell_maps = [], [], [], [], []
    for name, members in units.items():
        by_level = {lv: r for r, lv in members}
        cols, cells = [], []
        for ccell in itertools.product(*c_levels) if c_levels else [()]:
            for rcell in itertools.product(*r_levels) if r_levels else [()]:
                region = by_level.get(rcell)
                if region is None:
                    cols = None
                    break
                cells.append([cell_of[ccell], region, [*ccell, *rcell]])
                m = mats[cell_of[ccell]]
                cols.append(m[region].reindex(ids) if region in m.columns else pd.Series(np.nan, index=ids))
            if cols is None:
                break
        if cols is None:
            warnings.warn(f"repeated-measures: {name} lacks a region for every level of "
                          f"{', '.join(region_factors)}; skipped", MissingValueWarning, stacklevel=3)
            continue
        frame = pd.concat(cols, axis=1)
        complete = frame.notna().all(axis=1)
        if groups is not None:
            complete &= groups.reindex(ids).notna().to_numpy()
        unit_names.append(name)
        cell_maps.append(json.dumps(cells, ensure_ascii=False))
        arrays.append(frame.to_numpy(float))
        kept.append(complete.to_numpy())
        excluded.append([pid for pid, ok in zip(ids, complete) if not ok])
    if not unit_names:
        raise DesignError("repeated-measures: no region has a value for every cell of the within factors")

    n_complete = np.array([k.sum() for k in kept])
    check_minimum_n(n_complete, unit_names, minimum=(len(group_levels) or 1) + 1, what="complete participants",
                    context="repeated-measures")
    dropped = [(u, e) for u, e in zip(unit_names, excluded) if e]
    if dropped:
        warnings.warn(
            "repeated-measures: participants without a value in every cell excluded (complete cases): "
            + "; ".join(f"{u}: {', '.join(e)}" for u, e in dropped),
            MissingValueWarning, stacklevel=3,
        )

    frames = []
    # units sharing the same complete participants are computed together (a unit is a slice of one array)
    patterns: dict[bytes, list[int]] = {}
    for i, k in enumerate(kept):
        patterns.setdefault(k.tobytes(), []).append(i)
    pieces: dict[int, tuple] = {}
    for members in patterns.values():
        mask = kept[members[0]]
        y = np.stack([arrays[i][mask] for i in members])
        codes = None
        if groups is not None:
            g = groups.reindex(ids).to_numpy()[mask]
            codes = np.array([group_levels.index(v) for v in g])
            present = np.unique(codes)
            if present.size < len(group_levels):
                codes = np.searchsorted(present, codes)
        res = rm_anova(y, levels_all, groups=codes, between_observed=between_observed)
        for j, i in enumerate(members):
            pieces[i] = (res, j)
    effs = pieces[0][0]["effects"]
    for e_index, eff in enumerate(effs):
        term = eff.name(names_all, between)
        cols = {k: np.array([pieces[i][0][k][e_index, pieces[i][1]] for i in range(len(unit_names))])
                for k in ("df1", "df2", "f", "p", "epsilon_gg", "epsilon_hf", "p_gg", "p_hf", "mauchly_w",
                          "mauchly_p", "partial_eta2", "generalized_eta2")}
        _, lo, hi = partial_eta2_interval(cols["f"], cols["df1"], cols["df2"], confidence)
        frames.append(result_rows(
            unit_names, design="repeated-measures", term=term, confidence=confidence, n=n_complete,
            df=cols["df2"], statistic=cols["f"], statistic_type="F", p=cols["p"], effect_size=cols["partial_eta2"],
            effect_size_type="partial_eta2", effect_size_ci_low=lo, effect_size_ci_high=hi, df1=cols["df1"],
            df_method="univariate", group_column=between, levels=",".join(group_levels) or None,
            excluded_ids=[join_ids(e) for e in excluded], epsilon_gg=cols["epsilon_gg"],
            epsilon_hf=cols["epsilon_hf"], p_gg=cols["p_gg"], p_hf=cols["p_hf"], mauchly_w=cols["mauchly_w"],
            mauchly_p=cols["mauchly_p"], generalized_eta2=cols["generalized_eta2"], within=",".join(names_all),
            contrast=",".join(dict.fromkeys(cell_of.values())), cells=cell_maps,
        ))  # fmt: skip
    if posthoc:
        frames.append(_posthoc(unit_names, arrays, kept, excluded, names_all, c_levels + r_levels, confidence,
                               posthoc_correction))
    return pd.concat(frames, ignore_index=True)


def _posthoc(unit_names, arrays, kept, excluded, names, levels, confidence, correction):
    """Pairwise paired t-tests of each within factor's marginal means, corrected within factor and unit."""
    from .corrections import adjust
    from .designs import one_sample_matrix

    shape = [len(lv) for lv in levels]
    out = []
    for f, (factor, labels) in enumerate(zip(names, levels)):
        pairs = list(itertools.combinations(range(len(labels)), 2))
        p_all = np.full((len(pairs), len(unit_names)), np.nan)
        rows = []
        for k, (a, b) in enumerate(pairs):
            diffs = np.full((max(len(x) for x in arrays), len(unit_names)), np.nan)
            for u, (y, keep) in enumerate(zip(arrays, kept)):
                cube = y[keep].reshape((-1, *shape))
                marg = np.moveaxis(cube, f + 1, 1).reshape(cube.shape[0], shape[f], -1).mean(axis=2)
                diffs[: keep.sum(), u] = marg[:, a] - marg[:, b]
            r = one_sample_matrix(diffs, confidence=confidence)
            p_all[k] = r["p"]
            rows.append((f"{factor}: {labels[a]} - {labels[b]}", r))
        p_adj = np.vstack([adjust(p_all[:, u], correction) if correction != "none" else p_all[:, u]
                           for u in range(len(unit_names))]).T
        for k, (term, r) in enumerate(rows):
            out.append(result_rows(
                unit_names, design="repeated-measures", term=term, confidence=confidence, n=r["n"].astype(int),
                estimate=r["mean"], se=r["se"], df=r["df"], statistic=r["t"], statistic_type="t", p=r["p"],
                ci_low=r["ci_low"], ci_high=r["ci_high"], effect_size=r["d"], effect_size_type="d_z",
                effect_size_ci_low=r["d_low"], effect_size_ci_high=r["d_high"], df_method="student",
                excluded_ids=[join_ids(e) for e in excluded], within=",".join(names), p_posthoc=p_adj[k],
                posthoc_correction=correction, posthoc_family=len(pairs),
            ))  # fmt: skip
    return pd.concat(out, ignore_index=True)


@register("region-difference")
def region_difference(
    values: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    confidence: float = 0.95,
    regions: str | Sequence[str],
    contrast: str,
    versus: str | None = None,
) -> pd.DataFrame:
    """Within-participant difference between two regions (one row per pair), as a paired t-test.

    Parameters
    ----------
    values : DataFrame
        Region values table.
    participants : DataFrame, optional
        Not used.
    confidence : float
        Confidence level.
    regions : str or sequence of str
        Two regions ``"A,B"`` (or more: every pair in the order given).
    contrast : str
        Contrast tested.
    versus : str, optional
        A second contrast: then the term is the region x contrast interaction ``(A - B) x (C - V)``.

    Returns
    -------
    DataFrame
        One row per pair: region ``"A - B"``, term ``"A - B"`` (or the interaction), n, estimate (mean
        difference), se, df, t, p, CI, effect_size ``d_z`` with its noncentral-t interval.

    Notes
    -----
    The paired t-test of per-participant differences (:func:`roikit.stats.designs.one_sample_matrix`), so it is
    checked by the same references as the paired design (scipy.stats.ttest_rel).
    """
    from .designs import one_sample_matrix
    from .effect_sizes import d_interval

    values = check_values(values)
    names = _split(regions)
    if len(names) < 2:
        raise UsageError("region-difference needs two regions: regions='A,B' (--regions A,B)")
    present = region_order(values)
    unknown = [r for r in names if r not in present]
    if unknown:
        raise UsageError(f"{noun(unknown, 'region')} {', '.join(unknown)} not in the values table; available: "
                         f"{', '.join(present)}")
    y = pivot_contrast(values, contrast)
    if versus is not None:
        y = y - pivot_contrast(values, versus).reindex(index=y.index, columns=y.columns)
    frames = []
    for a, b in itertools.combinations(names, 2):
        diff = (y[a] - y[b]).to_frame(f"{a} - {b}")
        excluded = [list(diff.index[diff.iloc[:, 0].isna()])]
        d = diff.dropna()
        check_minimum_n(np.array([len(d)]), [f"{a} - {b}"], minimum=2, what="participants with both regions",
                        context="region-difference")
        r = one_sample_matrix(d.to_numpy(float), confidence=confidence)
        es, lo, hi = d_interval(r["t"], r["n"], confidence)
        term = f"{a} - {b}" if versus is None else f"({a} - {b}) x ({contrast} - {versus})"
        frames.append(result_rows(
            [f"{a} - {b}"], design="region-difference", term=term, confidence=confidence, n=r["n"].astype(int),
            estimate=r["mean"], se=r["se"], df=r["df"], statistic=r["t"], statistic_type="t", p=r["p"],
            ci_low=r["ci_low"], ci_high=r["ci_high"], effect_size=es, effect_size_type="d_z",
            effect_size_ci_low=lo, effect_size_ci_high=hi, df_method="student", contrast=contrast, versus=versus,
            excluded_ids=[join_ids(e) for e in excluded], regions_compared=f"{a},{b}",
        ))  # fmt: skip
    return pd.concat(frames, ignore_index=True)
