"""One table of options (private, shared base).

Every option a user can give -- on the command line, in a study file, or as a Python argument -- is one
:class:`Option` entry in :data:`OPTIONS`. From that table come:

- the command-line options (:func:`add_arguments`, used by ``roikit stats`` and ``roikit extract``),
- the keys a study file may hold (:func:`study_keys`, ``roikit.study.schema.STUDY_KEYS``),
- the simple checks of a value (type, choices, range: :func:`check_value`), the same on both paths,
- the study-file reference page ``docs/study-file.md`` (``roikit.study.reference``; a test keeps it current),
- the spelling of an option in messages, in the language of the entry point (:func:`spell`): ``--overwrite`` on
  the command line, ``overwrite=True`` in Python.

Adding an option is one entry: ``Option("name", "section", "type", "help", default=..., flag=..., ...)``. Set
``flag=""`` for a study-file-only key and ``key=""`` for a command-line-only option; ``python`` gives the Python
argument name when it differs from the key (``jobs`` -> ``n_jobs``). Design options (section ``analysis``,
``design_option=True``) are passed to the design under their Python name; which designs take one is read from the
design functions' signatures (a design that accepts the keyword takes the option).
"""

from __future__ import annotations

import contextlib
import contextvars
import difflib
from dataclasses import dataclass, field
from typing import Any, Iterable, Iterator

__all__ = ["Option", "OPTIONS", "option", "options_in", "study_keys", "flag", "spell", "entry_point",
           "check_value", "suggest", "add_arguments", "resolve", "plural", "noun", "progress_bar", "DESIGN_ALIASES"]

_MISSING = object()


@dataclass(frozen=True)
class Option:
    """One option: its names on every path, its type, default, choices, and help text.

    Attributes
    ----------
    name : str
        The study-file key (snake_case); also the Python name unless ``python`` is given.
    section : str
        The study-file section (``study``, ``maps``, ``regions``, ``regions.sphere``, ``extraction``,
        ``analysis``) or ``""`` for a command-line-only option.
    type : str
        ``str``, ``int``, ``float``, ``bool``, ``path``, ``names`` (a string or array of strings; on the command
        line comma-separated), ``table`` (sub-tables), ``mapping`` (old = "new"), ``coords`` ([x, y, z]),
        ``bool_or_names`` (true/false or an array of names).
    help : str
        One sentence (shown by ``--help`` and in the reference page).
    default : any
        Default value (``None``: not set).
    choices : tuple
        Allowed values (empty: any).
    minimum, maximum : float, optional
        Inclusive bounds for numbers (``exclusive=True``: strict bounds).
    flag : str, optional
        Command-line flag; default ``--name`` with ``_`` as ``-``; ``""`` for no flag (study file only).
    key : str, optional
        Study-file key; default ``name``; ``""`` for none (command line only).
    python : str, optional
        Python argument name when it differs from ``name``.
    metavar : str, optional
    design_option : bool
        An ``[[analysis]]`` key passed to the design function.
    designs : tuple of str
        For the documentation when the designs are not read from signatures.
    example : str, optional
        A TOML value shown in the reference page.
    """

    name: str
    section: str
    type: str
    help: str
    default: Any = None
    choices: tuple = ()
    minimum: float | None = None
    maximum: float | None = None
    exclusive: bool = False
    flag: str | None = None
    key: str | None = None
    python: str | None = None
    metavar: str | None = None
    design_option: bool = False
    designs: tuple = ()
    example: str | None = None
    aliases: dict = field(default_factory=dict)

    @property
    def cli(self) -> str:
        """The command-line flag (``""`` when the option exists only in study files)."""
        if self.flag is not None:
            return self.flag
        return "--" + self.name.replace("_", "-")

    @property
    def study_key(self) -> str:
        return self.name if self.key is None else self.key

    @property
    def py(self) -> str:
        return self.python or self.name


# The one table. Keep entries short; order = order in --help and in the reference page.
OPTIONS: tuple[Option, ...] = (
    # [study]
    Option("title", "study", "str", "title of the study (report heading)", example='"Wayfinding study"'),
    Option("participants", "study", "path", "participants table (TSV keyed by participant_id): groups and "
           "covariates", metavar="participants.tsv", example='"participants.tsv"'),
    Option("contrasts", "study", "path", "contrasts table (TSV: column contrast plus per-contrast columns such as "
           "load, route or town) that formulas and within factors may name; on the command line of roikit stats: "
           "--contrasts FILE", flag="", metavar="contrasts.tsv", example='"contrasts.tsv"'),
    Option("regions", "study", "path", "regions table (TSV: column region plus per-region columns such as "
           "hemisphere or structure); on the command line of roikit stats: --region-table FILE", flag="",
           metavar="regions.tsv", example='"regions.tsv"'),
    Option("value_label", "study", "str", "axis label of the region values with their unit in the figures, e.g. "
           "\"% signal change\" (roikit run and roikit report: --value-label)", flag="",
           example='"Parameter estimate (a.u.)"'),
    Option("table_format", "study", "str", "file format of the data tables roikit run writes (region values, group "
           "results): tsv, or parquet (columnar, through pyarrow, with the same JSON sidecar; roikit report and roikit "
           "stats read either)", default="tsv", choices=("tsv", "parquet"), metavar="FORMAT", example='"parquet"'),
    # [maps]
    Option("effect", "maps", "str", "path pattern of the first-level effect maps with {subject}, optional "
           "{session}, {run} and {contrast}", flag="--maps", metavar="PATTERN",
           example='"maps/sub-{subject}_contrast-{contrast}_effect.nii.gz"'),
    Option("variance", "maps", "str", "path pattern of the matching variance maps (precision-weighted and "
           "fixed-effects designs need them)", metavar="PATTERN",
           example='"maps/sub-{subject}_contrast-{contrast}_variance.nii.gz"'),
    Option("list", "maps", "path", "instead of a pattern: a table of participant_id, contrast, [session_id], "
           "path, [variance_path], [volume]", flag="--map-list", metavar="TSV", example='"maps.tsv"'),
    Option("run_effect", "maps", "str", "path pattern of per-run effect maps ({run} required) for the functional "
           "regions, when the maps of effect (or list) have no runs: functional regions select and measure on "
           "these, every other region uses effect; a contrast may appear in both", flag="", metavar="PATTERN",
           example='"maps/sub-{subject}_run-{run}_contrast-{contrast}_effect.nii.gz"'),
    Option("run_variance", "maps", "str", "path pattern of the variance maps of run_effect's maps", flag="",
           metavar="PATTERN", example='"maps/sub-{subject}_run-{run}_contrast-{contrast}_variance.nii.gz"'),
    # [regions]
    Option("atlas", "regions", "path", "labelled atlas image (integer labels, 0 = background)", metavar="IMAGE",
           example='"atlas.nii.gz"'),
    Option("labels", "regions", "path", "label table of the atlas: TSV with index and name columns (without "
           "one, regions are named 'label <index>' with a warning)", metavar="TSV", example='"atlas.tsv"'),
    Option("sphere", "regions", "table", "sphere at world coordinates in mm: [[regions.sphere]] name, center, "
           "radius (command line: NAME=X,Y,Z,RADIUS, repeatable)", metavar="NAME=X,Y,Z,RADIUS"),
    Option("mask", "regions", "table", "binary mask image as a region: [[regions.mask]] name, image (command "
           "line: NAME=IMAGE, repeatable)", metavar="NAME=IMAGE"),
    Option("probability", "regions", "table", "probability map thresholded into regions: "
           "[[regions.probability]] image, threshold, and name (3D) or labels (4D)", metavar="NAME=IMAGE"),
    Option("threshold", "", "float", "probability threshold of --probability maps", default=0.5, minimum=0,
           exclusive=True, metavar="P"),
    Option("split_hemispheres", "regions", "bool_or_names", "split regions into left (x < 0 mm) and right (x > 0 mm) "
           "parts: true for every region, or an array of region names", default=False,
           example='true'),
    Option("midline", "regions", "str", "what a hemisphere split does with voxels at x = 0 mm: drop them "
           "(counted in the output), give them to both halves, or to one side", default="drop",
           choices=("drop", "both", "left", "right"), example='"both"'),
    Option("within", "regions", "path", "keep only region voxels inside this brain or analysis mask",
           metavar="IMAGE", example='"brain_mask.nii.gz"'),
    Option("select", "regions", "names", "keep only these regions, in this order", metavar="A,B",
           example='["left hippocampus", "right hippocampus"]'),
    Option("rename", "regions", "mapping", "rename regions: a table of old = \"new\" names (command line: "
           "OLD=NEW, repeatable)", metavar="OLD=NEW",
           example='{ "prior peak" = "sphere at prior peak" }'),
    Option("circular", "regions", "names", "regions defined from the same data that are tested (each output "
           "carries a circularity caution)", metavar="REGION", example='["prior peak"]'),
    Option("space", "regions", "str", "the atlas's standard space, named in the methods text (default: the maps' "
           "grid)", flag="", example='"MNI152NLin2009cAsym"'),
    Option("citation", "regions", "str", "a reference for the atlas, cited in the methods text", flag="",
           example='"Author et al., 2020"'),
    Option("functional", "regions", "table", "participant-specific regions: [[regions.functional]] name, within "
           "(search space), localiser (contrast), top or threshold, split, circular_ok, minimum (command line of "
           "roikit extract: NAME:within=REGION,localiser=CONTRAST,top=10%,split=run, the same keys, repeatable)",
           metavar="NAME:KEY=VALUE,..."),
    Option("name", "regions.sphere", "str", "region name", flag="", example='"prior peak"'),
    Option("center", "regions.sphere", "coords", "three numbers [x, y, z] in world mm", flag="",
           example="[30.0, -20.0, -14.0]"),
    Option("radius", "regions.sphere", "float", "radius in mm", flag="", minimum=0, exclusive=True,
           example="6.0"),
    Option("space", "regions.sphere", "str", "the space of its coordinates or image, named in the methods text", flag="",
           example='"MNI152NLin2009cAsym"'),
    Option("citation", "regions.sphere", "str", "a reference for this region's definition, cited in the methods text",
           flag="", example='"Author et al., 2020"'),
    Option("name", "regions.mask", "str", "region name", flag="", example='"left hippocampus"'),
    Option("image", "regions.mask", "path", "binary mask image", flag="", example='"masks/lhipp.nii.gz"'),
    Option("space", "regions.mask", "str", "the space of its coordinates or image, named in the methods text", flag="",
           example='"MNI152NLin2009cAsym"'),
    Option("citation", "regions.mask", "str", "a reference for this region's definition, cited in the methods text",
           flag="", example='"Author et al., 2020"'),
    Option("image", "regions.probability", "path", "probability image (3D, or 4D with labels)", flag="",
           example='"prob.nii.gz"'),
    Option("threshold", "regions.probability", "float", "voxels above this value belong to the region",
           flag="", minimum=0, exclusive=True, example="0.5"),
    Option("name", "regions.probability", "str", "region name (3D image)", flag="", example='"hippocampus"'),
    Option("labels", "regions.probability", "path", "label table (4D image: one volume per region)", flag="",
           example='"prob.tsv"'),
    Option("space", "regions.probability", "str", "the space of its coordinates or image, named in the methods text", flag="",
           example='"MNI152NLin2009cAsym"'),
    Option("citation", "regions.probability", "str", "a reference for this region's definition, cited in the methods text",
           flag="", example='"Author et al., 2020"'),
    Option("name", "regions.functional", "str", "name of the functional region (a row label of the values table)",
           flag="", example='"novelty fROI"'),
    Option("within", "regions.functional", "str", "the search space: any region of the set (after its operations)",
           flag="", example='"left hippocampus"'),
    Option("localiser", "regions.functional", "str", "the contrast whose maps pick each participant's voxels",
           flag="", example='"novel"'),
    Option("top", "regions.functional", "str", "the voxels with the largest localiser values: a count (20) or a "
           "share of the search space's valid voxels (\"10%\": ceil(p x n)); ties go to the smaller voxel index; "
           "give top or threshold", flag="", example='"10%"'),
    Option("threshold", "regions.functional", "float", "instead of top: the voxels whose localiser value is above "
           "this", flag="", example="3.1"),
    Option("split", "regions.functional", "str", "\"run\": leave one run out (select on the other runs' mean "
           "localiser map, precision-weighted with variance maps; measure on the held-out run, average the folds); needs {run} in maps.effect or maps.run_effect",
           flag="", choices=("run",), example='"run"'),
    Option("circular_ok", "regions.functional", "bool", "run even when the localiser shares data with a tested "
           "contrast (circular analysis; every output carries a caution)", default=False, flag="",
           example="false"),
    Option("minimum", "regions.functional", "int", "selections with fewer voxels give a value n/a (the "
           "participants are listed in a warning)", default=1, minimum=1, flag="", example="10"),
    # [extraction]
    Option("statistic", "extraction", "str", "summary over a region's valid voxels (trimmed-mean cuts 20% per "
           "end; weighted-mean weights probability regions by probability)", default="mean",
           choices=("mean", "median", "trimmed-mean", "weighted-mean"), example='"mean"'),
    Option("keep_zeros", "extraction", "bool", "treat voxels exactly 0 as data (default: as missing, as many "
           "packages write 0 outside their analysis mask)", default=False, example="false"),
    Option("jobs", "extraction", "int", "worker processes for extraction", default=1, minimum=1, metavar="N",
           python="n_jobs", example="2"),
    # [[analysis]]
    Option("design", "analysis", "str", "the group design", metavar="DESIGN", example='"one-sample"',
           aliases={"two-sample": "two-group", "independent": "two-group", "unpaired": "two-group",
                    "between": "two-group", "one-group": "one-sample", "single": "one-sample",
                    "within": "paired", "dependent": "paired", "regression": "glm", "ancova": "glm",
                    "lmm": "mixed", "multilevel": "mixed", "weighted": "precision-weighted",
                    "meta-analysis": "precision-weighted", "fixed": "fixed-effects"}),
    Option("contrast", "analysis", "names", "contrast tested (paired: the first, A; mixed: one or more)",
           metavar="C", design_option=True, example='"novel-vs-familiar"'),
    Option("versus", "analysis", "str", "paired: the contrast subtracted (term 'A - B')", metavar="B",
           design_option=True, example='"familiar"'),
    Option("group", "analysis", "str", "two-group: participants.tsv column holding the groups",
           metavar="COLUMN", design_option=True, example='"group"'),
    Option("levels", "analysis", "names", "two-group: the two levels compared (term 'L1 - L2'); needed only "
           "when the column has more than two", metavar="L1,L2", design_option=True,
           example='["younger", "older"]'),
    Option("welch", "analysis", "bool", "two-group: Welch's unequal-variance t-test", default=False,
           design_option=True, example="true"),
    Option("formula", "analysis", "str", "model formula, e.g. \"value ~ age + group\"", metavar="FORMULA",
           design_option=True, example='"value ~ route_accuracy + group"'),
    Option("tau2", "analysis", "str", "precision-weighted: between-participant variance estimator",
           choices=("reml", "ml", "dl", "pm"), metavar="METHOD", design_option=True, example='"reml"'),
    Option("random", "analysis", "str", "mixed: random terms per participant, e.g. \"1 + contrast\"",
           metavar="TERMS", design_option=True, example='"1"'),
    Option("crossed", "analysis", "str", "mixed: crossed random intercept for this column", metavar="COLUMN",
           design_option=True, example='"contrast"'),
    Option("nested", "analysis", "str", "mixed: random intercept for COLUMN within participant (labels made unique "
           "per participant, e.g. runs or sessions)", metavar="COLUMN", design_option=True, example='"run"'),
    Option("center", "analysis", "bool", "mixed, glm, precision-weighted: mean-centre numeric covariates (mixed: "
           "within each region, the mean recorded in 'centered'); --no-center keeps them raw", default=True,
           flag="--no-center", design_option=True, example="false"),
    Option("estimation", "analysis", "str", "mixed: restricted (reml) or full (ml) maximum likelihood; ml for "
           "likelihood-ratio comparisons of fixed effects", choices=("reml", "ml"), metavar="reml|ml",
           design_option=True, example='"reml"'),
    Option("test", "analysis", "str", "precision-weighted: Knapp-Hartung (knha), the same with its variance "
           "factor truncated below at 1 (knha-truncated, the default), or z", choices=("knha", "knha-truncated", "z"),
           metavar="TEST", design_option=True, example='"knha-truncated"'),
    Option("within", "analysis", "names", "repeated-measures: within-participant factors, columns of contrasts.tsv "
           "(levels are contrasts) or regions.tsv (levels are regions)", metavar="F1,F2", design_option=True,
           example='["route", "hemisphere"]'),
    Option("between", "analysis", "str", "repeated-measures: participants.tsv column of a between-participant "
           "factor", metavar="COLUMN", design_option=True, example='"group"'),
    Option("posthoc", "analysis", "bool", "repeated-measures: pairwise paired tests of each within factor's levels, "
           "corrected within factor and region", default=False, design_option=True, example="true"),
    Option("regions", "analysis", "names", "region-difference: the regions compared within participants (every "
           "pair, in this order)", metavar="A,B", design_option=True,
           example='["left hippocampus", "right hippocampus"]'),
    Option("equivalence", "analysis", "float", "one-sample, paired, two-group: two one-sided tests against -D..+D "
           "in the design's standardised effect size (d, d_z, g)", minimum=0, exclusive=True, metavar="D",
           design_option=True, example="0.3"),
    Option("bayes_factor", "analysis", "bool", "one-sample, paired, two-group: JZS Bayes factor BF10 (Rouder et "
           "al. 2009)", default=False, design_option=True, example="true"),
    Option("prior_scale", "analysis", "float", "scale r of the Bayes factor's Cauchy prior on the standardised "
           "effect (default sqrt(2)/2)", minimum=0, exclusive=True, metavar="R", design_option=True,
           example="0.707"),
    Option("n_jobs", "analysis", "int", "mixed: fit the regions in N worker processes", minimum=1,
           flag="--jobs", key="jobs", metavar="N", design_option=True, example="2"),
    Option("correct", "analysis", "names", "corrections across regions; the FIRST is the primary one that text, "
           "table notes, figure markers and summaries use: holm, fdr, bonferroni, fwe (max-statistic permutations; "
           "needs permutations), none (uncorrected)",
           default="holm,fdr", metavar="LIST", example='"holm,fdr"'),
    Option("permutations", "analysis", "int", "permutations for the max-statistic family-wise p (p_fwe); 0 for "
           "none (with permutations, a study file also needs a seed)", default=0, minimum=0, metavar="N", example="5000"),
    Option("seed", "analysis", "int", "seed of the permutations (recorded)", minimum=0, metavar="S",
           example="1"),
    Option("confidence", "analysis", "float", "confidence level of the intervals", default=0.95, minimum=0,
           maximum=1, exclusive=True, metavar="LEVEL", example="0.95"),
    # command line only
    Option("functional_contrasts", "", "names", "roikit extract with --functional: the contrasts measured over "
           "the functional regions (default every contrast of the maps; a study file measures the analysed ones)",
           metavar="A,B"),
    Option("scheduler", "", "str", "run on a Dask cluster whose scheduler listens at ADDRESS (e.g. "
           "tcp://10.0.0.5:8786; needs the distributed extra: pip install 'roikit[distributed]'); results are "
           "identical to a run on this machine when the workers have the same numpy and scipy", metavar="ADDRESS",
           key="", python="client"),
    Option("overwrite", "", "bool", "replace existing output files", default=False),
    Option("quiet", "", "bool", "no progress bar, no warnings on stderr (they stay in the output files)",
           default=False),
)

#: Misspellings and other names of designs, mapped to roikit's design names (for suggestions).
DESIGN_ALIASES = next(o.aliases for o in OPTIONS if o.name == "design")


def options_in(section: str) -> list[Option]:
    """The options of one study-file section, in table order."""
    return [o for o in OPTIONS if o.section == section]


def option(name: str, section: str | None = None) -> Option:
    """The option called ``name`` (study key or Python name), optionally within ``section``."""
    for o in OPTIONS:
        if (o.name == name or o.py == name or o.study_key == name) and (section is None or o.section == section):
            return o
    raise KeyError(name)


def study_keys() -> dict[str, tuple[str, ...]]:
    """Every key a study file may hold, by section (``""``: the top-level sections)."""
    keys: dict[str, tuple[str, ...]] = {"": ("study", "maps", "regions", "extraction", "analysis")}
    for o in OPTIONS:
        if o.section and o.study_key:
            keys[o.section] = keys.get(o.section, ()) + (o.study_key,)
    return keys


# --------------------------------------------------------------------------------------------------
# The language of the entry point
# --------------------------------------------------------------------------------------------------

_ENTRY: contextvars.ContextVar[str] = contextvars.ContextVar("roikit_entry_point", default="python")


@contextlib.contextmanager
def entry_point(kind: str) -> Iterator[None]:
    """Within this block, messages spell options for ``kind`` (``"cli"`` or ``"python"``)."""
    token = _ENTRY.set(kind)
    try:
        yield
    finally:
        _ENTRY.reset(token)


def flag(name: str) -> str:
    """The command-line flag of an option (``n_jobs`` -> ``--jobs``)."""
    try:
        o = option(name)
    except KeyError:
        return "--" + name.replace("_", "-")
    return o.cli or "--" + name.replace("_", "-")


def spell(name: str, value: Any = _MISSING, *, example: str | None = None) -> str:
    """An option as the user would write it where they are.

    ``spell("overwrite", True)`` is ``--overwrite`` on the command line and ``overwrite=True`` in Python;
    ``spell("levels", example="L1,L2")`` is ``--levels L1,L2`` or ``levels='L1,L2'``;
    ``spell("permutations", 0)`` is ``--permutations 0`` or ``permutations=0``;
    ``spell("participants")`` is ``--participants FILE`` or ``participants=...``.
    """
    cli = _ENTRY.get() == "cli"
    if cli:
        text = flag(name)
        if value is True or value is _MISSING and example is None and _is_bool(name):
            return text
        if example is not None:
            return f"{text} {example}"
        if value is _MISSING:
            try:
                meta = option(name).metavar
            except KeyError:
                meta = None
            return f"{text} {meta or name.upper()}"
        return f"{text} {value}"
    try:
        py = option(name).py
    except KeyError:
        py = name
    if example is not None:
        return f"{py}={example!r}"
    if value is _MISSING:
        return f"{py}=..."
    return f"{py}={value!r}"


def _is_bool(name: str) -> bool:
    try:
        return option(name).type == "bool"
    except KeyError:
        return False


def plural(n: int, word: str, many: str | None = None) -> str:
    """``plural(1, "region")`` -> ``"1 region"``; ``plural(3, "analysis", "analyses")`` -> ``"3 analyses"``."""
    return f"{n} {word if n == 1 else (many or word + 's')}"


def noun(count, word: str, many: str | None = None) -> str:
    """The word in the singular or plural for ``count`` (a number or a sized collection), without the number."""
    n = count if isinstance(count, (int, float)) else len(count)
    return word if n == 1 else (many or word + "s")


def suggest(word: Any, choices: Iterable[Any], aliases: dict | None = None) -> str:
    """``"; did you mean 'x'?"`` for a close choice (aliases first), or ``""``."""
    choices = [str(c) for c in choices]
    text = str(word)
    if aliases:
        target = aliases.get(text.lower().replace("_", "-").replace(" ", "-"))
        if target in choices:
            return f"; did you mean {target!r}?"
    # prefer a choice sharing a word (two-sample ~ two-group), then the closest spelling
    parts = set(text.lower().replace("_", "-").split("-"))
    sharing = [c for c in choices if parts & set(c.lower().split("-")) and len(parts) > 1]
    close = difflib.get_close_matches(text, sharing or choices, n=1, cutoff=0.5 if sharing else 0.6)
    return f"; did you mean {close[0]!r}?" if close else ""


# --------------------------------------------------------------------------------------------------
# Checks shared by the command line and the study file
# --------------------------------------------------------------------------------------------------


def check_value(o: Option, value: Any) -> str | None:
    """The problem with ``value`` for option ``o`` (``None`` when fine): type, choices and range.

    The message names neither the key nor the flag (the caller adds the one the user wrote).
    """
    if o.type == "bool":
        if not isinstance(value, bool):
            return f"must be true or false, found {value!r}"
        return None
    if o.type in ("int", "float"):
        ok_type = (isinstance(value, int) if o.type == "int" else isinstance(value, (int, float)))
        if isinstance(value, bool) or not ok_type:
            what = "an integer" if o.type == "int" else "a number"
            return f"must be {what}{_range_text(o)}, found {value!r}"
        low_bad = o.minimum is not None and (value <= o.minimum if o.exclusive else value < o.minimum)
        high_bad = o.maximum is not None and (value >= o.maximum if o.exclusive else value > o.maximum)
        if low_bad or high_bad or value != value:
            what = "an integer" if o.type == "int" else "a number"
            return f"must be {what}{_range_text(o)}, found {value!r}"
        return None
    if o.type in ("str", "path"):
        if not isinstance(value, str) or not value.strip():
            return f"must be a non-empty string, found {value!r}"
    if o.type == "names":
        items = [s.strip() for s in value.split(",")] if isinstance(value, str) else value
        if not isinstance(items, list) or not items or not all(isinstance(v, str) and v for v in items):
            return f"must be a name or an array of names, found {value!r}"
    if o.choices and value not in o.choices:
        return f"must be one of {', '.join(map(str, o.choices))}, found {value!r}{suggest(value, o.choices)}"
    return None


def _range_text(o: Option) -> str:
    if o.minimum is not None and o.maximum is not None:
        return f" {'strictly ' if o.exclusive else ''}between {o.minimum:g} and {o.maximum:g}"
    if o.minimum is not None:
        return f" {'>' if o.exclusive else '>='} {o.minimum:g}"
    return ""


def add_arguments(parser, section: str, *, group_title: str | None = None, skip: Iterable[str] = (),
                  only_design: bool | None = None, designs_text: dict | None = None,
                  only: Iterable[str] | None = None) -> None:
    """Add the command-line options of one section to an argparse parser (or argument group).

    Values keep their study-file types (``names`` stay comma-separated strings; the design parses them), and a
    flag not given stays ``None`` (so the design's own default applies, as in a study file). ``table`` options
    are repeatable (a list of the texts given). ``only`` adds just these options of the section.
    """
    target = parser.add_argument_group(group_title) if group_title else parser
    skip = set(skip)
    only = None if only is None else set(only)
    for o in options_in(section):
        if not o.cli or o.name in skip or o.py in skip or (only is not None and o.name not in only):
            continue
        if only_design is not None and o.design_option != only_design:
            continue
        text = o.help
        if o.choices:
            text += " (" + ", ".join(map(str, o.choices)) + ")"
        if o.default not in (None, False):
            text += f" (default {o.default})"
        if designs_text and o.py in designs_text:
            text = designs_text[o.py] + text
        text = text.replace("%", "%%")
        kwargs: dict[str, Any] = {"dest": o.py, "help": text}
        if o.type == "bool":  # "--no-x" flags store False (for an option whose default is True)
            kwargs.update(action="store_false" if o.cli.startswith("--no-") else "store_true", default=None)
        else:
            kwargs.update(metavar=o.metavar or o.name.upper(), default=None)
            if o.type == "table":
                kwargs["action"] = "append"
            if o.type == "int":
                kwargs["type"] = int
            elif o.type == "float":
                kwargs["type"] = float
        target.add_argument(o.cli, **kwargs)


def resolve(args, section: str, *, only_design: bool | None = None) -> tuple[dict, list[str]]:
    """Values of a section's options from parsed arguments: ``({python name: value}, problems)``.

    Options not given take the table's default (design options not given are left out, so the design's
    own default applies, as in a study file). Every value goes through :func:`check_value`; problems name the
    flag.
    """
    values: dict = {}
    problems: list[str] = []
    for o in options_in(section):
        if not o.cli or not hasattr(args, o.py):
            continue
        if only_design is not None and o.design_option != only_design:
            continue
        value = getattr(args, o.py)
        if value is None:
            if o.design_option or o.default is None:
                continue
            value = o.default
        problem = check_value(o, value)
        if problem:
            problems.append(f"{o.cli} {problem}")
        values[o.py] = value
    return values, problems


def progress_bar(*, show: bool | None = True, **kwargs):
    """A tqdm progress bar shown only where it helps: on a terminal (tqdm's ``disable=None`` checks that stderr is
    a tty, so log files get no cursor escapes) and as a widget in Jupyter. ``show=False`` hides it."""
    from tqdm.auto import tqdm

    if not show:
        disable = True
    else:
        try:
            from tqdm.notebook import tqdm_notebook

            in_notebook = issubclass(tqdm, tqdm_notebook)
        except ImportError:  # pragma: no cover - tqdm always has it
            in_notebook = False
        disable = False if in_notebook else None
    return tqdm(disable=disable, **kwargs)
