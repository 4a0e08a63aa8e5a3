"""Tests for the shared table writer and reader (roikit._tables)."""

import os
import stat

import numpy as np
import pandas as pd
import pytest

from roikit._tables import read_table, write_table
from roikit.errors import OutputExistsError


def test_tsv_round_trip_with_na_labels_and_exact_floats(tmp_path):
    table = pd.DataFrame({"participant_id": ["sub-007", "sub-01"], "value": [0.1 + 0.2, np.nan],
                          "ok": [True, False], "region": ["left hippocampus", "right caudate"]})
    path = write_table(tmp_path / "t.tsv", table, sidecar={"columns": {"value": "x"}})
    text = path.read_text()
    assert "n/a" in text and "0.30000000000000004" in text  # exact repr, n/a for missing (BIDS)
    back = read_table(path)
    assert back["participant_id"].tolist() == ["sub-007", "sub-01"]
    assert back["value"].iloc[0] == 0.1 + 0.2 and np.isnan(back["value"].iloc[1])
    import json

    from roikit._tables import read_sidecar

    side = json.loads((tmp_path / "t.json").read_text())
    assert side["value"] == {"Description": "x"} and side["GeneratedBy"][0]["Name"] == "roikit"
    assert set(side) == set(table.columns) | {"GeneratedBy"}
    assert read_sidecar(path)["columns"]["value"] == {"Description": "x"}
    with pytest.raises(OutputExistsError):
        write_table(path, table)


def test_written_files_follow_the_umask(tmp_path):
    old = os.umask(0o022)
    try:
        path = write_table(tmp_path / "t.tsv", pd.DataFrame({"a": [1]}))
    finally:
        os.umask(old)
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o644
