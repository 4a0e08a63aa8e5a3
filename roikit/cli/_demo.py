"""`roikit demo`: write the invented wayfinding study and run the pipeline on it."""

from __future__ import annotations

import argparse
import os

from ..errors import UsageError


HELP = "write an invented example study to DIR/study and run the pipeline into DIR/results"

#: Seed of the demo's generator (the same as roikit.demo.DEFAULT_SEED; a test checks they agree).
DEFAULT_SEED = 2024


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "demo", help=HELP,
        description="Generate the invented wayfinding study (32 adults, younger and older; first-level effect and "
                    "variance maps for novel, familiar, novel-vs-familiar and town1..town6, and two runs of "
                    "novel-vs-familiar; an atlas of nine regions, a prior-peak sphere and a functional region "
                    "selected leave-one-run-out; participants.tsv; a study file; the ground truth) in "
                    "DIR/study, then run the pipeline on it into DIR/results. All data are invented.")
    p.add_argument("--out", required=True, metavar="DIR", help="demo folder (study/ and results/ are written in it)")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, metavar="S",
                   help=f"seed of the generator (default {DEFAULT_SEED}); the same seed gives the same study")
    p.add_argument("--overwrite", action="store_true", help="replace an earlier demo in DIR (never anything else)")
    p.add_argument("--quiet", action="store_true",
                   help="no progress bar and no warnings on stderr (they stay in DIR/results/warnings.tsv and the "
                        "report); print only where the outputs are")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from ..demo import run_demo

    if args.seed < 0:
        raise UsageError(f"--seed must be a non-negative integer, got {args.seed}")
    demo = run_demo(args.out, seed=args.seed, overwrite=args.overwrite, progress=not args.quiet)
    args.warnings_file = demo.results / "warnings.tsv"
    truth = demo.study.ground_truth
    if args.quiet:
        print(demo.study.path)
        print(demo.results)
        return 0
    n = len(demo.study.participants)
    problems = ", ".join(f"{p['kind'].replace('_', ' ')} ({p['participant_id']})" for p in truth["planted_problems"])
    seconds = sum(demo.seconds.values())
    lines = [
        f"roikit demo: invented wayfinding study, {n} participants, seed {truth['seed']} ({seconds:.1f} s)",
        f"  study:        {demo.study.path}{os.sep}  (maps/, atlas.nii.gz + atlas.tsv, participants.tsv, study.toml)",
        f"  ground truth: {demo.outputs['ground_truth']}  (planted: {problems})",
        f"  results:      {demo.results}{os.sep}",
        f"    report:        {demo.outputs['report']}  (open in a browser)",
        f"    region values: {demo.outputs['region_values']}",
        f"    group results: {demo.outputs['group_results']}",
        f"    methods text:  {demo.outputs['methods']}",
        f"    tables:        {demo.results / 'tables'}{os.sep}   figures: {demo.results / 'figures'}{os.sep}",
        "All data are invented; see the study's README.md.",
    ]
    print("\n".join(lines))
    return 0
