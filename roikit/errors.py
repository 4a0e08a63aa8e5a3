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
    """An output could not be written (permissions, disk full); nothing half-written is left in place."""


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


class RoikitDeprecationWarning(DeprecationWarning):
    """A roikit feature will change; tests turn this into an error."""
