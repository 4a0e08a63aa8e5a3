"""Word tables opened where users open them: converted to PDF by LibreOffice (headless), then measured.

Needs LibreOffice Writer (Debian: libreoffice-writer-nogui) and poppler-utils (pdfinfo, pdftotext). Without them the
tests fail with a clear message, unless ROIKIT_SKIP_OFFICE=1 is set.
"""

from __future__ import annotations

import re
import subprocess

import docx
import pytest
from docx.oxml.ns import qn

import _wide_study
from roikit.reporting.tables import Column, ReportTable, descriptives_table, results_tables, word_document

pytestmark = pytest.mark.office


def _tool(name: str) -> str:
    return _wide_study.program(name, skip_env="ROIKIT_SKIP_OFFICE",
                               install="libreoffice-writer-nogui poppler-utils")


@pytest.fixture(scope="module")
def converted(tmp_path_factory):
    """Every results table and the descriptives as .docx (one file each, and all in one), converted to PDF."""
    soffice, _, _ = _tool("soffice"), _tool("pdfinfo"), _tool("pdftotext")
    folder = tmp_path_factory.mktemp("word")
    values, participants = _wide_study.study()
    results = results_tables(_wide_study.results(values, participants))
    tables = [*results, descriptives_table(values, number=len(results) + 1), _long_table(values)]
    combined = word_document()
    paths = {}
    for t in tables:
        paths[t.name] = folder / f"{t.name}.docx"
        t.to_docx(paths[t.name])
        t.to_docx(document=combined)
    combined.save(folder / "all.docx")
    profile = (folder / "profile").as_uri()  # a private LibreOffice profile: no clash with a running instance
    done = subprocess.run([soffice, f"-env:UserInstallation={profile}", "--headless", "--convert-to", "pdf",
                           "--outdir", str(folder / "pdf"), *map(str, paths.values()), str(folder / "all.docx")],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    return {"folder": folder, "tables": tables, "results": results, "docx": paths}


def _long_table(values) -> ReportTable:
    """A plain 80-row table (region x contrast means), built here so its length does not depend on table content."""
    stats = values.groupby(["region", "contrast"], sort=False)["value"].agg(["count", "mean", "std"]).reset_index()
    rows = [{"region": r.region, "contrast": r.contrast, "n": str(r["count"]), "mean": f"{r['mean']:.2f}",
             "sd": f"{r['std']:.2f}"} for _, r in stats.iterrows()]
    columns = [Column("region", "Region", "l"), Column("contrast", "Contrast", "l"), Column("n", "*n*"),
               Column("mean", "*M*"), Column("sd", "*SD*")]
    return ReportTable(name="long", title="Region values", columns=columns, rows=rows, note=["Invented values."],
                       number=99)


def _pages(pdf) -> int:
    info = subprocess.run(["pdfinfo", str(pdf)], capture_output=True, text=True, check=True).stdout
    return int(re.search(r"^Pages:\s+(\d+)", info, re.M).group(1))


def _text(pdf) -> str:
    return subprocess.run(["pdftotext", "-layout", str(pdf), "-"], capture_output=True, text=True, check=True).stdout


def test_results_tables_fit_one_page_with_unbroken_region_names(converted):
    results = converted["results"]
    assert max(len(t.rows) for t in results) == 30 and min(len(t.rows) for t in results) == 10
    for t in results:
        pdf = converted["folder"] / "pdf" / f"{t.name}.pdf"
        # a 10-region table (and the 30-row glm table) on one page, title and note included
        assert _pages(pdf) == 1, t.name
        lines = _text(pdf).splitlines()
        for region in _wide_study.REGIONS:
            # the whole name on one line of the page: neither broken mid-word nor wrapped between its words
            pattern = re.compile(r"(^|\s)" + r" ".join(map(re.escape, region.split())) + r"(?=\s|$|[a-c,]+\s)")
            assert any(pattern.search(line) for line in lines), (t.name, region)
        # the last column is on the page (nothing cut at the right margin)
        last_header = re.sub(r"[*_{}^]", "", t.columns[-1].header).replace("\\", "")
        assert last_header.split()[0] in lines[[i for i, s in enumerate(lines) if "Region" in s][0]]


def test_long_table_repeats_its_header_and_keeps_rows_whole(converted):
    desc = converted["tables"][-1]
    assert len(desc.rows) == 80 and desc.name == "long"
    pdf = converted["folder"] / "pdf" / f"{desc.name}.pdf"
    pages = _pages(pdf)
    assert pages >= 2
    for page in range(1, pages + 1):
        text = subprocess.run(["pdftotext", "-layout", "-f", str(page), "-l", str(page), str(pdf), "-"],
                              capture_output=True, text=True, check=True).stdout
        assert re.search(r"Region\s+Contrast\s+n\s+M\s+SD", text), f"page {page} has no header row"
    xml = docx.Document(str(converted["docx"][desc.name])).tables[0]._tbl
    rows = xml.findall(qn("w:tr"))
    assert rows[0].find(qn("w:trPr")).find(qn("w:tblHeader")) is not None
    assert all(r.find(qn("w:trPr")).find(qn("w:cantSplit")) is not None for r in rows)


def test_page_setup_and_landscape_only_where_needed(converted):
    doc = docx.Document(str(converted["docx"][converted["tables"][0].name]))
    section = doc.sections[0]
    assert section.left_margin.cm == pytest.approx(2.5, abs=0.01)
    assert section.top_margin.cm == pytest.approx(2.5, abs=0.01)
    assert doc.styles["Normal"].font.size.pt == 10
    word = doc.tables[0]
    sizes = {r.font.size.pt for row in word.rows for c in row.cells for p in c.paragraphs for r in p.runs}
    assert sizes == {9.0}
    # the columns together fill the text block exactly and no column is narrower than its content
    text_width = (section.page_width - section.left_margin - section.right_margin)
    assert sum(c.width for c in word.columns) == pytest.approx(text_width, rel=0.002)
    # the combined file: each table in a section of its own orientation; the widest (glm) table in landscape
    pdf = converted["folder"] / "pdf" / "all.pdf"
    info = subprocess.run(["pdfinfo", "-f", "1", "-l", str(_pages(pdf)), str(pdf)], capture_output=True,
                          text=True, check=True).stdout
    sizes = re.findall(r"Page\s+\d+ size:\s+([\d.]+) x ([\d.]+)", info)
    landscape = [float(w) > float(h) for w, h in sizes]
    assert any(landscape) and not all(landscape)
    combined_sections = docx.Document(str(converted["folder"] / "all.docx")).sections
    assert any(s.page_width > s.page_height for s in combined_sections)
