"""Functional regions: selection on tiny maps with known orderings, the circularity guard, leave-one-run-out.

Every expected value below is known by construction (stated beside it); the simulation reproduces the point of
Kriegeskorte, Simmons, Bellgowan & Baker (2009, Nature Neuroscience 12:535, Fig. 1-2): selecting and measuring on
the same noise gives a positive effect, selecting on independent runs does not.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from roikit.errors import CautionWarning, CircularAnalysisError, CoverageWarning, MapDiscoveryError, UsageError
from roikit.extraction import _validate_maps, find_maps
from roikit.images import read_header
from roikit.functional import FunctionalRegion, extract_functional, fold_values, select_voxels
from roikit.regions import Mask, RegionSet

from helpers import save_nifti

SHAPE = (4, 3, 2)  # 24 voxels; the search space is the first 10 flat (Fortran-order) voxels
AFFINE = np.diag([2.0, 2.0, 2.0, 1.0])
SPACE = np.arange(10)


def _volume(values_in_space, outside=0.0):
    flat = np.full(np.prod(SHAPE), outside, dtype=np.float64)
    flat[SPACE] = values_in_space
    return flat.reshape(SHAPE, order="F")


def _regions(tmp_path):
    mask = np.zeros(np.prod(SHAPE))
    mask[SPACE] = 1
    save_nifti(tmp_path / "space.nii.gz", mask.reshape(SHAPE, order="F"), affine=AFFINE)
    return RegionSet([Mask("search", tmp_path / "space.nii.gz")])


# ------------------------------------------------------------------------------------------ selection
def test_top_count_share_threshold_with_missing_voxels():
    x = np.array([5.0, 1.0, 5.0, 3.0, np.nan, 0.0, 2.0])
    flat = np.arange(7)
    # valid: positions 0,1,2,3,6 (NaN and exact 0 are missing) -> 5 valid voxels; by construction
    assert select_voxels(x, flat, top=3)[0].tolist() == [0, 2, 3]
    assert select_voxels(x, flat, top=3)[1] == 5
    assert select_voxels(x, flat, top="40%")[0].tolist() == [0, 2]      # ceil(0.4 x 5) = 2
    assert select_voxels(x, flat, top="50%")[0].tolist() == [0, 2, 3]   # ceil(0.5 x 5) = 3
    assert select_voxels(x, flat, top="1%")[0].tolist() == [0]          # at least one voxel
    assert select_voxels(x, flat, threshold=2.5)[0].tolist() == [0, 2, 3]
    assert select_voxels(x, flat, threshold=-1.0)[0].tolist() == [0, 1, 2, 3, 6]
    assert select_voxels(x, flat, threshold=-1.0, keep_zeros=True)[0].tolist() == [0, 1, 2, 3, 5, 6]
    assert select_voxels(x, flat, top=50)[0].tolist() == [0, 1, 2, 3, 6]  # fewer valid voxels than asked: all


def test_ties_are_broken_by_the_smaller_flat_index():
    x = np.array([5.0, 4.0, 4.0, 4.0])
    assert select_voxels(x, np.array([0, 1, 2, 3]), top=2)[0].tolist() == [0, 1]
    # the same values, flat indices reversed: position 3 holds the smallest index among the tied 4s
    assert select_voxels(x, np.array([9, 8, 7, 6]), top=2)[0].tolist() == [0, 3]
    # order of the input does not matter: a permutation picks the same flat voxels
    perm = np.array([2, 0, 3, 1])
    chosen = select_voxels(x[perm], np.arange(4)[perm], top=2)[0]
    assert sorted(np.arange(4)[perm][chosen].tolist()) == [0, 1]


@pytest.mark.parametrize("kw", [dict(), dict(top=3, threshold=1.0), dict(top=0), dict(top="0%"), dict(top="x%"),
                                dict(top="120%"), dict(top=True), dict(threshold=float("nan")),
                                dict(top=3, split="session"), dict(top=3, minimum=0)])
def test_bad_rules_are_refused(kw):
    with pytest.raises(UsageError, match="functional region 'f'"):
        FunctionalRegion("f", "search", "novel", **kw)


# ------------------------------------------------------------------------------------------ extraction
def _write(tmp_path, name, values):
    return save_nifti(tmp_path / "maps" / name, _volume(values), affine=AFFINE)


def test_each_participant_gets_their_own_voxels(tmp_path):
    (tmp_path / "maps").mkdir()
    regions = _regions(tmp_path)
    # sub-01: localiser peaks at voxels 7, 8, 9; sub-02 at voxels 0, 1, 2; sub-03 has no valid localiser voxel
    _write(tmp_path, "sub-01_contrast-loc.nii.gz", np.arange(1, 11, dtype=float))
    _write(tmp_path, "sub-02_contrast-loc.nii.gz", np.arange(10, 0, -1, dtype=float))
    _write(tmp_path, "sub-03_contrast-loc.nii.gz", np.zeros(10))
    tested = np.array([1, 2, 3, 4, 5, 6, 7, 10, 20, 30], dtype=float)
    for sub in ("01", "02", "03"):
        _write(tmp_path, f"sub-{sub}_contrast-task.nii.gz", tested)
    maps = find_maps("maps/sub-{subject}_contrast-{contrast}.nii.gz", root=tmp_path)
    realised = regions.realise(read_header(maps.path[0]).grid)
    froi = FunctionalRegion("froi", "search", "loc", top=3)
    with pytest.warns(CoverageWarning, match="sub-03/task/froi"):
        table = extract_functional(maps, realised, [froi], contrasts=["task"])
    t = table.set_index("participant_id")
    # by construction: sub-01 selects voxels 7, 8, 9 -> mean(10, 20, 30) = 20; sub-02 voxels 0, 1, 2 -> 2
    assert t.loc["sub-01", "value"] == pytest.approx(20.0)
    assert t.loc["sub-02", "value"] == pytest.approx(2.0)
    assert np.isnan(t.loc["sub-03", "value"])  # kept, n/a, and listed in the warning
    assert t.loc["sub-01", "n_voxels"] == 3 and t.loc["sub-01", "n_search"] == 10
    assert t.loc["sub-01", "selected_share"] == pytest.approx(0.3)
    assert t.loc["sub-03", "n_voxels"] == 0
    sel = table.attrs["roikit"]["functional"]["selections"]
    assert sel[0]["folds"][0]["voxels"] == [7, 8, 9] and sel[1]["folds"][0]["voxels"] == [0, 1, 2]
    # median over the same selection (sub-01: median(10, 20, 30) = 20; share 20%: ceil(2) = 2 voxels -> 25)
    share = extract_functional(maps, realised, [FunctionalRegion("froi", "search", "loc", top="20%")],
                               contrasts=["task"], statistic="median")
    assert share.set_index("participant_id").loc["sub-01", "value"] == pytest.approx(25.0)


# ------------------------------------------------------------------------------------------ guard
def _run_maps(tmp_path, loc_runs, task_runs, *, runs=True):
    (tmp_path / "maps").mkdir(exist_ok=True)
    for r, values in enumerate(loc_runs, start=1):
        _write(tmp_path, f"sub-01_run-{r}_contrast-loc.nii.gz" if runs else "sub-01_contrast-loc.nii.gz", values)
    for r, values in enumerate(task_runs, start=1):
        _write(tmp_path, f"sub-01_run-{r}_contrast-task.nii.gz" if runs else "sub-01_contrast-task.nii.gz", values)
    pattern = "maps/sub-{subject}_run-{run}_contrast-{contrast}.nii.gz" if runs else \
        "maps/sub-{subject}_contrast-{contrast}.nii.gz"
    maps = find_maps(pattern, root=tmp_path)
    return maps, _regions(tmp_path).realise(read_header(maps.path[0]).grid)


def test_the_guard_refuses_selecting_and_testing_on_the_same_contrast(tmp_path):
    maps, realised = _run_maps(tmp_path, [np.arange(1.0, 11)], [np.arange(1.0, 11)], runs=False)
    froi = FunctionalRegion("novelty fROI", "search", "loc", top=3)
    with pytest.raises(CircularAnalysisError) as err:
        extract_functional(maps, realised, [froi], contrasts=["loc"])
    message = str(err.value)
    for part in ("novelty fROI", "'loc'", 'split="run"', "independent runs", "circular_ok=True"):
        assert part in message
    # circular_ok: it runs, with a caution, and the region is listed as circular for the report
    ok = FunctionalRegion("novelty fROI", "search", "loc", top=3, circular_ok=True)
    with pytest.warns(CautionWarning, match="circular_ok"):
        table = extract_functional(maps, realised, [ok], contrasts=["loc"])
    assert table["value"].iloc[0] == pytest.approx(9.0)  # mean of the top three, 8, 9, 10
    assert table.attrs["roikit"]["circular_regions"] == ["novelty fROI"]


def test_without_runs_a_different_contrast_is_a_caution_with_runs_a_refusal(tmp_path):
    maps, realised = _run_maps(tmp_path, [np.arange(1.0, 11)], [np.ones(10)], runs=False)
    froi = FunctionalRegion("f", "search", "loc", top=3)
    with pytest.warns(CautionWarning, match="independent"):
        extract_functional(maps, realised, [froi], contrasts=["task"])
    (tmp_path / "runs").mkdir()
    maps2, realised2 = _run_maps(tmp_path / "runs", [np.arange(1.0, 11)] * 2, [np.ones(10)] * 2)
    with pytest.raises(CircularAnalysisError, match="'task'"):
        extract_functional(maps2, realised2, [froi], contrasts=["task"])
    split = FunctionalRegion("f", "search", "loc", top=3, split="run")
    with warnings.catch_warnings():
        warnings.simplefilter("error", CautionWarning)
        extract_functional(maps2, realised2, [split], contrasts=["task", "loc"])
    with pytest.raises(UsageError, match="needs maps with runs"):
        extract_functional(maps, realised, [split], contrasts=["task"])


# ------------------------------------------------------------------------------------------ runs
def test_leave_one_run_out_by_construction(tmp_path):
    # localiser run r peaks (10) at voxel r-1, 1 elsewhere; tested run r holds 10 r + v at voxel v
    loc = []
    for r in (1, 2, 3):
        x = np.ones(10)
        x[r - 1] = 10.0
        loc.append(x)
    task = [10.0 * r + np.arange(10) for r in (1, 2, 3)]
    maps, realised = _run_maps(tmp_path, loc, task)
    assert sorted(maps["run_id"].unique()) == ["run-1", "run-2", "run-3"]
    split = FunctionalRegion("f", "search", "loc", top=1, split="run")
    table = extract_functional(maps, realised, [split], contrasts=["task"])
    # fold 1 (train 2, 3): voxels 1 and 2 tie at 5.5 -> voxel 1 -> 11; fold 2 (train 1, 3): voxel 0 -> 20;
    # fold 3 (train 1, 2): voxel 0 -> 30; mean 61/3
    assert table["value"].iloc[0] == pytest.approx(61 / 3)
    assert table["n_folds"].iloc[0] == 3
    folds = table.attrs["roikit"]["functional"]["selections"][0]["folds"]
    assert [f["voxels"] for f in folds] == [[1], [0], [0]]
    assert folds[0]["train_runs"] == ["run-2", "run-3"]
    # circular (no split): select on the mean of all runs (voxels 0, 1, 2 tie at 4) -> voxel 0 in every run
    circ = FunctionalRegion("f", "search", "loc", top=1, circular_ok=True)
    with pytest.warns(CautionWarning):
        table = extract_functional(maps, realised, [circ], contrasts=["task"])
    assert table["value"].iloc[0] == pytest.approx(20.0)  # mean(10, 20, 30)


def test_localiser_runs_are_combined_by_precision_when_variances_exist():
    flat = np.arange(2)
    region = FunctionalRegion("f", "search", "loc", top=1, split="run")
    x1, v1 = np.array([2.0, 0.5]), np.array([1.0, 1.0])
    x2, v2 = np.array([-1.0, 2.0]), np.array([4.0, 1.0])
    tested = {"run-3": (np.array([10.0, 20.0]), None)}
    # by hand: weights 1/v; voxel 0 (2 x 1 - 1 x 0.25) / 1.25 = 1.4, voxel 1 (0.5 + 2) / 2 = 1.25 -> voxel 0
    weighted = fold_values({"run-1": (x1, v1), "run-2": (x2, v2), "run-3": (x1, v1)}, tested, flat, region)
    assert weighted[0]["voxels"] == [0] and weighted[0]["value"] == 10.0
    # plain mean without variances: voxel 0 (2 - 1) / 2 = 0.5, voxel 1 1.25 -> voxel 1
    plain = fold_values({"run-1": x1, "run-2": x2, "run-3": x1}, tested, flat, region)
    assert plain[0]["voxels"] == [1] and plain[0]["value"] == 20.0


def test_find_maps_reads_runs_and_refuses_duplicate_runs(tmp_path):
    maps, _ = _run_maps(tmp_path, [np.ones(10)] * 2, [np.ones(10)] * 2)
    assert list(maps.columns[:3]) == ["participant_id", "run_id", "contrast"]
    assert maps.groupby("contrast")["run_id"].apply(list).to_dict() == {"loc": ["run-1", "run-2"],
                                                                      "task": ["run-1", "run-2"]}
    # the same participant, contrast and run twice (a map list) is refused
    twice = pd.concat([maps, maps.iloc[:1]], ignore_index=True)
    with pytest.raises(MapDiscoveryError, match="run"):
        _validate_maps(twice, source="list")
    with pytest.raises(MapDiscoveryError, match="run-<label>"):
        _validate_maps(maps.assign(run_id="1"), source="list")


# ------------------------------------------------------------------------------------------ simulation
def test_pure_noise_split_is_unbiased_and_circular_is_inflated():
    """Kriegeskorte et al. (2009): on pure noise, select-and-measure on the same data gives a positive 'effect';
    leave-one-run-out does not. Seeded; MC error stated with each check."""
    rng = np.random.default_rng(20091)
    n_sims, n_part, n_vox = 400, 16, 200
    flat = np.arange(n_vox)
    split = FunctionalRegion("f", "search", "loc", top="10%", split="run")
    circ = FunctionalRegion("f", "search", "loc", top="10%", circular_ok=True)
    split_means, circ_means, rejections = [], [], 0
    for _ in range(n_sims):
        sv, cv = [], []
        for _p in range(n_part):
            runs = {f"run-{r}": rng.standard_normal(n_vox) for r in (1, 2)}  # no effect anywhere
            tested = {r: (x, None) for r, x in runs.items()}
            sv.append(np.mean([f["value"] for f in fold_values(runs, tested, flat, split)]))
            cv.append(np.mean([f["value"] for f in fold_values(runs, tested, flat, circ)]))
        split_means.append(np.mean(sv))
        circ_means.append(np.mean(cv))
        rejections += stats.ttest_1samp(sv, 0.0).pvalue < 0.05
    split_means, circ_means = np.array(split_means), np.array(circ_means)
    se = split_means.std(ddof=1) / np.sqrt(n_sims)
    # unbiased: the grand mean is within 3 MC standard errors of 0
    assert abs(split_means.mean()) < 3 * se
    # the nominal rejection rate (one-sample t-test at 5%) within 3 MC SE: sqrt(.05 x .95 / 400) = 0.0109
    rate = rejections / n_sims
    assert abs(rate - 0.05) < 3 * np.sqrt(0.05 * 0.95 / n_sims)
    # circular: mean of the top 10% of 200 values of N(0, 1/2) (the mean of two noise runs), measured on that
    # same mean: about 1.75 x 0.707 = 1.24 (expected top-10% mean of a standard normal, 1.755, from the
    # truncated-normal mean phi(1.2816)/0.1; common practice)
    assert circ_means.mean() == pytest.approx(1.755 / np.sqrt(2), abs=0.05)
    assert circ_means.min() > 0.9


def test_voxels_kept_by_extraction_give_the_same_values_without_a_second_read(tmp_path):
    import concurrent.futures as cf

    from roikit.extraction import extract
    from roikit.functional import search_voxels

    rng = np.random.default_rng(3)
    maps, realised = _run_maps(tmp_path, [rng.normal(size=10) for _ in range(3)], [rng.normal(size=10) for _ in range(3)])
    froi = [FunctionalRegion("f", "search", "loc", top=4, split="run")]
    direct = extract_functional(maps, realised, froi, contrasts=["task"])
    sink: dict = {}
    with cf.ThreadPoolExecutor(2) as pool:  # the batched path: results come back through the same collector
        extract(maps, realised, executor=pool, batch_size=2, _keep=(search_voxels(realised, froi), sink))
    assert sorted(sink) == list(range(len(maps)))
    gathered = {(row.path, None): sink[i] for i, row in enumerate(maps.itertuples())}
    reused = extract_functional(maps, realised, froi, contrasts=["task"], _gathered=gathered)
    assert reused.attrs["roikit"]["functional"]["maps_read"] == 0
    assert direct.attrs["roikit"]["functional"]["maps_read"] == len(maps)
    np.testing.assert_array_equal(reused["value"].to_numpy(), direct["value"].to_numpy())
