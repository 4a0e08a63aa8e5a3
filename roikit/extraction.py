"""Extraction: from first-level maps and regions to the tidy region values table.

Finding maps (:func:`find_maps` from a path pattern, :func:`read_map_list` from a
table, :func:`maps_from_4d` from one 4D file) gives a *maps table*: one row per
map with ``participant_id``, optional ``session_id``, ``contrast``, ``path``,
optional ``variance_path`` and ``volume``.

:func:`extract` reads each map once for all regions. The voxel-to-region index
is built once per grid: the union of all regions' voxels is gathered from the
map with one fancy-index, and region sums and counts are one sparse
matrix-vector product each (regions are rows of a sparse membership matrix), so
the cost per map does not grow with a Python loop over regions. Maps are
streamed one at a time (memory does not grow with the number of maps), in
order, optionally through a pool of processes or any
:class:`concurrent.futures.Executor`.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import datetime as _dt
import glob
import hashlib
import os
import re
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Literal, Sequence

import numpy as np
import pandas as pd
import scipy.sparse as sp

from . import __version__
from ._options import noun, progress_bar, spell
from ._tables import read_table, write_table
from .errors import (
    CoverageWarning,
    ExtractionError,
    ImageFormatError,
    InputFileError,
    InputWarning,
    MapDiscoveryError,
    RoikitError,
    UsageError,
)
from .images import DEFAULT_ATOL, MapHeader, check_same_grid, read_flat, read_header, verify_data
from .regions import RealisedRegions, RegionSet

__all__ = [
    "find_maps",
    "read_map_list",
    "maps_from_4d",
    "read_participants",
    "extract",
    "write_values",
    "extract_to_file",
    "assemble_values",
    "VALUE_COLUMNS",
    "STATISTICS",
]

STATISTICS = ("mean", "median", "trimmed-mean", "weighted-mean")

#: The writer recorded in the output folder's manifest for region values tables (Python and command line).
VALUES_WRITER = "roikit extract"

#: Proportion cut from each end for the trimmed mean (20%, Wilcox 2012, common practice).
TRIM = 0.2

#: Description of every column of the values table (written to the JSON sidecar).
VALUE_COLUMNS = {
    "participant_id": "Participant label, sub-<label> (BIDS).",
    "session_id": "Session label, ses-<label> (BIDS); only when maps have sessions.",
    "contrast": "First-level contrast label.",
    "run_id": "Run label, run-<label> (BIDS); only when maps have runs ({run} placeholder or a run_id column).",
    "region": "Region name, in the region set's order.",
    "value": "Summary statistic of the map over the region's valid voxels; n/a when no voxel is valid.",
    "n_voxels": "Voxels of the region on the maps' grid.",
    "n_valid": "Voxels of the region with finite data (and non-zero unless zeros were kept).",
    "variance": "Region-level sampling variance: mean of the voxel variances over the valid voxels (an upper bound "
                "on the variance of the region mean for any positive spatial correlation); only with variance maps.",
}

# --------------------------------------------------------------------------------------------------
# Finding maps
# --------------------------------------------------------------------------------------------------

_PLACEHOLDERS = {
    # BIDS labels are alphanumeric; a contrast label may also hold '-' and '_' (e.g. novel-vs-familiar)
    "subject": r"[^/_]+",
    "session": r"[^/_]+",
    "run": r"[^/_]+",
    "contrast": r"[^/]+?",
}


def _pattern_regex(pattern: str, prefix: str = "") -> tuple[str, re.Pattern]:
    """Glob and regex for a path pattern with {subject}, {session}, {contrast} and * wildcards.

    ``prefix`` (the folder a relative pattern starts from) is taken literally: a ``*`` or ``[`` in a folder's
    name never acts as a wildcard.
    """
    tokens = re.split(r"(\{[a-z]+\}|\*)", pattern)
    glob_parts, rx_parts, seen = [glob.escape(prefix)], [re.escape(prefix)], set()
    for tok in tokens:
        m = re.fullmatch(r"\{([a-z]+)\}", tok)
        if m:
            name = m.group(1)
            if name not in _PLACEHOLDERS:
                raise UsageError(f"pattern {pattern!r}: unknown placeholder {{{name}}}; "
                                 "use {subject}, {session}, {run} and {contrast}")
            glob_parts.append("*")
            rx_parts.append(f"(?P={name})" if name in seen else f"(?P<{name}>{_PLACEHOLDERS[name]})")
            seen.add(name)
        elif tok == "*":
            glob_parts.append("*")
            rx_parts.append(r"[^/]*")
        else:
            glob_parts.append(glob.escape(tok))
            rx_parts.append(re.escape(tok))
    if "subject" not in seen:
        raise UsageError(f"pattern {pattern!r} has no {{subject}} placeholder; e.g. maps/sub-{{subject}}_contrast-{{contrast}}.nii.gz")
    return "".join(glob_parts), re.compile("".join(rx_parts) + r"\Z")


def _fill(pattern: str, values: dict) -> str:
    out = pattern
    for key, val in values.items():
        out = out.replace("{" + key + "}", val)
    return out


def find_maps(
    pattern: str,
    *,
    variance: str | None = None,
    contrast: str | None = None,
    root: str | os.PathLike | None = None,
) -> pd.DataFrame:
    """Find maps from a path pattern with placeholders.

    Parameters
    ----------
    pattern : str
        Path with ``{subject}`` (required; the label after ``sub-``), optional ``{session}``
        (the label after ``ses-``), ``{run}`` (the label after ``run-``: a ``run_id`` column) and ``{contrast}``
        placeholders, and ``*`` wildcards,
        e.g. ``"maps/sub-{subject}_contrast-{contrast}_effect.nii.gz"``.
    variance : str, optional
        Pattern of the matching variance maps, with the same placeholders.
    contrast : str, optional
        Contrast label for every map when the pattern has no ``{contrast}``.
    root : path, optional
        Folder that relative patterns start from (default: the current folder).

    Returns
    -------
    DataFrame
        ``participant_id`` (``sub-<label>``, a string: ``007`` stays ``007``), ``session_id``
        (only with ``{session}``), ``contrast``, ``path`` and ``variance_path`` (with
        ``variance``), sorted by participant, session and contrast.
    """
    root = Path(root) if root is not None else Path(".")
    prefix = "" if os.path.isabs(pattern) else os.path.join(root, "").replace(os.sep, "/")
    glob_pattern, rx = _pattern_regex(pattern.replace(os.sep, "/"), prefix)
    if "{contrast}" not in pattern and contrast is None:
        raise UsageError(f"pattern {pattern!r} has no {{contrast}} placeholder; add one or give {spell('contrast')}")
    candidates = sorted(glob.glob(glob_pattern))
    rows = []
    unmatched = []
    for path in candidates:
        m = rx.match(path.replace(os.sep, "/"))
        if not m:
            unmatched.append(path)
            continue
        g = m.groupdict()
        row = {"participant_id": f"sub-{g['subject']}"}
        if "session" in g:
            row["session_id"] = f"ses-{g['session']}"
        if "run" in g:
            row["run_id"] = f"run-{g['run']}"
        row["contrast"] = g.get("contrast", contrast)
        row["path"] = path
        if variance is not None:
            filled = {k: v for k, v in g.items() if v is not None}
            vprefix = "" if os.path.isabs(variance) else os.path.join(root, "")
            vpath = vprefix + _fill(variance, filled)
            if "*" in variance:  # wildcards of the pattern only; folder names and labels are literal
                vglob = glob.escape(vprefix) + "*".join(glob.escape(_fill(part, filled))
                                                        for part in variance.split("*"))
                hits = sorted(glob.glob(vglob))
                if len(hits) != 1:
                    raise MapDiscoveryError(f"variance pattern {variance!r} gives {len(hits)} files for {path} "
                                            f"({vpath}); it must give exactly one")
                vpath = hits[0]
            if not os.path.isfile(vpath):
                raise InputFileError(f"{vpath}: variance map for {path} not found (from pattern {variance!r})")
            row["variance_path"] = vpath
        rows.append(row)
    if not rows:
        full = re.sub(r"\{[a-z]+\}", "*", prefix + pattern.replace(os.sep, "/"))
        fixed = full.split("*")[0]
        where = Path(fixed if fixed.endswith("/") else os.path.dirname(fixed) or ".")
        rest = os.path.relpath(full, where) if where != Path(".") else full
        raise MapDiscoveryError(
            f"pattern {pattern!r} matched no file (searched {where.resolve()} for {rest}); "
            "check the folder and the file naming"
        )
    if unmatched:
        warnings.warn(
            f"pattern {pattern!r}: {len(unmatched)} {noun(unmatched, 'file')} in the searched folders with "
            f"the pattern's shape but not its labels (e.g. a subject label with '_' or '/'), not used: "
            f"{', '.join(unmatched[:10])}"
            + (f" and {len(unmatched) - 10} more" if len(unmatched) > 10 else "")
            + "; rename such files or adjust the pattern if they belong to the study",
            InputWarning,
            stacklevel=2,
        )
    maps = pd.DataFrame(rows)
    return _validate_maps(maps, source=f"pattern {pattern!r}")


def _validate_maps(maps: pd.DataFrame, *, source: str) -> pd.DataFrame:
    required = ["participant_id", "contrast", "path"]
    missing = [c for c in required if c not in maps.columns]
    if missing:
        raise MapDiscoveryError(f"{source}: map list lacks {noun(missing, 'column')} {missing}; found {list(maps.columns)}")
    maps = maps.copy()
    for c in ("participant_id", "session_id", "run_id", "contrast", "path", "variance_path"):
        if c in maps.columns:
            if maps[c].isna().any():
                rows = (np.flatnonzero(maps[c].isna().to_numpy()) + 1).tolist()
                raise MapDiscoveryError(f"{source}: column {c} is empty in {noun(rows, 'row')} {rows[:10]}")
            maps[c] = maps[c].astype(str)
    bad = [p for p in maps["participant_id"] if not p.startswith("sub-") or len(p) == 4]
    if bad:
        raise MapDiscoveryError(f"{source}: participant_id must be sub-<label>, found {bad[:5]}")
    if "session_id" in maps.columns:
        bad = [s for s in maps["session_id"] if not s.startswith("ses-") or len(s) == 4]
        if bad:
            raise MapDiscoveryError(f"{source}: session_id must be ses-<label>, found {bad[:5]}")
    if "run_id" in maps.columns:
        bad = [s for s in maps["run_id"] if not s.startswith("run-") or len(s) == 4]
        if bad:
            raise MapDiscoveryError(f"{source}: run_id must be run-<label>, found {bad[:5]}")
    keys = [c for c in ("participant_id", "session_id", "contrast", "run_id") if c in maps.columns]
    dup = maps[maps.duplicated(keys, keep=False)]
    if len(dup):
        first = dup.iloc[0]
        same = dup[(dup[keys] == first[keys]).all(axis=1)]["path"].tolist()
        raise MapDiscoveryError(
            f"{source}: {len(dup)} maps share a ({', '.join(keys)}); e.g. "
            f"{', '.join(str(first[k]) for k in keys)} from {same}; each participant, session, contrast (and run) needs one map"
        )
    vol = maps["volume"].astype(str) if "volume" in maps.columns else ""
    reused = maps[maps.assign(_v=vol).duplicated(["path", "_v"] if "volume" in maps.columns else ["path"],
                                                  keep=False)]
    if len(reused):
        listed = "; ".join(f"{p}: {', '.join(_map_label(r) for r in grp.itertuples(index=False))}"
                           for p, grp in list(reused.groupby("path", sort=False))[:5])
        warnings.warn(f"{source}: the same file is given for several participants/contrasts ({listed}); each map "
                      "should be a separate file", InputWarning, stacklevel=3)
    if "volume" in maps.columns:
        number = pd.to_numeric(maps["volume"], errors="coerce")
        given = maps["volume"].notna().to_numpy()
        with np.errstate(invalid="ignore"):
            bad = given & ~(np.isfinite(number.to_numpy(float)) & (number.to_numpy(float) >= 0)
                            & (number.to_numpy(float) == np.round(number.to_numpy(float))))
        if bad.any():
            rows = (np.flatnonzero(bad) + 1).tolist()
            raise MapDiscoveryError(
                f"{source}: column volume must hold whole numbers from 0 (the 0-based volume of a 4D file), found "
                f"{maps['volume'][bad].astype(str).tolist()[:5]} in {noun(rows, 'row')} {rows[:10]}; fix the volume "
                "there or leave the "
                "cell n/a for 3D files"
            )
        maps["volume"] = number.astype("Int64")
    maps = maps.sort_values(keys, kind="stable").reset_index(drop=True)
    return maps


def read_map_list(path: str | os.PathLike) -> pd.DataFrame:
    """Read a map list (TSV or CSV): ``participant_id``, ``contrast``, optional ``session_id``,
    ``path``, optional ``variance_path`` and ``volume`` (0-based, for 4D files).

    Relative paths are relative to the list's folder.
    """
    table = read_table(path, label_columns=("participant_id", "session_id", "run_id", "contrast", "path",
                                                "variance_path"))
    base = Path(path).parent
    for c in ("path", "variance_path"):
        if c in table.columns:
            table[c] = [p if pd.isna(p) or os.path.isabs(p) else os.fspath(base / p) for p in table[c]]
    return _validate_maps(table, source=os.fspath(path))


def maps_from_4d(
    path: str | os.PathLike,
    participants: Sequence[str] | str | os.PathLike,
    *,
    contrast: str,
    variance: str | os.PathLike | None = None,
) -> pd.DataFrame:
    """One 4D file holding one volume per participant (in the order of ``participants``).

    Parameters
    ----------
    path : path
        The 4D NIfTI file.
    participants : list of str or path
        ``participant_id`` per volume (``sub-<label>``), or a participants TSV whose rows are in
        volume order.
    contrast : str
        Contrast label of every volume.
    variance : path, optional
        A 4D variance file with the same volumes.
    """
    header = read_header(path)
    if isinstance(participants, (str, os.PathLike)) and os.path.isfile(participants):
        ids = read_participants(participants)["participant_id"].tolist()
    else:
        ids = [str(p) for p in participants]
    if len(ids) != header.n_volumes:
        raise MapDiscoveryError(f"{path}: {header.n_volumes} volumes but {len(ids)} participants given; "
                                "give one participant per volume, in volume order")
    maps = pd.DataFrame({"participant_id": ids, "contrast": contrast, "path": os.fspath(path),
                         "volume": np.arange(len(ids))})
    if variance is not None:
        vh = read_header(variance)
        if vh.n_volumes != header.n_volumes:
            raise MapDiscoveryError(f"{variance}: {vh.n_volumes} volumes, but {path} has {header.n_volumes}")
        maps["variance_path"] = os.fspath(variance)
    return _validate_maps(maps, source=os.fspath(path))


def read_participants(path: str | os.PathLike) -> pd.DataFrame:
    """Read a BIDS ``participants.tsv`` (``participant_id`` = ``sub-<label>``, ``n/a`` missing).

    Returns
    -------
    DataFrame keyed by the ``participant_id`` column (labels stay strings).
    """
    table = read_table(path, label_columns=("participant_id",))
    if "participant_id" not in table.columns:
        raise MapDiscoveryError(f"{path}: no participant_id column; found {list(table.columns)}")
    bad = [p for p in table["participant_id"] if not str(p).startswith("sub-")]
    if bad:
        raise MapDiscoveryError(f"{path}: participant_id must be sub-<label>, found {bad[:5]}")
    dup = table.loc[table["participant_id"].duplicated(), "participant_id"].tolist()
    if dup:
        raise MapDiscoveryError(f"{path}: participant_id repeats: {dup[:5]}")
    return table


# --------------------------------------------------------------------------------------------------
# The voxel-to-region index and the per-map kernel
# --------------------------------------------------------------------------------------------------


@dataclass
class _Index:
    """Everything a worker needs to summarise one map for all regions (built once per grid)."""

    uniq: np.ndarray  # sorted unique flat voxel indices covered by any region
    member: np.ndarray  # for each (region, voxel) membership entry, its position in `uniq`
    offsets: np.ndarray  # membership entries of region r are [offsets[r], offsets[r+1])
    seg: np.ndarray  # region number of each membership entry
    count: sp.csr_matrix  # regions x uniq, ones
    weight: sp.csr_matrix | None  # regions x uniq, voxel weights (probability regions), else None
    n_voxels: np.ndarray
    keep: np.ndarray | None = None  # positions in `uniq` whose voxel values are returned too (functional regions)
    region_of: np.ndarray | None = None  # region of each position in `uniq` when no voxel is in two regions
    entries: np.ndarray | None = None  # membership entries per region (row sums of `count`), int64

    @classmethod
    def build(cls, regions: RealisedRegions, *, weighted: bool) -> "_Index":
        vox = list(regions.voxels)
        lengths = np.array([len(v) for v in vox], dtype=np.int64)
        allv = np.concatenate(vox) if vox else np.empty(0, dtype=np.int64)
        uniq, member = np.unique(allv, return_inverse=True)
        offsets = np.r_[0, np.cumsum(lengths)]
        seg = np.repeat(np.arange(len(vox)), lengths)
        n_regions = len(vox)
        ones = np.ones(len(allv), dtype=np.float64)
        count = sp.csr_matrix((ones, (seg, member)), shape=(n_regions, len(uniq)))
        weight = None
        if weighted and any(w is not None for w in regions.weights):
            w = np.concatenate([np.ones(len(v)) if wt is None else wt for v, wt in zip(vox, regions.weights)])
            weight = sp.csr_matrix((w, (seg, member)), shape=(n_regions, len(uniq)))
        region_of = None
        if len(uniq) == len(allv):  # every voxel in one region only (an atlas): counts need no matrix product
            region_of = np.empty(len(uniq), dtype=np.intp)
            region_of[member] = seg
        entries = np.rint(np.asarray(count.sum(axis=1)).ravel()).astype(np.int64)
        return cls(uniq.astype(np.int64), member.astype(np.int64), offsets, seg, count, weight, lengths,
                   region_of=region_of, entries=entries)

    def invalid_counts(self, bad: np.ndarray) -> np.ndarray:
        """Membership entries per region at the positions ``bad`` (indices into `uniq`), exact integers."""
        if len(bad) == 0:
            return np.zeros(len(self.entries), dtype=np.int64)
        if self.region_of is not None:
            return np.bincount(self.region_of[bad], minlength=len(self.entries)).astype(np.int64)
        flags = np.zeros(self.count.shape[1])
        flags[bad] = 1.0
        return np.rint(self.count @ flags).astype(np.int64)


def _summarise(x: np.ndarray, index: _Index, *, statistic: str, keep_zeros: bool, want_valid: bool = True):
    """Region values and valid counts for one map's gathered voxels ``x`` (aligned with index.uniq).

    Valid counts are the region's entries minus those at invalid positions (exact integers; no product over
    every voxel when few are invalid). Sums are ``index.count @ x``: a sequential sum per region in the matrix's
    order, so every value keeps its last bit whatever else changes here. ``valid`` (a boolean per position) is
    returned when ``want_valid`` or when a statistic other than the mean needs it, else None.
    """
    x = np.asarray(x, dtype=np.float64)
    valid = None
    # the plain mean's sums first: all finite exactly when no region voxel is NaN or infinite (float32 voxels
    # cannot overflow a float64 sum; a float64 overflow only sends the map down the general path, same result)
    plain = statistic == "mean" or (statistic == "weighted-mean" and index.weight is None)
    sums = index.count @ x if plain else None
    if np.isfinite(x.sum() if sums is None else sums).all():  # the common case, checked once
        if keep_zeros:
            bad = np.empty(0, dtype=np.intp)
        else:
            bad = np.flatnonzero(x == 0)
        xz = x  # zeros add nothing to the sums
        if want_valid or statistic != "mean":
            valid = np.ones(len(x), dtype=bool)
            valid[bad] = False
    else:
        valid = np.isfinite(x)
        if not keep_zeros:
            valid &= x != 0
        xz = np.where(valid, x, 0.0)
        bad = np.flatnonzero(~valid)
        sums = None
    n_valid = index.entries - index.invalid_counts(bad)
    with np.errstate(invalid="ignore", divide="ignore"):
        if plain:
            value = (index.count @ xz if sums is None else sums) / n_valid
        elif statistic == "weighted-mean":
            validf = valid.astype(np.float64)
            value = (index.weight @ xz) / (index.weight @ validf)
        else:
            # order statistics: sort each region's values, invalid ones (+inf) last
            xm = np.where(valid, x, np.inf)[index.member]
            order = np.lexsort((xm, index.seg))
            xs = xm[order]
            starts = index.offsets[:-1]
            c = n_valid
            has = c > 0
            value = np.full(len(c), np.nan)
            if statistic == "median":
                lo = starts + (c - 1) // 2
                hi = starts + c // 2
                value[has] = 0.5 * (xs[lo[has]] + xs[hi[has]])
            elif statistic == "trimmed-mean":
                # scipy.stats.trim_mean convention: int(proportion * n) values cut from each end
                g = np.floor(TRIM * c).astype(np.int64)
                csum = np.r_[0.0, np.cumsum(np.where(np.isfinite(xs), xs, 0.0))]
                a = starts + g
                b = starts + c - g
                value[has] = (csum[b[has]] - csum[a[has]]) / (b[has] - a[has])
            else:  # pragma: no cover - validated earlier
                raise UsageError(f"unknown statistic {statistic!r}")
    value[n_valid == 0] = np.nan
    return value, n_valid, valid


def _region_variance(v: np.ndarray, valid: np.ndarray, n_valid: np.ndarray, index: _Index, *, path: str,
                     names: Sequence[str]) -> np.ndarray:
    """Mean voxel variance over each region's valid voxels; non-positive or missing variances are an error."""
    v = np.asarray(v, dtype=np.float64)
    bad = valid & ~(np.isfinite(v) & (v > 0))
    if bad.any():
        per_region = np.rint(index.count @ bad.astype(np.float64)).astype(int)
        which = [f"{names[r]} ({per_region[r]})" for r in np.flatnonzero(per_region)][:5]
        raise ImageFormatError(
            f"{path}: {int(bad.sum())} {noun(int(bad.sum()), 'voxel')} with valid effect data have zero, negative or missing variance "
            f"(regions: {', '.join(which)}); a variance map must be positive wherever the effect map has data"
        )
    with np.errstate(invalid="ignore", divide="ignore"):
        out = (index.count @ np.where(valid, v, 0.0)) / n_valid
    out[n_valid == 0] = np.nan
    return out


@dataclass
class _Task:
    path: str
    volume: int | None
    header: MapHeader
    variance_path: str | None
    variance_header: MapHeader | None


#: With a core to spare, a helper thread reads and decompresses the next map while this thread hashes, gathers
#: and summarises the current one (benchmarks/bench_single_core.py measures both ways; False: one thread).
_READ_AHEAD = True


def _helper_thread(n_processes: int):
    """A one-thread executor for :func:`_iter_tasks`, or None when this process should use one core only."""
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # pragma: no cover - not Linux
        cores = os.cpu_count() or 1
    if not _READ_AHEAD or cores <= n_processes:
        return None
    return cf.ThreadPoolExecutor(1, thread_name_prefix="roikit-read-ahead")


def _fetch_flat(header: MapHeader, volume) -> tuple[np.ndarray, bytes | str]:
    """One map's voxels, and its bytes (a whole compressed map: the caller hashes them) or their SHA-256."""
    try:
        with open(header.path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise InputFileError(f"{header.path}: cannot read the map ({exc.strerror or exc}); check that the file "
                             "exists and is readable (permissions)") from None
    if header.n_volumes > 1 or not header.compressed:  # 4D: stream one volume; .nii: memory-map
        return read_flat(header, volume=volume), hashlib.sha256(raw).hexdigest()
    return read_flat(header, volume=volume, raw=raw), raw


def _fetch(header: MapHeader, volume, uniq) -> tuple[np.ndarray, bytes | str]:
    """One map's in-region voxels, and its bytes or their SHA-256 (:func:`_fetch_flat`)."""
    flat, got = _fetch_flat(header, volume)
    return flat[uniq], got


def _digest(bytes_or_digest: bytes | str) -> str:
    if isinstance(bytes_or_digest, str):
        return bytes_or_digest
    return hashlib.sha256(bytes_or_digest).hexdigest()


def _read_gathered(header: MapHeader, volume, uniq) -> tuple[np.ndarray, str]:
    """Read one map, return its in-region voxels and the SHA-256 of the file's bytes."""
    x, got = _fetch(header, volume, uniq)
    return x, _digest(got)


def _iter_tasks(tasks: list[_Task], index: _Index, names: list[str], statistic: str, keep_zeros: bool, *,
                helper: cf.Executor | None = None):
    """Summarise maps in order, yielding each map's result (or the error, with its path).

    With ``helper`` (a one-thread executor), map k + 1 is read and decompressed there while this thread hashes
    map k's bytes, gathers its region voxels and summarises them: libdeflate (called through ctypes), SHA-256, the
    gather and the sparse product all let the other thread run, so on two cores everything but the decompression
    costs little wall time. Same results either way.
    """
    ahead = None
    for k, t in enumerate(tasks):
        # every map file is read through _fetch_flat, effect then variance map, in the maps' order (with a helper,
        # map k + 1's read starts after map k's variance map was read): a read that fails or is interrupted
        # affects that map only, and the maps before it are complete
        error = flat = got = v = vdigest = None
        try:
            if helper is None:
                flat, got = _fetch_flat(t.header, t.volume)
            else:
                future = ahead if ahead is not None else helper.submit(_fetch_flat, t.header, t.volume)
                ahead = None
                flat, got = future.result()
            if t.variance_header is not None:
                v, vdigest = _read_gathered(t.variance_header, t.volume, index.uniq)
        except Exception as exc:  # noqa: BLE001 - returned to the caller with the path; raised there
            error = exc
        if helper is not None and k + 1 < len(tasks):
            ahead = helper.submit(_fetch_flat, tasks[k + 1].header, tasks[k + 1].volume)
        if error is None:
            try:
                x = flat[index.uniq]
                del flat
                digest = _digest(got)
                del got
                value, n_valid, valid = _summarise(x, index, statistic=statistic, keep_zeros=keep_zeros,
                                                   want_valid=t.variance_header is not None)
                variance = None
                if t.variance_header is not None:
                    variance = _region_variance(v, valid, n_valid, index, path=t.variance_path, names=names)
                kept = () if index.keep is None else ((x[index.keep], None if v is None else v[index.keep]),)
                result = ("ok", value, n_valid, variance, digest, vdigest) + kept
            except Exception as exc:  # noqa: BLE001 - returned to the caller with the path; raised there
                error = exc
        if error is not None:
            result = ("error", _portable(error, t.path))
        yield result


def _run_tasks(tasks: list[_Task], index: _Index, names: list[str], statistic: str, keep_zeros: bool, *,
               helper: cf.Executor | None = None) -> list:
    """Worker entry point: summarise a batch of maps; returns per-map results (or the error, with its path)."""
    return list(_iter_tasks(tasks, index, names, statistic, keep_zeros, helper=helper))


def _portable(exc: Exception, path: str) -> Exception:
    """A copy of ``exc`` that survives pickling back from a worker (no chained causes from C extensions)."""
    if isinstance(exc, RoikitError):
        try:
            return type(exc)(str(exc))
        except TypeError:  # pragma: no cover - a subclass with another signature
            pass
    return ExtractionError(f"{path}: {type(exc).__name__}: {exc}")


# Per-process state for pools started by extract(): the index travels once per worker, not per task.
_WORKER_STATE: dict = {}


def _init_worker(index, names, statistic, keep_zeros, parent=None, n_processes=None):
    _watch_parent(parent)
    _WORKER_STATE.update(index=index, names=names, statistic=statistic, keep_zeros=keep_zeros,
                         helper=None if n_processes is None else _helper_thread(n_processes))


def stop_pool(pool: cf.ProcessPoolExecutor) -> None:
    """Stop a process pool now: cancel what waits, terminate the workers, SIGKILL any that outlive SIGTERM.

    The processes are taken before ``shutdown()``, which forgets them.
    """
    processes = list((getattr(pool, "_processes", None) or {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for proc in processes:
        with contextlib.suppress(Exception):
            proc.terminate()
    for proc in processes:  # a worker that outlives SIGTERM (handled or blocked there) gets SIGKILL
        with contextlib.suppress(Exception):
            proc.join(timeout=1.0)
            if proc.is_alive():
                proc.kill()


def _watch_parent(parent: int | None, *, every: float = 0.5) -> None:
    """Make a pool worker leave when the process that started it dies (even by SIGKILL), and ignore Ctrl-C.

    Without this, a killed ``roikit`` leaves its workers blocked on their task pipe forever. Linux: the kernel
    sends SIGTERM on the parent's death (``prctl(PR_SET_PDEATHSIG)``). Everywhere: a daemon thread checks every
    ``every`` seconds that the parent process id is unchanged (an orphan is adopted by another process) and
    ends the worker otherwise. Ctrl-C reaches the whole process group; the parent handles it (keeps what was
    extracted, stops the workers), so workers ignore it.
    """
    import signal
    import sys
    import threading

    with contextlib.suppress(ValueError, OSError):  # only possible in the main thread
        signal.signal(signal.SIGINT, signal.SIG_IGN)
    if parent is None:
        parent = os.getppid()
    if sys.platform.startswith("linux"):
        with contextlib.suppress(Exception):
            import ctypes

            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(1, int(signal.SIGTERM), 0, 0, 0)  # 1 = PR_SET_PDEATHSIG
    if os.getppid() != parent:  # the parent died before the line above took effect
        os._exit(1)

    def watch():
        while True:
            time.sleep(every)
            if os.getppid() != parent:
                os._exit(1)

    threading.Thread(target=watch, name="roikit-parent-watch", daemon=True).start()


def _run_tasks_in_worker(tasks):
    s = _WORKER_STATE
    args = (tasks, s["index"], s["names"], s["statistic"], s["keep_zeros"])
    helper = s.get("helper")
    return _run_tasks(*args) if helper is None else _run_tasks(*args, helper=helper)


# --------------------------------------------------------------------------------------------------
# extract()
# --------------------------------------------------------------------------------------------------


def _progress(total: int, progress: bool | None, desc: str):
    # shown only on a terminal and as a widget in Jupyter (roikit._options.progress_bar)
    show = not (progress is False or (progress is None and total < 20))
    return progress_bar(show=show, total=total, desc=desc, unit="map", leave=False)


def _headers(maps: pd.DataFrame, *, atol: float):
    """Read every header, check that all maps and variance maps share one grid."""
    tasks, first, first_path = [], None, None
    for row in maps.itertuples(index=False):
        d = row._asdict()
        h = read_header(d["path"])
        vol = d.get("volume")
        vol = None if vol is None or pd.isna(vol) else int(vol)
        if h.n_volumes > 1 and vol is None:
            raise ImageFormatError(f"{h.path}: a 4D file with {h.n_volumes} volumes; choose one with a `volume` "
                                   "column in the map list (or maps_from_4d)")
        if first is None:  # regions are realised on this grid: its data must be complete before anything is built
            verify_data(h)
            first, first_path = h.grid, h.path
        check_same_grid(first, h.grid, a_name=first_path, b_name=h.path, atol=atol)
        vh = None
        vp = d.get("variance_path")
        if vp is not None and not (isinstance(vp, float) and np.isnan(vp)):
            vh = read_header(vp)
            check_same_grid(h.grid, vh.grid, a_name=h.path, b_name=vh.path, atol=atol)
            if vh.n_volumes != h.n_volumes:
                raise ImageFormatError(f"{vp}: {vh.n_volumes} {noun(vh.n_volumes, 'volume')}, but its effect map {h.path} has {h.n_volumes}")
        tasks.append(_Task(h.path, vol, h, vp if vh is not None else None, vh))
    return tasks, first


def extract(
    maps: pd.DataFrame,
    regions: RegionSet | RealisedRegions,
    *,
    statistic: Literal["mean", "median", "trimmed-mean", "weighted-mean"] = "mean",
    keep_zeros: bool = False,
    n_jobs: int = 1,
    executor: cf.Executor | None = None,
    client=None,
    batch_size: int | None = None,
    progress: bool | None = None,
    atol: float = DEFAULT_ATOL,
    functional: Sequence = (),
    functional_contrasts: Sequence[str] | None = None,
    _sink=None,
    _chunk_maps: int = 64,
    _keep: tuple | None = None,
) -> pd.DataFrame:
    """Summarise every map over every region, reading each map once.

    Parameters
    ----------
    maps : DataFrame
        A maps table (:func:`find_maps`, :func:`read_map_list`, :func:`maps_from_4d`).
    regions : RegionSet or RealisedRegions
        Regions; a RegionSet is realised on the maps' grid (resampling region images if needed).
    statistic : {"mean", "median", "trimmed-mean", "weighted-mean"}
        Summary over a region's valid voxels. ``trimmed-mean`` cuts 20% from each end
        (``int(0.2 n)`` values, as ``scipy.stats.trim_mean``); ``weighted-mean`` weights voxels by
        probability for probability regions (plain mean elsewhere).
    keep_zeros : bool
        If false (default), voxels exactly 0 are treated as missing (many packages write 0
        outside their analysis mask). NaN is always missing.
    n_jobs : int
        Worker processes (1: in this process).
    executor : concurrent.futures.Executor, optional
        Run batches of maps on this executor instead (threads, processes, or a distributed engine's
        executor); ``n_jobs`` is then ignored.
    client : dask.distributed.Client, optional
        Run batches of maps on a Dask cluster (optional ``distributed`` extra). The voxel-to-region index
        is sent to every worker once; results come back in order.
    batch_size : int, optional
        Maps per task with workers (default: about sixteen tasks per worker, at most 64 maps each).
    progress : bool, optional
        Show a progress bar (default: only for 20 maps or more).
    atol : float
        Tolerance (mm) when comparing affines.
    functional : sequence of FunctionalRegion, optional
        Participant-specific regions (:class:`roikit.functional.FunctionalRegion`); their rows
        (:func:`roikit.functional.extract_functional`) follow the other regions', with the columns of
        ``FUNCTIONAL_COLUMNS``. The circularity guard runs before any map is read; the search spaces' voxels
        come from the same read as the regions' (no map is read twice).
    functional_contrasts : sequence of str, optional
        The contrasts measured over the functional regions (default: every contrast of ``maps``).

    Returns
    -------
    DataFrame
        The region values table: ``participant_id``, ``session_id`` (when the maps have sessions),
        ``run_id`` (when they have runs), ``contrast``, ``region``, ``value``, ``n_voxels``, ``n_valid``,
        ``variance`` (with variance maps). One row per map x region, maps sorted by participant, session and
        contrast, regions in the region set's order; then the functional regions' rows. Provenance is in
        ``.attrs["roikit"]`` (JSON-able dict).

    Raises
    ------
    RoikitError
        After every map was tried: the one failure (its message names the file), or an
        :class:`~roikit.errors.ExtractionError` listing several. The exception's ``partial_values``
        holds the table with the failed maps' rows n/a, so nothing that succeeded is lost.

    Notes
    -----
    Checked against a naive per-region numpy computation for every statistic (tests), and against
    ``scipy.stats.trim_mean`` for the trimmed mean.

    Examples
    --------
    >>> values = extract(find_maps("maps/sub-{subject}_contrast-{contrast}_effect.nii.gz"),
    ...                  RegionSet([Sphere("prior peak", (30, -20, -14), 6)]))  # doctest: +SKIP
    """
    if statistic not in STATISTICS:
        raise UsageError(f"statistic must be one of {', '.join(STATISTICS)}; got {statistic!r}")
    if not isinstance(n_jobs, (int, np.integer)) or n_jobs < 1:
        raise UsageError(f"n_jobs must be a positive integer, got {n_jobs!r}")
    maps = _validate_maps(maps, source="maps table")
    functional = list(functional or ())
    if functional:  # the circularity guard and the definitions' checks: before any map is read
        from .functional import _check_definitions

        if _sink is not None or _keep is not None:
            raise UsageError("functional regions are not written as extraction goes; extract, then write_values")
        _check_definitions(maps, functional, contrasts=functional_contrasts, region_names=None)
    tasks, grid = _headers(maps, atol=atol)
    if isinstance(regions, RegionSet):
        region_sources = regions.describe()
        realised = regions.realise(grid, atol=atol)
    elif isinstance(regions, RealisedRegions):
        region_sources = None
        realised = regions
        if not realised.grid.matches(grid, atol=atol):
            raise UsageError("regions were realised on another grid than the maps'; pass the RegionSet instead")
    else:
        raise UsageError(f"regions must be a RegionSet or RealisedRegions, got {type(regions).__name__}")
    if functional:
        from .functional import _check_definitions, search_voxels

        _check_definitions(maps, functional, contrasts=functional_contrasts, region_names=list(realised.names))
        _keep = (search_voxels(realised, functional), {})
    index = _Index.build(realised, weighted=statistic == "weighted-mean")
    if _keep is not None:  # (flat voxels, sink): also return these voxels' values per map (a single read)
        index.keep = np.searchsorted(index.uniq, np.asarray(_keep[0], dtype=np.int64))
        if not np.array_equal(index.uniq[np.minimum(index.keep, len(index.uniq) - 1)], _keep[0]):
            raise UsageError("voxels to keep must belong to the regions")  # pragma: no cover - internal use
    names = list(realised.names)
    n_regions, n_maps = len(names), len(tasks)

    # _sink (private; write_values_streaming): the table goes out in pieces of _chunk_maps maps, in order, and
    # only one piece is ever held, so memory does not grow with the number of maps
    rows = n_maps if _sink is None else max(1, min(n_maps, int(_chunk_maps)))
    values = np.full((rows, n_regions), np.nan)
    n_valid = np.zeros((rows, n_regions), dtype=np.int32)
    has_var = "variance_path" in maps.columns
    variances = np.full((rows, n_regions), np.nan) if has_var else None
    digests: list = [None] * n_maps
    vdigests: list = [None] * n_maps
    done = np.zeros(n_maps, dtype=bool)
    piece = {"start": 0}
    empties: list[pd.DataFrame] = []
    if _sink is not None:  # the same categories in every piece (one schema for every row group)
        categories = {c: pd.Categorical([str(v) for v in maps[c].dropna().tolist()]).categories
                      for c in ("participant_id", "session_id", "contrast") if c in maps.columns}
        categories["region"] = pd.Categorical([str(n) for n in names]).categories

    def flush(upto: int):
        start = piece["start"]
        part = assemble_values(maps.iloc[start:upto], names, realised.n_voxels, values[:upto - start],
                               n_valid[:upto - start], variances[:upto - start] if has_var else None)
        for c, cats in categories.items():
            part[c] = part[c].cat.set_categories(cats)
        _sink(part)
        empties.append(part[part["n_valid"] == 0])
        values.fill(np.nan)
        n_valid.fill(0)
        if has_var:
            variances.fill(np.nan)
        piece["start"] = upto

    failures: list[tuple[int, BaseException]] = []

    def collect(start: int, results: list):
        for offset, res in enumerate(results):
            i = start + offset
            if res[0] == "error":
                failures.append((i, res[1]))
            else:
                _, value, nv, var, dig, vdig, *kept = res
                if kept and _keep is not None:
                    _keep[1][i] = kept[0]
                j = i - piece["start"]
                values[j], n_valid[j] = value, nv
                if has_var:
                    variances[j] = var
                digests[i], vdigests[i] = dig, vdig
                done[i] = True
            if _sink is not None and (i + 1 - piece["start"] == rows or i + 1 == n_maps):
                flush(i + 1)

    bar = _progress(n_maps, progress, "extracting")
    try:
        if client is not None:
            # a distributed engine (dask.distributed Client): the index travels once to every worker
            index_ref = client.scatter(index, broadcast=True)
            size = batch_size or _batch_size(n_maps, len(client.scheduler_info()["workers"]))
            batches = [(s, tasks[s:s + size]) for s in range(0, n_maps, size)]
            _stream(lambda batch: client.submit(_run_tasks, batch, index_ref, names, statistic, keep_zeros,
                                                pure=False),
                    batches, collect, bar, max_in_flight=2 * max(1, len(client.scheduler_info()["workers"])))
        elif executor is None and n_jobs == 1:
            helper = _helper_thread(1)
            try:
                for i, result in enumerate(_iter_tasks(tasks, index, names, statistic, keep_zeros, helper=helper)):
                    collect(i, [result])
                    bar.update(1)
            finally:
                if helper is not None:
                    helper.shutdown(wait=True, cancel_futures=True)  # at most the one map read ahead
        else:
            size = batch_size or _batch_size(n_maps, n_jobs if executor is None else
                                             getattr(executor, "_max_workers", 2))
            batches = [(s, tasks[s:s + size]) for s in range(0, n_maps, size)]
            if executor is None:
                with cf.ProcessPoolExecutor(n_jobs, initializer=_init_worker,
                                            initargs=(index, names, statistic, keep_zeros, os.getpid(), n_jobs)) as pool:
                    try:
                        _stream(lambda batch: pool.submit(_run_tasks_in_worker, batch), batches, collect, bar,
                                max_in_flight=2 * n_jobs)
                    except BaseException:  # an interrupt: stop the workers now instead of finishing their batches
                        stop_pool(pool)
                        raise
            else:
                _stream(lambda batch: executor.submit(_run_tasks, batch, index, names, statistic, keep_zeros),
                        batches, collect, bar, max_in_flight=2 * max(1, getattr(executor, "_max_workers", 2)))
    except KeyboardInterrupt as exc:
        # keep what was finished: the caller (e.g. the study cache) can store it before giving up
        exc.partial_values = (None if _sink is not None else
                              assemble_values(maps, names, realised.n_voxels, values, n_valid, variances))
        exc.completed = np.flatnonzero(done).tolist()
        exc.inputs = _input_records(maps, tasks, digests, vdigests)
        raise
    finally:
        bar.close()

    if _sink is not None:  # streamed: what is returned is the table's first rows only (columns, provenance)
        table = assemble_values(maps.iloc[:0], names, realised.n_voxels, values[:0], n_valid[:0],
                                variances[:0] if has_var else None)
    else:
        table = assemble_values(maps, names, realised.n_voxels, values, n_valid, variances)
    if failures:
        _raise_failures(failures, tasks, None if _sink is not None else table,
                        _input_records(maps, tasks, digests, vdigests))
    _warn_empty(pd.concat([table, *empties]) if empties else table)
    _warn_identical(maps, tasks, digests)
    table.attrs["roikit"] = {
        "kind": "region values",
        "roikit_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "statistic": statistic,
        "trim_proportion": TRIM if statistic == "trimmed-mean" else None,
        "keep_zeros": keep_zeros,
        "missing_rule": "NaN voxels are missing" + ("" if keep_zeros else "; voxels exactly 0 are missing"),
        "region_sources": region_sources,
        **realised.provenance(),
        "inputs": _input_records(maps, tasks, digests, vdigests),
    }
    if functional:
        from .functional import extract_functional

        gathered = {(row["path"], task.volume): _keep[1][i]
                    for i, (row, task) in enumerate(zip(maps.to_dict("records"), tasks)) if i in _keep[1]}
        froi = extract_functional(maps, realised, functional, contrasts=functional_contrasts, statistic=statistic,
                                  keep_zeros=keep_zeros, atol=atol, _gathered=gathered)
        provenance = table.attrs["roikit"]
        provenance["functional"] = froi.attrs["roikit"]["functional"]
        if froi.attrs["roikit"]["circular_regions"]:
            provenance["circular_regions"] = froi.attrs["roikit"]["circular_regions"]
        table = pd.concat([table, froi], ignore_index=True, sort=False)
        table.attrs["roikit"] = provenance
    return table


def _input_records(maps: pd.DataFrame, tasks, digests, vdigests) -> list[dict]:
    """Provenance of every input map: labels, path, volume, SHA-256 of the bytes read (None: not read)."""
    return [
        {k: v for k, v in {
            "participant_id": r.participant_id, "contrast": r.contrast,
            "session_id": getattr(r, "session_id", None), "path": t.path, "volume": t.volume,
            "sha256": d, "variance_path": t.variance_path, "variance_sha256": vd}.items() if v is not None}
        for r, t, d, vd in zip(maps.itertuples(index=False), tasks, digests, vdigests)
    ]


def _batch_size(n_maps: int, n_workers: int) -> int:
    """Maps per task: about sixteen tasks per worker, 1 to 64 maps each.

    Few round trips, and the last tasks are small enough that no worker waits long for another: with four tasks per
    worker, 600 maps on 2 workers ended with one worker alone on a 64-map batch (1.74x over one process; 16 per
    worker: see benchmarks/bench_single_core.py).
    """
    return int(min(64, max(1, n_maps // (16 * max(1, n_workers)))))


def _stream(submit, batches, collect, bar, *, max_in_flight: int):
    """Submit batches with a bounded number in flight (flat memory); collect results in map order.

    A batch whose task fails as a whole (a worker died, a result could not travel back) is recorded
    as a failure of each of its maps; the other batches' results are kept.
    """
    pending: dict[int, object] = {}
    queue = list(batches)
    sizes = {start: len(batch) for start, batch in queue}
    order = [start for start, _ in queue]
    queue.reverse()

    def submit_one():
        if queue:
            start, batch = queue.pop()
            pending[start] = submit(batch)

    for _ in range(max(1, max_in_flight)):
        submit_one()
    for start in order:
        future = pending.pop(start)
        try:
            results = future.result()
        except Exception as exc:  # noqa: BLE001 - recorded per map, raised after all maps are done
            results = [("error", exc)] * sizes[start]
        collect(start, results)
        bar.update(sizes[start])
        submit_one()


def _raise_failures(failures, tasks, table: pd.DataFrame, inputs: list | None = None):
    """Raise after all maps are done: one failure re-raised as is, several as one ExtractionError.

    Either way the exception carries ``partial_values`` (the table with the failed maps' rows n/a),
    ``failures`` (path, exception) pairs, ``completed`` (positions of the maps that were extracted) and
    ``inputs`` (their provenance records), so a long run loses nothing that succeeded.
    """
    listed = [(tasks[i].path, exc) for i, exc in failures]
    if len(listed) == 1:
        exc = listed[0][1]
        task = tasks[failures[0][0]]
        if not any(p and p in str(exc) for p in (task.path, task.variance_path)):
            exc = ExtractionError(f"{listed[0][0]}: {exc}")
    else:
        shown = "; ".join(f"{p}: {e}" for p, e in listed[:3])
        more = f"; and {len(listed) - 3} more" if len(listed) > 3 else ""
        exc = ExtractionError(f"{len(listed)} of {len(tasks)} maps failed, the others were extracted: {shown}{more}")
    exc.partial_values = table
    exc.failures = listed
    failed = {i for i, _ in failures}
    exc.completed = [i for i in range(len(tasks)) if i not in failed]
    exc.inputs = inputs
    raise exc


def assemble_values(maps: pd.DataFrame, names, n_voxels, values, n_valid, variances=None) -> pd.DataFrame:
    """The region values table from per-map arrays (maps x regions), in the maps' then the regions' order.

    Used by :func:`extract` and by callers that merge cached and fresh results (``roikit run``).

    The table is lean in memory (28 bytes per row instead of 231, by memory_usage(deep=True)): ``participant_id``,
    ``session_id``, ``contrast`` and ``region`` are categorical (their categories sorted as strings, so sorting
    and grouping give the same order as plain strings would), ``n_voxels`` and ``n_valid`` are int32. ``value``
    and ``variance`` stay float64: they are computed in float64 from the maps, and storing them as float32
    would change every written digit and every statistic.
    """
    n_maps, n_regions = values.shape
    cols = {}
    for c in ("participant_id", "session_id", "contrast", "run_id"):
        if c in maps.columns:
            labels = pd.Categorical([None if v is None or (isinstance(v, float) and v != v) else str(v)
                                     for v in maps[c].tolist()])
            cols[c] = pd.Categorical.from_codes(np.repeat(labels.codes, n_regions), dtype=labels.dtype)
    regions = pd.Categorical([str(n) for n in names])
    cols["region"] = pd.Categorical.from_codes(np.tile(regions.codes, n_maps), dtype=regions.dtype)
    cols["value"] = np.asarray(values, dtype=np.float64).ravel()
    cols["n_voxels"] = np.tile(np.asarray(n_voxels, dtype=np.int32), n_maps)
    cols["n_valid"] = np.asarray(n_valid, dtype=np.int32).ravel()
    if variances is not None:
        cols["variance"] = np.asarray(variances, dtype=np.float64).ravel()
    return pd.DataFrame(cols)


def _map_label(row) -> str:
    session = getattr(row, "session_id", None)
    return " ".join(str(x) for x in (row.participant_id, session, row.contrast) if x is not None and x == x)


def _warn_identical(maps: pd.DataFrame, tasks, digests) -> None:
    """Warn when maps of different participants/contrasts have identical bytes (same SHA-256 and volume)."""
    groups: dict = {}
    for row, task, digest in zip(maps.itertuples(index=False), tasks, digests):
        if digest is not None:
            groups.setdefault((digest, task.volume), []).append((_map_label(row), task.path))
    same = [(key, members) for key, members in groups.items() if len(members) > 1]
    if not same:
        return
    parts = [f"sha256 {digest[:16]}...: " + ", ".join(f"{label} ({path})" for label, path in members[:6])
             + (f" and {len(members) - 6} more" if len(members) > 6 else "")
             for (digest, _vol), members in same[:5]]
    warnings.warn(
        f"{sum(len(m) for _k, m in same)} maps are byte-for-byte identical to another map of a different "
        f"participant or contrast (a copy or a wrong link?): " + "; ".join(parts)
        + ("" if len(same) <= 5 else f"; and {len(same) - 5} more {noun(len(same) - 5, 'group')}")
        + "; check the files: identical maps would enter the statistics as separate observations",
        InputWarning,
        stacklevel=3,
    )


def _warn_empty(table: pd.DataFrame) -> None:
    empty = table[table["n_valid"] == 0]
    if len(empty):
        who = [f"{r.participant_id}/{r.contrast}/{r.region}" for r in empty.itertuples(index=False)]
        shown = ", ".join(who[:12]) + (f" and {len(who) - 12} more" if len(who) > 12 else "")
        warnings.warn(CoverageWarning(
            f"{len(empty)} participant x contrast x region value{'s' if len(empty) != 1 else ''} have no valid "
            f"voxel and are n/a (rows kept): {shown}",
            findings=[{"problem": "no valid voxel: value n/a", "participant_id": r.participant_id,
                       "region": r.region} for r in empty.itertuples(index=False)]), stacklevel=3)


def extract_to_file(path: str | os.PathLike, maps: pd.DataFrame, regions: RegionSet | RealisedRegions, *,
                    overwrite: bool = False, chunk_maps: int = 64, **options) -> tuple[Path, dict]:
    """Extract and write the region values table with its sidecar; a ``.parquet`` path is written as it goes.

    With a ``.parquet`` path the table is never held whole: every ``chunk_maps`` maps become one Parquet row
    group, written to the output folder's staging area and switched into place (with the sidecar, recorded in
    the manifest) only when every map was extracted, so memory does not grow with the number of maps and a
    failure leaves the folder as it was (the exception then carries no ``partial_values``). Any other path:
    :func:`extract` then :func:`write_values`. ``options`` are :func:`extract`'s.

    Returns the path written and a summary: ``rows``, ``missing`` (n/a values), ``regions``, ``maps``.
    """
    from ._outputs import write_files
    from ._tables import _json_bytes, arrow_table, bids_sidecar, is_parquet, parquet_options, sidecar_path

    path = Path(path)
    if not is_parquet(path) or options.get("functional"):  # functional rows come after every map: a whole table
        values = extract(maps, regions, **options)
        written = write_values(path, values, overwrite=overwrite)
        return written, {"rows": len(values), "missing": int(values["value"].isna().sum()),
                         "regions": int(values["region"].nunique()), "maps": len(maps)}
    import pyarrow.parquet as pq

    state: dict = {"rows": 0, "missing": 0, "writer": None}

    def write_table_file(fh):
        def sink(part: pd.DataFrame):
            table = arrow_table(part)
            if state["writer"] is None:
                state["writer"] = pq.ParquetWriter(fh, table.schema, **parquet_options(part))
            state["writer"].write_table(table)
            state["rows"] += len(part)
            state["missing"] += int(part["value"].isna().sum())

        try:
            result = extract(maps, regions, _sink=sink, _chunk_maps=chunk_maps, **options)
        finally:
            if state["writer"] is not None:
                state["writer"].close()
        state["result"] = result

    def write_sidecar_file(fh):
        result = state["result"]
        columns = {c: VALUE_COLUMNS.get(c, "") for c in result.columns}
        sidecar = {"columns": columns, "provenance": result.attrs.get("roikit", {})}
        fh.write(_json_bytes(bids_sidecar(result.columns, sidecar)))

    write_files(path.parent, {path.name: write_table_file, sidecar_path(path).name: write_sidecar_file},
                writer=VALUES_WRITER, overwrite=overwrite)
    result = state["result"]
    return path, {"rows": state["rows"], "missing": state["missing"], "regions": int(result["region"].nunique()
                  if len(result) else len(result["region"].cat.categories)), "maps": len(maps)}


def write_values(path: str | os.PathLike, values: pd.DataFrame, *, overwrite: bool = False) -> Path:
    """Write the region values table as TSV (or Parquet, by suffix) with its JSON sidecar (columns, provenance).

    The table and its sidecar are written as one set and recorded in the folder's manifest, so writing them
    again (a rerun) needs no ``overwrite``; replacing files roikit did not write (or that changed since) does.
    Returns the path written.
    """
    from .functional import FUNCTIONAL_COLUMNS

    columns = {c: {**VALUE_COLUMNS, **FUNCTIONAL_COLUMNS}.get(c, "") for c in values.columns}
    sidecar = {"columns": columns, "provenance": values.attrs.get("roikit", {})}
    return write_table(path, values, sidecar=sidecar, overwrite=overwrite, writer=VALUES_WRITER)
