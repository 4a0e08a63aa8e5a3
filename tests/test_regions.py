"""Tests for roikit.regions."""

import warnings

import numpy as np
import pandas as pd
import pytest

from roikit.errors import GridMismatchError, LabelTableWarning, RegionError, ResamplingWarning, UsageError
from roikit.images import Grid
from roikit.regions import Atlas, Mask, ProbabilityMap, RegionSet, Sphere, read_label_table

from helpers import SMALL_AFFINE, SMALL_SHAPE, save_nifti
from helpers import MNI2_AFFINE, MNI2_SHAPE

MNI2 = Grid(MNI2_SHAPE, MNI2_AFFINE)


def test_sphere_at_the_mni_origin_is_centred_on_voxel_45_63_36():
    # MNI152 2 mm grid facts (common practice, from memory): (0, 0, 0) mm is voxel (45, 63, 36).
    regions = RegionSet([Sphere("origin", (0.0, 0.0, 0.0), 2.0)]).realise(MNI2)
    ijk = MNI2.flat_to_ijk(regions.voxels[0])
    # radius 2 mm on 2 mm voxels: the centre and its 6 face neighbours
    assert len(ijk) == 7
    assert ijk.mean(axis=0).tolist() == [45.0, 63.0, 36.0]
    summary = regions.summary()
    assert summary.loc[0, ["x_mm", "y_mm", "z_mm"]].tolist() == [0.0, 0.0, 0.0]
    # a sphere at x = +20 mm lies at i = 45 - 10 = 35 (x flipped on this grid)
    r = RegionSet([Sphere("right", (20.0, -10.0, 8.0), 2.0)]).realise(MNI2)
    assert MNI2.flat_to_ijk(r.voxels[0]).mean(axis=0).tolist() == [35.0, 58.0, 40.0]


@pytest.mark.parametrize("radius", [4.0, 8.0, 16.0, 30.0])
def test_sphere_voxel_count_approaches_the_analytic_volume(radius):
    # Analytic: 4/3 pi r^3 / voxel volume. Counting voxel centres in a ball errs by about a shell of surface
    # voxels, so the relative error scales like the surface/volume ratio 3 * voxel / r; tolerance 1.5 times that,
    # 4.5 * voxel / r (common practice, no source), which shrinks as r grows; below 5% from r = 16 mm.
    grid = Grid((91, 109, 91), MNI2.affine)
    n = len(RegionSet([Sphere("s", (0.0, -20.0, 10.0), radius)]).realise(grid).voxels[0])
    analytic = 4.0 / 3.0 * np.pi * radius**3 / grid.voxel_volume
    assert abs(n - analytic) / analytic < 4.5 * 2.0 / radius
    if radius >= 16:
        assert abs(n - analytic) / analytic < 0.05


def test_sphere_outside_the_field_of_view_is_an_error(small_grid):
    with pytest.raises(RegionError, match=r"sphere at \[500.0, 0.0, 0.0\] mm .* field of view spans"):
        RegionSet([Sphere("far", (500.0, 0.0, 0.0), 6.0)]).realise(small_grid)


def test_sphere_arguments_are_validated():
    with pytest.raises(UsageError, match="radius must be a positive"):
        Sphere("s", (0, 0, 0), -1)
    with pytest.raises(UsageError, match="center must be three finite numbers"):
        Sphere("s", (0, 0), 3)


def test_atlas_label_table_disagreements_warn_by_name(tiny_study, tmp_path):
    table = pd.DataFrame({"index": [1, 2, 4], "name": ["right caudate", "left caudate", "missing region"]})
    with pytest.warns(LabelTableWarning) as record:
        regions = RegionSet([Atlas(tiny_study["atlas"], table)]).realise(
            Grid(SMALL_SHAPE, SMALL_AFFINE))
    messages = " ".join(str(w.message) for w in record)
    assert "indices [4] (missing region)" in messages
    assert "image values [3]" in messages and "[64] voxels" in messages
    assert regions.names == ["right caudate", "left caudate"]


def test_label_table_validation(tmp_path):
    p = tmp_path / "bad.tsv"
    p.write_text("index\tlabel\n1\tx\n")
    with pytest.raises(RegionError, match="lacks column"):
        read_label_table(p)
    p.write_text("index\tname\n1\tx\n1\ty\n")
    with pytest.raises(RegionError, match="repeat"):
        read_label_table(p)
    p.write_text("index\tname\n1.5\tx\n")
    with pytest.raises(RegionError, match="integers"):
        read_label_table(p)


def test_atlas_regions_are_exactly_the_labelled_voxels(tiny_study, small_grid):
    regions = RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])]).realise(small_grid)
    atlas = tiny_study["atlas_data"].ravel(order="F")
    for k, vox in enumerate(regions.voxels, start=1):
        np.testing.assert_array_equal(vox, np.flatnonzero(atlas == k))
    s = regions.summary()
    assert s["n_voxels"].tolist() == [80, 96, 64]
    assert s["volume_mm3"].tolist() == [640.0, 768.0, 512.0]
    # centre of mass of block [2:6, 3:8, 4:8]: voxel (3.5, 5, 5.5) -> x = 20 - 7, y = -24 + 10, z = -18 + 11
    assert s.loc[0, ["x_mm", "y_mm", "z_mm"]].tolist() == [13.0, -14.0, -7.0]


def test_split_hemispheres_by_world_x(tiny_study, small_grid):
    regions = RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])]).split_hemispheres(
        ["retrosplenial cortex"]).realise(small_grid)
    assert regions.names == ["right caudate", "left caudate", "left retrosplenial cortex",
                             "right retrosplenial cortex"]
    # block i = 8..11 -> x = 4, 2, 0, -2: one slab (x = 0, 16 voxels) dropped, x < 0 one slab, x > 0 two slabs
    assert regions.n_voxels.tolist() == [80, 96, 16, 32]
    assert regions.sources[2]["midline_voxels_dropped"] == 16
    with pytest.raises(RegionError, match="has no voxels"):
        RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])]).split_hemispheres().realise(small_grid)


def test_intersect_select_rename_union(tiny_study, small_grid, tmp_path):
    brain = np.zeros(SMALL_SHAPE, dtype=np.uint8)
    brain[:, :, :7] = 1  # keeps z index 4..6 of region 1 (3 of its 4 slabs), 6 of region 2, none of region 3
    save_nifti(tmp_path / "brain.nii.gz", brain, dtype=np.uint8)
    base = RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])])
    r = base.select(["right caudate", "left caudate"]).intersect(tmp_path / "brain.nii.gz").realise(small_grid)
    assert r.n_voxels.tolist() == [60, 24]
    with pytest.raises(RegionError, match="retrosplenial cortex.*after intersection"):
        base.intersect(tmp_path / "brain.nii.gz").realise(small_grid)
    r = base.rename({"left caudate": "L caudate"}).union("caudate", ["right caudate", "L caudate"]).realise(
        small_grid)
    assert r.names == ["right caudate", "L caudate", "retrosplenial cortex", "caudate"]
    assert r.n_voxels[-1] == 176
    with pytest.raises(RegionError, match="unknown region"):
        base.select(["amygdala"]).realise(small_grid)
    with pytest.raises(RegionError, match="names repeat"):
        (base + RegionSet([Sphere("left caudate", (0, 0, 0), 4)])).realise(small_grid)


def test_mask_and_probability_sources(tmp_path, small_grid):
    prob = np.zeros(SMALL_SHAPE)
    prob[5:8, 5:8, 5:8] = 0.3
    prob[6, 6, 6] = 0.9
    save_nifti(tmp_path / "p.nii.gz", prob)
    save_nifti(tmp_path / "m.nii.gz", prob > 0.5, dtype=np.uint8)
    r = RegionSet([Mask("core", tmp_path / "m.nii.gz"),
                   ProbabilityMap(tmp_path / "p.nii.gz", threshold=0.25, name="blob")]).realise(small_grid)
    assert r.n_voxels.tolist() == [1, 27]
    np.testing.assert_allclose(np.sort(r.weights[1])[-2:], [0.3, 0.9], rtol=1e-6)
    # 4D probability maps: one volume per region, named by a label table (index = volume number)
    four = np.stack([prob, prob[::-1]], axis=-1)
    save_nifti(tmp_path / "p4.nii.gz", four)
    table = pd.DataFrame({"index": [1, 2], "name": ["blob a", "blob b"]})
    r = RegionSet([ProbabilityMap(tmp_path / "p4.nii.gz", threshold=0.5, labels=table)]).realise(small_grid)
    assert r.names == ["blob a", "blob b"] and r.n_voxels.tolist() == [1, 1]
    assert r.voxels[0][0] != r.voxels[1][0]


def test_region_images_on_another_grid_are_resampled_and_recorded(tmp_path, small_grid):
    # the same mask stored on a 1 mm grid covering the same space: resampled by nearest neighbour
    fine_affine = SMALL_AFFINE.copy()
    fine_affine[:3, :3] /= 2.0
    fine = np.zeros((40, 48, 36), dtype=np.uint8)
    fine[10:20, 10:20, 10:20] = 1  # coarse voxels 5..9 (fine voxel 2c lands inside for c = 5..9)
    save_nifti(tmp_path / "fine.nii.gz", fine, affine=fine_affine, dtype=np.uint8)
    with pytest.warns(ResamplingWarning, match="resampled by nearest neighbour"):
        r = RegionSet([Mask("cube", tmp_path / "fine.nii.gz")]).realise(small_grid)
    assert r.n_voxels.tolist() == [125]
    assert r.resampling and r.resampling[0]["image"].endswith("fine.nii.gz")
    far = SMALL_AFFINE.copy()
    far[:3, 3] += 5000
    save_nifti(tmp_path / "far.nii.gz", fine[::2, ::2, ::2], affine=far, dtype=np.uint8)
    with pytest.raises(GridMismatchError, match="do not overlap"):
        RegionSet([Mask("far", tmp_path / "far.nii.gz")]).realise(small_grid)


@pytest.mark.parametrize("midline, n_left, n_right", [("drop", 16, 32), ("both", 32, 48), ("left", 32, 32),
                                                      ("right", 16, 48)])
def test_midline_voxels_can_be_dropped_or_assigned(tiny_study, small_grid, midline, n_left, n_right):
    # by construction (see above): slabs at x = 4, 2, 0, -2 mm of 16 voxels each; x = 0 is the midline slab
    base = RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"])])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        regions = base.split_hemispheres(["retrosplenial cortex"], midline=midline).realise(small_grid)
    assert regions.n_voxels.tolist()[2:] == [n_left, n_right]
    assert regions.sources[2]["midline_voxels"] == 16
    said = [str(w.message) for w in caught if "midline" in str(w.message)]
    if midline == "drop":
        assert said and "16 midline voxels (x = 0 mm) dropped: retrosplenial cortex 16" in said[0]
    else:
        assert not said
    with pytest.raises(UsageError, match="midline must be one of drop, both, left, right"):
        base.split_hemispheres(midline="centre")


def test_overlapping_regions_are_reported(tiny_study, small_grid):
    # region 1 of the atlas is the block [2:6, 3:8, 4:8] (80 voxels); a mask on [2:6, 3:8, 4:5] (20 voxels)
    # lies inside it: 20/20 of the mask, 20/80 of the atlas region, by construction
    from helpers import save_nifti as save

    mask = np.zeros(SMALL_SHAPE, dtype=np.uint8)
    mask[2:6, 3:8, 4:5] = 1
    path = tiny_study["atlas"].parent / "inner.nii.gz"
    save(path, mask, dtype=np.uint8)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        regions = RegionSet([Atlas(tiny_study["atlas"], tiny_study["labels"]), Mask("inner", path)]).realise(
            small_grid)
    table = regions.overlaps()
    assert table[["region_a", "region_b", "n_shared"]].values.tolist() == [["right caudate", "inner", 20]]
    assert table["share_of_b"].tolist() == [1.0] and table["share_of_a"].tolist() == [0.25]
    matrix = regions.overlap_matrix()
    assert matrix.loc["inner", "right caudate"] == 20 and matrix.loc["inner", "inner"] == 20
    assert matrix.loc["left caudate", "inner"] == 0
    assert any("20/20 voxels of inner lie in right caudate" in str(w.message) for w in caught)
    assert regions.provenance()["overlaps"][0]["n_shared"] == 20


def test_atlas_without_label_table_gets_generated_names(tiny_study, small_grid):
    with pytest.warns(LabelTableWarning, match="has no label table: its 3 labels are named 'label <index>'"):
        regions = RegionSet([Atlas(tiny_study["atlas"])]).realise(small_grid)
    assert regions.names == ["label 1", "label 2", "label 3"]
    assert regions.n_voxels.tolist() == [80, 96, 64]


def test_former_name_of_realised_regions_is_deprecated():
    import roikit.regions as regions_module
    from roikit.errors import RoikitDeprecationWarning
    from roikit.regions import RealisedRegions

    with pytest.warns(RoikitDeprecationWarning, match="now RealisedRegions"):
        assert regions_module.Regions is RealisedRegions
