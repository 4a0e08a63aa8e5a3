"""Functional regions: each participant's voxels picked from their own localiser map (extraction layer).

A :class:`FunctionalRegion` names a search space (any region of the realised set), a localiser contrast and a
selection rule: the ``top`` N voxels, the top ``"p%"`` of the search space's valid voxels, or the voxels above a
``threshold``. :func:`extract_functional` reads each participant's localiser and tested maps once (only the search
spaces' voxels are kept), selects, and summarises the tested contrast over the participant's own voxels.

Selecting and testing on the same data inflates the effect (circular analysis, "double dipping": Kriegeskorte,
Simmons, Bellgowan & Baker 2009; Vul, Harris, Winkielman & Pashler 2009). :func:`check_circularity` refuses such a
region before any map is read, unless ``circular_ok=True``; ``split="run"`` avoids it by leave-one-run-out: for each
held-out run the voxels are selected on the mean of the other runs' localiser maps (precision-weighted when the
maps have variance maps) and the tested contrast is
measured on the held-out run; the participant's value is the mean over folds.

Conventions (decided here, documented in the values table's sidecar):

- valid voxel: finite, and non-zero unless ``keep_zeros`` (as in :func:`roikit.extraction.extract`);
- ``top = N``: the N valid voxels with the largest localiser values; ``top = "p%"``: ``ceil(p/100 x n)`` of the n
  valid search-space voxels (at least one when n > 0); ``threshold = t``: valid voxels with localiser value > t;
- ties: larger localiser value first, then the smaller flat voxel index (Fortran order) -- deterministic;
- ``n_voxels`` of a functional region's row is the number of voxels selected (with ``split``: the smallest over
  folds), ``n_valid`` those with valid data in the tested map, ``n_search`` the valid voxels of the search space in
  the localiser, ``selected_share`` = ``n_voxels / n_search``; a selection below ``minimum`` voxels gives a value n/a
  (the row is kept and the participant is listed in a warning).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from ._options import _ENTRY, noun, suggest
from .errors import CautionWarning, CircularAnalysisError, CoverageWarning, UsageError
from .extraction import STATISTICS, TRIM, _headers, _read_gathered, _validate_maps
from .images import DEFAULT_ATOL
from .regions import RealisedRegions

__all__ = ["FunctionalRegion", "select_voxels", "check_circularity", "extract_functional", "fold_values",
           "collapse_runs", "FUNCTIONAL_COLUMNS"]

#: Extra columns of the region values table for functional regions (n/a for other regions).
FUNCTIONAL_COLUMNS = {
    "n_search": "Functional regions only: valid voxels of the search space in the participant's localiser map "
                "(with split = \"run\": the smallest over folds).",
    "selected_share": "Functional regions only: n_voxels / n_search, the share of the search space selected.",
    "n_folds": "Folds or runs averaged: held-out runs of a functional region with split = \"run\" (else the tested "
               "contrast's runs, 1 without runs).",
}


@dataclass(frozen=True)
class FunctionalRegion:
    """A participant-specific region: the voxels of ``within`` that respond most to ``localiser``.

    Parameters
    ----------
    name : str
        Name of the functional region (a row label of the values table).
    within : str
        The search space: a region of the realised set.
    localiser : str
        The contrast whose maps pick each participant's voxels.
    top : int or str, optional
        A voxel count (``20``) or a share of the search space's valid voxels (``"10%"``).
    threshold : float, optional
        Select the voxels whose localiser value is above this (instead of ``top``).
    split : {"run"}, optional
        Leave one run out: select on the other runs' mean localiser map, measure on the held-out run.
    circular_ok : bool
        Run even when the localiser shares data with a tested contrast (every output then carries a caution).
    minimum : int
        Selections smaller than this give a value n/a (the participant is listed in a warning); default 1.
    """

    name: str
    within: str
    localiser: str
    top: int | str | None = None
    threshold: float | None = None
    split: str | None = None
    circular_ok: bool = False
    minimum: int = 1

    def __post_init__(self):
        if (self.top is None) == (self.threshold is None):
            raise UsageError(f"functional region {self.name!r}: give exactly one of top (a count such as 20, or a "
                             f"share such as \"10%\") and threshold; found top={self.top!r}, "
                             f"threshold={self.threshold!r}")
        if self.top is not None:
            _parse_top(self.top, self.name)
        if self.threshold is not None and not (isinstance(self.threshold, (int, float))
                                               and not isinstance(self.threshold, bool)
                                               and math.isfinite(self.threshold)):
            raise UsageError(f"functional region {self.name!r}: threshold must be a finite number, got "
                             f"{self.threshold!r}")
        if self.split not in (None, "run"):
            raise UsageError(f"functional region {self.name!r}: split must be \"run\" (or left out), got "
                             f"{self.split!r}")
        if not isinstance(self.minimum, (int, np.integer)) or isinstance(self.minimum, bool) or self.minimum < 1:
            raise UsageError(f"functional region {self.name!r}: minimum must be a whole number from 1, got "
                             f"{self.minimum!r}")

    def describe(self) -> dict:
        """JSON-able record (provenance, methods text)."""
        return {"kind": "functional", **asdict(self), "selection": self.rule()}

    def rule(self) -> str:
        """The selection rule in words, e.g. 'top 10% of the valid voxels of left hippocampus by novel'."""
        if self.threshold is not None:
            how = f"voxels with {self.localiser} > {self.threshold:g}"
        else:
            kind, amount = _parse_top(self.top, self.name)
            how = (f"top {amount:g}% of the valid voxels" if kind == "share" else
                   f"top {int(amount)} {noun(int(amount), 'voxel')}") + f" by {self.localiser}"
        split = "; leave-one-run-out (select on the other runs, measure on the held-out run)" \
            if self.split == "run" else ""
        return f"{how} within {self.within}{split}"


def _parse_top(top, name: str) -> tuple[str, float]:
    """('count', N) or ('share', p) from 20 or "10%"."""
    if isinstance(top, (int, np.integer)) and not isinstance(top, bool):
        if top < 1:
            raise UsageError(f"functional region {name!r}: top must be at least 1 voxel, got {top}")
        return "count", int(top)
    if isinstance(top, str) and top.strip().endswith("%"):
        try:
            p = float(top.strip()[:-1])
        except ValueError:
            p = float("nan")
        if math.isfinite(p) and 0 < p <= 100:
            return "share", p
    raise UsageError(f"functional region {name!r}: top must be a voxel count (top = 20) or a share of the search "
                     f"space between 0 and 100% (top = \"10%\"), got {top!r}")


def select_voxels(localiser: np.ndarray, flat_index: np.ndarray, *, top=None, threshold=None,
                  keep_zeros: bool = False) -> tuple[np.ndarray, int]:
    """Positions of the selected voxels within a search space, and the number of valid voxels.

    Parameters
    ----------
    localiser : ndarray
        The localiser's values at the search space's voxels.
    flat_index : ndarray
        Their flat voxel indices (ties: the smaller index first).
    top : int or str, optional
        Voxel count or share (``"10%"``) of the valid voxels.
    threshold : float, optional
        Select valid voxels with a value above it.
    keep_zeros : bool
        Count exact zeros as data (default: missing).

    Returns
    -------
    (ndarray of int, int)
        Positions into ``localiser`` (sorted by position), and the count of valid voxels.
    """
    x = np.asarray(localiser, dtype=np.float64)
    valid = np.isfinite(x)
    if not keep_zeros:
        valid &= x != 0
    n_valid = int(valid.sum())
    pos = np.flatnonzero(valid)
    if threshold is not None:
        chosen = pos[x[pos] > threshold]
        return np.sort(chosen), n_valid
    kind, amount = _parse_top(top, "selection")
    k = int(amount) if kind == "count" else (max(1, math.ceil(amount / 100.0 * n_valid - 1e-9)) if n_valid else 0)
    k = min(k, n_valid)
    # largest value first, ties by the smaller flat voxel index
    order = np.lexsort((np.asarray(flat_index)[pos], -x[pos]))
    return np.sort(pos[order[:k]]), n_valid


def _summary(x: np.ndarray, statistic: str) -> float:
    if len(x) == 0:
        return float("nan")
    if statistic == "median":
        return float(np.median(x))
    if statistic == "trimmed-mean":
        g = int(np.floor(TRIM * len(x)))
        xs = np.sort(x)
        return float(xs[g:len(x) - g].mean())
    return float(x.mean())  # mean; weighted-mean equals the mean for a selection (binary weights)


def search_voxels(regions: RealisedRegions, functional: Sequence[FunctionalRegion]) -> np.ndarray:
    """Sorted flat voxel indices of every functional region's search space (the voxels a map is gathered at)."""
    names = list(regions.names)
    spaces = [np.asarray(regions.voxels[names.index(f.within)], dtype=np.int64) for f in functional
              if f.within in names]
    return np.unique(np.concatenate(spaces)) if spaces else np.empty(0, np.int64)


def check_circularity(functional: Sequence[FunctionalRegion], tested: Sequence[str], *, has_runs: bool,
                      entry: str | None = None) -> list[str]:
    """Refuse functional regions whose localiser shares data with a tested contrast; return caution texts.

    Refused (:class:`~roikit.errors.CircularAnalysisError`) unless ``circular_ok``: the localiser is itself a tested
    contrast without ``split = "run"``, or, when the maps have runs, any tested contrast from the same runs without
    ``split``. Without runs, a different tested contrast gets a caution (whether it is independent of the localiser
    is the user's argument to make), not a refusal.

    Returns
    -------
    list of str
        One caution per functional region run despite shared data (``circular_ok``) or tested on another contrast
        of the same data.
    """
    cautions = []
    entry = entry or ("cli" if _ENTRY.get() == "cli" else "python")  # the spelling of the fixes: where the user is
    ok_key = {"study": "circular_ok = true", "cli": "circular_ok in --functional"}.get(entry, "circular_ok=True")
    split_key = {"study": 'split = "run"', "cli": "split=run to --functional"}.get(entry, 'split="run"')
    for f in functional:
        if f.split == "run":
            continue
        shared = [c for c in tested if c == f.localiser or has_runs]
        if shared:
            if f.circular_ok:
                cautions.append(f"functional region {f.name!r} selects voxels on {f.localiser!r} and tests "
                                f"{', '.join(repr(c) for c in shared)} on the same data (circular_ok): its results "
                                "are inflated by the selection and describe these data only")
                continue
            raise CircularAnalysisError(
                f"functional region {f.name!r}: its localiser {f.localiser!r} and the tested contrast "
                f"{f.localiser if f.localiser in shared else shared[0]!r} come from the same data, so selecting and "
                f"testing on them is circular (the effect is inflated); add {split_key} (maps with a {{run}} placeholder"
                f"{' in --maps' if entry == 'cli' else ''}{', or maps.run_effect' if entry == 'study' else ''}) "
                f"or use a localiser from "
                f"independent runs ({ok_key} runs it anyway, with a caution)")
        others = [c for c in tested if c != f.localiser]
        if others:
            cautions.append(f"functional region {f.name!r} is selected on {f.localiser!r} and tests "
                            f"{', '.join(repr(c) for c in others)} from the same runs: valid only if the contrasts "
                            "are independent (orthogonal); say why in the methods")
    return cautions


def _combine(runs: list) -> np.ndarray:
    """One localiser map from several runs: the precision-weighted mean when every run has variances, else the mean."""
    pairs = [r if isinstance(r, tuple) else (r, None) for r in runs]
    if len(pairs) == 1:
        return np.asarray(pairs[0][0], dtype=np.float64)
    x = np.array([np.asarray(p[0], dtype=np.float64) for p in pairs])
    if all(p[1] is not None for p in pairs):
        v = np.array([np.asarray(p[1], dtype=np.float64) for p in pairs])
        with np.errstate(divide="ignore", invalid="ignore"):
            w = np.where(np.isfinite(v) & (v > 0), 1.0 / v, np.nan)
            return (w * x).sum(axis=0) / w.sum(axis=0)
    return x.mean(axis=0)


def fold_values(localiser: dict, tested: dict, flat_index: np.ndarray, region: FunctionalRegion, *,
                statistic: str = "mean", keep_zeros: bool = False) -> list[dict]:
    """One participant's folds: select on the localiser, summarise the tested contrast over the selection.

    Parameters
    ----------
    localiser : dict of run to ndarray or (ndarray, ndarray or None)
        The localiser's values at the search space's voxels, per run (key ``None`` without runs); with a pair, the
        second array holds the voxel variances and several runs are combined by their precision-weighted mean
        (inverse-variance weights, voxel by voxel; a voxel with a missing or non-positive variance in any run is
        missing), else by the plain mean.
    tested : dict of run to (ndarray, ndarray or None)
        The tested contrast's values (and voxel variances) at the same voxels, per run.
    flat_index : ndarray
        The search space's flat voxel indices (for ties).
    region : FunctionalRegion

    Returns
    -------
    list of dict
        One per fold: ``held_out`` (the run measured; every tested run without ``split``), ``train_runs``,
        ``n_selected``, ``n_valid``, ``n_search``, ``value``, ``variance``, ``voxels`` (flat indices selected).
        With ``split = "run"`` a fold needs at least one other localiser run; without split the selection uses
        the mean of every localiser run and each tested run is a fold.
    """
    f = region
    folds = []
    for run in sorted(tested, key=lambda r: (r is None, r)):
        train = [r for r in localiser if r != run] if f.split == "run" else list(localiser)
        if not train:
            continue
        loc = _combine([localiser[r] for r in train])
        chosen, n_search = select_voxels(loc, flat_index, top=f.top, threshold=f.threshold, keep_zeros=keep_zeros)
        x, v = tested[run]
        xs = np.asarray(x, dtype=np.float64)[chosen]
        ok = np.isfinite(xs)
        if not keep_zeros:
            ok &= xs != 0
        value = _summary(xs[ok], statistic) if len(chosen) >= f.minimum else float("nan")
        var = float(np.asarray(v, dtype=np.float64)[chosen][ok].mean()) if v is not None and ok.any() \
            else float("nan")
        folds.append({"held_out": run, "train_runs": train if run is not None else None,
                      "n_selected": int(len(chosen)), "n_valid": int(ok.sum()), "n_search": n_search,
                      "value": value, "variance": var, "voxels": np.asarray(flat_index)[chosen].tolist()})
    return folds


def _check_definitions(maps: pd.DataFrame, functional: Sequence[FunctionalRegion], *,
                       contrasts: Sequence[str] | None, region_names: Sequence[str] | None,
                       entry: str | None = None) -> tuple[list[str], list[str]]:
    """Check functional regions against a (validated) maps table before any map is read.

    Names unique, the search space a region of the set (when ``region_names`` is given), the localiser and the
    tested contrasts among the maps', ``split`` only with runs, and the circularity guard. Returns the tested
    contrasts and the cautions of :func:`check_circularity`.
    """
    cli = (entry or _ENTRY.get()) == "cli"
    has_runs = "run_id" in maps.columns
    all_contrasts = list(pd.unique(maps["contrast"]))
    tested = list(contrasts) if contrasts is not None else all_contrasts
    names = list(region_names) if region_names is not None else None
    seen = set()
    for f in functional:
        if not isinstance(f, FunctionalRegion):
            raise UsageError(f"functional regions must be FunctionalRegion, got {type(f).__name__}")
        if f.name in seen or (names is not None and f.name in names):
            raise UsageError(f"functional region {f.name!r}: the name is already used by another region; "
                             "give it its own name")
        seen.add(f.name)
        if names is not None and f.within not in names:
            raise UsageError(f"functional region {f.name!r}: search space within={f.within!r} is not a region of "
                             f"the set{suggest(f.within, names)} (regions: {', '.join(names[:8])}"
                             f"{' ...' if len(names) > 8 else ''})")
        if f.localiser not in all_contrasts:
            raise UsageError(f"functional region {f.name!r}: localiser {f.localiser!r} has no maps"
                             f"{suggest(f.localiser, all_contrasts)} (contrasts found: {', '.join(all_contrasts)})")
        if f.split == "run" and not has_runs:
            raise UsageError(f"functional region {f.name!r}: split=" + ("run" if cli else "\"run\"") + " needs maps "
                             "with runs (a {run} placeholder in " + ("--maps" if cli else "the map pattern") + ", "
                             "or a run_id column in the map list)")
    missing = [c for c in tested if c not in all_contrasts]
    if missing:
        what = "--functional-contrasts" if cli else "tested contrasts"
        raise UsageError(f"{what}: {noun(missing, 'contrast')} {', '.join(repr(m) for m in missing)} "
                         f"{'has' if len(missing) == 1 else 'have'} no maps{suggest(missing[0], all_contrasts)} "
                         f"(found: {', '.join(all_contrasts)})")
    cautions = check_circularity(functional, tested, has_runs=has_runs, entry=entry)
    return tested, cautions


def extract_functional(
    maps: pd.DataFrame,
    regions: RealisedRegions,
    functional: Sequence[FunctionalRegion],
    *,
    contrasts: Sequence[str] | None = None,
    statistic: str = "mean",
    keep_zeros: bool = False,
    atol: float = DEFAULT_ATOL,
    entry: str | None = None,
    _gathered: dict | None = None,
) -> pd.DataFrame:
    """Values of the tested contrasts over each participant's own functional-region voxels.

    Parameters
    ----------
    maps : DataFrame
        A maps table (:func:`roikit.extraction.find_maps`); a ``run_id`` column gives runs.
    regions : RealisedRegions
        The realised regions; every ``within`` must be one of them (on the maps' grid).
    functional : sequence of FunctionalRegion
    contrasts : sequence of str, optional
        The tested contrasts (default: every contrast of ``maps``).
    statistic : {"mean", "median", "trimmed-mean", "weighted-mean"}
        Summary over the selected voxels (``weighted-mean`` is the mean: selections are unweighted).
    keep_zeros : bool
        Count exact zeros as data.

    Returns
    -------
    DataFrame
        Rows like :func:`roikit.extraction.extract`'s (``participant_id``, ``session_id`` with sessions,
        ``contrast``, ``region`` = the functional region's name, ``value``, ``n_voxels``, ``n_valid``, ``variance``
        with variance maps) plus ``n_search``, ``selected_share`` and ``n_folds`` (:data:`FUNCTIONAL_COLUMNS`).
        ``attrs["roikit"]["functional"]`` holds the regions, their rules and every participant's selection per fold;
        ``attrs["roikit"]["circular_regions"]`` the regions run with ``circular_ok``.

    Notes
    -----
    Circularity is checked (:func:`check_circularity`) before any map is read. Each map is read once.
    """
    if statistic not in STATISTICS:
        raise UsageError(f"statistic must be one of {', '.join(STATISTICS)}; got {statistic!r}")
    maps = _validate_maps(maps, source="maps table")
    has_runs = "run_id" in maps.columns
    tested, cautions = _check_definitions(maps, functional, contrasts=contrasts, region_names=list(regions.names),
                                          entry=entry)
    names = list(regions.names)

    needed = set(tested) | {f.localiser for f in functional}
    maps = maps[maps["contrast"].isin(needed)].reset_index(drop=True)
    tasks, grid = _headers(maps, atol=atol)
    if not regions.grid.matches(grid, atol=atol):
        raise UsageError("regions were realised on another grid than the maps'; realise them on the maps' grid")
    spaces = {f.within: np.asarray(regions.voxels[names.index(f.within)], dtype=np.int64) for f in functional}
    uniq = search_voxels(regions, functional)
    where = {w: np.searchsorted(uniq, v) for w, v in spaces.items()}

    # read every needed map once: only the search spaces' voxels are kept
    group_keys = [c for c in ("participant_id", "session_id") if c in maps.columns]
    data: dict = {}
    n_read = 0
    for row, task in zip(maps.to_dict("records"), tasks):
        given = (_gathered or {}).get((row["path"], task.volume))
        if given is not None:  # already read by the region extraction of the same run
            x, v = given
        else:
            n_read += 1
            x, _digest = _read_gathered(task.header, task.volume, uniq)
            v = None
            if task.variance_header is not None:
                v, _ = _read_gathered(task.variance_header, task.volume, uniq)
        v = None if v is None else np.asarray(v, dtype=np.float64)
        key = tuple(row[k] for k in group_keys)
        run = row.get("run_id") if has_runs else None
        data[(key, row["contrast"], run)] = (np.asarray(x, dtype=np.float64), v)
    has_var = "variance_path" in maps.columns

    rows, records, short, empty = [], [], [], []
    groups = list(dict.fromkeys(tuple(r[k] for k in group_keys) for r in maps.to_dict("records")))
    for key in groups:
        for f in functional:
            pos_space = where[f.within]
            flat = spaces[f.within]
            loc_runs = [r for (k, c, r) in data if k == key and c == f.localiser]
            for contrast in tested:
                test_runs = [r for (k, c, r) in data if k == key and c == contrast]
                if not test_runs:
                    continue  # this participant has no map of the contrast (extraction lists missing maps)
                loc = {r: tuple(None if a is None else a[pos_space] for a in data[(key, f.localiser, r)])
                       for r in loc_runs}
                test = {r: tuple(None if a is None else a[pos_space] for a in data[(key, contrast, r)])
                        for r in test_runs}
                folds = fold_values(loc, test, flat, f, statistic=statistic, keep_zeros=keep_zeros)
                pid = dict(zip(group_keys, key))
                label = "/".join(str(k) for k in key)
                if not folds:
                    empty.append(f"{label}/{contrast}/{f.name} (no localiser map" + (", or a single run with split"
                                 if f.split == "run" else "") + ")")
                    n_sel = n_val = n_s = 0
                    value = var = float("nan")
                else:
                    n_sel = min(fo["n_selected"] for fo in folds)
                    n_val = min(fo["n_valid"] for fo in folds)
                    n_s = min(fo["n_search"] for fo in folds)
                    vals = np.array([fo["value"] for fo in folds])
                    value = float(vals.mean()) if np.isfinite(vals).all() else float("nan")
                    vs = np.array([fo["variance"] for fo in folds])
                    # the mean of k independent folds: variance sum / k^2
                    var = float(vs.sum() / len(vs) ** 2) if has_var and np.isfinite(vs).all() else float("nan")
                    if n_sel == 0:
                        empty.append(f"{label}/{contrast}/{f.name}")
                    elif n_sel < f.minimum:
                        empty.append(f"{label}/{contrast}/{f.name} ({n_sel} < minimum {f.minimum})")
                    elif f.top is not None and _parse_top(f.top, f.name)[0] == "count" and n_sel < int(f.top):
                        short.append(f"{label}/{contrast}/{f.name} ({n_sel} of {int(f.top)})")
                row = {**pid, "contrast": contrast, "region": f.name, "value": value, "n_voxels": n_sel,
                       "n_valid": n_val}
                if has_var:
                    row["variance"] = var
                row.update({"n_search": n_s, "selected_share": (n_sel / n_s) if n_s else float("nan"),
                            "n_folds": len(folds)})
                rows.append(row)
                records.append({**pid, "contrast": contrast, "region": f.name, "folds": folds})
    if empty:
        warnings.warn(CoverageWarning(
            f"{len(empty)} functional-region {noun(len(empty), 'selection')} empty or below the minimum: value n/a "
            f"(rows kept): {', '.join(empty[:12])}" + (f" and {len(empty) - 12} more" if len(empty) > 12 else ""),
            findings=[{"problem": "functional region selection empty or below minimum: value n/a",
                       "participant_id": e.split("/")[0], "region": e.split("/")[-1].split(" ")[0]}
                      for e in empty]), stacklevel=2)
    if short:
        warnings.warn(CoverageWarning(
            f"{len(short)} functional-region {noun(len(short), 'selection')} smaller than top asks (too few valid "
            f"voxels in the search space): {', '.join(short[:12])}" + (" ..." if len(short) > 12 else ""),
            findings=[{"problem": "functional region smaller than top", "participant_id": s.split("/")[0]}
                      for s in short]), stacklevel=2)
    for text in cautions:  # each caution names its region first (check_circularity): one line per problem on stderr
        region = next((f.name for f in functional if text.startswith(f"functional region {f.name!r}")), None)
        warnings.warn(CautionWarning(text, findings=[{"problem": "functional region selected on shared data",
                                                      **({"region": region} if region else {})}]), stacklevel=2)
    table = integer_counts(pd.DataFrame(rows))
    table.attrs["roikit"] = {
        "kind": "functional region values",
        "statistic": statistic,
        "keep_zeros": keep_zeros,
        "functional": {"regions": [f.describe() for f in functional], "cautions": cautions,
                       "maps_read": n_read, "maps_from_extraction": len(tasks) - n_read,
                       "localiser_runs_combined_by": "precision-weighted mean (inverse voxel variances)" if has_var
                       else "mean",
                       "ties": "larger localiser value first, then the smaller flat voxel index (Fortran order)",
                       "selections": records},
        "circular_regions": [f.name for f in functional if f.circular_ok and f.split != "run"],
    }
    return table


def integer_counts(table: pd.DataFrame) -> pd.DataFrame:
    """Voxel counts as integers: ``n_voxels``, ``n_valid`` as int64, ``n_search``, ``n_folds`` as nullable integers
    (beside other regions' rows, n/a, they stay whole numbers), whether the rows were computed or cached."""
    for c in ("n_voxels", "n_valid", "n_search", "n_folds"):
        if c in table.columns:
            table[c] = table[c].astype(np.int64 if c in ("n_voxels", "n_valid") else "Int64")
    return table


def collapse_runs(values: pd.DataFrame) -> pd.DataFrame:
    """One row per participant (session), contrast and region: the mean over runs of a values table with ``run_id``.

    Rows without a run (functional regions, already averaged over folds) are kept as they are. For the other
    rows: ``value`` is the mean of the runs' values (n/a when any run's is), ``variance`` the mean of the runs'
    variances divided by the number of runs (the variance of a mean of independent runs), ``n_valid`` the smallest
    over runs, ``n_folds`` the number of runs. Without a ``run_id`` column the table is returned unchanged.
    """
    if "run_id" not in values.columns:
        return values
    attrs = values.attrs
    values = pd.DataFrame(values)  # without attrs: pandas copies them into every intermediate (slow when large)
    has_run = values["run_id"].notna() & (values["run_id"].astype(str) != "nan")
    runs, rest = values[has_run], values[~has_run]
    keys = [c for c in ("participant_id", "session_id", "contrast", "region") if c in values.columns]
    # vectorised: a mean is n/a when any run's value is (count < size); observed=True: only combinations present
    groups = runs.groupby(keys, sort=False, dropna=False, observed=True)
    size = groups["value"].size()
    complete = groups["value"].count() == size
    agg = {"value": groups["value"].mean().where(complete), "n_voxels": groups["n_voxels"].first(),
           "n_valid": groups["n_valid"].min(), "n_folds": size}
    if "variance" in values.columns:
        agg["variance"] = (groups["variance"].mean() / size).where(groups["variance"].count() == size)
    merged = pd.DataFrame(agg).reset_index()
    out = pd.concat([merged, rest.drop(columns=["run_id"])], ignore_index=True, sort=False)
    out = out[[c for c in values.columns if c in out.columns and c != "run_id"]
              + [c for c in out.columns if c not in values.columns]]
    out.attrs = dict(attrs)
    return out
