"""Render report.html in headless Chromium (Debian package): the page is drawn and its figures decode.

Needs /usr/bin/chromium (``apt-get install chromium``). Without it the test fails with a clear message, unless
ROIKIT_SKIP_BROWSER=1 is set.
"""

import os
import re
import shutil
import subprocess
import warnings

import pandas as pd
import pytest
from matplotlib.image import imread

from roikit.errors import CautionWarning
from roikit.reporting import write_report

pytestmark = pytest.mark.browser

_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
          "--disable-background-networking", "--disable-component-update", "--disable-sync",
          "--force-device-scale-factor=1", "--hide-scrollbars"]

# records each image's decoded (natural) size and position once the page has loaded
_PROBE = """<script>
window.addEventListener("load", function () {
  document.querySelectorAll("img").forEach(function (img) {
    var r = img.getBoundingClientRect();
    img.setAttribute("data-natural", img.naturalWidth + "x" + img.naturalHeight);
    img.setAttribute("data-box", [r.left, r.top + window.scrollY, r.width, r.height].map(Math.round).join(","));
  });
  document.body.setAttribute("data-probed", "yes");
});
</script>"""


def _chromium() -> str:
    path = shutil.which("chromium") or shutil.which("chromium-browser")
    if path is None:
        if os.environ.get("ROIKIT_SKIP_BROWSER") == "1":
            pytest.skip("ROIKIT_SKIP_BROWSER=1: headless browser check skipped on request")
        pytest.fail("headless Chromium not found: install it (Debian: apt-get install -y chromium) or set "
                    "ROIKIT_SKIP_BROWSER=1 to skip this check explicitly")
    return path


def _run(browser, args, tmp_path, timeout=90):
    profile = tmp_path / "profile"
    cmd = [browser, *_FLAGS, f"--user-data-dir={profile}", *args]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout


@pytest.fixture(scope="module")
def report(tmp_path_factory, values, results_by_design, participants):
    out = tmp_path_factory.mktemp("browser") / "report"
    results = pd.concat([results_by_design["paired"]], ignore_index=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CautionWarning)
        write_report(values, results, participants=participants, out=out, figure_formats=("png",))
    return out / "report.html"


def test_report_renders_with_figures(report, tmp_path):
    browser = _chromium()
    # 1) the DOM after load: every embedded image decoded at its PNG size
    probe = tmp_path / "probe.html"
    probe.write_text(report.read_text(encoding="utf-8").replace("</body>", _PROBE + "</body>"), encoding="utf-8")
    dom = _run(browser, ["--virtual-time-budget=5000", "--window-size=1200,4000", "--dump-dom", probe.as_uri()],
               tmp_path)
    assert 'data-probed="yes"' in dom, "the page did not finish loading"
    naturals = re.findall(r'data-natural="(\d+)x(\d+)"', dom)
    boxes = [tuple(map(int, b.split(","))) for b in re.findall(r'data-box="([-\d,]+)"', dom)]
    assert len(naturals) == 2 and len(boxes) == 2
    # the figures are 180 mm (participants) and 120 mm (forest plot) wide at 300 dpi: 2126 and 1417 px once decoded
    assert sorted(int(w) for w, _ in naturals) == pytest.approx([1417, 2126], abs=3)
    # 2) the screenshot of the real report: not blank, and the figure areas are drawn
    shot = tmp_path / "shot.png"
    _run(browser, ["--window-size=1200,4000", f"--screenshot={shot}", report.as_uri()], tmp_path)
    pixels = imread(shot)[..., :3]
    ink = (pixels < 0.9).any(axis=2)
    assert ink.mean() > 0.02, "the screenshot is (almost) blank"
    height = pixels.shape[0]
    drawn = 0
    for left, top, width, box_height in boxes:
        assert width > 300 and box_height > 100
        if top + box_height <= height:
            region = ink[top:top + box_height, left:left + width]
            # a plot has axes, points and text: well above the ink of an empty box, but not solid
            assert 0.03 < region.mean() < 0.6, (top, region.mean())
            drawn += 1
    assert drawn >= 1, f"no figure inside the {height}-px screenshot (boxes {boxes})"
