"""`roikit extract`: per-participant region summaries of first-level maps."""

from __future__ import annotations

import argparse
import sys

from .._options import add_arguments, plural, resolve
from ..errors import UsageError
from ._cluster import add_scheduler_option, dask_client
from ._sources import add_region_options, region_set_from_args


HELP = "summarise every map over every region into a region values table"


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "extract", help=HELP,
        description="Read each first-level map once and summarise it over every region. Writes the region values "
                    "table (TSV, n/a for missing) and a JSON sidecar with column descriptions and provenance.")
    p.add_argument("--maps", metavar="PATTERN",
                   help="path pattern with {subject}, optional {session}, {run} and {contrast}, e.g. "
                        "'maps/sub-{subject}_contrast-{contrast}_effect.nii.gz'")
    p.add_argument("--map-list", metavar="TSV",
                   help="instead of --maps: a table of participant_id, contrast, [session_id], path, "
                        "[variance_path], [volume]")
    p.add_argument("--variance", metavar="PATTERN", help="path pattern of the matching variance maps")
    add_region_options(p)
    p.add_argument("--out", required=True, metavar="VALUES.tsv", help="output table (.tsv; .parquet for a Parquet file "
                   "written as extraction goes, for large studies)")
    add_arguments(p, "extraction")  # --statistic, --keep-zeros, --jobs: the [extraction] keys of a study file
    add_scheduler_option(p, does="extract the maps on the cluster's workers")
    p.add_argument("--quiet", action="store_true", help="no progress bar, summary or warnings on stderr")
    p.add_argument("--overwrite", action="store_true", help="replace files roikit extract did not write (its own earlier "
                   "output is replaced without it)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from .._outputs import check_files
    from .._tables import sidecar_path
    from ..extraction import VALUES_WRITER, extract_to_file, find_maps, read_map_list

    options, problems = resolve(args, "extraction")
    if problems:
        raise UsageError("; ".join(problems))
    # fail fast, before any work: a rerun replaces its own table and sidecar; anything else needs --overwrite
    check_files([args.out, sidecar_path(args.out)], writer=VALUES_WRITER, overwrite=args.overwrite)
    if (args.maps is None) == (args.map_list is None):
        raise UsageError("give exactly one of --maps PATTERN or --map-list TSV")
    regions = region_set_from_args(args)
    if args.maps is not None:
        maps = find_maps(args.maps, variance=args.variance)
    else:
        if args.variance:
            raise UsageError("--variance goes with --maps; with --map-list give a variance_path column")
        maps = read_map_list(args.map_list)
    options["progress"] = False if args.quiet else None
    # a .parquet --out is written as extraction goes (row groups of 64 maps): memory stays flat
    with dask_client(args.scheduler) as client:
        path, summary = extract_to_file(args.out, maps, regions, client=client, overwrite=args.overwrite, **options)
    if not args.quiet:
        sys.stderr.write(
            f"roikit extract: {plural(len(maps), 'map')} x {plural(summary['regions'], 'region')} -> {path} "
            f"({summary['rows']} rows, {summary['missing']} n/a)\n")
    return 0
