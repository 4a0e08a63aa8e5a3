"""Build the template notebooks (``notebooks/*.ipynb``) from the cells written below.

The notebooks are generated, never edited by hand, so that a review reads this file. Run::

    python notebooks/_build.py          # rewrites the six notebooks, outputs stripped

Each notebook starts with a parameters cell (tagged ``parameters``) that points at a study file; with
``STUDY = None`` it uses the invented demo study (roikit.demo), written once into a shared folder
(``~/.cache/roikit/demo``) and reused by every notebook. Each ends by saving its tables and figures into the
study's results folder (``tables/`` and ``figures/``), where the report keeps them.

The notebooks use only roikit's public API. roikit builds figures without pyplot, so they are shown by
returning them: a cell that draws ends with the figure (or calls ``display(fig)``). Every such cell is tagged
``figure`` and records how many figures it shows (``metadata.roikit.figures``); the tests execute the notebooks
and count the images in those cells.
"""

from __future__ import annotations

import sys
from pathlib import Path

import nbformat
from nbformat.v4 import new_code_cell, new_markdown_cell, new_notebook

HERE = Path(__file__).resolve().parent

PARAMETERS = '''\
# Parameters: point STUDY at your study file (TOML, see `roikit run`); None runs the invented demo study.
STUDY = None
DEMO_FOLDER = None  # the demo study when STUDY is None (None: ~/.cache/roikit/demo, written once, shared)
OUT = None  # results folder (None: `results` beside the study file, as `roikit run` uses)
VALUE_LABEL = None  # axis label of the region values with their unit, e.g. "% signal change" (None: the study's)
FIGURE_FORMATS = ("pdf", "svg", "png")  # vector for the journal, 300-dpi PNG for slides and the report
OVERWRITE = None  # True replaces tables and figures of an earlier run (None: only in the demo folder)
'''

SETUP = '''\
%matplotlib inline
%config InlineBackend.figure_formats = ["retina"]  # sharp figures on high-resolution screens
import os
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from IPython.display import Markdown, display
from matplotlib.figure import Figure

from roikit.reporting import GROUP_COLORS, GROUP_MARKERS, results_tables, save_figure, style, write_table
from roikit.study import extract_study, load_study

demo = STUDY is None
if demo:  # the invented wayfinding study (all data invented): written once (about 15 s), then shared
    from roikit.demo import make_study

    cache = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache")
    folder = Path(DEMO_FOLDER).expanduser() if DEMO_FOLDER else cache / "roikit" / "demo"
    if not (folder / "study.toml").is_file():
        make_study(folder)
    STUDY = folder / "study.toml"
OVERWRITE = demo if OVERWRITE is None else OVERWRITE  # re-running the demo replaces its own outputs

study = load_study(STUDY)  # checks the whole study file first and lists every problem at once
OUT = Path(OUT) if OUT else study.default_out
TABLES, FIGURES = OUT / "tables", OUT / "figures"
VALUE_LABEL = VALUE_LABEL or study.value_label
MM = 1 / 25.4  # figure sizes in millimetres: 85 (single column), 120 (one and a half), 180 (double)
participants = study.participants
# the options of each design's first [[analysis]] in the study file (a design the file lacks is absent)
analyses = {}
for analysis in study.analyses:
    analyses.setdefault(analysis.design, dict(analysis.options))
# region values of every map; maps extracted by an earlier run (or notebook) come from OUT/.cache
values = extract_study(study, out=OUT)
print(f"{study.title}: {values['participant_id'].nunique()} participants, {len(study.maps)} maps, "
      f"{values['region'].nunique()} regions; results folder {OUT}")
'''


def md(text: str):
    return new_markdown_cell(text.strip("\n"))


def code(text: str, *, tags: tuple[str, ...] = ()):
    cell = new_code_cell(text.strip("\n"))
    if tags:
        cell.metadata["tags"] = list(tags)
    return cell


def drawing(text: str, figures: int = 1):
    """A code cell that shows ``figures`` figures (tagged ``figure``; the tests count its images)."""
    cell = code(text, tags=("figure",))
    cell.metadata["roikit"] = {"figures": figures}
    return cell


def head(title: str, intro: str) -> list:
    return [
        md(f"# {title}\n\n{intro.strip()}\n\n*roikit is for research group analysis, not for clinical decisions "
           "about an individual patient. With the default parameters every number below comes from the invented "
           "wayfinding study.*"),
        code(PARAMETERS, tags=("parameters",)),
        code(SETUP),
    ]


# --------------------------------------------------------------------------------------------------------------
# 01 from maps to a region table
# --------------------------------------------------------------------------------------------------------------

NB01 = head("01 From maps to a region table", """
One first-level contrast map per participant and contrast goes in; one tidy table comes out, with one row per
participant x contrast x region. This notebook shows where the regions come from, checks that maps and regions
share a voxel grid, checks coverage (how much of each region has data in each map), and takes a first look.
""") + [
    md("""
## Region sources

The study file lists the regions: an atlas with its label table, spheres around coordinates, masks, probability
maps. They are realised on the maps' voxel grid; a region image on another grid is resampled by nearest neighbour
and the resampling is recorded (nothing is resampled silently).
"""),
    code('''
display(pd.DataFrame(study.regions.describe()))
regions = study.realised.summary()
display(regions)
print("grid of the maps:", study.realised.grid.describe())
print("region images resampled:", len(study.realised.resampling) or "none")
'''),
    md("""
Where the regions are: each region on a sagittal, a coronal and an axial slice through its centre, over the mean of
the maps (the same figure as `roikit regions ... --figure FILE` and the report's "Regions" section).
"""),
    drawing('''
from roikit.reporting import mean_background, region_pages

background = mean_background(study.maps["path"], study.realised.grid)  # at most 100 maps, evenly spaced
region_figs = region_pages(study.realised, background=background, title="background: mean of the maps")
for fig in region_figs:
    display(fig)
'''),
    md("""
## Grid and coverage checks

Every map must share one grid (shape and affine, compared with a tolerance); extraction stops with the offending
file otherwise. Coverage is the share of a region's voxels with usable data (`n_valid / n_voxels`): signal
dropout or a tight first-level mask shrinks it. Values resting on less than half of a region are flagged in every
analysis and marked in the figures.
"""),
    drawing('''
values["coverage"] = values["n_valid"] / values["n_voxels"]
coverage = values.pivot_table(index="participant_id", columns="region", values="coverage", aggfunc="min", sort=False)
low = values[values["coverage"] < 0.5][["participant_id", "contrast", "region", "n_valid", "n_voxels", "coverage"]]
print(f"{len(low)} participant x contrast x region values rest on less than half of the region")
display(low.head(20))

with style():  # roikit's print style: 7-pt text, fonts embedded
    shown = coverage.iloc[:60]  # at most 60 participants per figure keep it under 225 mm at 7 pt
    coverage_fig = Figure(figsize=(180 * MM, min(225, 3.1 * len(shown) + 50) * MM), layout="constrained")
    ax = coverage_fig.add_subplot()
    image = ax.imshow(shown.to_numpy(), vmin=0, vmax=1, cmap="viridis", aspect="auto")  # viridis: colour-blind safe
    ax.set_xticks(range(shown.shape[1]), shown.columns, rotation=45, ha="right")
    ax.set_yticks(range(shown.shape[0]), shown.index)
    ax.set_title("Lowest coverage over the contrasts (n_valid / n_voxels)")
    coverage_fig.colorbar(image, ax=ax, label="coverage", shrink=0.5)
coverage_fig  # the last expression of a cell is displayed
'''),
    md("""
## Extraction

`extract_study` (the same step as `roikit run`) reads each map once for all regions and summarises the voxels with
data (the mean unless the study file says otherwise; zeros count as missing unless `keep_zeros = true`). The
table's provenance records every input file with its SHA-256.
"""),
    code('''
values = values.drop(columns="coverage")
display(values.head(12))
provenance = values.attrs["roikit"]
print("statistic:", provenance["statistic"], "| missing rule:", provenance["missing_rule"])
print("maps read now:", provenance["cache"]["extracted"], "| taken from the cache:", provenance["cache"]["reused"])
'''),
    md("""
## A first look

Means per contrast and region, then every participant of one contrast, region by region. Look for participants far
from the others and for regions where the spread dwarfs the mean before running any test.
"""),
    drawing('''
display(values.pivot_table(index="region", columns="contrast", values="value", aggfunc="mean", sort=False).round(3))

from roikit.reporting import participant_pages

first = study.analyses[0].options.get("contrast") if study.analyses else None
contrast = first if isinstance(first, str) else values["contrast"].iloc[0]
# one figure per page of at most 225 mm: many regions give several pages
first_look = participant_pages(values, contrast=contrast, value_label=VALUE_LABEL)
for fig in first_look:
    display(fig)
'''),
    md("## Save where the report expects them"),
    code('''
from roikit.extraction import write_values

print(write_values(OUT / "region_values.tsv", values, overwrite=OVERWRITE))
print(write_table(TABLES / "coverage_by_participant.tsv", coverage.reset_index(), overwrite=OVERWRITE, sidecar={
    "description": "lowest coverage (n_valid / n_voxels) over the contrasts, per participant and region"}))
print(write_table(TABLES / "regions.tsv", regions, overwrite=OVERWRITE, sidecar={
    "description": "regions realised on the maps' grid: voxels, volume, centre of mass (mm)"}))
for k, fig in enumerate(first_look, start=1):
    page = f"_page{k}" if len(first_look) > 1 else ""
    print(save_figure(fig, FIGURES / f"first_look_{contrast}{page}", formats=FIGURE_FORMATS, overwrite=OVERWRITE))
print(save_figure(coverage_fig, FIGURES / "coverage_by_participant", formats=FIGURE_FORMATS, overwrite=OVERWRITE))
for k, fig in enumerate(region_figs, start=1):
    page = f"_page{k}" if len(region_figs) > 1 else ""
    print(save_figure(fig, FIGURES / f"regions{page}", formats=FIGURE_FORMATS, overwrite=OVERWRITE))
'''),
]

# --------------------------------------------------------------------------------------------------------------
# 02 is there an effect?
# --------------------------------------------------------------------------------------------------------------

NB02 = head("02 Is there an effect?", """
The first question in most region-of-interest studies: is the mean response in a region different from zero
(one-sample), or different between two conditions within the same participants (paired)? Every region is tested
at once, and the p-values are corrected across the regions of the family.
""") + [
    code('''
one = analyses.get("one-sample") or {"contrast": values["contrast"].iloc[0]}
paired = analyses.get("paired")
print("one-sample:", one, "| paired:", paired)
'''),
    md("""
## One-sample: is the mean different from zero?

Each participant contributes one value per region; the test asks whether the population mean differs from zero,
so participants are the unit of analysis (notebook 05 shows why). The effect size is `d` = mean / SD with a
confidence interval from the noncentral *t* distribution.
"""),
    code('''
from roikit.stats import run_design

with warnings.catch_warnings(record=True) as caught:  # diagnostics (outliers, coverage) are kept as columns too
    warnings.simplefilter("always")
    one_sample = run_design(values, "one-sample", participants=participants, permutations=2000, seed=2024, **one)
for w in caught:
    print(f"{w.category.__name__}: {w.message}")
columns = ["region", "n", "estimate", "ci_low", "ci_high", "statistic", "df", "p", "p_holm", "p_fdr", "p_fwe",
           "effect_size", "effect_size_ci_low", "effect_size_ci_high", "n_outliers", "n_low_coverage"]
display(one_sample[columns].round(4))
'''),
    md("""
## Corrections: which regions survive?

Testing ten regions at the 5% level gives about one false positive in two studies when nothing is there. Three
answers: the permutation family-wise p (`p_fwe`, from the maximum statistic over the regions, so it takes the
correlation between regions into account; its smallest possible value is 1 / (permutations + 1)), Holm (`p_holm`,
family-wise, valid whatever that correlation) and Benjamini-Hochberg (`p_fdr`, controls the expected share of false
discoveries among the regions declared, so it is the most lenient). Say in the pre-registration which
one you use and which regions form the family.
"""),
    drawing('''
survive = pd.DataFrame({name: one_sample[column] < 0.05 for name, column in
                        [("uncorrected", "p"), ("Holm", "p_holm"), ("FDR", "p_fdr"), ("permutation FWE", "p_fwe")]})
survive.index = one_sample["region"]
display(survive)

order = np.argsort(one_sample["p"].to_numpy())
names = {"p": "uncorrected", "p_holm": "Holm", "p_fdr": "FDR", "p_fwe": "permutation FWE"}
with style():  # roikit's print style: 7-pt text, fonts embedded
    corrections_fig = Figure(figsize=(85 * MM, 70 * MM), layout="constrained")
    ax = corrections_fig.add_subplot()
    for k, column in enumerate(names):
        ax.plot(np.arange(1, len(order) + 1), one_sample[column].to_numpy()[order], marker=GROUP_MARKERS[k],
                color=GROUP_COLORS[k], lw=0.8, ms=3, label=names[column])
    ax.axhline(0.05, color="0.3", ls="--", lw=0.8)
    ax.set_yscale("log")
    ax.set_xlabel("regions, by uncorrected $p$")
    ax.set_ylabel("$p$")
    ax.legend()
corrections_fig
'''),
    md("""
## Dot plots: every participant visible

A bar chart hides the participants; these plots show each one, with the estimate and its confidence interval and a
line at zero. Rings mark outliers, diamonds low-coverage participants; both stay in the analysis.
"""),
    drawing('''
from roikit.reporting import forest_pages, participant_pages

dots = participant_pages(values, contrast=one["contrast"], results=one_sample, design="one-sample",
                         value_label=VALUE_LABEL)
forest = forest_pages(one_sample)  # the effect sizes with their CIs; filled squares survive the correction
for fig in dots + forest:
    display(fig)
''', figures=2),
    md("""
## Paired: within-participant differences

With two conditions from the same participants, the paired test works on each participant's difference; its
effect size is `d_z` = mean difference / SD of the differences (not comparable to a between-group `d`).
"""),
    drawing('''
paired_results = None
if paired is not None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the same diagnostics as above, kept as columns
        paired_results = run_design(values, "paired", participants=participants, **paired)
    display(paired_results[["region", "term", "n", "estimate", "ci_low", "ci_high", "p", "p_holm",
                            "effect_size_type", "effect_size", "effect_size_ci_low", "effect_size_ci_high"]].round(4))
    paired_dots = participant_pages(values, contrast=paired["contrast"], versus=paired["versus"],
                                    results=paired_results, design="paired", value_label=VALUE_LABEL)
    for fig in paired_dots:
        display(fig)
else:
    print("The study file has no paired analysis.")
'''),
    md("""
## In-text strings

APA style, ready to paste: the statistic with its df, the exact p (Holm-corrected here, named in the text), the
effect size and its interval.
"""),
    code('''
from roikit.reporting import in_text, results_table

for row in one_sample.to_dict("records"):
    print(f"{row['region']}: {in_text(row, correction='holm')}")
'''),
    md("## Save where the report expects them"),
    code('''
table = results_table(one_sample)
display(Markdown(table.to_markdown()))
print([p for t in results_tables(one_sample, start=1) for p in t.write(TABLES, overwrite=OVERWRITE)])
figures = {f"one_sample_{one['contrast']}_participants": dots, f"one_sample_{one['contrast']}_forest": forest,
           f"one_sample_{one['contrast']}_corrections": [corrections_fig]}
if paired_results is not None:
    print([p for t in results_tables(paired_results, start=2) for p in t.write(TABLES, overwrite=OVERWRITE)])
    figures[f"paired_{paired['contrast']}_vs_{paired['versus']}_participants"] = paired_dots
for name, pages in figures.items():  # several pages when the regions do not fit one figure
    for k, fig in enumerate(pages, start=1):
        page = f"_page{k}" if len(pages) > 1 else ""
        print(save_figure(fig, FIGURES / f"{name}{page}", formats=FIGURE_FORMATS, overwrite=OVERWRITE))
'''),
]

# --------------------------------------------------------------------------------------------------------------
# 03 two groups and covariates
# --------------------------------------------------------------------------------------------------------------

NB03 = head("03 Two groups and covariates", """
Between-participant questions: do two groups differ (two-group design), and does a region's response go with a
participant measure such as age or behaviour, adjusting for group (glm)? Groups and covariates come from
participants.tsv.
""") + [
    code('''
from roikit.stats import run_design

two = analyses.get("two-group")
glm = analyses.get("glm")
print("two-group:", two, "| glm:", glm)
'''),
    md("""
## Descriptives

Before any test: how many participants per group, and the mean and spread of each region in each group.
"""),
    code('''
from roikit.reporting import descriptives_table

group = two["group"] if two else None
sub = values[values["contrast"] == (two or glm or {"contrast": values["contrast"].iloc[0]})["contrast"]]
descriptives = descriptives_table(sub, participants=participants, group=group, number=1)
display(Markdown(descriptives.to_markdown()))
'''),
    md("""
## Two groups

Student's *t* assumes equal variances in the groups; Welch's *t* does not (fractional df). The Brown-Forsythe test
of equal variances is reported as a diagnostic column, but choose the test in advance rather than by that test.
The effect size is Hedges' `g` with the exact small-sample correction.
"""),
    drawing('''
from roikit.reporting import participant_pages

two_results = None
if two is not None:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        two_results = run_design(values, "two-group", participants=participants, **two)
        welch = run_design(values, "two-group", participants=participants, **{**two, "welch": True})
    print(f"{len(caught)} diagnostic warning(s); the same information is in the columns")
    comparison = two_results[["region", "term", "n", "estimate", "df", "p", "p_holm", "effect_size",
                              "brown_forsythe_p"]].merge(
        welch[["region", "df", "p", "p_holm"]], on="region", suffixes=("", "_welch"))
    display(comparison.round(4))
    groups_figs = participant_pages(values, contrast=two["contrast"], group=two["group"], levels=two["levels"],
                                    participants=participants, results=two_results, design="two-group",
                                    value_label=VALUE_LABEL)
    for fig in groups_figs:
        display(fig)
else:
    print("The study file has no two-group analysis.")
'''),
    md("""
## Covariates (glm)

One model per region, every region at once: `value ~ covariate + group`. Numeric covariates are mean-centred, so
the intercept is the mean response at the average covariate. Each coefficient gets its own row, its own correction
family and a partial eta squared.
"""),
    drawing('''
from roikit.reporting import covariate_plot, labels_from_sidecar, results_table

glm_results = None
if glm is not None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        glm_results = run_design(values, "glm", participants=participants, **glm)
    display(glm_results[["region", "term", "estimate", "ci_low", "ci_high", "statistic", "df", "p", "p_holm",
                         "effect_size", "max_cooks_d"]].round(4))
    numeric = [c for c in participants.columns if c != "participant_id"
               and pd.api.types.is_numeric_dtype(participants[c]) and c in glm["formula"]]
    covariate = numeric[0] if numeric else None
    if covariate:
        rows = glm_results[glm_results["term"] == covariate]
        top = rows.sort_values("p")["region"].iloc[0]
        # the axis says what the covariate is (participants.json: LongName and Units), not its column name
        label = labels_from_sidecar(study.participants_path).get(covariate)
        ax = covariate_plot(values, covariate=covariate, region=top, contrast=glm["contrast"],
                            participants=participants, group=group, results=glm_results, covariate_label=label,
                            value_label=VALUE_LABEL)
        covariate_fig = ax.figure
        display(covariate_fig)
else:
    print("The study file has no glm analysis.")
'''),
    md("## Save where the report expects them"),
    code('''
print(descriptives.write(TABLES, overwrite=OVERWRITE))
if two_results is not None:
    print([p for t in results_tables(two_results, start=2) for p in t.write(TABLES, overwrite=OVERWRITE)])
    for k, fig in enumerate(groups_figs, start=1):
        page = f"_page{k}" if len(groups_figs) > 1 else ""
        print(save_figure(fig, FIGURES / f"two_group_{two['contrast']}_participants{page}", formats=FIGURE_FORMATS,
                          overwrite=OVERWRITE))
if glm_results is not None:
    print([p for t in results_tables(glm_results, start=3) for p in t.write(TABLES, overwrite=OVERWRITE)])
    if covariate:
        print(save_figure(covariate_fig, FIGURES / f"glm_{glm['contrast']}_{covariate}", formats=FIGURE_FORMATS,
                          overwrite=OVERWRITE))
'''),
]

# --------------------------------------------------------------------------------------------------------------
# 04 repeated measures and stimuli
# --------------------------------------------------------------------------------------------------------------

NB04 = head("04 Repeated measures and stimuli", """
Two ways to use more of the data. The precision-weighted design uses each participant's first-level variance, so
noisy participants count less while the between-participant variance is still estimated. The mixed design models
several observations per participant (here: the six towns, the stimuli) with participants *and* towns as random
effects, so the conclusion generalises to new people and to new towns. Then the factorial view most region papers
report (route x hemisphere within participants, age group between them) and the test two regions need before
anyone says they differ.
""") + [
    code('''
from roikit.stats import run_design

precision = analyses.get("precision-weighted")
mixed = analyses.get("mixed")
print("precision-weighted:", precision, "| mixed:", mixed)
'''),
    md("""
## Precision weighting

Per region: `y_i = b + u_i + e_i` with the between-participant variance `tau2` estimated (REML) and the
first-level variance `v_i` known from the variance maps. `I2` is the share of the spread that is between
participants rather than measurement noise. Compare with the unweighted one-sample test on the same values.
"""),
    drawing('''
from roikit.reporting import participant_pages, precision_plot

precision_results = None
if precision is not None and "variance" in values.columns:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # diagnostics are columns (boundary, outliers)
        precision_results = run_design(values, "precision-weighted", participants=participants, **precision)
        unweighted = run_design(values, "one-sample", participants=participants, contrast=precision["contrast"])
    both = precision_results[["region", "estimate", "se", "p", "tau2", "i2", "boundary"]].merge(
        unweighted[["region", "estimate", "se", "p"]], on="region", suffixes=("", "_unweighted"))
    display(both.round(4))
    precision_figs = participant_pages(values, contrast=precision["contrast"], results=precision_results,
                                       plot=precision_plot, value_label=VALUE_LABEL)
    for fig in precision_figs:
        display(fig)
else:
    print("The study file has no precision-weighted analysis (or no variance maps).")
'''),
    md("""
## Participants and stimuli as random effects

Each participant navigated six towns; the towns are a sample of possible towns, just as the participants are a
sample of people. A crossed random intercept for town lets the estimate generalise to new towns: the standard error
of the mean response then includes the variance between towns, divided by the number of towns. Treating the towns
as fixed (or ignoring them) answers a narrower question, about these six towns only. The second table splits each
region's variance into shares: between participants, between towns, and residual.
"""),
    drawing('''
from roikit.reporting import stimulus_plot

mixed_results = None
if mixed is not None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mixed_results = run_design(values, "mixed", participants=participants, **mixed)
        columns = ["region", "term", "estimate", "se", "df", "p", "p_holm", "sd_participant", "sd_residual", "icc",
                   "converged", "boundary"]
        sd_crossed = [c for c in mixed_results.columns if c.startswith("sd_") and c not in columns]
        display(mixed_results[columns + sd_crossed].round(4))
    if sd_crossed:  # how much of the spread is between people, between towns, and left over
        parts = mixed_results.drop_duplicates("region").set_index("region")[["sd_participant"] + sd_crossed
                                                                             + ["sd_residual"]]
        display((parts ** 2).div((parts ** 2).sum(axis=1), axis=0).round(3).rename(columns=lambda c: "share " + c[3:]))
    stimuli = mixed.get("contrast") if isinstance(mixed.get("contrast"), list) else None
    top = mixed_results[mixed_results["term"] == mixed_results["term"].iloc[0]].sort_values("p")["region"].iloc[0]
    ax = stimulus_plot(values[values["contrast"].isin(stimuli)] if stimuli else values, region=top,
                       stimulus=mixed.get("crossed") or "contrast", participants=participants,
                       results=mixed_results, value_label=VALUE_LABEL)
    stimulus_fig = ax.figure
    display(stimulus_fig)
else:
    print("The study file has no mixed analysis.")
'''),
    md("""
## Factors within participants: route x hemisphere

Most region papers report a within-participant factorial ANOVA. Here the route (from `contrasts.tsv`) and the
hemisphere (from `regions.tsv`) are within-participant factors and the age group is between participants; the
left and right region of each structure are tested together (the result's `region` names the pair). F tests with
more than one numerator df get Greenhouse-Geisser corrected df and p (`p_gg`); `generalized_eta2` is comparable
across designs. The figure draws every participant's lines behind the condition means.
"""),
    drawing('''
from roikit.reporting import interaction_pages

repeated = analyses.get("repeated-measures")
repeated_results, interaction_figs = None, []
if repeated is not None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # participants without every cell are named in excluded_ids
        repeated_results = run_design(values, "repeated-measures", participants=participants, **repeated)
    display(repeated_results[["region", "term", "df1", "df", "statistic", "p", "epsilon_gg", "p_gg", "p_holm",
                              "effect_size", "generalized_eta2"]].round(4))
    interaction_figs = interaction_pages(values, repeated_results, participants=participants,
                                         value_label=VALUE_LABEL)
    for fig in interaction_figs:
        display(fig)
else:
    print("The study file has no repeated-measures analysis.")
'''),
    md("""
## Do two regions differ? Test the difference

"Significant in the left hippocampus, not in the right" is not a difference between them (Gelman & Stern, 2006;
Nieuwenhuis, Forstmann & Wagenmakers, 2011). The region-difference design tests each participant's difference
between the two regions. A non-significant difference is not evidence that they respond equally either: for that,
an equivalence test or a Bayes factor (the one-sample analysis of the demo carries both).
"""),
    code('''
difference = analyses.get("region-difference")
difference_results = None
if difference is not None:
    difference_results = run_design(values, "region-difference", participants=participants, **difference)
    display(difference_results[["region", "n", "estimate", "ci_low", "ci_high", "statistic", "p", "effect_size"]]
            .round(4))
one = analyses.get("one-sample")
if one is not None and ("equivalence" in one or "bayes_factor" in one):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        evidence = run_design(values, "one-sample", participants=participants, **one)
    display(evidence[["region", "estimate", "p", "effect_size", "p_equivalence", "bf10"]].round(4))
'''),
    md("## Save where the report expects them"),
    code('''
if repeated_results is not None:
    print([p for t in results_tables(repeated_results, start=6) for p in t.write(TABLES, overwrite=OVERWRITE)])
    for k, fig in enumerate(interaction_figs, start=1):
        page = f"_page{k}" if len(interaction_figs) > 1 else ""
        print(save_figure(fig, FIGURES / f"repeated_measures_interaction{page}", formats=FIGURE_FORMATS,
                          overwrite=OVERWRITE))
if difference_results is not None:
    print([p for t in results_tables(difference_results, start=7) for p in t.write(TABLES, overwrite=OVERWRITE)])
if precision_results is not None:
    print([p for t in results_tables(precision_results, start=4) for p in t.write(TABLES, overwrite=OVERWRITE)])
    for k, fig in enumerate(precision_figs, start=1):
        page = f"_page{k}" if len(precision_figs) > 1 else ""
        print(save_figure(fig, FIGURES / f"precision_weighted_{precision['contrast']}{page}",
                          formats=FIGURE_FORMATS, overwrite=OVERWRITE))
if mixed_results is not None:
    print([p for t in results_tables(mixed_results, start=5) for p in t.write(TABLES, overwrite=OVERWRITE)])
    print(save_figure(stimulus_fig, FIGURES / "mixed_stimuli", formats=FIGURE_FORMATS, overwrite=OVERWRITE))
'''),
]

# --------------------------------------------------------------------------------------------------------------
# 05 why participants are random effects
# --------------------------------------------------------------------------------------------------------------

NB05 = head("05 Why participants are random effects", """
For newcomers to the lab. A group study asks about *people in general*, not only about the participants we scanned.
This notebook simulates many studies where we know the truth and counts how often each analysis is fooled. The
simulated studies take their participants' first-level variances from the study above (the demo's by default), and
every test is roikit's own (`run_design`): each simulated study is one "region" of a region values table, so
thousands of studies are tested at once.
""") + [
    code('''
# Simulation settings (small, so the notebook runs in seconds; raise STUDIES for smoother curves)
STUDIES = 500  # simulated studies per setting
N = 16  # participants per study
SEED = 2024
ALPHA = 0.05

from roikit.stats import run_design

contrast = (analyses.get("precision-weighted") or analyses.get("one-sample") or
            {"contrast": values["contrast"].iloc[0]})["contrast"]
if "variance" in values.columns:
    first_level = values[values["contrast"] == contrast].groupby("participant_id")["variance"].median()
else:  # no variance maps: a typical first-level variance per participant from the spread of the values
    first_level = values[values["contrast"] == contrast].groupby("participant_id")["value"].var() / 4
v_typical = float(first_level.median())
print(f"first-level variances taken from contrast {contrast!r}: median {v_typical:.3f}")
rng = np.random.default_rng(SEED)


def simulate(mean, between_sd, variances, studies):
    """A region values table of `studies` simulated studies (one per 'region')."""
    n = len(variances)
    true = mean + between_sd * rng.standard_normal((studies, n))  # each person's true response
    measured = true + np.sqrt(variances) * rng.standard_normal((studies, n))  # plus first-level noise
    return pd.DataFrame({
        "participant_id": np.tile([f"sub-{i + 1:02d}" for i in range(n)], studies),
        "contrast": "simulated",
        "region": np.repeat([f"study {k + 1}" for k in range(studies)], n),
        "value": measured.ravel(), "n_voxels": 1, "n_valid": 1, "variance": np.tile(variances, studies)})


def rejection_rate(table, design, **options):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # e.g. the caution attached to every fixed-effects result
        results = run_design(table, design, contrast="simulated", correct=None, **options)
    return float((results["p"] < ALPHA).mean())
'''),
    md("""
## 1. When there is no effect at all

No one in the population responds on average (true mean 0). People still differ from one another: some respond a
little, some a little negatively. The horizontal axis is that spread between people. Each line shows how often an
analysis declares an effect that is not there; an honest test stays near the dashed 5% line.
"""),
    drawing('''
variances = first_level.to_numpy()[:N] if len(first_level) >= N else np.full(N, v_typical)
spreads = [0.0, 0.1, 0.2, 0.35, 0.5]
rows = []
for sd in spreads:
    table = simulate(0.0, sd, variances, STUDIES)
    rows.append({"between_sd": sd,
                 "fixed effects": rejection_rate(table, "fixed-effects"),
                 "random effects (one-sample t)": rejection_rate(table, "one-sample"),
                 "precision-weighted": rejection_rate(table, "precision-weighted")})
false_positives = pd.DataFrame(rows)

display(false_positives.round(3))
with style():  # roikit's print style: 7-pt text, fonts embedded
    false_positive_fig = Figure(figsize=(85 * MM, 70 * MM), layout="constrained")
    ax = false_positive_fig.add_subplot()
    for k, column in enumerate(false_positives.columns[1:]):
        ax.plot(false_positives["between_sd"], false_positives[column], marker=GROUP_MARKERS[k],
                color=GROUP_COLORS[k], ms=4, label=column)
    ax.axhline(ALPHA, color="0.3", ls="--", lw=0.8)
    ax.set_xlabel("between-person SD of the true response")
    ax.set_ylabel("false-positive rate")
    ax.set_ylim(0, None)
    ax.legend()
false_positive_fig
'''),
    md("""
**What happened.** The fixed-effects analysis pools every measurement as if all participants shared one true
response; its uncertainty reflects only the measurement noise. As people differ more, it declares effects more and
more often: it answers "did *these* participants respond?", not "do people respond?". The random-effects tests
(one-sample *t* on the participants' values, and the precision-weighted model, which estimates the spread between
people) stay close to 5% whatever the spread. With about 500 studies per point, rates between roughly 3% and 7%
are consistent with 5%.

## 2. When participants are measured with different precision

Now there is a real effect. Some participants' maps are noisier (head motion, fewer trials). The horizontal axis is
how unequal the first-level variances are (the SD of their logarithm). Weighting by precision lets the noisy
participants count less, which buys power when precisions differ, while the between-participant variance keeps the
test honest.
"""),
    drawing('''
inequality = [0.0, 0.5, 1.0, 1.5, 2.0]
z = np.random.default_rng(SEED + 1).standard_normal(N)
rows = []
for s in inequality:
    unequal = v_typical * np.exp(s * z)
    table = simulate(0.2, 0.1, unequal, STUDIES)
    rows.append({"inequality": s,
                 "one-sample t (unweighted)": rejection_rate(table, "one-sample"),
                 "precision-weighted": rejection_rate(table, "precision-weighted")})
power = pd.DataFrame(rows)

display(power.round(3))
with style():
    power_fig = Figure(figsize=(85 * MM, 70 * MM), layout="constrained")
    ax = power_fig.add_subplot()
    for k, column in enumerate(power.columns[1:], start=1):
        ax.plot(power["inequality"], power[column], marker=GROUP_MARKERS[k], color=GROUP_COLORS[k], ms=4,
                label=column)
    ax.set_xlabel("inequality of first-level variances\\n(SD of log variance)")
    ax.set_ylabel("power (true mean 0.2)")
    ax.set_ylim(0, 1)
    ax.legend()
power_fig
'''),
    md("""
**What happened.** With equal precisions the two tests are the same test. As precisions become unequal, the
unweighted test gives the noisiest participants as much say as the most precise ones, so its power stays flat or
drops; the precision-weighted test lets the precise participants count more and its power grows (the unequal
settings hold some very precise participants, information the unweighted test cannot use). Both remain
random-effects tests: neither is fooled in part 1.

## The model behind the pictures

Participant *i*'s measured value is `y_i = mu + u_i + e_i`, where `u_i ~ N(0, tau2)` is how that person differs
from the population (the spread in part 1) and `e_i ~ N(0, v_i)` is first-level measurement noise (the variances in
part 2). A fixed-effects test uses `Var(y_i) = v_i` and ignores `tau2`; the one-sample *t* estimates
`tau2 + v` from the spread of the `y_i`; the precision-weighted model estimates `tau2` and weights each participant
by `1 / (tau2 + v_i)`. `tau2` is estimated by REML, the default.
"""),
    md("## Save where the report expects them"),
    code('''
print(write_table(TABLES / "simulation_false_positives.tsv", false_positives, overwrite=OVERWRITE, sidecar={
    "description": f"share of {STUDIES} simulated studies (N = {N}, true mean 0) with p < {ALPHA}, "
                   "by between-person SD"}))
print(write_table(TABLES / "simulation_power.tsv", power, overwrite=OVERWRITE, sidecar={
    "description": f"share of {STUDIES} simulated studies (N = {N}, true mean 0.2, between-person SD 0.1) with "
                   f"p < {ALPHA}, by inequality of first-level variances"}))
for name, fig in (("simulation_false_positives", false_positive_fig), ("simulation_power", power_fig)):
    print(save_figure(fig, FIGURES / name, formats=FIGURE_FORMATS, overwrite=OVERWRITE))
'''),
]

# --------------------------------------------------------------------------------------------------------------
# 06 circular analysis and functional regions
# --------------------------------------------------------------------------------------------------------------

NB06 = head("06 Circular analysis and functional regions", """
For newcomers to the lab. A functional region picks each participant's own voxels: within a search space, the
voxels that respond most to a localiser contrast. If the same data then measure the effect, the selection alone
makes an effect appear, even where there is none: circular analysis, or "double dipping" (Kriegeskorte, Simmons,
Bellgowan & Baker, 2009; Vul, Harris, Winkielman & Pashler, 2009). This notebook shows it on pure noise, next to the
honest alternative roikit offers: select on some runs, measure on a held-out run (`split = "run"`).
""") + [
    md("""
## Pure noise, many search spaces

We write tiny NIfTI maps to a temporary folder: for every participant, two runs of one contrast whose every voxel
is random noise (mean 0, SD 1). There is **no effect anywhere**. The grid is cut into many small search spaces
(an atlas with one label per search space), so each one is an independent little experiment, and roikit
extracts them all in one pass, exactly as it would real maps.
"""),
    code('''
# Simulation settings (small, so the notebook runs in seconds)
SPACES = 200  # search spaces, each an independent experiment
VOXELS = 50  # voxels per search space
N = 16  # participants
TOP = "10%"  # each participant's functional region: the top 10% of the search space's voxels (5 voxels)
SEED = 2009
ALPHA = 0.05

import tempfile

import nibabel as nib

from roikit.errors import CircularAnalysisError
from roikit.extraction import extract, find_maps
from roikit.functional import FunctionalRegion, collapse_runs
from roikit.regions import Atlas, RegionSet
from roikit.stats import run_design

rng = np.random.default_rng(SEED)
folder = Path(tempfile.mkdtemp(prefix="roikit-circular-"))
shape, affine = (SPACES, VOXELS, 1), np.diag([2.0, 2.0, 2.0, 1.0])  # one search space per row of voxels
labels = np.repeat(np.arange(1, SPACES + 1), VOXELS).reshape(shape)
nib.save(nib.Nifti1Image(labels.astype(np.int16), affine), folder / "spaces.nii")
space_names = [f"space {k:03d}" for k in range(1, SPACES + 1)]
pd.DataFrame({"index": range(1, SPACES + 1), "name": space_names}).to_csv(folder / "spaces.tsv", sep="\\t",
                                                                           index=False)
for i in range(1, N + 1):
    for run in (1, 2):
        noise = rng.standard_normal(shape).astype(np.float32)  # no effect anywhere
        nib.save(nib.Nifti1Image(noise, affine), folder / f"sub-{i:02d}_run-{run}_contrast-task.nii")
noise_maps = find_maps("sub-{subject}_run-{run}_contrast-{contrast}.nii", root=folder)
search_spaces = RegionSet([Atlas(folder / "spaces.nii", folder / "spaces.tsv")])
print(f"{len(noise_maps)} noise maps ({N} participants x 2 runs), {SPACES} search spaces of {VOXELS} voxels")
'''),
    md("""
## Two ways to define the same functional region

In every search space, each participant's region is the top 10% of voxels by the contrast `task`, and the region's
value is the same contrast measured over those voxels.

- **Circular**: select on both runs, measure on both runs. roikit refuses this (the guard below) unless you insist
  with `circular_ok=True`, and then every output carries a caution.
- **Cross-validated** (`split="run"`): select on run 2, measure on run 1; select on run 1, measure on run 2; the
  participant's value is the mean of the two folds. Selection and measurement never see the same noise.
"""),
    code('''
try:  # the guard: refused before any map is read, with the fixes in the message
    extract(noise_maps, search_spaces, functional=[FunctionalRegion("fROI", "space 001", "task", top=TOP)])
except CircularAnalysisError as refusal:
    print("refused:", refusal)

circular = [FunctionalRegion(f"{n} circular", n, "task", top=TOP, circular_ok=True) for n in space_names]
held_out = [FunctionalRegion(f"{n} cross-validated", n, "task", top=TOP, split="run") for n in space_names]
with warnings.catch_warnings(record=True) as cautions:
    warnings.simplefilter("always")
    noise_values = extract(noise_maps, search_spaces, functional=circular + held_out, progress=False)
print(f"{len(cautions)} cautions, one per circular region, e.g.: {cautions[0].message}")

# one value per participant (the mean over runs, as roikit run does), then a one-sample t-test per region
per_participant = collapse_runs(noise_values)
with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # outlier and normality notes on pure noise are beside the point here
    tests = run_design(per_participant, "one-sample", contrast="task", correct=None)
functional_tests = tests[tests["region"].str.endswith(("circular", "cross-validated"))].copy()
functional_tests["definition"] = np.where(functional_tests["region"].str.endswith("circular"), "circular",
                                          "cross-validated (split by run)")
selected = noise_values.loc[noise_values["n_search"].notna(), "n_voxels"]
print(f"voxels selected per participant and search space: {selected.min()} to {selected.max()}")
'''),
    md("""
## Side by side

Left: the group's mean effect in each of the search spaces (one dot per search space). Right: the share of search
spaces where the one-sample *t*-test declares an effect (p < .05), with a 95% Monte Carlo interval (1.96 standard
errors); an honest test stays near the dashed 5% line, because there is nothing to find.
"""),
    drawing('''
summary = functional_tests.groupby("definition").agg(
    search_spaces=("estimate", "size"), mean_estimate=("estimate", "mean"), sd_estimate=("estimate", "std"),
    rejection_rate=("p", lambda p: float((p < ALPHA).mean()))).reset_index()
summary["rejection_mc_se"] = np.sqrt(summary["rejection_rate"] * (1 - summary["rejection_rate"])
                                     / summary["search_spaces"])
display(summary.round(3))

definitions = ["circular", "cross-validated (split by run)"]
colors = {"circular": GROUP_COLORS[1], "cross-validated (split by run)": GROUP_COLORS[0]}
with style():  # roikit's print style: 7-pt text, fonts embedded
    circular_fig = Figure(figsize=(180 * MM, 70 * MM), layout="constrained")
    left, right = circular_fig.subplots(1, 2, width_ratios=(2, 1))
    jitter = np.random.default_rng(0)
    for k, name in enumerate(definitions):
        estimates = functional_tests.loc[functional_tests["definition"] == name, "estimate"]
        left.scatter(estimates, k + jitter.uniform(-0.25, 0.25, len(estimates)), s=6, alpha=0.6,
                     color=colors[name], marker=GROUP_MARKERS[k], linewidths=0)
        left.plot([estimates.mean()] * 2, [k - 0.35, k + 0.35], color="black", lw=1.2)
    left.axvline(0, color="0.3", ls="--", lw=0.8)  # the truth: no effect
    left.set_yticks(range(len(definitions)), definitions)
    left.set_ylim(len(definitions) - 0.5, -0.5)
    left.set_xlabel(f"group mean effect per search space (a.u.; {N} participants)")
    left.set_title(f"{SPACES} search spaces of pure noise (line: mean)")
    rates = summary.set_index("definition").loc[definitions]
    right.bar(range(len(definitions)), rates["rejection_rate"], yerr=1.96 * rates["rejection_mc_se"],
              color=[colors[d] for d in definitions], capsize=3)
    right.axhline(ALPHA, color="0.3", ls="--", lw=0.8, zorder=3)
    right.set_xticks(range(len(definitions)), ["circular", "cross-\\nvalidated"])
    right.set_ylim(0, 1)
    right.set_ylabel(f"share with $p$ < {ALPHA:g}".replace("0.", "."))
    right.set_title("false positives (dashed: 5%)")
circular_fig
'''),
    md("""
**What happened.** On data with no effect at all, the circular region reports a large, consistent "effect" in every
search space, and the *t*-test is fooled every time: choosing the voxels where the noise happened to be high, then
measuring that same noise, guarantees a high value. (The expected size is the mean of the top 10% of a normal
sample, about 1.7 SD, times the SD of the two runs' mean, 1/sqrt(2): roughly 1.2.) The cross-validated region
selects on one run and measures the other, whose noise is independent of the selection: its estimates centre on
zero, and it declares an effect in about 5% of the search spaces, as a test at the 5% level should (with 200
search spaces, anything from about 2% to 8% is consistent with 5%).

**In your own study.** Define functional regions with `split = "run"` in the study file (maps with a `{run}`
placeholder), or with a localiser from runs the tested contrasts do not use. roikit refuses a circular definition
before any work starts; `circular_ok = true` runs it anyway and puts a caution in every table, figure note,
methods text and report, and its results describe these data only. A different contrast from the same runs is not
refused but cautioned: whether it is independent of the localiser is your argument to make (Kriegeskorte et al.,
2009).

**References.** Kriegeskorte, N., Simmons, W. K., Bellgowan, P. S. F., & Baker, C. I. (2009). Circular analysis in
systems neuroscience: The dangers of double dipping. *Nature Neuroscience, 12*(5), 535-540.
Vul, E., Harris, C., Winkielman, P., & Pashler, H. (2009). Puzzlingly high correlations in fMRI studies of emotion,
personality, and social cognition. *Perspectives on Psychological Science, 4*(3), 274-290.
"""),
    md("## Save where the report expects them"),
    code('''
print(write_table(TABLES / "simulation_circular.tsv", summary, overwrite=OVERWRITE, sidecar={
    "description": f"{SPACES} search spaces of pure noise ({N} participants, 2 runs, top {TOP} of {VOXELS} voxels): "
                   f"group mean effect and share with p < {ALPHA} (one-sample t) for a circular and a "
                   "cross-validated (split by run) functional region"}))
print(save_figure(circular_fig, FIGURES / "simulation_circular", formats=FIGURE_FORMATS, overwrite=OVERWRITE))
'''),
]

NOTEBOOKS = {
    "01_from_maps_to_a_region_table.ipynb": NB01,
    "02_is_there_an_effect.ipynb": NB02,
    "03_two_groups_and_covariates.ipynb": NB03,
    "04_repeated_measures_and_stimuli.ipynb": NB04,
    "05_why_participants_are_random_effects.ipynb": NB05,
    "06_circular_analysis_and_functional_regions.ipynb": NB06,
}


def build(folder: Path = HERE) -> list[Path]:
    """Write the notebooks (outputs stripped) into ``folder``; returns the paths."""
    paths = []
    for name, cells in NOTEBOOKS.items():
        nb = new_notebook(cells=cells)
        nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
        nb.metadata["language_info"] = {"name": "python"}
        for i, cell in enumerate(nb.cells):
            cell["id"] = f"cell-{i:02d}"  # stable ids: rebuilding gives the same file
        nbformat.validate(nb)
        path = folder / name
        path.write_text(nbformat.writes(nb) + "\n", encoding="utf-8")
        paths.append(path)
    return paths


if __name__ == "__main__":
    for p in build(Path(sys.argv[1]) if len(sys.argv) > 1 else HERE):
        print(p)
