"""`roikit extract`: per-participant region summaries of first-level maps."""

from __future__ import annotations

import argparse
import re
import sys

from .._options import add_arguments, check_value, option, options_in, plural, resolve, suggest
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
                   help="instead of --maps: a table of participant_id, contrast, [session_id], [run_id], path, "
                        "[variance_path], [volume]")
    p.add_argument("--variance", metavar="PATTERN", help="path pattern of the matching variance maps")
    add_region_options(p)
    # --functional (the [[regions.functional]] keys in one text, repeatable) and --functional-contrasts
    add_arguments(p, "regions", group_title="functional regions (each participant's voxels from a localiser)",
                  only=("functional",))
    add_arguments(p, "", only=("functional_contrasts",))
    p.add_argument("--out", required=True, metavar="VALUES.tsv", help="output table (.tsv; .parquet for a Parquet file "
                   "written as extraction goes, for large studies)")
    add_arguments(p, "extraction")  # --statistic, --keep-zeros, --jobs: the [extraction] keys of a study file
    add_scheduler_option(p, does="extract the maps on the cluster's workers")
    p.add_argument("--quiet", action="store_true", help="no progress bar, summary or warnings on stderr")
    p.add_argument("--overwrite", action="store_true", help="replace files roikit extract did not write (its own earlier "
                   "output is replaced without it)")
    p.set_defaults(func=run)


#: The keys of --functional after the name: those of a [[regions.functional]] block.
_FUNCTIONAL_KEYS = tuple(o.study_key for o in options_in("regions.functional") if o.study_key != "name")
_EXAMPLE = "--functional 'novelty fROI:within=left hippocampus,localiser=novel,top=10%,split=run'"


def functional_from_args(texts: list[str] | None) -> list:
    """FunctionalRegions from --functional texts: ``NAME:key=value,key=value`` with the study file's keys.

    A comma starts a new pair only before a known key, so region names may hold commas; ``circular_ok`` alone
    means ``circular_ok=true``. Values are checked by the options table, as in a study file.
    """
    from ..functional import FunctionalRegion

    regions, names = [], set()
    bare = "|".join(re.escape(o.study_key) for o in options_in("regions.functional") if o.type == "bool")
    for text in texts or []:
        name, sep, rest = text.partition(":")
        name = name.strip()
        if not sep or not name or not rest.strip():
            raise UsageError(f"--functional {text!r}: expected NAME:within=REGION,localiser=CONTRAST,top=10% "
                             f"(or top=20, or threshold=3.1), e.g. {_EXAMPLE}")
        spec: dict = {}
        # a new pair starts at a comma before "word=" (or a true/false key alone)
        for pair in re.split(rf",\s*(?=\w+\s*=|(?:{bare})\s*(?:,|$))", rest.strip()):
            key, eq, value = (part.strip() for part in pair.partition("="))
            if key not in _FUNCTIONAL_KEYS:
                raise UsageError(f"--functional {text!r}: unknown key {key!r}{suggest(key, _FUNCTIONAL_KEYS)} "
                                 f"(keys: {', '.join(_FUNCTIONAL_KEYS)}); e.g. {_EXAMPLE}")
            if key in spec:
                raise UsageError(f"--functional {text!r}: {key} given twice; give it once")
            o = option(key, "regions.functional")
            if o.type == "bool":
                parsed = {"": True, "true": True, "yes": True, "false": False, "no": False}.get(value.lower(), value)
            elif o.type == "int" or key == "top" and re.fullmatch(r"\d+", value):
                parsed = int(value) if re.fullmatch(r"\d+", value) else value
            elif o.type == "float":
                try:
                    parsed = float(value)
                except ValueError:
                    parsed = value
            else:
                parsed = value
            problem = None if key == "top" else check_value(o, parsed)
            share = re.fullmatch(r"(\d+(?:\.\d*)?|\.\d+)\s*%", value)
            if key == "top" and not (isinstance(parsed, int) and parsed >= 1
                                     or share and 0 < float(share.group(1)) <= 100):
                problem = f"must be a voxel count (top=20) or a share of the search space (top=10%), found {value!r}"
            if problem:
                raise UsageError(f"--functional {text!r}: {key} {problem}")
            spec[key] = parsed
        missing = [k for k in ("within", "localiser") if k not in spec]
        if missing:
            raise UsageError(f"--functional {text!r}: give {' and '.join(k + '=...' for k in missing)}; "
                             f"e.g. {_EXAMPLE}")
        if ("top" in spec) == ("threshold" in spec):
            raise UsageError(f"--functional {text!r}: give top (top=20 voxels, or top=10% of the search space) or "
                             "threshold (threshold=3.1), one of them")
        if name in names:
            raise UsageError(f"--functional: {name!r} is given twice; each functional region needs its own name")
        names.add(name)
        try:
            regions.append(FunctionalRegion(name, **spec))
        except UsageError as exc:
            raise UsageError(f"--functional {text!r}: {exc}") from None
    return regions


def run(args: argparse.Namespace) -> int:
    from .._outputs import check_files
    from .._tables import sidecar_path
    from ..extraction import VALUES_WRITER, extract_to_file, find_maps, read_map_list

    options, problems = resolve(args, "extraction")
    if problems:
        raise UsageError("; ".join(problems))
    functional = functional_from_args(args.functional)
    if args.functional_contrasts is not None and not functional:
        raise UsageError("--functional-contrasts goes with --functional (the contrasts measured over functional "
                         "regions)")
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
    if functional:
        options["functional"] = functional
        if args.functional_contrasts is not None:
            chosen = [c.strip() for c in args.functional_contrasts.split(",") if c.strip()]
            if not chosen:
                raise UsageError("--functional-contrasts: give contrast names separated by commas, e.g. "
                                 "--functional-contrasts novel,familiar")
            options["functional_contrasts"] = chosen
    # a .parquet --out is written as extraction goes (row groups of 64 maps): memory stays flat
    with dask_client(args.scheduler) as client:
        path, summary = extract_to_file(args.out, maps, regions, client=client, overwrite=args.overwrite, **options)
    if not args.quiet:
        sys.stderr.write(
            f"roikit extract: {plural(len(maps), 'map')} x {plural(summary['regions'], 'region')} -> {path} "
            f"({summary['rows']} rows, {summary['missing']} n/a)\n")
    return 0
