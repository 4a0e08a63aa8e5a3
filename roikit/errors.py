"""Exceptions and warnings raised by roikit.

Every error subclasses :class:`RoikitError` *and* the built-in exception it
resembles, so ``except ValueError`` keeps working for callers who do not know
roikit. The command line maps :class:`RoikitError` to exit status 1 (a data
error) and :class:`UsageError` to exit status 2.

Messages name the file, column or parameter, what was found, what was
expected, and one way to fix it.
"""

from __future__ import annotations

__all__ = [
    "RoikitError",
    "UsageError",
    "InputFileError",
    "ImageFormatError",
    "GridMismatchError",
    "RegionError",
    "MapDiscoveryError",
    "ExtractionError",
    "ClusterError",
    "OutputExistsError",
    "OutputLockedError",
    "OutputWriteError",
    "DesignError",
    "ConvergenceError",
    "RoikitWarning",
    "ResamplingWarning",
    "LabelTableWarning",
    "CoverageWarning",
    "MissingValueWarning",
    "DiagnosticWarning",
    "CautionWarning",
    "InputWarning",
    "RegionOverlapWarning",
    "RoikitDeprecationWarning",
    "warning_records",
    "summarise_warnings",
    "summarised",
    "WARNING_COLUMNS",
    "CircularAnalysisError",
]


class RoikitError(Exception):
    """Base class of every error roikit raises on purpose."""


class UsageError(RoikitError, ValueError):
    """A parameter or option has an invalid value (command line exit status 2)."""


class CircularAnalysisError(UsageError):
    """A functional region would be selected and tested on the same data (circular analysis)."""


class InputFileError(RoikitError, FileNotFoundError):
    """An input file is missing or cannot be read."""


class ImageFormatError(RoikitError, ValueError):
    """A file is not a readable NIfTI image, is corrupt, or has the wrong dimensionality."""


class GridMismatchError(RoikitError, ValueError):
    """Two images do not share a voxel grid (shape and affine) or a world space."""


class RegionError(RoikitError, ValueError):
    """A region definition is invalid or realises to no voxels."""


class MapDiscoveryError(RoikitError, ValueError):
    """Maps could not be found or are listed ambiguously (duplicates, no matches)."""


class ExtractionError(RoikitError, RuntimeError):
    """Several maps (or a batch of them on a worker) failed during extraction; see ``failures``."""


class ClusterError(RoikitError, ConnectionError):
    """A Dask scheduler (``--scheduler ADDRESS``, ``client=``) cannot be reached."""


class OutputExistsError(RoikitError, FileExistsError):
    """An output file exists and overwriting was not allowed."""


class OutputLockedError(RoikitError, BlockingIOError):
    """Another roikit command is writing into the same output folder (its lock file is held)."""


class OutputWriteError(RoikitError, OSError):
    """An output file or folder cannot be written (permissions, read-only or full disk, name too long)."""


def describe_os_error(path, exc: OSError, *, action: str = "write") -> str:
    """One line for an operating-system error on ``path``: what happened and what to do (used by every layer)."""
    import errno

    code = getattr(exc, "errno", None)
    reason = getattr(exc, "strerror", None) or str(exc) or type(exc).__name__
    name = str(path)
    if code == errno.ENOSPC:
        fix = "the disk is full; free some space or write to another disk"
    elif code == errno.ENAMETOOLONG:
        longest = max((len(part) for part in name.replace("\\", "/").split("/")), default=0)
        fix = (f"a name in the path is too long ({longest} characters; most file systems allow 255 bytes per name "
               "and 4096 per path); choose a shorter name")
    elif code in (errno.EACCES, errno.EPERM):
        fix = f"permission denied; choose a location you may {action}, or change the permissions"
    elif code == errno.EROFS:
        fix = "the file system is read-only; choose another location"
    elif code == errno.EISDIR:
        fix = "a folder has this name; give a file name"
    elif code in (errno.ENOENT, errno.ENOTDIR):
        fix = "a folder in the path does not exist; create it or fix the path"
    else:
        fix = "check the path and the disk"
    return f"{name}: cannot {action} ({reason}); {fix}"


class DesignError(RoikitError, ValueError):
    """A statistical design cannot be fitted to the data given."""


class ConvergenceError(RoikitError, RuntimeError):
    """An iterative fit did not converge with any of the optimisers tried."""


class RoikitWarning(UserWarning):
    """Base class of roikit's warnings.

    A warning may carry ``findings``: one dict per problem found, with ``problem`` (a short phrase that is the
    same wherever the problem occurs, e.g. ``"robust outlier (modified z > 3.5)"``) and, where they apply,
    ``participant_id`` and ``region``; and ``context`` (e.g. the analysis). :func:`warning_records` turns caught
    warnings into rows (``warnings.tsv``), :func:`summarise_warnings` into at most one line per problem.
    """

    #: What the warning is about, in words (shown instead of the class name).
    kind = "warning"

    def __init__(self, message: object = "", *, findings: list | None = None, context: str | None = None):
        super().__init__(message)
        self.findings = list(findings or [])
        self.context = context


class ResamplingWarning(RoikitWarning):
    """A region image was resampled onto the grid of the maps."""

    kind = "resampling"


class LabelTableWarning(RoikitWarning):
    """An atlas image and its label table disagree."""

    kind = "label table"


class CoverageWarning(RoikitWarning):
    """Some participants have few or no valid voxels in a region."""

    kind = "coverage"


class MissingValueWarning(RoikitWarning):
    """Values are missing and were excluded (each exclusion is named)."""

    kind = "missing values"


class DiagnosticWarning(RoikitWarning):
    """A statistical diagnostic (outliers, normality, leverage, convergence) flags something."""

    kind = "diagnostic"


class CautionWarning(RoikitWarning):
    """A result needs a caution when reported (fixed effects, circularity, uncorrected family)."""

    kind = "caution"


class RegionOverlapWarning(RoikitWarning):
    """Regions of one family share voxels (both count in the correction family)."""

    kind = "region overlap"


#: Columns of ``warnings.tsv``.
WARNING_COLUMNS = ("kind", "problem", "participant_id", "region", "context", "message")


def warning_records(caught) -> list[dict]:
    """Rows (one per finding) from caught warnings (``warnings.catch_warnings(record=True)``) or messages.

    Warnings that are not roikit's are kept with kind ``other``; a finding repeated word for word is kept once.
    Columns: :data:`WARNING_COLUMNS`.
    """
    rows: list[dict] = []
    for w in caught:
        message = getattr(w, "message", w)
        category = getattr(w, "category", type(message))
        text = str(message)
        kind = getattr(category, "kind", None) if isinstance(category, type) else None
        kind = kind or "other"
        context = getattr(message, "context", None) or ""
        findings = getattr(message, "findings", None) or [{}]
        for f in findings:
            rows.append({"kind": kind, "problem": f.get("problem") or _strip_context(text, context),
                         "participant_id": f.get("participant_id"), "region": f.get("region"),
                         "context": f.get("context", context), "message": text, "_category": category})
    unique: dict = {}  # the same finding raised twice (e.g. regions realised at loading and at extraction) is one row
    for row in rows:
        unique.setdefault(tuple(str(row[k]) for k in WARNING_COLUMNS), row)
    return list(unique.values())


#: How the command line starts a warning line.
WARNING_PREFIX = "roikit: warning: "


def summarised(rows: list[dict], *, width: int = 200) -> list["RoikitWarning"]:
    """One warning per problem (its message the line :func:`summarise_warnings` writes, its findings every row).

    Re-issuing these instead of the raw warnings keeps the output short; summarising them again gives the same
    lines.
    """
    groups: dict[str, list[dict]] = {}
    for row in rows:
        groups.setdefault(str(row["problem"]), []).append(row)
    out = []
    for problem, group in groups.items():
        (line,) = summarise_warnings(group, width=width - len(WARNING_PREFIX))
        category = group[0].get("_category")
        category = category if isinstance(category, type) and issubclass(category, RoikitWarning) else RoikitWarning
        out.append(category(line, findings=[{k: r.get(k) for k in ("problem", "participant_id", "region", "context")}
                                            for r in group]))
    return out


def _strip_context(text: str, context: str) -> str:
    if context and text.startswith(context + ": "):
        return text[len(context) + 2:]
    return text


def _count(n: int, word: str, many: str | None = None) -> str:
    return f"{n} {word if n == 1 else (many or word + 's')}"


def _fit(head: str, items: list[str], width: int, tail: str = "") -> str:
    """``head`` + as many ``items`` as fit in ``width`` characters, then 'and N more' and ``tail``."""
    shown: list[str] = []
    for i, item in enumerate(items):
        rest = len(items) - i - 1
        more = f" and {rest} more" if rest else ""
        candidate = head + ", ".join(shown + [item]) + more + tail
        if len(candidate) > width and shown:
            return head + ", ".join(shown) + f" and {len(items) - i} more" + tail
        shown.append(item)
    text = head + ", ".join(shown) + tail
    return text if len(text) <= width else text[: width - 3] + "..."


def summarise_warnings(rows: list[dict], *, width: int = 200, prefix: str = "") -> list[str]:
    """At most one line per problem (at most ``width`` characters, ``prefix`` included).

    A participant is named once per problem, with the number of regions and analyses it concerns.
    """
    by_problem: dict[str, list[dict]] = {}
    for row in rows:
        by_problem.setdefault(str(row["problem"]), []).append(row)
    lines = []
    room = width - len(prefix)
    for problem, group in by_problem.items():
        contexts = {r["context"] for r in group if r.get("context")}
        tail = f"; in {_count(len(contexts), 'analysis', 'analyses')}" if len(contexts) > 1 else ""
        people: dict[str, set] = {}
        for r in group:
            if r.get("participant_id"):
                people.setdefault(str(r["participant_id"]), set()).add(r.get("region"))
        regions = list(dict.fromkeys(str(r["region"]) for r in group if r.get("region") and not r.get("participant_id")))
        if people:
            items = []
            for pid, where in people.items():
                named = sorted(x for x in where if x)
                items.append(pid if not named else f"{pid} ({_count(len(named), 'region')})" if len(named) > 1
                             else f"{pid} ({named[0]})")
            text = _fit(f"{problem}: ", items, room, tail)
        elif regions:
            text = _fit(f"{problem}: ", regions, room, tail)
        else:
            text = _fit("", [problem], room, f" (x{len(group)})" if len(group) > 1 and not tail else tail)
        lines.append(prefix + text)
    return lines


class InputWarning(RoikitWarning):
    """Inputs look suspicious or were not used (files not matching a pattern, identical maps)."""


class RoikitDeprecationWarning(DeprecationWarning):
    """A roikit feature will change; tests turn this into an error."""
