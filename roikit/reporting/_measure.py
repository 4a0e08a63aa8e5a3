"""Text widths for laying out tables: Times metrics (Word) and Computer Modern metrics (LaTeX).

Both come with matplotlib, so widths are the same on every machine: the Adobe Times AFM files (Times New Roman and
Liberation Serif share these advance widths) and the BaKoMa Computer Modern TrueType files (cmr10, cmti10), whose
advances are TeX's own. Widths are in points at the given font size; markup runs (see ``format._parse``) in
italic use the italic face, sub- and superscripts are measured at 70% size.
"""

from __future__ import annotations

import functools
import os

import matplotlib

from .format import _latex_number, _parse

# widths (1/1000 em) of characters the Times AFM files lack; Times-like values (common practice, no source)
_TIMES_EXTRA = {"−": 564, "–": 500, "—": 1000, "η": 500, "τ": 440, "χ": 500, "ω": 650, "μ": 500, "Δ": 612,
                "²": 300, "√": 550, "×": 564, "≥": 549, "≤": 549, "∞": 713, "\u00a0": 250, "±": 564}
# the same for Computer Modern, where these come from the math fonts (cmsy10/cmmi10 advances; from memory)
_TEX_EXTRA = {"−": 778, "<": 778, ">": 778, "–": 500, "—": 1000, "η": 497, "τ": 437, "χ": 626, "ω": 622,
              "μ": 603, "Δ": 833, "²": 350, "√": 833, "×": 778, "≥": 778, "≤": 778, "∞": 1000, "±": 778,
              "~": 778, "\u00a0": 333}
_SCRIPT = 0.7


@functools.cache
def _afm(name: str) -> dict[str, float]:
    """Advance widths (1/1000 em) by character from one of matplotlib's AFM files."""
    path = os.path.join(matplotlib.get_data_path(), "fonts", "afm", name)
    widths: dict[str, float] = {}
    with open(path, encoding="latin-1") as fh:
        for line in fh:
            if not line.startswith("C "):
                continue
            fields = dict(part.strip().split(" ", 1) for part in line.split(";") if part.strip())
            code = int(fields["C"])
            if 32 <= code < 127:
                widths[chr(code)] = float(fields["WX"])
    widths["'"] = widths.get("'", 333.0)
    return widths


@functools.cache
def _tex(name: str) -> dict[str, float]:
    """Advance widths (1/1000 em) of the printable ASCII characters in a Computer Modern font."""
    from matplotlib import ft2font

    font = ft2font.FT2Font(os.path.join(matplotlib.get_data_path(), "fonts", "ttf", name))
    font.set_size(10, 72)
    flags = getattr(getattr(ft2font, "LoadFlags", None), "NO_HINTING", None)
    if flags is None:  # matplotlib < 3.10
        flags = ft2font.LOAD_NO_HINTING
    widths = {}
    for code in range(32, 127):
        try:
            widths[chr(code)] = font.load_char(code, flags=flags).linearHoriAdvance / 65536 * 100
        except (RuntimeError, ValueError):
            continue
    widths[" "] = 333.0  # TeX's interword space in cmr10 (3.33 pt at 10 pt)
    return widths


def _chars(text: str, table: dict[str, float], extra: dict[str, float]) -> float:
    return sum(extra.get(ch) or table.get(ch, 500.0) for ch in text)


def width(markup: str, size: float, *, face: str = "times") -> float:
    """Width in points of ``markup`` set at ``size`` points in ``face`` ("times" or "cm")."""
    upright, italic = (_afm("ptmr8a.afm"), _afm("ptmri8a.afm")) if face == "times" else \
        (_tex("cmr10.ttf"), _tex("cmti10.ttf"))
    total = 0.0
    for content, kind in _parse(markup):
        content = _latex_number(content)
        scale = _SCRIPT if kind in ("sub", "sup") else 1.0
        extra = _TIMES_EXTRA if face == "times" else _TEX_EXTRA
        total += _chars(content, italic if kind == "i" else upright, extra) * scale
    return total * size / 1000.0


def longest_word(markup: str, size: float, *, face: str = "times") -> float:
    """Width in points of the widest space-separated word of ``markup`` (markup kept within each word)."""
    plain_words = [w for w in markup.split(" ") if w]
    return max((width(w, size, face=face) for w in plain_words), default=0.0)
