"""`roikit regions`: list the regions of a region set on a grid."""

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
    p.add_argument("--overwrite", action="store_true", help="replace an existing --out file")
    p.set_defaults(func=run)


def _grid(args: argparse.Namespace, regions):
    from ..images import read_header
    from ..regions import Atlas, Mask, ProbabilityMap

    if args.like:
        return read_header(args.like).grid
    for source in regions.sources:
        if isinstance(source, (Atlas, Mask, ProbabilityMap)):
            return read_header(source.image).grid
    raise UsageError("spheres alone have no grid; give --like MAP to place them on a map's grid")


def run(args: argparse.Namespace) -> int:
    from .._tables import write_table

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
    return 0
