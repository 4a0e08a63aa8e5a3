"""A single self-contained HTML report: styles inline, figures embedded as data URIs, no scripts, no network.

Examples
--------
>>> page = report_html(title="Wayfinding study", sections=[...])      # doctest: +SKIP
"""

from __future__ import annotations

import base64
import html as _html
import re
from dataclasses import dataclass, field
from typing import Sequence

from .format import render

__all__ = ["ReportFigure", "Section", "report_html", "data_uri", "break_points", "CSS"]

#: Screen and print styles (A4/Letter friendly; figures and tables never split across pages).
CSS = """
:root { --ink: #1a1a1a; --muted: #555; --rule: #000; --accent: #0072B2; --warn: #D55E00; }
* { box-sizing: border-box; }
html { -webkit-text-size-adjust: 100%; text-size-adjust: 100%; }
body { font-family: "DejaVu Serif", Georgia, "Times New Roman", serif; color: var(--ink); background: #fff;
       max-width: 62rem; margin: 0 auto; padding: 1.5rem 2rem 4rem; line-height: 1.45; font-size: 15px;
       overflow-wrap: break-word; }
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
figure.plot .zoom > a.open { display: block; cursor: zoom-in; }
figure.plot .zoom > a.close { display: none; }
figure.plot .zoom:target { position: fixed; inset: 0; z-index: 10; overflow: auto; background: #fff;
                           padding: 3rem 1rem 1rem; margin: 0; }
figure.plot .zoom:target img { width: auto !important; max-width: none; margin: 0; }
figure.plot .zoom:target > a.open { cursor: default; }
figure.plot .zoom:target > a.close { display: block; position: fixed; top: .6rem; right: 1rem; z-index: 11;
                                     background: #fff; border: 1px solid var(--muted); border-radius: 3px;
                                     padding: .2rem .6rem; font-family: sans-serif; font-size: .9rem; }
.figure-links { white-space: nowrap; font-size: .82rem; }
figcaption .figure-number, figcaption .table-number { font-weight: bold; }
figcaption .table-title { font-style: italic; }
figure.table { position: relative; timeline-scope: --table-scroll; }
.table-scroll { overflow-x: auto; max-width: 100%; scroll-timeline: --table-scroll x;
  /* shadows at a clipped edge: the white covers scroll with the table, the shadows stay at the frame's edges */
  background: linear-gradient(to right, #fff 30%, rgba(255, 255, 255, 0)) left / 2.5rem 100% no-repeat local,
              linear-gradient(to left, #fff 30%, rgba(255, 255, 255, 0)) right / 2.5rem 100% no-repeat local,
              radial-gradient(farthest-side at 0 50%, rgba(0, 0, 0, .28), rgba(0, 0, 0, 0)) left / .9rem 100%
                no-repeat scroll,
              radial-gradient(farthest-side at 100% 50%, rgba(0, 0, 0, .28), rgba(0, 0, 0, 0)) right / .9rem 100%
                no-repeat scroll; }
.table-scroll:focus-visible { outline: 2px solid var(--accent); }
p.scroll-hint { position: absolute; top: 0; right: 0; margin: 0; font-size: .8rem; color: var(--accent);
                font-family: sans-serif; opacity: 0; pointer-events: none; }
p.scroll-hint::after { content: "scroll \\2192"; }
@supports (animation-timeline: scroll()) {
  /* shown only while the table overflows its frame (an inactive timeline leaves it hidden), fading at the end */
  p.scroll-hint { animation: roikit-scroll-hint linear both; animation-timeline: --table-scroll; }
}
@supports not (animation-timeline: scroll()) {
  @media (max-width: 60rem) { p.scroll-hint { opacity: 1; } }
}
@keyframes roikit-scroll-hint { 0%, 85% { opacity: 1; } 100% { opacity: 0; } }
table.apa { border-collapse: collapse; margin: .4rem 0; font-size: .84rem; font-variant-numeric: tabular-nums;
            border-top: 2px solid var(--rule); border-bottom: 2px solid var(--rule); }
table.apa th { border-bottom: 1px solid var(--rule); font-weight: normal; padding: .25rem .45rem; }
table.apa td { padding: .15rem .45rem; white-space: nowrap; }
table.apa .r { text-align: right; } table.apa .l { text-align: left; } table.apa .c { text-align: center; }
p.table-note { font-size: .8rem; max-width: 60rem; }
dl.provenance dt { font-weight: bold; } dl.provenance dd { margin: 0 0 .4rem 1rem; font-family: monospace;
                                                           font-size: .8rem; word-break: break-all; }
footer { margin-top: 3rem; font-size: .8rem; color: var(--muted); }
@media (max-width: 40rem) {
  body { padding: 1rem .8rem 3rem; font-size: 14px; }
  h1 { font-size: 1.45rem; }
  nav ol { columns: 1; }
  section.cautions { padding: .2rem .6rem .5rem; }
  section.cautions ul { padding-left: 1.2rem; }
  figure.plot .zoom img { width: 100% !important; }
}
@media print {
  body { max-width: none; padding: 0; font-size: 10pt; }
  nav, p.scroll-hint, .figure-links, figure.plot .zoom > a.close { display: none; }
  h1, h2, h3, figcaption { break-after: avoid; page-break-after: avoid; }
  h2 + *, h3 + * { break-before: avoid; page-break-before: avoid; }
  figure, figure.table, table.apa, tr, li, section.cautions li { break-inside: avoid; page-break-inside: avoid; }
  figure.table.long, figure.table.long table.apa { break-inside: auto; page-break-inside: auto; }
  thead { display: table-header-group; }
  .table-scroll { overflow: visible; background: none; }
  table.apa { font-size: 7.5pt; }
  table.apa th, table.apa td { padding: .1rem .22rem; }
  table.apa td.l { white-space: normal; }
  table.apa.whole-stub td:first-child { white-space: nowrap; }  /* region names stay whole */
  /* a figure never taller than the page: at most its print width, at most 215 mm high, proportions kept */
  figure.plot .zoom img { width: auto !important; max-width: var(--print-width, 100%); max-height: 215mm; }
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
    file: str = ""  # the figure's file, relative to the report (linked from the caption when given)


@dataclass
class Section:
    """A report section: id, heading, HTML body parts (already rendered), optional sub-sections."""

    id: str
    heading: str
    body: list[str] = field(default_factory=list)
    css_class: str = ""


def figure_html(fig: ReportFigure) -> str:
    """A figure: the image (click: full size, without leaving the page), its caption and a link to its file."""
    label = f"Figure {fig.number}" if fig.number else "Figure"
    alt = _html.escape(fig.alt, quote=True)
    fid = _html.escape(fig.name or f"figure-{fig.number}", quote=True)
    share = max(30.0, min(100.0, 100.0 * fig.width_mm / 180.0))  # print proportions: 85 mm ~ half the page
    links = f'<a href="#{fid}-full">full size</a>'
    if fig.file:
        links += f' · <a href="{_html.escape(fig.file, quote=True)}">PNG file</a>'
    return (f'<figure class="plot" id="{fid}"><div class="zoom" id="{fid}-full">'
            f'<a class="open" href="#{fid}-full" title="Show full size"><img src="{data_uri(fig.png)}" alt="{alt}" '
            f'style="width: {share:.0f}%; --print-width: {share:.0f}%"></a>'
            f'<a class="close" href="#{fid}">Close full size \u00d7</a></div>'
            f'<figcaption><span class="figure-number">{label}.</span> {break_points(render(fig.caption, "html"))} '
            f'<span class="figure-links">({links})</span></figcaption>'
            "</figure>\n")


def break_points(html: str) -> str:
    """Add ``<wbr>`` after commas directly followed by a letter in the text of ``html`` (never inside tags).

    Long lists such as ``town1,town2,town3`` can then wrap on a narrow screen.
    """
    return re.sub(r"(>|^)([^<]*)", lambda m: m.group(1) + re.sub(r",(?=[A-Za-z])", ",<wbr>", m.group(2)), html)


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
        parts.extend(break_points(b) for b in s.body)
        parts.append("</section>")
    if footer:
        parts.append(f"<footer>{esc(footer)}</footer>")
    parts += ["</body>", "</html>"]
    return "\n".join(parts) + "\n"
