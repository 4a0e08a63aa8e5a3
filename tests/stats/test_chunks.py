"""Regions fitted in chunks (roikit.stats._chunks): the same rows, order and warnings as one call over all regions.

The reference is the design called once on every region (the path every design took before chunks existed, and still
takes for up to 64 regions): chunked results must match it to rounding (vectorised sums over a different number of
columns may differ in the last bit, which is why a cluster run uses the very same chunks as a local run), in the same
row order, with the same warnings word for word.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from roikit.errors import UsageError
from roikit.stats import run_design


def _values(n_regions=7, n_part=24, n_con=3, seed=0):
    """Invented values: region effects, participant shifts, a few missing values and low-coverage rows."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n_part):
        u = rng.normal(0, 0.5)
        for c in range(n_con):
            for r in range(n_regions):
                v = 0.2 * (r % 3) + u + 0.1 * c + rng.normal(0, 0.4 + 0.05 * r)
                nv = 50
                if rng.random() < 0.03:
                    v, nv = np.nan, 0
                elif rng.random() < 0.03:
                    nv = 20
                rows.append({"participant_id": f"sub-{i + 1:02d}", "contrast": f"c{c + 1}",
                             "region": f"region {r}", "value": v, "n_voxels": 50, "n_valid": nv,
                             "variance": abs(rng.normal(0.1, 0.02))})
    participants = pd.DataFrame({"participant_id": [f"sub-{i + 1:02d}" for i in range(n_part)],
                                 "group": ["younger" if i % 2 else "older" for i in range(n_part)],
                                 "age": rng.normal(40, 10, n_part).round(1)})
    return pd.DataFrame(rows), participants


CASES = {
    "one-sample": ("one-sample", dict(contrast="c1", permutations=200, seed=3, correct="fwe,holm")),
    "two-group": ("two-group", dict(contrast="c1", group="group")),
    "glm": ("glm", dict(contrast="c1", formula="value ~ age + group")),  # several terms: rows term by term
    "precision-weighted": ("precision-weighted", dict(contrast="c1", permutations=100, seed=4)),
    "fixed-effects": ("fixed-effects", dict(contrast="c1")),
    "mixed": ("mixed", dict(formula="value ~ contrast", random="1", crossed="contrast")),
}


def _run(values, participants, design, options, **where):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        results = run_design(values, design, participants=participants, **options, **where)
    return results, [(w.category, str(w.message), getattr(w.message, "findings", None)) for w in caught]


def _assert_same_table(a: pd.DataFrame, b: pd.DataFrame, *, exact: bool):
    assert list(a.columns) == list(b.columns)
    if exact:
        pd.testing.assert_frame_equal(a, b, check_exact=True)
        return
    for c in a.columns:
        if pd.api.types.is_float_dtype(a[c]):
            np.testing.assert_allclose(a[c].to_numpy(float), b[c].to_numpy(float), rtol=1e-10, atol=1e-13,
                                       equal_nan=True, err_msg=c)
        else:
            pd.testing.assert_series_equal(a[c], b[c], check_exact=True)


@pytest.mark.parametrize("case", list(CASES))
def test_chunks_give_the_rows_and_warnings_of_one_call(case):
    values, participants = _values()
    design, options = CASES[case]
    whole, told = _run(values, participants, design, options)
    chunked, told_chunked = _run(values, participants, design, options, chunk_regions=3)  # chunks of 3, 3, 1
    _assert_same_table(whole, chunked, exact=False)
    assert told_chunked == told
    assert told  # the invented data do raise warnings (missing values, low coverage): the merge was exercised
    if "p_fwe" in whole.columns:  # the permutations span every region: the same seeded draws, the same p
        assert whole["p_fwe"].equals(chunked["p_fwe"])


@pytest.mark.parametrize("case", ["glm", "mixed"])
def test_lean_tables_are_cut_by_category_codes(case):
    """Values as extraction returns them (categorical labels, categories sorted as strings, regions listed in
    another order): chunks follow the regions' order of appearance, as for plain strings."""
    values, participants = _values(n_regions=12)
    order = [f"region {r}" for r in range(12)]  # appearance order; sorted as strings 'region 10' comes first
    lean = values.astype({"participant_id": "category", "contrast": "category", "region": "category"})
    assert list(lean["region"].cat.categories) != order
    design, options = CASES[case]
    plain, told = _run(values, participants, design, options, chunk_regions=5)
    cut, told_lean = _run(lean, participants, design, options, chunk_regions=5)
    _assert_same_table(plain, cut, exact=True)
    assert list(pd.unique(cut["region"])) == order
    assert told_lean == told


def test_designs_across_regions_are_never_cut():
    values, participants = _values(n_regions=4)
    whole, _ = _run(values, participants, "region-difference", dict(regions=["region 0", "region 1", "region 2"],
                                                                    contrast="c1"))
    cut, _ = _run(values, participants, "region-difference", dict(regions=["region 0", "region 1", "region 2"],
                                                                  contrast="c1"), chunk_regions=1)
    _assert_same_table(whole, cut, exact=True)


def test_a_threaded_cluster_gives_the_local_chunks_exactly():
    import distributed  # part of the test install: this must not skip

    values, participants = _values()
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None) as c, \
            distributed.Client(c) as client:
        for case in ("glm", "mixed", "one-sample"):
            design, options = CASES[case]
            here, told_here = _run(values, participants, design, options, chunk_regions=3)
            there, told_there = _run(values, participants, design, options, chunk_regions=3, client=client)
            _assert_same_table(here, there, exact=True)
            assert told_there == told_here


def test_chunk_size_must_be_a_positive_integer():
    values, participants = _values(n_regions=2)
    for bad in (0, -1, 2.5, True):
        with pytest.raises(UsageError, match="chunk_regions must be a positive integer"):
            run_design(values, "one-sample", contrast="c1", chunk_regions=bad)
