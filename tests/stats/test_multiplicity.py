"""Holm, Benjamini-Hochberg and Benjamini-Yekutieli adjusted p-values."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.multitest import multipletests

from qcfit.errors import InvalidArgumentError
from qcfit.stats import adjust_pvalues

# Benjamini & Hochberg (1995), JRSS-B 57:289-300, sec. 4 example: 15 p-values (the same
# list is in statsmodels' own tests, statsmodels/stats/tests/test_multi.py::test_fdr_bky).
BH95 = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240,
        0.4262, 0.5719, 0.6528, 0.7590, 1.000]


def test_benjamini_hochberg_1995_example():
    # BH at q = 0.05 rejects the 4 smallest (p(4) = 0.0095 <= 4 * 0.05 / 15; Benjamini &
    # Hochberg 1995, sec. 4); Holm rejects 3 (statsmodels multipletests(p, 0.05, "holm")).
    bh = adjust_pvalues(BH95, "bh")
    holm = adjust_pvalues(BH95, "holm")
    assert (bh <= 0.05).sum() == 4
    assert (holm <= 0.05).sum() == 3
    assert (adjust_pvalues(BH95, "by") <= 0.05).sum() == 3  # statsmodels fdr_by: 3
    # adjusted values as statsmodels 0.15.0 multipletests(p, method="fdr_bh" / "holm")[1]
    # prints them, and the library called here
    np.testing.assert_allclose(bh, [0.0015, 0.003, 0.0095, 0.035625, 0.0603, 0.0638571428571,
                                    0.0638571428571, 0.0645, 0.0765, 0.486, 0.581181818182,
                                    0.714875, 0.753230769231, 0.813214285714, 1.0], atol=1e-9)
    np.testing.assert_allclose(holm, [0.0015, 0.0056, 0.0247, 0.114, 0.2211, 0.278, 0.278,
                                      0.278, 0.3213, 1, 1, 1, 1, 1, 1], atol=1e-9)
    np.testing.assert_allclose(bh, multipletests(BH95, method="fdr_bh")[1], rtol=1e-12)
    np.testing.assert_allclose(holm, multipletests(BH95, method="holm")[1], rtol=1e-12)


def test_unsorted_input_keeps_its_order():
    # stdlib-js @stdlib/stats/padjust documentation examples (bh and holm on unsorted input),
    # the same as statsmodels multipletests gives.
    np.testing.assert_allclose(adjust_pvalues([0.008, 0.03, 0.123, 0.6, 0.2], "bh"),
                               [0.04, 0.075, 0.205, 0.6, 0.25], atol=1e-12)
    p = [0.319, 0.201, 0.4, 0.374, 0.113]
    np.testing.assert_allclose(adjust_pvalues(p, "holm"), [0.957, 0.804, 0.957, 0.957, 0.565],
                               atol=1e-12)
    np.testing.assert_allclose(adjust_pvalues(p, "bh"), [0.4] * 5, atol=1e-12)


def test_nan_is_untested_and_not_counted():
    # statsmodels multipletests([0.01, nan, 0.03], method="fdr_bh") returns all NaN; here the
    # untested line stays NaN and m counts only the two tested lines.
    out = adjust_pvalues([0.01, np.nan, 0.03], "bh")
    assert np.isnan(out[1])
    np.testing.assert_allclose(out[[0, 2]], adjust_pvalues([0.01, 0.03], "bh"))
    assert np.isnan(adjust_pvalues([np.nan, np.nan], "holm")).all()
    assert adjust_pvalues([], "bh").shape == (0,)


def test_bad_input():
    with pytest.raises(InvalidArgumentError, match=r"p: p-value 1.5 is outside"):
        adjust_pvalues([0.1, 1.5])
    with pytest.raises(InvalidArgumentError, match="method"):
        adjust_pvalues([0.1], "bonferroni-ish")


@settings(derandomize=True, max_examples=25, deadline=None)
@given(st.lists(st.floats(0, 1), min_size=1, max_size=40))
def test_matches_statsmodels(p):
    for ours, theirs in (("bh", "fdr_bh"), ("holm", "holm"), ("by", "fdr_by")):
        ref = multipletests(p, alpha=0.05, method=theirs)[1]
        np.testing.assert_allclose(adjust_pvalues(p, ours), ref, rtol=1e-12, atol=1e-15)
