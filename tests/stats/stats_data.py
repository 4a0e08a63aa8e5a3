"""Small builders of region values tables for the stats tests (wayfinding study, invented)."""

from __future__ import annotations

import numpy as np
import pandas as pd

REGIONS = ["left hippocampus", "right hippocampus", "caudate", "retrosplenial cortex", "primary visual cortex"]


def values_table(matrices: dict[str, np.ndarray], *, regions=None, ids=None, n_voxels=100, n_valid=None):
    """Long region values table from {contrast: participants x regions matrix} (NaN = missing value)."""
    first = next(iter(matrices.values()))
    n, k = first.shape
    regions = list(regions or [f"region {j + 1}" if k > len(REGIONS) else REGIONS[j] for j in range(k)])
    ids = list(ids or [f"sub-{i + 1:02d}" for i in range(n)])
    rows = []
    for contrast, m in matrices.items():
        for i, pid in enumerate(ids):
            for j, region in enumerate(regions):
                valid = n_voxels if n_valid is None else n_valid(i, j)
                value = m[i, j]
                rows.append(
                    dict(participant_id=pid, contrast=contrast, region=region, value=value, n_voxels=n_voxels,
                         n_valid=0 if np.isnan(value) else valid)
                )
    return pd.DataFrame(rows)


def participants_table(n: int, *, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame(
        {
            "participant_id": [f"sub-{i + 1:02d}" for i in range(n)],
            "group": np.where(np.arange(n) < n // 2, "younger", "older"),
            "age": np.round(rng.uniform(20, 80, n), 1),
            "site": rng.choice(["a", "b", "c"], n),
        }
    )
