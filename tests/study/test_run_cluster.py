"""`roikit run --scheduler` and `roikit stats --scheduler`: a Dask cluster writes the same bytes as this machine.

The check is the local run itself: extraction, every analysis and the corrections must come out identical, number
for number (the TSV files hold every float's shortest exact repr). The regions are cut into chunks of 2 here (4 regions,
so 2 chunks per analysis) to exercise the gathering; the chunks are the same with and without a cluster.
"""

from __future__ import annotations

import sys

import pandas as pd
import pytest

from roikit.cli import main
from roikit.stats import _chunks

from conftest import STUDY_TOML
from test_study_functional import _write as _write_functional
from test_study_functional import run_study_dir  # noqa: F401 - a fixture, used below

#: More analyses than the tiny study's: seeded permutations (max-statistic fwe, sign-flip), precision weights,
#: a covariate, a mixed model over both contrasts.
MORE = """
[[analysis]]
design = "one-sample"
contrast = "familiar"
correct = "fwe,holm"
permutations = 200
seed = 7

[[analysis]]
design = "precision-weighted"
contrast = "novel"
permutations = 100
seed = 3

[[analysis]]
design = "glm"
contrast = "novel"
formula = "value ~ age"

[[analysis]]
design = "mixed"
formula = "value ~ contrast"
random = "1"
"""


@pytest.fixture(scope="module")
def cluster():
    import distributed  # part of the test install: this must not skip
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as c:
        yield c


def _tsv_files(folder):
    return sorted(p.relative_to(folder) for p in folder.rglob("*.tsv") if ".cache" not in p.parts)


def test_run_on_a_cluster_writes_the_same_tables_as_a_local_run(study_dir, tmp_path, cluster, monkeypatch, capsys):
    monkeypatch.setattr(_chunks, "CHUNK_REGIONS", 2)
    study = study_dir / "study.toml"
    study.write_text(STUDY_TOML + MORE, encoding="utf-8")
    local, remote = tmp_path / "local", tmp_path / "remote"
    assert main(["run", str(study), "--out", str(local), "--no-figures", "--quiet"]) == 0
    assert main(["run", str(study), "--out", str(remote), "--no-figures", "--quiet",
                 "--scheduler", cluster.scheduler_address]) == 0
    files = _tsv_files(local)
    assert files == _tsv_files(remote)
    assert {"region_values.tsv", "group_results.tsv", "warnings.tsv"} <= {str(p) for p in files}
    for name in files:
        a = (local / name).read_text(encoding="utf-8")
        b = (remote / name).read_text(encoding="utf-8").replace(str(remote), str(local))
        assert a == b, name
    results = pd.read_csv(local / "group_results.tsv", sep="\t")
    assert set(results["design"]) == {"one-sample", "two-group", "precision-weighted", "glm", "mixed"}
    assert results["p_fwe"].notna().any()  # the seeded permutations ran (and gave the same p on the cluster)
    assert results["region"].nunique() == 4


def test_stats_on_a_cluster_matches_the_local_table_for_several_designs(study_dir, tmp_path, cluster, monkeypatch):
    monkeypatch.setattr(_chunks, "CHUNK_REGIONS", 3)  # 4 regions: chunks of 3 and 1
    values = str(tmp_path / "region_values.tsv")
    maps = study_dir / "maps"
    assert main(["extract", "--maps", str(maps / "sub-{subject}_contrast-{contrast}_effect.nii.gz"),
                 "--variance", str(maps / "sub-{subject}_contrast-{contrast}_variance.nii.gz"),
                 "--atlas", str(study_dir / "atlas.nii.gz"), "--labels", str(study_dir / "atlas.tsv"),
                 "--sphere", "prior peak=-10,0,0,4", "--out", values, "--quiet"]) == 0
    participants = str(study_dir / "participants.tsv")
    designs = [
        ["--design", "one-sample", "--contrast", "novel", "--permutations", "200", "--seed", "11",
         "--correct", "fwe,fdr"],
        ["--design", "two-group", "--contrast", "novel", "--group", "group", "--levels", "younger,older"],
        ["--design", "precision-weighted", "--contrast", "novel", "--permutations", "100", "--seed", "5"],
        ["--design", "mixed", "--formula", "value ~ contrast", "--random", "1"],
    ]
    for i, options in enumerate(designs):
        here, there = tmp_path / f"local-{i}.tsv", tmp_path / f"remote-{i}.tsv"
        common = ["stats", values, "--participants", participants, "--quiet", *options]
        assert main([*common, "--out", str(here)]) == 0
        assert main([*common, "--out", str(there), "--scheduler", cluster.scheduler_address]) == 0
        assert here.read_bytes() == there.read_bytes(), options[1]


def test_an_unreachable_scheduler_is_one_line_naming_the_address(tmp_path, monkeypatch, capsys):
    from roikit.cli import _cluster

    monkeypatch.setattr(_cluster, "CONNECT_TIMEOUT", "1s")
    values = tmp_path / "values.tsv"
    values.write_text("participant_id\tcontrast\tregion\tvalue\tn_voxels\tn_valid\nsub-01\tnovel\tA\t1.0\t5\t5\n")
    status = main(["stats", str(values), "--design", "one-sample", "--contrast", "novel", "--out",
                   str(tmp_path / "r.tsv"), "--scheduler", "tcp://127.0.0.1:1"])
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 1
    assert len(err) == 1 and "tcp://127.0.0.1:1" in err[0] and "cannot reach a Dask scheduler" in err[0]
    assert not (tmp_path / "r.tsv").exists()


def test_without_dask_the_scheduler_option_is_a_usage_error_with_the_install_command(study_dir, tmp_path,
                                                                                   monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "distributed", None)  # as if the extra were not installed
    status = main(["run", str(study_dir / "study.toml"), "--out", str(tmp_path / "out"), "--scheduler",
                   "tcp://127.0.0.1:8786"])
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2
    assert len(err) == 1 and "pip install 'roikit[distributed]'" in err[0]


def test_functional_regions_on_a_cluster_match_the_local_run(run_study_dir, tmp_path, cluster):
    """Functional regions take their search spaces' voxels from the extraction's own read: on the workers too."""
    import distributed

    from roikit.study import run_study

    study = _write_functional(run_study_dir, 'split = "run"\n')
    local = run_study(study, out=tmp_path / "local", figures=False)
    with distributed.Client(cluster) as client:
        remote = run_study(study, out=tmp_path / "remote", figures=False, client=client)
    for name in ("region_values.tsv", "group_results.tsv"):
        assert (tmp_path / "local" / name).read_bytes() == (tmp_path / "remote" / name).read_bytes(), name
    assert remote.extracted == local.extracted > 0
    assert "novelty fROI" in set(remote.values["region"].astype(str))
