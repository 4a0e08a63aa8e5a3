"""The regions of a design fitted in chunks: here, one chunk after another, or on a Dask cluster (private).

:func:`fit_regions` is how :func:`roikit.stats.run_design` calls a design. Designs whose tests are per region
(:data:`REGIONWISE`) get the regions in chunks of :data:`CHUNK_REGIONS` in the region order; each chunk is one
call of the design on the rows of its regions, on a worker when a ``distributed.Client`` is given, in this
process otherwise. The chunks are the same in both cases (they depend on the number of regions only, never on
the workers), so a cluster computes exactly what a local run computes, number for number: the batched fits of
the mixed design, for example, pad their arrays to the largest region of a batch, and a region's last bits
could depend on its neighbours if the chunks differed. (Bit-for-bit equality also needs the same numpy, scipy and
BLAS on the workers as here; a cluster of other machines may differ in the last digit where their libraries do.) With at most :data:`CHUNK_REGIONS` regions (and no
client) the design is called once, as it always was.

Results are gathered in chunk order and put back in the design's row order (term by term, or region by region).
Corrections across regions are not a design's business: ``run_design`` applies them after gathering, on the
whole family, as before.

Warnings raised while a chunk is fitted are captured (on the worker) and re-issued here, merged across chunks:
the warning helpers marked :func:`roikit.stats._common.mergeable` (exclusions, low coverage, dropped
observations, diagnostics) record their call instead of warning, and the calls of every chunk become one call
over all regions, so the message is the one a single call would give; any other warning is issued once per
distinct message. A chunk fitted in a worker process holds a lock while it runs, because Python's warning
filters are global to a process: give workers one thread each (``dask worker --nthreads 1 --nworkers N``).
"""

from __future__ import annotations

import importlib
import threading
import warnings
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from ._common import COLUMN_DESCRIPTIONS, _DEFERRED, check_values, region_order

__all__ = ["REGIONWISE", "CHUNK_REGIONS", "fit_regions", "run_captured", "submit_captured", "replay", "validated"]

#: Designs whose every test uses one region's rows only: fitted in chunks of regions. (repeated-measures may take
#: regions as a within factor and region-difference compares regions: they always see every region at once.)
REGIONWISE = frozenset({"one-sample", "paired", "two-group", "glm", "precision-weighted", "mixed", "fixed-effects"})

#: Regions per chunk (per task on a cluster). Fixed, so that a local run and a cluster run fit the same chunks.
CHUNK_REGIONS = 16

#: Options that choose where the work runs, not what is computed (dropped or set to 1 on a worker).
_PLACEMENT = ("executor",)

_LOCK = threading.RLock()  # re-entrant: a design that runs another design in a chunk does not wait on itself


def run_captured(func: Callable, *args, **kwargs) -> tuple[object, list]:
    """``func(*args, **kwargs)`` with its warnings captured: ``(result, stream)``.

    ``stream`` holds, in the order they happened, ``("call", module, name, args, kwargs)`` for each mergeable
    warning helper called and ``("warning", message, category, filename, lineno)`` for each other warning.
    """
    stream: list = []

    def show(message, category, filename, lineno, file=None, line=None):
        stream.append(("warning", message, category, filename, lineno))

    with _LOCK:  # warning filters and showwarning are per process: one captured call at a time
        token = _DEFERRED.set(stream)
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("always")
                warnings.showwarning = show
                result = func(*args, **kwargs)
        finally:
            _DEFERRED.reset(token)
    return result, stream


def _concat_argument(a, b):
    if isinstance(a, pd.DataFrame):
        return pd.concat([a, b], ignore_index=True, sort=False)
    if isinstance(a, np.ndarray):
        return np.concatenate([a, np.asarray(b)])
    return list(a) + list(b)


def replay(streams: Sequence[list]) -> None:
    """Issue the warnings of several chunks' streams (see :func:`run_captured`), merged.

    The n-th call of a mergeable helper with the same keyword arguments in every chunk is one call with the
    positional (per-region) arguments concatenated in chunk order; the n-th warning with the same message in
    every chunk is issued once. Order: first appearance, chunk by chunk.
    """
    merged: dict = {}
    for stream in streams:
        seen: dict = {}
        for item in stream:
            if item[0] == "call":
                _, module, name, args, kwargs = item
                base = ("call", module, name, tuple(sorted((k, repr(v)) for k, v in kwargs.items())))
            else:
                base = ("warning", item[2], str(item[1]))
            occurrence = seen.get(base, 0)
            seen[base] = occurrence + 1
            key = (base, occurrence)
            if key not in merged:
                merged[key] = list(item)
            elif item[0] == "call":
                entry = merged[key]
                entry[3] = tuple(_concat_argument(a, b) for a, b in zip(entry[3], item[3]))
    for entry in merged.values():
        if entry[0] == "call":
            _, module, name, args, kwargs = entry
            helper = getattr(importlib.import_module(module), name)
            getattr(helper, "__wrapped__", helper)(*args, **kwargs)
        else:
            _, message, category, filename, lineno = entry
            warnings.warn_explicit(message, category, filename, lineno)


def _chunks(design: str, regions: list, size: int) -> list[list]:
    if design not in REGIONWISE or len(regions) <= size:
        return [regions]
    return [regions[i:i + size] for i in range(0, len(regions), size)]


def _sorted_by(frame: pd.DataFrame, first: dict, second: dict, a: str, b: str) -> bool:
    keys = np.stack([frame[a].map(first).to_numpy(float), frame[b].map(second).to_numpy(float)], axis=1)
    if np.isnan(keys).any():
        return False
    return bool(np.all(np.diff(keys[:, 0]) >= 0) and np.all((np.diff(keys[:, 0]) > 0) | (np.diff(keys[:, 1]) >= 0)))


def _join(frames: list[pd.DataFrame], regions: list) -> pd.DataFrame:
    """The chunks' rows as one table in the design's order: term by term (regions in order within each term) when
    the design gives its rows that way, else chunk after chunk (region by region)."""
    if len(frames) == 1:
        return frames[0]
    out = pd.concat(frames, ignore_index=True, sort=False)
    if {"term", "region"} <= set(out.columns):
        term_rank = {t: i for i, t in enumerate(pd.unique(out["term"]))}
        region_rank = {r: i for i, r in enumerate(regions)}
        term_major = all(_sorted_by(f, term_rank, region_rank, "term", "region") for f in frames)
        region_major = all(_sorted_by(f, region_rank, term_rank, "region", "term") for f in frames)
        if term_major and not region_major:
            order = np.lexsort((np.arange(len(out)), out["region"].map(region_rank).to_numpy(),
                                out["term"].map(term_rank).to_numpy()))
            out = out.iloc[order].reset_index(drop=True)
    attrs: dict = {}
    for f in frames:
        for key, value in f.attrs.items():
            if isinstance(value, dict) and isinstance(attrs.get(key), dict):
                attrs[key] = {**attrs[key], **value}
            else:
                attrs.setdefault(key, value)
    out.attrs = attrs
    return out


def fit_regions(func: Callable, design: str, values: pd.DataFrame, *, participants, confidence: float,
                options: dict, client=None, chunk_regions: int | None = None,
                given: pd.DataFrame | None = None) -> pd.DataFrame:
    """Run a design on every region, in chunks (see the module docstring); the rows of one call over all regions.

    ``values`` is the validated table (:func:`check_values`); ``given`` the table as the caller gave it (lean:
    categorical labels): chunks are cut from it and validated where they are fitted, so what travels to a worker is
    the lean form, and every chunk is validated the same way here and there. ``client`` (a ``distributed.Client``)
    fits the chunks on its workers, one task per chunk, and gathers them in order; the first failing chunk's error
    is raised (the other tasks are cancelled).
    """
    if chunk_regions is not None and (isinstance(chunk_regions, (bool, np.bool_))
                                      or not isinstance(chunk_regions, (int, np.integer)) or chunk_regions < 1):
        from ..errors import UsageError

        raise UsageError(f"chunk_regions must be a positive integer (regions per chunk), got {chunk_regions!r}")
    size = CHUNK_REGIONS if chunk_regions is None else int(chunk_regions)
    regions = region_order(values)
    chunks = _chunks(design, regions, max(1, size))
    if client is None and len(chunks) == 1:
        return func(values, participants=participants, confidence=confidence, **options)
    source = values if given is None else given
    if len(chunks) == 1:
        parts = [source]
    else:
        column = source["region"]
        if isinstance(column.dtype, pd.CategoricalDtype):  # codes of the categories, not one string per row
            where = pd.Index(regions).get_indexer(column.cat.categories.astype(str))
            codes = np.where(column.cat.codes.to_numpy() >= 0, where[column.cat.codes.to_numpy()], -1)
        else:
            codes = pd.Index(regions).get_indexer(column.astype(str) if column.dtype != object else column)
        bounds = np.cumsum([0] + [len(c) for c in chunks])
        parts = [source[(codes >= lo) & (codes < hi)] for lo, hi in zip(bounds[:-1], bounds[1:])]
    if client is None:
        outs = [_task(func, part, participants, confidence, options) for part in parts]
    else:
        remote = remote_options(options)
        # hash=False: a fresh key each time (the same table scattered by the next analysis must not meet this one's
        # key while it is being released)
        shared = client.scatter(participants, broadcast=True, hash=False) if participants is not None else None
        futures = [client.submit(_task, func, part, shared, confidence, remote, pure=False) for part in parts]
        try:
            outs = [future.result() for future in futures]
        except BaseException:
            client.cancel(futures)
            raise
    results = _join([frame for frame, _ in outs], regions)
    for name, text in (results.attrs.get("column_descriptions") or {}).items():
        COLUMN_DESCRIPTIONS.setdefault(name, text)  # as a design run here registers its dynamic columns
    replay([stream for _, stream in outs])
    return results


def _task(func: Callable, values: pd.DataFrame, participants, confidence: float, options: dict):
    """One chunk (on a worker, or here): validated as ``run_design`` validates the whole table, then fitted."""
    return run_captured(func, check_values(values), participants=participants, confidence=confidence, **options)


def validated(func: Callable, values: pd.DataFrame, **kwargs):
    """``func(check_values(values), **kwargs)``: a lean table travels, the validated one is used."""
    return func(check_values(values), **kwargs)


def _call(func: Callable, args: tuple, kwargs: dict):
    return run_captured(func, *args, **kwargs)


def submit_captured(client, func: Callable, *args, **kwargs):
    """A future of :func:`run_captured` ``(func, *args, **kwargs)`` on the cluster (arguments travel as one tuple
    and one dict, so none is taken for an option of ``client.submit``)."""
    return client.submit(_call, func, args, kwargs, pure=False)


def remote_options(options: dict) -> dict:
    """Design options for a worker: tables named by path are read here (a worker may not see the file); the
    choice of processes or executor stays here (a worker process may not start processes; results are the same
    either way)."""
    out = {k: v for k, v in options.items() if k not in _PLACEMENT}
    if "n_jobs" in out:
        out["n_jobs"] = 1
    from .._tables import read_table

    for name, key in (("contrasts", "contrast"), ("region_table", "region")):
        value = out.get(name)
        if value is not None and not isinstance(value, pd.DataFrame):
            out[name] = read_table(value, label_columns=(key,))
    return out
