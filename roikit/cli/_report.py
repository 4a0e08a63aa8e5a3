"""`roikit report`: paper-ready tables, figures, methods text and a self-contained HTML report."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .._options import plural
from ..errors import UsageError


HELP = "tables, figures, methods text and a self-contained HTML report"


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "report",
        help=HELP,
        description="Write DIR/tables/ (Markdown, LaTeX booktabs, HTML, Word, TSV), DIR/figures/ (PDF, SVG, "
        "300-dpi PNG at journal widths), DIR/methods.md, a single self-contained DIR/report.html and "
        "DIR/provenance.json (inputs with SHA-256, versions, options, seeds) from a region values table and a "
        "group results table. For research group analysis, not for clinical decisions about an individual patient.",
    )
    p.add_argument("--values", required=True, metavar="VALUES.tsv", help="region values table (`roikit extract`)")
    p.add_argument("--results", required=True, metavar="RESULTS.tsv", help="group results table (`roikit stats`)")
    p.add_argument("--participants", metavar="participants.tsv", help="participants table (groups, covariates)")
    p.add_argument("--out", required=True, metavar="DIR", help="output directory")
    p.add_argument("--overwrite", action="store_true", help="write into a DIR that holds files roikit report did "
                   "not write (an earlier report there is replaced without it)")
    p.add_argument("--quiet", action="store_true", help="no summary and no warnings on stderr (the report's "
                   "cautions section keeps them)")
    p.add_argument("--title", default="Region-of-interest group analysis", help="report title")
    p.add_argument("--regions", metavar="A,B", help="draw and tabulate only these regions (comma-separated names)")
    p.add_argument("--contrasts", metavar="contrasts.tsv", default=None,
                   help="contrasts table; its JSON sidecar (LongName, Levels) names contrasts and their variables in "
                   "the text and tables")
    p.add_argument("--correct", metavar="NAME", default=None,
                   help="primary correction to report (text, table notes, figure markers) instead of the results' "
                   "own (the first entry of their correction column): holm, fdr, bonferroni, fwe or none; it must "
                   "be one the results table carries")
    p.add_argument("--circular", action="append", default=[], metavar="REGION",
                   help="region defined from the same data that are tested (adds a circularity caution; repeatable)")
    p.add_argument("--value-label", metavar="TEXT",
                   help='axis label of the region values with their unit, e.g. "Parameter estimate (a.u.)" or '
                        '"%% signal change" (default: region value)')
    p.add_argument("--background", metavar="IMAGE",
                   help="background of the region figure (default: the mean of the maps named in the values' "
                        "provenance)")
    p.set_defaults(func=run)


def _sidecar(path: Path) -> dict:
    from .._tables import read_sidecar

    return read_sidecar(path)


def _names(text: str) -> list[str]:
    return [t.strip() for t in text.split(",") if t.strip()]


def _regions_used(results) -> dict[str, list[str]]:
    """For results rows about several regions: their region label -> the regions of the values table they use.

    From ``regions_compared`` (region-difference) or the ``cells`` of a repeated-measures row (JSON list of
    ``[contrast, region, levels]``); a label "A - B" without those columns names its two regions.
    """
    import json

    used: dict[str, list[str]] = {}
    for row in results.to_dict("records"):
        label = str(row.get("region"))
        found: list[str] = []
        compared, cells = row.get("regions_compared"), row.get("cells")
        if isinstance(compared, str) and compared:
            found = compared.split(",")
        elif isinstance(cells, str) and cells.startswith("["):
            try:
                found = [str(c[1]) for c in json.loads(cells) if isinstance(c, list) and len(c) > 1]
            except ValueError:
                found = []
        elif " - " in label:
            found = label.split(" - ")
        if found:
            used[label] = list(dict.fromkeys(used.get(label, []) + found))
    return used


def _same_regions(values, results, args):
    """Keep only ``--regions`` (when given); refuse values and results that do not cover the same regions."""
    from .._options import suggest

    in_values = list(dict.fromkeys(values["region"].astype(str)))
    in_results = list(dict.fromkeys(results["region"].astype(str))) if "region" in results.columns else []
    # rows about several regions (a region difference "A - B", a repeated-measures row over a within-region factor
    # such as "hippocampus (left, right)") are fine when every region they use is in the values table
    parts_of = _regions_used(results)
    pairs = {r for r in in_results if r in parts_of and all(x in in_values for x in parts_of[r])}
    if args.regions is not None:
        wanted = _names(args.regions)
        unknown = [r for r in wanted if r not in in_values]
        if not wanted or unknown:
            raise UsageError(f"--regions: {', '.join(map(repr, unknown)) or 'no name given'} not in {args.values}"
                             f"{suggest(unknown[0], in_values) if unknown else ''}; its regions are "
                             f"{', '.join(in_values)}")
        values = values[values["region"].astype(str).isin(wanted)]
        keep = results["region"].astype(str).isin(wanted) | results["region"].astype(str).map(
            lambda r: r in parts_of and all(x in wanted for x in parts_of[r]))
        results = results[keep]
        in_values, in_results = wanted, [r for r in in_results if r in wanted or r in pairs]
    used = {x for r in in_results if r in pairs for x in parts_of[r]}
    only_values = [r for r in in_values if r not in in_results and r not in used]
    only_results = [r for r in in_results if r not in in_values and r not in pairs]
    if only_values or only_results:
        parts = []
        if only_values:
            parts.append(f"only in --values: {', '.join(only_values[:8])}{' ...' if len(only_values) > 8 else ''}")
        if only_results:
            parts.append(f"only in --results: {', '.join(only_results[:8])}{' ...' if len(only_results) > 8 else ''}")
        raise UsageError(f"{args.values} and {args.results} do not cover the same regions ({'; '.join(parts)}); "
                         "give the values the results were computed from, or --regions A,B to report some regions")
    return values.reset_index(drop=True), results.reset_index(drop=True)


def run(args: argparse.Namespace) -> int:
    from .._tables import read_table, sha256_file, sidecar_path
    from ..reporting.report import check_report_outputs, labels_from_sidecar, write_report

    out = Path(args.out)
    check_report_outputs(out, args.overwrite)  # fail fast, before any work
    if out.exists() and not out.is_dir():
        raise UsageError(f"--out {out}: exists and is not a directory; choose a directory path")
    values_path, results_path = Path(args.values), Path(args.results)
    values = read_table(values_path)
    results = read_table(results_path)
    participants = read_table(args.participants, label_columns=("participant_id",)) if args.participants else None
    values, results = _same_regions(values, results, args)
    from ..reporting._common import read_sidecar_labels

    labels = {**(read_sidecar_labels(args.contrasts) if args.contrasts else {}),
              **(read_sidecar_labels(args.participants) if args.participants else {})}
    side = _sidecar(values_path)
    prov = side.get("provenance") if isinstance(side.get("provenance"), dict) else {}
    if prov:
        values.attrs["roikit"] = prov
    inputs = [{"role": "values", "path": str(values_path), "sha256": sha256_file(values_path)},
              {"role": "results", "path": str(results_path), "sha256": sha256_file(results_path)}]
    if args.participants:
        inputs.append({"role": "participants", "path": str(args.participants),
                       "sha256": sha256_file(args.participants)})
    for p in (values_path, results_path):
        if sidecar_path(p).is_file():
            inputs.append({"role": f"sidecar of {p.name}", "path": str(sidecar_path(p)),
                           "sha256": sha256_file(sidecar_path(p))})
    results_side = _sidecar(results_path)
    options = {"command": "roikit report", "argv": sys.argv[1:], "overwrite": args.overwrite}
    if results_side:
        options["results_options"] = {k: results_side[k] for k in ("options", "design", "seed") if k in results_side}
    written = write_report(values, results, participants=participants, out=out, overwrite=args.overwrite,
                           provenance={"inputs": inputs, "options": options}, title=args.title,
                           circular=args.circular, correct=args.correct, labels=labels, value_label=args.value_label,
                           region_background=args.background or "maps",
                           column_labels=labels_from_sidecar(args.participants) if args.participants else None)
    n_fig = sum(1 for p in written["figures"] if p.suffix == ".png")
    if args.quiet:
        return 0
    print(f"roikit report: wrote {plural(len(written['tables']), 'table file')}, {plural(n_fig, 'figure')}, methods "
          f"and results (.md, .docx), {written['references'].name}, {written['html'].name}, "
          f"{written['provenance'].name} and {written['index'].name} (every file with its caption) in {out}")
    return 0
