"""The invented wayfinding study: a generator with known answers and the ``roikit demo`` pipeline.

All data made here are invented. See ``demo/README.md`` for the generating model.
"""

from __future__ import annotations

from .generate import (
    AFFINE,
    CONTRASTS,
    DEFAULT_SEED,
    PRIOR_PEAK,
    REGION_NAMES,
    SHAPE,
    TOWNS,
    DemoStudy,
    make_study,
    study_toml,
)
from .pipeline import DemoRun, demo_maps, demo_regions, run_demo

__all__ = [
    "AFFINE",
    "CONTRASTS",
    "DEFAULT_SEED",
    "PRIOR_PEAK",
    "REGION_NAMES",
    "SHAPE",
    "TOWNS",
    "DemoRun",
    "DemoStudy",
    "demo_maps",
    "demo_regions",
    "make_study",
    "run_demo",
    "study_toml",
]
