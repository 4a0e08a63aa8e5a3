"""The region values table is lean in memory (categorical labels, int32 counts) and Parquet round-trips it.

Answers are known by construction: the lean table must give the same TSV bytes and the same statistics as the
same table held with plain string labels and int64 counts (the layout before the lean table), and a Parquet file
must read back as the same table as the TSV file.
"""

import numpy as np
import pandas as pd
import pytest

from roikit._tables import read_sidecar, read_table, write_table
from roikit.errors import InputFileError
from roikit.extraction import assemble_values, extract, find_maps, write_values
from roikit.regions import Atlas, RegionSet
from roikit.stats import run_design

LABELS = ("participant_id", "session_id", "contrast", "region")


def _plain(table: pd.DataFrame) -> pd.DataFrame:
    """The same table with labels as Python strings and counts as int64 (the layout before the lean table)."""
    out = table.copy()
    for c in LABELS:
        if c in out.columns:
            out[c] = pd.Series([None if pd.isna(x) else str(x) for x in out[c].tolist()], dtype=object)
    for c in ("n_voxels", "n_valid"):
        if c in out.columns:
            out[c] = out[c].astype(np.int64)
    return out


def _normalised(table: pd.DataFrame) -> pd.DataFrame:
    out = _plain(table)
    for c in ("value", "variance"):
        if c in out.columns:
            out[c] = out[c].astype(np.float64)
    return out


@pytest.fixture
def values(tiny_study):
    maps = find_maps(tiny_study["pattern"], variance=tiny_study["variance"])
    return extract(maps, RegionSet([Atlas(tiny_study["atlas"], labels=tiny_study["labels"])]))


def test_labels_are_categorical_and_counts_int32(values):
    for c in ("participant_id", "contrast", "region"):
        assert isinstance(values[c].dtype, pd.CategoricalDtype), c
        # categories sorted as strings: sorting and grouping order as with plain strings
        assert list(values[c].cat.categories) == sorted(values[c].cat.categories)
    assert values["n_voxels"].dtype == np.int32 and values["n_valid"].dtype == np.int32
    assert values["value"].dtype == np.float64 and values["variance"].dtype == np.float64
    # region order in the table is still the region set's order, not the sorted categories' order
    assert list(pd.unique(values["region"])) == ["right caudate", "left caudate", "retrosplenial cortex"]


def test_at_most_64_bytes_per_row_for_610_maps_by_400_regions():
    n_maps, n_regions = 610, 400
    maps = pd.DataFrame({"participant_id": [f"sub-{i // 5:04d}" for i in range(n_maps)],
                         "contrast": [f"contrast{i % 5}" for i in range(n_maps)]})
    rng = np.random.default_rng(1)
    table = assemble_values(maps, [f"region {k:03d}" for k in range(n_regions)], np.full(n_regions, 700),
                            rng.normal(size=(n_maps, n_regions)), np.full((n_maps, n_regions), 700),
                            rng.uniform(size=(n_maps, n_regions)))
    per_row = table.memory_usage(deep=True).sum() / len(table)
    assert per_row <= 64, per_row
    before = _plain(table).memory_usage(deep=True).sum() / len(table)
    assert before > 3 * per_row  # the string layout cost several times more (about 260 bytes per row)


def test_sessions_with_a_missing_label_stay_missing():
    maps = pd.DataFrame({"participant_id": ["sub-01", "sub-01", "sub-02"], "session_id": ["ses-1", "ses-2", np.nan],
                         "contrast": ["a", "a", "a"]})
    table = assemble_values(maps, ["r1", "r2"], [3, 4], np.arange(6.0).reshape(3, 2), np.ones((3, 2)))
    assert table["session_id"].isna().tolist() == [False, False, False, False, True, True]
    assert table["session_id"].iloc[2] == "ses-2"


def test_lean_table_writes_the_same_tsv_bytes_as_plain_strings(values, tmp_path):
    a = write_table(tmp_path / "a" / "values.tsv", values)
    b = write_table(tmp_path / "b" / "values.tsv", _plain(values))
    assert a.read_bytes() == b.read_bytes()
    assert b"n/a" not in a.read_bytes().split(b"\n")[0]


@pytest.mark.parametrize("design,options", [("one-sample", {"contrast": "novel"}),
                                            ("paired", {"contrast": "novel", "versus": "familiar"})])
def test_lean_table_gives_identical_statistics(values, design, options):
    lean = run_design(values, design, **options)
    plain = run_design(_plain(values), design, **options)
    pd.testing.assert_frame_equal(_normalised(lean), _normalised(plain))


def test_parquet_round_trip_equals_the_tsv_round_trip(values, tmp_path):
    tsv = write_values(tmp_path / "values.tsv", values)
    pq = write_values(tmp_path / "values.parquet", values)
    assert pq.read_bytes()[:4] == b"PAR1"
    from_tsv, from_pq = read_table(tsv), read_table(pq)
    assert isinstance(from_pq["region"].dtype, pd.CategoricalDtype)  # categories survive (dictionary columns)
    assert from_pq["n_valid"].dtype == np.int32
    pd.testing.assert_frame_equal(_normalised(from_tsv), _normalised(from_pq))
    pd.testing.assert_frame_equal(_normalised(from_pq), _normalised(values))
    # the same sidecar beside both
    assert read_sidecar(pq) == read_sidecar(tsv)
    assert (tmp_path / "values.json").is_file()
    a = run_design(from_tsv, "one-sample", contrast="familiar")
    b = run_design(from_pq, "one-sample", contrast="familiar")
    pd.testing.assert_frame_equal(_normalised(a), _normalised(b))


def test_parquet_keeps_missing_values_and_labels_that_look_like_numbers(tmp_path):
    table = pd.DataFrame({"participant_id": ["007", "10"], "value": [np.nan, 1.5], "note": ["x", None]})
    path = write_table(tmp_path / "t.parquet", table)
    back = read_table(path)
    assert back["participant_id"].tolist() == ["007", "10"]
    assert np.isnan(back["value"].iloc[0]) and back["value"].iloc[1] == 1.5
    assert pd.isna(back["note"].iloc[1])
    # numbers stored in a label column come back as strings
    write_table(tmp_path / "n.parquet", pd.DataFrame({"participant_id": [1, 2], "value": [0.5, 0.25]}))
    assert read_table(tmp_path / "n.parquet")["participant_id"].tolist() == ["1", "2"]


def test_a_file_that_is_not_parquet_is_refused_naming_it(tmp_path):
    bad = tmp_path / "values.parquet"
    bad.write_text("participant_id\tvalue\nsub-01\t1\n")
    with pytest.raises(InputFileError, match="values.parquet: not a readable Parquet table"):
        read_table(bad)


def test_streamed_parquet_equals_the_whole_table_and_has_one_row_group_per_piece(tiny_study, tmp_path):
    import pyarrow.parquet as papq

    from roikit.extraction import extract_to_file

    maps = find_maps(tiny_study["pattern"], variance=tiny_study["variance"])
    regions = RegionSet([Atlas(tiny_study["atlas"], labels=tiny_study["labels"])])
    whole = extract(maps, regions)
    path, summary = extract_to_file(tmp_path / "out" / "values.parquet", maps, regions, chunk_maps=3)
    assert summary == {"rows": 24, "missing": 0, "regions": 3, "maps": 8}
    assert papq.ParquetFile(path).num_row_groups == 3  # 8 maps in pieces of 3, 3, 2
    back = read_table(path)
    pd.testing.assert_frame_equal(_normalised(back), _normalised(whole))
    side = read_sidecar(path)
    assert side["provenance"]["statistic"] == "mean" and len(side["provenance"]["inputs"]) == 8
    assert set(side["columns"]) == set(whole.columns)
    # the manifest records both files: a rerun replaces them without overwrite
    extract_to_file(tmp_path / "out" / "values.parquet", maps, regions, chunk_maps=5)
    assert papq.ParquetFile(path).num_row_groups == 2


def test_a_failing_map_leaves_no_streamed_file_behind(tiny_study, tmp_path):
    from roikit.errors import RoikitError
    from roikit.extraction import extract_to_file

    maps = find_maps(tiny_study["pattern"])
    regions = RegionSet([Atlas(tiny_study["atlas"], labels=tiny_study["labels"])])
    broken = maps.copy()
    last = broken["path"].iloc[-1]
    with open(last, "r+b") as fh:  # keep the header, cut the data: the map fails while extracting
        fh.truncate(400)
    out = tmp_path / "out"
    with pytest.raises(RoikitError) as info:
        extract_to_file(out / "values.parquet", broken, regions, chunk_maps=2)
    assert getattr(info.value, "partial_values", "absent") is None
    assert not (out / "values.parquet").exists() and not (out / "values.json").exists()


def test_a_parquet_map_list_gives_the_same_values_as_the_tsv_one(tiny_study, tmp_path):
    from roikit.extraction import read_map_list

    maps = find_maps(tiny_study["pattern"], variance=tiny_study["variance"])
    regions = RegionSet([Atlas(tiny_study["atlas"], labels=tiny_study["labels"])])
    write_table(tmp_path / "maps.tsv", maps)
    write_table(tmp_path / "maps.parquet", maps)
    a = extract(read_map_list(tmp_path / "maps.tsv"), regions)
    b = extract(read_map_list(tmp_path / "maps.parquet"), regions)
    pd.testing.assert_frame_equal(a, b)
