"""`roikit init FOLDER`: a first, commented study file from a folder of maps."""

from __future__ import annotations

import argparse
import sys

from .._options import plural
from ._sources import _name_value

HELP = "write a first study file from a folder of maps (pattern, contrasts, participants, analyses)"


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "init", help=HELP,
        description="Look at the maps in FOLDER (named with entities, e.g. sub-01_contrast-novel_effect.nii.gz and "
                    "..._variance.nii.gz), a participants.tsv and an atlas (given, or found in FOLDER or its "
                    "parent), and write a commented study file with the maps' path pattern, the regions and one "
                    "[[analysis]] per obvious design (one-sample; paired for two contrasts; two-group for a "
                    "two-level column of participants.tsv; glm for a numeric column; precision-weighted with "
                    "variance maps). The file is validated before it is written. Every key: docs/study-file.md.")
    p.add_argument("folder", metavar="FOLDER", help="folder holding the maps (searched recursively)")
    p.add_argument("--out", metavar="STUDY.toml", help="study file to write (default FOLDER/study.toml)")
    p.add_argument("--participants", metavar="participants.tsv",
                   help="participants table (default: participants.tsv in FOLDER or its parent)")
    p.add_argument("--atlas", metavar="IMAGE", help="labelled atlas image (default: *atlas*.nii[.gz] beside the maps)")
    p.add_argument("--labels", metavar="TSV", help="label table of the atlas (index, name)")
    p.add_argument("--sphere", metavar="NAME=X,Y,Z,RADIUS", action="append", default=[],
                   help="sphere at world coordinates in mm (repeatable)")
    p.add_argument("--title", help="study title")
    p.add_argument("--overwrite", action="store_true", help="replace an existing study file")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from ..errors import UsageError
    from ..study.init import write_study_file

    spheres = []
    for text in args.sphere:
        name, spec = _name_value(text, "--sphere")
        try:
            x, y, z, r = (float(v) for v in spec.split(","))
        except ValueError:
            raise UsageError(f"--sphere {text!r}: expected NAME=X,Y,Z,RADIUS in mm") from None
        spheres.append((name, (x, y, z), r))
    path, proposal, study = write_study_file(
        args.folder, out=args.out, overwrite=args.overwrite, participants=args.participants, atlas=args.atlas,
        labels=args.labels, spheres=spheres, title=args.title)
    lines = [
        f"roikit init: wrote {path} (checked: it loads)",
        f"  maps:         {proposal.effect}" + (f"\n  variance:     {proposal.variance}" if proposal.variance else ""),
        f"  found:        {plural(len(proposal.participants), 'participant')} x "
        f"{plural(len(proposal.contrasts), 'contrast')} ({', '.join(proposal.contrasts[:6])}"
        f"{' ...' if len(proposal.contrasts) > 6 else ''}), {plural(len(study.realised.names), 'region')}",
        "  analyses:     " + "; ".join(f"{a['design']} {a.get('contrast', '')}".strip()
                                    + (f" vs {a['versus']}" if a.get("versus") else "") for a in proposal.analyses),
    ]
    lines += [f"  note: {n}" for n in proposal.notes]
    lines.append(f"Edit it (every key: docs/study-file.md), then: roikit run {path}")
    sys.stdout.write("\n".join(lines) + "\n")
    return 0
