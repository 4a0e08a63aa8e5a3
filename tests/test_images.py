"""Tests for roikit.images: reading, grids, resampling."""

import gzip
import os
import sys

import nibabel as nib
import numpy as np
import pytest
from nibabel.testing import data_path as NIBABEL_DATA

from roikit.errors import GridMismatchError, ImageFormatError, InputFileError
from roikit.images import Grid, check_overlap, check_same_grid, load_map, read_flat, read_header, resample_nearest

from helpers import MNI2_AFFINE, MNI2_SHAPE, SMALL_AFFINE, save_nifti

# MNI152 2 mm template grid (common practice, from memory): 91 x 109 x 91, diag(-2, 2, 2), origin (90, -126, -72).
MNI2 = Grid(MNI2_SHAPE, MNI2_AFFINE)


def test_mni_grid_facts():
    # Voxel (45, 63, 36) is the origin (0, 0, 0) mm on the MNI152 2 mm grid (common practice, from memory).
    assert MNI2.voxel_to_world([45, 63, 36]).tolist() == [0.0, 0.0, 0.0]
    assert np.allclose(MNI2.world_to_voxel([0, 0, 0]), [45, 63, 36])
    # x grows to the left of the image axis: voxel i = 0 is x = +90 mm (radiological storage, common practice)
    assert MNI2.voxel_to_world([0, 0, 0]).tolist() == [90.0, -126.0, -72.0]
    assert MNI2.voxel_volume == 8.0
    lo, hi = MNI2.world_bounds()
    assert lo.tolist() == [-91.0, -127.0, -73.0] and hi.tolist() == [91.0, 91.0, 109.0]


@pytest.mark.parametrize("name", ["anatomical.nii", "standard.nii.gz", "reoriented_anat_moved.nii"])
def test_fast_reader_equals_nibabel_on_nibabels_own_images(name):
    # nibabel's bundled test images (big-endian int16/float32, uint8, gzip and plain): the fast reader must
    # give exactly what nibabel's get_fdata gives (reference library).
    path = os.path.join(NIBABEL_DATA, name)
    expected = nib.load(path).get_fdata().ravel(order="F")
    got = read_flat(read_header(path))
    np.testing.assert_array_equal(got, expected)


def test_one_volume_of_a_4d_file_is_read_explicitly():
    path = os.path.join(NIBABEL_DATA, "example4d.nii.gz")
    img = nib.load(path)
    for v in (0, 1):
        expected = np.asarray(img.dataobj[..., v], dtype=np.float64).ravel(order="F")
        np.testing.assert_array_equal(read_flat(read_header(path), volume=v), expected)
        data, grid = load_map(path, volume=v)
        np.testing.assert_array_equal(data.ravel(order="F"), expected)
    with pytest.raises(ImageFormatError, match="4D file with 2 volumes; choose one"):
        read_flat(read_header(path))
    with pytest.raises(ImageFormatError, match="volume 5 requested"):
        load_map(path, volume=5)


def test_scaled_integer_and_multimember_gzip(tmp_path):
    data = np.arange(4 * 5 * 6, dtype=np.int16).reshape(4, 5, 6)
    img = nib.Nifti1Image(data, np.eye(4))
    img.header.set_slope_inter(0.5, -3.0)
    path = tmp_path / "scaled.nii"
    nib.save(img, path)
    expected = nib.load(path).get_fdata().ravel(order="F")
    np.testing.assert_allclose(read_flat(read_header(path)), expected)
    # the same bytes as two concatenated gzip members (allowed by RFC 1952)
    raw = path.read_bytes()
    gz = tmp_path / "scaled.nii.gz"
    gz.write_bytes(gzip.compress(raw[:200]) + gzip.compress(raw[200:]))
    np.testing.assert_allclose(read_flat(read_header(gz)), expected)


def test_missing_corrupt_truncated_and_non_nifti_files(tmp_path):
    with pytest.raises(InputFileError, match="file not found"):
        read_header(tmp_path / "absent.nii.gz")
    good = save_nifti(tmp_path / "good.nii.gz", np.random.default_rng(0).normal(size=(20, 24, 18)))
    raw = good.read_bytes()
    trunc = tmp_path / "truncated.nii.gz"
    trunc.write_bytes(raw[: len(raw) // 2])
    with pytest.raises(ImageFormatError, match="truncated"):
        read_flat(read_header(trunc))
    corrupt = tmp_path / "corrupt.nii.gz"
    corrupt.write_bytes(raw[:400] + bytes(200) + raw[600:])
    with pytest.raises(ImageFormatError, match="corrupt|truncated"):
        read_flat(read_header(corrupt))
    text = tmp_path / "notes.nii.gz"
    text.write_bytes(gzip.compress(b"these are not voxels" * 30))
    with pytest.raises(ImageFormatError, match="not a NIfTI|cannot read"):
        read_header(text)
    csv = tmp_path / "table.csv"
    csv.write_text("a,b\n1,2\n")
    with pytest.raises(ImageFormatError, match="not a NIfTI"):
        read_header(csv)


def test_grid_comparison_names_both_files():
    a = Grid((20, 24, 18), SMALL_AFFINE)
    b = Grid((20, 24, 18), SMALL_AFFINE.copy())
    check_same_grid(a, b, a_name="x", b_name="y")  # identical
    c = Grid((20, 24, 18), SMALL_AFFINE @ np.diag([1.0, 1, 1.0005, 1]))
    check_same_grid(a, c, a_name="x", b_name="y", atol=0.01)  # within tolerance
    d = Grid((10, 12, 9), SMALL_AFFINE)
    with pytest.raises(GridMismatchError, match=r"one.nii has shape 20x24x18.*two.nii has shape 10x12x9"):
        check_same_grid(a, d, a_name="one.nii", b_name="two.nii")


def test_non_overlapping_grids_are_refused():
    far = MNI2_AFFINE.copy()
    far[:3, 3] += 1000.0
    with pytest.raises(GridMismatchError, match="do not overlap in world space"):
        check_overlap(Grid((91, 109, 91), far), MNI2, source_name="atlas", target_name="maps")


def test_resampling_onto_a_2x_coarser_grid_keeps_labels():
    # Labels in 2x2x2 blocks on a 1 mm grid; the 2 mm grid's voxel centres fall at block centres+-0.5 mm
    # (ties), so choose a fine grid whose blocks are 2x2x2 with the coarse centre on a fine voxel centre.
    fine = Grid((8, 8, 8), np.diag([1.0, 1.0, 1.0, 1.0]))
    coarse = Grid((4, 4, 4), np.diag([2.0, 2.0, 2.0, 1.0]))  # coarse voxel c sits at fine voxel 2c
    labels = np.zeros((8, 8, 8), dtype=np.int16)
    expected = np.arange(1, 65, dtype=np.int16).reshape(4, 4, 4)
    labels[::2, ::2, ::2] = expected  # known by construction: fine voxel 2c carries coarse label c
    got = resample_nearest(labels, fine, coarse)
    np.testing.assert_array_equal(got, expected)


def test_resampling_onto_a_grid_with_flipped_x():
    src = Grid((5, 4, 3), np.diag([2.0, 2.0, 2.0, 1.0]))
    flipped_affine = np.diag([-2.0, 2.0, 2.0, 1.0])
    flipped_affine[0, 3] = 8.0  # voxel i on the flipped grid is at x = 8 - 2 i, i.e. source voxel 4 - i
    dst = Grid((5, 4, 3), flipped_affine)
    labels = np.arange(60, dtype=np.int16).reshape(5, 4, 3)
    got = resample_nearest(labels, src, dst)
    np.testing.assert_array_equal(got, labels[::-1])
    # outside the source: filled
    shifted = flipped_affine.copy()
    shifted[0, 3] = 12.0
    got = resample_nearest(labels, src, Grid((5, 4, 3), shifted), fill=-1)
    assert (got[:2] == -1).all() and (got[2:] == labels[::-1][:3]).all()


def test_header_pairs_and_fast_header_agree_with_nibabel(tmp_path):
    # a .hdr/.img pair goes through nibabel's loader; its voxels are read from the .img file
    data = np.random.default_rng(1).normal(size=(6, 7, 8)).astype(np.float32)
    nib.save(nib.Nifti1Pair(data, SMALL_AFFINE), tmp_path / "pair.img")
    h = read_header(tmp_path / "pair.hdr")
    assert h.path.endswith("pair.img")
    np.testing.assert_array_equal(read_flat(h), data.ravel(order="F"))
    for name in ("anatomical.nii", "example4d.nii.gz", "example_nifti2.nii.gz", "standard.nii.gz"):
        path = os.path.join(NIBABEL_DATA, name)
        img = nib.load(path)
        h = read_header(path)
        # reference library: nibabel's own affine, shape and data type
        np.testing.assert_allclose(h.grid.affine, img.affine)
        assert h.grid.shape == img.shape[:3] and h.dtype == img.get_data_dtype()


class _Spy:
    """Stands in for the `deflate` module: records each gzip_decompress call (bytes given, or "declined").

    libdeflate's C functions (called through ctypes) are set aside, so the package's Python function is used.
    """

    def __init__(self, images, monkeypatch):
        import deflate

        self.calls = []

        def gzip_decompress(data, size=0):
            try:
                out = deflate.gzip_decompress(data, size)
            except Exception:
                self.calls.append("declined")
                raise
            self.calls.append(len(out))
            return out

        self.gzip_decompress = gzip_decompress
        monkeypatch.setattr(images, "_deflate", self)
        monkeypatch.setattr(images, "_libdeflate_calls", None)


def test_libdeflate_and_zlib_give_identical_voxels(tmp_path, monkeypatch):
    import roikit.images as images

    assert images._deflate is not None, "libdeflate (the `deflate` package) is a regular dependency"
    data = np.random.default_rng(5).normal(size=(20, 24, 18)).astype(np.float32)
    data[:5] = 0
    path = save_nifti(tmp_path / "m.nii.gz", data)
    header = read_header(path)
    if sys.platform.startswith("linux"):  # elsewhere the package's Python function is used (tested below)
        assert images._libdeflate_calls is not None, "the deflate package exports libdeflate's C functions"
    direct = read_flat(header).copy()  # libdeflate's C functions through ctypes (the default)
    spy = _Spy(images, monkeypatch)
    binding = read_flat(header).copy()  # the deflate package's Python function
    assert spy.calls == [header.offset + data.nbytes], "libdeflate decompresses whole maps"
    monkeypatch.setattr(images, "_deflate", None)  # the fallback: no `deflate` package
    plain = read_flat(header)
    assert direct.tobytes() == binding.tobytes() == plain.tobytes() == data.tobytes(order="F")


def test_libdeflate_through_ctypes_declines_what_it_cannot_decide(tmp_path):
    import roikit.images as images

    if images._libdeflate_calls is None and not sys.platform.startswith("linux"):
        pytest.skip("the deflate package does not export libdeflate's C functions on this platform")

    data = np.arange(6 * 7 * 8, dtype=np.float32).reshape(6, 7, 8)
    good = save_nifti(tmp_path / "plain.nii.gz", data).read_bytes()
    size = len(gzip.decompress(good))
    calls = images._libdeflate_calls
    assert bytes(calls(good, size)) == gzip.decompress(good)
    assert bytes(calls(bytearray(good), size + 10)) == gzip.decompress(good)  # room to spare; any buffer type
    assert calls(good, size - 1) is None  # too small a buffer
    assert calls(good[:300] + bytes(300) + good[600:], size) is None  # corrupt
    assert calls(good[:-100], size) is None  # truncated
    # several members: the first one only (too few bytes for the voxels, so read_flat hands over to zlib)
    assert bytes(calls(gzip.compress(b"ab" * 50) + good, size)) == b"ab" * 50


def test_libdeflate_declines_and_zlib_decides_for_unusual_gzip(tmp_path, monkeypatch):
    import roikit.images as images

    data = np.arange(6 * 7 * 8, dtype=np.float32).reshape(6, 7, 8)
    plain = save_nifti(tmp_path / "plain.nii.gz", data)
    raw = gzip.decompress(plain.read_bytes())
    spy = _Spy(images, monkeypatch)
    # several members whose last ISIZE (40 bytes) is below the bytes needed: the same branch as a file above
    # 4 GiB whose ISIZE wrapped around; libdeflate is not asked, zlib reads the members
    short_last = tmp_path / "short_last.nii.gz"
    short_last.write_bytes(gzip.compress(raw[:-40]) + gzip.compress(raw[-40:]))
    assert read_flat(read_header(short_last)).tobytes() == data.tobytes(order="F")
    assert spy.calls == []
    # a short first member and a last one (bytes after the voxels) whose ISIZE covers the bytes needed:
    # libdeflate gives the first member only (too few bytes) and the member-aware reader takes over
    short_first = tmp_path / "short_first.nii.gz"
    short_first.write_bytes(gzip.compress(raw[:100]) + gzip.compress(raw[100:]) + gzip.compress(bytes(len(raw))))
    assert read_flat(read_header(short_first)).tobytes() == data.tobytes(order="F")
    assert spy.calls == [100]
    # corrupt and truncated data (the header intact): libdeflate declines, zlib's error is one ImageFormatError line
    good = plain.read_bytes()
    header = read_header(plain)
    for name, content, word in [("corrupt.nii.gz", good[:300] + bytes(300) + good[600:], "corrupt|truncated"),
                                ("truncated.nii.gz", good[:-100], "truncated")]:
        bad = tmp_path / name
        bad.write_bytes(content)
        for use_libdeflate in (True, False):
            if not use_libdeflate:
                monkeypatch.setattr(images, "_deflate", None)
            with pytest.raises(ImageFormatError, match=word) as err:
                read_flat(header, raw=content)
            assert str(plain) in str(err.value) and "\n" not in str(err.value)
            monkeypatch.setattr(images, "_deflate", spy)
    assert "declined" in spy.calls
