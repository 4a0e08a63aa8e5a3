"""`roikit stats` end to end: files, sidecar, exit codes."""

from __future__ import annotations

import json

import numpy as np
import pytest

from roikit._tables import read_table, sha256_file, write_table
from roikit.cli import main

from stats_data import participants_table, values_table


@pytest.fixture
def files(tmp_path):
    rng = np.random.default_rng(8)
    values = values_table({"novel": rng.normal(0.5, 1, (16, 3)), "familiar": rng.normal(0, 1, (16, 3))})
    vpath = write_table(tmp_path / "region_values.tsv", values)
    ppath = write_table(tmp_path / "participants.tsv", participants_table(16))
    return tmp_path, vpath, ppath


def test_stats_writes_results_and_sidecar(files, capsys):
    tmp, vpath, ppath = files
    out = tmp / "group_results.tsv"
    code = main(["stats", str(vpath), "--design", "two-group", "--contrast", "novel", "--group", "group",
                 "--levels", "younger,older", "--welch", "--participants", str(ppath), "--out", str(out),
                 "--permutations", "200", "--seed", "4", "--correct", "holm,fdr,bonferroni"])
    assert code == 0
    res = read_table(out)
    assert len(res) == 3 and (res["df_method"] == "welch").all() and "p_fwe" in res.columns
    raw = json.loads(out.with_suffix(".json").read_text())
    # BIDS column descriptions: one entry per column, plus one GeneratedBy entry with the provenance
    assert set(raw) == set(res.columns) | {"GeneratedBy"}
    assert raw["p"]["Description"] and raw["statistic_type"]["Levels"]["t"]
    side = raw["GeneratedBy"][0]
    assert side["Name"] == "roikit"
    assert side["options"]["seed"] == 4 and side["options"]["welch"] is True
    assert side["inputs"]["values"]["sha256"] == sha256_file(vpath)
    assert side["inputs"]["participants"]["sha256"] == sha256_file(ppath)
    # its own earlier output is replaced without --overwrite (a rerun)
    capsys.readouterr()
    assert main(["stats", str(vpath), "--design", "one-sample", "--contrast", "novel", "--out", str(out)]) == 0
    assert (read_table(out)["term"] == "mean").all()
    capsys.readouterr()
    # a file it did not write (here: the values table) needs --overwrite: exit 1, one line on stderr
    code = main(["stats", str(vpath), "--design", "one-sample", "--contrast", "novel", "--out", str(ppath)])
    err = capsys.readouterr().err
    assert code == 1 and "is not an unchanged output of roikit stats; pass --overwrite" in err
    assert err.count("\n") == 1


def test_stats_usage_errors(files, capsys):
    tmp, vpath, _ = files
    out = tmp / "r.tsv"
    assert main(["stats", str(vpath), "--design", "anova", "--out", str(out)]) == 2
    assert "is not a design (designs: one-sample" in capsys.readouterr().err
    assert main(["stats", str(vpath), "--design", "paired", "--contrast", "novel", "--out", str(out)]) == 2
    assert "--versus" in capsys.readouterr().err
    assert main(["stats", str(vpath), "--design", "one-sample", "--contrast", "town9", "--out", str(out)]) == 1
    assert "not found" in capsys.readouterr().err
    assert not out.exists()
