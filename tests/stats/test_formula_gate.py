"""The formula gate: every entry point parses formulas with roikit's grammar and never evaluates user text."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from roikit.errors import UsageError
from roikit.stats import run_design
from roikit.stats.formula import MAX_TERMS, parse_formula

from stats_data import participants_table, values_table

ROOT = Path(__file__).resolve().parents[2]


def _payloads(marker: Path) -> list[str]:
    """Formulas that would create ``marker`` if any part of them were run as Python."""
    m = str(marker)
    return [
        f"value ~ {{__import__('pathlib').Path('{m}').touch()}}",
        f"value ~ age + {{open('{m}', 'w').write('x')}}",
        f"value ~ np.ctypeslib.ctypes.CDLL(None).system(b'touch {m}')",
        f"value ~ __import__('os').system('touch {m}')",
        f"value ~ I(__import__('os').system('touch {m}'))",
        f"value ~ C(age, __import__('os').system('touch {m}'))",
        f"value ~ `age` + `{{__import__('os').system('touch {m}')}}`",
        f"value ~ age; __import__('os').system('touch {m}')",
    ]


def _random_payloads(marker: Path) -> list[str]:
    m = str(marker)
    return [
        f"1 + {{__import__('pathlib').Path('{m}').touch()}}",
        f"1 + __import__('os').system('touch {m}')",
        f"0 + I(open('{m}', 'w'))",
    ]


@pytest.fixture
def data():
    rng = np.random.default_rng(4)
    n = 12
    parts = participants_table(n, seed=2)
    parts["load"] = rng.uniform(1, 5, n)
    novel = rng.normal(0.5, 1, (n, 2))
    familiar = rng.normal(0.0, 1, (n, 2))
    values = values_table({"novel": novel, "familiar": familiar})
    values["variance"] = 0.2
    return values, parts


# ---------------------------------------------------------------------------------------------- the grammar
@pytest.mark.parametrize("text, rhs", [
    ("value ~ age + group", "1 + age + group"),
    ("value ~ age * group", "1 + age + group + age:group"),
    ("value ~ (age + group + site)**2", "1 + age + group + site + age:group + age:site + group:site"),
    ("value ~ (age + group)**8", "1 + age + group + age:group"),
    ("value ~ site / age", "1 + site + site:age"),
    ("value ~ 0 + age", "0 + age"),
    ("value ~ -1 + age", "0 + age"),
    ("value ~ age - 1", "0 + age"),
    ("value ~ age*group - age:group", "1 + age + group"),
    ("value ~ C(site) + log(age) + `my col`", "1 + C(site) + log(age) + `my col`"),
    ("~ 1", "1"),
    ("1 + contrast", "1 + contrast"),
])
def test_grammar_expands_like_wilkinson_formulas(text, rhs):
    # expected expansions: Wilkinson & Rogers (1973) notation as documented by patsy/formulaic ("common practice")
    assert parse_formula(text).rhs == rhs


@pytest.mark.parametrize("text, message", [
    ("value ~ (age + group + site + sex + handedness + fd)**1000000000", "power 1000000000 is out of range"),
    ("value ~ a*b*c*d*e*f*g*h*i*j", f"more than {MAX_TERMS} terms"),
    ("value ~ 0", "the model has no terms"),
    ("value ~ 1 - 1", "the model has no terms"),
    ("value ~ age + 2", "the number 2 is not a term"),
    ("value ~ (age + group)**x", "'**' must be followed by a whole number"),
    ("value ~ log(center(age))", "takes one column name"),
    ("value ~ C(site, Sum)", "token ','"),
    ("value ~ 'age'", "token \"'\""),
    ("value ~ age +", "ends too early"),
    ("value ~ )age(", "unbalanced ')'"),
])
def test_grammar_refusals(text, message):
    start = time.process_time()
    with pytest.raises(UsageError, match=None) as info:
        parse_formula(text)
    assert message in str(info.value)
    assert repr(text) in str(info.value)
    # the huge power is refused before any expansion (a bound on work done, not a timing of the machine)
    assert time.process_time() - start < 5


def test_unknown_columns_are_named():
    with pytest.raises(UsageError, match="'agee' is not a column .*did you mean 'age'"):
        parse_formula("value ~ agee", columns=["age", "group"])


# ---------------------------------------------------------------------------------------------- designs
@pytest.mark.parametrize("transform", ["log(load)", "center(load)", "scale(load)", "standardize(load)", "C(site)"])
@pytest.mark.parametrize("design", ["glm", "precision-weighted", "mixed"])
def test_every_transform_works_in_every_design(data, design, transform):
    values, parts = data
    options = {"contrast": "novel"} if design != "mixed" else {"contrast": "novel,familiar"}
    formula = f"value ~ {transform}" if design != "mixed" else f"value ~ contrast + {transform}"
    res = run_design(values, design, formula=formula, participants=parts, **options)
    assert res["estimate"].notna().any()
    terms = set(res["term"])
    if transform != "C(site)" or design == "mixed":  # mixed tests a multi-column term jointly, named by the term
        assert transform in terms, terms
    else:
        assert {"C(site)[T.b]", "C(site)[T.c]"} <= terms, terms


def test_glm_transforms_match_statsmodels(data):
    values, parts = data
    res = run_design(values, "glm", contrast="novel", formula="value ~ log(load) + C(site)", participants=parts,
                     center=False)
    y = values[(values["contrast"] == "novel") & (values["region"] == values["region"].iloc[0])]
    frame = y.merge(parts, on="participant_id")
    frame["log_load"] = np.log(frame["load"])
    # reference: statsmodels OLS with numpy's log and treatment coding (statsmodels.formula.api.ols)
    ref = smf.ols("value ~ log_load + C(site)", frame).fit()
    got = res[res["region"] == y["region"].iloc[0]].set_index("term")
    assert got.loc["log(load)", "estimate"] == pytest.approx(ref.params["log_load"], rel=1e-10)
    level = [k for k in ref.bse.index if k.startswith("C(site)")][0]
    assert got.loc[level, "se"] == pytest.approx(ref.bse[level], rel=1e-10)
    assert got.loc["Intercept", "estimate"] == pytest.approx(ref.params["Intercept"], rel=1e-10)


def test_scale_is_the_z_score_and_log_refuses_non_positive_values(data):
    values, parts = data
    a = run_design(values, "glm", contrast="novel", formula="value ~ scale(load)", participants=parts)
    b = run_design(values, "glm", contrast="novel", formula="value ~ load", participants=parts)
    # a slope per SD is the raw slope times the SD (n - 1 in the SD; common practice, no source)
    sd = parts["load"].std(ddof=1)
    assert a[a["term"] == "scale(load)"]["estimate"].to_numpy() == pytest.approx(
        b[b["term"] == "load"]["estimate"].to_numpy() * sd)
    parts = parts.assign(load=parts["load"] - 3)
    with pytest.raises(Exception, match=r"log\(load\) needs values > 0"):
        run_design(values, "glm", contrast="novel", formula="value ~ log(load)", participants=parts)


def test_value_tilde_zero_is_a_usage_error(data):
    values, parts = data
    for design in ("glm", "precision-weighted", "mixed"):
        with pytest.raises(UsageError, match="no terms"):
            run_design(values, design, contrast="novel", formula="value ~ 0", participants=parts)


def test_huge_power_refused_quickly_in_run_design(data):
    values, parts = data
    with pytest.raises(UsageError, match="out of range"):
        run_design(values, "glm", contrast="novel", participants=parts,
                   formula="value ~ (age + group + site + load)**1000000000")


# ---------------------------------------------------------------------------------------------- payloads
@pytest.mark.parametrize("design", ["glm", "precision-weighted", "mixed"])
def test_payloads_never_run_through_run_design(data, tmp_path, design):
    values, parts = data
    marker = tmp_path / "ran"
    for payload in _payloads(marker):
        with pytest.raises(UsageError):
            run_design(values, design, contrast="novel", formula=payload, participants=parts)
        assert not marker.exists(), payload
    if design == "mixed":
        for payload in _random_payloads(marker):
            with pytest.raises(UsageError):
                run_design(values, "mixed", contrast="novel", formula="value ~ 1", random=payload,
                           participants=parts)
            assert not marker.exists(), payload
        with pytest.raises(UsageError):
            run_design(values, "mixed", contrast="novel", formula="value ~ 1", crossed=["region"],
                       participants=parts)


def test_payloads_never_run_through_the_command_line(data, tmp_path):
    values, parts = data
    values.to_csv(tmp_path / "values.tsv", sep="\t", index=False)
    parts.to_csv(tmp_path / "participants.tsv", sep="\t", index=False)
    marker = tmp_path / "ran"
    cases = [["--design", d, "--contrast", "novel", "--formula", p]
             for d in ("glm", "precision-weighted", "mixed") for p in _payloads(marker)[:4]]
    cases += [["--design", "mixed", "--formula", "value ~ contrast", "--random", p] for p in _random_payloads(marker)]
    cases += [["--design", "mixed", "--formula", "value ~ contrast",
               "--crossed", f"__import__('os').system('touch {marker}')"]]
    for args in cases:
        proc = subprocess.run(
            [sys.executable, "-m", "roikit", "stats", str(tmp_path / "values.tsv"), *args,
             "--participants", str(tmp_path / "participants.tsv"), "--out", str(tmp_path / "out.tsv")],
            capture_output=True, text=True, cwd=tmp_path, env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"},
        )
        assert not marker.exists(), args
        assert proc.returncode == 2, (args, proc.stderr)
        assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr, proc.stderr


def test_term_names_match_the_formula_library_conventions(data):
    values, parts = data
    res = run_design(values, "glm", contrast="novel", formula="value ~ age * group", participants=parts)
    assert list(pd.unique(res["term"]))[:4] == ["Intercept", "age", "group[T.younger]", "age:group[T.younger]"]


def test_any_column_name_is_data_not_code(data):
    values, parts = data
    parts = parts.rename(columns={"age": "age (years)", "load": "lambda"})
    parts["site"] = parts["site"].map({"a": "{__import__('os')}", "b": "x:y", "c": "C(z)"})
    res = run_design(values, "glm", contrast="novel", formula="value ~ `age (years)` + lambda + site",
                     participants=parts)
    terms = set(res["term"])
    assert {"age (years)", "lambda"} <= terms
    assert any(t.startswith("site[T.") for t in terms), terms
    assert {t for t in terms if t.startswith("site[T.")} <= {"site[T.x:y]", "site[T.{__import__('os')}]",
                                                              "site[T.C(z)]"}
