"""`roikit regions`: list the regions of a region set on a grid (and draw them with --figure)."""

from __future__ import annotations

import argparse
import sys

from ..errors import UsageError
from ._sources import add_region_options, region_set_from_args


HELP = "list regions: name, voxels, volume, centre of mass"


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "regions", help=HELP,
        description="List the regions of the given sources on a grid (the grid of --like MAP, else of the first "
                    "region image): name, n_voxels, volume_mm3 and centre of mass in world mm.")
    add_region_options(p)
    p.add_argument("--like", metavar="MAP", help="realise the regions on this map's grid (resampling if needed)")
    p.add_argument("--out", metavar="TSV", help="also write the list as a TSV file")
    p.add_argument("--figure", metavar="FILE",
                   help="draw every region on sagittal, coronal and axial slices through its centre: FILE.png, "
                        ".pdf or .svg (that format), or a name without extension (all three); regions beyond one "
                        "page of 225 mm go to FILE_page2, ...")
    p.add_argument("--background", metavar="IMAGE",
                   help="background image of --figure (default: the --like MAP, else the regions in grey); "
                        "resampled by nearest neighbour when on another grid")
    p.add_argument("--overwrite", action="store_true", help="replace existing --out and --figure files")
    p.set_defaults(func=run)


def _grid(args: argparse.Namespace, regions):
    from ..images import read_grid
    from ..regions import Atlas, Mask, ProbabilityMap

    if args.like:
        return read_grid(args.like)
    for source in regions.sources:
        if isinstance(source, (Atlas, Mask, ProbabilityMap)):
            return read_grid(source.image)
    raise UsageError("spheres alone have no grid; give --like MAP to place them on a map's grid")


def run(args: argparse.Namespace) -> int:
    from .._tables import write_table

    if args.figure:
        _figure_target(args)  # a wrong --figure stops before any work
    elif args.background:
        raise UsageError("--background is the background of --figure; give --figure FILE too")
    regions = region_set_from_args(args)
    grid = _grid(args, regions)
    realised = regions.realise(grid)
    table = realised.summary()
    if args.out:
        write_table(args.out, table, overwrite=args.overwrite)
    shown = table.copy()
    shown["volume_mm3"] = shown["volume_mm3"].map(lambda v: f"{v:.1f}")
    for c in ("x_mm", "y_mm", "z_mm"):
        shown[c] = shown[c].map(lambda v: f"{v:.1f}")
    sys.stdout.write(f"{len(table)} regions on {grid.describe()}\n")
    sys.stdout.write(shown.to_string(index=False) + "\n")
    if args.figure:
        _figure(args, realised)
    return 0


def _figure_target(args: argparse.Namespace):
    """Formats and file stem of --figure (checked before any work)."""
    from pathlib import Path

    target = Path(args.figure)
    suffix = target.suffix.lower()
    if suffix and suffix not in (".png", ".pdf", ".svg"):
        raise UsageError(f"--figure {args.figure}: the extension must be .png, .pdf or .svg (or none for all "
                         f"three), found {target.suffix!r}")
    if not target.parent.exists():
        raise UsageError(f"--figure {args.figure}: folder {target.parent} does not exist; create it first")
    formats = (suffix[1:],) if suffix else ("pdf", "svg", "png")
    return formats, (target.with_suffix("") if suffix else target)


def _figure(args: argparse.Namespace, realised) -> None:
    from pathlib import Path

    from ..reporting.figures import save_figure
    from ..reporting.region_figure import region_pages

    formats, stem = _figure_target(args)
    background = args.background or args.like
    what = (f"background: {Path(background).name}" if background else "background: all regions (grey)")
    pages = region_pages(realised, background=background, title=what)
    written = []
    for k, fig in enumerate(pages, start=1):
        name = stem if len(pages) == 1 else stem.with_name(f"{stem.name}_page{k}")
        written += save_figure(fig, name, formats=formats, overwrite=args.overwrite)
    sys.stdout.write("figure: " + ", ".join(str(p) for p in written) + "\n")
