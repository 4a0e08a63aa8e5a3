"""APA number formatting and in-text strings."""


import numpy as np
import pytest

from roikit.errors import UsageError
from roikit.reporting.format import (
    MISSING,
    estimate_decimals,
    format_ci,
    format_df,
    format_number,
    format_p,
    in_text,
    render,
)


@pytest.mark.parametrize(
    "p, expected",
    [
        # APA 7th ed. (2020), 6.36: exact p to three decimals; "p < .001" only below .001
        (0.001, ".001"),
        # APA 7th ed. 6.36: below .001 -> "< .001"
        (0.0005, "< .001"),
        (0.000999999, "< .001"),
        (0.0, "< .001"),
        # rounds half up at the third decimal (common practice, no source): .0015 -> .002
        (0.0015, ".002"),
        (0.0042, ".004"),
        (0.04951, ".050"),
        # p = 1 would print "1.000", which reads as certainty: "> .999" (common practice, no single source)
        (1.0, "> .999"),
        (0.99951, "> .999"),
        (0.9994, ".999"),
        (float("nan"), MISSING),
        (None, MISSING),
    ],
)
def test_format_p(p, expected):
    assert format_p(p) == expected


def test_format_p_prefix_and_style():
    # APA 7th ed. 6.36: no leading zero, italic p
    assert format_p(0.024, prefix=True) == "p = .024"
    assert format_p(0.0001, prefix=True, style="html") == "<i>p</i> < .001"
    assert format_p(0.5, prefix=True, style="latex") == r"\textit{p} = .500"


def test_format_p_rejects_impossible_values():
    with pytest.raises(UsageError, match=r"p-value must lie in \[0, 1\], got 1.5"):
        format_p(1.5)
    with pytest.raises(UsageError, match="got -0.2"):
        format_p(-0.2)
    # floating-point error just above 1 is absorbed
    assert format_p(1 + 1e-12) == "> .999"


@pytest.mark.parametrize(
    "x, kwargs, expected",
    [
        # negative zero never prints (common practice, no source)
        (-0.0, {}, "0.00"),
        (-0.004, {}, "0.00"),
        (-0.005, {}, "-0.01"),
        # half up on the decimal representation: 0.125 -> 0.13, 2.675 -> 2.68 (Python's round gives 2.67)
        (0.125, {}, "0.13"),
        (2.675, {}, "2.68"),
        # APA 7th ed. 6.38: commas in numbers of 1,000 or more
        (123456.789, {}, "123,456.79"),
        (1e12, {}, "1,000,000,000,000.00"),
        (float("inf"), {}, "∞"),
        (-float("inf"), {}, "-∞"),
        (np.float32(0.5), {}, "0.50"),
        # APA 7th ed. 6.36: no leading zero for quantities bounded by 1
        (0.4249, {"leading_zero": False}, ".42"),
        (-0.4251, {"leading_zero": False}, "-.43"),
        (float("nan"), {}, MISSING),
    ],
)
def test_format_number(x, kwargs, expected):
    assert format_number(x, **kwargs) == expected


@pytest.mark.parametrize(
    "df, expected",
    # APA 7th ed. 6.43: integer df as is, fractional (Welch, Satterthwaite) to two decimals
    [(31, "31"), (31.0, "31"), (29.4712, "29.47"), (22.995, "23.00"), (1500, "1,500"), (np.nan, MISSING)],
)
def test_format_df(df, expected):
    assert format_df(df) == expected


def test_format_ci_and_negative_zero_bounds():
    assert format_ci(0.18, 0.9249) == "[0.18, 0.92]"
    assert format_ci(-0.001, 0.5) == "[0.00, 0.50]"
    assert format_ci(np.nan, np.nan) == MISSING


def test_in_text_matches_the_issue_example():
    row = {"statistic_type": "t", "df": 31, "statistic": 3.1249, "p": 0.00375, "effect_size_type": "d_z",
           "effect_size": 0.5512, "effect_size_ci_low": 0.1777, "effect_size_ci_high": 0.9200, "confidence": 0.95}
    # the issue's example string
    assert in_text(row) == "t(31) = 3.12, p = .004, d_z = 0.55, 95% CI [0.18, 0.92]"
    assert in_text(row, style="html") == (
        "<i>t</i>(31) = 3.12, <i>p</i> = .004, <i>d</i><sub>z</sub> = 0.55, 95% CI [0.18, 0.92]")
    assert in_text(row, style="latex").startswith(r"\textit{t}(31) = 3.12, \textit{p} = .004, \textit{d}\textsubscript{z}")


def test_in_text_edge_cases():
    # huge t, p below .001, Welch df, estimate, corrected p
    row = {"design": "two-group", "estimate": -0.41, "ci_low": -0.8, "ci_high": -0.02, "se": 0.19,
           "statistic_type": "t", "df": 27.456, "statistic": 123456.7, "p": 1e-30, "p_holm": 0.0009,
           "confidence": 0.9}
    # STYLE.md example format; Welch df to two decimals; 90% level printed from the confidence column
    assert in_text(row, estimate=True, correction="holm") == (
        "M_diff = -0.41, 90% CI [-0.80, -0.02], t(27.46) = 123,456.70, p < .001, p_Holm < .001")


def test_in_text_f_and_z_rows():
    f_row = {"statistic_type": "F", "df1": 2, "df": 28.0, "statistic": 4.5649, "p": 0.0194,
             "effect_size_type": "partial_eta2", "effect_size": 0.2458}
    # APA 7th ed. 6.43: F(df1, df2); partial eta squared bounded by 1 -> no leading zero
    assert in_text(f_row) == "F(2, 28) = 4.56, p = .019, ηp² = .25".replace("ηp²", "η²_p")
    z_row = {"statistic_type": "z", "df": np.inf, "statistic": -2.3456, "p": 0.019}
    assert in_text(z_row) == "z = -2.35, p = .019"


def test_in_text_leaves_out_missing_parts():
    assert in_text({"statistic_type": "t", "df": 10, "statistic": np.nan, "p": np.nan}) == ""


def test_estimate_decimals_follow_the_se():
    # clamp(-floor(log10(se)), 2, 4) (common practice, no source)
    assert [estimate_decimals({"se": s}) for s in (0.5, 0.08, 0.0021, 1e-7, np.nan)] == [2, 2, 3, 4, 2]


def test_render_escapes_user_text():
    from roikit.reporting.format import escape_markup

    name = "left *hippo*_{x} & <b>"
    assert render(escape_markup(name), "plain") == name
    assert render(escape_markup(name), "html") == "left *hippo*_{x} &amp; &lt;b&gt;"
    assert render(escape_markup(name), "latex") == r"left *hippo*\_\{x\} \& $<$b$>$"
    assert render(escape_markup(name), "markdown") == r"left \*hippo\*\_{x} & \<b>"
    with pytest.raises(UsageError, match="style must be one of"):
        render("x", "rtf")


def test_markdown_has_no_html_tags_and_no_needless_escapes():
    from roikit.reporting.format import render

    # subscripts as "_z" (as STYLE.md writes d_z), superscripts as Unicode where one exists
    assert render("*d*_{z} = 0.49, *η*^{2}_{p}, τ^{2}, route_accuracy", "markdown") == \
        "*d*_z = 0.49, *η*²_p, τ², route_accuracy"
    assert render("hippocampus^{a}", "markdown") == "hippocampusᵃ"
    assert "<sub>" not in render("*M*_{diff}", "markdown") and "\\_" not in render("a_b", "markdown")
