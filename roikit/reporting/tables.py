"""Paper-ready tables: group results and descriptives as Markdown, LaTeX (booktabs), HTML, Word and TSV.

A :class:`ReportTable` holds formatted cells (APA conventions, see :mod:`roikit.reporting.format`) and renders
them in every format, so the numbers are identical everywhere. Rows keep their identity (design, region,
term) so tests and readers can trace every cell back to the results table.

Examples
--------
>>> tables = results_tables(results)                       # doctest: +SKIP
>>> print(tables[0].to_markdown())                         # doctest: +SKIP
>>> tables[0].to_docx("table1.docx")                       # doctest: +SKIP
"""

from __future__ import annotations

import html as _html
import io
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np
import pandas as pd

from .._tables import atomic_write_bytes, check_output
from ..errors import UsageError
from ._common import (
    Labels,
    family_size,
    is_intercept,
    primary_correction,
    term_label,
    REQUIRED_RESULTS,
    REQUIRED_VALUES,
    analysis_title,
    check_columns,
    col,
    flag,
    group_of,
    has_values,
    ids,
    number,
    ordered_unique,
    slug,
    split_analyses,
    text,
)
from .format import (
    BOUNDED_EFFECTS,
    MISSING,
    corrected_p_symbol,
    correction_name,
    effect_symbol,
    escape_markup,
    estimate_symbol,
    format_ci,
    estimate_decimals,
    format_confidence,
    format_df,
    format_number,
    format_p,
    format_percent,
    render,
    statistic_symbol,
)
from .html import break_points as _html_breaks

__all__ = [
    "Column",
    "ReportTable",
    "results_tables",
    "results_table",
    "descriptives",
    "descriptives_table",
    "cell_formatters",
    "latex_preamble",
    "write_latex_preamble",
    "word_document",
    "estimate_decimals",
    "CORRECTION_TEXT",
    "DF_METHOD_TEXT",
]

#: How each df method is described in notes and methods text.
DF_METHOD_TEXT = {
    "student": "Student *t* distribution",
    "welch": "Welch–Satterthwaite degrees of freedom (fractional)",
    "residual": "residual degrees of freedom of the ordinary least squares model",
    "knapp-hartung": "Knapp–Hartung adjusted standard errors and *t* distribution",
    "z": "standard normal reference distribution",
    "satterthwaite": "Satterthwaite degrees of freedom (fractional)",
}

#: How each correction method is named (with its source) in notes and methods text.
CORRECTION_TEXT = {
    "holm": "Holm (1979) step-down family-wise error correction",
    "fdr": "Benjamini–Hochberg (1995) false discovery rate adjustment",
    "fwe": "permutation family-wise error correction (maximum statistic across regions)",
    "bonferroni": "Bonferroni correction",
}

_EFFECT_TEXT = {
    "d": "*d* = *M* / *SD* (Cohen's *d* for one sample)",
    "d_z": "*d*_{z} = mean of the within-participant differences / their *SD*",
    "g": "*g* = Hedges' *g* with the exact small-sample correction (Hedges, 1981)",
    "partial_eta2": "*η*^{2}_{p} = partial eta squared",
    "d_total": "*d*_{total} = estimate divided by the square root of (*τ*^{2} + typical first-level variance), the "
               "estimate in units of the "
               "model-implied SD of one participant's value (no CI)",
    "d_wkj": "*d*_{WKJ} = estimate divided by the square root of the summed variance components of the mixed model "
             "(Westfall, Kenny & Judd, 2014; no CI)",
}

_FLAG_TEXT = {
    "outlier": "Values flagged as outliers (modified *z* > 3.5; Iglewicz & Hoaglin, 1993) were kept in the test",
    "coverage": "Participants with valid data in fewer than half of the region's voxels (kept in the test)",
    "converged": "The model fit did not converge; treat this result as unreliable",
    "boundary": "A variance component was estimated at the boundary (zero)",
    "excluded": "Participants left out of this test because of missing values",
}


@dataclass
class Column:
    """One table column: ``key`` identifies it (a results column or a derived one), ``header`` is markup."""

    key: str
    header: str
    align: str = "r"


@dataclass
class ReportTable:
    """A formatted table ready to render.

    Attributes
    ----------
    name : str
        File stem (``results_one-sample-novel``).
    title : str
        Title in markup (APA: italic title under the bold table number).
    columns : list of Column
    rows : list of dict
        ``key -> cell markup``.
    row_ids : list of dict
        Identity of each row (``design``, ``region``, ``term``, ...), kept for tracing.
    note : list of str
        Sentences of the table note (markup).
    number : int, optional
        Table number used in captions.
    """

    name: str
    title: str
    columns: list[Column]
    rows: list[dict[str, str]]
    row_ids: list[dict[str, str]] = field(default_factory=list)
    note: list[str] = field(default_factory=list)
    number: int | None = None

    # ------------------------------------------------------------------ plain
    def headers(self, style: str = "plain") -> list[str]:
        return [render(c.header, style) for c in self.columns]

    def cells_markup(self) -> list[list[str]]:
        """The cells as markup, one list per row in column order."""
        return [[row.get(c.key, MISSING) for c in self.columns] for row in self.rows]

    def cells(self, style: str = "plain") -> list[list[str]]:
        return [[render(row.get(c.key, MISSING), style) for c in self.columns] for row in self.rows]

    def note_text(self, style: str = "plain") -> str:
        if not self.note:
            return ""
        return render("*Note.* ", style) + " ".join(render(s, style) for s in self.note)

    def caption(self, style: str = "plain") -> str:
        label = f"Table {self.number}" if self.number else "Table"
        return f"{label}. {render(self.title, style)}"

    def to_frame(self) -> pd.DataFrame:
        """The formatted cells as strings; columns are the plain headers (made unique with the key)."""
        headers = self.headers("plain")
        seen: dict[str, int] = {}
        names = []
        for h, c in zip(headers, self.columns):
            names.append(h if h not in seen else f"{h} ({c.key})")
            seen[h] = 1
        return pd.DataFrame(self.cells("plain"), columns=names)

    def to_tsv(self) -> str:
        """Tab-separated formatted table (plain symbols), one header line, then the note as a comment line."""
        lines = ["\t".join(self.headers("plain"))]
        lines += ["\t".join(r) for r in self.cells("plain")]
        return "\n".join(lines) + "\n"

    # ------------------------------------------------------------------ markdown
    def to_markdown(self) -> str:
        """A GitHub/pandoc pipe table with the caption above and the note below."""
        align = {"l": ":--", "r": "--:", "c": ":-:"}
        lines = [f"**{self.caption('markdown').split('. ', 1)[0]}.** {render(self.title, 'markdown')}", ""]
        lines.append("| " + " | ".join(self.headers("markdown")) + " |")
        lines.append("|" + "|".join(align[c.align] for c in self.columns) + "|")
        for r in self.cells("markdown"):
            lines.append("| " + " | ".join(r) + " |")
        if self.note:
            lines += ["", self.note_text("markdown")]
        return "\n".join(lines) + "\n"

    # ------------------------------------------------------------------ latex
    def to_latex(self) -> str:
        """A LaTeX table that fits an article's text block; needs the packages in ``tables/preamble.tex``.

        Sized with Computer Modern metrics for a 10 pt ``article`` (text block 345 x 550 pt): ``\\small`` with
        normal, then narrower column gaps, then ``\\footnotesize``; a table still too wide goes onto a landscape page
        (``pdflscape``), at ``\\scriptsize`` (7 pt) as the last step. A short table is a ``table`` float whose
        tabular shrinks to ``\\linewidth`` only if it is still wider (``\\roikitfit``, defined in the preamble);
        a long one is a ``longtable`` that continues across pages with its header repeated. Only ASCII is written
        (see :func:`latex_preamble`).
        """
        plan = _latex_layout(self)
        spec = "".join(c.align for c in self.columns)
        label = f"tab:{slug(self.name)}"
        head = " & ".join(self.headers("latex")) + r" \\"
        body = [" & ".join(r) + r" \\" for r in self.cells("latex")]
        title = _latex_breaks(render(self.title, "latex"))
        note = _latex_breaks(self.note_text("latex")) if self.note else ""
        number = f"Table {self.number}" if self.number else "Table"
        lines = [f"% {number}: needs \\input{{preamble}} (roikit tables/preamble.tex) in the document's preamble"]
        if plan["landscape"]:
            lines.append(r"\begin{landscape}")
        sizing = [plan["size"], rf"\setlength{{\tabcolsep}}{{{plan['tabcolsep']}pt}}"]
        if plan["long"]:
            n = len(self.columns)
            lines += ["{" + sizing[0], sizing[1], r"\setlength{\LTcapwidth}{\linewidth}",
                      rf"\begin{{longtable}}{{{spec}}}",
                      rf"\caption{{{title}}}\label{{{label}}} \\",
                      r"\toprule", head, r"\midrule", r"\endfirsthead",
                      rf"\multicolumn{{{n}}}{{l}}{{\textit{{Table \thetable\ (continued)}}}} \\",
                      r"\toprule", head, r"\midrule", r"\endhead",
                      r"\midrule", rf"\multicolumn{{{n}}}{{r}}{{\textit{{(continued)}}}} \\", r"\endfoot",
                      r"\bottomrule", r"\endlastfoot"]
            lines += body
            lines.append(r"\end{longtable}")
            if note:
                lines.append(r"\par\noindent{\footnotesize\raggedright " + note + r"\par}")
            lines.append("}")
        else:
            lines += [r"\begin{table}[htbp]", r"\centering", *sizing,
                      rf"\caption{{{title}}}", rf"\label{{{label}}}",
                      r"\roikitfit{%", rf"\begin{{tabular}}{{{spec}}}", r"\toprule", head, r"\midrule"]
            lines += body
            lines += [r"\bottomrule", r"\end{tabular}}"]
            if note:
                lines.append(r"\par\smallskip")
                lines.append(r"\begin{minipage}{\linewidth}\footnotesize\raggedright " + note + r"\end{minipage}")
            lines.append(r"\end{table}")
        if plan["landscape"]:
            lines.append(r"\end{landscape}")
        return "\n".join(lines) + "\n"

    # ------------------------------------------------------------------ html
    def to_html(self, *, table_id: str | None = None) -> str:
        """An HTML ``<table>`` (class ``apa``) whose cells carry ``data-column`` and rows ``data-*`` identities.

        The table sits in its own horizontal scroll frame (``div.table-scroll``, keyboard-focusable), so a wide
        table never widens the page; the report's styles draw a shadow at a clipped edge and a "scroll" hint.
        Captions and notes get break points after commas between words (``town1,<wbr>town2``).
        """
        esc = _html.escape
        tid = esc(table_id or slug(self.name), quote=True)
        # a long table may break across printed pages (between rows, header repeated); a short one never does
        kind = "table long" if len(self.rows) > _HTML_LONG_ROWS else "table"
        out = [f'<figure class="{kind}" id="{tid}">']
        label = f"Table {self.number}" if self.number else "Table"
        out.append(f'<figcaption><span class="table-number">{label}</span><br><span class="table-title">'
                   f"{_html_breaks(render(self.title, 'html'))}</span></figcaption>")
        # the hint's text comes from the report's CSS, so a table pasted elsewhere shows none
        out.append('<p class="scroll-hint" aria-hidden="true"></p>')
        out.append(f'<div class="table-scroll" tabindex="0" role="region" aria-label="{esc(label)}, scrolls '
                   'sideways">')
        # printed, the stub (first) column stays on one line while its labels are short; other text columns wrap
        cells = self.cells("html")
        stub = self.columns[0] if self.columns else None
        whole = stub is not None and stub.align == "l" and max(
            (len(render(row.get(stub.key, MISSING), "plain")) for row in self.rows), default=0) <= _HTML_STUB_CHARS
        out.append('<table class="apa whole-stub">' if whole else '<table class="apa">')
        out.append("<thead><tr>" + "".join(
            f'<th data-column="{esc(c.key, quote=True)}" class="{c.align}">{h}</th>'
            for c, h in zip(self.columns, self.headers("html"))) + "</tr></thead>")
        out.append("<tbody>")
        for rid, cells in zip(self.row_ids or [{}] * len(self.rows), cells):
            attrs = "".join(f' data-{esc(k)}="{esc(str(v), quote=True)}"' for k, v in rid.items())
            out.append(f"<tr{attrs}>" + "".join(
                f'<td data-column="{esc(c.key, quote=True)}" class="{c.align}">{v}</td>'
                for c, v in zip(self.columns, cells)) + "</tr>")
        out.append("</tbody></table></div>")
        if self.note:
            out.append(f'<p class="table-note">{_html_breaks(self.note_text("html"))}</p>')
        out.append("</figure>")
        return "\n".join(out) + "\n"

    # ------------------------------------------------------------------ word
    def to_docx(self, path: os.PathLike | str | None = None, *, document=None, overwrite: bool = False):
        """Add the table to a python-docx ``Document`` (a new one if none) in APA layout; save to ``path``.

        APA layout: the bold table number, the italic title on the next line, horizontal rules only (above and
        below the header, below the last row), the note below. Column widths come from the text they hold (Times
        metrics, 9 pt): numbers and region names are never broken; a table too wide for a portrait page goes into
        a landscape section of its own. The header row repeats on every page and no row splits across pages.
        A new document gets 2.5 cm margins and 10 pt Times New Roman (see :func:`word_document`).

        Returns the Document.
        """
        from docx.enum.table import WD_TABLE_ALIGNMENT
        from docx.enum.text import WD_ALIGN_PARAGRAPH
        from docx.shared import Pt

        from .format import _latex_number, _parse

        if path is not None:
            check_output(path, overwrite=overwrite)
        doc = document if document is not None else word_document()
        layout = _word_layout(self, doc)
        _word_orientation(doc, landscape=layout["landscape"])
        size = layout["size"]

        def add_runs(paragraph, markup: str, *, size: float | None = None, bold: bool = False):
            for content, kind in _parse(markup):
                run = paragraph.add_run(_latex_number(content))
                run.italic = kind == "i"
                run.bold = bold
                run.font.subscript = kind == "sub"
                run.font.superscript = kind == "sup"
                if size:
                    run.font.size = Pt(size)

        def tight(paragraph, keep: bool):
            fmt = paragraph.paragraph_format
            fmt.space_before = Pt(0)
            fmt.space_after = Pt(0)
            fmt.line_spacing = 1.0
            fmt.keep_with_next = keep

        label = f"Table {self.number}" if self.number else "Table"
        p = doc.add_paragraph()
        add_runs(p, label, bold=True)
        p.paragraph_format.keep_with_next = True
        p.paragraph_format.space_after = Pt(2)
        p = doc.add_paragraph()
        add_runs(p, "*" + self.title.replace("*", "") + "*")
        p.paragraph_format.keep_with_next = True
        p.paragraph_format.space_after = Pt(6)
        table = doc.add_table(rows=1 + len(self.rows), cols=len(self.columns))
        table.alignment = WD_TABLE_ALIGNMENT.CENTER
        table.autofit = False
        _word_widths(table, layout["widths"])
        word_rows = list(table.rows)  # cells fetched once per row (table.cell(i, j) is slow)
        # short tables stay on one page with their title and note (every row kept with the next one)
        keep_all = len(self.rows) <= _WORD_KEEP_ROWS
        for cell, c in zip(word_rows[0].cells, self.columns):
            par = cell.paragraphs[0]
            par.alignment = WD_ALIGN_PARAGRAPH.LEFT if c.align == "l" else WD_ALIGN_PARAGRAPH.CENTER
            tight(par, True)
            add_runs(par, c.header, size=size)
        for i, (word_row, row) in enumerate(zip(word_rows[1:], self.rows)):
            last = i == len(self.rows) - 1
            for cell, c in zip(word_row.cells, self.columns):
                par = cell.paragraphs[0]
                par.alignment = WD_ALIGN_PARAGRAPH.LEFT if c.align == "l" else WD_ALIGN_PARAGRAPH.RIGHT
                if c.align != "l":  # right-aligned numbers, centred as a block under the header
                    par.paragraph_format.right_indent = Pt(layout["spare"] / 2)
                # the last row stays with the note below; a long table may break between the other rows
                tight(par, keep_all or last)
                add_runs(par, row.get(c.key, MISSING), size=size)
        _word_rows(table)
        _apa_borders(table)
        if self.note:
            p = doc.add_paragraph()
            p.paragraph_format.space_before = Pt(4)
            add_runs(p, "*Note.* " + " ".join(self.note), size=size)
        if path is not None:
            buf = io.BytesIO()
            doc.save(buf)
            atomic_write_bytes(path, buf.getvalue(), overwrite=overwrite)
        return doc

    def write(self, directory: os.PathLike | str, *, formats: Sequence[str] = ("md", "tex", "html", "docx", "tsv"),
              overwrite: bool = False) -> list[Path]:
        """Write the table as ``directory/<name>.<ext>`` for each format; returns the paths."""
        directory = Path(directory)
        paths = []
        for ext in formats:
            path = directory / f"{self.name}.{ext}"
            if ext == "docx":
                self.to_docx(path, overwrite=overwrite)
            else:
                body = {"md": self.to_markdown, "tex": self.to_latex, "html": self.to_html, "tsv": self.to_tsv}
                if ext not in body:
                    raise UsageError(f"table format must be one of md, tex, html, docx, tsv; got {ext!r}")
                atomic_write_bytes(path, body[ext]().encode("utf-8"), overwrite=overwrite)
            paths.append(path)
        return paths


def _apa_borders(table) -> None:
    """Horizontal rules only (top, below the header, bottom), as in APA tables."""
    from docx.oxml import OxmlElement
    from docx.oxml.ns import qn

    def set_border(cell, edge: str, size: int):
        tc_pr = cell._tc.get_or_add_tcPr()
        borders = tc_pr.find(qn("w:tcBorders"))
        if borders is None:
            borders = OxmlElement("w:tcBorders")
            tc_pr.append(borders)
        element = OxmlElement(f"w:{edge}")
        element.set(qn("w:val"), "single")
        element.set(qn("w:sz"), str(size))
        element.set(qn("w:color"), "000000")
        borders.append(element)

    rows = table.rows
    for cell in rows[0].cells:
        set_border(cell, "top", 8)
        set_border(cell, "bottom", 4)
    for cell in rows[-1].cells:
        set_border(cell, "bottom", 8)


# ---------------------------------------------------------------------------------------------- word layout
_HTML_LONG_ROWS = 40  # rows of a printed table that may not fit one A4/Letter page (7.5 pt rows, with its note)
# longest stub label (characters) kept on one printed line: at 7.5 pt DejaVu Serif (~5.6 CSS px a character) 36
# characters take ~200 of the 680 px of an A4 text block, leaving room for a 12-column results table (common
# practice, no source); a longer label wraps at its spaces like the other text columns
_HTML_STUB_CHARS = 36
_WORD_MARGIN_CM = 2.5
_WORD_BODY_PT = 10.0
_WORD_TABLE_PT = (9.0, 8.0)
_WORD_CELL_MARGIN_PT = 2.85  # 0.1 cm left and right of each cell (Word's default is 0.19 cm)
_WORD_CELL_PAD_PT = 2 * _WORD_CELL_MARGIN_PT + 1.5  # both margins plus a little air against rounding
_WORD_KEEP_ROWS = 40


def word_document():
    """A new python-docx Document set up for tables: 2.5 cm margins, Times New Roman 10 pt body text.

    The page size is the template's (US Letter, as APA style asks); pass this to ``ReportTable.to_docx`` to
    collect several tables in one file.
    """
    import docx
    from docx.shared import Cm, Pt

    doc = docx.Document()
    for section in doc.sections:
        section.left_margin = section.right_margin = Cm(_WORD_MARGIN_CM)
        section.top_margin = section.bottom_margin = Cm(_WORD_MARGIN_CM)
    normal = doc.styles["Normal"]
    normal.font.name = "Times New Roman"
    normal.font.size = Pt(_WORD_BODY_PT)
    return doc


def _word_layout(table: "ReportTable", doc) -> dict:
    """Column widths (points), font size and orientation for a Word table.

    Each column's natural width is its widest cell (header or body, Times metrics) plus the cell padding. Tried in
    order, the first that fits the text width wins: portrait at 9 pt; portrait with headers and text columns
    other than the first wrapped at spaces; the same two in landscape; landscape at 8 pt; last, every column
    scaled to the landscape width. Numeric cells and the first (region) column never wrap while any step fits.
    Spare width is shared equally so the table spans the text block.
    """
    from . import _measure

    section = doc.sections[-1]
    short, long = sorted((section.page_width, section.page_height))
    portrait = (short - section.left_margin - section.right_margin) / 12700  # EMU -> points
    landscape = (long - section.left_margin - section.right_margin) / 12700
    cells = table.cells_markup()

    def measure(size: float, wrap: bool) -> list[float]:
        out = []
        for j, c in enumerate(table.columns):
            body = [row[j] for row in cells]
            head = _measure.longest_word(c.header, size) if wrap else _measure.width(c.header, size)
            if wrap and c.align == "l" and j > 0:
                widest = max((_measure.longest_word(b, size) for b in body), default=0.0)
            else:
                widest = max((_measure.width(b, size) for b in body), default=0.0)
            out.append(max(head, widest) + _WORD_CELL_PAD_PT)
        return out

    attempts = [(False, _WORD_TABLE_PT[0], False), (False, _WORD_TABLE_PT[0], True),
                (True, _WORD_TABLE_PT[0], False), (True, _WORD_TABLE_PT[0], True),
                (True, _WORD_TABLE_PT[1], False), (True, _WORD_TABLE_PT[1], True)]
    for land, size, wrap in attempts:
        widths = measure(size, wrap)
        room = landscape if land else portrait
        if sum(widths) <= room:
            spare = (room - sum(widths)) / len(widths)
            return {"landscape": land, "size": size, "widths": [w + spare for w in widths], "spare": spare}
    widths = measure(_WORD_TABLE_PT[1], True)
    return {"landscape": True, "size": _WORD_TABLE_PT[1],
            "widths": [w * landscape / sum(widths) for w in widths], "spare": 0.0}


def _word_orientation(doc, *, landscape: bool):
    """Make the last section portrait or landscape; a new section (new page) if text already sits in it."""
    from docx.enum.section import WD_ORIENT, WD_SECTION

    section = doc.sections[-1]
    is_landscape = section.page_width > section.page_height
    if is_landscape == landscape:
        return section
    if len(doc.element.body) > 1:  # more than the section properties: content exists, start a new page
        section = doc.add_section(WD_SECTION.NEW_PAGE)
    width, height = section.page_width, section.page_height
    section.orientation = WD_ORIENT.LANDSCAPE if landscape else WD_ORIENT.PORTRAIT
    section.page_width, section.page_height = height, width
    return section


def _word_widths(table, widths_pt: list[float]) -> None:
    """Fixed layout with the given column widths (grid, every cell, and the table width)."""
    from docx.oxml import OxmlElement
    from docx.oxml.ns import qn
    from docx.shared import Pt

    tbl_pr = table._tbl.tblPr
    layout = OxmlElement("w:tblLayout")
    layout.set(qn("w:type"), "fixed")
    tbl_pr.append(layout)
    tbl_w = tbl_pr.find(qn("w:tblW"))
    if tbl_w is None:
        tbl_w = OxmlElement("w:tblW")
        tbl_pr.append(tbl_w)
    tbl_w.set(qn("w:type"), "dxa")
    tbl_w.set(qn("w:w"), str(int(round(sum(widths_pt) * 20))))
    margins = OxmlElement("w:tblCellMar")
    for edge in ("left", "right"):
        element = OxmlElement(f"w:{edge}")
        element.set(qn("w:w"), str(int(round(_WORD_CELL_MARGIN_PT * 20))))
        element.set(qn("w:type"), "dxa")
        margins.append(element)
    tbl_pr.append(margins)
    for grid_col, w in zip(table._tbl.tblGrid.findall(qn("w:gridCol")), widths_pt):
        grid_col.set(qn("w:w"), str(int(round(w * 20))))
    for j, column in enumerate(table.columns):
        column.width = Pt(widths_pt[j])
    for row in table.rows:
        for cell, w in zip(row.cells, widths_pt):
            cell.width = Pt(w)


def _word_rows(table) -> None:
    """The header row repeats on each page (w:tblHeader); no row splits across pages (w:cantSplit)."""
    from docx.oxml import OxmlElement

    for i, row in enumerate(table.rows):
        tr_pr = row._tr.get_or_add_trPr()
        tr_pr.append(OxmlElement("w:cantSplit"))
        if i == 0:
            tr_pr.append(OxmlElement("w:tblHeader"))


# ---------------------------------------------------------------------------------------------- latex layout
_TEX_TEXT_WIDTH_PT = 345.0  # \textwidth of a 10 pt article
_TEX_TEXT_HEIGHT_PT = 550.0  # \textheight of a 10 pt article on A4 or US Letter (at least)
_TEX_SIZES = ((r"\small", 9.0), (r"\footnotesize", 8.0), (r"\scriptsize", 7.0))
_TEX_DESIGN_SIZE = 1.05  # cmr9/cmr8/cmr7 are a little wider than cmr10 scaled down (measured: 224.7 vs 218.7 pt)
_TEX_LONG_ROWS = {False: 36, True: 22}  # rows above which a table is a longtable (portrait, landscape)


def _latex_layout(table: "ReportTable") -> dict:
    """Font size, column gap, orientation and float/longtable for a LaTeX table (see ``ReportTable.to_latex``)."""
    from . import _measure

    cells = table.cells_markup()
    attempts = [(False, 0, 6.0), (False, 0, 3.0), (False, 1, 3.0), (True, 0, 6.0), (True, 0, 3.0), (True, 1, 3.0),
                (True, 2, 2.0)]
    chosen = attempts[-1]
    for land, size_index, gap in attempts:
        size = _TEX_SIZES[size_index][1]
        natural = sum(max([_measure.width(c.header, size, face="cm")]
                          + [_measure.width(row[j], size, face="cm") for row in cells]) * _TEX_DESIGN_SIZE
                      + 2 * gap for j, c in enumerate(table.columns))
        room = _TEX_TEXT_HEIGHT_PT if land else _TEX_TEXT_WIDTH_PT
        if natural <= room:
            chosen = (land, size_index, gap)
            break
    land, size_index, gap = chosen
    return {"landscape": land, "size": _TEX_SIZES[size_index][0], "tabcolsep": f"{gap:g}",
            "long": len(table.rows) > _TEX_LONG_ROWS[land]}


def _latex_breaks(latex: str) -> str:
    """Allow line breaks after commas between words (``town1,town2,...`` lists) in captions and notes."""
    return re.sub(r",(?=[A-Za-z])", r",\\allowbreak{}", latex)


_PREAMBLE_PACKAGES = {
    "booktabs": r"\usepackage{booktabs}   % \toprule, \midrule, \bottomrule",
    "graphicx": r"\usepackage{graphicx}   % \resizebox, used by \roikitfit",
    "longtable": r"\usepackage{longtable}  % long tables that continue across pages",
    "pdflscape": r"\usepackage{pdflscape}  % landscape pages for wide tables",
}

_FIT_MACRO = r"""% \roikitfit{<tabular>}: the tabular as it is, or shrunk to \linewidth if it is wider
\ifdefined\roikitbox\else\newsavebox{\roikitbox}\fi
\providecommand{\roikitfit}[1]{\sbox{\roikitbox}{#1}%
  \ifdim\wd\roikitbox>\linewidth\resizebox{\linewidth}{!}{\usebox{\roikitbox}}\else\usebox{\roikitbox}\fi}"""


def latex_preamble(tables: Iterable["ReportTable"]) -> str:
    """The preamble lines the LaTeX tables need: exactly their packages, and ``\\roikitfit`` when a float uses it.

    The tables write only ASCII (no ``inputenc``/``fontenc`` declarations needed) and use ``\\textsubscript``,
    which the LaTeX kernel has defined since 2015.
    """
    needs = {"booktabs"}
    fit = False
    for t in tables:
        plan = _latex_layout(t)
        needs.add("longtable" if plan["long"] else "graphicx")
        fit = fit or not plan["long"]
        if plan["landscape"]:
            needs.add("pdflscape")
    lines = ["% Packages the roikit tables in this folder need. In your document's preamble: \\input{preamble}",
             "% (or copy these lines). Tables are sized for a 10 pt article text block."]
    lines += [_PREAMBLE_PACKAGES[p] for p in _PREAMBLE_PACKAGES if p in needs]
    if fit:
        lines.append(_FIT_MACRO)
    return "\n".join(lines) + "\n"


def write_latex_preamble(directory: os.PathLike | str, tables: Iterable["ReportTable"], *,
                         overwrite: bool = False) -> Path:
    """Write ``directory/preamble.tex`` (see :func:`latex_preamble`); returns its path."""
    return atomic_write_bytes(Path(directory) / "preamble.tex", latex_preamble(tables).encode("ascii"),
                              overwrite=overwrite)


# ---------------------------------------------------------------------------------------------- results
def _format_bf(value: Any) -> str:
    """A Bayes factor: three decimals below .1, two below 100, one below 1,000, then whole numbers.

    Beyond 100,000 and below .001, three significant digits times a power of ten (``4.32 × 10^{15}``): sixteen
    digits of a whole number claim a precision the prior's choice does not have (common practice, no source).
    """
    bf = number(value)
    if not np.isfinite(bf):
        return MISSING
    if bf >= 1e5 or 0 < bf < 1e-3:
        mantissa, exponent = f"{bf:.2e}".split("e")
        return f"{mantissa} × 10^{{{int(exponent)}}}"
    if bf >= 1000:
        return f"{bf:,.0f}"
    return format_number(bf, 3 if bf < 0.1 else 2 if bf < 100 else 1)


def cell_formatters() -> dict[str, Any]:
    """Map from a results-table column key to the function formatting one row's cell (used by tests too).

    Every function takes the results row (a mapping) and returns the cell markup.
    """

    def bounded(row) -> bool:
        return text(row.get("effect_size_type")) in BOUNDED_EFFECTS

    return {
        "n": lambda r: format_df(r.get("n")),
        "estimate": lambda r: format_number(r.get("estimate"), estimate_decimals(r)),
        "ci": lambda r: format_ci(r.get("ci_low"), r.get("ci_high"), estimate_decimals(r)),
        "se": lambda r: format_number(r.get("se"), estimate_decimals(r)),
        "df": lambda r: format_df(r.get("df")),
        "df1": lambda r: format_df(r.get("df1")),
        "statistic": lambda r: format_number(r.get("statistic")),
        "p": lambda r: format_p(r.get("p")),
        "p_holm": lambda r: format_p(r.get("p_holm")),
        "p_posthoc": lambda r: format_p(r.get("p_posthoc")),
        "p_fdr": lambda r: format_p(r.get("p_fdr")),
        "p_fwe": lambda r: format_p(r.get("p_fwe")),
        "p_bonferroni": lambda r: format_p(r.get("p_bonferroni")),
        "effect_size": lambda r: format_number(r.get("effect_size"), leading_zero=not bounded(r)),
        "effect_ci": lambda r: format_ci(r.get("effect_size_ci_low"), r.get("effect_size_ci_high"),
                                         leading_zero=not bounded(r)),
        "tau2": lambda r: format_number(r.get("tau2"), 3),
        "p_equivalence": lambda r: format_p(r.get("p_equivalence")),
        "bf10": lambda r: _format_bf(r.get("bf10")),
        "epsilon_gg": lambda r: format_number(r.get("epsilon_gg"), leading_zero=False),
        "generalized_eta2": lambda r: format_number(r.get("generalized_eta2"), leading_zero=False),
        "i2": lambda r: format_percent(r.get("i2")),
    }


def _flags(row: dict) -> list[tuple[str, list[str]]]:
    """(flag kind, participant ids) of one results row."""
    out = []
    n_out = number(row.get("n_outliers"))
    if (np.isfinite(n_out) and n_out > 0) or ids(row.get("outlier_ids")):
        out.append(("outlier", ids(row.get("outlier_ids"))))
    n_low = number(row.get("n_low_coverage"))
    if (np.isfinite(n_low) and n_low > 0) or ids(row.get("low_coverage_ids")):
        out.append(("coverage", ids(row.get("low_coverage_ids"))))
    if flag(row.get("converged")) is False:
        out.append(("converged", []))
    if flag(row.get("boundary")) is True:
        out.append(("boundary", []))
    if ids(row.get("excluded_ids")):
        out.append(("excluded", ids(row.get("excluded_ids"))))
    return out


def _family_sentence(rows: pd.DataFrame, corrected: list[str], primary: str = "holm") -> str | None:
    """One sentence: the primary correction (or "uncorrected") and the family size, then any other adjusted p."""
    sizes = ordered_unique(family_size(rows[rows["term"].map(text) == t]) for t in ordered_unique(rows["term"].map(text)))
    size_text = " or ".join(str(s) for s in sizes) if sizes else str(rows["region"].nunique())
    noun = "region" if sizes == [1] else "regions"
    names = {"holm": "Holm (1979) step-down family-wise error correction",
             "fdr": "Benjamini–Hochberg (1995) false discovery rate adjustment",
             "bonferroni": "Bonferroni correction",
             "fwe": "maximum-statistic permutation family-wise error correction (Westfall & Young, 1993)"}

    def describe(method):
        desc = names.get(method, escape_markup(method))
        if method == "fwe":
            perms = ordered_unique(col(rows, "permutations"))
            seeds = [text(v) for v in ordered_unique(col(rows, "seed")) if text(v) and len(text(v)) <= 10]
            if perms:
                desc += f", {int(number(perms[0])):,} permutations"
            if seeds:
                desc += f", seed {seeds[0]}"
        return desc

    if primary == "none":
        s = f"*p* values are uncorrected for multiple comparisons (family of {size_text} {noun} per term)."
    else:
        s = (f"{corrected_p_symbol(primary)} = *p* after {describe(primary)} across the {size_text} {noun} of each "
             "term (the primary correction).")
    others = [m for m in corrected if m != primary]
    if others:
        s += " Also given: " + "; ".join(f"{corrected_p_symbol(m)}, {describe(m)}" for m in others) + "."
    return s


def _estimate_sentence(key: dict, rows: pd.DataFrame) -> str:
    design = key.get("design", "")
    contrast = escape_markup(key.get("contrast", ""))
    if design in ("one-sample", "fixed-effects"):
        return f"*M* = mean {contrast} value across participants."
    if design == "paired":
        return f"*M*_{{diff}} = mean within-participant difference {contrast} − {escape_markup(key.get('versus', ''))}."
    if design == "two-group":
        levels = key.get("levels", "").split(",")
        if len(levels) == 2:
            return (f"*M*_{{diff}} = difference of group means, {escape_markup(levels[0])} − "
                    f"{escape_markup(levels[1])} ({contrast}).")
        return "*M*_{diff} = difference of group means."
    if design == "region-difference":
        versus = key.get("versus", "")
        what = f"({contrast} − {escape_markup(versus)})" if versus else contrast
        return (f"*M*_{{diff}} = mean within-participant difference between the two regions (first − second) in "
                f"the {what} values; a paired *t*-test of the differences.")
    if design == "repeated-measures" and has_values(rows, "p_posthoc"):
        return ("*M*_{diff} = mean within-participant difference between the two levels of the pair (first − "
                "second); a paired *t*-test of the differences.")
    if design == "precision-weighted":
        return ("Estimates are precision-weighted (inverse-variance) with a between-participant variance "
                "*τ*^{2}; *I*^{2} = share of the total variance due to between-participant heterogeneity.")
    return "*b* = fixed-effect coefficient (in the units of the region values)."


def results_tables(results: pd.DataFrame, *, start: int = 1, correct: str | None = None,
                   labels: Labels | dict | None = None, participants: pd.DataFrame | None = None) -> list[ReportTable]:
    """Format a group results table as APA tables: one per analysis and kind of test (*t*/*z* or *F*).

    Parameters
    ----------
    results : DataFrame
        A group results table (contract columns; optional columns such as ``family_size``, ``correction``,
        ``df1``, ``tau2``, ``i2``, ``outlier_ids`` are used when present).
    start : int
        Number of the first table.
    correct : str, optional
        Primary correction instead of each analysis's own (the first entry of ``correction``).
    labels : dict or Labels, optional
        BIDS sidecar(s) naming variables and levels (terms such as ``group (younger vs older)``).
    participants : DataFrame, optional
        participants.tsv (tells the reference level of a factor).

    Returns
    -------
    list of ReportTable
        Rows in the results' order (regions in region-set order, grouped by term); columns: Region, [Term],
        *n*, estimate and its CI, *df*, the statistic, *p*, each adjusted *p* present, the effect size and its
        CI, [*τ*^{2}, *I*^{2}]. Flags (outliers, low coverage, non-convergence, boundary fits, exclusions) are
        superscript letters explained in the note.
    """
    check_columns(results, REQUIRED_RESULTS, "results table")
    labels = labels if isinstance(labels, Labels) else Labels(labels or {})
    tables: list[ReportTable] = []
    number_ = start
    for i, (key, rows) in enumerate(split_analyses(results), start=1):
        # the analysis number of a study run, else counted from the first table's number
        analysis = int(number(key["analysis"])) if np.isfinite(number(key.get("analysis"))) else start - 1 + i
        primary = primary_correction(rows, correct)
        extra = dict(primary=primary, labels=labels, participants=participants, analysis=analysis)
        stat_types = ordered_unique(rows["statistic_type"].map(lambda v: text(v, "t")))
        for stat in stat_types:
            part = rows[rows["statistic_type"].map(lambda v: text(v, "t")) == stat]
            if stat == "F" and len(stat_types) > 1:
                tables.append(_build(key, part, stat, number_, suffix="omnibus", **extra))
            else:
                tables.append(_build(key, part, stat, number_, **extra))
            number_ += 1
    return tables


def results_table(results: pd.DataFrame, **kwargs) -> ReportTable:
    """The single table of a results table holding one analysis with one kind of test (see results_tables)."""
    tables = results_tables(results, **kwargs)
    if len(tables) != 1:
        raise UsageError(
            f"results hold {len(tables)} tables (analyses x kinds of test); use results_tables() or filter the rows"
        )
    return tables[0]


def _build(key: dict, rows: pd.DataFrame, stat: str, number_: int, suffix: str = "", *, primary: str = "holm",
           labels: Labels | None = None, participants: pd.DataFrame | None = None,
           analysis: int | None = None) -> ReportTable:
    records = [dict(r) for _, r in rows.iterrows()]
    terms = ordered_unique(rows["term"].map(text))
    # term-major order, regions in their order of appearance
    order = sorted(range(len(records)), key=lambda i: (terms.index(text(records[i]["term"])), i))
    records = [records[i] for i in order]
    level = format_confidence(ordered_unique(col(rows, "confidence"))[0] if has_values(rows, "confidence") else None)
    design = key.get("design", "")
    columns = [Column("region", "Region", "l")]
    if len(terms) > 1:
        columns.append(Column("term", "Term", "l"))
    columns.append(Column("n", "*n*"))
    if stat != "F":
        posthoc = has_values(rows, "p_posthoc")
        columns.append(Column("estimate", estimate_symbol(design, terms[0] if len(terms) == 1 or posthoc else "x")))
        if has_values(rows, "ci_low"):
            columns.append(Column("ci", f"{level} CI", "c"))
        if stat == "t" and has_values(rows, "df"):
            columns.append(Column("df", "*df*"))
    else:
        columns.append(Column("df1", "*df*_{1}"))
        columns.append(Column("df", "*df*_{2}"))
    # repeated measures: F tests with a sphericity question get Greenhouse-Geisser corrected df and p
    eps = pd.to_numeric(col(rows, "epsilon_gg"), errors="coerce") if stat == "F" else pd.Series(dtype=float)
    corrected_df = bool(len(eps)) and bool(np.any(eps.to_numpy(float) < 1)) and has_values(rows, "p_gg")
    if corrected_df:
        columns.append(Column("epsilon_gg", "*ε*_{GG}"))
    columns.append(Column("statistic", statistic_symbol(stat)))
    columns.append(Column("p", "*p*_{GG}" if corrected_df else "*p*"))
    posthoc_method = text(ordered_unique(col(rows, "posthoc_correction"))[0]) if has_values(
        rows, "p_posthoc") and has_values(rows, "posthoc_correction") else ""
    if has_values(rows, "p_posthoc"):  # post-hoc pairs: corrected across the factor's pairs within each region
        columns.append(Column("p_posthoc", "*p*_{pairs}"))
    corrected = [m for m in ("holm", "fdr", "fwe", "bonferroni") if has_values(rows, f"p_{m}")]
    corrected = ([primary] if primary in corrected else []) + [m for m in corrected if m != primary]
    for m in corrected:
        columns.append(Column(f"p_{m}", corrected_p_symbol(m)))
    effect_types = ordered_unique(col(rows, "effect_size_type"))
    if has_values(rows, "effect_size"):
        header = effect_symbol(effect_types[0]) if len(effect_types) == 1 else "Effect size"
        columns.append(Column("effect_size", header))
        if has_values(rows, "effect_size_ci_low"):
            columns.append(Column("effect_ci", f"{level} CI", "c"))
    if stat == "F" and has_values(rows, "generalized_eta2"):
        columns.append(Column("generalized_eta2", "*η*^{2}_{G}"))
    if has_values(rows, "p_equivalence"):
        columns.append(Column("p_equivalence", "*p*_{TOST}"))
    if has_values(rows, "bf10"):
        columns.append(Column("bf10", "*BF*_{10}"))
    if has_values(rows, "tau2"):
        columns.append(Column("tau2", "τ^{2}"))
    if has_values(rows, "i2"):
        columns.append(Column("i2", "*I*^{2}"))

    fmt = cell_formatters()
    letters: dict[str, str] = {}
    flagged: dict[str, list[str]] = {}
    cells, row_ids = [], []
    for r in records:
        region = text(r["region"])
        e = number(r.get("epsilon_gg"))
        if corrected_df and np.isfinite(e) and np.isfinite(number(r.get("p_gg"))):
            r = {**r, "df1": number(r["df1"]) * e, "df": number(r["df"]) * e, "p": number(r["p_gg"])}
        marks = []
        for kind, who in _flags(r):
            letter = letters.setdefault(kind, "abcdefghij"[len(letters)])
            marks.append(letter)
            detail = escape_markup(region) + (f" ({escape_markup(', '.join(who))})" if who else "")
            if detail not in flagged.setdefault(kind, []):
                flagged[kind].append(detail)
        cell = {"region": escape_markup(region) + ("^{" + ",".join(marks) + "}" if marks else ""),
                "term": escape_markup(term_label(text(r["term"]), key, labels, participants, terms))}
        for c in columns:
            if c.key in fmt:
                cell[c.key] = fmt[c.key](r)
        if is_intercept(r["term"]) and len(terms) > 1:  # no effect size for an intercept
            cell["effect_size"] = cell["effect_ci"] = MISSING
        cells.append(cell)
        row_ids.append({"design": design, "region": region, "term": text(r["term"]),
                        "contrast": text(r.get("contrast")), "statistic-type": stat})

    note = []
    has_ci = any(c.key in ("ci", "effect_ci") for c in columns)
    note.append("*n* = participants in the test" + (f"; CI = confidence interval ({level})." if has_ci else "."))
    if stat != "F":
        note.append(_estimate_sentence(key, rows))
    if has_values(rows, "p_posthoc"):
        pairs = ordered_unique(int(number(v)) for v in col(rows, "posthoc_family") if np.isfinite(number(v)))
        name = escape_markup(correction_name(posthoc_method or "holm"))
        note.append(f"*p*_{{pairs}} = *p* of the post-hoc paired *t*-test adjusted with the {name} "
                    f"method across the {' or '.join(map(str, pairs))} pairs of the factor's levels within each "
                    "region; the other adjusted *p* values correct each pair across regions.")
    if stat != "F":
        note.append("*p* values are two-sided.")
    if corrected_df:
        note.append("*df* and *p*_{GG} are Greenhouse–Geisser corrected (*df* × *ε*_{GG}; Greenhouse & Geisser, "
                    "1959); effects with one numerator *df* need no correction (*ε*_{GG} = 1).")
    if has_values(rows, "p_equivalence"):
        bounds = ordered_unique(format_number(number(v), 2) for v in col(rows, "equivalence_bound")
                                if np.isfinite(number(v)))
        note.append(f"*p*_{{TOST}} = larger *p* of two one-sided tests against ±{' or ±'.join(bounds)} in units of "
                    "the effect size (Schuirmann, 1987; Lakens, 2017); below .05, the effect lies within the bounds.")
    if has_values(rows, "bf10"):
        scales = ordered_unique(format_number(number(v), 3, leading_zero=False) for v in col(rows, "prior_scale")
                                if np.isfinite(number(v)))
        note.append(f"*BF*_{{10}} = JZS Bayes factor for an effect against none (Rouder et al., 2009; Cauchy prior "
                    f"scale *r* = {' or '.join(scales) or '.707'}); below 1/3 moderate and below 1/10 strong evidence "
                    "for no effect, above 3 and 10 for an effect (Jeffreys, 1961, as adapted by Lee & Wagenmakers, "
                    "2013).")
    if stat == "F" and has_values(rows, "generalized_eta2"):
        note.append("*η*^{2}_{G} = generalized eta squared (Olejnik & Algina, 2003).")
    methods = ordered_unique(col(rows, "df_method"))
    if methods:
        note.append("Reference distribution: " + "; ".join(DF_METHOD_TEXT.get(text(m), escape_markup(text(m)))
                                                          for m in methods) + ".")
    family = _family_sentence(rows, corrected, primary)
    if family:
        note.append(family)
    for etype in effect_types:
        if text(etype) in _EFFECT_TEXT:
            sentence = _EFFECT_TEXT[text(etype)]
            if text(etype) in ("d", "d_z", "g") and has_values(rows, "effect_size_ci_low"):
                sentence += "; its CI inverts the noncentral *t* distribution (Steiger & Fouladi, 1997)"
            note.append(sentence + ".")
    if any(flag(v) is False for v in col(rows, "population_inference")) or design == "fixed-effects":
        note.append("Fixed-effects result: it describes only these participants and does not generalise to the "
                    "population.")
    for kind, letter in letters.items():
        note.append(f"^{{{letter}}} {_FLAG_TEXT[kind]}: " + "; ".join(flagged[kind]) + ".")

    title = analysis_title(key, labels=labels)
    if suffix:
        title += f" ({suffix} tests)"
    title_markup = escape_markup(title[0].upper() + title[1:])
    name = f"a{analysis if analysis is not None else number_}-{slug(design)}" + (f"-{suffix}" if suffix else "")
    return ReportTable(name=name, title=title_markup, columns=columns, rows=cells, row_ids=row_ids, note=note,
                       number=number_)


# ---------------------------------------------------------------------------------------------- descriptives
def descriptives(
    data: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    group: str | None = None,
    value: str = "value",
) -> pd.DataFrame:
    """Per region x contrast (x group) descriptive statistics of the region values.

    Parameters
    ----------
    data : DataFrame
        Region values table (participant_id, contrast, region, value, [n_voxels, n_valid], [session_id]).
    participants : DataFrame, optional
        participants.tsv, used to find ``group`` when it is not a column of ``data``.
    group : str, optional
        Column naming the group of each participant.
    value : str
        Column with the region values.

    Returns
    -------
    DataFrame
        ``region``, [``session_id``], ``contrast``, [``group``], ``n`` (non-missing values), ``n_missing``,
        ``mean``, ``sd`` (ddof 1), ``se`` (sd / sqrt(n)), ``coverage`` (mean percentage of the region's voxels
        with valid data, when n_valid and n_voxels are present). Regions, contrasts and groups keep their order
        of appearance.

    Notes
    -----
    SD uses n - 1 in the denominator (checked against ``pandas.Series.std`` in the tests).
    """
    check_columns(data, REQUIRED_VALUES, "region values table")
    table = data.copy()
    keys = ["region"]
    if "session_id" in table.columns:
        keys.append("session_id")
    keys.append("contrast")
    if group is not None:
        labels = group_of(table, participants, group)
        if labels is None:
            raise UsageError(
                f"group column {group!r} is neither in the values table nor in participants.tsv; "
                "pass --participants or choose an existing column"
            )
        table["group"] = labels.to_numpy()
        keys.append("group")
    table["_value"] = pd.to_numeric(table[value], errors="coerce")
    if "n_valid" in table.columns and "n_voxels" in table.columns:
        nv = pd.to_numeric(table["n_voxels"], errors="coerce").to_numpy(dtype=float)
        table["_coverage"] = 100.0 * pd.to_numeric(table["n_valid"], errors="coerce").to_numpy(dtype=float) / np.where(
            nv > 0, nv, np.nan)
    for k in keys:  # regions, sessions, contrasts and groups in their order of appearance
        table[k] = pd.Categorical(table[k].map(text), categories=ordered_unique(table[k].map(text)))
    rows = []
    for key, part in table.groupby(keys, sort=True, observed=True):
        x = part["_value"].to_numpy(dtype=float)
        finite = x[np.isfinite(x)]
        n = finite.size
        rec = dict(zip(keys, map(str, key if isinstance(key, tuple) else (key,))))
        rec["n"] = n
        rec["n_missing"] = int(x.size - n)
        rec["mean"] = float(finite.mean()) if n else np.nan
        rec["sd"] = float(finite.std(ddof=1)) if n > 1 else np.nan
        rec["se"] = rec["sd"] / np.sqrt(n) if n > 1 else np.nan
        if "_coverage" in part.columns:
            rec["coverage"] = float(np.nanmean(part["_coverage"])) if part["_coverage"].notna().any() else np.nan
        rows.append(rec)
    return pd.DataFrame(rows)


def descriptives_table(
    data: pd.DataFrame,
    *,
    participants: pd.DataFrame | None = None,
    group: str | None = None,
    value: str = "value",
    number: int | None = None,
    contrasts: Sequence[str] | None = None,
    labels: Labels | dict | None = None,
    max_columns: int = 8,
) -> ReportTable:
    """The descriptives (see :func:`descriptives`) in a wide layout: one row per region, one column per contrast
    (and group), each cell *M* (*SD*).

    Parameters
    ----------
    contrasts : sequence of str, optional
        Only these contrasts (the analysed ones), in this order.
    labels : dict or Labels, optional
        BIDS sidecar(s) naming the group and contrast levels.
    max_columns : int
        Groups get their own columns only while contrasts x groups stays within this many columns.
    """
    labels = labels if isinstance(labels, Labels) else Labels(labels or {})
    if contrasts:
        keep = [c for c in contrasts if c in set(data["contrast"].map(text))]
        data = data[data["contrast"].map(text).isin(keep)]
    n_contrasts = data["contrast"].map(text).nunique()
    if group is not None:
        levels = group_of(data, participants, group)
        n_groups = levels.nunique() if levels is not None else 1
        if n_contrasts * n_groups > max_columns:
            group = None
    desc = descriptives(data, participants=participants, group=group, value=value)
    order = list(contrasts) if contrasts else ordered_unique(desc["contrast"])
    desc["contrast"] = pd.Categorical(desc["contrast"], categories=[c for c in order if c in set(desc["contrast"])])
    for k in ("group", "session_id"):
        if k in desc.columns:
            desc[k] = pd.Categorical(desc[k], categories=ordered_unique(desc[k]))
    keys = ["contrast"] + (["group"] if "group" in desc.columns else []) + (
        ["session_id"] if "session_id" in desc.columns else [])
    column_keys = ordered_unique(tuple(r[k] for k in keys) for _, r in desc.sort_values(keys, kind="stable").iterrows())
    ns = ordered_unique(int(v) for v in desc["n"])
    columns = [Column("region", "Region", "l")]
    for ck in column_keys:
        head = labels.level("contrast", ck[0])
        if "group" in desc.columns:
            head += f", {labels.level(group, ck[1])}"
        if "session_id" in desc.columns:
            head += f", {ck[-1]}"
        columns.append(Column("|".join(map(str, ck)), escape_markup(head), "c"))
    if "coverage" in desc.columns:
        columns.append(Column("coverage", "Coverage"))
    rows, row_ids = [], []
    for region, part in desc.groupby("region", sort=False, observed=True):
        cell = {"region": escape_markup(text(region))}
        for _, r in part.iterrows():
            ck = "|".join(str(r[k]) for k in keys)
            m = f"{format_number(r['mean'])} ({format_number(r['sd'])})"
            cell[ck] = m if len(ns) == 1 else f"{m}, {format_df(r['n'])}"
        if "coverage" in desc.columns:
            cell["coverage"] = format_percent(part["coverage"].mean())
        rows.append(cell)
        row_ids.append({"region": text(region)})
    note = [("Cells are *M* (*SD*); " if len(ns) == 1 else "Cells are *M* (*SD*), *n*; ")
            + "*M* = mean; *SD* = standard deviation (*n* − 1 denominator)"
            + (f"; *n* = {ns[0]} participants with a value per cell." if len(ns) == 1 else "; *n* = participants "
               "with a value.")]
    note.append("Only the contrasts analysed are shown." if contrasts else "All contrasts are shown.")
    if "coverage" in desc.columns:
        note.append("Coverage = mean percentage of the region's voxels with valid data, across the cells.")
    if int(desc["n_missing"].sum()) > 0:
        note.append(f"{int(desc['n_missing'].sum())} values were missing (no valid voxel or no map).")
    return ReportTable(name="descriptives", title="Region values by region and contrast", columns=columns,
                       rows=rows, row_ids=row_ids, note=note, number=number)
