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
    p.add_argument("--overwrite", action="store_true", help="replace existing report files")
    p.add_argument("--quiet", action="store_true", help="no summary and no warnings on stderr (the report's "
                   "cautions section keeps them)")
    p.add_argument("--title", default="Region-of-interest group analysis", help="report title")
    p.add_argument("--circular", action="append", default=[], metavar="REGION",
                   help="region defined from the same data that are tested (adds a circularity caution; repeatable)")
    p.set_defaults(func=run)


def _sidecar(path: Path) -> dict:
    from .._tables import read_sidecar

    return read_sidecar(path)


def run(args: argparse.Namespace) -> int:
    from .._tables import read_table, sha256_file, sidecar_path
    from ..reporting.report import check_report_outputs, write_report

    out = Path(args.out)
    check_report_outputs(out, args.overwrite)  # fail fast, before any work
    if out.exists() and not out.is_dir():
        raise UsageError(f"--out {out}: exists and is not a directory; choose a directory path")
    values_path, results_path = Path(args.values), Path(args.results)
    values = read_table(values_path)
    results = read_table(results_path)
    participants = read_table(args.participants, label_columns=("participant_id",)) if args.participants else None
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
                           circular=args.circular)
    n_fig = sum(1 for p in written["figures"] if p.suffix == ".png")
    if args.quiet:
        return 0
    print(f"roikit report: wrote {plural(len(written['tables']), 'table file')}, {plural(n_fig, 'figure')}, "
          f"{written['methods'].name}, {written['html'].name} and {written['provenance'].name} in {out}")
    return 0
