"""`roikit run STUDY.toml`: run a whole study file (extraction, every analysis, the report)."""

from __future__ import annotations

import argparse

from .._options import option
from ._cluster import add_scheduler_option, dask_client


HELP = "run a study file: extraction, every analysis and the report"


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "run",
        help=HELP,
        description="Validate the study file (TOML; every key and its command-line twin are listed in "
        "docs/study-file.md; `roikit init FOLDER` writes a first one; paths are relative to the file) and report "
        "every problem at once; then extract the region values of the contrasts the analyses use (maps whose "
        "bytes an earlier run into the same folder already read are taken from its cache in DIR/.cache/), run "
        "every [[analysis]] and write region_values.tsv, group_results.tsv (with JSON sidecars), tables/, "
        "figures/, report.html, methods.md, warnings.tsv and provenance.json into DIR, and print a short summary. "
        "Running a study again into its own folder replaces the earlier run's outputs as a set; files roikit did "
        "not write are kept.",
    )
    p.add_argument("study", metavar="STUDY.toml", help="the study file")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="output folder (default: a folder named results beside the study file)")
    p.add_argument("--overwrite", action="store_true",
                   help="write into a DIR that roikit did not write for this study file (not needed to run the "
                   "same study again; files roikit did not write are kept unless an output has their name)")
    p.add_argument("--no-figures", action="store_true", help="skip the report's figures (faster; tables and text only)")
    p.add_argument("--quiet", action="store_true",
                   help="no progress bar and no warnings on stderr (they stay in DIR/warnings.tsv and the report); "
                        "print only the output folder")
    p.add_argument("--value-label", metavar="TEXT",
                   help='axis label of the region values with their unit, e.g. "%% signal change" (overrides the '
                        "study file's [study] value_label)")
    add_scheduler_option(p, does="extract the maps and fit the analyses' regions on the cluster's workers (the "
                         "report is drawn here)")
    table_format = option("table_format", "study")  # the options table: flag, choices and help
    p.add_argument(table_format.cli, choices=table_format.choices, default=None, metavar=table_format.metavar,
                   help=f"{table_format.help}; overrides the study file's [study] table_format (default "
                        f"{table_format.default})")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from ..study import load_study, run_study

    study = load_study(args.study)
    if args.value_label:
        study.value_label = args.value_label
    with dask_client(args.scheduler) as client:
        result = run_study(study, out=args.out, overwrite=args.overwrite, progress=False if args.quiet else None,
                           figures=not args.no_figures, client=client, table_format=args.table_format)
    args.warnings_file = result.out / "warnings.tsv"
    print(result.out if args.quiet else result.summary())
    return 0
