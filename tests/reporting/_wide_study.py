"""An invented ten-region wayfinding study for the client checks (Word, LaTeX, browser, print).

Ten regions with long names, 32 participants (younger/older), novel/familiar routes and six towns, a route-accuracy
covariate and first-level variances; results from ``roikit.stats.run_design`` for the designs whose tables are the
widest and longest (11-12 columns, up to 30 rows).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

REGIONS = ["left hippocampus", "right hippocampus", "left parahippocampal gyrus", "right parahippocampal gyrus",
           "retrosplenial cortex", "medial prefrontal cortex", "left caudate", "right caudate",
           "primary visual cortex", "occipital_place_area"]
TOWNS = [f"town{k}" for k in range(1, 7)]


def study() -> tuple[pd.DataFrame, pd.DataFrame]:
    """(values, participants) with answers planted by construction (invented data)."""
    rng = np.random.default_rng(31)
    ids = [f"sub-{i:02d}" for i in range(1, 33)]
    group = ["younger"] * 16 + ["older"] * 16
    accuracy = np.round(rng.uniform(40, 95, 32), 1)
    participants = pd.DataFrame({"participant_id": ids, "group": group, "route_accuracy": accuracy})
    rows = []
    for i, pid in enumerate(ids):
        for r, region in enumerate(REGIONS):
            base = rng.normal(0.1, 0.4)
            effect = 0.5 - 0.1 * r + 0.01 * (accuracy[i] - 65)
            for contrast, shift in (("novel_route", effect), ("familiar_route", 0.0)):
                rows.append((pid, contrast, region, base + shift + rng.normal(0, 0.3), 400 + 10 * r,
                             400 + 10 * r - int(rng.integers(0, 15)), float(rng.uniform(0.02, 0.2))))
            for k, town in enumerate(TOWNS):
                rows.append((pid, town, region, base + 0.05 * k + rng.normal(0, 0.3), 400 + 10 * r, 400 + 10 * r,
                             float(rng.uniform(0.02, 0.2))))
    values = pd.DataFrame(rows, columns=["participant_id", "contrast", "region", "value", "n_voxels", "n_valid",
                                         "variance"])
    # one outlier, so the tables carry flag letters and a longer note
    values.loc[(values.participant_id == "sub-25") & (values.contrast == "novel_route")
               & (values.region == "left hippocampus"), "value"] = 4.0
    return values, participants


def results(values: pd.DataFrame, participants: pd.DataFrame) -> pd.DataFrame:
    from roikit.stats import run_design

    towns = values[values.contrast.isin(TOWNS)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pd.concat([
            run_design(values, "one-sample", contrast="novel_route"),
            run_design(values, "two-group", contrast="novel_route", group="group", levels="younger,older",
                       participants=participants, welch=True),
            run_design(values, "glm", contrast="novel_route", formula="value ~ route_accuracy + group",
                       participants=participants),
            run_design(values, "precision-weighted", contrast="novel_route"),
            run_design(towns, "mixed", formula="value ~ group", random="1", crossed="contrast",
                       participants=participants),
        ], ignore_index=True)


def program(name: str, *, skip_env: str, install: str) -> str:
    """Path of a program a client check needs; a missing one fails the test unless ``skip_env``=1 is set."""
    import os
    import shutil

    import pytest

    path = shutil.which(name)
    if path is None:
        if os.environ.get(skip_env) == "1":
            pytest.skip(f"{skip_env}=1: check that needs {name} skipped on request")
        pytest.fail(f"{name} not found: install it (Debian: apt-get install -y {install}) or set {skip_env}=1 to "
                    "skip this check explicitly")
    return path
