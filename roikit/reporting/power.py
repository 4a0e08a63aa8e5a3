"""Power-curve figures for planning the next study (``roikit plan --figure``).

Power against the number of participants, one line per effect size, the target power marked by a dashed line and
the plan table's rows (the n solved for, or given) by points on the curves; the crossed design's grid with the limit
each number of stimuli sets; simulated power with its Monte Carlo error. Colours are the colour-blind-safe palette
of Okabe & Ito (2008), and the lines differ in dash pattern too; sizes are a journal column (85 mm), every text at
least 7 pt, true minus signs. Also the methods text's sensitivity sentence (:func:`sensitivity_sentence`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .._options import noun
from ..errors import UsageError
from ..stats.power import EFFECT_SIZE_TYPES, T_DESIGNS, sensitivity, t_power
from .format import format_number

__all__ = ["power_curve", "crossed_power_figure", "simulated_power_figure", "sensitivity_sentence"]

#: A journal column (mm), as ``figures.JOURNAL_WIDTHS_MM["single"]`` (matplotlib is imported only to draw).
_SINGLE_MM = 85.0

_MM = 1 / 25.4
#: Okabe & Ito (2008) colours, high contrast on white first; each line also has its own dash pattern.
_COLORS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000")
_DASHES = ("-", (0, (5, 2)), (0, (1.5, 1.5)), (0, (5, 1.5, 1.5, 1.5)), (0, (8, 2)), (0, (3, 3)), (0, (1, 3)))
_SYMBOL = {"d": "$d$", "d_z": "$d_z$", "g": "$g$"}
_CORRECTION_NAMES = {"holm": "Holm", "bonferroni": "Bonferroni", "none": "uncorrected"}


def _minus(x: float, digits: int = 2) -> str:
    """A number with a true minus sign (U+2212)."""
    return f"{x:.{digits}f}".replace("-", "\u2212")


def power_curve(
    data: pd.DataFrame,
    *,
    ax=None,
    n_max: int | None = None,
    width_mm: float = _SINGLE_MM,
    height_mm: float = 62.0,
):
    """Power against n for every effect size of a plan table, with the target power and the n needed marked.

    Parameters
    ----------
    data : DataFrame
        A plan table from :func:`roikit.stats.power.plan_t` (or ``plan_from_results``): columns design,
        effect_size, effect_size_type, n, alpha_per_test, target_power, alternative (ratio from n_second / n for
        two-group). One line per distinct effect size (at most seven; the largest |effect| first).
    ax : Axes, optional
        Draw here; by default a new figure ``width_mm`` x ``height_mm``.
    n_max : int, optional
        Right end of the n axis (default: 1.3 x the largest n in the table, at least 10).
    width_mm, height_mm : float
        Size of a new figure (default one journal column, 85 mm).

    Returns
    -------
    Axes
    """
    needed = {"design", "effect_size", "effect_size_type", "n", "alpha_per_test"}
    missing = sorted(needed - set(data.columns))
    if missing:
        raise UsageError(f"power_curve: plan table lacks {noun(missing, 'column')} {', '.join(missing)}; pass a "
                         "roikit plan table")
    rows = data[data["design"].isin(T_DESIGNS) & np.isfinite(pd.to_numeric(data["effect_size"], errors="coerce"))]
    if rows.empty:
        raise UsageError("power_curve: no t-design rows with an effect size to draw (designs one-sample, paired, "
                         "two-group)")
    design = str(rows["design"].iat[0])
    a_test = float(rows["alpha_per_test"].iat[0])
    alternative = str(rows["alternative"].iat[0]) if "alternative" in rows else "two-sided"
    target = pd.to_numeric(rows.get("target_power", pd.Series(dtype=float)), errors="coerce").dropna()
    target = float(target.iat[0]) if len(target) else None
    ratio = 1.0
    if design == "two-group" and "ratio" in rows and pd.notna(rows["ratio"].iat[0]):
        ratio = float(rows["ratio"].iat[0])
    effects = sorted(pd.unique(rows["effect_size"].astype(float)), key=lambda v: -abs(v))[: len(_COLORS)]
    ns = pd.to_numeric(rows["n"], errors="coerce").dropna()
    top = int(n_max) if n_max else max(10, int(np.ceil(1.3 * (ns.max() if len(ns) else 10))))
    grid = np.arange(2, top + 1)
    es_type = str(rows["effect_size_type"].iat[0])
    symbol = _SYMBOL.get(es_type, es_type)
    from matplotlib.figure import Figure

    from .figures import style

    with style():
        if ax is None:
            fig = Figure(figsize=(width_mm * _MM, height_mm * _MM), layout="constrained")
            ax = fig.add_subplot()
        labelled: set[int] = set()
        for k, d in enumerate(effects):
            pw = t_power(d, grid, design=design, alpha=a_test, alternative=alternative, ratio=ratio)
            color, dash = _COLORS[k], _DASHES[k]
            ax.plot(grid, pw, color=color, ls=dash, lw=1.1, label=f"{symbol} = {_minus(d)}")
            # the table's own rows on this curve: the n solved for, or the n given
            for r in rows[rows["effect_size"].astype(float) == d].itertuples():
                n_row, p_row = int(r.n), float(r.power)
                if 2 <= n_row <= top and np.isfinite(p_row):
                    ax.plot([n_row], [p_row], marker="o", ms=3.5, color=color, mec="white", mew=0.6, zorder=3)
                    if n_row not in labelled:  # one label per n (the curves are drawn largest effect first)
                        labelled.add(n_row)
                        ax.annotate(f"{n_row}", (n_row, p_row), xytext=(3, -9), textcoords="offset points",
                                    fontsize=7, color=color)
        if target is not None:
            ax.axhline(target, color="0.35", lw=0.7, ls=(0, (4, 3)), zorder=0.5,
                       label=f"target power {target:.2f}".replace("0.", ".", 1))
        ax.set_xlim(grid[0], grid[-1])
        ax.set_ylim(0, 1.0)
        ax.set_yticks([0, 0.2, 0.4, 0.6, 0.8, 1.0], ["0", ".2", ".4", ".6", ".8", "1"])
        unit = "participants per group" if design == "two-group" else "participants"
        if design == "two-group" and ratio != 1.0:
            unit = f"first group; the second {ratio:.3g} times as large"
        ax.tick_params(labelsize=7)  # every text at least 7 pt
        ax.set_xlabel(f"n ({unit})")
        ax.set_ylabel("power")
        family = int(rows["family_size"].iat[0]) if "family_size" in rows else 1
        corr = str(rows["correction"].iat[0]) if "correction" in rows else "none"
        sided = {"two-sided": "two-sided", "greater": "one-sided", "less": "one-sided"}[alternative]
        title = f"{design}, {sided} \u03b1 = {_alpha_text(a_test)} per test"
        if family > 1:
            title += f"\n({_CORRECTION_NAMES.get(corr, corr)} across {family} regions)"
        ax.set_title(title, fontsize=7, loc="left")
        ax.legend(loc="best", fontsize=7, handlelength=2.6)
    return ax


def _alpha_text(a: float) -> str:
    text = f"{a:.3g}"
    return text[1:] if text.startswith("0.") else text


def crossed_power_figure(
    data: pd.DataFrame,
    *,
    ax=None,
    width_mm: float = _SINGLE_MM,
    height_mm: float = 62.0,
):
    """Power against participants for each number of stimuli (crossed design), with each line's limit.

    Parameters
    ----------
    data : DataFrame
        A grid from :func:`roikit.stats.power.crossed_power` (columns n_participants, n_stimuli, power,
        power_limit; target_power when present).
    ax : Axes, optional
    width_mm, height_mm : float

    Returns
    -------
    Axes
    """
    needed = {"n_participants", "n_stimuli", "power", "power_limit"}
    missing = sorted(needed - set(data.columns))
    if missing:
        raise UsageError(f"crossed_power_figure: grid lacks {noun(missing, 'column')} {', '.join(missing)}")
    stimuli = sorted(pd.unique(data["n_stimuli"].astype(int)))[: len(_COLORS)]
    from matplotlib.figure import Figure

    from .figures import style

    with style():
        if ax is None:
            fig = Figure(figsize=(width_mm * _MM, height_mm * _MM), layout="constrained")
            ax = fig.add_subplot()
        for k, q in enumerate(stimuli):
            part = data[data["n_stimuli"].astype(int) == q].sort_values("n_participants")
            color = _COLORS[k]
            ax.plot(part["n_participants"], part["power"], color=color, ls=_DASHES[k], lw=1.1, marker="o", ms=2.5,
                    label=f"{q} stimuli")
            limit = float(part["power_limit"].iat[0])
            if limit < 0.999:
                ax.axhline(limit, color=color, lw=0.6, ls=(0, (1, 2)), zorder=0.5)
        if "target_power" in data and pd.notna(data["target_power"]).any():
            target = float(data["target_power"].dropna().iat[0])
            ax.axhline(target, color="0.35", lw=0.7, ls=(0, (4, 3)),
                       label=f"target power {target:.2f}".replace("0.", ".", 1))
        ax.set_ylim(0, 1.0)
        ax.set_yticks([0, 0.2, 0.4, 0.6, 0.8, 1.0], ["0", ".2", ".4", ".6", ".8", "1"])
        ax.tick_params(labelsize=7)
        ax.set_xlabel("participants")
        ax.set_ylabel("power")
        title = "dotted: the limit with unlimited participants"
        if "region" in data and data["region"].nunique() == 1:
            title = f"{data['region'].iat[0]}\n{title}"
        ax.set_title(title, fontsize=7, loc="left")
        ax.legend(loc="best", fontsize=7)
    return ax


def simulated_power_figure(
    data: pd.DataFrame,
    *,
    target: float | None = None,
    ax=None,
    width_mm: float = _SINGLE_MM,
    height_mm: float = 62.0,
):
    """Simulated power against n, one line per region (or per assumed mean), with +/- 2 Monte Carlo SE.

    Parameters
    ----------
    data : DataFrame
        A table from :func:`roikit.stats.power.simulate_precision_weighted` (columns n, power, mc_se; region or
        mean tells the lines apart). At most seven lines: the ones reaching the highest power.
    target : float, optional
        Target power to mark (default: the table's target_power, when present).
    ax : Axes, optional
    width_mm, height_mm : float

    Returns
    -------
    Axes
    """
    needed = {"n", "power", "mc_se"}
    missing = sorted(needed - set(data.columns))
    if missing:
        raise UsageError(f"simulated_power_figure: table lacks {noun(missing, 'column')} {', '.join(missing)}")
    key = "region" if "region" in data and data["region"].notna().any() else "mean"
    order = data.groupby(key, sort=False)["power"].max().sort_values(ascending=False).index[: len(_COLORS)]
    if target is None and "target_power" in data and pd.notna(data["target_power"]).any():
        target = float(data["target_power"].dropna().iat[0])
    many = len(order) > 3
    from matplotlib.figure import Figure

    from .figures import style

    with style():
        if ax is None:
            fig = Figure(figsize=(width_mm * _MM, (height_mm + (22 if many else 0)) * _MM), layout="constrained")
            ax = fig.add_subplot()
        for k, name in enumerate(order):
            part = data[data[key] == name].sort_values("n")
            label = str(name) if key == "region" else f"mean {_minus(float(name), 3)}"
            ax.errorbar(part["n"], part["power"], yerr=2 * part["mc_se"], color=_COLORS[k], ls=_DASHES[k], lw=1.1,
                        marker="o", ms=2.5, capsize=1.5, elinewidth=0.7, label=label)
        if target is not None:
            ax.axhline(target, color="0.35", lw=0.7, ls=(0, (4, 3)),
                       label=f"target power {target:.2f}".replace("0.", ".", 1))
        ax.set_ylim(0, 1.0)
        ax.set_yticks([0, 0.2, 0.4, 0.6, 0.8, 1.0], ["0", ".2", ".4", ".6", ".8", "1"])
        ax.tick_params(labelsize=7)
        ax.set_xlabel("participants")
        ax.set_ylabel("power (simulated, \u00b12 MC SE)")
        title = "precision-weighted design"
        if "alpha_per_test" in data:
            title += f", two-sided \u03b1 = {_alpha_text(float(data['alpha_per_test'].iat[0]))} per test"
            family = int(data["family_size"].iat[0]) if "family_size" in data else 1
            if family > 1:
                corr = str(data["correction"].iat[0])
                title += f"\n({_CORRECTION_NAMES.get(corr, corr)} across {family} regions)"
        ax.set_title(title, fontsize=7, loc="left")
        if many:  # below the axes, clear of the curves
            ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=2, fontsize=7)
        else:
            ax.legend(loc="best", fontsize=7)
    return ax


_SENTENCE_SYMBOL = {"d": "*d*", "d_z": "*d*_{z}"}
_CORRECTION_PHRASE = {"holm": "Holm", "bonferroni": "Bonferroni", "fdr": "Benjamini–Hochberg",
                      "fwe": "permutation family-wise", "permutation-fwe": "permutation family-wise"}


def sensitivity_sentence(results: pd.DataFrame, *, power: float = 0.8, alpha: float = 0.05) -> str:
    """One sentence per t-design analysis: the smallest effect it could detect with ``power`` at its alpha.

    Parameters
    ----------
    results : DataFrame
        Rows of one analysis (or several) of a ``roikit stats`` results table.
    power, alpha : float
        As in :func:`roikit.stats.power.sensitivity`.

    Returns
    -------
    str
        roikit markup (``*n*``, ``*d*_{z}``), e.g. "With *n* = 32 per region and *α* = .005 per test (Holm across
        10 regions, planned at the threshold for the smallest *p* value), the smallest effect detectable with 80%
        power was *d*_{z} = 0.51."; empty for designs without a closed-form sensitivity.

    Examples
    --------
    >>> import pandas as pd
    >>> rows = pd.DataFrame({"design": ["paired"] * 2, "term": ["novel - familiar"] * 2, "n": [32, 32],
    ...                      "family_size": [2, 2], "correction": ["holm,fdr"] * 2})
    >>> sensitivity_sentence(rows)[:40]
    'With *n* = 32 and *α* = .025 per test (H'
    """
    table = sensitivity(results, power=power, alpha=alpha)
    sentences = []
    for r in table.itertuples():
        n = f"*n* = {r.n}" if r.design != "two-group" else f"*n* = {r.n} and {r.n_second} per group"
        a = _alpha_text(r.alpha_per_test)
        if r.family_size > 1 and r.correction != "none":
            name = _CORRECTION_PHRASE.get(r.correction, r.correction)
            where = (f" ({name} across {r.family_size} regions, planned at its threshold for the smallest *p* "
                     "value)")
        elif r.family_size > 1:
            where = f" (uncorrected across {r.family_size} regions)"
        else:
            where = ""
        symbol = _SENTENCE_SYMBOL.get(EFFECT_SIZE_TYPES.get(r.design, "d"), "*d*")
        sentences.append(f"With {n} and *α* = {a} per test{where}, the smallest effect detectable with "
                         f"{format_number(100 * r.power, 0)}% power was {symbol} = {format_number(r.effect_size)}.")
    return " ".join(sentences)
