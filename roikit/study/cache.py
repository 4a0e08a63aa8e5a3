"""The extraction cache of a study's output folder: only maps not seen before (or changed) are read."""

from __future__ import annotations

import hashlib
import json
import os
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from .._tables import write_json
from .._typing import PathLike
from ..errors import CoverageWarning
from ..extraction import TRIM, assemble_values, extract
from ..images import check_same_grid, read_header
from ..regions import RealisedRegions
from .schema import _CACHE_FILE, _CACHE_FORMAT, CACHE_FOLDER, Study, _listing, load_study

# --------------------------------------------------------------------------------------------------


def _fingerprint(realised: RealisedRegions, statistic: str, keep_zeros: bool) -> str:
    """SHA-256 of the realised regions (grid, names, voxels, weights) and the extraction choices."""
    h = hashlib.sha256()
    header = {"roikit": __version__, "cache_format": _CACHE_FORMAT, "statistic": statistic,
              "keep_zeros": bool(keep_zeros), "trim": TRIM, "shape": list(realised.grid.shape),
              "affine": np.asarray(realised.grid.affine, dtype=np.float64).tolist(), "names": list(realised.names)}
    h.update(json.dumps(header, sort_keys=True).encode("utf-8"))
    for vox, w in zip(realised.voxels, realised.weights):
        h.update(np.ascontiguousarray(vox, dtype=np.int64).tobytes())
        h.update(b"|" if w is None else np.ascontiguousarray(w, dtype=np.float64).tobytes())
        h.update(b"#")
    return h.hexdigest()


def _stamp(path: str | None) -> list | None:
    if path is None or (isinstance(path, float) and np.isnan(path)):
        return None
    st = os.stat(path)
    return [os.path.abspath(path), int(st.st_size), int(st.st_mtime_ns)]


def _map_key(row: dict) -> tuple[str, list]:
    """Cache key of one map (its file and volume) and the stamp that must match (size, mtime of both files)."""
    volume = row.get("volume")
    volume = None if volume is None or pd.isna(volume) else int(volume)
    effect = _stamp(row["path"])
    variance = _stamp(row.get("variance_path"))
    key = json.dumps([effect[0], volume, None if variance is None else variance[0]])
    return key, [effect, variance]


def _read_cache(path: Path, fingerprint: str) -> dict:
    try:
        with open(path, encoding="utf-8") as fh:
            cache = json.load(fh)
    except (OSError, ValueError):
        return {}
    if not isinstance(cache, dict) or cache.get("fingerprint") != fingerprint or cache.get("format") != _CACHE_FORMAT:
        return {}
    return cache


def _floats(xs) -> np.ndarray:
    return np.array([np.nan if x is None else x for x in xs], dtype=np.float64)


def _extract_with_cache(study: Study, out: Path, *, progress: bool | None) -> tuple[pd.DataFrame, dict]:
    """Extract every map of the study, reading only maps not in the cache (or changed since)."""
    realised = study.realised
    names = list(realised.names)
    n_regions = len(names)
    fingerprint = _fingerprint(realised, study.statistic, study.keep_zeros)
    cache_path = out / CACHE_FOLDER / _CACHE_FILE
    cache = _read_cache(cache_path, fingerprint)
    entries: dict = cache.get("maps", {}) if cache else {}

    maps = study.maps
    rows = maps.to_dict("records")
    keyed = [_map_key(r) for r in rows]
    hits = [entries.get(k) if entries.get(k, {}).get("stamp") == s else None for k, s in keyed]
    todo = [i for i, h in enumerate(hits) if h is None]

    has_var = "variance_path" in maps.columns
    values = np.full((len(rows), n_regions), np.nan)
    n_valid = np.zeros((len(rows), n_regions), dtype=np.int64)
    variances = np.full((len(rows), n_regions), np.nan) if has_var else None
    inputs: list = [None] * len(rows)
    for i, hit in enumerate(hits):
        if hit is not None:
            values[i] = _floats(hit["value"])
            n_valid[i] = np.asarray(hit["n_valid"], dtype=np.int64)
            if has_var:
                variances[i] = _floats(hit["variance"])
            inputs[i] = hit["input"]

    base = cache.get("provenance") if cache else None
    if todo:
        for i in todo:  # a clear message when a new map is on another grid than the regions
            header = read_header(rows[i]["path"])
            check_same_grid(realised.grid, header.grid, a_name="the regions' grid (the first map's)",
                            b_name=header.path)
        fresh = extract(maps.iloc[todo].reset_index(drop=True), realised, statistic=study.statistic,
                        keep_zeros=study.keep_zeros, n_jobs=study.jobs, progress=progress)
        prov = dict(fresh.attrs.get("roikit", {}))
        fresh_inputs = prov.pop("inputs", [])
        base = prov
        for j, i in enumerate(todo):
            block = fresh.iloc[j * n_regions:(j + 1) * n_regions]
            if list(block["region"]) != names or block["participant_id"].iloc[0] != rows[i]["participant_id"]:
                raise RuntimeError("extraction returned maps out of order")  # pragma: no cover - internal check
            values[i] = block["value"].to_numpy(float)
            n_valid[i] = block["n_valid"].to_numpy(np.int64)
            if has_var:
                variances[i] = block["variance"].to_numpy(float)
            inputs[i] = fresh_inputs[j]
    base = dict(base or {})
    base["region_sources"] = study.regions.describe()
    base["inputs"] = inputs
    base["cache"] = {"extracted": len(todo), "reused": len(rows) - len(todo), "fingerprint": fingerprint,
                     "path": os.fspath(cache_path)}
    if study.circular:
        base["circular_regions"] = list(study.circular)

    table = assemble_values(maps, names, realised.n_voxels, values, n_valid, variances)
    reused_empty = [i for i in range(len(rows)) if hits[i] is not None and (n_valid[i] == 0).any()]
    if reused_empty:
        who = [f"{rows[i]['participant_id']}/{rows[i]['contrast']}/{names[r]}" for i in reused_empty
               for r in np.flatnonzero(n_valid[i] == 0)]
        warnings.warn(CoverageWarning(
            f"{len(who)} participant x contrast x region value{'s' if len(who) != 1 else ''} have no valid voxel "
            f"and are n/a (rows kept; from the extraction cache): {_listing(who)}",
            findings=[{"problem": "no valid voxel: value n/a", "participant_id": rows[i]["participant_id"],
                       "region": names[r]} for i in reused_empty for r in np.flatnonzero(n_valid[i] == 0)]),
            stacklevel=3)
    table.attrs["roikit"] = base

    new_entries = {}
    for i, (k, s) in enumerate(keyed):
        new_entries[k] = {"stamp": s, "value": values[i].tolist(), "n_valid": n_valid[i].tolist(),
                          "variance": variances[i].tolist() if has_var else None, "input": inputs[i]}
    provenance = {k: v for k, v in base.items() if k not in ("inputs", "cache")}
    write_json(cache_path, {"format": _CACHE_FORMAT, "fingerprint": fingerprint, "roikit_version": __version__,
                            "note": "roikit extraction cache: safe to delete (the next run re-extracts)",
                            "provenance": provenance, "maps": new_entries}, overwrite=True)
    return table, base["cache"]


def extract_study(study: Study | PathLike, *, out: PathLike | None = None, progress: bool | None = None
                  ) -> pd.DataFrame:
    """The study's region values table, reading only maps not already in the output folder's cache.

    Parameters
    ----------
    study : Study or path
        A study (:func:`load_study`) or the path of a study file.
    out : path, optional
        Output folder whose ``.cache/`` is used and updated; default ``results`` beside the study file.
    progress : bool, optional
        Progress bar (default: only for 20 maps or more).

    Returns
    -------
    DataFrame
        The region values table exactly as :func:`roikit.extraction.extract` returns it for all the study's
        maps; ``attrs["roikit"]`` holds the provenance, with ``cache`` (maps ``extracted`` and ``reused``).

    Examples
    --------
    >>> values = extract_study("study/study.toml")      # doctest: +SKIP
    """
    if not isinstance(study, Study):
        study = load_study(study)
    out = Path(out) if out is not None else study.default_out
    values, _ = _extract_with_cache(study, out, progress=progress)
    return values


# --------------------------------------------------------------------------------------------------
# Running
