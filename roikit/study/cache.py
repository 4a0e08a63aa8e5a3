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
from .._tables import sha256_file, write_json
from .._typing import PathLike
from .. import errors as _errors
from ..errors import CoverageWarning, RoikitError, RoikitWarning
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


def _sha256(path: str | None) -> str | None:
    """SHA-256 of a file's bytes (None for no file): the cache's key, the same digest extraction records."""
    if path is None or (isinstance(path, float) and np.isnan(path)):
        return None
    return sha256_file(path)


def _content_key(effect_sha: str, volume, variance_sha: str | None) -> str:
    """Cache key of one map: the SHA-256 of its bytes (and of its variance map's) and the volume."""
    return json.dumps([effect_sha, volume, variance_sha])


def _volume(row: dict) -> int | None:
    volume = row.get("volume")
    return None if volume is None or pd.isna(volume) else int(volume)


def _valid_entry(entry, n_regions: int, has_var: bool) -> bool:
    """Whether a cache entry has the shape this run needs (lists of the right length, an input record)."""
    if not isinstance(entry, dict) or not isinstance(entry.get("input"), dict):
        return False
    lists = ("value", "n_valid") + (("variance",) if has_var else ())
    return all(isinstance(entry.get(k), list) and len(entry[k]) == n_regions
               and all(x is None or (isinstance(x, (int, float)) and not isinstance(x, bool)) for x in entry[k])
               for k in lists)


def _read_cache(path: Path, fingerprint: str) -> dict:
    """The cache, or {} when absent, of another extraction, or malformed (with a warning: it is rebuilt)."""
    try:
        with open(path, encoding="utf-8") as fh:
            cache = json.load(fh)
    except FileNotFoundError:
        return {}
    except (OSError, ValueError) as exc:
        warnings.warn(RoikitWarning(f"{path}: unreadable extraction cache ({exc}); it is discarded and rebuilt "
                                    "(every map is read again)"), stacklevel=3)
        return {}
    layout = isinstance(cache, dict) and isinstance(cache.get("format"), int) and \
        isinstance(cache.get("fingerprint"), str) and isinstance(cache.get("maps"), dict) and \
        isinstance(cache.get("provenance", {}), dict)
    if layout and cache["format"] != _CACHE_FORMAT:
        return {}  # another version's cache: rebuilt quietly
    if not layout:
        warnings.warn(RoikitWarning(f"{path}: malformed extraction cache (not roikit's layout); it is discarded "
                                    "and rebuilt (every map is read again)"), stacklevel=3)
        return {}
    if cache.get("fingerprint") != fingerprint:
        return {}
    return cache


def _floats(xs) -> np.ndarray:
    return np.array([np.nan if x is None else x for x in xs], dtype=np.float64)


def analysed_contrasts(study: Study) -> list[str] | None:
    """The contrasts the study's analyses use, in the maps' order; None when an analysis may use any.

    An analysis names its contrasts with ``contrast`` (a label, or a list for mixed designs) and ``versus``.
    A mixed design without ``contrast`` models every contrast, and so does any analysis without a ``contrast``
    option (for example a design that takes its contrasts from elsewhere): then every contrast is extracted.
    """
    wanted: set[str] = set()
    for analysis in study.analyses:
        contrast = analysis.options.get("contrast")
        if contrast is None:
            return None
        if isinstance(contrast, str):
            contrast = [c.strip() for c in contrast.split(",")] if analysis.design == "mixed" else [contrast]
        wanted.update(str(c) for c in contrast)
        if analysis.options.get("versus") is not None:
            wanted.add(str(analysis.options["versus"]))
    return [c for c in pd.unique(study.maps["contrast"]) if c in wanted]


def _analysed_maps(study: Study) -> pd.DataFrame:
    contrasts = analysed_contrasts(study)
    if contrasts is None:
        return study.maps
    return study.maps[study.maps["contrast"].isin(contrasts)].reset_index(drop=True)


def _extract_with_cache(study: Study, out: Path, *, progress: bool | None, analysed_only: bool = True,
                        client=None) -> tuple[pd.DataFrame, dict]:
    """Extract the maps of the analysed contrasts, reading only maps whose bytes the cache has not seen.

    The cache is keyed by content: the SHA-256 of each map's bytes (and of its variance map's), computed by
    reading the file (no decompression), so a file replaced by another of the same size and modification time
    is read again, and a renamed or copied file is not. Freshly extracted maps are stored under the digest of
    the bytes extraction actually read. When extraction stops early (an interrupt, or maps that failed), the
    maps finished so far are stored before the exception goes on. ``client`` (a ``distributed.Client``) extracts
    the maps the cache lacks on a Dask cluster (:func:`roikit.extraction.extract`).
    """
    realised = study.realised
    names = list(realised.names)
    n_regions = len(names)
    fingerprint = _fingerprint(realised, study.statistic, study.keep_zeros)
    cache_path = out / CACHE_FOLDER / _CACHE_FILE
    cache = _read_cache(cache_path, fingerprint)
    entries: dict = cache.get("maps", {}) if cache else {}

    maps = _analysed_maps(study) if analysed_only else study.maps
    rows = maps.to_dict("records")
    has_var = "variance_path" in maps.columns
    # an empty cache needs no digests up front: extraction records the digest of what it reads
    keyed = [_content_key(_sha256(r["path"]), _volume(r), _sha256(r.get("variance_path")) if has_var else None)
             for r in rows] if entries else [None] * len(rows)
    broken = [k for k, e in entries.items() if not _valid_entry(e, n_regions, has_var)]
    if broken:
        warnings.warn(RoikitWarning(f"{cache_path}: {len(broken)} malformed cache entries discarded (those maps "
                                    "are read again)"), stacklevel=3)
        entries = {k: e for k, e in entries.items() if k not in broken}
    hits = [entries.get(k) if k is not None else None for k in keyed]
    todo = [i for i, h in enumerate(hits) if h is None]
    kept_voxels: dict = {}  # position in todo -> (effect, variance) at the functional search spaces' voxels

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
            # the labels and path are this run's (a renamed or copied file keeps its cached values)
            inputs[i] = {**hit["input"], **{k: v for k, v in _input_of(rows[i]).items()}}

    base = cache.get("provenance") if cache else None
    done = [i for i, h in enumerate(hits) if h is not None]
    functional_entry = {"entry": cache.get("functional") if cache else None}  # kept until recomputed

    def store(done_now: list[int], provenance: dict | None) -> None:
        kept = {}
        others = set(study.maps["path"]) - {r["path"] for r in rows}
        for k, e in entries.items():  # maps of the contrasts not analysed this time stay cached
            if _valid_entry(e, n_regions, has_var) and e["input"].get("path") in others:
                kept[k] = e
        for i in done_now:
            record = inputs[i]
            key = _content_key(record.get("sha256"), _volume(rows[i]), record.get("variance_sha256"))
            kept[key] = {"value": values[i].tolist(), "n_valid": n_valid[i].tolist(),
                         "variance": variances[i].tolist() if has_var else None, "input": record}
        prov = {k: v for k, v in (provenance or {}).items() if k not in ("inputs", "cache")}
        content = {"format": _CACHE_FORMAT, "fingerprint": fingerprint, "roikit_version": __version__,
                   "note": "roikit extraction cache, keyed by the SHA-256 of each map's bytes: safe "
                           "to delete (the next run re-extracts)",
                   "provenance": prov, "maps": kept}
        if functional_entry["entry"] is not None:
            content["functional"] = functional_entry["entry"]
        write_json(cache_path, content, overwrite=True)

    if todo:
        for i in todo:  # a clear message when a new map is on another grid than the regions
            header = read_header(rows[i]["path"])
            check_same_grid(realised.grid, header.grid, a_name="the regions' grid (the first map's)",
                            b_name=header.path)
        keep = None
        if study.functional:  # functional regions: the search spaces' voxels come back from the same read
            from ..functional import search_voxels

            keep = (search_voxels(realised, study.functional), kept_voxels)
        try:
            fresh = extract(maps.iloc[todo].reset_index(drop=True), realised, statistic=study.statistic,
                            keep_zeros=study.keep_zeros, n_jobs=study.jobs, progress=progress, _keep=keep,
                            client=client)
        except (KeyboardInterrupt, RoikitError) as exc:
            partial = getattr(exc, "partial_values", None)
            completed = getattr(exc, "completed", None)
            records = getattr(exc, "inputs", None)
            if partial is not None and completed and records is not None:
                finished = [todo[j] for j in completed]
                for j, i in zip(completed, finished):
                    block = partial.iloc[j * n_regions:(j + 1) * n_regions]
                    values[i] = block["value"].to_numpy(float)
                    n_valid[i] = block["n_valid"].to_numpy(np.int64)
                    if has_var:
                        variances[i] = block["variance"].to_numpy(float)
                    inputs[i] = records[j]
                store(done + finished, base or {})
                if isinstance(exc, KeyboardInterrupt):
                    raise KeyboardInterrupt(f"{len(finished)} newly extracted maps of {len(todo)} kept in the "
                                            f"cache, {cache_path}") from exc
            raise
        prov = dict(fresh.attrs.get("roikit", {}))
        fresh.attrs = {}  # slicing below would deep-copy the provenance (every map's record) once per map
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
    n_all = len(study.maps)
    base["cache"] = {"extracted": len(todo), "reused": len(rows) - len(todo), "fingerprint": fingerprint,
                     "path": os.fspath(cache_path), "key": "sha256 of each map's bytes",
                     "maps_analysed": len(rows), "maps_found": n_all,
                     "contrasts_analysed": list(pd.unique(maps["contrast"]))}
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
    fmaps = study.functional_maps
    tested = [c for c in pd.unique(maps["contrast"]) if c in set(fmaps["contrast"])]
    if study.functional and tested:
        # participant-specific regions: their rows follow the other regions'; cached under a key of every map
        # they read (SHA-256) and their definitions, so a rerun reads no map
        gathered = {(rows[todo[j]]["path"], _volume(rows[todo[j]])): pair for j, pair in kept_voxels.items()}
        froi, functional_entry["entry"], reused = _functional_with_cache(study, tested, gathered,
                                                                         functional_entry["entry"])
        base["cache"]["functional"] = "from the cache" if reused else "computed"
        base["functional"] = froi.attrs["roikit"]["functional"]
        circular = list(dict.fromkeys(list(base.get("circular_regions", [])) + froi.attrs["roikit"]["circular_regions"]))
        if circular:
            base["circular_regions"] = circular
        table = pd.concat([table, froi], ignore_index=True, sort=False)
    table.attrs["roikit"] = base
    store(list(range(len(rows))), base)
    return table, base["cache"]


def _functional_key(study: Study, tested: list) -> str:
    """SHA-256 of what the functional regions' rows depend on: their definitions, the search spaces' voxels, the
    extraction choices, the tested contrasts, and the labels and SHA-256 of every localiser and tested map read."""
    realised = study.realised
    names = list(realised.names)
    fmaps = study.functional_maps
    needed = set(tested) | {f.localiser for f in study.functional}
    h = hashlib.sha256()
    header = {"roikit": __version__, "cache_format": _CACHE_FORMAT, "statistic": study.statistic,
              "keep_zeros": bool(study.keep_zeros), "trim": TRIM, "tested": [str(t) for t in tested],
              "regions": [f.describe() for f in study.functional], "shape": list(realised.grid.shape),
              "affine": np.asarray(realised.grid.affine, dtype=np.float64).tolist()}
    h.update(json.dumps(header, sort_keys=True, default=str).encode("utf-8"))
    for f in study.functional:
        h.update(np.ascontiguousarray(realised.voxels[names.index(f.within)], dtype=np.int64).tobytes() + b"#")
    has_var = "variance_path" in fmaps.columns
    for row in fmaps[fmaps["contrast"].isin(needed)].to_dict("records"):
        labels = [str(row.get(k)) for k in ("participant_id", "session_id", "run_id", "contrast")]
        h.update(json.dumps(labels + [_sha256(row["path"]), _volume(row),
                                      _sha256(row.get("variance_path")) if has_var else None]).encode("utf-8"))
    return h.hexdigest()


_FUNCTIONAL_FLOATS = ("value", "variance", "selected_share")


def _functional_with_cache(study: Study, tested: list, gathered: dict, entry) -> tuple[pd.DataFrame, dict, bool]:
    """The functional regions' rows: from the cache entry when its key matches (no map is read, the warnings the
    computation gave are given again), else computed (reading only maps the region extraction did not hand over).

    Returns the rows, the cache entry to store and whether it was reused.
    """
    from ..functional import extract_functional, integer_counts

    key = _functional_key(study, tested)
    if isinstance(entry, dict) and entry.get("key") == key and isinstance(entry.get("columns"), list) \
            and isinstance(entry.get("rows"), list) and isinstance(entry.get("provenance"), dict):
        try:
            table = pd.DataFrame(entry["rows"], columns=entry["columns"])
            for c in _FUNCTIONAL_FLOATS:
                if c in table.columns:
                    table[c] = pd.to_numeric(table[c]).astype(np.float64)
            table = integer_counts(table)
            caught = [getattr(_errors, w["category"])(w["message"], findings=w.get("findings"))
                      for w in entry.get("warnings", [])]
        except (TypeError, ValueError, KeyError, AttributeError):
            pass  # a damaged entry: computed again below
        else:
            for w in caught:
                warnings.warn(w, stacklevel=4)
            provenance = {**entry["provenance"], "maps_read": 0, "maps_from_extraction": 0,
                          "from_cache": True}
            table.attrs["roikit"] = {"functional": provenance,
                                     "circular_regions": list(entry.get("circular_regions", []))}
            return table, entry, True
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        table = extract_functional(study.functional_maps, study.realised, study.functional, contrasts=tested,
                                   statistic=study.statistic, keep_zeros=study.keep_zeros, entry="study",
                                   _gathered=gathered)
    for w in caught:
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    stored = [{"category": w.category.__name__, "message": str(w.message),
               "findings": list(getattr(w.message, "findings", []) or [])}
              for w in caught if getattr(_errors, w.category.__name__, None) is w.category]
    rows = [[None if isinstance(x, float) and np.isnan(x) else (x.item() if isinstance(x, np.generic) else x)
             for x in record] for record in table.itertuples(index=False, name=None)]
    entry = {"key": key, "columns": [str(c) for c in table.columns], "rows": rows,
             "provenance": table.attrs["roikit"]["functional"],
             "circular_regions": list(table.attrs["roikit"]["circular_regions"]), "warnings": stored}
    return table, entry, False


def _input_of(row: dict) -> dict:
    """The labels and paths of a map-table row, as extraction's input records spell them."""
    record = {"participant_id": row["participant_id"], "contrast": row["contrast"], "path": row["path"]}
    for key in ("session_id", "variance_path"):
        value = row.get(key)
        if value is not None and not (isinstance(value, float) and np.isnan(value)):
            record[key] = value
    return record


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
    values, _ = _extract_with_cache(study, out, progress=progress, analysed_only=False)
    return values


# --------------------------------------------------------------------------------------------------
# Running
