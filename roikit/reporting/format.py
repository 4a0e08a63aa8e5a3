"""APA-style number formatting and in-text strings (the only place where numbers are rounded).

Conventions (American Psychological Association, 2020, *Publication Manual*, 7th ed., sections 6.36 and
6.43-6.46): italic Latin symbols (*t*, *F*, *p*, *d*, *M*, *SD*, *SE*, *b*, *n*), no leading zero for
quantities that cannot exceed 1 (*p*, *r*, eta squared), two decimals for most statistics, exact *p* to three
decimals and ``p < .001`` below that, degrees of freedom in parentheses (two decimals when fractional), a
confidence interval in square brackets after the estimate it belongs to, commas in numbers of 1,000 or more.

Rounding is "half up" on the shortest decimal representation of the number (``0.125 -> 0.13``,
``2.675 -> 2.68``), as a reader would round the printed value; a result that rounds to zero loses its sign
(no ``-0.00``).

Rich text (italics, subscripts, superscripts) is written in a tiny markup that every output format renders:
``*t*`` italic, ``_{z}`` subscript, ``^{2}`` superscript, ``\\`` escapes the next character. Use
:func:`render` to turn it into plain text, Markdown, HTML or LaTeX.

Examples
--------
>>> format_p(0.0042)
'.004'
>>> format_p(0.0004, prefix=True)
'p < .001'
>>> in_text({"statistic_type": "t", "df": 31, "statistic": 3.1249, "p": 0.0038,
...          "effect_size_type": "d_z", "effect_size": 0.5524, "effect_size_ci_low": 0.18,
...          "effect_size_ci_high": 0.9249, "confidence": 0.95})
't(31) = 3.12, p = .004, d_z = 0.55, 95% CI [0.18, 0.92]'
"""

from __future__ import annotations

import html as _html
import math
import re
import unicodedata
from decimal import ROUND_HALF_UP, Decimal
from typing import Any, Literal, Mapping

import numpy as np

from ..errors import UsageError

__all__ = [
    "Style",
    "MISSING",
    "format_number",
    "format_p",
    "format_df",
    "format_ci",
    "format_percent",
    "format_confidence",
    "effect_symbol",
    "estimate_symbol",
    "statistic_symbol",
    "corrected_p_symbol",
    "correction_name",
    "CORRECTION_CHOICES",
    "in_text",
    "estimate_decimals",
    "render",
    "escape_markup",
    "is_missing",
    "BOUNDED_EFFECTS",
]

Style = Literal["plain", "markdown", "html", "latex"]

#: What a missing or not-applicable number prints as in tables (APA uses a dash for empty cells).
MISSING = "—"

#: Effect sizes that cannot exceed 1 in absolute value: printed without a leading zero (APA 6.36).
BOUNDED_EFFECTS = frozenset({"partial_eta2", "eta2", "omega2", "r", "r2", "icc", "rho"})

# markup for effect-size, statistic and estimate symbols
_EFFECT_MARKUP = {
    "d": "*d*",
    "d_z": "*d*_{z}",
    "d_av": "*d*_{av}",
    "g": "*g*",
    "g_z": "*g*_{z}",
    "d_total": "*d*_{total}",
    "d_wkj": "*d*_{WKJ}",
    "partial_eta2": "*η*^{2}_{p}",
    "eta2": "*η*^{2}",
    "omega2": "*ω*^{2}",
    "r": "*r*",
    "r2": "*R*^{2}",
    "icc": "ICC",
}
_STAT_MARKUP = {"t": "*t*", "z": "*z*", "F": "*F*", "chi2": "*χ*^{2}"}
_CORRECTION_NAMES = {"holm": "Holm", "fdr": "FDR", "fwe": "FWE", "bonferroni": "Bonferroni"}
#: Corrections a report can name as its primary one.
CORRECTION_CHOICES = ("holm", "fdr", "bonferroni", "fwe", "none")
_CORRECTION_LONG = {"holm": "Holm", "fdr": "Benjamini–Hochberg false discovery rate", "bonferroni": "Bonferroni",
                    "fwe": "permutation family-wise error", "none": "no"}


def correction_name(method: str, *, long: bool = False) -> str:
    """Name of a correction as a reader knows it: ``holm -> Holm``; ``long`` spells FDR and FWE out."""
    key = str(method)
    if key == "permutation-fwe":
        key = "fwe"
    if long:
        return _CORRECTION_LONG.get(key, key)
    return _CORRECTION_NAMES.get(key, "uncorrected" if key == "none" else key)


def is_missing(x: Any) -> bool:
    """True for None, NaN, pandas NA and empty strings."""
    if x is None:
        return True
    if isinstance(x, str):
        return x.strip() in ("", "n/a", "nan", "NaN")
    try:
        return bool(np.isnan(x))
    except (TypeError, ValueError):
        return x is getattr(__import__("pandas"), "NA")


def _to_float(x: Any, name: str) -> float:
    try:
        return float(x)
    except (TypeError, ValueError):
        raise UsageError(f"{name} must be a number, got {x!r}; check the results table column") from None


def _round_half_up(x: float, decimals: int) -> Decimal:
    quantum = Decimal(1).scaleb(-decimals)
    return Decimal(repr(float(x))).quantize(quantum, rounding=ROUND_HALF_UP)


def format_number(
    x: Any,
    decimals: int = 2,
    *,
    leading_zero: bool = True,
    thousands: bool = True,
    missing: str = MISSING,
) -> str:
    """Round ``x`` half up to ``decimals`` places and print it APA style.

    Parameters
    ----------
    x : float
        The number; None/NaN prints as ``missing``, infinities as ``∞``/``-∞``.
    decimals : int
        Places after the decimal point.
    leading_zero : bool
        False for quantities bounded by 1 (``.42`` instead of ``0.42``).
    thousands : bool
        Group thousands with commas (``12,345.67``).
    missing : str
        Text for a missing number.

    Returns
    -------
    str
        ASCII hyphen-minus for negative numbers; never ``-0.00``.

    Examples
    --------
    >>> format_number(-0.0004)
    '0.00'
    >>> format_number(0.425, leading_zero=False)
    '.43'
    """
    if is_missing(x):
        return missing
    value = _to_float(x, "value")
    if math.isinf(value):
        return "∞" if value > 0 else "-∞"
    rounded = _round_half_up(value, decimals)
    if rounded == 0:
        rounded = abs(rounded)  # no negative zero
    text = f"{rounded:,.{decimals}f}" if thousands else f"{rounded:.{decimals}f}"
    if not leading_zero:
        if text.startswith("0."):
            text = text[1:]
        elif text.startswith("-0."):
            text = "-" + text[2:]
    return text


def format_percent(x: Any, decimals: int = 1, *, missing: str = MISSING) -> str:
    """A percentage already on the 0-100 scale: ``42.1%``."""
    if is_missing(x):
        return missing
    return format_number(x, decimals) + "%"


def format_p(p: Any, *, decimals: int = 3, prefix: bool = False, style: Style = "plain", symbol: str = "*p*",
             missing: str = MISSING) -> str:
    """Format a p-value APA style: ``.004``, ``< .001``, ``> .999``.

    Parameters
    ----------
    p : float
        A probability in [0, 1] (a tolerance of 1e-9 above 1 absorbs floating-point error).
    decimals : int
        Exact p is printed with this many decimals; below ``10**-decimals`` it prints ``< .001``.
    prefix : bool
        Include the symbol and relation: ``p = .004``, ``p < .001``.
    style : {"plain", "markdown", "html", "latex"}
        How the italic symbol is written when ``prefix`` is true.
    symbol : str
        Symbol in markup (e.g. ``*p*_{Holm}``).

    Returns
    -------
    str

    Notes
    -----
    A p that rounds to 1 prints ``> .999`` (a rounded "1.000" would read as certainty; common practice in
    APA formatting tools, no single source). ``p = .001`` exactly prints ``.001`` (APA 7th ed., 6.36: report
    exact values to three decimals, ``< .001`` only below .001).
    """
    if is_missing(p):
        return missing
    value = _to_float(p, "p")
    if not (-1e-12 <= value <= 1 + 1e-9):
        raise UsageError(f"p-value must lie in [0, 1], got {value!r}; check the p columns of the results table")
    value = min(max(value, 0.0), 1.0)
    threshold = 10.0 ** (-decimals)
    if value < threshold:
        relation, number = "<", format_number(threshold, decimals, leading_zero=False)
    else:
        rounded = _round_half_up(value, decimals)
        if rounded >= 1:
            relation, number = ">", format_number(1 - threshold, decimals, leading_zero=False)
        else:
            relation, number = "=", format_number(value, decimals, leading_zero=False)
    if not prefix:
        return number if relation == "=" else f"{relation} {number}"
    return f"{render(symbol, style)} {relation} {number}"


def format_df(df: Any, *, missing: str = MISSING) -> str:
    """Degrees of freedom: an integer as is (``31``), a fractional value to two decimals (``29.47``)."""
    if is_missing(df):
        return missing
    value = _to_float(df, "df")
    if math.isinf(value):
        return "∞"
    if abs(value - round(value)) < 1e-9:
        return f"{int(round(value)):,}"
    return format_number(value, 2)


def format_ci(low: Any, high: Any, decimals: int = 2, *, leading_zero: bool = True, missing: str = MISSING) -> str:
    """A confidence interval in square brackets: ``[0.18, 0.92]``."""
    if is_missing(low) and is_missing(high):
        return missing
    lo = format_number(low, decimals, leading_zero=leading_zero, missing="n/a")
    hi = format_number(high, decimals, leading_zero=leading_zero, missing="n/a")
    return f"[{lo}, {hi}]"


def format_confidence(confidence: Any) -> str:
    """``0.95 -> '95%'``; missing -> ``95%`` (roikit's default level)."""
    if is_missing(confidence):
        confidence = 0.95
    value = _to_float(confidence, "confidence")
    return f"{value * 100:g}%"


# --------------------------------------------------------------------------------------------- symbols
def effect_symbol(effect_size_type: Any) -> str:
    """Markup symbol of an effect size type (``d_z -> *d*_{z}``); unknown types are escaped as is."""
    if is_missing(effect_size_type):
        return "effect size"
    key = str(effect_size_type)
    return _EFFECT_MARKUP.get(key, escape_markup(key))


def statistic_symbol(statistic_type: Any) -> str:
    """Markup symbol of a test statistic (``t -> *t*``)."""
    key = "" if is_missing(statistic_type) else str(statistic_type)
    return _STAT_MARKUP.get(key, escape_markup(key) or "statistic")


def corrected_p_symbol(method: str) -> str:
    """Markup symbol of an adjusted p (``holm -> *p*_{Holm}``)."""
    return "*p*_{" + escape_markup(_CORRECTION_NAMES.get(method, method)) + "}"


def estimate_symbol(design: Any, term: Any = None) -> str:
    """Markup symbol of a design's estimate: *M* (a mean), *M*_{diff} (a difference of means), *b* (a coefficient)."""
    design = "" if is_missing(design) else str(design)
    term = "" if is_missing(term) else str(term)
    if design in ("one-sample", "fixed-effects") or (design == "precision-weighted" and term in ("mean", "")):
        return "*M*"
    if design in ("paired", "two-group", "region-difference"):
        return "*M*_{diff}"
    if design == "repeated-measures" and ": " in term and " - " in term:  # a post-hoc pair, "route: novel - familiar"
        return "*M*_{diff}"
    return "*b*"


# --------------------------------------------------------------------------------------------- markup
_SPECIAL = re.compile(r"([\\*_^])")


def escape_markup(text: str) -> str:
    """Escape user text (region names, contrasts) so it renders literally."""
    return _SPECIAL.sub(r"\\\1", str(text))


def _parse(markup: str) -> list[tuple[str, str]]:
    """Split markup into (text, kind) runs; kind in {"", "i", "sub", "sup", "i+sub", ...}."""
    runs: list[tuple[str, str]] = []
    italic = False
    i, n = 0, len(markup)
    buf: list[str] = []

    def flush(kind: str):
        if buf:
            runs.append(("".join(buf), kind))
            buf.clear()

    while i < n:
        ch = markup[i]
        if ch == "\\" and i + 1 < n:
            buf.append(markup[i + 1])
            i += 2
        elif ch == "*":
            flush("i" if italic else "")
            italic = not italic
            i += 1
        elif ch in "_^" and i + 1 < n and markup[i + 1] == "{":
            flush("i" if italic else "")
            end = markup.find("}", i + 2)
            if end < 0:
                raise UsageError(f"unclosed {ch}{{ in markup {markup!r}")
            inner = re.sub(r"\\(.)", r"\1", markup[i + 2:end])
            runs.append((inner, "sub" if ch == "_" else "sup"))
            i = end + 1
        else:
            buf.append(ch)
            i += 1
    flush("i" if italic else "")
    return runs


_LATEX_ESCAPES = {
    "\\": r"$\backslash$", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_",
    "{": r"\{", "}": r"\}", "~": r"$\sim$", "^": r"\^{}", "|": r"$|$",
    "η": r"$\eta$", "ω": r"$\omega$", "χ": r"$\chi$", "τ": r"$\tau$", "μ": r"$\mu$", "²": r"\textsuperscript{2}",
    "−": r"$-$", "–": "--", "—": "---", "∞": r"$\infty$", "×": r"$\times$", "≥": r"$\geq$", "≤": r"$\leq$",
    "<": r"$<$", ">": r"$>$", "Δ": r"$\Delta$", "√": r"$\surd$", "±": r"$\pm$", "≈": r"$\approx$",
    "·": r"$\cdot$", "…": r"\dots{}", "\u00a0": "~", "‘": "`", "’": "'", "“": "``", "”": "''", "°": r"$^{\circ}$",
    "α": r"$\alpha$", "β": r"$\beta$", "γ": r"$\gamma$", "δ": r"$\delta$", "ε": r"$\varepsilon$",
    "θ": r"$\theta$", "λ": r"$\lambda$", "π": r"$\pi$", "ρ": r"$\rho$", "σ": r"$\sigma$", "φ": r"$\phi$",
    "ψ": r"$\psi$", "Σ": r"$\Sigma$", "³": r"\textsuperscript{3}", "¹": r"\textsuperscript{1}",
    "ß": r"{\ss}", "æ": r"{\ae}", "ø": r"{\o}", "å": r"{\aa}", "Æ": r"{\AE}", "Ø": r"{\O}", "Å": r"{\AA}",
}
# accents LaTeX writes with a command in its default (OT1) encoding: combining character -> command
_LATEX_ACCENTS = {"\u0301": "'", "\u0300": "`", "\u0302": "^", "\u0308": '"', "\u0303": "~", "\u0304": "=",
                  "\u0327": "c", "\u030c": "v", "\u0306": "u", "\u030a": "r", "\u030b": "H"}


_MD_SPECIAL = re.compile(r"([\\*`|]|<(?=[A-Za-z/!?])|(?<!\w)_|_(?!\w))")
_SUPERSCRIPT_FROM, _SUPERSCRIPT_TO = "0123456789+-()nabcdefghij", "⁰¹²³⁴⁵⁶⁷⁸⁹⁺⁻⁽⁾ⁿᵃᵇᶜᵈᵉᶠᵍʰⁱʲ"
_SUPERSCRIPTS = str.maketrans(_SUPERSCRIPT_FROM, _SUPERSCRIPT_TO)


def _latex_char(ch: str) -> str:
    if ch in _LATEX_ESCAPES:
        return _LATEX_ESCAPES[ch]
    if ch.isascii():
        return ch
    # a letter with an accent -> the accent command; anything else -> its closest ASCII, or "?" (no declaration
    # needed in any document: the tables compile with pdflatex in the default encoding)
    parts = unicodedata.normalize("NFD", ch)
    if len(parts) == 2 and parts[0].isascii() and parts[1] in _LATEX_ACCENTS:
        accent = _LATEX_ACCENTS[parts[1]]
        return f"\\{accent}{{{parts[0]}}}" if accent.isalpha() else f"{{\\{accent}{parts[0]}}}"
    ascii_ = unicodedata.normalize("NFKD", ch).encode("ascii", "ignore").decode("ascii")
    return latex_escape(ascii_) if ascii_ else "?"


def latex_escape(text: str) -> str:
    """Escape plain text for LaTeX: special characters, Greek letters, dashes, accents; ASCII output only."""
    return "".join(_latex_char(ch) for ch in str(text))


def _latex_number(text: str) -> str:
    # a leading hyphen-minus of a number becomes a math minus
    return re.sub(r"(?<![\w.])-(?=[\d.∞])", "−", text)


def render(markup: str, style: Style = "plain", *, numbers: bool = True) -> str:
    """Render markup as plain text, Markdown, HTML or LaTeX.

    Parameters
    ----------
    markup : str
        Text in roikit's markup (``*t*``, ``_{z}``, ``^{2}``, ``\\`` escapes).
    style : {"plain", "markdown", "html", "latex"}
        Output format. Plain writes subscripts as ``_z`` and a superscript 2 as ``²``.
    numbers : bool
        In HTML and LaTeX, write the minus sign of negative numbers as a true minus (U+2212 / ``$-$``).
    """
    out: list[str] = []
    for text, kind in _parse(markup):
        if style == "plain":
            if kind == "sub":
                out.append("_" + text)
            elif kind == "sup":
                out.append("²" if text == "2" else "^" + text)
            else:
                out.append(text)
        elif style == "markdown":
            # no HTML tags in Markdown: subscripts as "_z" (d_z, as APA manuscripts typed in plain text write
            # them), superscripts as Unicode where one exists (τ²); an underscore inside a word is never escaped
            # (CommonMark never reads it as emphasis)
            if kind == "sub":
                out.append("_" + text)
            elif kind == "sup":
                whole = all(ch in _SUPERSCRIPT_FROM for ch in text)
                out.append(text.translate(_SUPERSCRIPTS) if whole else f"^{text}^")  # pandoc's superscript
            else:
                esc = _MD_SPECIAL.sub(r"\\\g<0>", text)
                out.append(f"*{esc}*" if kind == "i" else esc)
        elif style == "html":
            if numbers:
                text = _latex_number(text)
            esc = _html.escape(text, quote=False)
            out.append({"i": f"<i>{esc}</i>", "sub": f"<sub>{esc}</sub>", "sup": f"<sup>{esc}</sup>"}.get(kind, esc))
        elif style == "latex":
            if numbers:
                text = _latex_number(text)
            esc = latex_escape(text)
            out.append({"i": f"\\textit{{{esc}}}", "sub": f"\\textsubscript{{{esc}}}",
                        "sup": f"\\textsuperscript{{{esc}}}"}.get(kind, esc))
        else:
            raise UsageError(f"style must be one of plain, markdown, html, latex; got {style!r}")
    return "".join(out)


def estimate_decimals(row) -> int:
    """Decimals of an estimate and its CI: enough to show the SE's first digit, between 2 and 4.

    ``clamp(-floor(log10(se)), 2, 4)`` (common practice, no source): se = 0.08 -> 2, se = 0.0021 -> 3.
    """
    se = row.get("se") if hasattr(row, "get") else None
    se = float("nan") if is_missing(se) else float(se)
    if not np.isfinite(se) or se <= 0:
        return 2
    return int(min(4, max(2, -np.floor(np.log10(se)))))



# --------------------------------------------------------------------------------------------- in-text
def _get(row: Mapping[str, Any], key: str) -> Any:
    try:
        value = row[key]
    except (KeyError, IndexError):
        return None
    return None if is_missing(value) else value


def _p_clause(p: Any) -> str:
    text = format_p(p)
    return text if text[0] in "<>" else "= " + text


def in_text(
    row: Mapping[str, Any],
    *,
    style: Style | Literal["markup"] = "plain",
    estimate: bool = False,
    correction: str | None = None,
    decimals: int = 2,
) -> str:
    """The APA in-text string of one result row.

    Parameters
    ----------
    row : mapping or Series
        One row of a group results table (``statistic_type``, ``statistic``, ``df``, [``df1``], ``p``,
        ``effect_size``, ``effect_size_type``, ``effect_size_ci_low/high``, ``confidence``; with
        ``estimate=True`` also ``design``, ``estimate``, ``ci_low``, ``ci_high``).
    style : {"plain", "markdown", "html", "latex", "markup"}
        Output format of the italic symbols (``markup``: roikit's markup, unrendered).
    estimate : bool
        Start with the estimate and its interval (``M = 0.42, 95% CI [0.20, 0.64], ...``).
    correction : str, optional
        Also give this adjusted p (``holm``, ``fdr``, ``fwe``), read from column ``p_<correction>``.
    decimals : int
        Decimals of statistics, estimates and effect sizes.

    Returns
    -------
    str
        E.g. ``t(31) = 3.12, p = .004, d_z = 0.55, 95% CI [0.18, 0.92]``; parts whose numbers are missing
        are left out.

    Examples
    --------
    >>> in_text({"statistic_type": "F", "df1": 2, "df": 28, "statistic": 4.561, "p": 0.019})
    'F(2, 28) = 4.56, p = .019'
    """
    parts: list[str] = []
    level = format_confidence(_get(row, "confidence"))
    if estimate and _get(row, "estimate") is not None:
        dec = max(decimals, estimate_decimals(row))
        text = f"{estimate_symbol(_get(row, 'design'), _get(row, 'term'))} = {format_number(row['estimate'], dec)}"
        if _get(row, "ci_low") is not None:
            text += f", {level} CI {format_ci(row['ci_low'], row['ci_high'], dec)}"
        parts.append(text)
    stat_type = _get(row, "statistic_type")
    statistic = _get(row, "statistic")
    if statistic is not None:
        symbol = statistic_symbol(stat_type)
        df = _get(row, "df")
        df1 = _get(row, "df1")
        if stat_type == "F" and df1 is not None and df is not None:
            dftext = f"({format_df(df1)}, {format_df(df)})"
        elif df is not None and stat_type != "z":
            dftext = f"({format_df(df)})"
        else:
            dftext = ""
        parts.append(f"{symbol}{dftext} = {format_number(statistic, decimals)}")
    if _get(row, "p") is not None:
        parts.append("*p* " + _p_clause(row["p"]))
    if correction:
        adjusted = _get(row, f"p_{correction}")
        if adjusted is not None:
            parts.append(corrected_p_symbol(correction) + " " + _p_clause(adjusted))
    effect = _get(row, "effect_size")
    if effect is not None:
        etype = _get(row, "effect_size_type")
        bounded = str(etype) in BOUNDED_EFFECTS
        text = f"{effect_symbol(etype)} = {format_number(effect, decimals, leading_zero=not bounded)}"
        if _get(row, "effect_size_ci_low") is not None and _get(row, "effect_size_ci_high") is not None:
            ci = format_ci(row["effect_size_ci_low"], row["effect_size_ci_high"], decimals, leading_zero=not bounded)
            text += f", {level} CI {ci}"
        parts.append(text)
    joined = ", ".join(parts)
    return joined if style == "markup" else render(joined, style)
