"""Where the regions are: each region on orthogonal slices through its centre, over a background image.

One row block per region (sagittal, coronal and axial slice through the region's voxel nearest its centre of
mass), the region filled in its own colour from the Okabe & Ito (2008) palette, labelled with its name and the
slice coordinates in world mm. The background is the mean of the maps (:func:`mean_background`), a user image,
or, without either, the union of all regions in light grey. Slices are shown in the voxel axes closest to RAS+
(x to the right, y to the front, z up; left hemisphere on the left of coronal and axial slices).

Examples
--------
>>> regions = RegionSet([Atlas("atlas.nii.gz", "atlas.tsv")]).realise(grid)               # doctest: +SKIP
>>> fig = region_figure(regions, background=mean_background(map_paths, regions.grid))     # doctest: +SKIP
>>> save_figure(fig, "figures/regions")                                                   # doctest: +SKIP
"""

from __future__ import annotations

import os
import textwrap
from typing import Sequence

import numpy as np
import pandas as pd
from matplotlib.colors import LinearSegmentedColormap, ListedColormap
from matplotlib.figure import Figure

from .._options import noun
from ..errors import UsageError
from ..images import Grid, load_map, read_flat, read_header, resample_nearest
from ..regions import Atlas, Mask, ProbabilityMap, RealisedRegions, RegionSet, Sphere
from .figures import MAX_HEIGHT_MM, MIN_FONT_PT, Width, _MM, _minus, _width_mm, style

__all__ = ["region_figure", "region_pages", "region_table", "mean_background", "regions_from_provenance",
           "functional_overlap", "functional_overlap_figure",
           "REGION_COLORS"]

#: One colour per region, cycling: the Okabe & Ito (2008) palette without black (the background is grey).
REGION_COLORS = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7")

#: Background greys kept between dark and light grey, so every region colour stands out on it.
_GREYS = LinearSegmentedColormap.from_list("roikit_greys", ["#4d4d4d", "#d9d9d9"])
_BLOCK_HEIGHT_MM = 36.0  # one region: its name above three slices
_TOP_MM = 8.0  # page title


# --------------------------------------------------------------------------------------------- geometry
def _ras(grid: Grid):
    """Orientation that brings voxel axes to RAS+ and the affine after it."""
    from nibabel.orientations import inv_ornt_aff, io_orientation

    ornt = io_orientation(grid.affine)
    affine = grid.affine @ inv_ornt_aff(ornt, grid.shape)
    return ornt, affine


def _to_ras(volume: np.ndarray, ornt) -> np.ndarray:
    from nibabel.orientations import apply_orientation

    return np.asarray(apply_orientation(volume, ornt))


def _as_volume(image, grid: Grid) -> np.ndarray:
    """A background on ``grid``: an array of its shape, or an image file (resampled by nearest neighbour)."""
    if isinstance(image, np.ndarray):
        if image.shape[:3] != tuple(grid.shape):
            raise UsageError(f"background array has shape {image.shape}, expected the regions' grid {grid.shape}")
        return np.asarray(image[..., 0] if image.ndim == 4 else image, dtype=float)
    data, source = load_map(image, volume=0 if read_header(image).n_volumes > 1 else None)
    if not source.matches(grid):
        data = resample_nearest(data, source, grid, fill=np.nan)
    return np.asarray(data, dtype=float)


def mean_background(maps: Sequence[str | os.PathLike], grid: Grid | None = None, *, max_maps: int = 100
                    ) -> np.ndarray:
    """Voxel-wise mean of the maps (NaN and exact zeros left out): a background in the maps' own space.

    Parameters
    ----------
    maps : sequence of path
        Map files on one grid (e.g. every participant's effect map).
    grid : Grid, optional
        Grid to return the mean on (maps on another grid are resampled by nearest neighbour); default the
        first map's.
    max_maps : int
        Use at most this many maps, evenly spaced through the list (a mean of 100 maps is as good a picture as
        one of 100,000).

    Returns
    -------
    ndarray, shape grid.shape
        NaN where no map has data.
    """
    maps = [os.fspath(m) for m in maps]
    if not maps:
        raise UsageError("mean_background needs at least one map path")
    if len(maps) > max_maps:
        maps = [maps[int(i)] for i in np.linspace(0, len(maps) - 1, max_maps)]
    total = count = None
    for path in maps:
        header = read_header(path)
        flat = read_flat(header, volume=0 if header.n_volumes > 1 else None).astype(float)
        vol = flat.reshape(header.grid.shape, order="F")
        if grid is not None and not header.grid.matches(grid):
            vol = resample_nearest(vol, header.grid, grid, fill=np.nan)
        grid = grid or header.grid
        ok = np.isfinite(vol) & (vol != 0)
        if total is None:
            total, count = np.zeros(vol.shape), np.zeros(vol.shape)
        total[ok] += vol[ok]
        count[ok] += 1
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / count, np.nan)


def region_table(regions: RealisedRegions) -> pd.DataFrame:
    """Centre (world mm) and size of each region: region, n_voxels, volume_mm3, x_mm, y_mm, z_mm, source."""
    return regions.summary()


# --------------------------------------------------------------------------------------------- provenance
def regions_from_provenance(provenance: dict) -> RealisedRegions:
    """Rebuild the realised regions from a values table's provenance (sources, operations and grid).

    The region set is rebuilt from ``region_sources`` (sources, then operations in order) and realised on the
    recorded grid; the result is checked against the recorded names and voxel counts.

    Raises
    ------
    UsageError
        When the provenance lacks what is needed, a file moved, or the rebuilt regions differ from the record.
    """
    described = provenance.get("region_sources")
    grid_rec = provenance.get("grid")
    if not described or not grid_rec:
        raise UsageError("the values' provenance does not describe the regions (region_sources and grid)")
    sources, steps = [], []
    for item in described:
        if "operation" in item:
            steps.append(item)
            continue
        kind = item.get("kind")
        fields = {k: v for k, v in item.items() if k != "kind"}
        if any(v == "table" for v in fields.values()):
            raise UsageError(f"{kind} region source used an in-memory label table; pass regions= explicitly")
        cls = {"atlas": Atlas, "mask": Mask, "sphere": Sphere, "probability": ProbabilityMap}.get(kind)
        if cls is None:
            raise UsageError(f"unknown region source kind {kind!r} in the provenance")
        sources.append(cls(**fields))
    region_set = RegionSet(sources)
    for step in steps:
        op, args = step["operation"], list(step.get("arguments", []))
        if op == "split":
            region_set = region_set.split_hemispheres(args[0], left=args[1], right=args[2])
        elif op == "intersect":
            region_set = region_set.intersect(args[0], name=args[1])
        elif op == "select":
            region_set = region_set.select(args[0])
        elif op == "rename":
            region_set = region_set.rename(args[0])
        elif op == "union":
            region_set = region_set.union(args[0], args[1], keep=args[2])
        else:
            raise UsageError(f"unknown region operation {op!r} in the provenance")
    grid = Grid(tuple(grid_rec["shape"]), np.asarray(grid_rec["affine"], dtype=float))
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # resampling was announced when the values were extracted
        regions = region_set.realise(grid, allow_empty=True)
    recorded = {r["region"]: r.get("n_voxels") for r in provenance.get("regions", [])}
    rebuilt = dict(zip(regions.names, regions.n_voxels.tolist()))
    if recorded and any(rebuilt.get(k) != v for k, v in recorded.items()):
        raise UsageError("the regions rebuilt from the provenance differ from those recorded (files changed?)")
    return regions


# --------------------------------------------------------------------------------------------- drawing
def _pages(names: list[str], per_page: int) -> list[list[str]]:
    return [names[i:i + per_page] for i in range(0, len(names), per_page)]


def _layout(width: Width) -> tuple[int, int]:
    """RealisedRegions per row and rows per page at ``width``."""
    wmm = _width_mm(width)
    per_row = 2 if wmm >= 150 else 1
    rows = int((MAX_HEIGHT_MM - _TOP_MM) // _BLOCK_HEIGHT_MM)
    return per_row, rows


def region_figure(
    regions: RealisedRegions,
    *,
    background: np.ndarray | str | os.PathLike | None = None,
    names: Sequence[str] | None = None,
    width: Width = "double",
    page: int | None = None,
    title: str | None = None,
) -> Figure:
    """Each region on a sagittal, a coronal and an axial slice through its centre, over a background.

    Parameters
    ----------
    regions : RealisedRegions
        Realised regions (``RegionSet.realise(grid)``, or ``study.realised``).
    background : array, path or None
        An image on the regions' grid (e.g. :func:`mean_background` of the maps), an image file (resampled by
        nearest neighbour when on another grid), or None: all regions' union in light grey.
    names : sequence of str, optional
        RealisedRegions to draw, in this order (default: all).
    width : "single", "one-and-a-half", "double" or float
        Figure width in mm (two regions per row at double width, one below).
    page : int, optional
        Which page (from 1) when the regions need more than one figure of at most 225 mm
        (:func:`region_pages` draws them all).
    title : str, optional
        Figure title (default: what the background is).

    Returns
    -------
    matplotlib.figure.Figure
    """
    names = list(names) if names is not None else list(regions.names)
    unknown = [n for n in names if n not in regions.names]
    if unknown:
        raise UsageError(f"{noun(unknown, 'region')} {', '.join(unknown)} not in the region set "
                         f"({', '.join(regions.names)})")
    if not names:
        raise UsageError("no region to draw")
    per_row, rows = _layout(width)
    pages = _pages(names, per_row * rows)
    if page is None:
        if len(pages) > 1:
            raise UsageError(f"{len(names)} regions need {len(pages)} figures of at most {MAX_HEIGHT_MM:g} mm; pass "
                             f"page=1 to {len(pages)}, use region_pages(...), or choose names=[...]")
        page = 1
    if not 1 <= int(page) <= len(pages):
        raise UsageError(f"page must lie between 1 and {len(pages)}, got {page}")
    drawn = pages[int(page) - 1]

    grid = regions.grid
    ornt, affine = _ras(grid)
    if background is None:
        bg = np.zeros(grid.n_voxels)
        for vox in regions.voxels:
            bg[vox] = 1.0
        bg = np.where(bg.reshape(grid.shape, order="F") > 0, 1.0, np.nan)  # regions light grey on white
        bg_text = "background: all regions (grey)"
        limits = (0.0, 1.2)
    else:
        bg = _as_volume(background, grid)
        bg_text = title or ""
        finite = bg[np.isfinite(bg) & (bg != 0)]
        limits = tuple(np.percentile(finite, [2, 98])) if finite.size else (0.0, 1.0)
    bg = _to_ras(np.where(np.isfinite(bg), bg, np.nan), ornt)
    sizes = np.abs(np.diag(affine)[:3])
    origin = affine[:3, 3]
    shape = bg.shape
    inside = np.argwhere(np.isfinite(bg) & (bg != 0)) if background is not None else np.empty((0, 3))
    box = (inside.min(axis=0), inside.max(axis=0)) if len(inside) else (np.zeros(3, int), np.array(shape) - 1)

    def world(axis: int, index) -> np.ndarray:
        return origin[axis] + affine[axis, axis] * np.asarray(index, dtype=float)

    def extent(a: int, b: int) -> list[float]:
        lo_a, hi_a = sorted((world(a, 0), world(a, shape[a] - 1)))
        lo_b, hi_b = sorted((world(b, 0), world(b, shape[b] - 1)))
        return [lo_a - sizes[a] / 2, hi_a + sizes[a] / 2, lo_b - sizes[b] / 2, hi_b + sizes[b] / 2]

    def slice_of(vol: np.ndarray, axis: int, k: int) -> np.ndarray:
        # rows: the higher remaining axis (z, or y for axial); columns: the lower one
        return np.take(vol, k, axis=axis).T

    wmm = _width_mm(width)
    n_rows = int(np.ceil(len(drawn) / per_row))
    with style():
        fig = Figure(figsize=(wmm * _MM, (_BLOCK_HEIGHT_MM * n_rows + _TOP_MM) * _MM), layout="constrained")
        subfigs = np.atleast_1d(fig.subfigures(n_rows, per_row, squeeze=False)).ravel()
        for sub in subfigs[len(drawn):]:
            sub.set_visible(False)
        for sub, name in zip(subfigs, drawn):
            r = regions.names.index(name)
            colour = REGION_COLORS[r % len(REGION_COLORS)]
            mask = np.zeros(grid.n_voxels, dtype=bool)
            mask[regions.voxels[r]] = True
            mask = _to_ras(mask.reshape(grid.shape, order="F"), ornt)
            ijk = np.argwhere(mask)
            if len(ijk) == 0:
                sub.suptitle(f"{name}: no voxels on the grid", fontsize=MIN_FONT_PT)
                continue
            com = ijk.mean(axis=0)
            centre = ijk[np.argmin(((ijk - com) ** 2).sum(axis=1))]  # a voxel of the region nearest its centre
            xyz = [world(a, centre[a]) for a in range(3)]
            axes = sub.subplots(1, 3)
            for ax, axis, (a, b), label in zip(axes, (0, 1, 2), ((1, 2), (0, 2), (0, 1)), ("x", "y", "z")):
                k = int(centre[axis])
                ax.imshow(slice_of(bg, axis, k), cmap=_GREYS, vmin=limits[0], vmax=limits[1], origin="lower",
                          extent=extent(a, b), interpolation="nearest")
                region_slice = slice_of(mask, axis, k)
                ax.imshow(np.ma.masked_where(~region_slice, region_slice.astype(float)), cmap=ListedColormap([colour]),
                          vmin=0, vmax=1, alpha=0.95, origin="lower", extent=extent(a, b), interpolation="nearest")
                if region_slice.any() and region_slice.shape[0] > 1 and region_slice.shape[1] > 1:
                    # a dark outline keeps light colours visible on any background
                    ext = extent(a, b)
                    ax.contour(region_slice.astype(float), levels=[0.5], colors="black", linewidths=0.5,
                               origin="lower", extent=ext, corner_mask=False)
                # show the part of the grid with data (the brain), not the empty margin of the grid
                for setter, ax_i in ((ax.set_xlim, a), (ax.set_ylim, b)):
                    ends = sorted((world(ax_i, box[0][ax_i]), world(ax_i, box[1][ax_i])))
                    setter(ends[0] - 1.5 * sizes[ax_i], ends[1] + 1.5 * sizes[ax_i])
                ax.set_xticks([])
                ax.set_yticks([])
                for spine in ax.spines.values():  # a frame shows the grid's extent when there is no background
                    spine.set_visible(background is None)
                    spine.set_color("0.75")
                    spine.set_linewidth(0.5)
                ax.set_xlabel(_minus(f"{label} = {xyz[axis]:.0f} mm"), fontsize=MIN_FONT_PT, labelpad=1.5)
                if axis in (1, 2):  # left-right axes: say which side is which
                    ax.text(0.0, 1.0, "L", transform=ax.transAxes, va="top", ha="left", color="0.2",
                            fontsize=MIN_FONT_PT)
                    ax.text(1.0, 1.0, "R", transform=ax.transAxes, va="top", ha="right", color="0.2",
                            fontsize=MIN_FONT_PT)
            n_vox = len(regions.voxels[r])
            sub.suptitle(textwrap.shorten(name, 40, placeholder="…") + f" ({n_vox} voxels)", fontsize=7.5)
        heading = [t for t in (title if background is None and title else bg_text,
                               f"page {page} of {len(pages)}" if len(pages) > 1 else "") if t]
        if heading:
            fig.suptitle(" · ".join(heading), fontsize=7.5)
    return fig


def region_pages(regions: RealisedRegions, *, names: Sequence[str] | None = None, width: Width = "double",
                 **kwargs) -> list[Figure]:
    """All regions as :func:`region_figure` pages of at most 225 mm (same options)."""
    names = list(names) if names is not None else list(regions.names)
    per_row, rows = _layout(width)
    n_pages = max(1, int(np.ceil(len(names) / (per_row * rows))))
    return [region_figure(regions, names=names, width=width, page=k, **kwargs) for k in range(1, n_pages + 1)]


def functional_overlap(regions: RealisedRegions, functional: dict) -> dict[str, np.ndarray]:
    """Share of participants whose selection holds each voxel, per functional region (flat arrays on the grid).

    ``functional`` is the values' ``provenance["functional"]`` (:func:`roikit.functional.extract_functional`):
    each participant x contrast record's folds list the flat voxels selected. A participant counts once per
    contrast tested (the first tested contrast is used) and a fold counts 1 / (number of folds), so a voxel
    selected in every fold of every participant has share 1. NaN outside the search space.
    """
    out: dict[str, np.ndarray] = {}
    records = [r for r in functional.get("selections", []) or [] if isinstance(r, dict)]
    for spec in functional.get("regions", []) or []:
        name, within = str(spec.get("name")), str(spec.get("within"))
        if within not in regions.names:
            continue
        mine = [r for r in records if str(r.get("region")) == name]
        if not mine:
            continue
        first = str(mine[0].get("contrast"))
        mine = [r for r in mine if str(r.get("contrast")) == first]
        share = np.full(regions.grid.n_voxels, np.nan)
        share[regions.voxels[regions.names.index(within)]] = 0.0
        for rec in mine:
            folds = [f for f in rec.get("folds", []) or [] if isinstance(f, dict)]
            for fold in folds:
                vox = np.asarray(fold.get("voxels", []), dtype=np.int64)
                share[vox] += 1.0 / (len(folds) * len(mine))
        out[name] = share
    return out


def functional_overlap_figure(regions: RealisedRegions, functional: dict, *, width: Width = "double") -> Figure:
    """Where each participant's functional-region voxels fall: the share of participants per voxel, on slices.

    One row per functional region: a sagittal, a coronal and an axial slice through the voxel selected most often
    (among ties, the one nearest the share-weighted centre; the search space's voxel nearest its centre when
    nothing was selected); the search space in light grey, each voxel coloured by the share of participants (and
    folds) whose selection holds it (viridis, a colour-blind-safe sequential map, 0 to 1).

    Parameters
    ----------
    regions : RealisedRegions
        The realised regions (the search spaces are among them).
    functional : dict
        ``provenance["functional"]`` of the region values.
    """
    from matplotlib import colormaps

    shares = functional_overlap(regions, functional)
    if not shares:
        raise UsageError("no functional region with recorded selections to draw")
    grid = regions.grid
    ornt, affine = _ras(grid)
    sizes = np.abs(np.diag(affine)[:3])
    origin = affine[:3, 3]
    wmm = _width_mm(width)
    names = list(shares)
    block = 40.0
    cmap = colormaps["viridis"]

    def world(axis: int, index) -> np.ndarray:
        return origin[axis] + affine[axis, axis] * np.asarray(index, dtype=float)

    with style():
        fig = Figure(figsize=(wmm * _MM, (block * len(names) + _TOP_MM) * _MM), layout="constrained")
        subfigs = np.atleast_1d(fig.subfigures(len(names), 1, squeeze=False)).ravel()
        image = None
        for sub, name in zip(subfigs, names):
            vol = _to_ras(shares[name].reshape(grid.shape, order="F"), ornt)
            space = np.isfinite(vol)
            ijk = np.argwhere(space)
            com = ijk.mean(axis=0)
            centre = ijk[np.argmin(((ijk - com) ** 2).sum(axis=1))]
            share = np.nan_to_num(vol)
            if share.max() > 0:  # through the voxel selected most often (the selections, not the space's middle)
                top = np.argwhere(share == share.max())
                weighted = (ijk * share[space][:, None]).sum(axis=0) / share[space].sum()
                centre = top[np.argmin(((top - weighted) ** 2).sum(axis=1))]
            lo, hi = ijk.min(axis=0), ijk.max(axis=0)
            axes = sub.subplots(1, 3)
            for ax, axis, (a, b), label in zip(axes, (0, 1, 2), ((1, 2), (0, 2), (0, 1)), ("x", "y", "z")):
                k = int(centre[axis])
                sl = np.take(vol, k, axis=axis).T
                ext = [min(world(a, 0), world(a, vol.shape[a] - 1)) - sizes[a] / 2,
                       max(world(a, 0), world(a, vol.shape[a] - 1)) + sizes[a] / 2,
                       min(world(b, 0), world(b, vol.shape[b] - 1)) - sizes[b] / 2,
                       max(world(b, 0), world(b, vol.shape[b] - 1)) + sizes[b] / 2]
                ax.imshow(np.where(np.isfinite(sl), 1.0, np.nan), cmap=ListedColormap(["#d9d9d9"]), vmin=0, vmax=1,
                          origin="lower", extent=ext, interpolation="nearest")
                image = ax.imshow(np.ma.masked_where(~(np.isfinite(sl) & (np.nan_to_num(sl) > 0)), sl), cmap=cmap,
                                  vmin=0, vmax=1, origin="lower", extent=ext, interpolation="nearest")
                for setter, ax_i in ((ax.set_xlim, a), (ax.set_ylim, b)):
                    ends = sorted((world(ax_i, lo[ax_i]), world(ax_i, hi[ax_i])))
                    setter(ends[0] - 2.5 * sizes[ax_i], ends[1] + 2.5 * sizes[ax_i])
                ax.set_xticks([])
                ax.set_yticks([])
                for spine in ax.spines.values():
                    spine.set_visible(False)
                ax.set_xlabel(_minus(f"{label} = {world(axis, centre[axis]):.0f} mm"), fontsize=MIN_FONT_PT,
                              labelpad=1.5)
                if axis in (1, 2):
                    ax.text(0.0, 1.0, "L", transform=ax.transAxes, va="top", ha="left", color="0.2",
                            fontsize=MIN_FONT_PT)
                    ax.text(1.0, 1.0, "R", transform=ax.transAxes, va="top", ha="right", color="0.2",
                            fontsize=MIN_FONT_PT)
            spec = next(s for s in functional.get("regions", []) if str(s.get("name")) == name)
            sub.suptitle(textwrap.shorten(f"{name} (within {spec.get('within')})", 60, placeholder="…"),
                         fontsize=7.5)
            bar = sub.colorbar(image, ax=list(axes), shrink=0.8, pad=0.02)
            bar.set_label("share of participants", fontsize=MIN_FONT_PT)
            bar.ax.tick_params(labelsize=MIN_FONT_PT)
    return fig
