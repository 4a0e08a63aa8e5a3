"""`roikit stats`: group statistics across regions from a region values table."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .._options import add_arguments, plural, resolve, suggest, DESIGN_ALIASES
from ..errors import UsageError

HELP = "group statistics (one-sample, paired, two-group, glm, ...) for every region"


def add_parser(subparsers) -> None:
    from ..stats import available_designs

    designs = ", ".join(available_designs())
    p = subparsers.add_parser(
        "stats",
        help=HELP,
        description="Test a group design in every region of a region values table at once, correct across "
        "regions within each design and term, and write RESULTS.tsv with a JSON sidecar describing every "
        "column, the options, the seed and the SHA-256 of the inputs. The options are the [[analysis]] keys of "
        "a study file (docs/study-file.md). Designs: " + designs,
    )
    p.add_argument("values", metavar="VALUES.tsv", help="region values table written by `roikit extract`")
    p.add_argument("--design", required=True, metavar="DESIGN", help="one of: " + designs)
    add_arguments(p, "analysis", group_title="design options", only_design=True)
    p.add_argument("--participants", metavar="participants.tsv", help="participants table (groups, covariates)")
    p.add_argument("--out", required=True, metavar="RESULTS.tsv", help="output table")
    add_arguments(p, "analysis", only_design=False, skip=("design",))
    p.add_argument("--overwrite", action="store_true", help="replace existing output files")
    p.add_argument("--quiet", action="store_true", help="no summary and no warnings on stderr (the results keep "
                   "their diagnostic columns)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from .. import __version__
    from .._tables import check_output, read_table, sha256_file, sidecar_path, write_table
    from ..stats import COLUMN_DESCRIPTIONS, available_designs, run_design

    out = check_output(args.out, overwrite=args.overwrite)
    check_output(sidecar_path(out), overwrite=args.overwrite)
    if args.design not in available_designs():
        raise UsageError(f"--design {args.design!r} is not a design{suggest(args.design, available_designs(), DESIGN_ALIASES)} "
                         f"(designs: {', '.join(available_designs())})")
    options, problems = resolve(args, "analysis", only_design=True)
    shared, more = resolve(args, "analysis", only_design=False)
    problems += more
    if problems:
        raise UsageError("; ".join(problems))
    values = read_table(args.values)
    participants = (
        read_table(args.participants, label_columns=("participant_id",)) if args.participants else None
    )
    options = {k: v for k, v in options.items() if v is not None and v is not False}
    correct, permutations, seed, confidence = (shared.get(k) for k in ("correct", "permutations", "seed",
                                                                        "confidence"))
    results = run_design(
        values,
        args.design,
        participants=participants,
        correct=correct,
        permutations=permutations,
        seed=seed,
        confidence=confidence,
        **options,
    )
    extra = results.attrs.get("column_descriptions", {}) if isinstance(results.attrs, dict) else {}
    columns = {c: extra.get(c, COLUMN_DESCRIPTIONS.get(c, "design-specific column (see roikit.stats)"))
               for c in results.columns}
    inputs = {"values": {"path": str(Path(args.values)), "sha256": sha256_file(args.values)}}
    if args.participants:
        inputs["participants"] = {"path": str(Path(args.participants)), "sha256": sha256_file(args.participants)}
    seeds = results["seed"].dropna().unique().tolist() if "seed" in results.columns else []
    sidecar = {
        "description": f"roikit group results: design {args.design}, one row per region x term",
        "columns": columns,
        "options": {
            "design": args.design,
            **options,
            "correct": correct,
            "permutations": permutations,
            "seed": seeds[0] if seeds else seed,
            "confidence": confidence,
        },
        "inputs": inputs,
        "software": {"roikit": __version__},
        "note": "p_holm and p_fdr adjust across the regions of the same design and term (family_size). "
        "For research group analysis, not for clinical decisions.",
    }
    path = write_table(out, results, sidecar=sidecar, overwrite=args.overwrite)
    if not args.quiet:
        sys.stderr.write(f"roikit stats: {args.design}, {plural(results['region'].nunique(), 'region')} x "
                         f"{plural(results['term'].nunique(), 'term')} -> {path}\n")
    return 0
