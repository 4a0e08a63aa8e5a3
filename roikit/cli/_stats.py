"""`roikit stats`: group statistics across regions from a region values table."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .. import __version__
from .._outputs import check_files
from .._tables import read_table, sha256_file, sidecar_path, write_table
from ..errors import RoikitError, UsageError
from ..stats import COLUMN_DESCRIPTIONS, available_designs, run_design
from ..stats.corrections import correction_choices_text, parse_corrections

#: Command-line design options, passed to the design in snake_case when given.
_WRITER = "roikit stats"

_DESIGN_OPTIONS = ("contrast", "versus", "group", "levels", "welch", "formula", "tau2", "random", "crossed",
                   "nested", "estimation", "test")


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "stats",
        help="group statistics (one-sample, paired, two-group, glm, ...) for every region",
        description="Test a group design in every region of a region values table at once, correct across "
        "regions within each design and term, and write RESULTS.tsv with a JSON sidecar describing every "
        "column, the options, the seed and the SHA-256 of the inputs. Designs: " + ", ".join(available_designs()),
    )
    p.add_argument("values", metavar="VALUES.tsv", help="region values table written by `roikit extract`")
    p.add_argument("--design", required=True, metavar="DESIGN", help="one of: " + ", ".join(available_designs()))
    g = p.add_argument_group("design options")
    g.add_argument("--contrast", metavar="C", help="contrast tested (paired: the first, A)")
    g.add_argument("--versus", metavar="B", help="paired: the contrast subtracted (term 'A - B')")
    g.add_argument("--group", metavar="COLUMN", help="two-group: participants.tsv column holding the groups")
    g.add_argument("--levels", metavar="L1,L2", help="two-group: the two levels compared (term 'L1 - L2')")
    g.add_argument("--welch", action="store_true", help="two-group: Welch's unequal-variance t-test")
    g.add_argument("--formula", metavar="FORMULA", help="model formula, e.g. \"value ~ age + group\": column names "
                   "(`in backquotes` with spaces), 0/1, + - * : / ( ), (a + b)**2, C(x), log(x), center(x), "
                   "scale(x); never run as code")
    g.add_argument("--tau2", metavar="METHOD", help="precision-weighted: between-participant variance estimator "
                   "(reml, ml, dl, pm)")
    g.add_argument("--random", metavar="TERMS", help="mixed: random terms per participant, e.g. \"1 + contrast\"")
    g.add_argument("--crossed", metavar="COLUMN", help="mixed: crossed random intercept for this column")
    g.add_argument("--nested", metavar="COLUMN", help="mixed: random intercept for COLUMN within participant "
                   "(labels made unique per participant)")
    g.add_argument("--no-center", dest="center", action="store_false", default=None,
                   help="mixed, precision-weighted: keep numeric covariates raw (default: mean-centre them; mixed "
                   "centres each within each region and records the mean in 'centered')")
    g.add_argument("--estimation", metavar="reml|ml", choices=("reml", "ml"),
                   help="mixed: restricted maximum likelihood (reml, default) or maximum likelihood (ml)")
    g.add_argument("--test", metavar="knha|knha-truncated|z", choices=("knha", "knha-truncated", "z"),
                   help="precision-weighted: Knapp-Hartung, the same with its variance factor truncated below at "
                   "1 (default), or z")
    g.add_argument("--contrasts", metavar="FILE", help="contrasts.tsv: column contrast plus per-contrast columns "
                   "the formula may name (e.g. load)")
    g.add_argument("--region-table", metavar="FILE", help="regions.tsv: column region plus per-region columns "
                   "the formula may name")
    g.add_argument("--jobs", type=int, default=None, metavar="N",
                   help="mixed: fit the regions in N worker processes (default 1)")
    p.add_argument("--participants", metavar="participants.tsv", help="participants table (groups, covariates)")
    p.add_argument("--out", required=True, metavar="RESULTS.tsv", help="output table")
    p.add_argument("--correct", default="holm,fdr", metavar="LIST",
                   help="corrections across regions, comma-separated; the FIRST is the primary one that text, table "
                   "notes, figure markers and summaries use: holm, fdr, bonferroni, fwe (max-statistic permutations; "
                   "needs --permutations N), none (uncorrected). Default holm,fdr")
    p.add_argument("--permutations", type=int, default=0, metavar="N",
                   help="permutations for the max-statistic family-wise p (p_fwe; precision-weighted mean: also a "
                   "per-region sign-flip p, p_permutation); default 0 (none)")
    p.add_argument("--seed", type=int, default=None, metavar="S", help="seed of the permutations (recorded)")
    p.add_argument("--confidence", type=float, default=0.95, metavar="LEVEL", help="confidence level (0.95)")
    p.add_argument("--overwrite", action="store_true", help="replace files roikit stats did not write (its own "
                   "earlier output is replaced without it)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    out = Path(args.out)
    # fail fast: a rerun replaces its own table and sidecar; anything else needs --overwrite
    check_files([out, sidecar_path(out)], writer=_WRITER, overwrite=args.overwrite)
    if args.design not in available_designs():
        raise UsageError(f"--design {args.design!r} is not available; expected one of: {', '.join(available_designs())}")
    if args.permutations < 0:
        raise UsageError(f"--permutations must be 0 or more, got {args.permutations}")
    try:
        corrections = parse_corrections(args.correct)
    except UsageError:
        raise UsageError(f"--correct {args.correct!r}: {correction_choices_text()}") from None
    if "fwe" in corrections and not args.permutations:
        raise UsageError(f"--correct {args.correct}: fwe (max-statistic permutation family-wise p) needs "
                         "--permutations N, e.g. --permutations 5000")
    values = read_table(args.values)
    participants = (
        read_table(args.participants, label_columns=("participant_id",)) if args.participants else None
    )
    options = {name: getattr(args, name) for name in _DESIGN_OPTIONS}
    options = {k: v for k, v in options.items() if v is not None and v is not False}
    if args.center is False:
        options["center"] = False
    if args.contrasts:
        options["contrasts"] = read_table(args.contrasts, label_columns=("contrast",))
    if args.region_table:
        options["region_table"] = read_table(args.region_table, label_columns=("region",))
    if args.jobs is not None:
        if args.jobs < 1:
            raise UsageError(f"--jobs must be at least 1, got {args.jobs}")
        options["n_jobs"] = args.jobs
    try:
        results = run_design(
            values,
            args.design,
            participants=participants,
            correct=args.correct,
            permutations=args.permutations,
            seed=args.seed,
            confidence=args.confidence,
            **options,
        )
    except RoikitError as exc:  # speak command-line language where the design left its spelling for us
        if getattr(exc, "cli_message", None):
            raise type(exc)(exc.cli_message) from None
        raise
    for name in ("contrasts", "region_table"):  # recorded as the files given, below
        options.pop(name, None)
    extra = results.attrs.get("column_descriptions", {}) if isinstance(results.attrs, dict) else {}
    columns = {c: extra.get(c, COLUMN_DESCRIPTIONS.get(c, "design-specific column (see roikit.stats)"))
               for c in results.columns}
    inputs = {"values": {"path": str(Path(args.values)), "sha256": sha256_file(args.values)}}
    for role, path in (("contrasts", args.contrasts), ("regions", args.region_table)):
        if path:
            inputs[role] = {"path": str(Path(path)), "sha256": sha256_file(path)}
    if args.participants:
        inputs["participants"] = {"path": str(Path(args.participants)), "sha256": sha256_file(args.participants)}
    seeds = results["seed"].dropna().unique().tolist() if "seed" in results.columns else []
    sidecar = {
        "description": f"roikit group results: design {args.design}, one row per region x term",
        "columns": columns,
        "options": {
            "design": args.design,
            **options,
            "correct": args.correct,
            "primary_correction": results["correction"].iloc[0].split(",")[0] if len(results) else None,
            "permutations": args.permutations,
            "seed": seeds[0] if seeds else args.seed,
            "confidence": args.confidence,
        },
        "inputs": inputs,
        "software": {"roikit": __version__},
        "note": "p_holm and p_fdr adjust across the regions of the same design and term (family_size); the first "
        "entry of the correction column is the primary correction. "
        "For research group analysis, not for clinical decisions.",
    }
    path = write_table(out, results, sidecar=sidecar, overwrite=args.overwrite, writer=_WRITER)
    sys.stderr.write(
        f"roikit stats: {args.design}, {results['region'].nunique()} regions x {results['term'].nunique()} term(s) "
        f"-> {path}\n"
    )
    return 0
