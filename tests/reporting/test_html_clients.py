"""The HTML report in headless Chromium on a phone (390 px), a desktop (1280 px) and printed to PDF (A4).

Driven through the DevTools protocol (``_cdp.py``): the page is laid out at each width and measured from inside.
Needs /usr/bin/chromium and poppler-utils (pdfimages, pdftotext); without them the tests fail with a clear message,
unless ROIKIT_SKIP_BROWSER=1 is set.
"""

from __future__ import annotations

import json
import re
import subprocess
import warnings
from html.parser import HTMLParser

import pytest

import _wide_study
from _cdp import Browser
from roikit.errors import CautionWarning
from roikit.reporting import write_report

pytestmark = pytest.mark.browser

_MEASURE = """JSON.stringify({
  page: [document.documentElement.scrollWidth, document.documentElement.clientWidth],
  frames: [...document.querySelectorAll('.table-scroll')].map(f => ({
    scroll: f.scrollWidth, client: f.clientWidth, right: f.getBoundingClientRect().right,
    hint: Number(getComputedStyle(f.closest('figure').querySelector('.scroll-hint')).opacity),
    hintText: getComputedStyle(f.closest('figure').querySelector('.scroll-hint'), '::after').content,
    shadow: getComputedStyle(f).backgroundImage})),
  outside: [...document.querySelectorAll('body *')].filter(e => !e.closest('.table-scroll')
      && e.getBoundingClientRect().right > document.documentElement.clientWidth + 0.5)
      .map(e => e.tagName + ' ' + (e.textContent || '').slice(0, 60)),
  images: [...document.querySelectorAll('figure.plot img')].map(i => i.getBoundingClientRect().width),
  content: document.body.clientWidth - parseFloat(getComputedStyle(document.body).paddingLeft)
      - parseFloat(getComputedStyle(document.body).paddingRight)
})"""

# in the print layout (A4 text block 180 x 261 mm = 680 x 986 CSS px): the box of every figure and table
_PRINT_BOXES = """JSON.stringify([...document.querySelectorAll('figure')].map(f => ({
  id: f.id, kind: f.className, height: f.getBoundingClientRect().height,
  width: Math.max(f.scrollWidth, ...[...f.querySelectorAll('table, img')].map(e => e.getBoundingClientRect().width)),
  rows: f.querySelectorAll('tbody tr').length})))"""


def _tools() -> str:
    chromium = _wide_study.program("chromium", skip_env="ROIKIT_SKIP_BROWSER", install="chromium")
    for name in ("pdfimages", "pdftotext"):
        _wide_study.program(name, skip_env="ROIKIT_SKIP_BROWSER", install="poppler-utils")
    return chromium


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    values, participants = _wide_study.study()
    out = tmp_path_factory.mktemp("clients") / "report"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CautionWarning)
        write_report(values, _wide_study.results(values, participants), participants=participants, out=out,
                     figure_formats=("png",), title="Wayfinding study (invented data)")
    return out / "report.html"


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    b = Browser(_tools(), str(tmp_path_factory.mktemp("profile")))
    yield b
    b.close()


@pytest.mark.parametrize("width", [390, 1280])
def test_no_sideways_page_scroll_tables_scroll_in_their_frame(report, browser, width):
    browser.open(report.as_uri(), width=width)
    m = json.loads(browser.evaluate(_MEASURE))
    scroll_width, client_width = m["page"]
    assert client_width == width
    assert scroll_width <= client_width, f"the page scrolls sideways at {width} px: {m['outside'][:5]}"
    assert m["outside"] == []
    assert len(m["frames"]) >= 6  # five results tables and the descriptives
    overflowing = 0
    for frame in m["frames"]:
        assert frame["right"] <= client_width + 0.5
        if frame["scroll"] > frame["client"] + 1:  # a wide table: the cue is visible
            overflowing += 1
            assert frame["hint"] > 0.9 and frame["hintText"] == '"scroll \u2192"', frame
            assert frame["shadow"].count("gradient") == 4
        else:
            assert frame["hint"] == 0, frame
    if width == 390:
        assert overflowing >= 5  # 10-12 columns never fit a phone
        # figures use the whole column on a phone (not a 146-px thumbnail)
        assert all(w == pytest.approx(m["content"], abs=1) for w in m["images"])
    else:
        assert all(w > 300 for w in m["images"])


def test_each_figure_opens_full_size(report, browser):
    page = report.read_text(encoding="utf-8")
    figures = re.findall(r'<figure class="plot" id="([^"]+)">', page)
    assert len(figures) >= 8
    first = figures[0]
    browser.open(report.as_uri() + f"#{first}-full", width=390, height=800)
    state = json.loads(browser.evaluate("""JSON.stringify((() => {
      const view = document.querySelector(':target'), img = view.querySelector('img');
      const box = view.getBoundingClientRect(), close = view.querySelector('a.close');
      return {position: getComputedStyle(view).position, box: [box.left, box.top, box.width, box.height],
              natural: img.naturalWidth, shown: img.getBoundingClientRect().width,
              canScroll: view.scrollWidth > view.clientWidth, close: getComputedStyle(close).display};
    })())"""))
    assert state["position"] == "fixed" and state["box"] == [0, 0, 390, 800]
    assert state["shown"] == state["natural"] > 1000  # shown at its full pixel size, panned inside the viewer
    assert state["canScroll"] and state["close"] == "block"
    # and the file itself, next to the report (the page stays self-contained: the image is embedded)
    links = re.findall(r'<a href="(figures/[^"]+\.png)">PNG file</a>', page)
    assert len(links) == len(figures) and all((report.parent / link).is_file() for link in links)


class _Alts(HTMLParser):
    def __init__(self):
        super().__init__()
        self.alts: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.alts.append(dict(attrs)["alt"])


def test_alt_text_keeps_underscores(report):
    parser = _Alts()
    parser.feed(report.read_text(encoding="utf-8"))
    assert parser.alts and all(a.strip() for a in parser.alts)
    # every figure of this study is about the contrast "novel_route" (or the towns)
    assert sum("novel_route" in a for a in parser.alts) >= 6


def _page_texts(pdf) -> list[str]:
    text = subprocess.run(["pdftotext", "-layout", str(pdf), "-"], capture_output=True, text=True,
                          check=True).stdout
    return text.split("\f")[:-1]


def test_print_keeps_figures_and_tables_whole(report, browser, tmp_path):
    page = report.read_text(encoding="utf-8")
    n_figures = page.count('<figure class="plot"')
    # the number of the figure each image belongs to, in page order
    numbers = [int(re.compile(r'class="figure-number">Figure (\d+)\.').search(page, m.end()).group(1))
               for m in re.finditer(r"<img ", page)]
    # 1) in the print layout (A4 text width), every figure and short table fits one page; long tables may break
    browser.open(report.as_uri(), width=680, print_media=True)
    boxes = json.loads(browser.evaluate(_PRINT_BOXES))
    for box in boxes:
        assert box["width"] <= 681, box  # nothing wider than the printed page
        if "long" not in box["kind"]:
            assert box["height"] <= 986, box
    # 2) the printed PDF: each image on exactly one page, with its caption; no heading ends a page
    pdf = tmp_path / "report.pdf"
    pdf.write_bytes(browser.print_pdf(preferCSSPageSize=True, paperWidth=8.27, paperHeight=11.69))
    listing = subprocess.run(["pdfimages", "-list", str(pdf)], capture_output=True, text=True, check=True).stdout
    image_pages = [int(line.split()[0]) for line in listing.splitlines()[2:] if line.split()[2] == "image"]
    # a figure cut by a page break would be placed on two pages (drawn twice, clipped)
    assert len(image_pages) == len(numbers) >= n_figures, image_pages
    pages = _page_texts(pdf)
    for number, page_no in zip(numbers, image_pages):
        assert f"Figure {number}." in pages[page_no - 1], f"Figure {number} and its caption are on different pages"
    headings = re.findall(r"<h2>([^<]+)</h2>", page)
    for i, text in enumerate(pages[:-1], start=1):
        lines = [line.strip() for line in text.splitlines() if line.strip()]
        assert lines and lines[-1] not in headings, f"page {i} ends with the heading {lines[-1]!r}"
    # every short table on one page: all its rows on the page of its caption
    for box in boxes:
        if box["kind"] == "table" and box["rows"]:
            number = re.search(rf'<figure class="table" id="{re.escape(box["id"])}">\s*<figcaption><span '
                               r'class="table-number">Table (\d+)', page).group(1)
            home = [t for t in pages if re.search(rf"^\s*Table {number}\s*$", t, re.M)]
            assert len(home) == 1
            body = re.sub(r"<wbr>", "", page.split(f'id="{box["id"]}"')[1].split("</tbody>")[0])
            first_cells = re.findall(r'<tr[^>]*><td data-column="region" class="l">([^<]+)', body)
            if not first_cells:  # a table without a region column: checked in the print layout above only
                continue
            assert len(first_cells) == box["rows"]
            for region in set(first_cells):
                assert home[0].count(region) >= first_cells.count(region), (number, region)
    print(f"printed report: {len(pages)} pages, {n_figures} figures")
