"""`[study] table_format = "parquet"` / `roikit run --table-format parquet`: the data tables as Parquet files that read
back to what the TSV run wrote, and that `roikit report` and `roikit stats` take as they take the TSV files."""

from __future__ import annotations

import json
import warnings

import pytest

from roikit._tables import read_table, write_table
from roikit.cli import main
from roikit.errors import UsageError
from roikit.study import load_study, run_study
from roikit.study.schema import StudyError

TABLES = ("region_values", "group_results")


def _parquet_study(study_dir, value: str = "parquet"):
    text = (study_dir / "study.toml").read_text(encoding="utf-8")
    text = text.replace('participants = "participants.tsv"\n',
                        f'participants = "participants.tsv"\ntable_format = "{value}"\n', 1)
    path = study_dir / "parquet.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _quiet_run(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return run_study(*args, **kwargs)


def test_parquet_run_reads_back_to_the_tsv_run(study_dir, tmp_path):
    tsv = _quiet_run(study_dir / "study.toml", out=tmp_path / "tsv", figures=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the regions' overlap, announced by every load
        study = load_study(_parquet_study(study_dir))
    assert study.table_format == "parquet"
    pq = _quiet_run(study, out=tmp_path / "pq", figures=False)
    for name in TABLES:
        assert not (tmp_path / "pq" / f"{name}.tsv").exists()
        assert (tmp_path / "pq" / f"{name}.parquet").is_file() and f"{name}.parquet" in pq.outputs
        assert f"{name}.tsv" in tsv.outputs and f"{name}.parquet" not in tsv.outputs
        # the same JSON sidecar (the same columns described) beside the Parquet file
        side_pq = json.loads((tmp_path / "pq" / f"{name}.json").read_text(encoding="utf-8"))
        side_tsv = json.loads((tmp_path / "tsv" / f"{name}.json").read_text(encoding="utf-8"))
        assert {k: v for k, v in side_pq.items() if isinstance(v, dict) and "Description" in v} == \
            {k: v for k, v in side_tsv.items() if isinstance(v, dict) and "Description" in v}
        # read back and written as TSV: the very bytes the TSV run wrote
        back = read_table(tmp_path / "pq" / f"{name}.parquet")
        write_table(tmp_path / f"{name}-back.tsv", back)
        assert (tmp_path / f"{name}-back.tsv").read_bytes() == (tmp_path / "tsv" / f"{name}.tsv").read_bytes()
    # the report's own tables do not depend on the file format of the data tables
    for path in sorted((tmp_path / "tsv" / "tables").glob("*")):
        if path.suffix in (".tsv", ".md", ".tex", ".html"):
            assert (tmp_path / "pq" / "tables" / path.name).read_bytes() == path.read_bytes(), path.name
    assert "group_results.parquet, region_values.parquet" in pq.summary()
    assert "group_results.tsv, region_values.tsv" in tsv.summary()


def test_a_bad_table_format_is_refused_with_its_key_and_the_choices(study_dir):
    with pytest.raises(StudyError) as info, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        load_study(_parquet_study(study_dir, "csv"))
    message = str(info.value)
    assert "study.table_format" in message and "tsv, parquet" in message and "'csv'" in message
    with pytest.raises(UsageError, match="table_format.*tsv, parquet"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run_study(study_dir / "study.toml", out=study_dir / "r", table_format="xlsx", figures=False)
    assert not (study_dir / "r").exists()  # refused before any work


def test_command_line_parquet_outputs_feed_stats_and_report(study_dir, tmp_path, capsys):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for fmt in ("tsv", "parquet"):
            assert main(["run", str(study_dir / "study.toml"), "--out", str(tmp_path / fmt), "--no-figures",
                         "--quiet"] + (["--table-format", fmt] if fmt == "parquet" else [])) == 0
        ext = {"tsv": ".tsv", "parquet": ".parquet"}
        for fmt in ("tsv", "parquet"):
            values = tmp_path / fmt / f"region_values{ext[fmt]}"
            stats_out = tmp_path / f"one-sample{ext[fmt]}"
            assert main(["stats", str(values), "--design", "one-sample", "--contrast", "novel", "--seed", "7",
                         "--out", str(stats_out)]) == 0
            assert main(["report", "--values", str(values), "--results", str(stats_out), "--participants",
                         str(study_dir / "participants.tsv"), "--out", str(tmp_path / f"report-{fmt}"),
                         "--quiet"]) == 0
    write_table(tmp_path / "back.tsv", read_table(tmp_path / "one-sample.parquet"))
    assert (tmp_path / "back.tsv").read_bytes() == (tmp_path / "one-sample.tsv").read_bytes()
    for path in sorted((tmp_path / "report-tsv" / "tables").glob("*")):
        if path.suffix in (".tsv", ".md", ".tex", ".html"):
            assert (tmp_path / "report-parquet" / "tables" / path.name).read_bytes() == path.read_bytes(), path.name
    # a format roikit does not write: a usage error (exit 2) naming the choices
    with pytest.raises(SystemExit) as info:
        main(["run", str(study_dir / "study.toml"), "--table-format", "csv"])
    assert info.value.code == 2
    assert "--table-format" in capsys.readouterr().err
