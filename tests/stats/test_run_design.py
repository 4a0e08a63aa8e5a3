"""run_design: columns, corrections per design and term, option checks, the registry."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.multitest import multipletests

from roikit.errors import UsageError
from roikit.stats import DESIGNS, run_design
from roikit.stats._common import CONTRACT_COLUMNS, COMMON_COLUMNS

from stats_data import participants_table, values_table


@pytest.fixture
def values():
    rng = np.random.default_rng(55)
    return values_table({"novel": rng.normal(0.2, 1, (20, 12)), "familiar": rng.normal(0, 1, (20, 12))})


def test_columns_and_corrections(values):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_design(values, "one-sample", contrast="novel", correct="holm,fdr,bonferroni")
    expected = [c for c in CONTRACT_COLUMNS if c != "p_fwe"]
    assert list(res.columns[: len(expected)]) == expected
    assert set(COMMON_COLUMNS) <= set(res.columns) and "p_bonferroni" in res.columns
    # statsmodels.stats.multitest.multipletests across the 12 regions
    np.testing.assert_allclose(res["p_holm"], multipletests(res["p"], method="holm")[1])
    np.testing.assert_allclose(res["p_fdr"], multipletests(res["p"], method="fdr_bh")[1])
    np.testing.assert_allclose(res["p_bonferroni"], multipletests(res["p"], method="bonferroni")[1])
    assert (res["family_size"] == 12).all() and (res["correction"] == "holm,fdr,bonferroni").all()
    assert (res["population_inference"]).all() and (res["permutations"] == 0).all()
    assert (res["confidence"] == 0.95).all()


def test_glm_family_is_per_term(values):
    parts = participants_table(20)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_design(values, "glm", contrast="novel", formula="value ~ age + site", participants=parts)
    assert list(pd.unique(res["term"])) == ["Intercept", "age", "site[T.b]", "site[T.c]", "site"]
    for _term, rows in res.groupby("term"):
        # statsmodels multipletests within one term
        np.testing.assert_allclose(rows["p_holm"], multipletests(rows["p"], method="holm")[1])
        assert (rows["family_size"] == 12).all()
    f = res[res["term"] == "site"]
    assert (f["statistic_type"] == "F").all() and f["estimate"].isna().all() and (f["df1"] == 2).all()


def test_unknown_design_and_options(values):
    with pytest.raises(UsageError, match="design 'anova' is not available; expected one of: one-sample, paired"):
        run_design(values, "anova", contrast="novel")
    with pytest.raises(UsageError, match="option welch does not apply to design 'one-sample'"):
        run_design(values, "one-sample", contrast="novel", welch=True)
    with pytest.raises(UsageError, match=r"needs versus=\.\.\.; none was given"):
        run_design(values, "paired", contrast="novel")
    from roikit._options import entry_point

    with entry_point("cli"), pytest.raises(UsageError, match="option --welch does not apply"):
        run_design(values, "one-sample", contrast="novel", welch=True)
    with entry_point("cli"), pytest.raises(UsageError, match="needs --versus B; none was given"):
        run_design(values, "paired", contrast="novel")
    with pytest.raises(UsageError, match="confidence must be between 0 and 1"):
        run_design(values, "one-sample", contrast="novel", confidence=95)
    with pytest.raises(UsageError, match="lacks column"):
        run_design(values.drop(columns="n_valid"), "one-sample", contrast="novel")
    assert {"one-sample", "paired", "two-group", "glm"} <= set(DESIGNS)


def test_regions_keep_order_of_first_appearance():
    rng = np.random.default_rng(3)
    regions = ["retrosplenial cortex", "caudate", "left hippocampus"]
    values = values_table({"novel": rng.normal(size=(6, 3))}, regions=regions)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_design(values, "one-sample", contrast="novel")
    assert list(res["region"]) == regions


def test_participants_path_and_string_labels(tmp_path, values):
    from roikit._tables import write_table

    parts = participants_table(20)
    path = write_table(tmp_path / "participants.tsv", parts)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_design(values, "two-group", contrast="novel", group="group", levels=["older", "younger"],
                         participants=path)
    assert (res["term"] == "older - younger").all() and (res["n"] == 20).all()


def test_primary_correction_first_and_fwe_needs_permutations(values):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_design(values, "one-sample", contrast="novel", correct="bonferroni,holm")
        none = run_design(values, "one-sample", contrast="novel", correct="none")
    assert (res["correction"] == "bonferroni,holm").all()  # the first entry is the primary one
    assert (none["correction"] == "none").all() and "p_holm" in none.columns  # contract columns still written
    with pytest.raises(UsageError, match="'fwe'.*needs permutations.*--permutations N"):
        run_design(values, "one-sample", contrast="novel", correct="fwe")
