"""A first study file from a folder of maps (``roikit init``).

Looks at the file names of the maps (entities ``key-value`` separated by ``_``, as BIDS names them), proposes the
path pattern, the variance pattern, the contrasts and participants; reads participants.tsv (groups, covariates) and
an atlas if there is one; writes a commented study file with one analysis per obvious design and validates it with
:func:`roikit.study.load_study` before it is put in place.
"""

from __future__ import annotations

import os
import re
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import pandas as pd

from .._options import plural
from .._tables import check_output
from .._typing import PathLike
from ..errors import MapDiscoveryError, UsageError
from ..extraction import find_maps, read_participants
from .schema import Study, load_study

__all__ = ["propose_study", "write_study_file", "Proposal"]

_NIFTI = (".nii.gz", ".nii")
#: Entities that name the contrast, most likely first.
_CONTRAST_KEYS = ("contrast", "desc", "cond", "condition", "task")
#: Suffixes of effect maps and of variance maps, most likely first.
_EFFECT_SUFFIXES = ("effect", "beta", "estimate", "contrast", "map")
_VARIANCE_HINT = re.compile(r"var", re.IGNORECASE)
_DIFFERENCE = re.compile(r"(-|_)(vs|minus|gt|versus)(-|_)|>", re.IGNORECASE)
_PAIR = re.compile(r"[-_](?:vs|minus|gt|versus)[-_]|>", re.IGNORECASE)


@dataclass
class Proposal:
    """What :func:`propose_study` found and proposes (``text`` is the study file)."""

    effect: str
    variance: str | None
    contrasts: list[str]
    participants: list[str]
    participants_path: Path | None
    atlas: Path | None
    labels: Path | None
    analyses: list[dict] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    text: str = ""


def _split_name(path: Path) -> tuple[dict[str, str], str] | None:
    name = path.name
    for ext in _NIFTI:
        if name.endswith(ext):
            name = name[: -len(ext)]
            break
    else:
        return None
    parts = name.split("_")
    entities: dict[str, str] = {}
    suffix = ""
    for i, part in enumerate(parts):
        key, sep, value = part.partition("-")
        if sep and key and value and key not in entities:
            entities[key] = value
        elif i == len(parts) - 1:
            suffix = part
        else:
            return None
    return entities, suffix


def _relative(path: Path, start: Path) -> str:
    return Path(os.path.relpath(path, start)).as_posix()


def _toml(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    if isinstance(value, (int, float)):
        return repr(value)
    text = str(value).replace("\\", "\\\\").replace('"', '\\"')
    return f'"{text}"'


def _find_pattern(folder: Path) -> tuple[str, str | None, list[str]]:
    """(effect pattern, variance pattern or None, notes), patterns absolute with forward slashes."""
    files = sorted(p for p in folder.rglob("*") if p.is_file() and p.name.endswith(_NIFTI))
    parsed = [(p, _split_name(p)) for p in files]
    maps = [(p, e, s) for p, x in parsed if x is not None for e, s in [x] if "sub" in e]
    if not maps:
        raise MapDiscoveryError(
            f"{folder}: no map named with entities such as sub-01_contrast-novel_effect.nii.gz (found "
            f"{plural(len(files), 'NIfTI file')}); name the maps that way or write [maps] list = \"maps.tsv\" "
            "(participant_id, contrast, path) yourself")
    by_suffix: dict[str, list] = {}
    for item in maps:
        by_suffix.setdefault(item[2], []).append(item)
    variance_suffixes = [s for s in by_suffix if _VARIANCE_HINT.search(s)]
    effect_candidates = [s for s in by_suffix if s not in variance_suffixes]
    if not effect_candidates:
        raise MapDiscoveryError(f"{folder}: only variance maps found (suffixes {', '.join(by_suffix)})")
    ranked = sorted(effect_candidates, key=lambda s: (_EFFECT_SUFFIXES.index(s.lower())
                                                      if s.lower() in _EFFECT_SUFFIXES else 99, -len(by_suffix[s])))
    effect_suffix = ranked[0]
    notes = []
    if len(ranked) > 1:
        notes.append(f"maps with suffix {effect_suffix!r} taken as the effect maps (also found: "
                     f"{', '.join(ranked[1:])})")
    chosen = by_suffix[effect_suffix]
    keys = [k for k in chosen[0][1] if all(k in e for _, e, _ in chosen)]
    varying = [k for k in keys if k not in ("sub", "ses") and len({e[k] for _, e, _ in chosen}) > 1]
    constant = {k: chosen[0][1][k] for k in keys if k not in varying and k not in ("sub", "ses")}
    if not varying:
        raise MapDiscoveryError(f"{folder}: the maps differ only by participant; name the contrast in the file "
                                "names (e.g. sub-01_contrast-novel_effect.nii.gz)")
    contrast_key = sorted(varying, key=lambda k: (_CONTRAST_KEYS.index(k) if k in _CONTRAST_KEYS else 99))[0]
    others = [k for k in varying if k != contrast_key]
    if others:
        raise MapDiscoveryError(
            f"{folder}: besides {contrast_key}-, the entities {', '.join(k + '-' for k in others)} vary between "
            "maps; roikit init handles one varying entity besides sub- and ses-; write [maps] list = \"maps.tsv\" "
            "instead")
    folders = {p.parent for p, _, _ in chosen}
    if len(folders) == 1:
        where = folders.pop().as_posix()
    else:  # e.g. one folder per participant: sub-01/..., generalise the participant's label
        where = None

    def pattern_for(suffix: str, example: tuple) -> str:
        path, entities, _ = example
        parts = []
        for k in entities:
            if k == "sub":
                parts.append("sub-{subject}")
            elif k == "ses":
                parts.append("ses-{session}")
            elif k == contrast_key:
                parts.append(f"{contrast_key}-{{contrast}}")
            else:
                parts.append(f"{k}-{constant.get(k, entities[k])}")
        ext = ".nii.gz" if path.name.endswith(".nii.gz") else ".nii"
        name = "_".join(parts + [suffix]) + ext
        if where is not None:
            return f"{where}/{name}"
        parent = path.parent.as_posix()
        label = entities["sub"]
        parent = parent.replace(f"sub-{label}", "sub-{subject}")
        if "ses" in entities:
            parent = parent.replace(f"ses-{entities['ses']}", "ses-{session}")
        return f"{parent}/{name}"

    effect = pattern_for(effect_suffix, chosen[0])
    variance = None
    if variance_suffixes:
        vs = variance_suffixes[0]
        variance = pattern_for(vs, by_suffix[vs][0])
        if len(by_suffix[vs]) != len(chosen):
            notes.append(f"{plural(len(by_suffix[vs]), 'variance map')} for {plural(len(chosen), 'effect map')}: "
                         "check the variance pattern")
    return effect, variance, notes


def _find_beside(folder: Path, names: Sequence[str]) -> Path | None:
    for base in (folder, folder.parent):
        for name in names:
            hits = sorted(base.glob(name))
            if hits:
                return hits[0]
    return None


def _obvious_analyses(contrasts: list[str], participants: pd.DataFrame | None, has_variance: bool,
                      ids: list[str]) -> list[tuple[dict, str]]:
    """(analysis block, comment) for each obvious design."""
    out: list[tuple[dict, str]] = []
    differences = [c for c in contrasts if _DIFFERENCE.search(c)]
    simple = [c for c in contrasts if c not in differences]
    main = differences[0] if differences else contrasts[0]
    out.append(({"design": "one-sample", "contrast": main},
                f"is the mean of {main!r} different from 0 across participants?"))
    pair = None
    for d in differences:  # "novel-vs-familiar" names its pair
        parts = [x for x in _PAIR.split(d) if x]
        if len(parts) == 2 and all(x in simple for x in parts):
            pair = parts
            break
    if pair is None and len(simple) >= 2:
        pair = simple[:2]
    if pair is not None:
        a, b = pair
        out.append(({"design": "paired", "contrast": a, "versus": b},
                    f"{a!r} minus {b!r} within each participant (change contrast/versus to the pair you mean)"))
    if participants is not None:
        table = participants[participants["participant_id"].isin(ids)]
        covariates = []
        group = None
        for column in table.columns:
            if column == "participant_id":
                continue
            series = table[column].dropna()
            numeric = pd.to_numeric(series, errors="coerce")
            levels = sorted(map(str, series.unique()))
            if numeric.notna().all() and len(levels) > 2 and re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", column):
                covariates.append(column)
            elif len(levels) == 2 and group is None and re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", column):
                group = (column, levels)
        if group is not None:
            column, levels = group
            counts = table[column].astype(str).value_counts()
            out.append(({"design": "two-group", "contrast": main, "group": column, "levels": levels},
                        f"{levels[0]} ({counts.get(levels[0], 0)}) vs {levels[1]} ({counts.get(levels[1], 0)}) "
                        f"on {main!r}, from participants.tsv column {column!r}"))
        if covariates:
            chosen = covariates[0]
            rhs = chosen + (f" + {group[0]}" if group is not None else "")
            out.append(({"design": "glm", "contrast": main, "formula": f"value ~ {rhs}"},
                        f"does {main!r} vary with {chosen}" + (f", adjusting for {group[0]}?" if group else "?")
                        + (f" (other numeric columns: {', '.join(covariates[1:])})" if len(covariates) > 1 else "")))
    if has_variance:
        out.append(({"design": "precision-weighted", "contrast": main},
                    f"like the one-sample test on {main!r}, weighting each participant by the precision of "
                    "their first-level estimate (uses the variance maps)"))
    return out


def propose_study(
    folder: PathLike,
    *,
    study_file: PathLike | None = None,
    participants: PathLike | None = None,
    atlas: PathLike | None = None,
    labels: PathLike | None = None,
    spheres: Sequence[tuple[str, tuple[float, float, float], float]] = (),
    title: str | None = None,
) -> Proposal:
    """Look at a folder of maps and propose a study file (the text is in ``Proposal.text``).

    Parameters
    ----------
    folder : path
        Folder holding the maps (searched recursively), named with entities, e.g.
        ``sub-01_contrast-novel_effect.nii.gz`` and ``sub-01_contrast-novel_variance.nii.gz``.
    study_file : path, optional
        Where the study file will be written (paths in it are relative to it); default ``FOLDER/study.toml``.
    participants : path, optional
        participants.tsv; default: one in the folder or its parent.
    atlas, labels : path, optional
        Atlas image and label table; default: an ``*atlas*.nii*`` image (and ``*atlas*.tsv``) in the folder or
        its parent.
    spheres : sequence of (name, (x, y, z), radius)
        Spheres in world mm.
    title : str, optional

    Returns
    -------
    Proposal
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise UsageError(f"{folder}: not a folder; give the folder that holds the maps")
    study_file = Path(study_file) if study_file is not None else folder / "study.toml"
    base = study_file.resolve().parent
    effect, variance, notes = _find_pattern(folder.resolve())
    maps = find_maps(effect, variance=variance)
    contrasts = sorted(set(maps["contrast"]))
    ids = sorted(set(maps["participant_id"]))
    participants_path = Path(participants) if participants is not None else _find_beside(folder, ["participants.tsv"])
    table = read_participants(participants_path) if participants_path is not None else None
    if table is not None:
        missing = sorted(set(ids) - set(table["participant_id"]))
        if missing:
            notes.append(f"{plural(len(missing), 'participant')} with maps but not in participants.tsv: "
                         f"{', '.join(missing[:6])}{' ...' if len(missing) > 6 else ''}")
    if atlas is None and not spheres:
        found = _find_beside(folder, ["*atlas*.nii.gz", "*atlas*.nii"])
        if found is not None:
            atlas = found
            stem = found.name.replace(".nii.gz", "").replace(".nii", "")
            labels = labels or (found.parent / f"{stem}.tsv" if (found.parent / f"{stem}.tsv").is_file() else None)
    if atlas is None and not spheres:
        raise UsageError(f"{folder}: no atlas found beside the maps; give {_flag('atlas')} IMAGE [--labels TSV] or "
                         "--sphere NAME=X,Y,Z,RADIUS")
    analyses = _obvious_analyses(contrasts, table, variance is not None, ids)

    lines = [
        f"# Study file written by `roikit init` from {_relative(folder.resolve(), base)}/ .",
        "# Paths are relative to this file. Every key: docs/study-file.md (the same names as the command-line",
        "# options). Check it, then: roikit run " + study_file.name,
        "",
        "[study]",
        f"title = {_toml(title or _title(folder))}   # shown as the report's heading",
    ]
    if participants_path is not None:
        lines.append(f"participants = {_toml(_relative(participants_path.resolve(), base))}"
                     f"   # {plural(len(table), 'participant')}; columns: "
                     + ", ".join(c for c in table.columns if c != "participant_id"))
    lines += [
        "",
        "[maps]",
        f"# {plural(len(maps), 'map')}: {plural(len(ids), 'participant')} x {plural(len(contrasts), 'contrast')} "
        f"({', '.join(contrasts[:8])}{' ...' if len(contrasts) > 8 else ''})",
        f"effect = {_toml(_relative_pattern(effect, base))}",
    ]
    if variance is not None:
        lines.append(f"variance = {_toml(_relative_pattern(variance, base))}")
    lines += ["", "[regions]"]
    if atlas is not None:
        lines.append(f"atlas = {_toml(_relative(Path(atlas).resolve(), base))}")
        if labels is not None:
            lines.append(f"labels = {_toml(_relative(Path(labels).resolve(), base))}")
        else:
            lines.append("# no label table found: regions are named 'label <index>' (give labels = \"atlas.tsv\")")
    lines += ["# split_hemispheres = true   # left and right parts of every region (midline = \"drop\")",
              "# circular = [\"...\"]        # regions defined from these same data (flagged in every output)"]
    for name, centre, radius in spheres:
        lines += ["", "[[regions.sphere]]", f"name = {_toml(name)}", f"center = {_toml([float(v) for v in centre])}",
                  f"radius = {_toml(float(radius))}"]
    lines += ["", "[extraction]", 'statistic = "mean"   # or median, trimmed-mean, weighted-mean']
    for block, comment in analyses:
        lines += ["", f"# {comment}", "[[analysis]]"]
        lines += [f"{k} = {_toml(v)}" for k, v in block.items()]
    if notes:
        lines += [""] + [f"# note: {n}" for n in notes]
    text = "\n".join(lines) + "\n"
    return Proposal(effect=effect, variance=variance, contrasts=contrasts, participants=ids,
                    participants_path=participants_path, atlas=Path(atlas) if atlas else None,
                    labels=Path(labels) if labels else None, analyses=[a for a, _ in analyses], notes=notes,
                    text=text)


def _title(folder: Path) -> str:
    folder = folder.resolve()
    while folder.name.lower() in ("maps", "study", "data", "derivatives", "first-level", "firstlevel") and \
            folder.parent != folder:
        folder = folder.parent
    return f"{folder.name} study"


def _flag(name: str) -> str:
    from .._options import spell

    return spell(name).split(" ")[0].split("=")[0]


def _relative_pattern(pattern: str, base: Path) -> str:
    head, sep, tail = pattern.partition("{")
    folder = head.rsplit("/", 1)[0] if "/" in head else ""
    if not folder:
        return pattern
    rel = _relative(Path(folder), base)
    return (rel + "/" if rel != "." else "") + pattern[len(folder) + 1:]


def write_study_file(
    folder: PathLike,
    *,
    out: PathLike | None = None,
    overwrite: bool = False,
    **options,
) -> tuple[Path, Proposal, Study]:
    """Propose a study file (:func:`propose_study`), validate it with :func:`load_study`, write it.

    Returns the path written, the proposal and the validated study. Nothing is written when validation
    fails (the :class:`~roikit.study.schema.StudyError` lists every problem).
    """
    folder = Path(folder)
    out = Path(out) if out is not None else folder / "study.toml"
    check_output(out, overwrite=overwrite)
    proposal = propose_study(folder, study_file=out, **options)
    out.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".study-", suffix=".toml", dir=out.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(proposal.text)
        study = load_study(tmp)  # a StudyError lists every problem; nothing is written then
        os.replace(tmp, out)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    study.path = out
    return out, proposal, study
