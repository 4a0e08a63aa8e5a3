"""Corrections across regions against statsmodels.stats.multitest.multipletests."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from roikit.errors import UsageError
from roikit.stats.corrections import adjust, parse_corrections


@pytest.mark.parametrize("ours,theirs", [("holm", "holm"), ("fdr", "fdr_bh"), ("bonferroni", "bonferroni")])
def test_matches_statsmodels(ours, theirs):
    rng = np.random.default_rng(12)
    p = np.concatenate([rng.uniform(size=40) ** 3, [0.01, 0.01, 1.0]])  # with ties
    # statsmodels.stats.multitest.multipletests(method=...)
    expected = multipletests(p, method=theirs)[1]
    np.testing.assert_allclose(adjust(p, ours), expected, rtol=1e-12)


def test_nan_left_out_of_family():
    p = np.array([0.01, np.nan, 0.04, 0.03])
    # statsmodels on the three non-missing p-values
    expected = multipletests(p[~np.isnan(p)], method="holm")[1]
    out = adjust(p, "holm")
    assert np.isnan(out[1])
    np.testing.assert_allclose(out[~np.isnan(p)], expected)


def test_parse():
    assert parse_corrections("holm,fdr") == ("holm", "fdr")
    assert parse_corrections(["bonferroni", "BH"]) == ("bonferroni", "fdr")
    assert parse_corrections("none") == ("none",) and parse_corrections(None) == ()
    assert parse_corrections("fwe,holm") == ("fwe", "holm")  # order kept: the first is the primary
    with pytest.raises(UsageError, match="unknown correction 'sidak'.*fwe .*needs --permutations N"):
        parse_corrections("holm,sidak")
    with pytest.raises(UsageError, match="'none' must come first"):
        parse_corrections("holm,none")
