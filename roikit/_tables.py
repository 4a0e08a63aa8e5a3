"""Reading and writing roikit's tables and sidecars (private, used by every layer).

Conventions (BIDS, an open standard): tab-separated, ``n/a`` for missing values,
a JSON sidecar beside each table describing its columns. Files are written
atomically (temporary file in the same folder, then rename) and never replace an
existing file unless ``overwrite=True``.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import tempfile
from pathlib import Path
from typing import Any, Iterable

import numpy as np
import pandas as pd

from .errors import InputFileError, OutputExistsError, UsageError
from ._options import spell

__all__ = [
    "read_table",
    "write_table",
    "bids_sidecar",
    "read_sidecar",
    "write_json",
    "sidecar_path",
    "sha256_file",
    "check_output",
    "atomic_write_bytes",
    "to_jsonable",
]

#: Columns that always hold labels (strings), never numbers.
LABEL_COLUMNS = ("participant_id", "session_id", "contrast", "region", "design", "term")


def check_output(path: os.PathLike | str, *, overwrite: bool) -> Path:
    """Return ``path`` as a Path; raise if it exists and ``overwrite`` is false."""
    path = Path(path)
    if path.exists() and not overwrite:
        raise OutputExistsError(
            f"{path}: file exists; pass {spell('overwrite', True)} to replace it, or choose another path"
        )
    return path


def atomic_write_bytes(path: os.PathLike | str, data: bytes, *, overwrite: bool = False) -> Path:
    """Write ``data`` to ``path`` through a temporary file and a rename."""
    path = check_output(path, overwrite=overwrite)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the file the user's usual permissions
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def sidecar_path(path: os.PathLike | str) -> Path:
    """The JSON sidecar beside a table: ``x.tsv`` -> ``x.json``."""
    path = Path(path)
    return path.with_suffix(".json")


def to_jsonable(obj: Any) -> Any:
    """Convert numpy/pandas scalars, paths and non-finite floats for JSON."""
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        x = float(obj)
        return x if math.isfinite(x) else None
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    return obj


def write_json(path: os.PathLike | str, obj: Any, *, overwrite: bool = False) -> Path:
    """Write ``obj`` as indented JSON, atomically."""
    text = json.dumps(to_jsonable(obj), indent=2, ensure_ascii=False) + "\n"
    return atomic_write_bytes(path, text.encode("utf-8"), overwrite=overwrite)


def _format_cell(x: Any) -> str:
    if x is None:
        return "n/a"
    if isinstance(x, (float, np.floating)):
        if not math.isfinite(x):
            return "n/a" if math.isnan(x) else ("inf" if x > 0 else "-inf")
        return repr(float(x))  # shortest repr that round-trips exactly
    if isinstance(x, (bool, np.bool_)):
        return "true" if x else "false"
    if x is pd.NA or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    text = str(x)
    if "\t" in text or "\n" in text:
        raise UsageError(f"value {text!r} contains a tab or newline and cannot be written to a TSV cell")
    return text


#: Units of columns roikit writes (the BIDS ``Units`` of their column descriptions).
COLUMN_UNITS = {"n_voxels": "voxels", "n_valid": "voxels", "volume_mm3": "mm^3", "x_mm": "mm", "y_mm": "mm",
                "z_mm": "mm", "radius_mm": "mm"}

#: Levels of categorical columns roikit writes (the BIDS ``Levels``).
COLUMN_LEVELS = {
    "statistic_type": {"t": "t statistic (df in column df)", "F": "F statistic (df1, df)", "z": "z statistic"},
    "population_inference": {"true": "random effects: inference about the population sampled",
                             "false": "fixed effects: describes these participants only"},
}


def bids_sidecar(columns: Iterable[str], sidecar: dict) -> dict:
    """A sidecar in the BIDS column-description layout.

    ``{"columns": {name: text}, "description": ..., **other}`` becomes
    ``{name: {"Description": text, ["Units": ...], ["Levels": {...}]}, ..., "GeneratedBy": [{"Name": "roikit",
    "Version": ..., "Description": ..., **other}]}``: one entry per column of the table, plus one top-level
    ``GeneratedBy`` entry holding the provenance. A sidecar that already has ``GeneratedBy`` is returned as is.
    """
    if "GeneratedBy" in sidecar:
        return sidecar
    from . import __version__

    columns = [str(c) for c in columns]
    if isinstance(sidecar.get("columns"), dict):
        given = sidecar["columns"]
        rest = {k: v for k, v in sidecar.items() if k != "columns"}
    else:  # already column descriptions at the top level (e.g. participants.json)
        given = {k: v for k, v in sidecar.items() if k in columns and isinstance(v, dict)}
        rest = {k: v for k, v in sidecar.items() if k not in given}
    out: dict = {}
    for c in columns:
        text = given.get(c, "")
        entry = dict(text) if isinstance(text, dict) else {"Description": text or f"column {c} (see the documentation)"}
        if c in COLUMN_UNITS:
            entry.setdefault("Units", COLUMN_UNITS[c])
        if c in COLUMN_LEVELS:
            entry.setdefault("Levels", COLUMN_LEVELS[c])
        out[str(c)] = entry
    generated = {"Name": "roikit", "Version": __version__}
    generated.update({("Description" if k == "description" else k): v for k, v in rest.items()})
    out["GeneratedBy"] = [generated]
    return out


def read_sidecar(path: os.PathLike | str) -> dict:
    """Read a table's JSON sidecar: ``{"columns": {name: description dict}, **the GeneratedBy entry}``.

    Reads both the BIDS layout roikit writes and the earlier ``{"columns": {name: text}, ...}`` layout; ``{}``
    when there is no sidecar.
    """
    side = sidecar_path(path) if Path(path).suffix != ".json" else Path(path)
    if not side.is_file():
        return {}
    try:
        data = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputFileError(f"{side}: JSON sidecar cannot be read ({exc}); fix or remove it") from exc
    if not isinstance(data, dict):
        return {}
    if "GeneratedBy" not in data:
        columns = data.get("columns", {}) if isinstance(data.get("columns"), dict) else {}
        return {**data, "columns": {c: (v if isinstance(v, dict) else {"Description": v}) for c, v in columns.items()}}
    generated = data["GeneratedBy"][0] if isinstance(data["GeneratedBy"], list) and data["GeneratedBy"] else {}
    columns = {k: v for k, v in data.items() if k != "GeneratedBy" and isinstance(v, dict)}
    return {**(generated if isinstance(generated, dict) else {}), "columns": columns}


def write_table(
    path: os.PathLike | str,
    data: pd.DataFrame,
    *,
    sidecar: dict | None = None,
    overwrite: bool = False,
) -> Path:
    """Write a tidy table as TSV (``n/a`` for missing, exact floats) and its JSON sidecar.

    Parameters
    ----------
    path : path
        Destination ``.tsv``.
    data : DataFrame
        The table; its index is not written.
    sidecar : dict, optional
        Written as JSON beside the table (``x.tsv`` -> ``x.json``) in the BIDS column-description layout
        (:func:`bids_sidecar`: every column described, plus one ``GeneratedBy`` entry with the rest).
    overwrite : bool
        Replace existing files.
    """
    path = check_output(path, overwrite=overwrite)
    if sidecar is not None:
        check_output(sidecar_path(path), overwrite=overwrite)
    lines = ["\t".join(str(c) for c in data.columns)]
    columns = [data[c].tolist() for c in data.columns]
    for row in zip(*columns):
        lines.append("\t".join(_format_cell(x) for x in row))
    atomic_write_bytes(path, ("\n".join(lines) + "\n").encode("utf-8"), overwrite=overwrite)
    if sidecar is not None:
        write_json(sidecar_path(path), bids_sidecar(data.columns, sidecar), overwrite=overwrite)
    return path


def read_table(path: os.PathLike | str, *, label_columns: Iterable[str] = LABEL_COLUMNS) -> pd.DataFrame:
    """Read a TSV (or CSV, by extension) with ``n/a`` as missing; label columns stay strings.

    ``007`` stays ``007``: label columns are never parsed as numbers.
    """
    path = Path(path)
    if not path.is_file():
        raise InputFileError(f"{path}: table not found (looked in {path.parent.resolve()})")
    sep = "," if path.suffix.lower() == ".csv" else "\t"
    with open(path, encoding="utf-8") as fh:
        header = fh.readline().rstrip("\n\r").split(sep)
    dtype = {c: str for c in label_columns if c in header}
    try:
        table = pd.read_csv(
            path,
            sep=sep,
            na_values=["n/a", "NaN", "nan", ""],
            keep_default_na=False,
            dtype=dtype,
        )
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise InputFileError(f"{path}: not a readable {'CSV' if sep == ',' else 'TSV'} table ({exc})") from exc
    return table


def sha256_file(path: os.PathLike | str, *, chunk: int = 1 << 20) -> str:
    """SHA-256 hex digest of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while True:
            block = fh.read(chunk)
            if not block:
                break
            h.update(block)
    return h.hexdigest()
