"""write_report and `roikit report`: outputs, overwrite refusal, and every HTML table number checked."""

import json
import os
import warnings
from html.parser import HTMLParser

import pandas as pd
import pytest
from pathlib import Path

from roikit._tables import sha256_file, write_table
from roikit.cli import main
from roikit.errors import CautionWarning, OutputExistsError
from roikit.reporting import write_report
from roikit.reporting.format import format_df, format_number
from roikit.reporting.tables import cell_formatters


class _Tables(HTMLParser):
    """Collect every <table>: rows of (tr attributes, [(td data-column, text)])."""

    def __init__(self):
        super().__init__()
        self.tables, self.images, self.external = [], [], []
        self._cell = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        for key in ("src", "href"):
            value = attrs.get(key) or ""
            if value and not value.startswith(("data:", "#")):
                self.external.append(value)
        if tag == "table":
            self.tables.append({"class": attrs.get("class"), "head": [], "rows": []})
        elif tag == "tr":
            self.tables[-1]["rows"].append((attrs, []))
        elif tag in ("td", "th"):
            self._cell = [tag, attrs.get("data-column"), ""]
        elif tag == "img":
            self.images.append(attrs)
        elif tag in ("script", "link", "iframe"):
            self.external.append(tag)

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            kind, column, text = self._cell
            target = self.tables[-1]["head"] if kind == "th" else self.tables[-1]["rows"][-1][1]
            target.append((column, text.strip()))
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell[2] += data


def _parse(path):
    parser = _Tables()
    parser.feed(path.read_text(encoding="utf-8"))
    return parser


@pytest.fixture(scope="module")
def full_report(tmp_path_factory, values, results, participants):
    _RESULTS[:] = [results]
    out = tmp_path_factory.mktemp("full") / "report"
    with pytest.warns(CautionWarning, match="caution"):
        written = write_report(values, results, participants=participants, out=out, figures=False)
    return out, written


def test_outputs_written(full_report):
    out, written = full_report
    for name in ("methods.md", "report.html", "provenance.json"):
        assert (out / name).is_file()
    assert (out / "tables" / "descriptives.docx").is_file()
    assert (out / "tables" / "all_tables.docx").is_file()
    assert len(list((out / "tables").glob("a*-*.tex"))) == 8
    prov = json.loads((out / "provenance.json").read_text())
    assert prov["versions"]["numpy"]
    assert prov["values_provenance"]["statistic"] == "mean"
    assert {o["path"]: o["sha256"] for o in prov["outputs"]}["report.html"] == sha256_file(out / "report.html")
    md = (out / "methods.md").read_text()
    # methods.md is the pasteable methods section: no caution block, no research-use statement, references at the end
    assert "## Cautions" not in md and "clinical decisions" not in md and "## References" in md
    assert "Holm, S. (1979)" in md and "roikit developers. (2026)" in md
    assert "<sub>" not in md and "\\_" not in md and "[T." not in md and "~" not in md
    assert "## Cautions" in (out / "results.md").read_text()
    assert "clinical decisions about an individual patient" in (out / "report.html").read_text()
    bib = (out / "references.bib").read_text()
    assert "@article{holm1979" in bib and "@software{roikit" in bib
    for name in ("methods.docx", "results.docx"):
        assert (out / name).stat().st_size > 1000
    index = pd.read_csv(out / "index.tsv", sep="\t")
    written_files = {os.fspath(p.relative_to(out)) for p in out.rglob("*") if p.is_file()}
    # every written file is listed, nothing else; the folder's manifest is roikit's own record of them (_outputs)
    assert set(index["path"]) == written_files - {".roikit-manifest.json"}
    assert index["caption"].notna().all() and index["kind"].notna().all()
    assert max(len(Path(p).name) for p in written_files) <= 40


def test_every_number_in_the_html_tables_equals_the_results(full_report, results):
    out, _ = full_report
    parsed = _parse(out / "report.html")
    fmt = cell_formatters()
    checked = 0
    result_tables = [t for t in parsed.tables if any(a.get("data-statistic-type") for a, _ in t["rows"])]
    assert len(result_tables) == 8
    for table in result_tables:
        for attrs, cells in table["rows"]:
            if not cells:  # the header row
                continue
            match = results[(results.design == attrs["data-design"]) & (results.region == attrs["data-region"])
                            & (results.term == attrs["data-term"])
                            & (results.statistic_type == attrs["data-statistic-type"])]
            if attrs.get("data-contrast"):
                match = match[match.contrast == attrs["data-contrast"]]
            assert len(match) == 1, attrs
            row = match.iloc[0]
            for column, text in cells:
                text = text.replace("−", "-")
                if column == "region":
                    assert text.startswith(row["region"])
                elif column == "term":  # a human label: no formula syntax
                    assert text and "[T." not in text and "_" not in text
                else:
                    assert column in fmt, f"unvalidated column {column}"
                    assert text == fmt[column](row), (attrs, column)
                    checked += 1
    # every numeric cell of the 33 result rows was compared
    assert checked > 33 * 6


def test_descriptives_in_the_html_equal_pandas(full_report, values, participants):
    out, _ = full_report
    parsed = _parse(out / "report.html")
    desc = [t for t in parsed.tables if t["head"] and t["head"][0] == ("region", "Region")
            and any(c == "coverage" for c, _ in t["head"])][0]
    merged = values.merge(participants, on="participant_id")
    # wide layout: one row per region, one column per analysed contrast x group, cells "M (SD)"
    assert len([r for r in desc["rows"] if r[1]]) == merged["region"].nunique()
    checked = 0
    for attrs, cells in desc["rows"]:
        if not cells:
            continue
        for column, text in cells:
            if "|" not in column:
                continue
            contrast, group = column.split("|")
            part = merged[(merged.region == attrs["data-region"]) & (merged.contrast == contrast)
                          & (merged.group == group)]
            x = part.value.dropna()
            # independent computation with pandas (mean, std with ddof=1)
            expected = f"{format_number(x.mean())} ({format_number(x.std(ddof=1))})"
            assert text.replace("−", "-") in (expected, f"{expected}, {format_df(len(x))}"), (attrs, column)
            checked += 1
    results = _RESULTS[0]
    analysed = {c for column in ("contrast", "versus") for v in results[column].dropna() for c in str(v).split(",")}
    assert analysed and analysed < set(merged.contrast)  # only the analysed contrasts are described
    assert checked == merged[merged.contrast.isin(analysed)].groupby(["region", "contrast", "group"]).ngroups


_RESULTS: list = []  # the results table of the full report (set by the fixture)


def test_html_is_self_contained(full_report):
    out, _ = full_report
    parsed = _parse(out / "report.html")
    assert parsed.external == []
    html = (out / "report.html").read_text()
    assert "@media print" in html
    assert "does not generalise to the population" in html
    assert "Circular region definition" in html and "Kriegeskorte" in html


def test_rewrites_its_own_report_but_refuses_a_foreign_folder(values, results, tmp_path):
    out = tmp_path / "report"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CautionWarning)
        write_report(values, results, out=out, figures=False)
        (out / "tables" / "my_notes.txt").write_text("mine")
        again = write_report(values, results, out=out, figures=False)  # its own report: replaced, no consent
    assert (out / "tables" / "my_notes.txt").read_text() == "mine"
    assert again["html"] == out / "report.html" and all(p.parent == out / "tables" for p in again["tables"])
    assert not [n for n in os.listdir(out) if n.startswith(".roikit-staging")]
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "report.html").write_text("my own page")
    with pytest.raises(OutputExistsError, match=r"holds files roikit did not write \(report.html\); pass "
                                                r"overwrite=True"):
        write_report(values, results, out=foreign, figures=False)
    assert (foreign / "report.html").read_text() == "my own page"


def test_report_with_figures(tmp_path, values, results_by_design, participants):
    results = pd.concat([results_by_design[d] for d in ("paired", "glm")], ignore_index=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CautionWarning)
        written = write_report(values, results, participants=participants, out=tmp_path / "r",
                               figure_formats=("png",))
    names = sorted(p.name for p in written["figures"])
    # short, stable names: analysis number, design, kind (and term when an analysis has several)
    assert names == ["a1-paired_forest.png", "a1-paired_participants.png", "a2-glm_covariate-age.png",
                     "a2-glm_forest-age.png"]
    parsed = _parse(written["html"])
    assert len(parsed.images) == 4
    assert all(img["src"].startswith("data:image/png;base64,") and img["alt"] for img in parsed.images)


@pytest.mark.filterwarnings("ignore::roikit.errors.CautionWarning")
def test_cli_report(tmp_path, values, results_by_design, participants, capsys):
    values_path = tmp_path / "region_values.tsv"
    write_table(values_path, values, sidecar={"columns": {}, "provenance": values.attrs["roikit"]})
    results_path = tmp_path / "group_results.tsv"
    write_table(results_path, results_by_design["one-sample"])
    participants_path = tmp_path / "participants.tsv"
    write_table(participants_path, participants)
    out = tmp_path / "report"
    args = ["report", "--values", str(values_path), "--results", str(results_path), "--participants",
            str(participants_path), "--out", str(out), "--circular", "left hippocampus"]
    assert main(args) == 0
    assert "wrote" in capsys.readouterr().out
    prov = json.loads((out / "provenance.json").read_text())
    assert [i["role"] for i in prov["inputs"]][:3] == ["values", "results", "participants"]
    assert prov["inputs"][0]["sha256"] == sha256_file(values_path)
    html = (out / "report.html").read_text()
    assert "retrosplenial cortex and left hippocampus were defined from the same data" in html
    # the TSV round trip keeps the numbers: same table cells as from the DataFrame
    assert "5.47" in html
    # its own earlier report is replaced without --overwrite; a folder it did not write needs it (exit 1)
    assert main(args) == 0
    (tmp_path / "elsewhere").mkdir()
    (tmp_path / "elsewhere" / "notes.md").write_text("mine")
    other = args[:-4] + ["--out", str(tmp_path / "elsewhere")] + args[-2:]
    capsys.readouterr()  # the successful rerun's warning lines
    assert main(other) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "pass --overwrite" in err
    assert main(other + ["--overwrite"]) == 0
    assert (tmp_path / "elsewhere" / "notes.md").read_text() == "mine"
    assert main(["report", "--values", str(tmp_path / "nope.tsv"), "--results", str(results_path), "--out",
                 str(tmp_path / "other")]) == 1


def test_stimulus_figure_shows_only_the_contrasts_of_the_mixed_model(tmp_path, values, results, participants,
                                                                     monkeypatch):
    # the values table also holds contrasts outside the model; the per-stimulus figure must not show them
    import roikit.reporting.report as report_module

    mixed = results[results["design"] == "mixed"].copy()
    mixed["contrast"] = "town1,town2"
    towns = values[values["contrast"] == "novel"].copy()
    extra = []
    for k, town in enumerate(("town1", "town2", "town3")):
        extra.append(towns.assign(contrast=town, value=towns["value"] + 0.1 * k))
    both = pd.concat([values, *extra], ignore_index=True)
    seen = []
    real = report_module.participant_pages

    def spy(data, **kwargs):
        if kwargs.get("stimulus"):
            seen.append(sorted(set(data["contrast"])))
        return real(data, **kwargs)

    monkeypatch.setattr(report_module, "participant_pages", spy)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # n_jobs=1: the spy records in this process
        write_report(both, mixed, participants=participants, out=tmp_path / "r", figure_formats=("png",), n_jobs=1)
    assert seen == [["town1", "town2"]]


def test_a_per_run_values_table_is_described_per_participant(tmp_path, values, results, participants):
    """Values with run_id (maps with runs) are averaged over runs before the report describes or draws them, as the
    analyses average them: descriptives equal those of the per-participant table, not of the runs pooled."""
    import numpy as np

    rng = np.random.default_rng(11)
    shift = rng.normal(0, 0.5, len(values))  # run 1 = value + shift, run 2 = value - shift: their mean is value
    runs = pd.concat([values.assign(run_id="run-1", value=values["value"] + shift),
                      values.assign(run_id="run-2", value=values["value"] - shift)], ignore_index=True)
    per_run = write_report(runs, results, participants=participants, out=tmp_path / "runs", figures=False)
    write_report(values, results, participants=participants, out=tmp_path / "plain", figures=False)
    got = pd.read_csv(tmp_path / "runs" / "tables" / "descriptives.tsv", sep="\t")
    expected = pd.read_csv(tmp_path / "plain" / "tables" / "descriptives.tsv", sep="\t")
    pd.testing.assert_frame_equal(got, expected)
    pooled_sd = runs.groupby("region")["value"].std().iloc[0]
    assert per_run["html"].is_file() and pooled_sd > values.groupby("region")["value"].std().iloc[0]
