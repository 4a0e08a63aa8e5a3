"""`roikit stats`: group statistics across regions from a region values table."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .._options import add_arguments, plural, resolve, suggest, DESIGN_ALIASES
from ..errors import UsageError
from ._cluster import add_scheduler_option, dask_client

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
    p.add_argument("--contrasts", metavar="FILE", help="contrasts.tsv: column contrast plus per-contrast columns "
                   "that formulas and within factors may name (e.g. load, route)")
    p.add_argument("--region-table", metavar="FILE", help="regions.tsv: column region plus per-region columns "
                   "that formulas and within factors may name (e.g. hemisphere)")
    p.add_argument("--participants", metavar="participants.tsv", help="participants table (groups, covariates)")
    p.add_argument("--out", required=True, metavar="RESULTS.tsv", help="output table")
    add_arguments(p, "analysis", only_design=False, skip=("design",))
    p.add_argument("--overwrite", action="store_true", help="replace files roikit stats did not write (its own "
                   "earlier output is replaced without it)")
    p.add_argument("--quiet", action="store_true", help="no summary and no warnings on stderr (the results keep "
                   "their diagnostic columns)")
    add_scheduler_option(p, does="fit the regions (in chunks of 16) and the permutations on the cluster's workers")
    p.set_defaults(func=run)


#: The writer recorded in the output folder's manifest (a rerun replaces its own table without --overwrite).
_WRITER = "roikit stats"


def run(args: argparse.Namespace) -> int:
    from .. import __version__
    from .._outputs import check_files
    from .._tables import read_table, sha256_file, sidecar_path, write_table
    from ..errors import RoikitError
    from ..stats import COLUMN_DESCRIPTIONS, available_designs, run_design
    from ..stats.corrections import correction_choices_text, parse_corrections

    out = Path(args.out)
    # fail fast: a rerun replaces its own table and sidecar; anything else needs --overwrite
    check_files([out, sidecar_path(out)], writer=_WRITER, overwrite=args.overwrite)
    if args.design not in available_designs():
        raise UsageError(f"--design {args.design!r} is not a design{suggest(args.design, available_designs(), DESIGN_ALIASES)} "
                         f"(designs: {', '.join(available_designs())})")
    options, problems = resolve(args, "analysis", only_design=True)
    shared, more = resolve(args, "analysis", only_design=False)
    problems += more
    if problems:
        raise UsageError("; ".join(problems))
    try:
        corrections = parse_corrections(shared.get("correct"))
    except UsageError:
        raise UsageError(f"--correct {shared.get('correct')!r}: {correction_choices_text()}") from None
    if "fwe" in corrections and not shared.get("permutations"):
        raise UsageError(f"--correct {shared.get('correct')}: fwe (max-statistic permutation family-wise p) needs "
                         "--permutations N, e.g. --permutations 5000")
    values = read_table(args.values)
    runs = None
    if "run_id" in values.columns:  # per-run values: one value per participant, as roikit run analyses them
        from ..functional import collapse_runs

        n_in = len(values)
        n_runs = int(values["run_id"].dropna().nunique())
        values = collapse_runs(values)
        runs = {"averaged_over_runs": True, "runs": n_runs, "rows_read": n_in, "rows_analysed": len(values),
                "note": "The values table has runs (run_id): each participant's value per contrast and region is "
                        "the mean over runs, its variance the mean of the runs' variances divided by the number of "
                        "runs (independent runs), as roikit run analyses them (roikit.functional.collapse_runs); "
                        "functional regions' rows are already means over their folds."}
    participants = (
        read_table(args.participants, label_columns=("participant_id",)) if args.participants else None
    )
    options = {k: v for k, v in options.items() if v is not None and v is not False}
    if getattr(args, "center", None) is False:  # --no-center: the one design option whose "off" is given
        options["center"] = False
    if args.contrasts:
        options["contrasts"] = read_table(args.contrasts, label_columns=("contrast",))
    if args.region_table:
        options["region_table"] = read_table(args.region_table, label_columns=("region",))
    correct, permutations, seed, confidence = (shared.get(k) for k in ("correct", "permutations", "seed",
                                                                        "confidence"))
    try:
        with dask_client(args.scheduler) as client:
            results = run_design(
                values,
                args.design,
                participants=participants,
                correct=correct,
                permutations=permutations,
                seed=seed,
                confidence=confidence,
                client=client,
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
            "correct": correct,
            "primary_correction": results["correction"].iloc[0].split(",")[0] if len(results) else None,
            "permutations": permutations,
            "seed": seeds[0] if seeds else seed,
            "confidence": confidence,
        },
        "inputs": inputs,
        **({"runs": runs} if runs else {}),
        "software": {"roikit": __version__},
        "note": "p_holm and p_fdr adjust across the regions of the same design and term (family_size). "
        "For research group analysis, not for clinical decisions.",
    }
    path = write_table(out, results, sidecar=sidecar, overwrite=args.overwrite, writer=_WRITER)
    if not args.quiet:
        sys.stderr.write(f"roikit stats: {args.design}, {plural(results['region'].nunique(), 'region')} x "
                         f"{plural(results['term'].nunique(), 'term')} -> {path}"
                         + (f" (values averaged over {plural(runs['runs'], 'run')} per participant, contrast and "
                            "region, as roikit run does)" if runs else "") + "\n")
    return 0
