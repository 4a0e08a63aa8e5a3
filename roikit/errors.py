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
    "RoikitDeprecationWarning",
]


class RoikitError(Exception):
    """Base class of every error roikit raises on purpose."""


class UsageError(RoikitError, ValueError):
    """A parameter or option has an invalid value (command line exit status 2)."""


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
    """Base class of roikit's warnings."""


class ResamplingWarning(RoikitWarning):
    """A region image was resampled onto the grid of the maps."""


class LabelTableWarning(RoikitWarning):
    """An atlas image and its label table disagree."""


class CoverageWarning(RoikitWarning):
    """Some participants have few or no valid voxels in a region."""


class MissingValueWarning(RoikitWarning):
    """Values are missing and were excluded (each exclusion is named)."""


class DiagnosticWarning(RoikitWarning):
    """A statistical diagnostic (outliers, normality, leverage, convergence) flags something."""


class CautionWarning(RoikitWarning):
    """A result needs a caution when reported (fixed effects, circularity, uncorrected family)."""


class InputWarning(RoikitWarning):
    """Inputs look suspicious or were not used (files not matching a pattern, identical maps)."""


class RoikitDeprecationWarning(DeprecationWarning):
    """A roikit feature will change; tests turn this into an error."""
