"""Participant-level figures: dot plots, forest plots, precision-sized points, per-stimulus estimates, covariates.

Every participant is drawn as a point (jittered, never hidden behind a bar), the estimate and its confidence
interval sit beside the points, and a dashed zero line marks "no effect". Groups differ in colour *and*
marker; the colours are the colour-blind-safe palette of Okabe & Ito (2008, "Color Universal Design",
https://jfly.uni-koeln.de/color/). Outliers and low-coverage participants flagged by the diagnostics are
marked (rings and their ids), never removed.

Each function takes the data first and keyword options, draws on ``ax`` (or a new figure sized for a
journal column) and returns the Axes (or the Figure for multi-panel figures); none calls ``show()``. Save with
:func:`save_figure` (PDF and SVG with embedded fonts / outlined text, and a 300-dpi PNG).

Print sizes: widths are journal columns (single 85 mm, one-and-a-half 120 mm, double 180 mm), no figure is taller
than 225 mm (regions that do not fit go onto further pages: :func:`participant_pages`, :func:`forest_pages`), and
no text is smaller than 7 pt at that size. Numbers use the true minus sign (U+2212). In Jupyter a returned Figure
(or ``ax.figure``) displays as the cell's last expression or with ``display(fig)``.

Examples
--------
>>> ax = participant_plot(values, region="left hippocampus", contrast="novel", versus="familiar",
...                       results=results)                                            # doctest: +SKIP
>>> save_figure(ax.figure, "figures/paired_left-hippocampus", width="single")      # doctest: +SKIP
"""

from __future__ import annotations

import contextlib
import textwrap
import io
import os
from pathlib import Path
from typing import Any, Literal, Sequence

import matplotlib as mpl
import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.collections import LineCollection
from matplotlib.transforms import blended_transform_factory
from scipy import stats

from .._options import noun, spell
from .._tables import atomic_write_bytes, check_output
from ..errors import UsageError
from ._common import (
    REQUIRED_RESULTS,
    REQUIRED_VALUES,
    attach,
    check_columns,
    col,
    group_of,
    has_values,
    ids,
    number,
    ordered_unique,
    text,
)
from .format import BOUNDED_EFFECTS, correction_name, format_ci, format_number, format_p, is_missing

__all__ = [
    "OKABE_ITO",
    "GROUP_COLORS",
    "GROUP_MARKERS",
    "JOURNAL_WIDTHS_MM",
    "MAX_HEIGHT_MM",
    "FOREST_ROWS_PER_PAGE",
    "MIN_FONT_PT",
    "style",
    "participant_plot",
    "participant_figure",
    "participant_pages",
    "forest_plot",
    "forest_pages",
    "precision_plot",
    "stimulus_plot",
    "covariate_plot",
    "interaction_plot",
    "interaction_pages",
    "save_figure",
    "mean_ci",
    "fit_line",
]

#: The eight colours of Okabe & Ito (2008), distinguishable with the common forms of colour blindness.
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky blue": "#56B4E9",
    "bluish green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish purple": "#CC79A7",
}
#: Group colours (Okabe-Ito, high contrast on white first) and markers: a group differs in both.
GROUP_COLORS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9")
GROUP_MARKERS = ("o", "s", "^", "D", "v", "P")
#: Journal figure widths in millimetres: single (85-90), one-and-a-half (114-140) and double column (180)
#: (common practice across journals' artwork guidelines, no single source).
JOURNAL_WIDTHS_MM = {"single": 85.0, "one-and-a-half": 120.0, "double": 180.0}
#: Tallest figure (mm): a page's text block; more regions go onto further pages, never a taller figure.
MAX_HEIGHT_MM = 225.0
#: Smallest text at print size (points).
MIN_FONT_PT = 7.0

_MM = 1 / 25.4
_ESTIMATE_COLOR = "#000000"
_ZERO_STYLE = dict(color="0.45", lw=0.7, ls=(0, (4, 3)), zorder=0.5)
_EFFECT_MATH = {"d": "$d$", "d_z": "$d_z$", "g": "$g$", "partial_eta2": r"$\eta^2_p$"}
#: Markers with one meaning each: group estimates (filled circle), differences (filled diamond), outliers (ring),
#: low coverage (open hexagon). Group markers (GROUP_MARKERS) are used only for participants.
_DIFF_MARKER = "D"
_LOW_MARKER = "h"
_LOW_COLOR = "#CC79A7"
_DEFAULT_LABEL = "region value"
_LEGEND_HEIGHT_MM = 22.0  # below the panels: legend rows and the figure title
_FOREST_TOP_MM = 20.0  # forest plot: legend above, axis label below
_FOREST_ROW_MM = 8.0  # forest plot: one region (two lines of 7-pt annotation)
#: Rows of a forest plot that fit one figure of at most MAX_HEIGHT_MM.
FOREST_ROWS_PER_PAGE = int((MAX_HEIGHT_MM - _FOREST_TOP_MM) // _FOREST_ROW_MM)

Width = Literal["single", "one-and-a-half", "double"] | float


def _minus(s: str) -> str:
    """True minus signs (U+2212) for hyphen-minus before digits, as matplotlib's own tick labels use."""
    import re

    return re.sub(r"(?<![\w-])-(?=[\d.∞])", "\u2212", s)


def _math_text(s: str) -> str:
    """Escape the characters mathtext would interpret ($) so user text prints as given."""
    return s.replace("$", r"\$")


def _value_axis_label(value_label: str | None) -> str:
    """The values' axis label (default "region value"), wrapped to fit beside a 50-mm panel at 7 pt."""
    return textwrap.fill(_math_text(value_label), 30) if value_label else _DEFAULT_LABEL


@contextlib.contextmanager
def style():
    """Matplotlib settings for print: 7-pt text at journal widths, fonts embedded (TrueType in PDF, outlines in SVG).

    Use it around your own plots so they match roikit's (``with style(): ...``)."""
    rc = {
        "font.family": "DejaVu Sans",
        "font.size": 7.0,
        "axes.titlesize": 7.5,
        "axes.labelsize": 7.0,
        "xtick.labelsize": 7.0,
        "ytick.labelsize": 7.0,
        "legend.fontsize": 7.0,
        "figure.titlesize": 8.0,
        "axes.unicode_minus": True,
        "axes.linewidth": 0.6,
        "xtick.major.width": 0.6,
        "ytick.major.width": 0.6,
        "lines.linewidth": 0.9,
        "axes.spines.top": False,
        "axes.spines.right": False,
        "pdf.fonttype": 42,
        "ps.fonttype": 42,
        "svg.fonttype": "path",
        "svg.hashsalt": "roikit",  # the same ids in every run (default: random ones, so no two files are identical)
        "savefig.dpi": 300,
        "figure.dpi": 100,
        "legend.frameon": False,
    }
    with mpl.rc_context(rc):
        yield


def _width_mm(width: Width) -> float:
    if isinstance(width, str):
        if width not in JOURNAL_WIDTHS_MM:
            raise UsageError(f"width must be 'single', 'one-and-a-half', 'double' or millimetres, got {width!r}")
        return JOURNAL_WIDTHS_MM[width]
    value = float(width)
    if not 20 <= value <= 400:
        raise UsageError(f"width must lie between 20 and 400 mm, got {value}")
    return value


def _new_axes(ax, width: Width, height_mm: float):
    if ax is not None:
        return ax
    fig = Figure(figsize=(_width_mm(width) * _MM, height_mm * _MM), layout="constrained")
    return fig.add_subplot()


# --------------------------------------------------------------------------------------------- statistics
def mean_ci(x: Sequence[float], *, confidence: float = 0.95) -> tuple[float, float, float]:
    """Mean and its *t*-based confidence interval (``mean ± t_{n-1} SD/√n``); NaNs ignored.

    Notes
    -----
    Checked against ``scipy.stats.t.interval`` in the tests.
    """
    x = np.asarray(x, dtype=float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return np.nan, np.nan, np.nan
    m = float(x.mean())
    if x.size < 2:
        return m, np.nan, np.nan
    half = stats.t.ppf(0.5 + confidence / 2, x.size - 1) * x.std(ddof=1) / np.sqrt(x.size)
    return m, m - half, m + half


def fit_line(x: Sequence[float], y: Sequence[float], *, confidence: float = 0.95, grid: Sequence[float] | None = None):
    """Ordinary least squares line of ``y`` on ``x`` with the confidence band of the fitted mean.

    Returns
    -------
    grid, fit, low, high : arrays
        ``fit = b0 + b1 grid``; band ``fit ± t_{n-2} s sqrt(1/n + (grid - mean x)^2 / Sxx)``.

    Notes
    -----
    Checked against ``statsmodels`` ``OLS(...).get_prediction(...).conf_int()`` in the tests.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    if x.size < 3 or np.ptp(x) == 0:
        raise UsageError(f"a fitted line needs at least 3 finite points with distinct x, got {x.size}")
    grid = np.linspace(x.min(), x.max(), 100) if grid is None else np.asarray(grid, dtype=float)
    xm = x.mean()
    sxx = ((x - xm) ** 2).sum()
    b1 = ((x - xm) * (y - y.mean())).sum() / sxx
    b0 = y.mean() - b1 * xm
    resid = y - (b0 + b1 * x)
    s = np.sqrt((resid**2).sum() / (x.size - 2))
    fit = b0 + b1 * grid
    half = stats.t.ppf(0.5 + confidence / 2, x.size - 2) * s * np.sqrt(1 / x.size + (grid - xm) ** 2 / sxx)
    return grid, fit, fit - half, fit + half


# --------------------------------------------------------------------------------------------- helpers
def _pick_region(data: pd.DataFrame, region: str | None) -> str:
    regions = ordered_unique(data["region"].map(text))
    if region is None:
        if len(regions) == 1:
            return regions[0]
        raise UsageError(f"region is required when the values hold several regions ({', '.join(regions)})")
    if region not in regions:
        raise UsageError(f"region {region!r} not found in the values table (regions: {', '.join(regions)})")
    return region


def _results_rows(results: pd.DataFrame | None, *, region: str, designs: Sequence[str], contrast=None,
                  versus=None, term=None) -> pd.DataFrame:
    if results is None or len(results) == 0:
        return pd.DataFrame()
    r = results[(results["region"].map(text) == region) & (results["design"].map(text).isin(designs))]
    if contrast is not None and "contrast" in r.columns:
        r = r[r["contrast"].map(text) == contrast]
    if versus is not None and "versus" in r.columns:
        r = r[r["versus"].map(text) == versus]
    if term is not None:
        r = r[r["term"].map(text) == term]
    return r


def _flagged(rows: pd.DataFrame, column: str) -> set[str]:
    out: set[str] = set()
    for v in col(rows, column):
        out.update(ids(v))
    return out


def _low_coverage(part: pd.DataFrame, participant: str) -> set[str]:
    if "n_valid" not in part.columns or "n_voxels" not in part.columns:
        return set()
    nv = pd.to_numeric(part["n_voxels"], errors="coerce")
    cov = pd.to_numeric(part["n_valid"], errors="coerce") / nv.where(nv > 0)
    return set(part.loc[cov < 0.5, participant].astype(str))


def _jitter(keys: Sequence[str], half_width: float, seed) -> dict[str, float]:
    rng = np.random.default_rng(seed)
    return {k: float(v) for k, v in zip(keys, rng.uniform(-half_width, half_width, len(keys)))}


def _estimate(ax, x: float, m: float, lo: float, hi: float, *, color=_ESTIMATE_COLOR, marker="o", label=None,
              size=5.0):
    if not np.isfinite(m):
        return
    if np.isfinite(lo) and np.isfinite(hi):
        ax.plot([x, x], [lo, hi], color=color, lw=1.3, solid_capstyle="butt", zorder=4)
    ax.plot([x], [m], marker=marker, color=color, markerfacecolor=color,
            markeredgecolor=color, markersize=size, mew=1.1, ls="none", zorder=5, label=label)


def _mark(ax, xs, ys, who, outliers: set, low: set, *, size: float):
    """Rings around flagged points, plus their ids."""
    for x, y, w in zip(xs, ys, who):
        if not np.isfinite(y):
            continue
        if w in outliers:
            ax.scatter([x], [y], s=size * 4.5, facecolors="none", edgecolors="black", linewidths=0.8, zorder=6,
                       label="outlier (modified z > 3.5)")
        if w in low:
            ax.scatter([x], [y], s=size * 5.5, marker=_LOW_MARKER, facecolors="none", edgecolors=_LOW_COLOR,
                       linewidths=0.9, zorder=6, label="low coverage (< 50% voxels)")
        if w in outliers or w in low:
            ax.annotate(w, (x, y), xytext=(4, 0), textcoords="offset points", fontsize=MIN_FONT_PT, va="center",
                        color="0.25", zorder=7)


def _legend_rank(label: str) -> int:
    """Legend order: data points first, then estimates, then flags."""
    if label.startswith(("outlier", "low coverage")):
        return 3
    if any(w in label for w in ("mean", "estimate", "difference and", "line", "band", "model b")):
        return 2
    return 1


def _dedupe_legend(ax, owned: bool, **kwargs):
    """One entry per label; below the plot when roikit made the figure, inside the Axes otherwise."""
    handles, labels = ax.get_legend_handles_labels()
    seen: dict[str, Any] = {}
    for h, lab in zip(handles, labels):
        if lab and not lab.startswith("_") and lab not in seen:
            seen[lab] = h
    if not seen:
        return seen
    seen = dict(sorted(seen.items(), key=lambda kv: _legend_rank(kv[0])))
    opts = dict(handletextpad=0.3, columnspacing=1.0, borderaxespad=0.2, markerscale=0.8)
    opts.update(kwargs)
    if owned:
        wide = max(len(k) for k in seen) > 28
        ax.figure.legend(list(seen.values()), list(seen.keys()), loc="outside lower center",
                         ncols=1 if wide or len(seen) == 1 else 2, **opts)
    else:
        ax.legend(list(seen.values()), list(seen.keys()), loc="best", **opts)
    return seen


# --------------------------------------------------------------------------------------------- participant plots
def participant_plot(
    data: pd.DataFrame,
    *,
    region: str | None = None,
    contrast: str | None = None,
    versus: str | None = None,
    contrasts: Sequence[str] | None = None,
    group: str | None = None,
    levels: Sequence[str] | None = None,
    participants: pd.DataFrame | None = None,
    results: pd.DataFrame | None = None,
    design: str | None = None,
    value: str = "value",
    participant: str = "participant_id",
    confidence: float = 0.95,
    difference: bool = True,
    seed: int | None = 0,
    width: Width = "single",
    legend: bool = True,
    value_label: str | None = None,
    ax=None,
):
    """Every participant's region value as a point, with the estimate and its CI beside the points.

    Parameters
    ----------
    data : DataFrame
        Region values table (participant_id, contrast, region, value, [n_voxels, n_valid]).
    region : str, optional
        Region to draw (required when the table holds several).
    contrast, versus : str, optional
        One contrast (one-sample or between-group design), or two contrasts compared within participants
        (paired design: each participant's values are connected, and the differences are drawn to the right).
    contrasts : sequence of str, optional
        Several contrasts on the x axis, connected within participants (e.g. a mixed design over stimuli).
    group : str, optional
        Column (of ``data`` or ``participants``) with the group of each participant; groups are drawn side by
        side with distinct colour and marker.
    levels : sequence of str, optional
        Order of the groups (default: order of appearance).
    participants : DataFrame, optional
        participants.tsv (for ``group``).
    results : DataFrame, optional
        Group results; the matching row gives the estimate and CI drawn beside the points (so the figure and
        the table agree) and the participants to flag (``outlier_ids``, ``low_coverage_ids``).
    design : str, optional
        Use only the results rows of this design (e.g. ``fixed-effects`` when results hold several designs
        for the same contrast).
    value, participant : str
        Column names.
    confidence : float
        Level of the intervals computed here (means per condition and group).
    difference : bool
        For two contrasts, also draw the within-participant differences (paired) or the group difference.
    seed : int or None
        Seed of the horizontal jitter.
    width : "single", "double" or float
        Figure width (mm) when a new figure is made.
    legend : bool
        Draw a legend.
    value_label : str, optional
        Axis label of the values with their unit (e.g. ``"Parameter estimate (a.u.)"``, ``"% signal change"``);
        default "region value".
    ax : matplotlib Axes, optional
        Axes to draw on.

    Returns
    -------
    matplotlib.axes.Axes
    """
    check_columns(data, REQUIRED_VALUES, "region values table")
    region = _pick_region(data, region)
    part = data[data["region"].map(text) == region]
    available = ordered_unique(part["contrast"].map(text))
    if contrasts is not None:
        conditions = [str(c) for c in contrasts]
    elif contrast is not None:
        conditions = [contrast] + ([versus] if versus is not None else [])
    elif len(available) == 1:
        conditions = available
    else:
        raise UsageError(f"contrast is required: the values hold contrasts {', '.join(available)}")
    unknown = [c for c in conditions if c not in available]
    if unknown:
        raise UsageError(f"{noun(unknown, 'contrast')} {', '.join(unknown)} not found for region {region!r} "
                         f"(available: {', '.join(available)})")
    part = part[part["contrast"].map(text).isin(conditions)].copy()
    part[participant] = part[participant].astype(str)
    if group is not None:
        labels = group_of(part, participants, group)
        if labels is None:
            raise UsageError(f"group column {group!r} is neither in the values table nor in participants; "
                             f"pass {spell('participants')} or choose an existing column")
        part["_group"] = labels.to_numpy()
        groups = [str(g) for g in levels] if levels is not None else ordered_unique(part["_group"])
        part = part[part["_group"].isin(groups)]
    else:
        part["_group"] = "all"
        groups = ["all"]
    part["_value"] = pd.to_numeric(part[value], errors="coerce")

    # which test does this picture show?
    if len(conditions) == 2 and len(groups) == 1:
        mode = "paired"
        rows = _results_rows(results, region=region, designs=["paired"], contrast=conditions[0], versus=conditions[1])
    elif len(conditions) == 1 and len(groups) == 2:
        mode = "two-group"
        rows = _results_rows(results, region=region, designs=["two-group"], contrast=conditions[0])
    elif len(conditions) == 1 and len(groups) == 1:
        mode = "one-sample"
        rows = _results_rows(results, region=region, designs=["one-sample", "fixed-effects", "precision-weighted"],
                             contrast=conditions[0], term="mean")
    else:
        mode = "multi"
        rows = _results_rows(results, region=region, designs=["mixed", "glm", "two-group", "one-sample"])
        if "contrast" in rows.columns:
            rows = rows[rows["contrast"].map(text).isin(conditions + [""])]
    if design is not None and len(rows):
        rows = rows[rows["design"].map(text) == design]
    outliers = _flagged(rows, "outlier_ids")
    low = _flagged(rows, "low_coverage_ids") | _low_coverage(part, participant)

    wide = part.groupby([participant, "_group", "contrast"], sort=False, observed=True)["_value"].first().unstack("contrast")
    wide = wide.reindex(columns=conditions)
    who_all = [w for w, _ in wide.index]
    jit = _jitter(ordered_unique(who_all), 0.07 if len(groups) > 1 and len(conditions) > 1 else 0.09, seed)

    with style():
        owned = ax is None
        ax = _new_axes(ax, width, 72)
        point_size = 14.0
        between = len(conditions) == 1 and len(groups) > 1
        offsets = [0.0] * len(groups) if between or len(groups) == 1 else list(np.linspace(-0.2, 0.2, len(groups)))
        tick_pos, tick_lab = [], []
        for gi, g in enumerate(groups):
            color = GROUP_COLORS[gi % len(GROUP_COLORS)] if len(groups) > 1 else "#56B4E9"
            edge = GROUP_COLORS[gi % len(GROUP_COLORS)] if len(groups) > 1 else "#0072B2"
            marker = GROUP_MARKERS[gi % len(GROUP_MARKERS)]
            sub = wide[[lab == g for _, lab in wide.index]]
            who = [w for w, _ in sub.index]
            xs_by_cond = []
            for ci, c in enumerate(conditions):
                base = (gi if between else ci) + offsets[gi]
                xs = np.array([base + jit[w] for w in who])
                ys = sub[c].to_numpy(dtype=float)
                xs_by_cond.append((xs, ys))
                label = g if len(groups) > 1 else "participant"
                ax.scatter(xs, ys, s=point_size, marker=marker, facecolor=color, edgecolor=edge, alpha=0.75,
                           linewidths=0.4, zorder=3, label=label)
                if mode != "paired":
                    _mark(ax, xs, ys, who, outliers, low, size=point_size)
                else:
                    _mark(ax, xs, ys, who, set(), low if c == conditions[0] else _low_coverage(
                        part[part["contrast"] == c], participant), size=point_size)
                n_ok = int(np.isfinite(ys).sum())
                n_missing = int((~np.isfinite(ys)).sum())
                side = -1 if (len(conditions) == 2 and ci == 0 and not between) else 1
                ex = base + side * (0.2 if len(groups) == 1 or between else 0.12)
                if mode == "one-sample" and len(rows):
                    r = rows.iloc[0]
                    m, lo, hi = number(r["estimate"]), number(r.get("ci_low")), number(r.get("ci_high"))
                else:
                    m, lo, hi = mean_ci(ys, confidence=confidence)
                _estimate(ax, ex, m, lo, hi, label=f"mean and {confidence:.0%} CI")
                if between:
                    tick_pos.append(base)
                    missing_txt = f",\n{n_missing} missing" if n_missing else ""  # own line: labels stay apart
                    tick_lab.append(f"{g}\n(n = {n_ok}{missing_txt})")
                elif gi == 0:
                    tick_pos.append(ci)
                    total = int(np.isfinite(wide[c].to_numpy(dtype=float)).sum())
                    tick_lab.append(f"{c}\n(n = {total})")
            if len(conditions) >= 2:  # within-participant lines
                xs_stack = np.vstack([x for x, _ in xs_by_cond])
                ys_stack = np.vstack([y for _, y in xs_by_cond])
                segments = [np.column_stack([xs_stack[:, k], ys_stack[:, k]]) for k in range(xs_stack.shape[1])]
                ax.add_collection(LineCollection(segments, colors=edge if len(groups) > 1 else "0.55",
                                                 linewidths=0.45, alpha=0.45, zorder=2), autolim=True)
            if mode == "paired" and difference:
                d = xs_by_cond[0][1] - xs_by_cond[1][1]
                xd = 2.35
                xs = np.array([xd + jit[w] for w in who])
                ax.scatter(xs, d, s=point_size, marker=marker, facecolor="white", edgecolor=edge,
                           linewidths=0.7, zorder=3, label="participant difference")
                _mark(ax, xs, d, who, outliers, set(), size=point_size)
                if len(rows):
                    r = rows.iloc[0]
                    m, lo, hi = number(r["estimate"]), number(r.get("ci_low")), number(r.get("ci_high"))
                else:
                    m, lo, hi = mean_ci(d, confidence=confidence)
                _estimate(ax, xd + 0.22, m, lo, hi, marker=_DIFF_MARKER, label="difference and CI")
                tick_pos.append(xd)
                tick_lab.append(f"{conditions[0]} −\n{conditions[1]}\n(n = {int(np.isfinite(d).sum())})")
        if mode == "two-group" and difference:
            xd = 2.2
            if len(rows):
                r = rows.iloc[0]
                m, lo, hi = number(r["estimate"]), number(r.get("ci_low")), number(r.get("ci_high"))
            else:
                a = wide[[lab == groups[0] for _, lab in wide.index]][conditions[0]].to_numpy(dtype=float)
                b = wide[[lab == groups[1] for _, lab in wide.index]][conditions[0]].to_numpy(dtype=float)
                a, b = a[np.isfinite(a)], b[np.isfinite(b)]
                res = stats.ttest_ind(a, b, equal_var=False)
                ci = res.confidence_interval(confidence)
                m, lo, hi = a.mean() - b.mean(), ci.low, ci.high
            _estimate(ax, xd, m, lo, hi, marker=_DIFF_MARKER, label="difference and CI")
            tick_pos.append(xd)
            tick_lab.append(f"{groups[0]} −\n{groups[1]}")
        ax.axhline(0, **_ZERO_STYLE)
        ax.set_xticks(tick_pos, tick_lab)
        lo_x = min(tick_pos) - 0.45
        hi_x = max(tick_pos) + 0.45
        ax.set_xlim(lo_x, hi_x)
        ax.set_ylabel(_value_axis_label(value_label or (None if value == "value" else value)))
        title = region
        if owned and (between or mode == "one-sample"):
            title += f" · {conditions[0]}"
        ax.set_title(textwrap.fill(title, 30))
        if legend:
            _dedupe_legend(ax, owned)
    return ax


def _panel_layout(n_regions: int, *, width: Width, ncols: int | None, panel_height_mm: float,
                  plot=None) -> tuple[int, int, float]:
    """Columns, rows per page and panel height for ``n_regions`` panels at ``width``."""
    wmm = _width_mm(width)
    if ncols is None:
        # panels wide enough for their tick labels at 7 pt: about 55 mm (80 mm with one label per stimulus)
        ncols = max(1, int(wmm // (80.0 if plot is stimulus_plot else 55.0)))
    ncols = max(1, min(ncols, n_regions))
    rows_max = int((MAX_HEIGHT_MM - _LEGEND_HEIGHT_MM) // panel_height_mm)
    if rows_max < 1:
        raise UsageError(f"panel_height_mm={panel_height_mm:g} leaves no room for one row of panels in a figure "
                         f"of at most {MAX_HEIGHT_MM:g} mm; choose at most {MAX_HEIGHT_MM - _LEGEND_HEIGHT_MM:g}")
    return ncols, rows_max, panel_height_mm


def _region_pages(data: pd.DataFrame, regions, *, width, ncols, panel_height_mm, plot) -> tuple[list[list[str]], int]:
    regions = list(regions) if regions is not None else ordered_unique(data["region"].map(text))
    if not regions:
        raise UsageError("no region to draw: the values table is empty")
    ncols, rows_max, _ = _panel_layout(len(regions), width=width, ncols=ncols, panel_height_mm=panel_height_mm,
                                       plot=plot)
    per_page = ncols * rows_max
    # balanced pages (10 regions in pages of up to 8: 6 and 4, not 8 and 2), whole rows on every page but the last
    n_pages = int(np.ceil(len(regions) / per_page))
    size = min(per_page, int(np.ceil(np.ceil(len(regions) / n_pages) / ncols)) * ncols)
    return [regions[i:i + size] for i in range(0, len(regions), size)], ncols


def participant_figure(
    data: pd.DataFrame,
    *,
    regions: Sequence[str] | None = None,
    ncols: int | None = None,
    width: Width = "double",
    panel_height_mm: float = 50.0,
    page: int | None = None,
    plot=None,
    **kwargs,
) -> Figure:
    """One panel per region (see :func:`participant_plot`, whose options ``kwargs`` are), one shared legend.

    Parameters
    ----------
    data : DataFrame
        Region values table.
    regions : sequence of str, optional
        Regions to draw, in this order (default: all, in their order of appearance).
    ncols : int, optional
        Panels per row (default: as many panels of at least 55 mm as the width holds, i.e. 3 at double width,
        2 at one-and-a-half and 1 at single width; panels of :func:`stimulus_plot` at least 80 mm).
    width : "single", "one-and-a-half", "double" or float
        Figure width in mm.
    panel_height_mm : float
        Height of one row of panels.
    page : int, optional
        Which page (from 1) to draw when the regions need more than one figure of at most 225 mm
        (:func:`participant_pages` draws them all). Without it, regions that do not fit one page are an error
        that says how many pages they need.
    plot : callable, optional
        The panel function (default :func:`participant_plot`; also :func:`precision_plot`,
        :func:`stimulus_plot`, :func:`covariate_plot`).

    Returns
    -------
    matplotlib.figure.Figure
        Displayed inline in Jupyter as the cell's last expression (or with ``display(fig)``).
    """
    check_columns(data, REQUIRED_VALUES, "region values table")
    plot = plot or participant_plot
    pages, ncols = _region_pages(data, regions, width=width, ncols=ncols, panel_height_mm=panel_height_mm,
                                 plot=plot)
    if page is None:
        if len(pages) > 1:
            n = sum(len(p) for p in pages)
            raise UsageError(f"{n} regions need {len(pages)} figures of at most {MAX_HEIGHT_MM:g} mm "
                             f"({len(pages[0])} panels each at this width); pass page=1 to {len(pages)}, use "
                             "participant_pages(...) for all of them, or choose regions=[...]")
        page = 1
    if not 1 <= int(page) <= len(pages):
        raise UsageError(f"page must lie between 1 and {len(pages)}, got {page}")
    names = pages[int(page) - 1]
    wmm = _width_mm(width)
    nrows = int(np.ceil(len(names) / ncols))
    with style():
        fig = Figure(figsize=(wmm * _MM, (panel_height_mm * nrows + _LEGEND_HEIGHT_MM) * _MM), layout="constrained")
        axes = fig.subplots(nrows, ncols, squeeze=False)
        handles: dict[str, Any] = {}
        for ax, region in zip(axes.flat, names):
            plot(data, region=region, ax=ax, legend=False, **kwargs)
            for h, lab in zip(*ax.get_legend_handles_labels()):
                if lab and not lab.startswith("_"):
                    handles.setdefault(lab, h)
        handles = dict(sorted(handles.items(), key=lambda kv: _legend_rank(kv[0])))
        for ax in list(axes.flat)[len(names):]:
            ax.set_visible(False)
        contrast = kwargs.get("contrast")
        title = f"contrast: {contrast}" if contrast is not None and kwargs.get("versus") is None else ""
        if len(pages) > 1:
            title = f"{title} (page {page} of {len(pages)})" if title else f"page {page} of {len(pages)}"
        if title:
            fig.suptitle(title, fontsize=7.5)
        if handles:
            fig.legend(list(handles.values()), list(handles.keys()), loc="outside lower center",
                       ncols=min(len(handles), 3 if wmm >= 150 else 2), handletextpad=0.3, columnspacing=1.2,
                       markerscale=0.8)
    return fig


def participant_pages(
    data: pd.DataFrame,
    *,
    regions: Sequence[str] | None = None,
    ncols: int | None = None,
    width: Width = "double",
    panel_height_mm: float = 50.0,
    plot=None,
    **kwargs,
) -> list[Figure]:
    """All regions as :func:`participant_figure` pages, each at most 225 mm tall (same options).

    Returns
    -------
    list of matplotlib.figure.Figure
        One figure per page (one when the regions fit).
    """
    check_columns(data, REQUIRED_VALUES, "region values table")
    wanted = {text(c) for c in (kwargs.get("contrast"), kwargs.get("versus")) if c is not None}
    if regions is None and wanted:  # only the regions with values of every contrast drawn (a functional region
        # measured on some contrasts only has no panel for the others)
        shown = data[data["contrast"].map(text).isin(wanted)]
        have = shown.groupby(shown["region"].map(text), sort=False)["contrast"].agg(lambda c: set(c.map(text)))
        regions = [r for r in ordered_unique(data["region"].map(text)) if have.get(r, set()) >= wanted] or None
    pages, _ = _region_pages(data, regions, width=width, ncols=ncols, panel_height_mm=panel_height_mm,
                             plot=plot or participant_plot)
    return [participant_figure(data, regions=[r for p in pages for r in p], ncols=ncols, width=width,
                               panel_height_mm=panel_height_mm, page=k, plot=plot, **kwargs)
            for k in range(1, len(pages) + 1)]


# --------------------------------------------------------------------------------------------- forest plot
def forest_plot(
    results: pd.DataFrame,
    *,
    design: str | None = None,
    term: str | None = None,
    contrast: str | None = None,
    measure: Literal["auto", "effect_size", "estimate"] = "auto",
    correction: str | None = None,
    alpha: float = 0.05,
    annotate: bool = True,
    width: Width = "one-and-a-half",
    legend: bool = True,
    value_label: str | None = None,
    ax=None,
):
    """Effect sizes (or estimates) with their CIs across regions; filled markers survive the correction.

    Parameters
    ----------
    results : DataFrame
        Group results table.
    design, term, contrast : str, optional
        Rows to draw (default: all rows that have the measure and its CI; rows of other analyses are labelled
        "region · term").
    measure : {"auto", "effect_size", "estimate"}
        ``auto`` uses the effect size when every row has one with its CI, else the estimate.
    correction : str, optional
        Adjusted p deciding survival and named in the legend (``holm``, ``fdr``, ``bonferroni``, ``fwe``, or
        ``none`` for the uncorrected p); default: the primary correction, the first entry of the rows'
        ``correction`` column. Without any adjusted p, the uncorrected p is used and the legend says so.
    alpha : float
        Significance level.
    annotate : bool
        Write the value, its CI and the adjusted p to the right of each row.
    width : "single", "one-and-a-half", "double" or float
        Figure width (mm) when a new figure is made; the height follows the number of rows (at most
        ``FOREST_ROWS_PER_PAGE`` rows fit one figure of 225 mm; :func:`forest_pages` splits longer tables).
        With the demo's region names the data area is about 58 mm wide at the default one-and-a-half column
        width; at single width (85 mm) use ``annotate=False`` for about 38 mm (24 mm with the annotations).
    value_label : str, optional
        Unit of the estimates (e.g. ``"% signal change"``), added to the axis label when estimates are drawn.

    Returns
    -------
    matplotlib.axes.Axes
    """
    check_columns(results, REQUIRED_RESULTS, "results table")
    rows = results
    if design is not None:
        rows = rows[rows["design"].map(text) == design]
    if term is not None:
        rows = rows[rows["term"].map(text) == term]
    if contrast is not None and "contrast" in rows.columns:
        rows = rows[rows["contrast"].map(text) == contrast]
    if measure == "auto":
        use_effect = (has_values(rows, "effect_size") and has_values(rows, "effect_size_ci_low")
                      and all(np.isfinite(number(v)) for v in col(rows, "effect_size_ci_low")))
        measure = "effect_size" if use_effect else "estimate"
    lo_col, hi_col = ("effect_size_ci_low", "effect_size_ci_high") if measure == "effect_size" else ("ci_low", "ci_high")
    keep = [np.isfinite(number(v)) for v in col(rows, measure)]
    rows = rows[keep]
    if len(rows) == 0:
        raise UsageError(f"nothing to draw: no row has a finite {measure} (F rows have none); choose design/term")
    if correction is None:  # the primary correction: the first entry of the rows' correction column
        from ._common import primary_correction

        correction = primary_correction(rows)
    pcol = f"p_{correction}" if correction and has_values(rows, f"p_{correction}") else "p"
    multi_term = rows[["design", "term"]].astype(str).drop_duplicates().shape[0] > 1
    labels = [text(r["region"]) + (f" · {text(r['term'])}" if multi_term else "") for _, r in rows.iterrows()]
    m = np.array([number(v) for v in rows[measure]])
    lo = np.array([number(v) for v in col(rows, lo_col)])
    hi = np.array([number(v) for v in col(rows, hi_col)])
    p = np.array([number(v) for v in rows[pcol]])
    survive = p < alpha
    etypes = ordered_unique(col(rows, "effect_size_type"))
    if measure == "effect_size":
        xlabel = (_EFFECT_MATH.get(text(etypes[0]), text(etypes[0])) if len(etypes) == 1 else "effect size")
    else:
        xlabel = "estimate"
    levels_ = ordered_unique(col(rows, "confidence"))
    level = number(levels_[0]) if levels_ else 0.95
    if ax is None and len(rows) > FOREST_ROWS_PER_PAGE:
        raise UsageError(f"{len(rows)} rows do not fit one forest plot of at most {MAX_HEIGHT_MM:g} mm "
                         f"({FOREST_ROWS_PER_PAGE} rows); use forest_pages(...) to draw them on several pages, or "
                         "choose fewer rows (design=, term=, contrast=)")
    with style():
        ax = _new_axes(ax, width, _FOREST_TOP_MM + _FOREST_ROW_MM * len(rows))
        y = np.arange(len(rows))[::-1]
        for yi, a, b in zip(y, lo, hi):
            if np.isfinite(a) and np.isfinite(b):
                ax.plot([a, b], [yi, yi], color="#0072B2", lw=1.2, solid_capstyle="butt", zorder=2)
        name = correction_name(str(correction))
        a_txt = format_number(alpha, 3 if alpha * 100 % 1 else 2, leading_zero=False)
        if pcol == "p":
            lab_yes, lab_no = f"p < {a_txt} (uncorrected)", f"p ≥ {a_txt} (uncorrected)"
        else:
            lab_yes, lab_no = f"survives {name} (p < {a_txt})", f"does not survive {name}"
        ax.scatter(m[survive], y[survive], s=26, marker="s", color="#0072B2", zorder=3, label=lab_yes)
        ax.scatter(m[~survive], y[~survive], s=26, marker="s", facecolor="white", edgecolor="#0072B2",
                   linewidths=1.0, zorder=3, label=lab_no)
        ax.axvline(0, **_ZERO_STYLE)
        ax.set_yticks(y, [_math_text(textwrap.fill(lab, 24)) for lab in labels])
        ax.set_ylim(-0.7, len(rows) - 0.3)
        if measure == "estimate" and value_label:
            xlabel = f"estimate, {_math_text(value_label)}"
        ax.set_xlabel(f"{xlabel} and {level:.0%} CI")
        # few ticks: the labels (true minus signs) stay apart however narrow the data area
        ax.xaxis.set_major_locator(mpl.ticker.MaxNLocator(nbins=5, steps=[1, 2, 2.5, 5, 10]))
        ax.spines["left"].set_visible(False)
        ax.tick_params(axis="y", length=0)
        if annotate:
            tr = blended_transform_factory(ax.transAxes, ax.transData)
            p_name = "p" if pcol == "p" else r"p_\mathrm{%s}" % name.replace(" ", r"\ ")
            for yi, (_, r), pv in zip(y, rows.iterrows(), p):
                bounded = measure == "effect_size" and text(r.get("effect_size_type")) in BOUNDED_EFFECTS
                dec = 2
                txt = (f"{format_number(r[measure], dec, leading_zero=not bounded)} "
                       f"{format_ci(r.get(lo_col), r.get(hi_col), dec, leading_zero=not bounded)}")
                pt = format_p(pv)
                p_txt = f"${p_name}$ {'= ' + pt if pt[0] not in '<>' else pt}"
                # two lines beside each row (value and CI, then the p-value), so the data area keeps its width
                ax.text(1.02, yi + 0.2, _minus(txt), transform=tr, va="center", ha="left", fontsize=MIN_FONT_PT,
                        clip_on=False)
                ax.text(1.02, yi - 0.22, p_txt, transform=tr, va="center", ha="left", fontsize=MIN_FONT_PT,
                        clip_on=False, color="0.25")
        if legend:
            ax.legend(loc="lower center", bbox_to_anchor=(0.5, 1.0), ncols=2, handletextpad=0.2,
                      columnspacing=1.0, borderaxespad=0.1)
    return ax


def forest_pages(results: pd.DataFrame, *, rows_per_page: int | None = None, **kwargs) -> list[Figure]:
    """:func:`forest_plot` of every row, split into figures of at most ``rows_per_page`` rows (at most 225 mm tall).

    Parameters
    ----------
    results : DataFrame
        Group results rows to draw (one analysis and term, typically).
    rows_per_page : int, optional
        Default (and maximum) ``FOREST_ROWS_PER_PAGE``; pages are balanced (26 rows: 13 and 13).
    **kwargs
        Options of :func:`forest_plot` (not ``ax``).

    Returns
    -------
    list of matplotlib.figure.Figure
    """
    check_columns(results, REQUIRED_RESULTS, "results table")
    per = min(int(rows_per_page or FOREST_ROWS_PER_PAGE), FOREST_ROWS_PER_PAGE)
    if per < 1:
        raise UsageError(f"rows_per_page must be at least 1, got {rows_per_page}")
    n_pages = max(1, int(np.ceil(len(results) / per)))
    size = int(np.ceil(len(results) / n_pages))
    figs = []
    for k in range(n_pages):
        ax = forest_plot(results.iloc[k * size:(k + 1) * size], **kwargs)
        if n_pages > 1:
            ax.figure.suptitle(f"page {k + 1} of {n_pages}", fontsize=7.5)
        figs.append(ax.figure)
    return figs


# --------------------------------------------------------------------------------------------- precision
def precision_plot(
    data: pd.DataFrame,
    *,
    region: str | None = None,
    contrast: str | None = None,
    results: pd.DataFrame | None = None,
    variance: str = "variance",
    value: str = "value",
    participant: str = "participant_id",
    confidence: float = 0.95,
    seed: int | None = 0,
    width: Width = "single",
    legend: bool = True,
    value_label: str | None = None,
    ax=None,
    **_ignored,
):
    """Participants' values with point area proportional to their precision weight ``1/(v_i + τ²)``.

    ``τ²`` is taken from the matching precision-weighted results row (0 when absent); the precision-weighted
    estimate and CI of that row are drawn beside the points (without results, the unweighted mean and its
    *t* interval, labelled as such).

    Returns
    -------
    matplotlib.axes.Axes
    """
    check_columns(data, REQUIRED_VALUES, "region values table")
    if variance not in data.columns:
        raise UsageError(f"precision_plot needs the {variance!r} column (extract with --variance)")
    region = _pick_region(data, region)
    part = data[data["region"].map(text) == region]
    contrasts = ordered_unique(part["contrast"].map(text))
    if contrast is None:
        if len(contrasts) != 1:
            raise UsageError(f"contrast is required: the values hold contrasts {', '.join(contrasts)}")
        contrast = contrasts[0]
    part = part[part["contrast"].map(text) == contrast]
    rows = _results_rows(results, region=region, designs=["precision-weighted"], contrast=contrast)
    tau2 = number(rows.iloc[0].get("tau2")) if len(rows) else 0.0
    tau2 = tau2 if np.isfinite(tau2) else 0.0
    y = pd.to_numeric(part[value], errors="coerce").to_numpy(dtype=float)
    v = pd.to_numeric(part[variance], errors="coerce").to_numpy(dtype=float)
    who = part[participant].astype(str).tolist()
    w = 1.0 / (v + tau2)
    ok = np.isfinite(y) & np.isfinite(w)
    sizes = np.where(ok, 6 + 70 * w / np.nanmax(w[ok]), 0)
    jit = _jitter(who, 0.12, seed)
    with style():
        owned = ax is None
        ax = _new_axes(ax, width, 72)
        xs = np.array([jit[p] for p in who])
        ax.scatter(xs[ok], y[ok], s=sizes[ok], color="#56B4E9", edgecolor="#0072B2", linewidths=0.4, alpha=0.75,
                   zorder=3)
        _mark(ax, xs, y, who, _flagged(rows, "outlier_ids"), _flagged(rows, "low_coverage_ids") |
              _low_coverage(part, participant), size=14)
        if len(rows):
            r = rows[rows["term"].map(text) == "mean"].iloc[0] if (rows["term"].map(text) == "mean").any() else rows.iloc[0]
            _estimate(ax, 0.32, number(r["estimate"]), number(r.get("ci_low")), number(r.get("ci_high")),
                      label="precision-weighted estimate and CI")
        else:
            m, lo, hi = mean_ci(y, confidence=confidence)
            _estimate(ax, 0.32, m, lo, hi, label=f"unweighted mean and {confidence:.0%} CI")
        # size key: relative sizes only (the weights differ from panel to panel, and the key may be shared)
        for frac, lab in ((1.0, "highest precision in the panel"), (0.25, "¼ of the panel's highest precision")):
            ax.scatter([], [], s=6 + 70 * frac, color="#56B4E9", edgecolor="#0072B2", linewidths=0.4, label=lab)
        ax.axhline(0, **_ZERO_STYLE)
        ax.set_xticks([0], [f"{contrast}\n(n = {int(ok.sum())}, $\\tau^2$ = {format_number(tau2, 3)})"])
        ax.set_xlim(-0.5, 0.6)
        ax.set_ylabel(_value_axis_label(value_label))
        ax.set_title(textwrap.fill(f"{region} · {contrast}" if owned else region, 30))
        if legend:
            _dedupe_legend(ax, owned)
    return ax


# --------------------------------------------------------------------------------------------- stimuli
def stimulus_plot(
    data: pd.DataFrame,
    *,
    region: str | None = None,
    stimulus: str = "contrast",
    stimuli: Sequence[str] | None = None,
    group: str | None = None,
    participants: pd.DataFrame | None = None,
    results: pd.DataFrame | None = None,
    value: str = "value",
    participant: str = "participant_id",
    confidence: float = 0.95,
    seed: int | None = 0,
    width: Width = "single",
    legend: bool = True,
    value_label: str | None = None,
    ax=None,
    **_ignored,
):
    """Per-stimulus estimates (mean and CI across participants) with every participant's value behind them.

    For mixed models with a crossed random effect of stimuli: the spread of the per-stimulus means is what
    the stimulus variance component describes. The dotted line is the mean of the stimulus means.

    Parameters
    ----------
    stimulus : str
        Column naming the stimulus (default ``contrast``, e.g. town1..town6).
    stimuli : sequence of str, optional
        Stimulus levels to draw, in order (default: all, in order of appearance).
    group : str, optional
        Colour and marker the participants by this group column.

    Returns
    -------
    matplotlib.axes.Axes
    """
    check_columns(data, REQUIRED_VALUES, "region values table")
    region = _pick_region(data, region)
    if stimulus not in data.columns:
        raise UsageError(f"stimulus column {stimulus!r} is not in the values table")
    part = data[data["region"].map(text) == region].copy()
    levels_ = [str(s) for s in stimuli] if stimuli is not None else ordered_unique(part[stimulus].map(text))
    part = part[part[stimulus].map(text).isin(levels_)]
    part["_value"] = pd.to_numeric(part[value], errors="coerce")
    part["_who"] = part[participant].astype(str)
    if group is not None:
        labels = group_of(part, participants, group)
        if labels is None:
            raise UsageError(f"group column {group!r} is neither in the values table nor in participants")
        part["_group"] = labels.to_numpy()
    else:
        part["_group"] = "participant"
    groups = ordered_unique(part["_group"])
    jit = _jitter(ordered_unique(part["_who"]), 0.13, seed)
    rows = _results_rows(results, region=region, designs=["mixed"])
    with style():
        owned = ax is None
        ax = _new_axes(ax, width, 72)
        means = []
        for si, s in enumerate(levels_):
            sp = part[part[stimulus].map(text) == s]
            for gi, g in enumerate(groups):
                gp = sp[sp["_group"] == g]
                xs = si + np.array([jit[w] for w in gp["_who"]]) - 0.08
                ax.scatter(xs, gp["_value"], s=8, marker=GROUP_MARKERS[gi % 6],
                           color=GROUP_COLORS[gi % 6] if len(groups) > 1 else "#56B4E9", alpha=0.45,
                           linewidths=0, zorder=2, label=g if len(groups) > 1 else "participant")
            m, lo, hi = mean_ci(sp["_value"], confidence=confidence)
            means.append(m)
            _estimate(ax, si + 0.22, m, lo, hi, label=f"stimulus mean and {confidence:.0%} CI")
            _mark(ax, si + np.array([jit[w] for w in sp["_who"]]) - 0.08, sp["_value"].to_numpy(), sp["_who"],
                  _flagged(rows, "outlier_ids"), _flagged(rows, "low_coverage_ids"), size=8)
        grand = float(np.nanmean(means)) if means else np.nan
        if np.isfinite(grand):
            ax.axhline(grand, color="#009E73", lw=0.8, ls=":", zorder=1, label="mean of stimulus means")
        ax.axhline(0, **_ZERO_STYLE)
        counts = [int(part[(part[stimulus].map(text) == s)]["_value"].notna().sum()) for s in levels_]
        if len(set(counts)) == 1 and len(levels_) > 3:
            # many stimuli with the same n: say n once (in the axis label) so the tick labels stay readable
            ax.set_xticks(range(len(levels_)), [str(s) for s in levels_])
            ax.set_xlabel(f"n = {counts[0]} per stimulus")
        else:
            ax.set_xticks(range(len(levels_)), [f"{s}\n(n = {c})" for s, c in zip(levels_, counts)])
        ax.set_xlim(-0.6, len(levels_) - 0.4)
        ax.set_ylabel(_value_axis_label(value_label))
        ax.set_title(textwrap.fill(region if not owned else (
            f"{region} · per {stimulus}" if stimulus != "contrast" else f"{region} · per stimulus"), 30))
        if legend:
            _dedupe_legend(ax, owned)
    return ax


# --------------------------------------------------------------------------------------------- interactions
def _interaction_cells(results: pd.DataFrame, unit: str | None) -> tuple[str, list[str], list, pd.Series]:
    """(unit, within factor names, cells [contrast, region, levels], one results row) of a repeated-measures unit."""
    import json

    check_columns(results, REQUIRED_RESULTS, "results table")
    rows = results[(results["design"].map(text) == "repeated-measures") & results.get(
        "cells", pd.Series(np.nan, index=results.index)).map(lambda v: not is_missing(v))]
    if not len(rows):
        raise UsageError("no repeated-measures rows with a 'cells' column in the results; run the "
                         "repeated-measures design (roikit stats --design repeated-measures) first")
    units = ordered_unique(rows["region"].map(text))
    if unit is None:
        unit = units[0]
    if unit not in units:
        raise UsageError(f"unit {unit!r} is not in the repeated-measures results; found {', '.join(units)}")
    row = rows[rows["region"].map(text) == unit].iloc[0]
    try:
        cells = json.loads(text(row["cells"]))
    except ValueError:
        raise UsageError(f"the 'cells' column of {unit!r} is not the JSON list the repeated-measures design "
                         "writes") from None
    factors = [f for f in text(row.get("within")).split(",") if f]
    return unit, factors, cells, row


def interaction_plot(
    data: pd.DataFrame,
    results: pd.DataFrame,
    *,
    unit: str | None = None,
    participants: pd.DataFrame | None = None,
    group_level: str | None = None,
    participant: str = "participant_id",
    confidence: float = 0.95,
    width: Width = "single",
    legend: bool = True,
    value_label: str | None = None,
    ax=None,
    **_ignored,
):
    """Interaction plot of a repeated-measures unit: condition means with CIs over every participant's lines.

    The x axis holds the levels of the first within factor; each combination of the other within factors is a
    trace (Okabe-Ito colour and its own marker); behind each mean, every participant's values of that trace are
    joined by a thin line, so individual patterns (and exceptions) stay visible. Means carry their *t*-based CI
    (:func:`mean_ci`) across the participants drawn.

    Parameters
    ----------
    data : DataFrame
        Region values table.
    results : DataFrame
        Results with repeated-measures rows (their ``cells`` column maps each cell to its contrast and region).
    unit : str, optional
        The unit (the results' ``region``, e.g. ``"hippocampus (left, right)"``); default the first.
    participants : DataFrame, optional
        participants.tsv, for the between-participant column of the analysis.
    group_level : str, optional
        Draw only participants of this level of the between-participant column.

    Returns
    -------
    matplotlib.axes.Axes
    """
    check_columns(data, REQUIRED_VALUES, "region values table")
    unit, factors, cells, row = _interaction_cells(results, unit)
    part = data.assign(_c=data["contrast"].map(text), _r=data["region"].map(text), _who=data[participant].map(text))
    part["_value"] = pd.to_numeric(part["value"], errors="coerce")
    between = text(row.get("group_column"))
    if group_level is not None:
        labels = group_of(part, participants, between) if between else None
        if labels is None:
            raise UsageError(f"group_level={group_level!r} needs the between column {between or '(none)'} in "
                             "the values table or participants")
        part = part[labels.to_numpy() == str(group_level)]
    wide = {}
    for contrast, region, levels in cells:
        sel = part[(part["_c"] == contrast) & (part["_r"] == region)]
        wide[tuple(levels)] = sel.groupby("_who")["_value"].mean()
    frame = pd.DataFrame(wide)
    excluded = set(ids(row.get("excluded_ids")))
    frame = frame[~frame.index.isin(excluded)].dropna()  # complete cases, as the test used
    x_levels = ordered_unique(lv[0] for lv in frame.columns) if len(frame.columns) else []
    traces = ordered_unique(tuple(lv[1:]) for lv in frame.columns)
    n_tr = max(1, len(traces))
    offsets = (np.arange(n_tr) - (n_tr - 1) / 2) * (0.16 if n_tr > 1 else 0.0)
    with style():
        owned = ax is None
        ax = _new_axes(ax, width, 72)
        for t, trace in enumerate(traces):
            color = GROUP_COLORS[t % len(GROUP_COLORS)]
            marker = GROUP_MARKERS[t % len(GROUP_MARKERS)]
            name = "; ".join(f"{f}: {lv}" for f, lv in zip(factors[1:], trace)) if trace else "mean"
            columns = [(x, *trace) for x in x_levels]
            y = frame[columns].to_numpy(float)  # participants x levels of the first factor
            xs = np.arange(len(x_levels)) + offsets[t]
            segments = [np.column_stack([xs, yi]) for yi in y]
            ax.add_collection(LineCollection(segments, colors=color, alpha=0.28, linewidths=0.5, zorder=1.5,
                                             label=f"participants ({name})" if trace else "participant"))
            ax.scatter(np.repeat(xs[None, :], len(y), axis=0).ravel(), y.ravel(), s=3, color=color, alpha=0.35,
                       linewidths=0, zorder=1.6)
            stats_ = [mean_ci(y[:, j], confidence=confidence) for j in range(len(x_levels))]
            m = np.array([s_[0] for s_ in stats_])
            lo = np.array([s_[1] for s_ in stats_])
            hi = np.array([s_[2] for s_ in stats_])
            ax.plot(xs, m, color=color, lw=1.4, zorder=3)
            ax.errorbar(xs, m, yerr=[m - lo, hi - m], fmt=marker, color=color, markeredgecolor="black",
                        markeredgewidth=0.5, ms=5, elinewidth=1.1, capsize=2, zorder=4,
                        label=f"{name}: mean and {confidence:.0%} CI" if trace else f"mean and {confidence:.0%} CI")
        ax.axhline(0, **_ZERO_STYLE)
        ax.set_xticks(range(len(x_levels)), x_levels)
        ax.set_xlim(-0.5, len(x_levels) - 0.5)
        ax.set_xlabel(f"{factors[0] if factors else 'condition'} (n = {len(frame)})")
        ax.set_ylabel(_value_axis_label(value_label))
        title = unit + (f" · {group_level}" if group_level is not None else "")
        ax.set_title(textwrap.fill(title, 40))
        ax.yaxis.set_major_formatter(mpl.ticker.FuncFormatter(lambda v, _p: _minus(f"{v:g}")))
        if legend:
            _dedupe_legend(ax, owned)
    return ax


def interaction_pages(
    data: pd.DataFrame,
    results: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    width: Width = "double",
    panel_height_mm: float = 60.0,
    **kwargs,
) -> list[Figure]:
    """Every repeated-measures unit of ``results`` as :func:`interaction_plot` panels: one row per unit, one
    column per level of the between-participant column (one column without one); pages of at most 225 mm.

    Returns
    -------
    list of matplotlib.figure.Figure
    """
    check_columns(data, REQUIRED_VALUES, "region values table")
    _, _, _, first = _interaction_cells(results, None)
    rows = results[(results["design"].map(text) == "repeated-measures") & results.get(
        "cells", pd.Series(np.nan, index=results.index)).map(lambda v: not is_missing(v))]
    units = ordered_unique(rows["region"].map(text))
    between = text(first.get("group_column"))
    levels: list = [None]
    if between:
        labels = group_of(data, participants, between)
        if labels is not None:
            wanted = [s for s in text(first.get("levels")).split(",") if s]
            levels = wanted or [lv for lv in ordered_unique(labels) if lv != "n/a"]
    rows_max = max(1, int((MAX_HEIGHT_MM - _LEGEND_HEIGHT_MM) // panel_height_mm))
    pages = [units[i:i + rows_max] for i in range(0, len(units), rows_max)]
    wmm = _width_mm(width)
    figures = []
    for k, names in enumerate(pages, start=1):
        with style():
            fig = Figure(figsize=(wmm * _MM, (panel_height_mm * len(names) + _LEGEND_HEIGHT_MM) * _MM),
                         layout="constrained")
            axes = fig.subplots(len(names), len(levels), squeeze=False, sharey="row")
            handles: dict[str, Any] = {}
            for r, unit in enumerate(names):
                for c, level in enumerate(levels):
                    ax = axes[r, c]
                    interaction_plot(data, results, unit=unit, participants=participants, group_level=level,
                                     ax=ax, legend=False, **kwargs)
                    if c:
                        ax.set_ylabel("")
                    for h, lab in zip(*ax.get_legend_handles_labels()):
                        if lab and not lab.startswith("_"):
                            handles.setdefault(lab, h)
            if len(pages) > 1:
                fig.suptitle(f"page {k} of {len(pages)}", fontsize=7.5)
            if handles:
                fig.legend(list(handles.values()), list(handles.keys()), loc="outside lower center",
                           ncols=min(len(handles), 2), handletextpad=0.4, columnspacing=1.2)
        figures.append(fig)
    return figures


# --------------------------------------------------------------------------------------------- covariates
def covariate_plot(
    data: pd.DataFrame,
    *,
    covariate: str,
    region: str | None = None,
    contrast: str | None = None,
    participants: pd.DataFrame | None = None,
    group: str | None = None,
    levels: Sequence[str] | None = None,
    results: pd.DataFrame | None = None,
    value: str = "value",
    participant: str = "participant_id",
    confidence: float = 0.95,
    width: Width = "single",
    legend: bool = True,
    value_label: str | None = None,
    covariate_label: str | None = None,
    ax=None,
    **_ignored,
):
    """Region value against a covariate, with the least-squares line and its confidence band.

    The line is the simple regression of the value on the covariate (all participants); the model's
    coefficient, adjusted for the other terms, is quoted under the title when ``results`` hold the glm row.
    ``covariate_label`` names the axis for readers (e.g. the participants sidecar's ``LongName`` with its unit)
    instead of the column name; ``value_label`` names the values' axis.

    Returns
    -------
    matplotlib.axes.Axes
    """
    check_columns(data, REQUIRED_VALUES, "region values table")
    region = _pick_region(data, region)
    part = data[data["region"].map(text) == region]
    contrasts = ordered_unique(part["contrast"].map(text))
    if contrast is None:
        if len(contrasts) != 1:
            raise UsageError(f"contrast is required: the values hold contrasts {', '.join(contrasts)}")
        contrast = contrasts[0]
    part = attach(part[part["contrast"].map(text) == contrast], participants, [covariate] + ([group] if group else []))
    if covariate not in part.columns:
        raise UsageError(f"covariate {covariate!r} is neither in the values table nor in participants.tsv")
    x = pd.to_numeric(part[covariate], errors="coerce").to_numpy(dtype=float)
    y = pd.to_numeric(part[value], errors="coerce").to_numpy(dtype=float)
    who = part[participant].astype(str).tolist()
    if group is not None and group in part.columns:
        g = part[group].map(lambda v: text(v, "n/a")).to_numpy()
        groups = [str(lv) for lv in levels] if levels is not None else ordered_unique(g)
    else:
        g = np.array(["participant"] * len(part))
        groups = ["participant"]
    rows = _results_rows(results, region=region, designs=["glm", "precision-weighted", "mixed"], term=covariate)
    with style():
        owned = ax is None
        ax = _new_axes(ax, width, 72)
        grid, fit, lo, hi = fit_line(x, y, confidence=confidence)
        ax.fill_between(grid, lo, hi, color="0.8", alpha=0.6, linewidth=0, zorder=1,
                        label=f"{confidence:.0%} confidence band")
        ax.plot(grid, fit, color="black", lw=1.0, zorder=2, label="least-squares line")
        for gi, lv in enumerate(groups):
            sel = g == lv
            ax.scatter(x[sel], y[sel], s=14, marker=GROUP_MARKERS[gi % 6],
                       color=GROUP_COLORS[gi % 6] if len(groups) > 1 else "#56B4E9",
                       edgecolor=GROUP_COLORS[gi % 6] if len(groups) > 1 else "#0072B2", alpha=0.8,
                       linewidths=0.4, zorder=3, label=lv)
        _mark(ax, x, y, who, _flagged(rows, "outlier_ids"),
              _flagged(rows, "low_coverage_ids") | _low_coverage(part, participant), size=14)
        slope = ""
        if len(rows):
            r = rows.iloc[0]
            # the slope belongs to this panel: under its title, not in a legend that all panels may share
            level = number(r.get("confidence"))
            level = confidence if not np.isfinite(level) else level
            b_txt = f"$b$ = {format_number(r['estimate'], 3)}"
            ci_txt = f"{level:.0%} CI {format_ci(r.get('ci_low'), r.get('ci_high'), 3)}"
            # one line when it fits a narrow panel's width at 7.5 pt, else the interval on its own line
            slope = _minus(f"\n{b_txt}, {ci_txt}" if len(b_txt) + len(ci_txt) <= 32 else f"\n{b_txt}\n{ci_txt}")
        ax.axhline(0, **_ZERO_STYLE)
        ax.set_xlabel(_math_text(covariate_label) if covariate_label else covariate)
        ax.set_ylabel(_value_axis_label(value_label))
        ax.set_title(textwrap.fill(f"{region} · {contrast}" if owned else region, 30) + slope)
        if legend:
            _dedupe_legend(ax, owned)
    return ax


# --------------------------------------------------------------------------------------------- export
def _png_layout(fig: Figure, engine, dpi: float) -> None:
    """The layout ``savefig(format="png", dpi=dpi)`` computes, without its second pass over every artist.

    With a layout engine, ``savefig`` draws the whole figure once with drawing switched off (the engine runs at
    the start of that pass) and then again for real; the first pass is needed only for the engine. Running the
    engine with the renderer that pass would use (Agg at ``dpi``) gives the same layout, so the PNG has the same
    bytes, for about a sixth less time per figure.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    if not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
    original = fig.dpi
    fig.dpi = dpi
    try:
        engine.execute(fig)
    finally:
        fig.dpi = original


def save_figure(
    fig: Figure,
    path: os.PathLike | str,
    *,
    width: Width | None = None,
    formats: Sequence[str] = ("pdf", "svg", "png"),
    dpi: int = 300,
    overwrite: bool = False,
) -> list[Path]:
    """Save a figure as PDF and SVG (vector, fonts embedded / text as outlines) and a ``dpi`` PNG.

    Parameters
    ----------
    fig : Figure
        The figure (``ax.figure`` for an Axes-level plot).
    path : path
        Destination without extension (an extension, if given, is replaced by each format's).
    width : "single", "double", float or None
        Resize to a journal width (mm), keeping the aspect ratio; None keeps the current size.
    formats : sequence of {"pdf", "svg", "png"}
    dpi : int
        Resolution of the PNG (300 is the common journal minimum for line art with tones).
    overwrite : bool
        Replace existing files.

    Returns
    -------
    list of Path
        The files written, atomically.

    Notes
    -----
    PDF text uses TrueType (Type 42) fonts embedded in the file (``pdf.fonttype = 42``); SVG text is
    converted to paths (``svg.fonttype = 'path'``), so it renders identically without the font installed.
    """
    stem = Path(path)
    if stem.suffix.lower() in (".pdf", ".svg", ".png"):
        stem = stem.with_suffix("")
    targets = []
    for ext in formats:
        if ext not in ("pdf", "svg", "png"):
            raise UsageError(f"figure format must be pdf, svg or png, got {ext!r}")
        targets.append(check_output(stem.with_name(stem.name + "." + ext), overwrite=overwrite))
    if width is not None:
        w, h = fig.get_size_inches()
        new_w = _width_mm(width) * _MM
        fig.set_size_inches(new_w, h * new_w / w)
    written = []
    engine = fig.get_layout_engine()
    with style():
        try:
            for k, (ext, target) in enumerate(zip(formats, targets)):
                buf = io.BytesIO()
                meta = {"Software": "roikit"}
                if ext == "svg":
                    meta = {"Creator": "roikit", "Date": None}
                elif ext == "pdf":
                    meta = {"Creator": "roikit", "CreationDate": None}
                if k == 0 and engine is not None and ext == "png":
                    _png_layout(fig, engine, dpi)
                    fig.set_layout_engine("none")
                fig.savefig(buf, format=ext, dpi=dpi, metadata=meta, facecolor="white")
                if k == 0 and engine is not None:
                    # the layout depends on the size in inches, not on the format: compute it once, then keep it
                    # (constrained layout was most of the time of saving three formats)
                    fig.set_layout_engine("none")
                written.append(atomic_write_bytes(target, buf.getvalue(), overwrite=overwrite))
        finally:
            if engine is not None:
                fig.set_layout_engine(engine)
    return written
