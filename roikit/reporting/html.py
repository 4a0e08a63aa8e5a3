"""A single self-contained HTML report: styles inline, figures embedded as data URIs, no scripts, no network.

Examples
--------
>>> page = report_html(title="Wayfinding study", sections=[...])      # doctest: +SKIP
"""

from __future__ import annotations

import base64
import html as _html
from dataclasses import dataclass, field
from typing import Sequence

from .format import render

__all__ = ["ReportFigure", "Section", "report_html", "data_uri", "CSS"]

#: Screen and print styles (A4/Letter friendly; figures and tables never split across pages).
CSS = """
:root { --ink: #1a1a1a; --muted: #555; --rule: #000; --accent: #0072B2; --warn: #D55E00; }
* { box-sizing: border-box; }
body { font-family: "DejaVu Serif", Georgia, "Times New Roman", serif; color: var(--ink); background: #fff;
       max-width: 62rem; margin: 0 auto; padding: 1.5rem 2rem 4rem; line-height: 1.45; font-size: 15px; }
h1 { font-size: 1.7rem; margin: 0 0 .3rem; }
h2 { font-size: 1.3rem; margin-top: 2.2rem; border-bottom: 1px solid #ccc; padding-bottom: .2rem; }
h3 { font-size: 1.1rem; margin-top: 1.6rem; }
p.scope { border-left: 4px solid var(--accent); padding: .4rem .8rem; background: #f3f8fb; }
section.cautions { border: 2px solid var(--warn); border-radius: 4px; padding: .2rem 1rem .6rem;
                   background: #fff8f2; }
section.cautions h2 { border: none; color: var(--warn); margin-top: .6rem; }
section.cautions li { margin: .35rem 0; }
nav ol { columns: 2; font-size: .92rem; }
figure { margin: 1.4rem 0; break-inside: avoid; page-break-inside: avoid; }
figure img { display: block; max-width: 100%; height: auto; margin: 0 auto; }
figure.plot figcaption { font-size: .88rem; color: var(--ink); margin-top: .3rem; }
figcaption .figure-number, figcaption .table-number { font-weight: bold; }
figcaption .table-title { font-style: italic; }
table.apa { border-collapse: collapse; margin: .4rem 0; font-size: .86rem; font-variant-numeric: tabular-nums;
            border-top: 2px solid var(--rule); border-bottom: 2px solid var(--rule); }
table.apa th { border-bottom: 1px solid var(--rule); font-weight: normal; padding: .25rem .5rem; }
table.apa td { padding: .15rem .5rem; white-space: nowrap; }
table.apa .r { text-align: right; } table.apa .l { text-align: left; } table.apa .c { text-align: center; }
.table-wrap { overflow-x: auto; }
p.table-note { font-size: .8rem; max-width: 60rem; }
dl.provenance dt { font-weight: bold; } dl.provenance dd { margin: 0 0 .4rem 1rem; font-family: monospace;
                                                           font-size: .8rem; word-break: break-all; }
footer { margin-top: 3rem; font-size: .8rem; color: var(--muted); }
@media print {
  body { max-width: none; padding: 0; font-size: 10.5pt; }
  nav { display: none; }
  h2 { break-after: avoid; page-break-after: avoid; }
  .table-wrap { overflow: visible; }
  a { color: inherit; text-decoration: none; }
}
@page { margin: 18mm 15mm; }
"""


def data_uri(data: bytes, mime: str = "image/png") -> str:
    """A ``data:`` URI embedding ``data`` (base64)."""
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


@dataclass
class ReportFigure:
    """A figure to embed: PNG bytes, alt text (plain) and caption (markup)."""

    png: bytes
    alt: str
    caption: str
    number: int | None = None
    name: str = ""
    width_mm: float = 180.0


@dataclass
class Section:
    """A report section: id, heading, HTML body parts (already rendered), optional sub-sections."""

    id: str
    heading: str
    body: list[str] = field(default_factory=list)
    css_class: str = ""


def figure_html(fig: ReportFigure) -> str:
    label = f"Figure {fig.number}" if fig.number else "Figure"
    alt = _html.escape(fig.alt, quote=True)
    fid = _html.escape(fig.name or f"figure-{fig.number}", quote=True)
    share = max(30.0, min(100.0, 100.0 * fig.width_mm / 180.0))  # print proportions: 85 mm ~ half the page
    return (f'<figure class="plot" id="{fid}"><img src="{data_uri(fig.png)}" alt="{alt}" '
            f'style="width: {share:.0f}%">'
            f'<figcaption><span class="figure-number">{label}.</span> {render(fig.caption, "html")}</figcaption>'
            "</figure>\n")


def report_html(*, title: str, scope: str, sections: Sequence[Section], footer: str = "") -> str:
    """Assemble the report page.

    Parameters
    ----------
    title : str
        Plain text.
    scope : str
        The scope statement (research use, not clinical), shown under the title.
    sections : sequence of Section
        In order; a table of contents links to them.
    footer : str
        Plain text at the bottom (versions, date).

    Returns
    -------
    str
        A complete HTML5 document without external resources or scripts.
    """
    esc = _html.escape
    toc = "".join(f'<li><a href="#{esc(s.id, quote=True)}">{esc(s.heading)}</a></li>' for s in sections)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en">',
        "<head>",
        '<meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        "<meta name=\"generator\" content=\"roikit\">",
        f"<title>{esc(title)}</title>",
        f"<style>{CSS}</style>",
        "</head>",
        "<body>",
        "<header>",
        f"<h1>{esc(title)}</h1>",
        f'<p class="scope">{esc(scope)}</p>',
        "</header>",
        f'<nav aria-label="Contents"><h2>Contents</h2><ol>{toc}</ol></nav>',
    ]
    for s in sections:
        cls = f' class="{esc(s.css_class, quote=True)}"' if s.css_class else ""
        parts.append(f'<section id="{esc(s.id, quote=True)}"{cls}>')
        parts.append(f"<h2>{esc(s.heading)}</h2>")
        parts.extend(s.body)
        parts.append("</section>")
    if footer:
        parts.append(f"<footer>{esc(footer)}</footer>")
    parts += ["</body>", "</html>"]
    return "\n".join(parts) + "\n"
