"""Study files: validation reports every problem at once; formulas never run code."""

from __future__ import annotations

import json
import shutil

import pytest

from roikit.cli import main
from roikit.errors import InputFileError, UsageError
from roikit.study import StudyError, check_formula, load_study

COLUMNS = ["participant_id", "contrast", "region", "value", "n_voxels", "n_valid", "variance", "group", "age",
           "route_accuracy"]


def test_valid_study_loads(study_dir):
    study = load_study(study_dir / "study.toml")
    assert study.title == "Wayfinding study (tiny test copy)"
    assert len(study.maps) == 8 * 2
    assert "variance_path" in study.maps.columns
    assert study.realised.names == ["right caudate", "left caudate", "retrosplenial cortex", "prior peak"]
    assert [a.design for a in study.analyses] == ["one-sample", "two-group"]
    assert study.analyses[1].options == {"contrast": "novel", "group": "group", "levels": ["younger", "older"]}
    assert study.default_out == study_dir / "results"


def test_paths_are_relative_to_the_study_file(study_dir, tmp_path, monkeypatch):
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    study = load_study(study_dir / "study.toml")
    assert len(study.maps) == 16


def test_every_problem_is_reported_at_once(study_dir):
    (study_dir / "study.toml").write_text("""\
[study]
title = "several mistakes"
participants = "participants.tsv"
colour = "blue"

[maps]
effect = "maps/sub-{subject}_contrast-{contrast}_effect.nii.gz"

[regions]
atlas = "atlas.nii.gz"
labels = "atlas.tsv"
select = ["left caudate", "left caudat"]

[[regions.sphere]]
name = "prior peak"
center = [30.0, -20.0]
radius = -6.0

[extraction]
statistic = "meen"

[[analysis]]
design = "one-sample"
contrasts = "novel"

[[analysis]]
design = "two-group"
contrast = "novel"
group = "group"
levels = ["younger", "old"]

[[analysis]]
design = "glm"
contrast = "novl"
formula = "value ~ np.log(age) + sex"

[[analysis]]
design = "precision-weighted"
contrast = "novel"
permutations = 100

[[analysis]]
design = "anova"
""", encoding="utf-8")
    with pytest.raises(StudyError) as info:
        load_study(study_dir / "study.toml")
    problems = info.value.problems
    text = str(info.value)
    expected = [
        "study.colour: unknown key",
        "regions.sphere[1].center: must be three numbers",
        "regions.sphere[1].radius: must be a positive number",
        "regions.select: unknown region left caudat; did you mean 'left caudate'?",
        "extraction.statistic: must be one of mean, median, trimmed-mean, weighted-mean, found 'meen'; "
        "did you mean 'mean'?",
        "analysis[1].contrasts: unknown key; did you mean 'contrast'?",
        "analysis[1].contrast: missing",
        "analysis[2].levels: 'old' is not a value of column group; did you mean 'older'?; found older, younger",
        "analysis[3].contrast: 'novl' is not a contrast of the maps; did you mean 'novel'?; found familiar, novel",
        "analysis[3].formula: formula 'value ~ np.log(age) + sex': token '.' is not allowed",
        "analysis[4].seed: missing",
        "analysis[4].design: 'precision-weighted' needs first-level variances",
        "analysis[5].design: 'anova' is not a design",
    ]
    for item in expected:
        assert any(p.startswith(item) for p in problems), (item, problems)
    assert len(problems) == len(expected)
    # one message lists them all, one per line, under a head line
    assert text.splitlines()[0].endswith(f"{len(expected)} problems in the study file (nothing was run):")
    assert len(text.splitlines()) == len(expected) + 1
    assert isinstance(info.value, UsageError) and isinstance(info.value, ValueError)


def test_formula_naming_an_unknown_column_and_a_forbidden_call(study_dir):
    text = (study_dir / "study.toml").read_text()
    text += '\n[[analysis]]\ndesign = "glm"\ncontrast = "novel"\nformula = "value ~ I(age**2) + agee"\n'
    (study_dir / "study.toml").write_text(text)
    with pytest.raises(StudyError) as info:
        load_study(study_dir / "study.toml")
    problems = info.value.problems
    assert any("'I' is not an allowed transform" in p for p in problems)
    assert any("'agee' is not a column" in p and "did you mean 'age'?" in p for p in problems)
    assert all(p.startswith("analysis[3].formula: formula 'value ~ I(age**2) + agee'") for p in problems)


def test_toml_syntax_error_names_the_line(study_dir):
    (study_dir / "study.toml").write_text('[study]\ntitle = "unterminated\n')
    with pytest.raises(StudyError, match=r"not valid TOML: .*line 2"):
        load_study(study_dir / "study.toml")


def test_missing_study_file(tmp_path):
    with pytest.raises(InputFileError, match="study file not found"):
        load_study(tmp_path / "nope.toml")


def test_missing_sections_and_files(study_dir):
    (study_dir / "study.toml").write_text('[study]\nparticipants = "people.tsv"\n')
    with pytest.raises(StudyError) as info:
        load_study(study_dir / "study.toml")
    problems = info.value.problems
    assert any(p.startswith("study.participants: participants table 'people.tsv' not found") for p in problems)
    assert any(p.startswith("maps: missing") for p in problems)
    assert any(p.startswith("regions: missing") for p in problems)
    assert any(p.startswith("analysis: no [[analysis]] given") for p in problems)


def test_options_that_do_not_apply_and_types(study_dir):
    text = (study_dir / "study.toml").read_text()
    text += """
[[analysis]]
design = "paired"
contrast = "novel"
versus = "novel"
welch = "yes"
confidence = 95

[[analysis]]
design = "mixed"
formula = "value ~ contrast * group"
random = "1 + contrast ~ x"
crossed = "town"
"""
    (study_dir / "study.toml").write_text(text)
    with pytest.raises(StudyError) as info:
        load_study(study_dir / "study.toml")
    problems = info.value.problems
    assert any(p.startswith("analysis[3].welch: does not apply to design 'paired'") for p in problems)
    assert any(p.startswith("analysis[3].versus: must differ from contrast") for p in problems)
    assert any(p.startswith("analysis[3].confidence: must be a number strictly between 0 and 1") for p in problems)
    assert any(p.startswith("analysis[4].random: random '1 + contrast ~ x': '~' is not allowed") for p in problems)
    assert any(p.startswith("analysis[4].crossed: must be a column") for p in problems)


def test_region_operations_and_circular_flag(study_dir):
    text = (study_dir / "study.toml").read_text().replace(
        'labels = "atlas.tsv"\n',
        'labels = "atlas.tsv"\nsplit_hemispheres = ["retrosplenial cortex"]\nwithin = "brain_mask.nii.gz"\n'
        'rename = {"prior peak" = "earlier peak"}\ncircular = ["earlier peak"]\n')
    (study_dir / "study.toml").write_text(text)
    study = load_study(study_dir / "study.toml")
    assert study.realised.names == ["right caudate", "left caudate", "left retrosplenial cortex",
                                    "right retrosplenial cortex", "earlier peak"]
    assert study.circular == ["earlier peak"]


# --------------------------------------------------------------------------------------------------- formulas


@pytest.mark.parametrize("formula", [
    "value ~ age + group",
    "value ~ center(age) + C(group) + log(route_accuracy)",
    "value ~ (age + group)**2 - 1",
    "value ~ standardize(age):group + scale(age) / group",
    "~ age",
    "value ~ 0 + `group`",
    "value ~ 1 + age - 1 + 1",
])
def test_allowed_formulas(formula):
    assert check_formula(formula, COLUMNS) == []


@pytest.mark.parametrize("formula, token", [
    ("value ~ np.log(age)", "token '.'"),
    ("value ~ I(age**2)", "'I' is not an allowed transform"),
    ("value ~ (age + group)**1000000000", "power 1000000000 is out of range"),
    ("value ~ 0", "the model has no terms"),
    ("value ~ age + 3", "the number 3 is not a term"),
    ("value ~ __import__('os').system('x')", "token \"'\" is not allowed"),
    ("value ~ __import__(age)", "'__import__' is not an allowed transform"),
    ("value ~ age; import os", "token ';'"),
    ("value ~ {age + 1}", "token '{'"),
    ("value ~ C(group, Treatment)", "token ','"),
    ("value ~ exp(age)", "'exp' is not an allowed transform"),
    ("value ~ age + lambda", "'lambda' is not a column"),
    ("age ~ group", "the left-hand side must be 'value'"),
    ("value ~ (age + group", "unbalanced '('"),
    ("value ~ age ~ group", "'~' appears 2 times"),
])
def test_refused_formulas_name_the_formula_and_token(formula, token):
    problems = check_formula(formula, COLUMNS)
    assert problems, formula
    assert any(token in p and repr(formula) in p for p in problems), problems


def test_a_refused_formula_never_reaches_the_formula_library(study_dir, tmp_path):
    marker = tmp_path / "ran"
    text = (study_dir / "study.toml").read_text()
    text += ('\n[[analysis]]\ndesign = "glm"\ncontrast = "novel"\n'
             f"formula = \"value ~ __import__('pathlib').Path('{marker}').touch() + age\"\n")
    (study_dir / "study.toml").write_text(text)
    with pytest.raises(StudyError, match="formula .*__import__.*: token \"'\" is not allowed in a formula"):
        load_study(study_dir / "study.toml")
    assert not marker.exists()


@pytest.mark.parametrize("key, payload", [
    ("formula", "value ~ {__import__('pathlib').Path('MARKER').touch()}"),
    ("formula", "value ~ contrast + `{open('MARKER', 'w')}`"),
    ("random", "1 + {__import__('os').system('touch MARKER')}"),
    ("random", "1 + __import__('os').system('touch MARKER')"),
    ("crossed", "__import__('os').system('touch MARKER')"),
])
def test_payloads_in_formula_random_and_crossed_never_run(study_dir, tmp_path, key, payload):
    marker = tmp_path / "ran"
    payload = payload.replace("MARKER", str(marker))
    text = (study_dir / "study.toml").read_text()
    block = {"formula": "value ~ contrast", "random": "1", "crossed": None}
    block[key] = payload
    text += '\n[[analysis]]\ndesign = "mixed"\n' + "".join(
        f"{k} = {json.dumps(v)}\n" for k, v in block.items() if v is not None)
    (study_dir / "study.toml").write_text(text)
    with pytest.raises(StudyError) as info:
        load_study(study_dir / "study.toml")
    assert isinstance(info.value, UsageError)
    assert f"analysis[3].{key}" in str(info.value)
    assert not marker.exists()
    status = main(["run", str(study_dir / "study.toml"), "--out", str(tmp_path / "out")])
    assert status == 2
    assert not marker.exists()


def test_glob_characters_in_the_study_folder_are_literal(study_dir, tmp_path):
    # a sibling folder whose name the '*' and '[...]' of the study folder's name would match as a glob
    weird = tmp_path / "wayfinding [pilot]*"
    decoy = tmp_path / "wayfinding [pilot]-other"
    shutil.copytree(study_dir, weird)
    shutil.copytree(study_dir, decoy)
    (decoy / "maps" / "sub-99_contrast-novel_effect.nii.gz").write_bytes(
        (study_dir / "maps" / "sub-01_contrast-novel_effect.nii.gz").read_bytes())
    study = load_study(weird / "study.toml")
    assert "sub-99" not in set(study.maps["participant_id"])
    assert all(str(p).startswith(str(weird)) for p in study.maps["path"])
