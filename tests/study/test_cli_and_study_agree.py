"""The same analysis spelled on the command line and in a study file gives byte-identical results."""

from __future__ import annotations

import io

import pandas as pd
import pytest

from roikit._options import spell, entry_point, suggest, DESIGN_ALIASES
from roikit._tables import read_table
from roikit.cli import main
from roikit.study import load_study, run_study
from roikit.study.schema import StudyError

ANALYSES = [
    # (study-file block, command-line options)
    ({"design": "one-sample", "contrast": "novel", "confidence": 0.9},
     ["--design", "one-sample", "--contrast", "novel", "--confidence", "0.9"]),
    ({"design": "two-group", "contrast": "novel", "group": "group", "levels": ["younger", "older"], "welch": True},
     ["--design", "two-group", "--contrast", "novel", "--group", "group", "--levels", "younger,older", "--welch"]),
    ({"design": "glm", "contrast": "novel", "formula": "value ~ age + group", "correct": "holm,fdr,bonferroni"},
     ["--design", "glm", "--contrast", "novel", "--formula", "value ~ age + group", "--correct",
      "holm,fdr,bonferroni"]),
    ({"design": "paired", "contrast": "novel", "versus": "familiar", "permutations": 200, "seed": 3},
     ["--design", "paired", "--contrast", "novel", "--versus", "familiar", "--permutations", "200", "--seed", "3"]),
]


def _toml_value(v):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return '"' + v + '"'
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return repr(v)


def _tsv(frame: pd.DataFrame) -> bytes:
    buffer = io.StringIO()
    frame.to_csv(buffer, sep="\t", index=False, na_rep="n/a", float_format="%.17g")
    return buffer.getvalue().encode()


def test_command_line_and_study_file_give_identical_results(study_dir, tmp_path):
    head = (study_dir / "study.toml").read_text().split("[[analysis]]")[0]
    blocks = "".join("[[analysis]]\n" + "".join(f"{k} = {_toml_value(v)}\n" for k, v in block.items()) + "\n"
                     for block, _ in ANALYSES)
    (study_dir / "study.toml").write_text(head + blocks)
    run = run_study(study_dir / "study.toml", out=tmp_path / "results", figures=False)
    from_study = read_table(tmp_path / "results" / "group_results.tsv")
    values = tmp_path / "results" / "region_values.tsv"
    for number, (_, argv) in enumerate(ANALYSES, start=1):
        out = tmp_path / f"cli-{number}.tsv"
        assert main(["stats", str(values), *argv, "--participants", str(study_dir / "participants.tsv"),
                     "--out", str(out)]) == 0
        cli_bytes = out.read_bytes()
        study_rows = from_study[from_study["analysis"] == number].drop(columns="analysis").dropna(axis=1, how="all")
        cli_rows = read_table(out).dropna(axis=1, how="all")
        assert set(cli_rows.columns) == set(study_rows.columns)
        # the same rows and columns, every number to 17 significant digits: identical bytes
        assert _tsv(cli_rows) == _tsv(study_rows[list(cli_rows.columns)].reset_index(drop=True)), argv
        assert cli_bytes.count(b"\n") == len(run.per_analysis[number - 1]) + 1


def test_two_sample_suggests_two_group_everywhere(study_dir, capsys):
    text = (study_dir / "study.toml").read_text().replace('design = "two-group"', 'design = "two-sample"')
    (study_dir / "study.toml").write_text(text)
    with pytest.raises(StudyError, match="did you mean 'two-group'"):
        load_study(study_dir / "study.toml")
    assert "did you mean 'two-group'" in suggest("two-sample", ["one-sample", "two-group"], DESIGN_ALIASES)
    assert main(["stats", "x.tsv", "--design", "two-sample", "--out", str(study_dir / "r.tsv")]) == 2
    assert "did you mean 'two-group'" in capsys.readouterr().err


def test_levels_optional_in_both_when_the_column_has_two(study_dir, tmp_path):
    text = (study_dir / "study.toml").read_text().replace('levels = ["younger", "older"]\n', "")
    (study_dir / "study.toml").write_text(text)
    study = load_study(study_dir / "study.toml")
    assert "levels" not in study.analyses[1].options


def test_options_are_spelled_for_the_entry_point():
    assert spell("overwrite", True) == "overwrite=True"
    assert spell("levels", example="L1,L2") == "levels='L1,L2'"
    assert spell("n_jobs", 2) == "n_jobs=2"
    with entry_point("cli"):
        assert spell("overwrite", True) == "--overwrite"
        assert spell("levels", example="L1,L2") == "--levels L1,L2"
        assert spell("n_jobs", 2) == "--jobs 2"
        assert spell("participants") == "--participants participants.tsv"
