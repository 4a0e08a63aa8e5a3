"""The study file: keys, validation of the whole file before any work, the checked study."""

from __future__ import annotations

import tomllib
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np
import pandas as pd

from .._options import DESIGN_ALIASES, check_value, noun, option, options_in, study_keys, suggest
from .._typing import PathLike
from ..errors import InputFileError, RoikitError, UsageError
from ..extraction import STATISTICS, VALUE_COLUMNS, find_maps, read_map_list, read_participants
from ..functional import FUNCTIONAL_COLUMNS, FunctionalRegion, check_circularity
from ..images import read_grid
from ..regions import Atlas, Mask, ProbabilityMap, RealisedRegions, RegionSet, Sphere, read_label_table
from ..stats import available_designs, run_design
from ..stats._registry import DESIGNS, PERMUTATIONS
from ..stats.corrections import parse_corrections
from ..stats.formula import TRANSFORMS, formula_problems


class StudyError(UsageError):
    """A study file has one or more problems; ``problems`` lists them, one ``key.path: message`` each."""

    def __init__(self, path: PathLike | None, problems: Sequence[str]):
        self.path = None if path is None else Path(path)
        self.problems = list(problems)
        where = f"{path}: " if path is not None else ""
        n = len(self.problems)
        head = f"{where}{n} problem{'s' if n != 1 else ''} in the study file (nothing was run):"
        super().__init__("\n".join([head] + [f"  {p}" for p in self.problems]))


# --------------------------------------------------------------------------------------------------
# Keys
# --------------------------------------------------------------------------------------------------

#: Every key a study file may hold, by section (from the one table of options, ``roikit._options``).
STUDY_KEYS: dict[str, tuple[str, ...]] = study_keys()

#: Analysis keys that are design options (passed to the design when given, under their Python names).
_DESIGN_OPTIONS = tuple(o.study_key for o in options_in("analysis") if o.design_option)

#: Design options with checks of their own below (contrasts, columns, formulas); the others are checked by the
#: options table alone (type, choices, range), so a new option needs only its entry in ``roikit/_options.py``.
_SPECIAL = ("contrast", "versus", "group", "levels", "formula", "random", "crossed", "nested")

#: Options each design cannot do without (beyond what its signature requires).
_NEEDS = {
    "one-sample": ("contrast",),
    "paired": ("contrast", "versus"),
    "two-group": ("contrast", "group"),
    "glm": ("contrast", "formula"),
    "precision-weighted": ("contrast",),
    "fixed-effects": ("contrast",),
    "mixed": ("formula",),
}
_NEEDS_VARIANCE = ("precision-weighted", "fixed-effects")

#: Transforms a formula may apply to one column (the formula gate's, :data:`roikit.stats.formula.TRANSFORMS`).
FORMULA_TRANSFORMS = TRANSFORMS

#: What ``run_study`` writes into the output folder (besides the cache).
OUTPUTS = ("region_values.tsv", "region_values.json", "group_results.tsv", "group_results.json", "tables",
           "figures", "report.html", "methods.md", "provenance.json", "methods.docx", "results.md", "results.docx",
           "references.bib", "index.tsv", "warnings.tsv", "warnings.json", "region_values.parquet",
           "group_results.parquet")

#: Folder (inside the output folder) holding the extraction cache.
CACHE_FOLDER = ".cache"
_CACHE_FILE = "extraction.json"
_CACHE_FORMAT = 2  # 2: keyed by the SHA-256 of each map's bytes (1: path, size, time)

_TOML_TYPES = {str: "a string", int: "an integer", float: "a number", bool: "true or false", list: "an array",
               dict: "a table"}


def _type_name(value: Any) -> str:
    for t, name in _TOML_TYPES.items():
        if type(value) is t:
            return name
    return type(value).__name__


def _suggest(word: str, choices: Iterable[str]) -> str:
    return suggest(word, choices)


def _described(c, block: dict, key: str) -> dict:
    """The optional ``space`` and ``citation`` strings of a region source (for the methods text)."""
    out = {}
    for name in ("space", "citation"):
        if name in block:
            value = c.string(block, name, key)
            if value is not None:
                out[name] = value
    return out


def _listing(items: Iterable[Any], limit: int = 12) -> str:
    items = [str(i) for i in items]
    shown = ", ".join(items[:limit])
    return shown + (f" and {len(items) - limit} more" if len(items) > limit else "") if items else "none"


# --------------------------------------------------------------------------------------------------
# Formula check
# --------------------------------------------------------------------------------------------------

def check_formula(
    formula: str,
    columns: Iterable[str],
    *,
    what: str = "formula",
    allow_tilde: bool = True,
) -> list[str]:
    """Check a formula from a study file through roikit's formula gate; return the problems found (empty if none).

    The same gate guards every entry point (command line, study file, Python): see :mod:`roikit.stats.formula`
    for the grammar. Allowed: column names (of the region values table and participants.tsv; a name with other
    characters may be written in backticks), ``0``/``1``, the operators ``~ + - * : / ** ( )`` (``**`` with a
    whole number up to 8) and the transforms :data:`FORMULA_TRANSFORMS` (``C``, ``center``, ``log``, ``scale``,
    ``standardize``) applied to one column. Anything else -- attribute access (``np.log``), ``I()``, strings,
    commas, braces, Python expressions -- is refused, and no part of a formula is ever evaluated.

    Parameters
    ----------
    formula : str
        The formula, e.g. ``"value ~ age + C(group)"`` (or random terms, ``"1 + contrast"``).
    columns : iterable of str
        Column names a term may name.
    what : str
        How to call the formula in messages (e.g. ``"formula"``, ``"random"``).
    allow_tilde : bool
        Whether ``~`` may appear (once; the left-hand side must be empty or ``value``).

    Returns
    -------
    list of str
        One message per problem, naming the formula and the token.

    Examples
    --------
    >>> check_formula("value ~ age + C(group)", ["value", "age", "group"])
    []
    >>> check_formula("value ~ np.log(age)", ["value", "age"])[0][:40]
    "formula 'value ~ np.log(age)': token '.'"
    """
    return formula_problems(formula, columns, what=what, allow_tilde=allow_tilde)


# --------------------------------------------------------------------------------------------------
# The parsed study
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Analysis:
    """One ``[[analysis]]`` block, validated.

    Attributes
    ----------
    number : int
        Position in the file, counted from 1 (``analysis[number]`` in messages).
    design : str
    options : dict
        Design options in snake_case, as :func:`roikit.stats.run_design` takes them.
    correct : str or list of str
    permutations : int
    seed : int or None
    confidence : float
    """

    number: int
    design: str
    options: dict
    correct: str | list = "holm,fdr"
    permutations: int = 0
    seed: int | None = None
    confidence: float = 0.95

    @property
    def label(self) -> str:
        """Short name, e.g. ``analysis[2] two-group novel``."""
        contrast = self.options.get("contrast")
        if isinstance(contrast, (list, tuple)):
            contrast = ",".join(contrast)
        versus = self.options.get("versus")
        what = f" {contrast}" if contrast else ""
        what += f" vs {versus}" if versus else ""
        formula = self.options.get("formula")
        what += f" ({formula})" if formula else ""
        return f"analysis[{self.number}] {self.design}{what}"

    def run(self, values: pd.DataFrame, participants: pd.DataFrame | None, *, client=None) -> pd.DataFrame:
        """Run this analysis with :func:`roikit.stats.run_design` (``client``: on a Dask cluster)."""
        return run_design(values, self.design, participants=participants, correct=self.correct,
                          permutations=self.permutations, seed=self.seed, confidence=self.confidence,
                          client=client, **self.options)


@dataclass
class Study:
    """A validated study file (see :func:`load_study`).

    Attributes
    ----------
    path : Path
        The study file.
    title : str
    participants_path : Path or None
    participants : DataFrame or None
        participants.tsv, read.
    maps : DataFrame
        The maps table (participant_id, [session_id], contrast, path, [variance_path], [volume]).
    regions : RegionSet
    realised : RealisedRegions
        The regions realised on the maps' grid.
    circular : list of str
        Regions marked as defined from the same data (flagged in the report).
    statistic : str
    keep_zeros : bool
    jobs : int
    analyses : list of Analysis
    raw : dict
        The parsed TOML.
    value_label : str or None
        Axis label of the region values with their unit in the figures (``[study] value_label``).
    table_format : {"tsv", "parquet"}
        File format of the region values and group results tables ``run_study`` writes (``[study] table_format``).
    load_warnings : list
        Warnings raised while realising the regions (overlaps, resampling, label tables); ``run_study`` lists them
        in ``warnings.tsv``.
    functional : list of FunctionalRegion
        ``[[regions.functional]]``: participant-specific regions (their rows follow the other regions'); the ones
        run with ``circular_ok`` are also in ``circular``.
    run_maps : DataFrame or None
        ``[maps] run_effect``: per-run maps (with ``run_id``) that the functional regions use instead of ``maps``.
    """

    path: Path
    title: str
    participants_path: Path | None
    participants: pd.DataFrame | None
    maps: pd.DataFrame
    regions: RegionSet
    realised: RealisedRegions
    circular: list[str]
    statistic: str
    keep_zeros: bool
    jobs: int
    analyses: list[Analysis]
    raw: dict = field(repr=False, default_factory=dict)
    value_label: str | None = None
    table_format: str = "tsv"
    load_warnings: list = field(repr=False, default_factory=list)
    functional: list = field(default_factory=list)
    run_maps: pd.DataFrame | None = None

    @property
    def functional_maps(self) -> pd.DataFrame:
        """The maps the functional regions select and measure on: ``run_maps`` when given, else ``maps``."""
        return self.run_maps if self.run_maps is not None else self.maps

    @property
    def default_out(self) -> Path:
        """The default output folder: ``results`` beside the study file."""
        return self.path.parent / "results"


# --------------------------------------------------------------------------------------------------
# Validation
# --------------------------------------------------------------------------------------------------


class _Checker:
    """Collects problems (``key.path: message``) while reading the study file."""

    def __init__(self, path: Path):
        self.path = path
        self.root = path.parent
        self.problems: list[str] = []

    def add(self, key: str, message: str) -> None:
        self.problems.append(f"{key}: {message}" if key else message)

    def table(self, value: Any, key: str) -> dict | None:
        if value is None:
            return None
        if not isinstance(value, dict):
            self.add(key, f"must be a table ([{key}]), found {_type_name(value)}")
            return None
        return value

    def keys(self, table: dict, key: str, section: str) -> None:
        allowed = STUDY_KEYS[section]
        for k in table:
            if k not in allowed:
                where = f"{key}.{k}" if key else k
                self.add(where, f"unknown key{_suggest(k, allowed)} (allowed {('in [' + section + ']') if section else 'sections'}: "
                         f"{', '.join(allowed)})")

    def string(self, table: dict, name: str, key: str, *, required: bool = False) -> str | None:
        value = table.get(name)
        if value is None:
            if required:
                self.add(f"{key}.{name}" if key else name, "missing; this key is required here")
            return None
        if not isinstance(value, str) or not value.strip():
            self.add(f"{key}.{name}", f"must be a non-empty string, found {_type_name(value)} {value!r}")
            return None
        return value

    def file(self, table: dict, name: str, key: str, *, required: bool = False, what: str = "file") -> Path | None:
        value = self.string(table, name, key, required=required)
        if value is None:
            return None
        path = Path(value)
        path = path if path.is_absolute() else self.root / path
        if not path.is_file():
            self.add(f"{key}.{name}", f"{what} {value!r} not found (looked for {path}); paths are relative to "
                                      "the study file")
            return None
        return path

    def boolean(self, table: dict, name: str, key: str, default: bool) -> bool:
        value = table.get(name, default)
        if not isinstance(value, bool):
            self.add(f"{key}.{name}", f"must be true or false, found {_type_name(value)} {value!r}")
            return default
        return value

    def integer(self, table: dict, name: str, key: str, default, *, minimum: int) -> int | None:
        value = table.get(name, default)
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
            self.add(f"{key}.{name}", f"must be an integer >= {minimum}, found {_type_name(value)} {value!r}")
            return default
        return value

    def names(self, value: Any, key: str) -> list[str] | None:
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not value or not all(isinstance(v, str) and v for v in value):
            self.add(key, f"must be an array of region names, found {_type_name(value)} {value!r}")
            return None
        return list(value)


def load_study(path: PathLike) -> Study:
    """Read and validate a study file; every problem is reported at once.

    Parameters
    ----------
    path : path
        The study file (TOML). Paths inside it are relative to its folder.

    Returns
    -------
    Study
        The validated study: participants read, maps found, regions realised on the maps' grid, analyses
        checked against the designs' options, the maps' contrasts and participants.tsv.

    Raises
    ------
    StudyError
        (a :class:`roikit.errors.UsageError`) listing every problem, one ``key.path: message`` per line,
        e.g. ``analysis[2].levels: 'old' is not a value of column group; found older, younger``.
    InputFileError
        When the study file itself does not exist.

    Examples
    --------
    >>> study = load_study("study/study.toml")       # doctest: +SKIP
    >>> [a.label for a in study.analyses]             # doctest: +SKIP
    """
    path = Path(path)
    if not path.is_file():
        raise InputFileError(f"{path}: study file not found (looked in {path.parent.resolve()})")
    try:
        with open(path, "rb") as fh:
            raw = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise StudyError(path, [f"not valid TOML: {exc}"]) from None
    except UnicodeDecodeError as exc:
        raise StudyError(path, [f"not UTF-8 text: {exc}"]) from None
    except RecursionError:
        raise StudyError(path, ["not a usable study file: arrays or tables are nested too deeply for the TOML "
                                "reader; a study file needs at most a few levels of nesting"]) from None
    except OSError as exc:
        raise InputFileError(f"{path}: cannot read the study file ({exc.strerror or exc}); check its "
                             "permissions") from None
    c = _Checker(path.resolve() if not path.is_absolute() else path)
    c.keys(raw, "", "")

    # [study]
    section = c.table(raw.get("study"), "study") or {}
    c.keys(section, "study", "study")
    title = c.string(section, "title", "study") or path.stem
    value_label = c.string(section, "value_label", "study")
    table_format = section.get("table_format", "tsv")
    problem = check_value(option("table_format", "study"), table_format)
    if problem:
        c.add("study.table_format", problem)
        table_format = "tsv"
    participants_path = c.file(section, "participants", "study", what="participants table")
    participants = None
    if participants_path is not None:
        try:
            participants = read_participants(participants_path)
        except RoikitError as exc:
            c.add("study.participants", str(exc))

    # [study] contrasts, regions: tables describing contrasts and regions (columns a formula may name)
    side_tables: dict[str, tuple[Path, pd.DataFrame]] = {}
    for name, kind, parameter in (("contrasts", "contrasts", "contrasts"), ("regions", "regions", "region_table")):
        table_path = c.file(section, name, "study", what=f"{name} table")
        if table_path is not None:
            from ..stats._common import side_table

            try:
                side_tables[parameter] = (table_path, side_table(table_path, kind=kind))
            except RoikitError as exc:
                c.add(f"study.{name}", str(exc))

    # [maps]
    maps = _check_maps(c, raw)
    contrasts = sorted(set(maps["contrast"])) if maps is not None else None
    run_maps = _check_run_maps(c, raw, maps)
    functional_maps = run_maps if run_maps is not None else maps
    has_variance = maps is not None and "variance_path" in maps.columns

    # [regions]
    regions, static_names, circular = _check_regions(c, raw)
    functional = _check_functional(c, raw, contrasts=sorted(set(functional_maps["contrast"]))
                                   if functional_maps is not None else None)
    if run_maps is not None and not (isinstance(raw.get("regions"), dict) and "functional" in raw["regions"]):
        c.add("maps.run_effect", "per-run maps serve only functional regions, and the study has no "
                                 "[[regions.functional]]; add one or remove maps.run_effect")

    # [extraction]
    section = c.table(raw.get("extraction"), "extraction") or {}
    c.keys(section, "extraction", "extraction")
    statistic = section.get("statistic", "mean")
    if statistic not in STATISTICS:
        c.add("extraction.statistic", f"must be one of {', '.join(STATISTICS)}, found {statistic!r}"
              f"{_suggest(statistic, STATISTICS)}")
        statistic = "mean"
    keep_zeros = c.boolean(section, "keep_zeros", "extraction", False)
    jobs = c.integer(section, "jobs", "extraction", 1, minimum=1) or 1

    # [[analysis]]
    columns = list(VALUE_COLUMNS) + (list(FUNCTIONAL_COLUMNS) if functional else [])
    if participants is not None:
        columns += [str(col) for col in participants.columns if col not in columns]
    for _path, table in side_tables.values():
        columns += [str(col) for col in table.columns if col not in columns]
    analyses = _check_analyses(c, raw, contrasts=contrasts, participants=participants, columns=columns,
                               has_variance=has_variance, maps_known=maps is not None, side_tables=side_tables)

    # realise the regions on the maps' grid (only when everything else is sound: it reads images)
    realised = None
    load_warnings: list = []
    if not c.problems and maps is not None and regions is not None:
        try:
            grid = read_grid(maps["path"].iloc[0])
            with warnings.catch_warnings(record=True) as load_warnings:  # kept for the run's warnings.tsv
                warnings.simplefilter("always")
                realised = regions.realise(grid)
            for w in load_warnings:
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        except RoikitError as exc:
            c.add("regions", str(exc))
        else:
            for i, f in enumerate(functional, start=1):
                if f.within not in realised.names:
                    c.add(f"regions.functional[{i}].within", f"unknown region {f.within!r}; the search space must "
                          f"be a region of the set: {_listing(realised.names, 20)}{_suggest(f.within, realised.names)}")
                if f.name in realised.names:
                    c.add(f"regions.functional[{i}].name", f"{f.name!r} is already a region of the set; give the "
                                                           "functional region its own name")
            names_all = list(realised.names) + [f.name for f in functional]
            unknown = [n for n in circular if n not in names_all]
            if unknown:
                c.add("regions.circular", f"unknown {noun(unknown, 'region')} {_listing(unknown)}; regions are "
                                          f"{_listing(realised.names, 20)}")
    if c.problems:
        raise StudyError(path, c.problems)
    study = Study(path=path, title=title, participants_path=participants_path, participants=participants, maps=maps,
                  regions=regions, realised=realised, circular=circular, statistic=statistic, keep_zeros=keep_zeros,
                  jobs=jobs, analyses=analyses, raw=raw, value_label=value_label, table_format=table_format,
                  load_warnings=list(load_warnings), functional=functional, run_maps=run_maps)
    if functional:
        # the circularity guard: before any map is read
        from .cache import analysed_contrasts

        tested = analysed_contrasts(study) or list(pd.unique(maps["contrast"]))
        if run_maps is not None:  # functional regions are measured on the contrasts with per-run maps
            tested = [t for t in tested if t in set(run_maps["contrast"])]
        maps = functional_maps
        for i, f in enumerate(functional, start=1):
            if f.split == "run" and "run_id" not in maps.columns:
                c.add(f"regions.functional[{i}].split", "\"run\" needs maps with runs: add a {run} placeholder to "
                      "maps.effect (e.g. maps/sub-{subject}_run-{run}_contrast-{contrast}_effect.nii.gz) or a "
                      "run_id column to the map list")
                continue
            try:
                check_circularity([f], tested, has_runs="run_id" in maps.columns, entry="study")
            except UsageError as exc:
                c.add(f"regions.functional[{i}]", str(exc))
            if f.circular_ok and f.split != "run" and f.name not in study.circular:
                study.circular.append(f.name)
        if c.problems:
            raise StudyError(path, c.problems)
    return study


def _check_functional(c: "_Checker", raw: dict, *, contrasts: list | None) -> list[FunctionalRegion]:
    """``[[regions.functional]]`` blocks: keys, types, the localiser among the maps' contrasts."""
    section = raw.get("regions")
    value = section.get("functional", []) if isinstance(section, dict) else []
    if isinstance(value, dict):
        value = [value]
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        c.add("regions.functional", f"must be one or more [[regions.functional]] tables, found {_type_name(value)}")
        return []
    out, seen = [], set()
    for i, block in enumerate(value, start=1):
        key = f"regions.functional[{i}]"
        c.keys(block, key, "regions.functional")
        n_problems = len(c.problems)
        name = c.string(block, "name", key, required=True)
        within = c.string(block, "within", key, required=True)
        localiser = c.string(block, "localiser", key, required=True)
        for k in ("threshold", "split", "circular_ok", "minimum"):
            if k in block:
                problem = check_value(option(k, "regions.functional"), block[k])
                if problem:
                    c.add(f"{key}.{k}", problem)
        top = block.get("top")
        if top is not None and not ((isinstance(top, int) and not isinstance(top, bool) and top >= 1)
                                    or (isinstance(top, str) and top.strip().endswith("%"))):
            c.add(f"{key}.top", f"must be a voxel count (top = 20) or a share such as \"10%\", found {top!r}")
        if ("top" in block) == ("threshold" in block):
            c.add(key, "give top (a count such as 20, or a share such as \"10%\") or threshold, one of them")
        if localiser is not None and contrasts is not None and localiser not in contrasts:
            c.add(f"{key}.localiser", f"no maps of contrast {localiser!r}; contrasts found: "
                                      f"{_listing(contrasts, 20)}{_suggest(localiser, contrasts)}")
        if name is not None:
            if name in seen:
                c.add(f"{key}.name", f"{name!r} is used by another functional region; names must differ")
            seen.add(name)
        if len(c.problems) > n_problems:
            continue
        try:
            out.append(FunctionalRegion(name, within, localiser, top=top, threshold=block.get("threshold"),
                                        split=block.get("split"), circular_ok=block.get("circular_ok", False),
                                        minimum=block.get("minimum", 1)))
        except UsageError as exc:
            c.add(key, str(exc))
    return out


def _check_run_maps(c: _Checker, raw: dict, maps: pd.DataFrame | None) -> pd.DataFrame | None:
    """``[maps] run_effect`` (and ``run_variance``): per-run maps for the functional regions, or None."""
    section = raw.get("maps")
    if not isinstance(section, dict) or ("run_effect" not in section and "run_variance" not in section):
        return None
    effect = c.string(section, "run_effect", "maps")
    variance = c.string(section, "run_variance", "maps")
    if effect is None:
        if "run_effect" not in section:
            c.add("maps.run_variance", "needs maps.run_effect, the pattern of the per-run effect maps")
        return None
    if "{run}" not in effect:
        c.add("maps.run_effect", f"needs a {{run}} placeholder (per-run maps), found {effect!r}; e.g. "
                                 "\"maps/sub-{subject}_run-{run}_contrast-{contrast}_effect.nii.gz\"")
        return None
    if maps is not None and "run_id" in maps.columns:
        c.add("maps.run_effect", "the maps of maps.effect (or maps.list) already have runs, and the functional "
                                 "regions use them; remove maps.run_effect")
        return None
    try:
        return find_maps(effect, variance=variance, root=c.root)
    except RoikitError as exc:
        c.add("maps.run_effect", str(exc))
    return None


def _check_maps(c: _Checker, raw: dict) -> pd.DataFrame | None:
    section = c.table(raw.get("maps"), "maps")
    if section is None:
        if "maps" not in raw:
            c.add("maps", "missing; give [maps] effect = \"maps/sub-{subject}_contrast-{contrast}_effect.nii.gz\" "
                          "or list = \"maps.tsv\"")
        return None
    c.keys(section, "maps", "maps")
    effect = c.string(section, "effect", "maps")
    variance = c.string(section, "variance", "maps")
    has_list = "list" in section
    if effect is None and not has_list:
        if "effect" not in section:
            c.add("maps", "give either effect (a path pattern) or list (a map list table)")
        return None
    if effect is not None and has_list:
        c.add("maps", "give either effect (a path pattern) or list (a map list table), not both")
        return None
    try:
        if has_list:
            if variance is not None:
                c.add("maps.variance", "not used with maps.list; give the variance maps in the list's "
                                       "variance_path column")
                return None
            listed = c.file(section, "list", "maps", what="map list")
            return None if listed is None else read_map_list(listed)
        return find_maps(effect, variance=variance, root=c.root)
    except RoikitError as exc:
        c.add("maps.list" if has_list else "maps.effect", str(exc))
    return None


def _check_regions(c: _Checker, raw: dict) -> tuple[RegionSet | None, list[str] | None, list[str]]:
    """The RegionSet, the region names expected after the operations (None if unknown), circular names."""
    section = c.table(raw.get("regions"), "regions")
    if section is None:
        if "regions" not in raw:
            c.add("regions", "missing; give an atlas (atlas + labels), [[regions.sphere]], [[regions.mask]] or "
                             "[[regions.probability]]")
        return None, None, []
    c.keys(section, "regions", "regions")
    n_problems = len(c.problems)
    sources: list = []
    names: list[str] = []
    names_known = True  # false when a label table could not be read (names after the operations unknown)

    if "atlas" in section or "labels" in section:
        atlas = c.file(section, "atlas", "regions", required=True, what="atlas image")
        labels = c.file(section, "labels", "regions", what="label table") if "labels" in section else None
        names_known = False
        if atlas is not None and labels is not None:
            try:
                table = read_label_table(labels)
                names += table["name"].tolist()
                sources.append(Atlas(atlas, labels=labels, **_described(c, section, "regions")))
                names_known = True
            except RoikitError as exc:
                c.add("regions.labels", str(exc))
        elif atlas is not None and "labels" not in section:  # names 'label <index>', known once realised
            sources.append(Atlas(atlas))

    def blocks(name: str) -> list[tuple[str, dict]]:
        value = section.get(name, [])
        if isinstance(value, dict):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            c.add(f"regions.{name}", f"must be one or more [[regions.{name}]] tables, found {_type_name(value)}")
            return []
        return [(f"regions.{name}[{i}]", v) for i, v in enumerate(value, start=1)]

    for key, block in blocks("sphere"):
        c.keys(block, key, "regions.sphere")
        name = c.string(block, "name", key, required=True)
        center, radius = block.get("center"), block.get("radius")
        ok = name is not None
        if name is not None:
            names.append(name)
        if not (isinstance(center, list) and len(center) == 3 and all(
                isinstance(v, (int, float)) and not isinstance(v, bool) and np.isfinite(v) for v in center)):
            c.add(f"{key}.center", f"must be three numbers [x, y, z] in world mm, found {center!r}")
            ok = False
        if isinstance(radius, bool) or not isinstance(radius, (int, float)) or not (np.isfinite(radius) and radius > 0):
            c.add(f"{key}.radius", f"must be a positive number of mm, found {radius!r}")
            ok = False
        if ok:
            sources.append(Sphere(name, center=tuple(float(v) for v in center), radius=float(radius),
                                  **_described(c, block, key)))
    for key, block in blocks("mask"):
        c.keys(block, key, "regions.mask")
        name = c.string(block, "name", key, required=True)
        image = c.file(block, "image", key, required=True, what="mask image")
        if name is not None:
            names.append(name)
        if name is not None and image is not None:
            sources.append(Mask(name, image, **_described(c, block, key)))
    for key, block in blocks("probability"):
        c.keys(block, key, "regions.probability")
        image = c.file(block, "image", key, required=True, what="probability map")
        threshold = block.get("threshold")
        ok = image is not None
        if isinstance(threshold, bool) or not isinstance(threshold, (int, float)) or not threshold > 0:
            c.add(f"{key}.threshold", f"must be a positive number (e.g. 0.5 for probabilities), found {threshold!r}")
            ok = False
        name = c.string(block, "name", key)
        labels = c.file(block, "labels", key, what="label table") if "labels" in block else None
        if ("name" in block) == ("labels" in block):
            c.add(key, "give name (a 3D probability image) or labels (a 4D image, one volume per region), not both "
                       "or neither")
            ok = False
        if not ok:
            names_known = False
        if ok and (name is not None or labels is not None):
            try:
                if labels is not None:
                    names += read_label_table(labels)["name"].tolist()
                else:
                    names.append(name)
                sources.append(ProbabilityMap(image, threshold=float(threshold), name=name, labels=labels,
                                              **_described(c, block, key)))
            except RoikitError as exc:
                c.add(f"{key}.labels", str(exc))
                names_known = False
    if not sources and len(c.problems) == n_problems:
        c.add("regions", "no region given; give an atlas (atlas + labels), [[regions.sphere]], [[regions.mask]] or "
                         "[[regions.probability]]")
    complete = names_known
    regionset = RegionSet(sources)

    split = section.get("split_hemispheres", False)
    midline = section.get("midline", option("midline", "regions").default)
    problem = check_value(option("midline", "regions"), midline)
    if problem:
        c.add("regions.midline", problem)
        midline = option("midline", "regions").default
    elif "midline" in section and split is False:
        c.add("regions.midline", "applies to a hemisphere split; add split_hemispheres = true (or a list of regions)")
    if split is not False:
        if split is True:
            names = [f"{side} {n}" for n in names for side in ("left", "right")]
            regionset = regionset.split_hemispheres(midline=midline)
        else:
            chosen = c.names(split, "regions.split_hemispheres")
            if chosen is not None:
                unknown = [n for n in chosen if complete and n not in names]
                if unknown:
                    c.add("regions.split_hemispheres", f"unknown {noun(unknown, 'region')} {_listing(unknown)}; regions are "
                                                       f"{_listing(names, 20)}{_suggest(unknown[0], names)}")
                names = [x for n in names for x in ((f"left {n}", f"right {n}") if n in chosen else (n,))]
                regionset = regionset.split_hemispheres(chosen, midline=midline)
    within = c.file(section, "within", "regions", what="analysis mask") if "within" in section else None
    if within is not None:
        regionset = regionset.intersect(within)
    if "select" in section:
        chosen = c.names(section["select"], "regions.select")
        if chosen is not None:
            unknown = [n for n in chosen if complete and n not in names]
            if unknown:
                c.add("regions.select", f"unknown {noun(unknown, 'region')} {_listing(unknown)}{_suggest(unknown[0], names)}; "
                                        f"regions are {_listing(names, 20)}")
            names = chosen
            regionset = regionset.select(chosen)
    if "rename" in section:
        mapping = section["rename"]
        if not isinstance(mapping, dict) or not all(isinstance(v, str) and v for v in mapping.values()):
            c.add("regions.rename", f"must be a table of old = \"new\" names, found {_type_name(mapping)}")
        else:
            unknown = [n for n in mapping if complete and n not in names]
            if unknown:
                c.add("regions.rename", f"unknown {noun(unknown, 'region')} {_listing(unknown)}{_suggest(unknown[0], names)}; "
                                        f"regions are {_listing(names, 20)}")
            names = [mapping.get(n, n) for n in names]
            regionset = regionset.rename(mapping)
    circular: list[str] = []
    if "circular" in section:
        circular = c.names(section["circular"], "regions.circular") or []
    return (regionset if sources else None), (names if complete else None), circular


def _participant_values(participants: pd.DataFrame, column: str) -> list[str]:
    def fmt(v):
        if isinstance(v, (float, np.floating)) and float(v).is_integer():
            return str(int(v))
        return str(v)

    return sorted({fmt(v) for v in participants[column].dropna()})


def _check_analyses(c: _Checker, raw: dict, *, contrasts, participants, columns, has_variance, maps_known,
                    side_tables=None):
    blocks = raw.get("analysis", [])
    if isinstance(blocks, dict):
        blocks = [blocks]
    if not isinstance(blocks, list) or not all(isinstance(b, dict) for b in blocks):
        c.add("analysis", f"must be one or more [[analysis]] tables, found {_type_name(blocks)}")
        return []
    if not blocks:
        c.add("analysis", "no [[analysis]] given; add at least one, e.g. [[analysis]] design = \"one-sample\" "
                          "contrast = \"novel\"")
    designs = available_designs()
    analyses = []
    for number, block in enumerate(blocks, start=1):
        key = f"analysis[{number}]"
        n_before = len(c.problems)
        c.keys(block, key, "analysis")
        design = block.get("design")
        if design is None:
            c.add(f"{key}.design", f"missing; one of {', '.join(designs)}")
            continue
        if design not in designs:
            c.add(f"{key}.design", f"{design!r} is not a design{suggest(design, designs, DESIGN_ALIASES)} "
                                   f"(designs: {', '.join(designs)})")
            continue
        import inspect

        params = inspect.signature(DESIGNS[design]).parameters
        accepted = [n for n in _DESIGN_OPTIONS if option(n, "analysis").py in params]
        from ..stats.evidence import EVIDENCE_DESIGNS

        if design in EVIDENCE_DESIGNS:  # evidence for absence: run_design adds it to these designs' rows
            accepted += [n for n in ("equivalence", "bayes_factor", "prior_scale") if n in _DESIGN_OPTIONS
                         and n not in accepted]
        required = [n for n, p in params.items() if p.kind is inspect.Parameter.KEYWORD_ONLY
                    and p.default is inspect.Parameter.empty and n not in ("participants", "confidence")]
        required += [n for n in _NEEDS.get(design, ()) if n not in required]
        for name in _DESIGN_OPTIONS:
            if name in block and name not in accepted:
                c.add(f"{key}.{name}", f"does not apply to design {design!r} (it takes "
                                       f"{', '.join(accepted) or 'no design options'})")
        for name in required:
            if name not in block:
                c.add(f"{key}.{name}", f"missing; design {design!r} needs {', '.join(required)}")
        options: dict = {}

        def known_contrast(name: str, value: Any) -> None:
            if not isinstance(value, str) or not value:
                c.add(f"{key}.{name}", f"must be a contrast label (a string), found {_type_name(value)} {value!r}")
            elif contrasts is not None and value not in contrasts:
                c.add(f"{key}.{name}", f"{value!r} is not a contrast of the maps{_suggest(value, contrasts)}; "
                                       f"found {_listing(contrasts)}")

        if "contrast" in block and "contrast" in accepted:
            value = block["contrast"]
            if design == "mixed" and isinstance(value, str) and "," in value:
                value = [v.strip() for v in value.split(",") if v.strip()]
            if design == "mixed" and isinstance(value, list):
                if not value:
                    c.add(f"{key}.contrast", "empty array; list one or more contrasts")
                for v in value:
                    known_contrast("contrast", v)
            else:
                known_contrast("contrast", value)
            options["contrast"] = value
        if "versus" in block and "versus" in accepted:
            known_contrast("versus", block["versus"])
            if block["versus"] == block.get("contrast"):
                c.add(f"{key}.versus", f"must differ from contrast ({block['versus']!r})")
            options["versus"] = block["versus"]
        if "group" in block and "group" in accepted:
            group = block["group"]
            if not isinstance(group, str) or not group:
                c.add(f"{key}.group", f"must be a column name of participants.tsv, found {group!r}")
            elif participants is None:
                c.add(f"{key}.group", "needs participants.tsv; give [study] participants = \"participants.tsv\"")
            elif group not in participants.columns:
                others = [str(x) for x in participants.columns if x != "participant_id"]
                c.add(f"{key}.group", f"{group!r} is not a column of participants.tsv{_suggest(group, others)}; "
                                      f"found {_listing(others)}")
            options["group"] = group
        if "levels" in block and "levels" in accepted:
            levels = block["levels"]
            items = [s.strip() for s in levels.split(",")] if isinstance(levels, str) else levels
            if not isinstance(items, list) or len(items) != 2 or not all(
                    isinstance(v, (str, int)) and not isinstance(v, bool) for v in items) or \
                    str(items[0]) == str(items[1]):
                c.add(f"{key}.levels", f"must name two different groups, e.g. [\"younger\", \"older\"]; "
                                       f"found {levels!r}")
            else:
                items = [str(v) for v in items]
                group = options.get("group")
                if participants is not None and isinstance(group, str) and group in participants.columns:
                    found = _participant_values(participants, group)
                    for level in items:
                        if level not in found:
                            c.add(f"{key}.levels", f"{level!r} is not a value of column {group}"
                                                   f"{_suggest(level, found)}; found {_listing(found)}")
                options["levels"] = items
        for name in [n for n in _DESIGN_OPTIONS if n not in _SPECIAL]:  # checked by the table's rules alone
            if name in block and name in accepted:
                problem = check_value(option(name, "analysis"), block[name])
                if problem:
                    c.add(f"{key}.{name}", problem)
                options[option(name, "analysis").py] = block[name]
        if "levels" not in block and "levels" in accepted and participants is not None:
            group = options.get("group")
            if isinstance(group, str) and group in participants.columns:
                found = _participant_values(participants, group)
                if len(found) != 2:
                    c.add(f"{key}.levels", f"missing; column {group} has {len(found)} levels ({_listing(found)}), "
                                           "so name the two compared, e.g. levels = [\"younger\", \"older\"]")
        for name, tilde in (("formula", True), ("random", False)):
            if name in block and name in accepted:
                value = block[name]
                problems = check_formula(value, columns, what=name, allow_tilde=tilde)
                for p in problems:
                    c.add(f"{key}.{name}", p)
                if tilde and not problems and "~" not in value:
                    c.add(f"{key}.{name}", f"{value!r}: write the formula as 'value ~ terms', e.g. "
                                           "'value ~ age + group'")
                if participants is None and problems:
                    c.add(f"{key}.{name}", "no participants.tsv was given ([study] participants), so only the "
                                           "region values table's columns can be named")
                options[name] = value
        if "crossed" in block and "crossed" in accepted:
            value = block["crossed"]
            if not isinstance(value, str) or value not in columns:
                c.add(f"{key}.crossed", f"must be a column of the region values table or participants.tsv"
                                        f"{_suggest(str(value), columns)}; found {value!r}")
            options["crossed"] = value
        if "nested" in block and "nested" in accepted:
            value = block["nested"]
            if not isinstance(value, str) or value not in columns:
                c.add(f"{key}.nested", f"must be a column of the region values table, contrasts.tsv or "
                                       f"participants.tsv{_suggest(str(value), columns)}; found {value!r}")
            options["nested"] = value
        for parameter, (table_path, _table) in (side_tables or {}).items():
            if parameter in params:  # designs that join per-contrast / per-region columns get the table
                options[parameter] = str(table_path)
        if design in _NEEDS_VARIANCE and maps_known and not has_variance:
            c.add(f"{key}.design", f"{design!r} needs first-level variances; give [maps] variance = \"...\" "
                                   "(or a variance_path column in the map list)")
        correct = block.get("correct", option("correct", "analysis").default)
        try:
            if not isinstance(correct, (str, list)):
                raise UsageError(f"must be a string such as \"holm,fdr\" or an array, found {_type_name(correct)}")
            parse_corrections(correct)
        except UsageError as exc:
            c.add(f"{key}.correct", str(exc))
        for name in ("permutations", "seed", "confidence"):
            if name in block:
                problem = check_value(option(name, "analysis"), block[name])
                if problem:
                    c.add(f"{key}.{name}", problem)
        permutations = block.get("permutations", 0)
        permutations = permutations if isinstance(permutations, int) and not isinstance(permutations, bool) else 0
        seed = block.get("seed")
        seed = seed if isinstance(seed, int) and not isinstance(seed, bool) and seed >= 0 else None
        if not permutations and isinstance(block.get("correct"), (str, list)) and "fwe" in str(block.get("correct")).lower():
            c.add(f"{key}.correct", "fwe (max-statistic permutation family-wise p) needs permutations; add "
                                    "permutations = 5000 and a seed to this [[analysis]], or choose holm, fdr, "
                                    "bonferroni or none")
        if permutations and design not in PERMUTATIONS:
            c.add(f"{key}.permutations", f"design {design!r} has no permutation test; designs with one: "
                                         f"{', '.join(PERMUTATIONS)}")
        if permutations and design == "precision-weighted" and "formula" in block:
            c.add(f"{key}.permutations", "sign-flip permutations test the precision-weighted mean only; drop the "
                                         "formula or the permutations")
        if permutations and seed is None:
            c.add(f"{key}.seed", "missing; permutations in a study file need a seed so that the run can be "
                                 "repeated exactly (e.g. seed = 1)")
        confidence = block.get("confidence", option("confidence", "analysis").default)
        if len(c.problems) == n_before:
            analyses.append(Analysis(number, design, options, correct=correct, permutations=permutations, seed=seed,
                                     confidence=float(confidence)))
    return analyses


# --------------------------------------------------------------------------------------------------
# Extraction with a cache
