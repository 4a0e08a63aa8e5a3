"""Private helpers shared by the reporting modules: reading results rows tolerantly, splitting analyses."""

from __future__ import annotations

from typing import Any, Iterable

import numpy as np
import pandas as pd

from .._options import noun
from ..errors import UsageError
from .format import is_missing

REQUIRED_RESULTS = ("region", "design", "term", "n", "estimate", "statistic", "statistic_type", "p")
REQUIRED_VALUES = ("participant_id", "contrast", "region", "value")

#: Columns that together identify one analysis (one run of a design) inside a results table.
ANALYSIS_KEYS = ("analysis", "design", "contrast", "versus", "group_column", "levels", "formula", "within")


def check_columns(data: pd.DataFrame, required: Iterable[str], what: str) -> None:
    if not isinstance(data, pd.DataFrame):
        raise UsageError(f"{what} must be a pandas DataFrame, got {type(data).__name__}")
    missing = [c for c in required if c not in data.columns]
    if missing:
        raise UsageError(
            f"{what} lacks {noun(missing, 'column')} {', '.join(missing)} (found: "
            f"{', '.join(map(str, data.columns))}); "
            f"pass the table written by roikit"
        )


def text(x: Any, default: str = "") -> str:
    """A label cell as a string; missing -> default."""
    return default if is_missing(x) else str(x)


def flag(x: Any) -> bool | None:
    """Tolerant boolean: True/False, 'true'/'false', 1/0; missing -> None."""
    if is_missing(x):
        return None
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, str):
        low = x.strip().lower()
        if low in ("true", "1", "yes"):
            return True
        if low in ("false", "0", "no"):
            return False
        return None
    try:
        return bool(float(x))
    except (TypeError, ValueError):
        return None


def ids(x: Any) -> list[str]:
    """A comma-separated id list cell as a list (missing/empty -> [])."""
    if is_missing(x):
        return []
    return [s.strip() for s in str(x).split(",") if s.strip()]


def number(x: Any) -> float:
    if is_missing(x):
        return float("nan")
    try:
        return float(x)
    except (TypeError, ValueError):
        return float("nan")


def col(data: pd.DataFrame, name: str) -> pd.Series:
    """A column, or an all-missing Series when absent (optional columns)."""
    if name in data.columns:
        return data[name]
    return pd.Series([np.nan] * len(data), index=data.index, dtype=object)


def has_values(data: pd.DataFrame, name: str) -> bool:
    return name in data.columns and not all(is_missing(v) for v in data[name])


def ordered_unique(values: Iterable[Any]) -> list:
    seen: dict = {}
    for v in values:
        if not is_missing(v) and v not in seen:
            seen[v] = None
    return list(seen)


def split_analyses(results: pd.DataFrame) -> list[tuple[dict, pd.DataFrame]]:
    """Split a results table into analyses (one run of a design), in order of first appearance."""
    keys = [k for k in ANALYSIS_KEYS if k in results.columns]
    labels = list(results[keys].apply(lambda r: tuple(text(v) for v in r), axis=1)) if len(results) else []
    if "p_posthoc" in results.columns and len(results):
        # post-hoc pairs (their own contrasts) belong to the repeated-measures analysis whose rows precede them
        posthoc = [not is_missing(v) for v in results["p_posthoc"]]
        design = [text(v) for v in col(results, "design")]
        last: dict = {}
        for i, label in enumerate(labels):
            if not posthoc[i]:
                last[design[i]] = label
            elif design[i] in last:
                labels[i] = last[design[i]]
    out: list[tuple[dict, pd.DataFrame]] = []
    for label in ordered_unique(list(labels)):
        mask = np.array([lab == label for lab in labels])
        key = dict(zip(keys, label))
        for k in ANALYSIS_KEYS:
            key.setdefault(k, "")
        out.append((key, results.loc[mask]))
    return out


#: Display names of the designs.
DESIGN_NAMES = {
    "one-sample": "One-sample t-tests",
    "paired": "Paired t-tests",
    "two-group": "Two-group comparison",
    "glm": "General linear model",
    "precision-weighted": "Precision-weighted random-effects model",
    "mixed": "Linear mixed-effects model",
    "fixed-effects": "Fixed-effects combination, these participants only",
    "repeated-measures": "Repeated-measures ANOVA",
    "region-difference": "Region difference",
}


def analysis_title(key: dict, *, labels: "Labels | None" = None) -> str:
    """Plain-language name of an analysis, without formula syntax (``General linear model of novel: age, group``)."""
    labels = labels or Labels()
    design = key.get("design", "")
    name = DESIGN_NAMES.get(design, design)
    contrasts = [c for c in key.get("contrast", "").split(",") if c]
    contrast = ", ".join(compress_labels([labels.level("contrast", c) for c in contrasts]))
    versus = key.get("versus", "")
    if design == "paired" and versus:
        return f"{name}: {contrast} vs {labels.level('contrast', versus)}"
    if design == "two-group" and key.get("levels"):
        g = key.get("group_column", "")
        return f"{name}: {contrast}, " + " vs ".join(labels.level(g, lv) for lv in key["levels"].split(","))
    if design == "repeated-measures" and key.get("within"):
        factors = [labels.variable(f) for f in key["within"].split(",") if f]
        if key.get("group_column"):
            factors.append(labels.variable(key["group_column"]))
        return f"{name}{f' of {contrast}' if contrast else ''}: {' × '.join(factors)}"
    if key.get("formula"):
        import re

        words = []
        for term in formula_predictors(key["formula"]):
            parts = [re.sub(r"^(?:C|center|scale|standardize|log)\((\w+).*\)$", r"\1", p.strip())
                     for p in re.split(r"[:*]", term)]
            words.append(" × ".join(labels.variable(p) for p in parts if p))
        words = ordered_unique(words)
        what = f" of {contrast}" if contrast else ""
        return f"{name}{what}" + (f": {', '.join(words)}" if words else "")
    return f"{name}: {contrast}" if contrast else name


def slug(textvalue: str) -> str:
    import re

    s = re.sub(r"[^A-Za-z0-9]+", "-", textvalue).strip("-").lower()
    return s or "analysis"


def group_of(values: pd.DataFrame, participants: pd.DataFrame | None, column: str) -> pd.Series | None:
    """The group label per row of ``values`` (from values itself or from participants.tsv)."""
    if column in values.columns:
        return values[column].map(lambda v: text(v, "n/a"))
    if participants is not None and column in participants.columns and "participant_id" in participants.columns:
        mapping = dict(zip(participants["participant_id"].astype(str), participants[column]))
        return values["participant_id"].astype(str).map(lambda p: text(mapping.get(p), "n/a"))
    return None


def attach(values: pd.DataFrame, participants: pd.DataFrame | None, columns: Iterable[str]) -> pd.DataFrame:
    """Return values with the named participant columns attached (missing ones skipped)."""
    out = values
    if participants is None:
        return out
    wanted = [c for c in columns if c not in values.columns and c in participants.columns]
    if wanted:
        table = participants[["participant_id", *wanted]].copy()
        table["participant_id"] = table["participant_id"].astype(str)
        out = values.copy()
        out["participant_id"] = out["participant_id"].astype(str)
        out = out.merge(table, on="participant_id", how="left")
    return out


# --------------------------------------------------------------------------------------------- primary correction
_CORRECTION_ALIASES = {"permutation-fwe": "fwe", "bh": "fdr", "fdr_bh": "fdr"}


def correction_entries(rows: pd.DataFrame) -> list[str]:
    """The entries of the rows' ``correction`` column, in order (aliases normalised; the first is the primary)."""
    out: list[str] = []
    for cell in col(rows, "correction"):
        for m in ids(cell):
            m = _CORRECTION_ALIASES.get(m.lower(), m.lower())
            if m not in out:
                out.append(m)
    return out


def carried_corrections(rows: pd.DataFrame) -> list[str]:
    """Corrections whose adjusted p the rows carry (``p_<name>`` with values), plus ``none``."""
    return [m for m in ("holm", "fdr", "bonferroni", "fwe") if has_values(rows, f"p_{m}")] + ["none"]


def primary_correction(rows: pd.DataFrame, override: str | None = None, *, option: str = "correct") -> str:
    """The PRIMARY correction of one analysis: ``override`` when given, else the first entry of ``correction``.

    Returns ``holm``, ``fdr``, ``bonferroni``, ``fwe`` or ``none`` (uncorrected). A results table without a
    ``correction`` column (older tables) falls back to the first of holm, fdr, fwe it carries.

    Raises
    ------
    UsageError
        ``override`` is not a correction the rows carry (the message lists the ones they do).
    """
    carried = carried_corrections(rows)
    if override is not None and str(override).strip():
        name = _CORRECTION_ALIASES.get(str(override).strip().lower(), str(override).strip().lower())
        if name not in carried:
            valid = "holm, fdr, bonferroni, fwe (max-statistic permutations; needs --permutations N in roikit stats), none"
            known = name in ("holm", "fdr", "bonferroni", "fwe", "none")
            raise UsageError(
                f"{option} {override!r}: " + ("the results table carries no adjusted p for it (no p_" + name
                                              + " values)" if known else "unknown correction; valid names: " + valid)
                + f"; the results table carries: {', '.join(carried)}"
                + ("; re-run roikit stats with --correct " + name + (" --permutations N" if name == "fwe" else "")
                   if known else ""))
        return name
    entries = correction_entries(rows)
    for m in entries:
        if m == "none":
            return "none"
        if has_values(rows, f"p_{m}"):
            return m
    if entries:
        return "none"
    return next((m for m in ("holm", "fdr", "fwe") if has_values(rows, f"p_{m}")), "none")


def family_size(rows: pd.DataFrame) -> int:
    """Regions in the family of these rows (one design and term): ``family_size`` or the count of tested p."""
    sizes = [int(number(v)) for v in col(rows, "family_size") if np.isfinite(number(v))]
    if sizes:
        return max(sizes)
    return int(pd.to_numeric(rows["p"], errors="coerce").notna().sum()) if "p" in rows.columns else len(rows)


# --------------------------------------------------------------------------------------------- human labels
_NUMBER_WORDS = ("zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine")


def count(n: int, noun: str, plural: str | None = None, *, words: bool = False) -> str:
    """``count(1, "region") -> "1 region"``; ``count(3, "region", words=True) -> "three regions"`` (APA 6.32:
    words below 10 in running text)."""
    n = int(n)
    number_text = _NUMBER_WORDS[n] if words and 0 <= n < 10 else f"{n:,}"
    return f"{number_text} {noun if n == 1 else (plural or noun + 's')}"


def join_words(items: Iterable[str], conjunction: str = "and") -> str:
    """``a``, ``a and b``, ``a, b and c`` (items as given)."""
    items = [str(i) for i in items]
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + f" {conjunction} " + items[-1]


def compress_labels(items: list[str]) -> list[str]:
    """Runs of labels that differ only in a consecutive trailing number become one ``town1–town6`` item."""
    import re

    out: list[str] = []
    i = 0
    while i < len(items):
        m = re.fullmatch(r"(.*?)(\d+)", items[i])
        j = i
        if m:
            while j + 1 < len(items):
                nxt = re.fullmatch(r"(.*?)(\d+)", items[j + 1])
                if not (nxt and nxt.group(1) == m.group(1) and int(nxt.group(2)) == int(m.group(2)) + (j + 1 - i)):
                    break
                j += 1
        out.append(f"{items[i]}–{items[j]}" if j - i >= 2 else items[i])
        if 0 < j - i < 2:
            out.append(items[j])
        i = j + 1
    return out


def read_sidecar_labels(path) -> dict:
    """The BIDS JSON sidecar beside a TSV (``participants.json`` beside ``participants.tsv``), or ``{}``."""
    import json
    from pathlib import Path

    if path is None:
        return {}
    side = Path(path).with_suffix(".json")
    if not side.is_file():
        return {}
    try:
        data = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


class Labels:
    """Human names of variables and their levels, from BIDS sidecars (``LongName``, ``Levels``).

    ``variable("route_accuracy")`` is the sidecar's ``LongName`` or the name with underscores as spaces
    ("route accuracy"). ``level("sex", "F")`` is the sidecar's ``Levels`` text when the code is an abbreviation
    (three characters or fewer, or a number: "female"); longer codes ("younger") stay as they are, because
    BIDS ``Levels`` values are often descriptions ("aged 20-35 years") rather than names.
    """

    def __init__(self, *sidecars: dict | None):
        self.columns: dict[str, dict] = {}
        for side in sidecars:
            for k, v in (side or {}).items():
                if isinstance(v, dict):
                    self.columns.setdefault(str(k), {}).update(v)

    def variable(self, name: str) -> str:
        info = self.columns.get(str(name), {})
        long = info.get("LongName")
        if isinstance(long, str) and long.strip():
            return long.strip()
        return str(name).replace("_", " ").strip()

    def level(self, column: str, code: Any) -> str:
        code = text(code)
        levels = self.columns.get(str(column), {}).get("Levels")
        if isinstance(levels, dict) and code in levels and isinstance(levels[code], str):
            short = len(code) <= 3 or code.replace(".", "", 1).isdigit()
            if short and len(levels[code]) <= 40:
                return levels[code]
        return code

    def description(self, name: str) -> str:
        d = self.columns.get(str(name), {}).get("Description")
        return d.strip() if isinstance(d, str) else ""


_INTERCEPTS = ("intercept", "(intercept)")


def is_intercept(term: Any) -> bool:
    return text(term).strip().lower() in _INTERCEPTS


def term_label(term: str, key: dict, labels: "Labels | None" = None,
               participants: pd.DataFrame | None = None, terms: Iterable[str] = ()) -> str:
    """A results term in words: ``group[T.younger]`` -> ``group (younger vs older)``; ``a:b`` -> ``a × b``;
    ``Intercept`` -> ``intercept``; paired/two-group differences with a true minus sign."""
    import re

    labels = labels or Labels()
    term = text(term)
    design = key.get("design", "")
    if is_intercept(term):
        return "intercept"
    if design in ("one-sample", "fixed-effects", "precision-weighted") and term == "mean":
        return "mean"
    if design == "two-group" and key.get("group_column") and " - " in term:
        a, b = term.split(" - ", 1)
        g = key["group_column"]
        return f"{labels.level(g, a)} − {labels.level(g, b)}"
    if design == "repeated-measures" and ": " in term and " - " in term:  # a post-hoc pair: "route: novel - mixed"
        factor, _, pair = term.partition(": ")
        a, b = pair.split(" - ", 1)
        return f"{labels.variable(factor)}: {labels.level(factor, a)} − {labels.level(factor, b)}"
    if " - " in term and ":" not in term and "[" not in term:
        a, b = term.split(" - ", 1)
        return f"{labels.level('contrast', a)} − {labels.level('contrast', b)}"

    def one(part: str) -> str:
        m = re.fullmatch(r"(?:C\()?([A-Za-z_][A-Za-z0-9_.]*)(?:\s*,[^)]*)?\)?\[(?:T\.)?([^\]]+)\]", part.strip())
        if m:
            var, level = m.group(1), m.group(2)
            ref = _reference_level(var, level, participants, terms)
            shown = labels.level(var, level)
            vs = f" vs {labels.level(var, ref)}" if ref is not None else ""
            return f"{labels.variable(var)} ({shown}{vs})"
        m = re.fullmatch(r"(?:center|scale|standardize|log)\(([A-Za-z_][A-Za-z0-9_.]*)\)", part.strip())
        if m:
            return labels.variable(m.group(1))
        return labels.variable(part.strip())

    return " × ".join(one(p) for p in term.split(":"))


def _reference_level(var: str, level: str, participants: pd.DataFrame | None, terms: Iterable[str]) -> str | None:
    """The reference (left-out) level of a treatment-coded factor, when it can be told: the one level of the
    variable's values not named by any term."""
    import re

    if participants is None or var not in participants.columns:
        return None
    all_levels = sorted(ordered_unique(text(v) for v in participants[var] if text(v)))
    named = {m.group(1) for t in terms for m in re.finditer(re.escape(var) + r"\)?\[(?:T\.)?([^\]]+)\]", text(t))}
    named.add(level)
    rest = [lv for lv in all_levels if lv not in named]
    return rest[0] if len(rest) == 1 else None


def formula_predictors(formula: str) -> list[str]:
    """The right-hand-side terms of a model formula, as written (``value ~ a + b`` -> ``["a", "b"]``)."""
    rhs = formula.split("~", 1)[1] if "~" in formula else formula
    return [t.strip() for t in rhs.replace("-", "+").split("+") if t.strip() and t.strip() not in ("1", "0")]
