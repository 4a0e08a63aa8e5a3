"""Figures: every participant drawn, estimates beside the points, flags marked, export at journal widths."""

import re
import struct

import matplotlib
import numpy as np
import pandas as pd
import pytest
from matplotlib.colors import to_hex
from scipy import stats

from roikit.errors import UsageError
from roikit.reporting.figures import (
    FOREST_ROWS_PER_PAGE,
    GROUP_COLORS,
    OKABE_ITO,
    covariate_plot,
    fit_line,
    forest_pages,
    forest_plot,
    mean_ci,
    participant_figure,
    participant_pages,
    participant_plot,
    precision_plot,
    save_figure,
    stimulus_plot,
    interaction_pages,
    interaction_plot,
)


def _points(ax, label=None):
    """Offsets of the scatter collections (optionally only those with this label)."""
    out = []
    for c in ax.collections:
        if isinstance(c, matplotlib.collections.PathCollection) and (label is None or c.get_label() == label):
            off = c.get_offsets()
            out.append(np.asarray(off)[np.isfinite(np.asarray(off)).all(axis=1)])
    return np.vstack(out) if out else np.empty((0, 2))


def _has_zero_line(ax):
    return any(np.allclose(line.get_ydata(), 0) and line.get_linestyle() != "-" for line in ax.lines)


def test_okabe_ito_palette():
    # Okabe & Ito (2008), Color Universal Design: the eight colours
    assert OKABE_ITO["vermillion"] == "#D55E00" and OKABE_ITO["bluish green"] == "#009E73"
    assert set(GROUP_COLORS) <= set(OKABE_ITO.values())


def test_mean_ci_against_scipy():
    x = np.array([0.3, 0.9, -0.2, 1.4, 0.5, np.nan])
    m, lo, hi = mean_ci(x, confidence=0.9)
    # scipy.stats.t.interval(0.9, df, loc, scale)
    ref = stats.t.interval(0.9, 4, loc=np.nanmean(x), scale=stats.sem(x[:5]))
    assert (m, lo, hi) == pytest.approx((np.nanmean(x), *ref))


def test_fit_line_against_statsmodels():
    import statsmodels.api as sm

    rng = np.random.default_rng(3)
    x = rng.uniform(20, 80, 30)
    y = 1.0 - 0.01 * x + rng.normal(0, 0.3, 30)
    grid, fit, lo, hi = fit_line(x, y, confidence=0.95, grid=[20, 50, 80])
    # statsmodels OLS get_prediction().conf_int() (mean confidence band)
    model = sm.OLS(y, sm.add_constant(x)).fit()
    pred = model.get_prediction(sm.add_constant(np.array([20.0, 50.0, 80.0]), has_constant="add"))
    band = pred.conf_int(alpha=0.05)
    assert fit == pytest.approx(pred.predicted_mean)
    assert lo == pytest.approx(band[:, 0]) and hi == pytest.approx(band[:, 1])
    with pytest.raises(UsageError, match="at least 3 finite points"):
        fit_line([1, 1, 1], [1, 2, 3])


def test_one_sample_plot_draws_everyone_and_the_results_estimate(values, results_by_design):
    rows = results_by_design["one-sample"]
    ax = participant_plot(values, region="left hippocampus", contrast="novel", results=rows)
    pts = _points(ax, "participant")
    assert len(pts) == 32  # every participant a point
    r = rows[rows.region == "left hippocampus"].iloc[0]
    est = [line for line in ax.lines if line.get_label().startswith("mean and")][0]
    assert est.get_ydata()[0] == pytest.approx(r["estimate"])  # the table's estimate, not a recomputation
    bars = [line for line in ax.lines if len(line.get_ydata()) == 2 and line.get_xdata()[0] == line.get_xdata()[1]]
    assert any(np.allclose(sorted(b.get_ydata()), [r["ci_low"], r["ci_high"]]) for b in bars)
    assert _has_zero_line(ax)
    # the outlier sub-12 is ringed at its value and named, not removed
    ring = _points(ax, "outlier (modified z > 3.5)")
    assert ring[:, 1] == pytest.approx([2.9])
    assert any(t.get_text() == "sub-12" for t in ax.texts)


def test_missing_values_are_counted_in_the_tick_label(values):
    ax = participant_plot(values, region="retrosplenial cortex", contrast="novel")
    assert len(_points(ax, "participant")) == 31
    assert "(n = 31)" in ax.get_xticklabels()[0].get_text()


def test_paired_plot_connects_participants(values, results_by_design):
    rows = results_by_design["paired"]
    ax = participant_plot(values, region="right hippocampus", contrast="novel", versus="familiar", results=rows)
    lines = [c for c in ax.collections if isinstance(c, matplotlib.collections.LineCollection)]
    assert len(lines) == 1 and len(lines[0].get_segments()) == 32
    diffs = _points(ax, "participant difference")
    assert len(diffs) == 32
    r = rows[rows.region == "right hippocampus"].iloc[0]
    diamond = [line for line in ax.lines if line.get_label() == "difference and CI"][0]
    assert diamond.get_ydata()[0] == pytest.approx(r["estimate"])
    # low coverage (sub-05, 150 of 398 voxels) is marked
    assert len(_points(ax, "low coverage (< 50% voxels)")) == 1


def test_two_group_plot_distinct_colour_and_marker(values, participants, results_by_design):
    ax = participant_plot(values, region="left hippocampus", contrast="novel", group="group",
                          participants=participants, results=results_by_design["two-group"])
    young = [c for c in ax.collections if c.get_label() == "younger"][0]
    old = [c for c in ax.collections if c.get_label() == "older"][0]
    assert len(young.get_offsets()) == 16 and len(old.get_offsets()) == 16
    assert to_hex(young.get_facecolor()[0], keep_alpha=False) != to_hex(old.get_facecolor()[0], keep_alpha=False)
    assert not np.allclose(young.get_paths()[0].vertices.shape, old.get_paths()[0].vertices.shape) or \
        not np.allclose(young.get_paths()[0].vertices, old.get_paths()[0].vertices)
    # groups side by side
    assert np.mean(young.get_offsets()[:, 0]) < np.mean(old.get_offsets()[:, 0])
    assert [t.get_text().split("\n")[0] for t in ax.get_xticklabels()] == ["younger", "older", "younger −"]


def test_within_and_between_panels(values, participants, results):
    fig = participant_figure(values, contrasts=["novel", "familiar"], group="group", participants=participants,
                             results=results)
    axes = [a for a in fig.axes if a.get_visible()]
    assert [a.get_title() for a in axes] == ["left hippocampus", "right hippocampus", "retrosplenial cortex"]
    assert fig.legends, "one shared legend"
    assert fig.get_size_inches()[0] == pytest.approx(180 / 25.4)


def test_participant_plot_errors(values):
    with pytest.raises(UsageError, match="region is required"):
        participant_plot(values, contrast="novel")
    with pytest.raises(UsageError, match="contrast is required"):
        participant_plot(values, region="left hippocampus")
    with pytest.raises(UsageError, match="contrast nonsense not found"):
        participant_plot(values, region="left hippocampus", contrast="nonsense")
    with pytest.raises(UsageError, match="group column 'site'"):
        participant_plot(values, region="left hippocampus", contrast="novel", group="site")


def test_forest_plot_marks_survivors(results_by_design):
    rows = results_by_design["paired"]
    ax = forest_plot(rows)
    filled = _points(ax, "survives Holm (p < .05)")
    hollow = _points(ax, "does not survive Holm")
    n_survive = int((rows.p_holm < 0.05).sum())
    assert len(filled) == n_survive and len(hollow) == len(rows) - n_survive
    # effect sizes (d_z) are drawn when every row has an interval
    assert sorted(np.r_[filled[:, 0], hollow[:, 0]]) == pytest.approx(sorted(rows.effect_size))
    assert "$d_z$" in ax.get_xlabel()
    assert any(line.get_xdata()[0] == 0 for line in ax.lines)
    # F rows have no estimate: drawing only them is an error
    glm = results_by_design["glm"]
    with pytest.raises(UsageError, match="nothing to draw"):
        forest_plot(glm[glm.statistic_type == "F"])
    # glm t rows: estimates (no effect size)
    ax = forest_plot(glm, term="age")
    assert ax.get_xlabel().startswith("estimate")


def test_forest_plot_without_correction_says_uncorrected(results_by_design):
    rows = results_by_design["one-sample"].drop(columns=["p_holm", "p_fdr"]).assign(correction="")
    ax = forest_plot(rows)
    labels = [c.get_label() for c in ax.collections]
    assert "p < .05 (uncorrected)" in labels


def test_precision_plot_sizes_by_weight(values, results_by_design):
    rows = results_by_design["precision-weighted"]
    ax = precision_plot(values, region="left hippocampus", contrast="novel", results=rows)
    sizes = ax.collections[0].get_sizes()
    part = values[(values.region == "left hippocampus") & (values.contrast == "novel")]
    w = 1 / (part.variance.to_numpy() + 0.061)
    # area grows linearly with the weight 1/(v_i + tau2)
    assert np.corrcoef(sizes, w)[0, 1] == pytest.approx(1.0)
    with pytest.raises(UsageError, match="needs the 'variance' column"):
        precision_plot(values.drop(columns=["variance"]), region="left hippocampus", contrast="novel")


def test_stimulus_plot(values, participants):
    ax = stimulus_plot(values, region="left hippocampus", stimuli=["town1", "town2", "town3"], group="group",
                       participants=participants)
    est = [line for line in ax.lines if line.get_label().startswith("stimulus mean")]
    assert len(est) == 3
    town2 = values[(values.region == "left hippocampus") & (values.contrast == "town2")].value
    assert est[1].get_ydata()[0] == pytest.approx(town2.mean())
    assert len(_points(ax)) == 3 * 32


def test_covariate_plot(values, participants, results_by_design):
    ax = covariate_plot(values, region="left hippocampus", contrast="novel", covariate="age", group="group",
                        participants=participants, results=results_by_design["glm"])
    assert len(_points(ax)) == 32
    # the model's slope under the panel title (true minus signs; the interval on its own line when long)
    assert "$b$ = \u22120.006\n95% CI [\u22120.010, \u22120.002]" in ax.get_title()
    with pytest.raises(UsageError, match="covariate 'height'"):
        covariate_plot(values, region="left hippocampus", contrast="novel", covariate="height")


def _png_info(data: bytes):
    width, height = struct.unpack(">II", data[16:24])
    i = data.index(b"pHYs")
    ppm_x = struct.unpack(">I", data[i + 4:i + 8])[0]
    return width, height, ppm_x


def test_save_figure_formats_fonts_and_width(values, tmp_path):
    ax = participant_plot(values, region="left hippocampus", contrast="novel")
    paths = save_figure(ax.figure, tmp_path / "one", width="single")
    assert [p.name for p in paths] == ["one.pdf", "one.svg", "one.png"]
    pdf = paths[0].read_bytes()
    # TrueType fonts embedded (pdf.fonttype 42): a FontFile2 stream, no Type 3 fonts
    assert b"/FontFile2" in pdf and b"/Type3" not in pdf
    svg = paths[1].read_text()
    assert "<text" not in svg  # text as outlines (svg.fonttype 'path')
    width, _, ppm = _png_info(paths[2].read_bytes())
    # 85 mm at 300 dpi = 1004 px; 300 dpi = 11811 pixels per metre
    assert abs(width - round(85 / 25.4 * 300)) <= 2
    assert ppm == 11811
    with pytest.raises(Exception, match="exists"):
        save_figure(ax.figure, tmp_path / "one.png", formats=("png",))
    with pytest.raises(UsageError, match="width must be"):
        save_figure(ax.figure, tmp_path / "two", width="triple")


# --------------------------------------------------------------------------------------------- print sizes
#: Journal column widths (mm): single 85-90, one-and-a-half 114-140, double 180 (common practice, no single source).
ALLOWED_WIDTHS_MM = ((85.0, 90.0), (114.0, 140.0), (180.0, 180.0))


def _visible_ticklabels(axis):
    """Tick labels matplotlib draws: ticks inside the view interval with non-empty text."""
    lo, hi = sorted(axis.get_view_interval())
    out = []
    for tick in axis.get_major_ticks():
        label = tick.label1
        if lo - 1e-9 <= tick.get_loc() <= hi + 1e-9 and label.get_visible() and label.get_text().strip():
            out.append(label)
    return out


def audit_saved_figure(fig, path):
    """Save as roikit saves, then measure the figure at that size: width, height, smallest text, tick overlaps.

    Returns (width_mm, height_mm, smallest_pt, overlaps, outside): overlaps lists colliding tick-label pairs,
    outside the texts reaching beyond the figure's edge (cut off when saved).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.text import Text

    save_figure(fig, path, formats=("png",), overwrite=True)
    width_mm, height_mm = fig.get_size_inches() * 25.4
    FigureCanvasAgg(fig)
    fig.canvas.draw()  # the layout of the saved size
    renderer = fig.canvas.get_renderer()
    ticks = {id(t) for ax in fig.axes for axis in (ax.xaxis, ax.yaxis) for tick in axis.get_major_ticks()
             for t in (tick.label1, tick.label2)}
    drawn = {id(t) for ax in fig.axes if ax.get_visible() for axis in (ax.xaxis, ax.yaxis)
             for t in _visible_ticklabels(axis)}
    texts = [t for t in fig.findobj(Text) if t.get_visible() and t.get_text().strip()
             and (id(t) not in ticks or id(t) in drawn)]
    sizes = [t.get_fontsize() for t in texts]
    page = fig.bbox
    outside = [t.get_text() for t in texts if (lambda b: b.x0 < page.x0 - 1 or b.x1 > page.x1 + 1 or b.y0 < page.y0 - 1
                                                or b.y1 > page.y1 + 1)(t.get_window_extent(renderer))]
    overlaps = []
    for ax in fig.axes:
        if not ax.get_visible():
            continue
        for axis in (ax.xaxis, ax.yaxis):
            boxes = [(t.get_text(), t.get_window_extent(renderer)) for t in _visible_ticklabels(axis)]
            for i in range(len(boxes)):
                for j in range(i + 1, len(boxes)):
                    if boxes[i][1].overlaps(boxes[j][1]):
                        overlaps.append((boxes[i][0], boxes[j][0]))
    return float(width_mm), float(height_mm), min(sizes), overlaps, outside


def _repeated(values, participants, within="route,hemisphere", between="group"):
    """Repeated-measures results on the shared test values (route from a contrasts table, hemisphere from a
    regions table; the midline region has no hemisphere and is in no unit)."""
    from roikit.stats import run_design

    contrasts = pd.DataFrame({"contrast": ["novel", "familiar", "town1", "town2", "town3"],
                              "route": ["novel", "familiar", None, None, None],
                              "town": [None, None, "town1", "town2", "town3"]})
    regions = pd.DataFrame({"region": ["left hippocampus", "right hippocampus", "retrosplenial cortex"],
                            "structure": ["hippocampus", "hippocampus", "retrosplenial cortex"],
                            "hemisphere": ["left", "right", None]})
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the one participant without every cell is named in excluded_ids
        return run_design(values, "repeated-measures", within=within, between=between, contrasts=contrasts,
                          region_table=regions, participants=participants)


def _figure_kinds(values, participants, results_by_design, results):
    towns = values[values.contrast.str.startswith("town")]
    return {
        "interaction": lambda: interaction_pages(values, _repeated(values, participants), participants=participants,
                                                 value_label="Parameter estimate (a.u.)")[0],
        "interaction, three towns": lambda: interaction_pages(values, _repeated(values, participants,
                                                                                "town,hemisphere", None))[0],
        "interaction, single plot": lambda: interaction_plot(values, _repeated(values, participants, "route",
                                                                               None)).figure,
        "one-sample": lambda: participant_figure(values, contrast="novel", results=results_by_design["one-sample"],
                                                 value_label="Parameter estimate (a.u.)"),
        "paired": lambda: participant_figure(values, contrast="novel", versus="familiar",
                                             results=results_by_design["paired"]),
        "two-group": lambda: participant_figure(values, contrast="novel", group="group", participants=participants,
                                                results=results_by_design["two-group"]),
        "within-between": lambda: participant_figure(values, contrasts=["novel", "familiar"], group="group",
                                                     participants=participants, results=results),
        "precision": lambda: participant_figure(values, contrast="novel", plot=precision_plot,
                                                results=results_by_design["precision-weighted"]),
        "stimuli": lambda: participant_figure(towns, plot=stimulus_plot, group="group", participants=participants),
        "covariate": lambda: participant_figure(values, contrast="novel", covariate="age", group="group",
                                                participants=participants, plot=covariate_plot,
                                                results=results_by_design["glm"]),
        "forest effect sizes": lambda: forest_plot(results_by_design["paired"]).figure,
        "forest estimates": lambda: forest_plot(results_by_design["glm"], term="age").figure,
        "single plot": lambda: participant_plot(values, region="left hippocampus", contrast="novel").figure,
        "single stimulus plot": lambda: stimulus_plot(towns, region="left hippocampus").figure,
        "paired, single column": lambda: participant_figure(values, contrast="novel", versus="familiar",
                                                            results=results_by_design["paired"], width="single"),
        "stimuli, single column": lambda: participant_figure(towns, plot=stimulus_plot, width="single"),
        "covariate, 1.5 column": lambda: participant_figure(values, contrast="novel", covariate="age",
                                                            participants=participants, plot=covariate_plot,
                                                            results=results_by_design["glm"], width="one-and-a-half"),
        "forest, single column": lambda: forest_plot(results_by_design["one-sample"], width="single").figure,
    }


KINDS = ["interaction", "interaction, three towns", "interaction, single plot", "one-sample", "paired", "two-group", "within-between", "precision", "stimuli", "covariate",
         "forest effect sizes", "forest estimates", "single plot", "single stimulus plot", "paired, single column",
         "stimuli, single column", "covariate, 1.5 column", "forest, single column"]


@pytest.mark.parametrize("kind", KINDS)
def test_every_figure_kind_prints_at_journal_size(kind, values, participants, results_by_design, results, tmp_path):
    fig = _figure_kinds(values, participants, results_by_design, results)[kind]()
    width, height, smallest, overlaps, outside = audit_saved_figure(fig, tmp_path / "figure")
    assert any(lo - 0.5 <= width <= hi + 0.5 for lo, hi in ALLOWED_WIDTHS_MM), width
    assert height <= 225.0 + 1e-6
    assert smallest >= 7.0, f"{kind}: text at {smallest} pt"
    assert not overlaps, f"{kind}: tick labels collide: {overlaps}"
    assert not outside, f"{kind}: text cut off at the figure's edge: {outside}"


def test_the_audit_sees_colliding_ticks_and_small_text(tmp_path):
    """The audit itself can fail: crowded ticks and 5-pt text on a narrow figure are caught."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(20 / 25.4, 20 / 25.4))
    ax = fig.add_subplot()
    ax.set_xticks(range(10), [f"label {k}" for k in range(10)])
    ax.text(0, 0, "tiny", fontsize=5)
    ax.text(1.5, 0.5, "beyond the edge", transform=ax.transAxes)
    _, _, smallest, overlaps, outside = audit_saved_figure(fig, tmp_path / "bad")
    assert smallest == 5 and overlaps and "beyond the edge" in outside


def _many_regions(values, n):
    base = values[values.region == "left hippocampus"]
    return pd.concat([base.assign(region=f"region {k:02d}") for k in range(n)], ignore_index=True)


def test_many_regions_go_onto_pages_no_taller_than_225_mm(values, tmp_path):
    many = _many_regions(values, 14)
    with pytest.raises(UsageError, match="14 regions need 2 figures.*page=1 to 2"):
        participant_figure(many, contrast="novel")
    pages = participant_pages(many, contrast="novel")
    assert len(pages) == 2
    drawn = [ax.get_title() for fig in pages for ax in fig.axes if ax.get_visible()]
    assert [t.split(" · ")[0] for t in drawn] == [f"region {k:02d}" for k in range(14)]  # every region, in order
    for fig in pages:
        assert fig.get_size_inches()[1] * 25.4 <= 225.0
    with pytest.raises(UsageError, match="page must lie between 1 and 2"):
        participant_figure(many, contrast="novel", page=3)


def test_long_forest_plots_are_split_into_pages(results_by_design):
    rows = results_by_design["paired"]
    long = pd.concat([rows.assign(region=rows.region + f" {k}") for k in range(12)], ignore_index=True)  # 36 rows
    assert len(long) > FOREST_ROWS_PER_PAGE
    with pytest.raises(UsageError, match="forest_pages"):
        forest_plot(long)
    pages = forest_pages(long)
    assert len(pages) == 2
    assert sum(len(fig.axes[0].get_yticks()) for fig in pages) == len(long)
    assert all(fig.get_size_inches()[1] * 25.4 <= 225.0 for fig in pages)


def test_forest_plot_true_minus_and_p_subscript(results_by_design):
    ax = forest_plot(results_by_design["glm"], term="age")
    texts = [t.get_text() for t in ax.texts]
    assert any("\u2212" in t for t in texts)  # negative estimates with true minus signs
    assert not any(re.search(r"(^|[\s\[(])-\d", t) for t in texts)  # no hyphen-minus before a digit
    assert any(t.startswith(r"$p_\mathrm{Holm}$") for t in texts)  # subscript, not raw p_Holm
    assert not any("p_Holm" in t and "$" not in t for t in texts)


def test_distinct_markers_for_distinct_meanings(values, results_by_design):
    ax = participant_plot(values, region="right hippocampus", contrast="novel", versus="familiar",
                          results=results_by_design["paired"])
    low = [c for c in ax.collections if c.get_label() == "low coverage (< 50% voxels)"][0]
    diff = [line for line in ax.lines if line.get_label() == "difference and CI"][0]
    # the low-coverage flag is an open hexagon, the difference a filled diamond
    assert diff.get_marker() == "D" and diff.get_markerfacecolor() == diff.get_markeredgecolor()
    assert low.get_paths()[0].vertices.shape != matplotlib.markers.MarkerStyle("D").get_path().vertices.shape
    assert low.get_facecolor().size == 0 or low.get_facecolor()[0][3] == 0  # open


def test_value_and_covariate_labels(values, participants, results_by_design):
    ax = participant_plot(values, region="left hippocampus", contrast="novel", value_label="% signal change")
    assert ax.get_ylabel() == r"% signal change"
    ax = covariate_plot(values, region="left hippocampus", contrast="novel", covariate="age",
                        participants=participants, covariate_label="age (years)", value_label="Parameter estimate (a.u.)")
    assert ax.get_xlabel() == "age (years)" and ax.get_ylabel() == "Parameter estimate (a.u.)"
    ax = forest_plot(results_by_design["one-sample"], measure="estimate", value_label="% signal change")
    assert ax.get_xlabel() == "estimate, % signal change and 95% CI"
    assert participant_plot(values, region="left hippocampus", contrast="novel").get_ylabel() == "region value"


# --------------------------------------------------------------------------------------------- region figure
@pytest.fixture()
def small_regions(tmp_path):
    """Two atlas boxes and a sphere on the small test grid (2 mm voxels, x flipped), known by construction."""
    from helpers import SMALL_SHAPE, save_nifti
    from roikit.regions import Atlas, RegionSet, Sphere

    atlas = np.zeros(SMALL_SHAPE, dtype=np.int16)
    atlas[2:6, 3:8, 4:8] = 1
    atlas[12:18, 10:14, 6:10] = 2
    save_nifti(tmp_path / "atlas.nii.gz", atlas, dtype=np.int16)
    pd.DataFrame({"index": [1, 2], "name": ["right caudate", "left caudate"]}).to_csv(
        tmp_path / "atlas.tsv", sep="\t", index=False)
    brain = np.zeros(SMALL_SHAPE, dtype=np.float32)
    brain[1:19, 1:23, 1:17] = 1.0 + np.arange(18)[:, None, None] / 18
    save_nifti(tmp_path / "background.nii.gz", brain)
    region_set = RegionSet([Atlas(tmp_path / "atlas.nii.gz", tmp_path / "atlas.tsv"),
                            Sphere("prior peak", (-10.0, 0.0, 0.0), 4.0)])
    from roikit.images import read_header

    grid = read_header(tmp_path / "atlas.nii.gz").grid
    return region_set, region_set.realise(grid), tmp_path


def test_region_figure_draws_each_region_through_its_centre(small_regions, tmp_path):
    from matplotlib.colors import to_hex

    from roikit.reporting.region_figure import REGION_COLORS, region_figure

    _, regions, folder = small_regions
    fig = region_figure(regions, background=folder / "background.nii.gz", title="background: test image")
    titles = [sub.get_suptitle() for sub in fig.subfigs if sub.get_visible()]
    assert titles == ["right caudate (80 voxels)", "left caudate (96 voxels)", "prior peak (33 voxels)"]
    sphere = fig.subfigs[2]
    # the sphere's centre (-10, 0, 0) mm: the slices go through it (true minus sign)
    assert [ax.get_xlabel() for ax in sphere.axes] == ["x = \u221210 mm", "y = 0 mm", "z = 0 mm"]
    # one colour per region, and the overlay holds the region's voxels of that slice: a sphere of radius 4 mm on
    # 2 mm voxels has 9 + 12 + 9 voxels... its central slice holds 13 voxels (|i|,|j| offsets with i^2+j^2 <= 4)
    overlay = sphere.axes[2].images[1]
    assert to_hex(overlay.get_cmap()(1.0)) == REGION_COLORS[2].lower()
    assert int(np.ma.count(overlay.get_array())) == 13
    width, height, smallest, overlaps, outside = audit_saved_figure(fig, tmp_path / "regions")
    assert width == pytest.approx(180) and height <= 225 and smallest >= 7 and not overlaps and not outside


def test_region_figure_pages_and_grey_background(small_regions, tmp_path):
    from roikit.regions import RegionSet, Sphere
    from roikit.reporting.region_figure import region_figure, region_pages

    _, regions, _ = small_regions
    spheres = RegionSet([Sphere(f"peak {k:02d}", (-10.0 + (k % 5) * 4, -10.0 + (k // 5) * 6, 0.0), 3.0)
                         for k in range(13)]).realise(regions.grid)
    with pytest.raises(UsageError, match="13 regions need 2 figures"):
        region_figure(spheres)
    pages = region_pages(spheres)
    assert len(pages) == 2
    drawn = [sub.get_suptitle().split(" (")[0] for fig in pages for sub in fig.subfigs if sub.get_visible()]
    assert drawn == [f"peak {k:02d}" for k in range(13)]
    for fig in pages:
        _, height, smallest, _, outside = audit_saved_figure(fig, tmp_path / "p")
        assert height <= 225 and smallest >= 7 and not outside
    single = region_figure(regions, width="single")
    assert single.get_size_inches()[0] * 25.4 == pytest.approx(85)


def test_regions_rebuilt_from_the_values_provenance(small_regions):
    from roikit.reporting.region_figure import regions_from_provenance

    region_set, regions, _ = small_regions
    prov = {"region_sources": region_set.describe(), **regions.provenance()}
    rebuilt = regions_from_provenance(prov)
    assert rebuilt.names == regions.names
    assert all(np.array_equal(a, b) for a, b in zip(rebuilt.voxels, regions.voxels))
    prov["regions"][0]["n_voxels"] = 81
    with pytest.raises(UsageError, match="differ from those recorded"):
        regions_from_provenance(prov)
    with pytest.raises(UsageError, match="does not describe the regions"):
        regions_from_provenance({})


def test_mean_background_ignores_missing_voxels(tmp_path):
    from helpers import SMALL_SHAPE, save_nifti
    from roikit.reporting.region_figure import mean_background

    a = np.zeros(SMALL_SHAPE, dtype=np.float32)
    b = np.zeros(SMALL_SHAPE, dtype=np.float32)
    a[1, 1, 1], b[1, 1, 1] = 2.0, 4.0
    a[2, 2, 2], b[2, 2, 2] = 3.0, np.nan  # the NaN is missing, not zero
    paths = [save_nifti(tmp_path / "a.nii.gz", a), save_nifti(tmp_path / "b.nii.gz", b)]
    mean = mean_background(paths)
    assert mean[1, 1, 1] == pytest.approx(3.0) and mean[2, 2, 2] == pytest.approx(3.0)
    assert np.isnan(mean[0, 0, 0])


def test_regions_command_draws_the_figure(small_regions, tmp_path, capsys):
    from roikit.cli import main

    _, _, folder = small_regions
    base = ["regions", "--atlas", str(folder / "atlas.nii.gz"), "--labels", str(folder / "atlas.tsv"),
            "--sphere", "prior peak=-10,0,0,4"]
    assert main(base + ["--figure", str(tmp_path / "where.png"), "--background",
                        str(folder / "background.nii.gz")]) == 0
    assert (tmp_path / "where.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "figure: " in capsys.readouterr().out
    assert main(base + ["--figure", str(tmp_path / "all" / "where")]) == 2  # no such folder
    (tmp_path / "all").mkdir()
    assert main(base + ["--figure", str(tmp_path / "all" / "where")]) == 0
    assert sorted(p.name for p in (tmp_path / "all").glob("where.*")) == ["where.pdf", "where.png", "where.svg"]
    capsys.readouterr()
    assert main(base + ["--figure", str(tmp_path / "where.png")]) == 1  # exists, no --overwrite
    assert "--overwrite" in capsys.readouterr().err
    assert main(base + ["--figure", str(tmp_path / "where.png"), "--overwrite"]) == 0
    assert main(base + ["--figure", str(tmp_path / "where.jpg")]) == 2
    assert main(base + ["--background", str(folder / "background.nii.gz")]) == 2  # a background needs --figure
    assert "--figure" in capsys.readouterr().err


def test_report_has_a_regions_section(small_regions, values, results_by_design, tmp_path):
    import warnings

    from roikit.reporting import write_report

    _, regions, folder = small_regions
    names = {"left hippocampus": "right caudate", "right hippocampus": "left caudate",
             "retrosplenial cortex": "prior peak"}
    vals = values.assign(region=values.region.map(names))
    vals.attrs = {}
    rows = results_by_design["one-sample"].assign(region=lambda d: d.region.map(names))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        written = write_report(vals, rows, out=tmp_path / "r", figure_formats=("png",), regions=regions,
                               region_background=folder / "background.nii.gz", value_label="% signal change")
    html = written["html"].read_text()
    assert '<section id="regions"' in html and "Centre (centre of mass, world mm)" in html
    assert (tmp_path / "r" / "figures" / "regions.png").is_file()
    methods = written["methods"].read_text()
    assert "## Regions" in methods and "| prior peak | sphere | 33 |" in methods
    assert "−10.0" in methods or "-10.0" in methods


def test_report_names_a_region_figure_it_could_not_draw(small_regions, values, results_by_design, tmp_path):
    import warnings

    from roikit.reporting import write_report

    _, regions, folder = small_regions
    names = {"left hippocampus": "right caudate", "right hippocampus": "left caudate",
             "retrosplenial cortex": "prior peak"}
    vals = values.assign(region=values.region.map(names))
    rows = results_by_design["one-sample"].assign(region=lambda d: d.region.map(names))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        written = write_report(vals, rows, out=tmp_path / "r", figure_formats=("png",), regions=regions,
                               region_background=folder / "no_such_image.nii.gz")
    html = written["html"].read_text()
    assert "Figures not drawn" in html and "regions: " in html and "no_such_image.nii.gz" in html
    assert any("_participants" in p.name for p in written["figures"])  # the other figures still drawn


def test_report_without_region_description_says_so(values, results_by_design, tmp_path):
    import warnings

    from roikit.reporting import write_report

    vals = values.copy()
    vals.attrs = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        written = write_report(vals, results_by_design["one-sample"], out=tmp_path / "r", figure_formats=("png",))
    assert "no description of the regions" in written["html"].read_text()


def test_labels_from_the_participants_sidecar(tmp_path):
    import json

    from roikit.reporting.report import labels_from_sidecar

    (tmp_path / "participants.tsv").write_text("participant_id\troute_accuracy\tage\n")
    (tmp_path / "participants.json").write_text(json.dumps({
        "route_accuracy": {"Description": "share of routes", "Units": "%"},
        "age": {"LongName": "Age", "Units": "years"}}))
    assert labels_from_sidecar(tmp_path / "participants.tsv") == {"route_accuracy": "route accuracy (%)",
                                                                  "age": "Age (years)"}
    assert labels_from_sidecar(tmp_path / "missing.tsv") == {}


def test_report_command_takes_a_value_label(values, results_by_design, participants, tmp_path, monkeypatch):
    import json

    import roikit.reporting.report as report_module
    from roikit._tables import write_table
    from roikit.cli import main

    seen = []
    real = report_module.participant_pages

    def spy(data, **kwargs):
        seen.append({k: kwargs.get(k) for k in ("value_label", "covariate_label")})
        return real(data, **kwargs)

    monkeypatch.setattr(report_module, "participant_pages", spy)
    # the spy records in this process: draw the figures here, not in worker processes
    monkeypatch.setattr("roikit.reporting._parallel.usable_cores", lambda: 1)

    write_table(tmp_path / "values.tsv", values)
    write_table(tmp_path / "results.tsv", results_by_design["glm"])
    write_table(tmp_path / "participants.tsv", participants)
    (tmp_path / "participants.json").write_text(json.dumps({"age": {"LongName": "Age at scan", "Units": "years"}}))
    status = main(["report", "--values", str(tmp_path / "values.tsv"), "--results", str(tmp_path / "results.tsv"),
                   "--participants", str(tmp_path / "participants.tsv"), "--out", str(tmp_path / "r"),
                   "--value-label", "% signal change"])
    assert status == 0
    prov = json.loads((tmp_path / "r" / "provenance.json").read_text())
    assert prov["options"]["value_label"] == "% signal change"
    assert any("_covariate-age" in p.name for p in (tmp_path / "r" / "figures").glob("*.png"))
    # the axis labels the figures were drawn with: the user's unit, and the sidecar's long name with its unit
    assert {"value_label": "% signal change", "covariate_label": "Age at scan (years)"} in seen


def test_interaction_plot_draws_every_complete_participant_and_the_cell_means(values, participants):
    """Each trace has one thin line per complete participant and its means are the cell means (numpy)."""
    from matplotlib.collections import LineCollection

    res = _repeated(values, participants, "route,hemisphere", None)
    ax = interaction_plot(values, res, unit="hippocampus (left, right)")
    lines = [c for c in ax.collections if isinstance(c, LineCollection) and c.get_label().startswith("participants")]
    assert [c.get_label() for c in lines] == ["participants (hemisphere: left)", "participants (hemisphere: right)"]
    n = int(res["n"].iloc[0])
    assert all(len(c.get_segments()) == n for c in lines)
    hipp = values[values["region"] == "left hippocampus"].pivot(index="participant_id", columns="contrast",
                                                                   values="value")[["novel", "familiar"]]
    excluded = set(str(res["excluded_ids"].iloc[0]).split(",")) if isinstance(res["excluded_ids"].iloc[0], str) else set()
    hipp = hipp[~hipp.index.isin(excluded)].dropna()
    means = [line for line in ax.lines if len(line.get_xdata()) == 2 and line.get_linewidth() > 1.2]
    np.testing.assert_allclose(means[0].get_ydata(), hipp.mean().to_numpy(), rtol=1e-12)
    assert ax.get_xlabel() == f"route (n = {n})"
    assert [t.get_text() for t in ax.get_xticklabels()] == ["novel", "familiar"]


def test_interaction_pages_one_column_per_group(values, participants):
    fig = interaction_pages(values, _repeated(values, participants), participants=participants)[0]
    titles = [ax.get_title().replace("\n", " ") for ax in fig.axes if ax.get_visible()]
    assert titles == ["hippocampus (left, right) · younger", "hippocampus (left, right) · older"] or \
        titles == ["hippocampus (left, right) · older", "hippocampus (left, right) · younger"]


def test_interaction_plot_needs_repeated_measures_results(values, results_by_design):
    with pytest.raises(UsageError, match="repeated-measures"):
        interaction_plot(values, results_by_design["one-sample"])


def test_functional_overlap_share_and_figure(small_regions, tmp_path):
    """Share of participants per voxel, known by construction: voxel a in both participants' selections (1.0),
    voxel b in one participant's first of two folds (1/4), the rest of the search space 0."""
    from roikit.reporting.region_figure import functional_overlap, functional_overlap_figure

    _, regions, _folder = small_regions
    space = regions.voxels[regions.names.index("right caudate")]
    a, b = int(space[0]), int(space[5])
    functional = {"regions": [{"name": "fROI", "within": "right caudate"}], "selections": [
        {"participant_id": "sub-01", "contrast": "novel", "region": "fROI",
         "folds": [{"voxels": [a, b]}, {"voxels": [a]}]},
        {"participant_id": "sub-02", "contrast": "novel", "region": "fROI", "folds": [{"voxels": [a]}]}]}
    share = functional_overlap(regions, functional)["fROI"]
    assert share[a] == pytest.approx(1.0) and share[b] == pytest.approx(0.25)
    assert np.nansum(share) == pytest.approx(1.25) and np.isfinite(share).sum() == len(space)
    fig = functional_overlap_figure(regions, functional)
    width, height, smallest, overlaps, outside = audit_saved_figure(fig, tmp_path / "functional")
    assert width == pytest.approx(180) and height <= 225 and smallest >= 7 and not overlaps and not outside
