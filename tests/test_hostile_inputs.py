"""Hostile and broken inputs: memory budgets, roikit errors for every input failure, nothing lost silently."""

from __future__ import annotations

import errno
import gzip
import os
import subprocess
import sys
import tracemalloc
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from helpers import SMALL_AFFINE, SMALL_SHAPE, save_nifti
from roikit._tables import read_table, write_table
from roikit.cli import main
from roikit.errors import (ImageFormatError, InputFileError, InputWarning, MapDiscoveryError, MissingValueWarning,
                           OutputWriteError, RegionError, UsageError)
from roikit.extraction import extract, find_maps, read_map_list
from roikit.images import load_map, read_flat, read_grid, read_header
from roikit.regions import Atlas, RegionSet, Sphere, read_label_table
from roikit.stats import run_design

ROOT = Path(__file__).resolve().parents[1]


def _claiming(path, shape, *, dtype=np.float32, data=b"\0" * 16, compress=True):
    """A file whose header claims ``shape`` but holds only ``data`` after it."""
    header = nib.Nifti1Header()
    header.set_data_shape(shape)
    header.set_data_dtype(dtype)
    header["vox_offset"] = 352
    header.set_sform(np.diag([1.0, 1.0, 1.0, 1.0]), 1)
    blob = header.binaryblock + b"\0" * 4 + data
    Path(path).write_bytes(gzip.compress(blob) if compress else blob)
    return Path(path)


def _mutated(path, **fields):
    """A valid small map whose header fields are then overwritten."""
    data = np.random.default_rng(0).normal(size=SMALL_SHAPE).astype(np.float32)
    header = nib.Nifti1Image(data, SMALL_AFFINE).header.copy()
    header["vox_offset"] = 352
    for key, value in fields.items():
        header[key] = value
    Path(path).write_bytes(gzip.compress(header.binaryblock + b"\0" * 4 + data.tobytes(order="F")))
    return Path(path)


# ------------------------------------------------------------------------------------------ budgets
def test_memory_bomb_as_first_map_with_an_atlas_fails_small(tiny_study, tmp_path):
    bomb_dir = tmp_path / "bomb"
    bomb_dir.mkdir()
    bomb = _claiming(bomb_dir / "sub-00_contrast-novel_effect.nii.gz", (800, 800, 400))
    assert bomb.stat().st_size < 200
    # peak memory of the child process: VmHWM (reset by exec, unlike getrusage's ru_maxrss, which would include
    # the memory of the pytest process that forked it); ru_maxrss only where /proc is absent
    script = (
        "import re, resource, sys\n"
        "from roikit.cli import main\n"
        "status = main(sys.argv[1:])\n"
        "try:\n"
        "    peak = int(re.search(r'VmHWM:\\s*(\\d+)', open('/proc/self/status').read()).group(1))\n"
        "except OSError:\n"
        "    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss\n"
        "print('PEAK_KB', peak)\n"
        "sys.exit(status)\n"
    )
    args = ["extract", "--maps", str(bomb_dir / "sub-{subject}_contrast-{contrast}_effect.nii.gz"),
            "--atlas", str(tiny_study["atlas"]), "--labels", str(tiny_study["labels"]),
            "--out", str(tmp_path / "values.tsv")]
    # with the voxel limit raised out of the way, the gzip-ratio budget alone must refuse the file
    for limit, expected in (("1000000000000", "the compressed file has only"), (None, "ROIKIT_MAX_VOXELS")):
        env = {"PYTHONPATH": str(ROOT), "PATH": os.environ.get("PATH", "/usr/bin:/bin")}
        if limit:
            env["ROIKIT_MAX_VOXELS"] = limit
        proc = subprocess.run([sys.executable, "-c", script, *args], capture_output=True, text=True, env=env)
        assert proc.returncode == 1, proc.stderr
        assert "800x800x400" in proc.stderr and expected in proc.stderr, proc.stderr
        assert str(bomb) in proc.stderr
        assert len(proc.stderr.strip().splitlines()) == 1, proc.stderr
        peak_mb = int(proc.stdout.split("PEAK_KB")[1]) / 1024
        # the interpreter with numpy, pandas, scipy and nibabel alone takes about 150 MB on the development machine
        assert peak_mb < 200, peak_mb
    assert not (tmp_path / "values.tsv").exists()


def test_a_tiny_4d_file_does_not_allocate_its_claimed_volumes(tmp_path):
    path = _claiming(tmp_path / "tiny4d.nii.gz", (200, 200, 200, 50), data=b"\0" * 100)
    tracemalloc.start()
    try:
        with pytest.raises(ImageFormatError, match=r"200x200x200x50 voxels of float32 .*truncated or its header"):
            read_header(path)
        with pytest.raises(ImageFormatError, match="200x200x200x50"):
            load_map(path, volume=0)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 20 * 2**20, peak  # the claimed volume alone would be 32 MB, the whole file 1.6 GB


def test_uncompressed_file_shorter_than_its_header_and_the_voxel_limit(tmp_path, monkeypatch):
    path = _claiming(tmp_path / "short.nii", (64, 64, 64), compress=False)
    with pytest.raises(ImageFormatError, match=r"file has 368 bytes but the header claims 64x64x64"):
        read_header(path)
    good = save_nifti(tmp_path / "good.nii.gz", np.ones(SMALL_SHAPE))
    monkeypatch.setenv("ROIKIT_MAX_VOXELS", "1000")
    with pytest.raises(ImageFormatError, match=r"more than roikit's limit of 1,000 voxels.*ROIKIT_MAX_VOXELS=8640"):
        read_header(good)
    monkeypatch.setenv("ROIKIT_MAX_VOXELS", "lots")
    with pytest.raises(UsageError, match="ROIKIT_MAX_VOXELS must be a positive whole number"):
        read_header(good)


def test_grid_of_a_truncated_first_map_is_verified_before_regions_are_resampled(tmp_path, tiny_study):
    # plausible for gzip (so the header budget passes) but missing most of its data
    first = _claiming(tmp_path / "sub-00_contrast-novel_effect.nii.gz", (60, 60, 60), data=b"\1" * 5000)
    with pytest.raises(ImageFormatError, match="truncated"):
        read_grid(first)
    maps = pd.DataFrame([{"participant_id": "sub-00", "contrast": "novel", "path": str(first)}])
    with pytest.raises(ImageFormatError, match="sub-00_contrast-novel_effect.nii.gz: .*truncated"):
        extract(maps, RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])]))


# ------------------------------------------------------------------------------------------ image errors
@pytest.mark.parametrize("fields, message", [
    ({"pixdim": [1, -2, -2, -2, 1, 1, 1, 1], "qform_code": 1, "sform_code": 0}, "pixdims.* should be positive"),
    ({"pixdim": [1, 0, 2, 2, 1, 1, 1, 1], "qform_code": 1, "sform_code": 0}, "affine is unusable"),
    ({"datatype": 9999}, "unknown code 9999"),
    ({"scl_slope": 2.0, "scl_inter": float("nan")}, "invalid intercept"),
])
def test_corrupt_header_fields_are_image_errors(tmp_path, fields, message):
    path = _mutated(tmp_path / "map.nii.gz", **fields)
    with pytest.raises(ImageFormatError, match=message):
        read_header(path)
    with pytest.raises(ImageFormatError):
        load_map(path)
    assert main(["regions", "--sphere", "s=0,0,0,4", "--like", str(path)]) == 1


def test_rgb_atlas_is_refused(tmp_path, tiny_study):
    rgb = np.zeros(SMALL_SHAPE, dtype=[("R", "u1"), ("G", "u1"), ("B", "u1")])
    nib.save(nib.Nifti1Image(rgb, SMALL_AFFINE), tmp_path / "rgb.nii.gz")
    with pytest.raises(ImageFormatError, match="not a number type"):
        RegionSet([Atlas(tmp_path / "rgb.nii.gz", tiny_study["labels"])]).realise(
            read_header(tiny_study["atlas"]).grid)


def test_read_flat_wraps_os_errors(tmp_path, monkeypatch):
    path = save_nifti(tmp_path / "m.nii", np.ones(SMALL_SHAPE))
    header = read_header(path)

    def denied(*a, **k):
        raise PermissionError(errno.EACCES, "Permission denied")

    monkeypatch.setattr(np, "memmap", denied)
    with pytest.raises(InputFileError, match="m.nii: cannot read the file .*permissions"):
        read_flat(header)


# ------------------------------------------------------------------------------------------ tables
def test_tables_in_another_encoding_or_empty(tmp_path):
    latin = tmp_path / "labels.tsv"
    latin.write_bytes("index\tname\n1\tnoyau caudé\n".encode("latin-1"))
    with pytest.raises(InputFileError, match=r"labels.tsv: not UTF-8 text: byte 0xe9 .*Latin-1.*save the table as UTF-8"):
        read_table(latin)
    empty = tmp_path / "empty.tsv"
    empty.write_text("")
    with pytest.raises(InputFileError, match="empty.tsv: the table is empty"):
        read_table(empty)
    header_only = tmp_path / "header.tsv"
    header_only.write_text("participant_id\tage\n")
    with pytest.raises(InputFileError, match="has a header .* but no rows"):
        read_table(header_only)
    assert read_table(header_only, allow_empty=True).empty
    bom = tmp_path / "bom.tsv"
    bom.write_bytes("\ufeffparticipant_id\tage\nsub-007\t30\n".encode("utf-8"))
    assert read_table(bom)["participant_id"].tolist() == ["sub-007"]
    with pytest.raises(InputFileError, match="is a folder"):
        read_table(tmp_path)
    assert main(["stats", str(latin), "--design", "one-sample", "--contrast", "novel",
                 "--out", str(tmp_path / "r.tsv")]) == 1


@pytest.mark.parametrize("rows", ["1\tright caudate\n2\t\n", "1\tright caudate\n2\tn/a\n", "1\t \n"])
def test_label_rows_without_a_name_are_refused(tmp_path, rows):
    path = tmp_path / "labels.tsv"
    path.write_text("index\tname\n" + rows)
    with pytest.raises(RegionError, match="without a name .*line"):
        read_label_table(path)


def test_map_list_volume_must_be_a_whole_number(tmp_path, tiny_study):
    p = tiny_study["maps"][("sub-01", "novel")][0]
    listing = tmp_path / "maps.tsv"
    listing.write_text(f"participant_id\tcontrast\tpath\tvolume\nsub-01\tnovel\t{p}\tabc\nsub-02\tnovel\t{p}\t-1\n")
    with pytest.raises(MapDiscoveryError, match=r"volume must hold whole numbers .*'abc', '-1'.*rows \[1, 2\]"):
        read_map_list(listing)


@pytest.mark.parametrize("radius", [1e300, -1.0, float("nan"), "abc", 0.0])
def test_sphere_radius_out_of_range(radius):
    with pytest.raises(UsageError, match="radius must be a positive number of mm up to 1000"):
        Sphere("peak", (0.0, 0.0, 0.0), radius)


def test_sphere_out_of_range_on_the_command_line():
    assert main(["regions", "--sphere", "s=0,0,0,1e300"]) == 2


def test_deeply_nested_toml_is_a_study_error(tmp_path):
    path = tmp_path / "study.toml"
    path.write_text("[study]\ntitle = " + "[" * 20000 + "]" * 20000 + "\n")
    assert main(["run", str(path), "--out", str(tmp_path / "out")]) == 2


# ------------------------------------------------------------------------------------------ OS errors on writing
def test_too_long_output_name_and_disk_full(tmp_path, monkeypatch, capsys):
    table = pd.DataFrame({"a": [1]})
    with pytest.raises(OutputWriteError, match=r"name in the path is too long \(304 characters"):
        write_table(tmp_path / ("x" * 300 + ".tsv"), table)

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr("roikit._tables.os.replace", full)
    with pytest.raises(OutputWriteError, match="out.tsv: cannot write .*disk is full"):
        write_table(tmp_path / "out.tsv", table)
    assert not any(p.name.endswith(".tmp") for p in tmp_path.iterdir())


def test_cli_turns_any_os_error_into_one_line(monkeypatch, capsys, tmp_path):
    import roikit.cli._regions as regions_cli

    def readonly(args):
        raise OSError(errno.EROFS, "Read-only file system", str(tmp_path / "x.tsv"))

    monkeypatch.setattr(regions_cli, "run", readonly)
    monkeypatch.setattr(regions_cli, "add_parser", _wrap_add_parser(regions_cli.add_parser, readonly))
    status = main(["regions", "--sphere", "s=0,0,0,4"])
    err = capsys.readouterr().err
    assert status == 1
    assert err.count("\n") == 1 and "x.tsv: cannot use (Read-only file system); the file system is read-only" in err


def _wrap_add_parser(add_parser, func):
    def wrapped(sub):
        add_parser(sub)
        sub.choices["regions"].set_defaults(func=func)
    return wrapped


# ------------------------------------------------------------------------------------------ nothing lost silently
def test_unmatched_files_and_identical_maps_are_warned_about(tiny_study, tmp_path):
    maps_dir = Path(tiny_study["pattern"]).parent
    src = tiny_study["maps"][("sub-01", "novel")][0]
    (maps_dir / "sub-11_extra_contrast-novel_effect.nii.gz").write_bytes(src.read_bytes())  # glob yes, pattern no
    with pytest.warns(InputWarning, match=r"1 file in .* not used: .*sub-11_extra_contrast-novel_effect"):
        maps = find_maps(tiny_study["pattern"])
    (maps_dir / "sub-11_extra_contrast-novel_effect.nii.gz").unlink()
    (maps_dir / "sub-12_contrast-novel_effect.nii.gz").write_bytes(src.read_bytes())  # identical bytes
    maps = find_maps(tiny_study["pattern"])
    with pytest.warns(InputWarning, match=r"byte-for-byte identical .*sha256 [0-9a-f]{16}.*sub-01 novel.*sub-12 novel"):
        extract(maps, RegionSet([Sphere("s", (0, 0, 0), 4)]))
    same_path = pd.DataFrame([{"participant_id": "sub-01", "contrast": "novel", "path": str(src)},
                              {"participant_id": "sub-02", "contrast": "novel", "path": str(src)}])
    with pytest.warns(InputWarning, match="the same file is given for several participants"):
        extract(same_path, RegionSet([Sphere("s", (0, 0, 0), 4)]))


def test_two_group_lists_participants_of_a_third_level():
    rng = np.random.default_rng(3)
    ids = [f"sub-{i:02d}" for i in range(1, 10)]
    values = pd.DataFrame({"participant_id": ids, "contrast": "novel", "region": "caudate",
                           "value": rng.normal(size=9), "n_voxels": 10, "n_valid": 10})
    groups = ["younger"] * 4 + ["older"] * 4 + ["middle"]
    participants = pd.DataFrame({"participant_id": ids, "group": groups})
    participants.loc[0, "group"] = None
    with pytest.warns(MissingValueWarning, match=r"1 participant in a level of column 'group' other than .*middle: sub-09"):
        res = run_design(values, "two-group", contrast="novel", group="group", levels="younger,older",
                         participants=participants)
    assert res["n"].iloc[0] == 7
    assert "sub-01" in res["excluded_ids"].iloc[0]  # no group value: excluded and listed


def test_resampling_works_in_slabs_and_respects_the_voxel_limit(monkeypatch):
    from roikit import images
    from roikit.images import Grid, resample_nearest

    rng = np.random.default_rng(5)
    source = Grid((30, 40, 35), np.array([[-2.0, 0, 0, 30], [0, 2, 0, -40], [0, 0, 2, -30], [0, 0, 0, 1]]))
    data = rng.integers(0, 9, source.shape).astype(np.int16)
    # oblique, with offsets that put no target voxel exactly half-way between source voxels (no rounding ties)
    target = Grid((50, 45, 40), np.array([[0.93, 0.31, 0, -30.0137], [0, 1.11, 0.23, -40.0213],
                                          [0.11, 0, 1.29, -30.0071], [0, 0, 0, 1]]))
    whole = resample_nearest(data, source, target)
    monkeypatch.setattr(images, "_SLAB_VOXELS", 50 * 45 * 3)  # 14 slabs
    assert np.array_equal(resample_nearest(data, source, target), whole)
    # the same by brute force over every target voxel (common practice, no source: the definition itself)
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in target.shape], indexing="ij"), -1).reshape(-1, 3)
    m = np.linalg.inv(source.affine) @ target.affine  # target voxel -> source voxel
    src = np.floor(ijk @ m[:3, :3].T + m[:3, 3] + 0.5).astype(int)
    inside = np.all((src >= 0) & (src < np.array(source.shape)), axis=1)
    expected = np.zeros(target.n_voxels, np.int16)
    expected[inside] = data[src[inside, 0], src[inside, 1], src[inside, 2]]
    assert np.array_equal(whole.reshape(-1), expected)
    monkeypatch.setenv("ROIKIT_MAX_VOXELS", "1000")
    with pytest.raises(UsageError, match="cannot resample onto a grid of 50x45x40 = 90,000 voxels"):
        resample_nearest(data, source, target)


def test_a_map_that_cannot_be_read_is_named(tiny_study, monkeypatch):
    import builtins

    maps = find_maps(tiny_study["pattern"])
    victim = str(maps["path"].iloc[1])
    real_open = builtins.open

    def guarded(file, *args, **kwargs):
        if str(file) == victim and "b" in (args[0] if args else kwargs.get("mode", "r")):
            raise PermissionError(errno.EACCES, "Permission denied", victim)
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr(builtins, "open", guarded)
    with pytest.raises(InputFileError, match="cannot read the .*Permission denied.*permissions") as info:
        extract(maps, RegionSet([Sphere("s", (0, 0, 0), 4)]))
    assert victim in str(info.value)
