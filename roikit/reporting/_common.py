"""Private helpers shared by the reporting modules: reading results rows tolerantly, splitting analyses."""

from __future__ import annotations

from typing import Any, Iterable

import numpy as np
import pandas as pd

from ..errors import UsageError
from .format import is_missing

REQUIRED_RESULTS = ("region", "design", "term", "n", "estimate", "statistic", "statistic_type", "p")
REQUIRED_VALUES = ("participant_id", "contrast", "region", "value")

#: Columns that together identify one analysis (one run of a design) inside a results table.
ANALYSIS_KEYS = ("design", "contrast", "versus", "group_column", "levels", "formula")


def check_columns(data: pd.DataFrame, required: Iterable[str], what: str) -> None:
    if not isinstance(data, pd.DataFrame):
        raise UsageError(f"{what} must be a pandas DataFrame, got {type(data).__name__}")
    missing = [c for c in required if c not in data.columns]
    if missing:
        raise UsageError(
            f"{what} lacks column(s) {', '.join(missing)} (found: {', '.join(map(str, data.columns))}); "
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
    labels = results[keys].apply(lambda r: tuple(text(v) for v in r), axis=1) if len(results) else []
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
}


def analysis_title(key: dict) -> str:
    """Plain-language name of an analysis (used in headings and file names)."""
    design = key.get("design", "")
    name = DESIGN_NAMES.get(design, design)
    contrast, versus = key.get("contrast", ""), key.get("versus", "")
    if design == "paired" and versus:
        return f"{name}: {contrast} vs {versus}"
    if design == "two-group" and key.get("levels"):
        return f"{name}: {contrast}, {key['levels'].replace(',', ' vs ')}"
    if key.get("formula"):
        return f"{name}: {contrast + ', ' if contrast else ''}{key['formula']}"
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
