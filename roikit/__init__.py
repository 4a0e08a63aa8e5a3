"""roikit: region-of-interest group analysis of first-level contrast maps.

Layers, each importing only from those before it::

    errors, _tables, _typing  (shared base)
    images      -> loading NIfTI maps, grids, resampling
    regions     -> region sets from atlases, masks, spheres, probability maps
    extraction  -> finding maps, streaming per-participant region summaries, functional regions
    stats       -> group designs, effect sizes, corrections, mixed models
    reporting   -> tables, figures, text, HTML report
    study       -> study files and the whole pipeline (`roikit run`)
    demo        -> the invented wayfinding study
    cli         -> the `roikit` command

roikit is for research group analysis, not for clinical decisions about an
individual patient.
"""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]
