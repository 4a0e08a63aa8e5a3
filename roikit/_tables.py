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

from ._outputs import consent_hint, write_files
from .errors import InputFileError, OutputExistsError, OutputWriteError, UsageError, describe_os_error

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
    "is_parquet",
]

#: Columns that always hold labels (strings), never numbers.
LABEL_COLUMNS = ("participant_id", "session_id", "contrast", "region", "design", "term")


def check_output(path: os.PathLike | str, *, overwrite: bool) -> Path:
    """Return ``path`` as a Path; raise if it exists and ``overwrite`` is false."""
    path = Path(path)
    try:
        exists = path.exists()
    except OSError as exc:  # e.g. a name too long for the file system
        raise OutputWriteError(describe_os_error(path, exc)) from None
    if exists and not overwrite:
        raise OutputExistsError(
            f"{path}: file exists; {consent_hint()} to replace it, or choose another path"
        )
    return path


def atomic_write_bytes(path: os.PathLike | str, data: bytes, *, overwrite: bool = False) -> Path:
    """Write ``data`` to ``path`` through a temporary file and a rename."""
    path = check_output(path, overwrite=overwrite)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name[:200]}.", suffix=".tmp", dir=path.parent)
    except OSError as exc:
        raise OutputWriteError(describe_os_error(path, exc)) from None
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the file the user's usual permissions
        os.replace(tmp, path)
    except BaseException as exc:
        if os.path.exists(tmp):
            os.unlink(tmp)
        if isinstance(exc, OSError):
            raise OutputWriteError(describe_os_error(path, exc)) from None
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
    return atomic_write_bytes(path, _json_bytes(obj), overwrite=overwrite)


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
    writer: str | None = None,
) -> Path:
    """Write a tidy table as TSV (``n/a`` for missing, exact floats) or Parquet, and its JSON sidecar.

    The suffix decides: ``.parquet`` writes a Parquet file (through pyarrow; categorical columns as
    dictionary-encoded columns, missing values as NaN/null, exact floats), anything else TSV.

    The table and its sidecar are written as one set: both go to temporary files first and are then renamed
    into place, so a failure leaves neither half (never a table without its sidecar).

    Parameters
    ----------
    path : path
        Destination ``.tsv`` (or ``.parquet``).
    data : DataFrame
        The table; its index is not written.
    sidecar : dict, optional
        Written as JSON beside the table (``x.tsv`` -> ``x.json``) in the BIDS column-description layout
        (:func:`bids_sidecar`: every column described, plus one ``GeneratedBy`` entry with the rest).
    overwrite : bool
        Replace existing files (with ``writer``: files that are not unchanged outputs of ``writer``).
    writer : str, optional
        The command writing the table (e.g. ``"roikit extract"``): the files are recorded in the folder's
        manifest, a rerun of the same command replaces them without ``overwrite``, and the switch is
        recoverable after a crash (:mod:`roikit._outputs`).
    """
    path = Path(path)
    if is_parquet(path):  # written straight into the (staging or temporary) file: no copy of the whole file
        files = {path.name: parquet_writer(data)}
    else:
        lines = ["\t".join(str(c) for c in data.columns)]
        columns = [data[c].tolist() for c in data.columns]
        for row in zip(*columns):
            lines.append("\t".join(_format_cell(x) for x in row))
        files = {path.name: ("\n".join(lines) + "\n").encode("utf-8")}
    if sidecar is not None:
        files[sidecar_path(path).name] = _json_bytes(bids_sidecar(data.columns, sidecar))
    if writer is not None:
        write_files(path.parent, files, writer=writer, overwrite=overwrite)
        return path
    for name in files:
        check_output(path.parent / name, overwrite=overwrite)
    path.parent.mkdir(parents=True, exist_ok=True)
    temps: dict[str, str] = {}
    current = path
    try:
        for name, content in files.items():
            current = path.parent / name
            fd, temps[name] = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=path.parent)
            with os.fdopen(fd, "wb") as fh:
                if callable(content):
                    content(fh)
                else:
                    fh.write(content)
            os.chmod(temps[name], 0o666 & ~_umask())
        for name, tmp in temps.items():
            current = path.parent / name
            os.replace(tmp, current)
    except BaseException as exc:
        for tmp in temps.values():
            if os.path.exists(tmp):
                os.unlink(tmp)
        if isinstance(exc, OSError):  # disk full, permissions, name too long: one line naming the file
            raise OutputWriteError(describe_os_error(current, exc)) from None
        raise
    return path


def _json_bytes(obj: Any) -> bytes:
    return (json.dumps(to_jsonable(obj), indent=2, ensure_ascii=False) + "\n").encode("utf-8")


def read_table(
    path: os.PathLike | str,
    *,
    label_columns: Iterable[str] = LABEL_COLUMNS,
    allow_empty: bool = False,
) -> pd.DataFrame:
    """Read a TSV (or CSV or Parquet, by extension) with ``n/a`` as missing; label columns stay strings.

    A ``.parquet`` file is read through pyarrow; its categorical (dictionary) columns stay categorical, label
    columns stored as numbers are turned into strings.

    ``007`` stays ``007``: label columns are never parsed as numbers. The file must be UTF-8 text (a byte-order
    mark is accepted); an empty file, a table with a header and no rows (unless ``allow_empty``), a file in
    another encoding, or one that cannot be read raise :class:`~roikit.errors.InputFileError` naming the path.
    """
    path = Path(path)
    kind = "CSV" if path.suffix.lower() == ".csv" else "Parquet" if is_parquet(path) else "TSV"
    if not path.is_file():
        if path.exists():
            raise InputFileError(f"{path}: is a folder, not a table; give the path of the {kind} file")
        raise InputFileError(f"{path}: table not found (looked in {path.parent.resolve()})")
    if kind == "Parquet":
        return _read_parquet(path, label_columns=label_columns, allow_empty=allow_empty)
    sep = "," if kind == "CSV" else "\t"
    try:
        with open(path, encoding="utf-8-sig") as fh:
            first = fh.readline()
        if not first.strip():
            raise InputFileError(f"{path}: the table is empty (no header row); a {kind} needs a header row naming "
                                 "its columns and one row per entry")
        header = first.rstrip("\n\r").split(sep)
        dtype = {c: str for c in label_columns if c in header}
        table = pd.read_csv(
            path,
            sep=sep,
            na_values=["n/a", "NaN", "nan", ""],
            keep_default_na=False,
            dtype=dtype,
            encoding="utf-8-sig",
        )
    except InputFileError:
        raise
    except UnicodeDecodeError as exc:
        guess = ""
        try:
            exc.object.decode("cp1252")
            guess = " (it looks like Latin-1/Windows-1252)"
        except (UnicodeDecodeError, AttributeError):
            pass
        bad = exc.object[exc.start:exc.start + 1].hex() if isinstance(exc.object, bytes) else "?"
        raise InputFileError(
            f"{path}: not UTF-8 text: byte 0x{bad} cannot be decoded{guess}; save the table as UTF-8 (e.g. "
            f"iconv -f latin1 -t utf-8 FILE, or choose UTF-8 when exporting the {kind})"
        ) from None
    except OSError as exc:
        raise InputFileError(f"{path}: cannot read the table ({exc.strerror or exc}); check that the file is "
                             "readable (permissions)") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, ValueError) as exc:
        reason = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputFileError(f"{path}: not a readable {kind} table ({reason}); check that the columns are "
                             f"separated by {'commas' if sep == ',' else 'tabs'}") from None
    if table.empty and not allow_empty:
        raise InputFileError(f"{path}: the table has a header ({', '.join(map(str, table.columns))}) but no rows; "
                             "add one row per entry")
    return table


PARQUET_SUFFIXES = (".parquet", ".pq")


def is_parquet(path: os.PathLike | str) -> bool:
    """Whether a table path is a Parquet file (by its suffix)."""
    return Path(path).suffix.lower() in PARQUET_SUFFIXES


def _pyarrow():
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError as exc:  # pragma: no cover - pyarrow is a regular dependency
        raise UsageError("Parquet tables need pyarrow: pip install pyarrow") from exc
    return pa, pq


def arrow_table(data: pd.DataFrame):
    """A DataFrame as a pyarrow Table (no index); object columns that mix types are written as text."""
    pa, _ = _pyarrow()
    data = data.reset_index(drop=True)
    try:
        return pa.Table.from_pandas(data, preserve_index=False)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError):
        fixed = data.copy()
        for c in fixed.columns:
            if fixed[c].dtype == object:
                fixed[c] = [None if x is None or (isinstance(x, float) and math.isnan(x)) else _format_cell(x)
                            for x in fixed[c].tolist()]
        return pa.Table.from_pandas(fixed, preserve_index=False)


def parquet_options(data: pd.DataFrame) -> dict:
    """Writer options: dictionary encoding and min/max statistics for the label (text, categorical) columns only.

    Numbers gain nothing from a dictionary and their statistics are rarely used to skip row groups; leaving both
    out roughly doubles the writing speed (benchmarks/bench_tables.py), the file size is unchanged.
    """
    labels = [str(c) for c in data.columns
              if isinstance(data[c].dtype, pd.CategoricalDtype) or pd.api.types.is_string_dtype(data[c].dtype)]
    return {"use_dictionary": labels, "write_statistics": labels}


def parquet_writer(data: pd.DataFrame):
    """A callable writing the table as Parquet into an open binary file (for :func:`write_files`)."""
    _, pq = _pyarrow()
    table, options = arrow_table(data), parquet_options(data)

    def write(fh) -> None:
        pq.write_table(table, fh, **options)

    return write


def parquet_bytes(data: pd.DataFrame) -> bytes:
    """The table as the bytes of one Parquet file."""
    pa, pq = _pyarrow()
    sink = pa.BufferOutputStream()
    pq.write_table(arrow_table(data), sink, **parquet_options(data))
    return sink.getvalue().to_pybytes()


def _read_parquet(path: Path, *, label_columns: Iterable[str], allow_empty: bool) -> pd.DataFrame:
    pa, pq = _pyarrow()
    try:
        table = pq.read_table(path).to_pandas()
    except OSError as exc:
        if isinstance(exc, pa.ArrowException):
            raise InputFileError(f"{path}: not a readable Parquet table ({str(exc).splitlines()[0]}); write it "
                                 "with roikit, pandas.DataFrame.to_parquet or pyarrow") from None
        raise InputFileError(f"{path}: cannot read the table ({exc.strerror or exc}); check that the file is "
                             "readable (permissions)") from None
    except (pa.ArrowException, ValueError) as exc:
        raise InputFileError(f"{path}: not a readable Parquet table ({str(exc).splitlines()[0]}); write it "
                             "with roikit, pandas.DataFrame.to_parquet or pyarrow") from None
    for c in label_columns:
        if c in table.columns and not isinstance(table[c].dtype, pd.CategoricalDtype) \
                and not pd.api.types.is_string_dtype(table[c].dtype):
            table[c] = [None if pd.isna(x) else str(x) for x in table[c].tolist()]
            table[c] = table[c].astype(object)
    if table.empty and not allow_empty:
        raise InputFileError(f"{path}: the table has columns ({', '.join(map(str, table.columns))}) but no rows; "
                             "add one row per entry")
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
