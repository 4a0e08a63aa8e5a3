"""Tests for roikit.extraction: finding maps and the streaming extraction engine."""

import concurrent.futures as cf
import json
import os
import warnings

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from nibabel.testing import data_path as NIBABEL_DATA
from scipy import stats

from roikit.errors import (
    CoverageWarning,
    GridMismatchError,
    ImageFormatError,
    InputFileError,
    MapDiscoveryError,
    UsageError,
)
from roikit.extraction import extract, find_maps, maps_from_4d, read_map_list, read_participants, write_values
from roikit.images import Grid
from roikit.regions import Atlas, ProbabilityMap, RegionSet, Sphere

from helpers import SMALL_AFFINE, SMALL_SHAPE, save_nifti


def _naive(data, masks, statistic, keep_zeros=False, weights=None):
    """Reference: a per-region boolean-mask loop in plain numpy/scipy."""
    out = []
    for k, m in enumerate(masks):
        x = data[m]
        ok = np.isfinite(x) & ((x != 0) | keep_zeros)
        if not ok.any():
            out.append(np.nan)
        elif statistic == "mean":
            out.append(x[ok].mean())
        elif statistic == "median":
            out.append(np.median(x[ok]))
        elif statistic == "trimmed-mean":
            out.append(stats.trim_mean(x[ok], 0.2))  # reference library: scipy.stats.trim_mean
        elif statistic == "weighted-mean":
            out.append(np.average(x[ok], weights=weights[k][ok]))
    return np.array(out)


@pytest.mark.parametrize("statistic", ["mean", "median", "trimmed-mean"])
@pytest.mark.parametrize("keep_zeros", [False, True])
def test_extraction_equals_a_naive_per_region_loop_on_random_labels(tmp_path, statistic, keep_zeros):
    rng = np.random.default_rng(7)
    labels = rng.integers(0, 12, size=SMALL_SHAPE)  # 11 interleaved random regions
    save_nifti(tmp_path / "labels.nii.gz", labels, dtype=np.int16)
    table = pd.DataFrame({"index": np.arange(1, 12), "name": [f"region {k}" for k in range(1, 12)]})
    rows = []
    arrays = {}
    for p in range(3):
        data = rng.normal(size=SMALL_SHAPE).round(1)  # rounding makes ties and exact zeros
        data[rng.random(SMALL_SHAPE) < 0.05] = np.nan
        path = save_nifti(tmp_path / f"sub-{p}_map.nii.gz", data, dtype=np.float64)
        rows.append({"participant_id": f"sub-{p}", "contrast": "novel", "path": str(path)})
        arrays[f"sub-{p}"] = data
    regions = RegionSet([Atlas(tmp_path / "labels.nii.gz", table), Sphere("ball", (0.0, 0.0, 0.0), 7.0)])
    realised = regions.realise(Grid(SMALL_SHAPE, SMALL_AFFINE))
    masks = [labels == k for k in range(1, 12)]
    ball = np.zeros(np.prod(SMALL_SHAPE), dtype=bool)
    ball[realised.voxels[-1]] = True
    masks.append(ball.reshape(SMALL_SHAPE, order="F"))
    values = extract(pd.DataFrame(rows), regions, statistic=statistic, keep_zeros=keep_zeros)
    for pid, data in arrays.items():
        got = values.loc[values["participant_id"] == pid, "value"].to_numpy()
        np.testing.assert_allclose(got, _naive(data, masks, statistic, keep_zeros), rtol=1e-12, atol=1e-12)
        n_valid = values.loc[values["participant_id"] == pid, "n_valid"].to_numpy()
        assert n_valid.tolist() == [int((np.isfinite(data[m]) & ((data[m] != 0) | keep_zeros)).sum()) for m in masks]


def test_probability_weighted_mean(tmp_path, small_grid):
    rng = np.random.default_rng(3)
    prob = rng.random(SMALL_SHAPE)
    save_nifti(tmp_path / "prob.nii.gz", prob, dtype=np.float64)
    data = rng.normal(size=SMALL_SHAPE)
    path = save_nifti(tmp_path / "sub-1.nii.gz", data, dtype=np.float64)
    maps = pd.DataFrame([{"participant_id": "sub-1", "contrast": "novel", "path": str(path)}])
    regions = RegionSet([ProbabilityMap(tmp_path / "prob.nii.gz", threshold=0.6, name="blob")])
    got = extract(maps, regions, statistic="weighted-mean")["value"].iloc[0]
    m = prob >= 0.6
    assert got == pytest.approx(np.average(data[m], weights=prob[m]), rel=1e-12)
    plain = extract(maps, regions, statistic="mean")["value"].iloc[0]
    assert plain == pytest.approx(data[m].mean(), rel=1e-12)


def test_nibabels_example_image_extracts_like_plain_numpy():
    # nibabel's bundled anatomical image (reference data shipped with nibabel), a sphere and a mask region
    path = os.path.join(NIBABEL_DATA, "anatomical.nii")
    img = nib.load(path)
    data = img.get_fdata()
    maps = pd.DataFrame([{"participant_id": "sub-anat", "contrast": "t1", "path": path}])
    centre = img.affine[:3, :3] @ (np.array(data.shape) / 2) + img.affine[:3, 3]
    values = extract(maps, RegionSet([Sphere("middle", tuple(centre), 8.0)]))
    grid = Grid(data.shape[:3], img.affine)
    ijk = np.indices(data.shape).reshape(3, -1).T
    d = np.linalg.norm(grid.voxel_to_world(ijk) - centre, axis=1) <= 8.0
    x = data.reshape(-1)[d]
    assert values["value"].iloc[0] == pytest.approx(x[x != 0].mean(), rel=1e-12)
    four = os.path.join(NIBABEL_DATA, "example4d.nii.gz")
    maps4 = maps_from_4d(four, ["sub-a", "sub-b"], contrast="task")
    v4 = extract(maps4, RegionSet([Sphere("s", (0.0, 0.0, 0.0), 20.0)]))
    assert v4["participant_id"].tolist() == ["sub-a", "sub-b"]
    assert v4["value"].notna().all()


def test_variance_and_table_layout(tiny_study):
    maps = find_maps(tiny_study["pattern"], variance=tiny_study["variance"])
    assert maps["participant_id"].tolist()[:2] == ["sub-007", "sub-007"]  # labels stay strings: 007 stays 007
    regions = RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])])
    values = extract(maps, regions)
    assert list(values.columns) == ["participant_id", "contrast", "region", "value", "n_voxels", "n_valid",
                                    "variance"]
    assert values["region"].tolist()[:3] == ["right caudate", "left caudate", "retrosplenial cortex"]
    _, _, data, var = tiny_study["maps"][("sub-02", "novel")]
    row = values[(values.participant_id == "sub-02") & (values.contrast == "novel")]
    atlas = tiny_study["atlas_data"]
    for k, (value, variance) in enumerate(zip(row["value"], row["variance"]), start=1):
        m = (atlas == k) & np.isfinite(data) & (data != 0)
        assert value == pytest.approx(data[m].astype(float).mean(), rel=1e-6)
        assert variance == pytest.approx(var[m].astype(float).mean(), rel=1e-6)
    prov = values.attrs["roikit"]
    assert prov["statistic"] == "mean" and len(prov["inputs"]) == 8
    assert all(len(i["sha256"]) == 64 and len(i["variance_sha256"]) == 64 for i in prov["inputs"])


def test_parallel_and_executor_results_are_identical(tiny_study):
    maps = find_maps(tiny_study["pattern"], variance=tiny_study["variance"])
    regions = RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"]), Sphere("s", (0, 0, 0), 6)])
    serial = extract(maps, regions)
    procs = extract(maps, regions, n_jobs=2, batch_size=3)
    pd.testing.assert_frame_equal(serial, procs)
    with cf.ThreadPoolExecutor(2) as pool:
        threads = extract(maps, regions, executor=pool, batch_size=2)
    pd.testing.assert_frame_equal(serial, threads)


def test_no_valid_voxel_keeps_the_row_and_warns(tiny_study, tmp_path):
    data = np.ones(SMALL_SHAPE, dtype=np.float32)
    data[2:6, 3:8, 4:8] = 0.0  # region 1 dropped out (zeros)
    path = save_nifti(tmp_path / "sub-99_contrast-novel_effect.nii.gz", data)
    maps = pd.DataFrame([{"participant_id": "sub-99", "contrast": "novel", "path": str(path)}])
    with pytest.warns(CoverageWarning, match="sub-99/novel/right caudate"):
        values = extract(maps, RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])]))
    assert len(values) == 3 and np.isnan(values["value"].iloc[0]) and values["n_valid"].iloc[0] == 0
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        kept = extract(maps, RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])]), keep_zeros=True)
    assert kept["value"].iloc[0] == 0.0


def test_non_positive_variance_inside_valid_voxels_is_an_error(tiny_study, tmp_path):
    var = np.ones(SMALL_SHAPE, dtype=np.float32)
    var[3, 4, 5] = -1.0  # inside region 1
    var[13, 11, 7] = 0.0  # inside region 2
    vpath = save_nifti(tmp_path / "var.nii.gz", var)
    epath = tiny_study["maps"][("sub-01", "novel")][0]
    maps = pd.DataFrame([{"participant_id": "sub-01", "contrast": "novel", "path": str(epath),
                          "variance_path": str(vpath)}])
    with pytest.raises(ImageFormatError, match=r"var.nii.gz: 2 voxels .* right caudate \(1\), left caudate \(1\)"):
        extract(maps, RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])]))


def test_maps_on_different_grids_name_both_files(tiny_study, tmp_path):
    other = save_nifti(tmp_path / "sub-50_contrast-novel_effect.nii.gz", np.ones((10, 12, 9)))
    maps = find_maps(tiny_study["pattern"])
    maps = pd.concat([maps, pd.DataFrame([{"participant_id": "sub-50", "contrast": "novel", "path": str(other)}])])
    with pytest.raises(GridMismatchError, match=r"different grids: .*shape 20x24x18.*sub-50.*shape 10x12x9"):
        extract(maps, RegionSet([Sphere("s", (0, 0, 0), 4)]))


def test_4d_map_without_a_volume_is_refused(tmp_path):
    path = save_nifti(tmp_path / "all.nii.gz", np.ones(SMALL_SHAPE + (3,)))
    maps = pd.DataFrame([{"participant_id": "sub-1", "contrast": "novel", "path": str(path)}])
    with pytest.raises(ImageFormatError, match="4D file with 3 volumes; choose one"):
        extract(maps, RegionSet([Sphere("s", (0, 0, 0), 4)]))
    maps["volume"] = 2
    assert extract(maps, RegionSet([Sphere("s", (0, 0, 0), 4)]))["value"].iloc[0] == 1.0


def test_missing_and_corrupt_maps(tiny_study, tmp_path):
    maps = pd.DataFrame([{"participant_id": "sub-1", "contrast": "novel", "path": str(tmp_path / "gone.nii.gz")}])
    with pytest.raises(InputFileError, match="gone.nii.gz: file not found"):
        extract(maps, RegionSet([Sphere("s", (0, 0, 0), 4)]))
    good = tiny_study["maps"][("sub-01", "novel")][0]
    raw = good.read_bytes()
    bad = tmp_path / "sub-2_contrast-novel_effect.nii.gz"
    bad.write_bytes(raw[: len(raw) - 500])
    maps = pd.DataFrame([{"participant_id": "sub-1", "contrast": "novel", "path": str(good)},
                         {"participant_id": "sub-2", "contrast": "novel", "path": str(bad)}])
    with pytest.raises(ImageFormatError, match="sub-2_contrast-novel_effect.nii.gz: truncated"):
        extract(maps, RegionSet([Sphere("s", (0, 0, 0), 4)]))


def test_find_maps_with_sessions_wildcards_and_duplicates(tmp_path):
    for sub in ("01", "02"):
        for ses in ("pre", "post"):
            d = tmp_path / f"sub-{sub}" / f"ses-{ses}"
            d.mkdir(parents=True)
            for con in ("novel", "novel-vs-familiar"):
                save_nifti(d / f"sub-{sub}_ses-{ses}_contrast-{con}_effect.nii.gz", np.ones((2, 2, 2)))
    maps = find_maps("sub-{subject}/ses-{session}/sub-{subject}_ses-{session}_contrast-{contrast}_effect.nii.gz",
                     root=tmp_path)
    assert len(maps) == 8
    assert list(maps.columns) == ["participant_id", "session_id", "contrast", "path"]
    assert set(maps["contrast"]) == {"novel", "novel-vs-familiar"}
    assert set(maps["session_id"]) == {"ses-pre", "ses-post"}
    # a wildcard that lets two files claim the same participant/contrast is an error naming both
    with pytest.raises(MapDiscoveryError, match=r"share a \(participant_id, contrast\).*sub-01, novel"):
        find_maps("sub-{subject}/*/sub-{subject}_*_contrast-{contrast}_effect.nii.gz", root=tmp_path)
    with pytest.raises(MapDiscoveryError, match=r"matched no file \(searched .*sub-\*"):
        find_maps("sub-{subject}/maps/{contrast}.nii", root=tmp_path)
    with pytest.raises(UsageError, match="no \\{subject\\} placeholder"):
        find_maps("maps/{contrast}.nii", root=tmp_path)
    with pytest.raises(InputFileError, match="variance map .* not found"):
        find_maps("sub-{subject}/ses-{session}/sub-{subject}_ses-{session}_contrast-{contrast}_effect.nii.gz",
                  variance="sub-{subject}/{contrast}_var.nii.gz", root=tmp_path)


def test_map_list_and_participants(tmp_path, tiny_study):
    p1 = tiny_study["maps"][("sub-01", "novel")][0]
    listing = tmp_path / "maps.tsv"
    rel = os.path.relpath(p1, tmp_path)
    listing.write_text(f"participant_id\tcontrast\tpath\nsub-01\tnovel\t{rel}\nsub-007\tnovel\t{rel}\n")
    maps = read_map_list(listing)
    assert maps["participant_id"].tolist() == ["sub-007", "sub-01"] and os.path.isfile(maps["path"].iloc[0])
    listing.write_text(f"participant_id\tcontrast\tpath\nsub-01\tnovel\t{rel}\nsub-01\tnovel\t{rel}\n")
    with pytest.raises(MapDiscoveryError, match="share a"):
        read_map_list(listing)
    parts = tmp_path / "participants.tsv"
    parts.write_text("participant_id\tgroup\tage\nsub-007\tolder\t71\nsub-01\tyounger\tn/a\n")
    table = read_participants(parts)
    assert table["participant_id"].tolist() == ["sub-007", "sub-01"] and np.isnan(table["age"].iloc[1])


def test_write_values_is_atomic_reruns_and_refuses_foreign_files(tiny_study, tmp_path):
    values = extract(find_maps(tiny_study["pattern"]), RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])]))
    out = write_values(tmp_path / "values.tsv", values)
    back = pd.read_csv(out, sep="\t", dtype={"participant_id": str})
    np.testing.assert_array_equal(back["value"].to_numpy(), values["value"].to_numpy())  # exact round trip

    raw = json.loads((tmp_path / "values.json").read_text())
    assert set(raw) == set(values.columns) | {"GeneratedBy"}
    assert raw["n_voxels"] == {"Description": raw["n_voxels"]["Description"], "Units": "voxels"}
    side = raw["GeneratedBy"][0]
    assert side["provenance"]["regions"][0]["n_voxels"] == 80
    from roikit.errors import OutputExistsError

    # its own earlier output (listed in the folder's manifest, unchanged) is replaced without overwrite
    write_values(tmp_path / "values.tsv", values)
    manifest = json.loads((tmp_path / ".roikit-manifest.json").read_text())
    assert {manifest["files"][n]["writer"] for n in ("values.tsv", "values.json")} == {"roikit extract"}
    # a file roikit did not write, or one changed since, needs consent (Python spelling in Python)
    (tmp_path / "values.json").write_text("{}")
    with pytest.raises(OutputExistsError, match=r"values.json: file exists and is not an unchanged output of "
                                                r"roikit extract; pass overwrite=True"):
        write_values(tmp_path / "values.tsv", values)
    (tmp_path / "mine.tsv").write_text("x\n1\n")
    with pytest.raises(OutputExistsError, match="pass overwrite=True"):
        write_values(tmp_path / "mine.tsv", values)
    write_values(tmp_path / "values.tsv", values, overwrite=True)
    assert not [p for p in os.listdir(tmp_path) if p.endswith(".tmp") or p.startswith(".roikit-staging")]


def test_write_values_never_leaves_a_table_without_its_sidecar(tiny_study, tmp_path, monkeypatch):
    """Issue 13: a full disk while writing the sidecar left a TSV without it, and the rerun was refused."""
    import roikit._outputs as outputs

    values = extract(find_maps(tiny_study["pattern"]), RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])]))
    real_open = open

    def full_disk(path, mode="r", *args, **kwargs):
        if "w" in mode and str(path).endswith("values.json"):
            raise OSError(28, "No space left on device", str(path))
        return real_open(path, mode, *args, **kwargs)

    monkeypatch.setattr(outputs, "open", full_disk, raising=False)
    from roikit.errors import OutputWriteError

    out = tmp_path / "derivatives"
    with pytest.raises(OutputWriteError, match="No space left on device"):
        write_values(out / "values.tsv", values)
    assert sorted(os.listdir(out)) == []  # neither half, no staging folder, no lock
    monkeypatch.undo()
    write_values(out / "values.tsv", values)  # the rerun works
    assert sorted(os.listdir(out)) == [".roikit-manifest.json", "values.json", "values.tsv"]


def test_failed_maps_do_not_lose_the_others(tiny_study, tmp_path):
    maps = find_maps(tiny_study["pattern"])
    raw = tiny_study["maps"][("sub-02", "novel")][0].read_bytes()
    for name in ("sub-02_contrast-novel_effect.nii.gz", "sub-10_contrast-familiar_effect.nii.gz"):
        (tmp_path / name).write_bytes(raw[:-300])
    maps.loc[(maps.participant_id == "sub-02") & (maps.contrast == "novel"), "path"] = str(
        tmp_path / "sub-02_contrast-novel_effect.nii.gz")
    maps.loc[(maps.participant_id == "sub-10") & (maps.contrast == "familiar"), "path"] = str(
        tmp_path / "sub-10_contrast-familiar_effect.nii.gz")
    regions = RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])])
    from roikit.errors import ExtractionError

    for kwargs in ({}, {"n_jobs": 2, "batch_size": 3}):
        with pytest.raises(ExtractionError, match=r"2 of 8 maps failed, the others were extracted: .*sub-02") as info:
            extract(maps, regions, **kwargs)
        partial = info.value.partial_values
        assert len(partial) == 24 and partial["value"].isna().sum() == 6
        assert partial["value"].notna().sum() == 18
        assert [p for p, _ in info.value.failures][0].endswith("sub-02_contrast-novel_effect.nii.gz")


def test_dask_local_cluster_gives_identical_results(tiny_study):
    import distributed  # the `distributed` extra is part of the test install: this must not skip

    maps = find_maps(tiny_study["pattern"], variance=tiny_study["variance"])
    regions = RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"]), Sphere("s", (0, 0, 0), 6)])
    serial = extract(maps, regions)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        with distributed.Client(cluster) as client:
            remote = extract(maps, regions, client=client, batch_size=3)
    pd.testing.assert_frame_equal(serial, remote)


@pytest.mark.parametrize("statistic", ["mean", "median"])
def test_read_ahead_thread_gives_the_same_table_provenance_and_failures(tiny_study, tmp_path, monkeypatch, statistic):
    import roikit.extraction as ex
    from roikit.errors import ExtractionError

    maps = find_maps(tiny_study["pattern"], variance=tiny_study["variance"])
    regions = RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"]), Sphere("s", (0, 0, 0), 6)])
    runs = {}
    for ahead in (False, True):
        # the helper thread is used whenever this process has a core to spare; here it is forced on and off
        monkeypatch.setattr(ex, "_helper_thread",
                            lambda n, ahead=ahead: cf.ThreadPoolExecutor(1) if ahead else None)
        table = extract(maps, regions, statistic=statistic)
        runs[ahead] = table
        assert table.attrs["roikit"]["inputs"][3]["sha256"] == __import__("hashlib").sha256(
            open(maps["path"][3], "rb").read()).hexdigest()
    pd.testing.assert_frame_equal(runs[False], runs[True])
    assert runs[False].attrs["roikit"]["inputs"] == runs[True].attrs["roikit"]["inputs"]
    # a truncated map in the middle and a missing one at the end: their own errors, the other maps extracted
    raw = tiny_study["maps"][("sub-02", "novel")][0].read_bytes()
    (tmp_path / "cut.nii.gz").write_bytes(raw[:-300])
    broken = maps.copy()
    broken.loc[3, "path"] = str(tmp_path / "cut.nii.gz")
    (tmp_path / "gone.nii.gz").write_bytes(raw)
    broken.loc[7, "path"] = str(tmp_path / "gone.nii.gz")
    real_headers = ex._headers

    def headers_then_remove(*args, **kwargs):
        out = real_headers(*args, **kwargs)
        (tmp_path / "gone.nii.gz").unlink()  # after the header was read: fails when the voxels are read
        return out

    monkeypatch.setattr(ex, "_headers", headers_then_remove)
    with pytest.raises(ExtractionError, match="2 of 8 maps failed") as info:
        extract(broken, regions, statistic=statistic)
    failed = [p for p, _ in info.value.failures]
    assert failed == [str(tmp_path / "cut.nii.gz"), str(tmp_path / "gone.nii.gz")]
    assert "truncated" in str(info.value.failures[0][1]) and "gone.nii.gz" in str(info.value.failures[1][1])
    partial = info.value.partial_values
    n_regions = runs[True]["region"].nunique()
    good = ~partial.index.isin(list(range(3 * n_regions, 4 * n_regions)) + list(range(7 * n_regions, 8 * n_regions)))
    pd.testing.assert_series_equal(partial["value"][good], runs[True]["value"][good])


def _sleep_long(seconds):
    import time

    time.sleep(seconds)
    return seconds


def test_stop_pool_ends_busy_workers_at_once():
    """An interrupted extraction stops its workers now (taken before shutdown(), which forgets them), and a worker
    that ignores SIGTERM still ends (SIGKILL)."""
    import concurrent.futures as cf
    import multiprocessing as mp
    import signal
    import time

    from roikit.extraction import stop_pool

    pool = cf.ProcessPoolExecutor(2, mp_context=mp.get_context("fork"),
                                  initializer=signal.signal, initargs=(signal.SIGTERM, signal.SIG_IGN))
    futures = [pool.submit(_sleep_long, 60) for _ in range(4)]
    time.sleep(0.5)  # the workers are busy
    processes = list(pool._processes.values())
    assert len(processes) == 2
    stop_pool(pool)
    from helpers import process_ended

    for proc in processes:  # without SIGKILL they would sleep their minute (SIGTERM is ignored there)
        assert process_ended(proc.pid)
    assert all(f.done() for f in futures)  # cancelled, or failed with the pool broken
