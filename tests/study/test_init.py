"""`roikit init`: a first study file from a folder of maps, validated before it is written."""

from __future__ import annotations

import tomllib

import pytest

from roikit.cli import main
from roikit.errors import MapDiscoveryError, OutputExistsError
from roikit.study import load_study, run_study, write_study_file


def test_init_proposes_pattern_regions_and_obvious_analyses(study_dir, tmp_path):
    out = tmp_path / "proposed" / "study.toml"
    path, proposal, study = write_study_file(study_dir / "maps", out=out)
    assert path == out and out.is_file()
    raw = tomllib.loads(out.read_text())
    # paths relative to the study file; the pattern found from the names sub-01_contrast-novel_effect.nii.gz
    assert raw["maps"]["effect"].endswith("maps/sub-{subject}_contrast-{contrast}_effect.nii.gz")
    assert raw["maps"]["variance"].endswith("maps/sub-{subject}_contrast-{contrast}_variance.nii.gz")
    assert raw["study"]["participants"].endswith("participants.tsv")  # found in the parent of maps/
    assert raw["regions"]["atlas"].endswith("atlas.nii.gz") and raw["regions"]["labels"].endswith("atlas.tsv")
    assert proposal.contrasts == ["familiar", "novel"] and len(proposal.participants) == 8
    designs = [a["design"] for a in raw["analysis"]]
    assert designs == ["one-sample", "paired", "two-group", "glm", "precision-weighted"]
    two_group = raw["analysis"][2]
    assert two_group["group"] == "group" and sorted(two_group["levels"]) == ["older", "younger"]
    assert raw["analysis"][3]["formula"] == "value ~ age + group"
    assert "# " in out.read_text()  # commented
    assert study.realised.names == ["right caudate", "left caudate", "retrosplenial cortex"]
    # the proposal runs as it is
    again = load_study(out)
    run = run_study(again, out=tmp_path / "results", figures=False)
    assert set(run.results["design"]) == set(designs)
    with pytest.raises(OutputExistsError):
        write_study_file(study_dir / "maps", out=out)


def test_init_on_the_command_line_and_without_maps(study_dir, tmp_path, capsys):
    out = tmp_path / "s.toml"
    assert main(["init", str(study_dir), "--out", str(out), "--sphere", "peak=-10,0,0,4"]) == 0
    text = capsys.readouterr().out
    assert "8 participants x 2 contrasts" in text and "roikit run" in text
    raw = tomllib.loads(out.read_text())
    assert raw["regions"]["sphere"][0]["name"] == "peak" and "atlas" not in raw["regions"]
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(MapDiscoveryError, match="no map named with entities"):
        write_study_file(empty)
    assert main(["init", str(empty)]) == 1
    assert "no map named with entities" in capsys.readouterr().err
