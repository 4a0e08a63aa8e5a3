"""Regions of interest: an ordered region set built from atlases, masks, spheres and probability maps.

A :class:`RegionSet` is a *description* (sources plus operations such as hemisphere
splitting, intersection, selection, renaming and union). It is realised on a
voxel grid with :meth:`RegionSet.realise`, which returns :class:`RealisedRegions`: the
voxels of each region as sorted flat indices in the grid's Fortran order (plus
weights for probability regions). Regions may overlap; nothing is stored as one
dense volume per region, so hundreds of regions cost a few megabytes.

Region images on another grid than the target are resampled with nearest
neighbour through the two affines (:func:`roikit.images.resample_nearest`);
this is announced once per image with a :class:`ResamplingWarning` and
recorded in :attr:`RealisedRegions.resampling`.

Examples
--------
>>> from roikit.regions import RegionSet, Sphere
>>> from roikit.images import Grid
>>> import numpy as np
>>> grid = Grid((61, 73, 61), np.array([[-3, 0, 0, 90], [0, 3, 0, -126], [0, 0, 3, -72], [0, 0, 0, 1.0]]))
>>> regions = RegionSet([Sphere("prior peak", center=(30.0, -20.0, -14.0), radius=6.0)]).realise(grid)
>>> regions.names
['prior peak']
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass, field
from typing import Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from ._options import noun
from ._tables import read_table
from .errors import (LabelTableWarning, RegionError, RegionOverlapWarning, ResamplingWarning, RoikitDeprecationWarning,
                     RoikitWarning, UsageError)
from .images import DEFAULT_ATOL, Grid, check_overlap, load_map, read_header, resample_nearest

__all__ = [
    "Atlas",
    "Mask",
    "Sphere",
    "ProbabilityMap",
    "RegionSet",
    "RealisedRegions",
    "read_label_table",
    "MIDLINE",
    "OVERLAP_WARNING_SHARE",
]

#: What a hemisphere split may do with voxels at x = 0 mm.
MIDLINE = ("drop", "both", "left", "right")

#: Regions sharing more than this share of the smaller region's voxels are announced when realised.
OVERLAP_WARNING_SHARE = 0.2


# --------------------------------------------------------------------------------------------------
# Realised regions
# --------------------------------------------------------------------------------------------------


@dataclass
class _Region:
    name: str
    voxels: np.ndarray  # sorted unique flat (Fortran-order) indices, int64
    weights: np.ndarray | None  # same length, for probability-weighted summaries
    source: dict


@dataclass
class RealisedRegions:
    """Regions realised on one grid (the output of :meth:`RegionSet.realise`): the voxels of each region.

    A :class:`RegionSet` says how regions are defined; a ``RealisedRegions`` holds their voxels on one grid.
    (``Regions`` is its former name, kept as a deprecated alias.)

    Attributes
    ----------
    grid : Grid
    names : list of str
        Region names, in the region set's order.
    voxels : list of ndarray
        Sorted flat voxel indices (Fortran order) per region.
    weights : list of ndarray or None
        Voxel weights per region (probability maps), else None.
    sources : list of dict
        How each region was defined (JSON-able), for provenance and methods text.
    resampling : list of dict
        One record per resampled region image (file, its grid, the target grid).
    """

    grid: Grid
    names: list[str]
    voxels: list[np.ndarray]
    weights: list[np.ndarray | None]
    sources: list[dict]
    resampling: list[dict] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.names)

    @property
    def n_voxels(self) -> np.ndarray:
        return np.array([len(v) for v in self.voxels], dtype=np.int64)

    def summary(self) -> pd.DataFrame:
        """One row per region.

        Returns
        -------
        DataFrame with columns
            ``region`` (name), ``n_voxels``, ``volume_mm3`` (n_voxels x voxel volume),
            ``x_mm``, ``y_mm``, ``z_mm`` (centre of mass in world mm; probability-weighted for
            probability regions), ``source`` (kind of definition).
        """
        rows = []
        for name, vox, w, src in zip(self.names, self.voxels, self.weights, self.sources):
            xyz = self.grid.voxel_to_world(self.grid.flat_to_ijk(vox))
            com = np.average(xyz, axis=0, weights=w) if len(vox) else np.full(3, np.nan)
            rows.append({
                "region": name,
                "n_voxels": len(vox),
                "volume_mm3": len(vox) * self.grid.voxel_volume,
                "x_mm": com[0],
                "y_mm": com[1],
                "z_mm": com[2],
                "source": src.get("kind", ""),
            })
        return pd.DataFrame(rows, columns=["region", "n_voxels", "volume_mm3", "x_mm", "y_mm", "z_mm", "source"])

    def overlaps(self) -> pd.DataFrame:
        """Pairs of regions that share voxels (both count in a correction family).

        Returns
        -------
        DataFrame with columns ``region_a``, ``region_b`` (in region order), ``n_shared`` (voxels in both),
        ``share_of_a``, ``share_of_b`` (n_shared over each region's voxels) and ``share_of_smaller``; no rows when
        no region overlaps another.
        """
        columns = ["region_a", "region_b", "n_shared", "share_of_a", "share_of_b", "share_of_smaller"]
        if len(self.voxels) < 2:
            return pd.DataFrame(columns=columns)
        lengths = np.array([len(v) for v in self.voxels])
        vox = np.concatenate(self.voxels) if lengths.sum() else np.zeros(0, np.int64)
        rid = np.repeat(np.arange(len(self.voxels)), lengths)
        order = np.argsort(vox, kind="stable")
        vox, rid = vox[order], rid[order]
        _, starts, counts = np.unique(vox, return_index=True, return_counts=True)
        shared: dict[tuple[int, int], int] = {}
        for start, count in zip(starts[counts > 1], counts[counts > 1]):
            ids = rid[start:start + count]
            for i in range(count):
                for j in range(i + 1, count):
                    key = (int(min(ids[i], ids[j])), int(max(ids[i], ids[j])))
                    shared[key] = shared.get(key, 0) + 1
        rows = []
        for (a, b), n in sorted(shared.items()):
            rows.append({"region_a": self.names[a], "region_b": self.names[b], "n_shared": n,
                         "share_of_a": n / lengths[a], "share_of_b": n / lengths[b],
                         "share_of_smaller": n / min(lengths[a], lengths[b])})
        return pd.DataFrame(rows, columns=columns)

    def overlap_matrix(self) -> pd.DataFrame:
        """Regions x regions: voxels shared by each pair (the diagonal holds each region's voxel count)."""
        m = pd.DataFrame(0, index=list(self.names), columns=list(self.names), dtype=np.int64)
        for name, n in zip(self.names, self.n_voxels):
            m.loc[name, name] = int(n)
        for row in self.overlaps().itertuples(index=False):
            m.loc[row.region_a, row.region_b] = m.loc[row.region_b, row.region_a] = int(row.n_shared)
        return m

    def to_label_image(self) -> np.ndarray:
        """A 3D int32 image with region k (1-based) at its voxels; later regions win where regions overlap."""
        out = np.zeros(self.grid.n_voxels, dtype=np.int32)
        for k, vox in enumerate(self.voxels, start=1):
            out[vox] = k
        return out.reshape(self.grid.shape, order="F")

    def provenance(self) -> dict:
        """JSON-able description: grid, regions (name, voxels, volume, centre, source), resampling."""
        summary = self.summary()
        regions = []
        for row, src in zip(summary.to_dict("records"), self.sources):
            regions.append({**row, "source": src})
        overlaps = self.overlaps()
        return {"grid": self.grid.to_dict(), "regions": regions, "resampling": list(self.resampling),
                "overlaps": overlaps.to_dict("records")}


# --------------------------------------------------------------------------------------------------
# Label tables
# --------------------------------------------------------------------------------------------------


def read_label_table(path) -> pd.DataFrame:
    """Read an atlas label table (TSV with ``index`` and ``name`` columns, BIDS style).

    Returns
    -------
    DataFrame with at least ``index`` (int) and ``name`` (str), in file order.
    """
    table = read_table(path, label_columns=("name", "abbreviation", "color"))
    missing = [c for c in ("index", "name") if c not in table.columns]
    if missing:
        raise RegionError(
            f"{path}: label table lacks {noun(missing, 'column')} {', '.join(missing)}; found {', '.join(map(str, table.columns))}; "
            "a label table is a TSV with `index` and `name` columns"
        )
    idx = pd.to_numeric(table["index"], errors="coerce")
    bad = table.loc[idx.isna() | (idx != idx.round()), "index"].tolist()
    if bad:
        raise RegionError(f"{path}: label-table index values must be integers, found {bad[:5]}")
    names = table["name"]
    blank = names.isna().to_numpy() | names.astype(str).str.strip().isin(["", "n/a", "nan", "NaN"]).to_numpy()
    if blank.any():
        where = [f"line {i + 2} (index {table['index'].iloc[i]})" for i in np.flatnonzero(blank)[:10]]
        raise RegionError(
            f"{path}: {int(blank.sum())} {noun(int(blank.sum()), 'region')} without a name ({', '.join(where)}); "
            "every label needs a name in "
            "the `name` column (a region with no name would be lost); fill in the names or remove those rows"
        )
    table = table.assign(index=idx.astype(np.int64), name=names.astype(str))
    dup = table.loc[table["index"].duplicated(), "index"].tolist()
    if dup:
        raise RegionError(f"{path}: label-table index values repeat: {dup[:5]}; each index names one region")
    dupn = table.loc[table["name"].duplicated(), "name"].tolist()
    if dupn:
        raise RegionError(f"{path}: region names repeat in the label table: {dupn[:5]}; names must be unique")
    if (table["index"] == 0).any():
        raise RegionError(f"{path}: label-table index 0 is reserved for background; renumber the regions from 1")
    return table


# --------------------------------------------------------------------------------------------------
# Sources
# --------------------------------------------------------------------------------------------------


def _image_on_grid(path, grid: Grid, *, volume=None, what: str, atol: float, log: list) -> np.ndarray:
    """Load a region image and bring it onto ``grid`` (nearest neighbour), recording any resampling."""
    data, own = load_map(path, volume=volume)
    if own.matches(grid, atol=atol):
        return data
    check_overlap(own, grid, source_name=f"{what} {path}", target_name="the maps' grid")
    record = {"image": os.fspath(path), "what": what, "from": own.to_dict(), "to": grid.to_dict(),
              "method": "nearest neighbour"}
    if volume is not None:
        record["volume"] = int(volume)
    log.append(record)
    warnings.warn(
        ResamplingWarning(f"{what} {path} ({own.describe()}) resampled by nearest neighbour onto the maps' grid "
                          f"({grid.describe()})"),
        stacklevel=3,
    )
    return resample_nearest(data, own, grid)


class _Source:
    kind = "source"

    def _described(self, src: dict) -> dict:
        """Add the optional ``space`` and ``citation`` the user gave to a realised source record."""
        for name in ("space", "citation"):
            value = getattr(self, name, None)
            if value:
                src[name] = str(value)
        return src

    def realise(self, grid: Grid, *, atol: float, log: list) -> list[_Region]:  # pragma: no cover - interface
        raise NotImplementedError


@dataclass(frozen=True)
class Atlas(_Source):
    """A labelled atlas image (integer labels, 0 = background) with a label table.

    Parameters
    ----------
    image : path
        3D NIfTI image of integer labels.
    labels : path or DataFrame, optional
        Label table with ``index`` and ``name`` columns (BIDS style TSV). Without one, every label value in the
        image becomes a region named ``label <index>``, with a :class:`LabelTableWarning` saying so.

    Notes
    -----
    Table indices absent from the image and image values absent from the table are
    reported with a :class:`LabelTableWarning` naming them; the former are left out of
    the region set, the latter's voxels belong to no region.
    """

    image: str | os.PathLike
    labels: str | os.PathLike | pd.DataFrame | None = None
    space: str | None = None
    citation: str | None = None
    kind = "atlas"

    def realise(self, grid, *, atol, log):
        data = _image_on_grid(self.image, grid, what="atlas", atol=atol, log=log)
        if self.labels is None:
            values = np.unique(data[np.isfinite(data) & (data != 0)])
            if np.any(values != np.round(values)):
                raise RegionError(f"atlas {self.image}: values are not integer labels; is it a probability map? "
                                  "use a probability source with a threshold instead")
            table = pd.DataFrame({"index": values.astype(np.int64),
                                  "name": [f"label {int(v)}" for v in values]})
            warnings.warn(LabelTableWarning(
                f"atlas {self.image} has no label table: its {len(table)} labels are named 'label <index>' "
                f"(label {int(values[0]) if len(values) else '-'} ...); give a TSV with index and name columns to "
                "name them", findings=[{"problem": "atlas without a label table: regions named 'label <index>'"}]),
                stacklevel=3)
        else:
            table = self.labels if isinstance(self.labels, pd.DataFrame) else read_label_table(self.labels)
        flat = data.ravel(order="F")
        if np.any(np.isfinite(flat) & (flat != np.round(flat))):
            raise RegionError(f"atlas {self.image}: values are not integer labels; is it a probability map? "
                              "use a probability source with a threshold instead")
        flat = np.where(np.isfinite(flat), flat, 0).astype(np.int64)
        vox = np.flatnonzero(flat)
        lab = flat[vox]
        order = np.argsort(lab, kind="stable")
        vox, lab = vox[order], lab[order]
        present, starts = np.unique(lab, return_index=True)
        ends = np.r_[starts[1:], len(lab)]
        by_label = {int(v): (s, e) for v, s, e in zip(present, starts, ends)}
        wanted = set(table["index"].tolist())
        absent = [int(i) for i in table["index"] if int(i) not in by_label]
        unlabelled = sorted(set(by_label) - wanted)
        labels_name = "label table" if isinstance(self.labels, pd.DataFrame) else (
            self.labels if self.labels is not None else "(none: generated names)")
        if absent:
            names = table.set_index("index").loc[absent, "name"].tolist()
            warnings.warn(LabelTableWarning(
                f"atlas {self.image}: label-table indices {absent} ({', '.join(names)}) have no voxels on the maps' "
                f"grid and are left out of the region set"), stacklevel=3)
        if unlabelled:
            counts = [int(by_label[v][1] - by_label[v][0]) for v in unlabelled]
            warnings.warn(LabelTableWarning(
                f"atlas {self.image}: image values {unlabelled[:20]} (with {counts[:20]} voxels) are not in the label "
                f"table {labels_name}; those voxels belong to no region"), stacklevel=3)
        regions = []
        for index, name in zip(table["index"], table["name"]):
            if int(index) not in by_label:
                continue
            s, e = by_label[int(index)]
            regions.append(_Region(str(name), np.sort(vox[s:e]), None, self._described(
                                   {"kind": "atlas", "image": os.fspath(self.image),
                                    "labels": os.fspath(labels_name) if not isinstance(labels_name, str) else labels_name,
                                    "index": int(index)})))
        return regions


@dataclass(frozen=True)
class Mask(_Source):
    """A binary mask image (non-zero, finite voxels belong to the region).

    Parameters
    ----------
    name : str
        Region name.
    image : path
        3D NIfTI image.
    """

    name: str
    image: str | os.PathLike
    space: str | None = None
    citation: str | None = None
    kind = "mask"

    def realise(self, grid, *, atol, log):
        data = _image_on_grid(self.image, grid, what=f"mask {self.name!r}", atol=atol, log=log)
        flat = data.ravel(order="F")
        vox = np.flatnonzero(np.isfinite(flat) & (flat != 0))
        return [_Region(self.name, vox, None, self._described({"kind": "mask", "image": os.fspath(self.image)}))]


#: Largest sphere radius accepted (mm): far beyond any brain, small enough that the sums stay finite.
MAX_RADIUS_MM = 1000.0
#: Largest absolute sphere centre coordinate accepted (mm).
MAX_COORDINATE_MM = 1e5


@dataclass(frozen=True)
class Sphere(_Source):
    """A sphere at a world coordinate: voxels whose centres lie within ``radius`` mm of ``center``.

    Parameters
    ----------
    name : str
    center : (x, y, z)
        World coordinate in mm (the space of the maps' affine).
    radius : float
        Radius in mm (> 0).
    """

    name: str
    center: tuple[float, float, float]
    radius: float
    space: str | None = None
    citation: str | None = None
    kind = "sphere"

    def __post_init__(self):
        try:
            c = tuple(float(v) for v in self.center)
        except (TypeError, ValueError, OverflowError):
            c = ()
        if len(c) != 3 or not all(np.isfinite(c)) or max(abs(v) for v in c) > MAX_COORDINATE_MM:
            raise UsageError(f"sphere {self.name!r}: center must be three finite numbers (x, y, z in mm, each within "
                             f"+-{MAX_COORDINATE_MM:g}), got {self.center}")
        try:
            radius = float(self.radius)
        except (TypeError, ValueError, OverflowError):
            radius = float("nan")
        if not (np.isfinite(radius) and 0 < radius <= MAX_RADIUS_MM):
            raise UsageError(f"sphere {self.name!r}: radius must be a positive number of mm up to {MAX_RADIUS_MM:g} "
                             f"(a brain is about 200 mm across), got {self.radius}")
        object.__setattr__(self, "center", c)
        object.__setattr__(self, "radius", radius)

    def realise(self, grid, *, atol, log):
        centre_vox = grid.world_to_voxel(self.center)
        # bounding box in voxel space: the radius divided by the smallest voxel size, with a margin of one voxel
        reach = self.radius / grid.voxel_sizes.min() + 1
        lo = np.maximum(np.floor(centre_vox - reach), 0).astype(int)
        hi = np.minimum(np.ceil(centre_vox + reach), np.array(grid.shape) - 1).astype(int)
        src = self._described({"kind": "sphere", "center_mm": list(self.center), "radius_mm": self.radius})
        if np.any(hi < lo):
            return [_Region(self.name, np.empty(0, dtype=np.int64), None, src)]
        ii, jj, kk = np.meshgrid(*(np.arange(a, b + 1) for a, b in zip(lo, hi)), indexing="ij")
        ijk = np.stack([ii.ravel(), jj.ravel(), kk.ravel()], axis=1)
        d2 = ((grid.voxel_to_world(ijk) - np.asarray(self.center)) ** 2).sum(axis=1)
        inside = ijk[d2 <= self.radius**2]
        vox = np.sort(grid.ijk_to_flat(inside)) if len(inside) else np.empty(0, dtype=np.int64)
        return [_Region(self.name, vox.astype(np.int64), None, src)]


@dataclass(frozen=True)
class ProbabilityMap(_Source):
    """Probability map(s) thresholded into regions, with the probabilities kept as weights.

    Either one 3D image and a ``name``, or a 4D image with one volume per region and a
    label table whose ``index`` column gives the 1-based volume number.

    Parameters
    ----------
    image : path
    threshold : float
        Voxels with probability >= threshold belong to the region (0 < threshold <= 1 for
        probabilities; any positive value for percentage maps).
    name : str, optional
        Region name for a 3D image.
    labels : path or DataFrame, optional
        Label table for a 4D image (``index`` = volume number starting at 1, ``name``).
    """

    image: str | os.PathLike
    threshold: float
    name: str | None = None
    labels: str | os.PathLike | pd.DataFrame | None = None
    space: str | None = None
    citation: str | None = None
    kind = "probability"

    def __post_init__(self):
        if not (np.isfinite(self.threshold) and self.threshold > 0):
            raise UsageError(f"probability map {self.image}: threshold must be positive, got {self.threshold}")
        if (self.name is None) == (self.labels is None):
            raise UsageError(f"probability map {self.image}: give `name` for a 3D image or `labels` for a 4D image")

    def realise(self, grid, *, atol, log):
        header = read_header(self.image)
        if self.name is not None:
            volumes = [(self.name, None if header.n_volumes == 1 else 0, None)]
            if header.n_volumes > 1:
                raise RegionError(f"probability map {self.image}: a 4D image with {header.n_volumes} volumes; "
                                  "give a label table (`labels`) naming one region per volume")
        else:
            table = self.labels if isinstance(self.labels, pd.DataFrame) else read_label_table(self.labels)
            too_big = [int(i) for i in table["index"] if int(i) > header.n_volumes]
            if too_big:
                raise RegionError(f"probability map {self.image}: label-table indices {too_big} exceed its "
                                  f"{header.n_volumes} volumes (index = volume number from 1)")
            volumes = [(str(n), int(i) - 1 if header.n_volumes > 1 else None, int(i))
                       for i, n in zip(table["index"], table["name"])]
        regions = []
        for name, volume, index in volumes:
            data = _image_on_grid(self.image, grid, volume=volume, what=f"probability map {name!r}", atol=atol, log=log)
            flat = data.ravel(order="F")
            vox = np.flatnonzero(np.isfinite(flat) & (flat >= self.threshold))
            src = self._described({"kind": "probability", "image": os.fspath(self.image), "threshold": self.threshold})
            if index is not None:
                src["volume"] = index
            regions.append(_Region(name, vox, flat[vox].astype(np.float64), src))
        return regions


# --------------------------------------------------------------------------------------------------
# Region set
# --------------------------------------------------------------------------------------------------


class RegionSet:
    """An ordered set of regions from any mix of sources, with operations applied on realisation.

    Parameters
    ----------
    sources : sequence of Atlas, Mask, Sphere, ProbabilityMap
        Region order follows the sources, then each atlas's label-table order.

    Notes
    -----
    The operations (:meth:`split_hemispheres`, :meth:`intersect`, :meth:`select`,
    :meth:`rename`, :meth:`union`) return a new RegionSet; they are applied in order when
    the set is realised on a grid.
    """

    def __init__(self, sources: Sequence[_Source] = (), *, _steps: tuple = ()):
        sources = list(sources)
        for s in sources:
            if not isinstance(s, _Source):
                raise UsageError(f"region sources must be Atlas, Mask, Sphere or ProbabilityMap, got {type(s).__name__}")
        self.sources = sources
        self._steps = tuple(_steps)

    def __repr__(self) -> str:
        return f"RegionSet({self.sources!r}, steps={[s[0] for s in self._steps]})"

    def _with(self, step) -> "RegionSet":
        return RegionSet(self.sources, _steps=self._steps + (step,))

    def __add__(self, other: "RegionSet") -> "RegionSet":
        if self._steps or other._steps:
            raise UsageError("combine region sets before applying operations to them")
        return RegionSet(self.sources + other.sources)

    # operations ----------------------------------------------------------------------------------
    def split_hemispheres(self, names: Iterable[str] | None = None, *, midline: str = "drop",
                          left: str = "left {name}", right: str = "right {name}") -> "RegionSet":
        """Split regions into left (world x < 0) and right (x > 0) parts.

        Parameters
        ----------
        names : iterable of str, optional
            Regions to split (default: all).
        midline : {"drop", "both", "left", "right"}
            Voxels at x = 0 mm: dropped (counted in the region's source record and announced with a warning),
            given to both halves, or to one side.

        Assumes the world space has x increasing to the right (RAS+, as in MNI space).
        """
        if midline not in MIDLINE:
            raise UsageError(f"midline must be one of {', '.join(MIDLINE)}, got {midline!r}")
        return self._with(("split", None if names is None else list(names), left, right, midline))

    def intersect(self, mask, *, name: str = "analysis mask") -> "RegionSet":
        """Keep only voxels inside a brain/analysis mask image (non-zero voxels)."""
        return self._with(("intersect", mask, name))

    def select(self, names: Iterable[str]) -> "RegionSet":
        """Keep only the named regions, in the order given."""
        return self._with(("select", list(names)))

    def rename(self, mapping: Mapping[str, str]) -> "RegionSet":
        """Rename regions (old name -> new name)."""
        return self._with(("rename", dict(mapping)))

    def union(self, name: str, names: Iterable[str], *, keep: bool = True) -> "RegionSet":
        """Add a region made of the union of the named regions (appended at the end)."""
        return self._with(("union", name, list(names), keep))

    # realisation ---------------------------------------------------------------------------------
    def realise(self, grid: Grid, *, atol: float = DEFAULT_ATOL, allow_empty: bool = False) -> RealisedRegions:
        """Realise the regions on ``grid``.

        Parameters
        ----------
        grid : Grid
            The maps' grid.
        atol : float
            Tolerance (mm) when comparing a region image's affine with the grid's.
        allow_empty : bool
            If false (default), a region with no voxels on the grid is an error.

        Returns
        -------
        RealisedRegions
        """
        if not self.sources:
            raise RegionError("no regions given; name at least one atlas, mask, sphere or probability map")
        log: list[dict] = []
        regions: list[_Region] = []
        for source in self.sources:
            regions.extend(source.realise(grid, atol=atol, log=log))
        for step in self._steps:
            regions = _apply(step, regions, grid, atol=atol, log=log)
        names = [r.name for r in regions]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise RegionError(f"region names repeat: {dup}; rename them (e.g. RegionSet.rename) so each is unique")
        if not allow_empty:
            for r in regions:
                if len(r.voxels) == 0:
                    raise RegionError(_empty_message(r, grid))
        realised = RealisedRegions(grid, names, [r.voxels for r in regions], [r.weights for r in regions],
                           [r.source for r in regions], log)
        _warn_overlaps(realised)
        return realised

    def describe(self) -> list[dict]:
        """JSON-able list of sources and operations."""
        out = []
        for s in self.sources:
            d = {"kind": s.kind}
            for k, v in vars(s).items():
                d[k] = os.fspath(v) if isinstance(v, (os.PathLike,)) else (
                    "table" if isinstance(v, pd.DataFrame) else v)
            out.append(d)
        for step in self._steps:
            out.append({"operation": step[0], "arguments": [os.fspath(a) if isinstance(a, os.PathLike) else a
                                                            for a in step[1:]]})
        return out


def _warn_overlaps(regions: RealisedRegions, share: float = OVERLAP_WARNING_SHARE) -> None:
    """One :class:`RegionOverlapWarning` naming the pairs that share more than ``share`` of the smaller region."""
    table = regions.overlaps()
    big = table[table["share_of_smaller"] > share]
    if big.empty:
        return
    pairs = []
    for row in big.itertuples(index=False):
        smaller, larger = ((row.region_a, row.region_b) if row.share_of_a >= row.share_of_b
                           else (row.region_b, row.region_a))
        n_small = int(regions.n_voxels[regions.names.index(smaller)])
        pairs.append(f"{row.n_shared}/{n_small} voxels of {smaller} lie in {larger}")
    warnings.warn(RegionOverlapWarning(
        f"overlapping regions (both count in each correction family): {'; '.join(pairs)}",
        findings=[{"problem": "overlapping regions (both count in each correction family)", "region": p}
                  for p in pairs]), stacklevel=3)


def _empty_message(region: _Region, grid: Grid) -> str:
    src = region.source
    if src.get("kind") == "sphere":
        lo, hi = grid.world_bounds()
        return (f"region {region.name!r}: sphere at {src['center_mm']} mm with radius {src['radius_mm']} mm has no "
                f"voxel on the maps' grid, whose field of view spans {np.round(lo, 1).tolist()} to "
                f"{np.round(hi, 1).tolist()} mm; check the coordinate's space and sign")
    what = src.get("kind", "region")
    extra = f" after {src['emptied_by']}" if "emptied_by" in src else ""
    return (f"region {region.name!r} ({what} {src.get('image', '')}) has no voxels on the maps' grid{extra}; "
            "drop it with select() or check that it lies inside the maps' field of view and mask")


def _apply(step, regions: list[_Region], grid: Grid, *, atol, log) -> list[_Region]:
    kind = step[0]
    by_name = {r.name: r for r in regions}
    if kind == "split":
        _, names, left, right, midline = step
        unknown = [n for n in (names or []) if n not in by_name]
        if unknown:
            raise RegionError(f"split_hemispheres: unknown {noun(unknown, 'region')} {unknown}; regions are {list(by_name)}")
        out = []
        dropped: list[tuple[str, int]] = []
        for r in regions:
            if names is not None and r.name not in names:
                out.append(r)
                continue
            x = grid.voxel_to_world(grid.flat_to_ijk(r.voxels))[:, 0]
            mid = x == 0
            n_mid = int(np.sum(mid))
            if n_mid and midline == "drop":
                dropped.append((r.name, n_mid))
            for side, keep in ((left, (x < 0) | (mid & (midline in ("both", "left")))),
                               (right, (x > 0) | (mid & (midline in ("both", "right"))))):
                src = {**r.source, "hemisphere": "left" if side is left else "right", "parent": r.name,
                       "midline_voxels": n_mid, "midline": midline,
                       "midline_voxels_dropped": n_mid if midline == "drop" else 0}
                if not keep.any():
                    src["emptied_by"] = "splitting into hemispheres"
                out.append(_Region(side.format(name=r.name), r.voxels[keep],
                                   None if r.weights is None else r.weights[keep], src))
        if dropped:
            total = sum(n for _, n in dropped)
            warnings.warn(RoikitWarning(
                f"hemisphere split: {total} midline voxel{'s' if total != 1 else ''} (x = 0 mm) dropped: "
                + ", ".join(f"{name} {n}" for name, n in dropped)
                + "; midline = \"both\", \"left\" or \"right\" keeps them",
                findings=[{"problem": "midline voxels (x = 0 mm) dropped by the hemisphere split",
                           "region": f"{name} ({n} voxels)"} for name, n in dropped]), stacklevel=4)
        return out
    if kind == "intersect":
        _, mask, name = step
        data = _image_on_grid(mask, grid, what=name, atol=atol, log=log).ravel(order="F")
        inside = np.isfinite(data) & (data != 0)
        out = []
        for r in regions:
            keep = inside[r.voxels]
            src = {**r.source, "intersected_with": os.fspath(mask), "voxels_outside_mask": int((~keep).sum())}
            if not keep.any():
                src["emptied_by"] = f"intersection with {name} {mask}"
            out.append(_Region(r.name, r.voxels[keep], None if r.weights is None else r.weights[keep], src))
        return out
    if kind == "select":
        names = step[1]
        unknown = [n for n in names if n not in by_name]
        if unknown:
            raise RegionError(f"select: unknown {noun(unknown, 'region')} {unknown}; regions are {list(by_name)}")
        return [by_name[n] for n in names]
    if kind == "rename":
        mapping = step[1]
        unknown = [n for n in mapping if n not in by_name]
        if unknown:
            raise RegionError(f"rename: unknown {noun(unknown, 'region')} {unknown}; regions are {list(by_name)}")
        return [_Region(mapping.get(r.name, r.name), r.voxels, r.weights, {**r.source, **(
            {"original_name": r.name} if r.name in mapping else {})}) for r in regions]
    if kind == "union":
        _, name, names, keep = step
        unknown = [n for n in names if n not in by_name]
        if unknown:
            raise RegionError(f"union: unknown {noun(unknown, 'region')} {unknown}; regions are {list(by_name)}")
        if any(by_name[n].weights is not None for n in names):
            raise RegionError(f"union {name!r}: probability-weighted regions cannot be merged; threshold them into masks")
        vox = np.unique(np.concatenate([by_name[n].voxels for n in names]))
        kept = regions if keep else [r for r in regions if r.name not in names]
        return kept + [_Region(name, vox, None, {"kind": "union", "of": names})]
    raise UsageError(f"unknown region operation {kind!r}")  # pragma: no cover


def __getattr__(name: str):
    # former names, kept for a while with a RoikitDeprecationWarning
    if name == "Regions":
        warnings.warn(RoikitDeprecationWarning("roikit.regions.Regions is now RealisedRegions (the voxels of a "
                                               "RegionSet on one grid); import RealisedRegions"), stacklevel=2)
        return RealisedRegions
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
