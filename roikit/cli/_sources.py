"""Region-source options shared by `roikit regions` and `roikit extract` (private)."""

from __future__ import annotations

import argparse

from .._options import option
from ..errors import UsageError

__all__ = ["add_region_options", "region_set_from_args"]


def add_region_options(parser: argparse.ArgumentParser) -> None:
    group = parser.add_argument_group("region sources (combinable; regions keep this order: atlas, masks, "
                                      "probability maps, spheres)")
    group.add_argument("--atlas", metavar="IMAGE", help="labelled atlas image (integer labels, 0 = background)")
    group.add_argument("--labels", metavar="TSV", help="label table of the atlas: TSV with `index` and `name` columns "
                       "(without one, regions are named 'label <index>' with a warning)")
    group.add_argument("--mask", metavar="NAME=IMAGE", action="append", default=[],
                       help="binary mask image as a region (repeatable)")
    group.add_argument("--sphere", metavar="NAME=X,Y,Z,RADIUS", action="append", default=[],
                       help="sphere at world coordinates in mm with a radius in mm (repeatable)")
    group.add_argument("--probability", metavar="NAME=IMAGE", action="append", default=[],
                       help="3D probability map thresholded into a region (repeatable; see --threshold)")
    group.add_argument("--threshold", type=float, default=0.5, metavar="P",
                       help="probability threshold for --probability maps (default 0.5)")
    group.add_argument("--split-hemispheres", action="store_true",
                       help="split every region into left (x < 0 mm) and right (x > 0 mm) parts")
    midline = option("midline", "regions")
    group.add_argument(midline.cli, choices=midline.choices, default=midline.default,
                       help=f"{midline.help} (default {midline.default})")
    group.add_argument("--within", metavar="IMAGE",
                       help="keep only region voxels inside this brain/analysis mask")
    group.add_argument("--select", metavar="A,B", help=option("select", "regions").help + " (comma-separated)")
    group.add_argument("--rename", metavar="OLD=NEW", action="append", default=[],
                       help="rename a region (repeatable)")


def _name_value(text: str, option: str) -> tuple[str, str]:
    name, sep, value = text.partition("=")
    if not sep or not name.strip() or not value.strip():
        raise UsageError(f"{option} {text!r}: expected NAME=VALUE, e.g. {option} 'left hippocampus=mask.nii.gz'")
    return name.strip(), value.strip()


def region_set_from_args(args: argparse.Namespace):
    from ..regions import Atlas, Mask, ProbabilityMap, RegionSet, Sphere

    sources = []
    if args.atlas is None and args.labels is not None:
        raise UsageError("--labels goes with --atlas IMAGE (the label table names the atlas's labels)")
    if args.atlas is not None:
        sources.append(Atlas(args.atlas, args.labels))
    for text in args.mask:
        name, image = _name_value(text, "--mask")
        sources.append(Mask(name, image))
    for text in args.probability:
        name, image = _name_value(text, "--probability")
        sources.append(ProbabilityMap(image, threshold=args.threshold, name=name))
    for text in args.sphere:
        name, spec = _name_value(text, "--sphere")
        parts = spec.split(",")
        try:
            numbers = [float(p) for p in parts]
        except ValueError:
            numbers = []
        if len(numbers) != 4:
            raise UsageError(f"--sphere {text!r}: expected NAME=X,Y,Z,RADIUS in mm, e.g. --sphere 'prior peak=30,-20,-14,6'")
        sources.append(Sphere(name, center=tuple(numbers[:3]), radius=numbers[3]))
    if not sources:
        raise UsageError("no region source given; use --atlas/--labels, --mask, --sphere or --probability")
    regions = RegionSet(sources)
    if args.split_hemispheres:
        regions = regions.split_hemispheres(midline=args.midline)
    if args.within:
        regions = regions.intersect(args.within)
    if getattr(args, "select", None):
        chosen = [n.strip() for n in args.select.split(",") if n.strip()]
        if not chosen:
            raise UsageError("--select: give region names separated by commas, e.g. --select 'left hippocampus,V1'")
        regions = regions.select(chosen)
    mapping = dict(_name_value(text, "--rename") for text in getattr(args, "rename", []) or [])
    if mapping:
        regions = regions.rename(mapping)
    return regions
