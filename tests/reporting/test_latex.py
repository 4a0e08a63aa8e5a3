"""LaTeX tables compiled where users compile them: pdflatex, a minimal article that inputs tables/preamble.tex.

Needs pdflatex with the recommended LaTeX packages (Debian: texlive-latex-base texlive-latex-recommended). Without
it the tests fail with a clear message, unless ROIKIT_SKIP_LATEX=1 is set.
"""

from __future__ import annotations

import re
import subprocess
import warnings

import pytest

import _wide_study
from roikit.errors import CautionWarning
from roikit.reporting import write_report
from roikit.reporting.tables import Column, ReportTable, latex_preamble

pytestmark = pytest.mark.latex

_DOCUMENT = r"""\documentclass{article}
\input{preamble}
\begin{document}
Text before the table.

\input{%s}

Text after the table.
\end{document}
"""


def _pdflatex() -> str:
    return _wide_study.program("pdflatex", skip_env="ROIKIT_SKIP_LATEX",
                               install="texlive-latex-base texlive-latex-recommended")


def _compile(folder, stem: str) -> tuple[str, str]:
    """Compile ``folder/<stem>.tex`` in a minimal article; returns (log, pdftotext of the result)."""
    main = folder / f"doc-{stem}.tex"
    main.write_text(_DOCUMENT % stem, encoding="ascii")
    for _ in range(3):  # longtable settles its column widths over runs ("Rerun LaTeX")
        done = subprocess.run([_pdflatex(), "-interaction=nonstopmode", "-halt-on-error", main.name], cwd=folder,
                              capture_output=True, text=True, timeout=120)
        log = (folder / f"doc-{stem}.log").read_text(encoding="latin-1")
        assert done.returncode == 0, f"{stem}.tex does not compile:\n" + "\n".join(
            line for line in log.splitlines() if line.startswith("!") or "Error" in line)[:2000]
        if "Rerun LaTeX" not in log:
            break
    assert "Rerun LaTeX" not in log, f"{stem}.tex: column widths still changing after three runs"
    return log, folder / f"doc-{stem}.pdf"


def _overfull(log: str) -> list[float]:
    """Widths (pt) of every overfull box the log reports."""
    return [float(w) for w in re.findall(r"Overfull \\[hv]box \(([\d.]+)pt too (?:wide|high)", log)]


@pytest.fixture(scope="module")
def report_tables(tmp_path_factory):
    values, participants = _wide_study.study()
    out = tmp_path_factory.mktemp("latex") / "report"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CautionWarning)
        write_report(values, _wide_study.results(values, participants), participants=participants, out=out,
                     figures=False)
    return out / "tables"


def test_every_written_table_compiles_without_overfull_boxes(report_tables):
    texs = sorted(p for p in report_tables.glob("*.tex") if p.name != "preamble.tex")
    assert len(texs) >= 6  # five analyses and the descriptives
    preamble = (report_tables / "preamble.tex").read_text(encoding="ascii")
    assert r"\usepackage{booktabs}" in preamble
    problems = {}
    for tex in texs:
        tex.read_text(encoding="ascii")  # ASCII only: no input encoding or font encoding declarations needed
        log, _ = _compile(report_tables, tex.stem)
        widths = [w for w in _overfull(log) if w > 1.0]
        if widths:
            problems[tex.name] = widths
        assert "LaTeX Warning: Float too large" not in log, tex.name
    assert not problems, f"overfull boxes wider than 1 pt: {problems}"


def test_preamble_lists_exactly_the_packages_used(report_tables):
    preamble = (report_tables / "preamble.tex").read_text(encoding="ascii")
    packages = set(re.findall(r"\\usepackage\{([^}]+)\}", preamble))
    bodies = "".join(p.read_text(encoding="ascii") for p in report_tables.glob("*.tex") if p.name != "preamble.tex")
    used = {"booktabs"}
    used |= {"longtable"} if r"\begin{longtable}" in bodies else set()
    used |= {"pdflscape"} if r"\begin{landscape}" in bodies else set()
    used |= {"graphicx"} if r"\roikitfit" in bodies else set()
    assert packages == used


def _synthetic(rows: int, columns: int) -> ReportTable:
    """Region names, then columns like a results table's: every fourth an interval, the others numbers."""
    cols = [Column("region", "Region", "l")] + [Column(f"c{j}", f"*x*_{{{j}}}") for j in range(columns - 1)]
    cells = {f"c{j}": "[−0.50, −0.15]" if j % 4 == 3 else "−0.52" for j in range(columns - 1)}
    body = [{"region": f"right parahippocampal gyrus {i}", **cells} for i in range(rows)]
    return ReportTable(name=f"synthetic-{rows}x{columns}", title="Synthetic table, town1,town2,town3,town4,town5,"
                       "town6 ~ value", columns=cols, rows=body, note=["*SE* = *SD*/√*n*; José’s “note” ~ 5 % & #."],
                       number=1)


# (12, 30): too wide even for a landscape page at 8 pt: the float shrinks to the page (\roikitfit)
@pytest.mark.parametrize("rows,columns", [(5, 4), (10, 9), (12, 16), (150, 5), (80, 14), (12, 30)])
def test_wide_and_long_tables_fit(tmp_path, rows, columns):
    table = _synthetic(rows, columns)
    (tmp_path / "preamble.tex").write_text(latex_preamble([table]), encoding="ascii")
    (tmp_path / "t.tex").write_text(table.to_latex(), encoding="ascii")
    log, pdf = _compile(tmp_path, "t")
    assert [w for w in _overfull(log) if w > 1.0] == []
    text = subprocess.run(["pdftotext", "-layout", str(pdf), "-"], capture_output=True, text=True).stdout
    # every row is printed (a float taller than the page would lose rows)
    assert all(f"right parahippocampal gyrus {i}" in text for i in range(rows))
    if rows > 40:
        assert r"\begin{longtable}" in table.to_latex() and "(continued)" in text
    if columns > 12:
        assert r"\begin{landscape}" in table.to_latex()
    if columns < 5:
        assert r"\begin{landscape}" not in table.to_latex()
