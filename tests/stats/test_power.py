"""Power, sample size and detectable effect of chi-square tests."""

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.power import GofChisquarePower

from qcfit.errors import InvalidArgumentError
from qcfit.stats import chisq_power, detectable_effect, sample_size_for_power


def test_cohen_sample_sizes_smallest_whole_n():
    # Cohen (1988), Statistical Power Analysis, chi-square sample-size tables, df = 1,
    # alpha = .05, power .80: w = .3 -> 87, w = .1 -> 785 (tables round to the nearest n; from
    # memory). The smallest n that reaches .80 is 88 and 785 (continuous 87.2096, 784.8861:
    # statsmodels GofChisquarePower().solve_power(w, alpha=.05, power=.8, n_bins=2)).
    assert sample_size_for_power(0.3, 1, 0.05, 0.8) == 88
    assert sample_size_for_power(0.1, 1, 0.05, 0.8) == 785
    assert chisq_power(0.3, 1, 87, 0.05) < 0.8 <= chisq_power(0.3, 1, 88, 0.05)


@pytest.mark.parametrize(("df", "continuous"), [
    (1, (784.8861, 87.2096, 31.3954)), (2, (963.4689, 107.0521, 38.5388)),
    (3, (1090.2563, 121.1396, 43.6103)), (4, (1193.5286, 132.6143, 47.7411)),
    (5, (1282.7607, 142.5290, 51.3104)), (6, (1362.4286, 151.3810, 54.4971))])
def test_sample_size_table(df, continuous):
    # Continuous N with power .80 at alpha .05 (Cohen 1988, Statistical Power Analysis, ch. 7
    # model: power = P(chi2(df, N w^2) > chi2_.95(df))), as statsmodels
    # GofChisquarePower().solve_power(w, alpha=.05, power=.8, n_bins=df + 1) gives it (checked
    # here too); the smallest whole N is ceil(N).
    for w, n in zip((0.1, 0.3, 0.5), continuous, strict=True):
        ref = GofChisquarePower().solve_power(effect_size=w, nobs=None, alpha=0.05, power=0.8,
                                              n_bins=df + 1)
        assert ref == pytest.approx(n, abs=1e-4)
        assert sample_size_for_power(w, df, 0.05, 0.8) == math.ceil(n)


def test_published_power_values():
    # R pwr::ES.w1 help, Cohen Exercise 7.1: pwr.chisq.test(w = 0.2886751, N = 100, df = 3)
    # -> power = 0.6739834 (the help page's example output).
    assert chisq_power(0.2886751345948129, 3, 100, 0.05) == pytest.approx(0.6739834, abs=5e-8)
    # R pwr::ES.w2 help example output: pwr.chisq.test(w = 0.2558646, df = 3, N = 200)
    # -> power = 0.8733222.
    assert chisq_power(0.25586460686395146, 3, 200, 0.05) == pytest.approx(0.8733222, abs=5e-8)
    # Cohen Exercise 7.3 inputs (pwr help): w = .346, df = 2, N = 140, alpha = .01 ->
    # 0.8854052872 (no published output: scipy.stats.ncx2.sf(chi2.isf(.01, 2), 2, 140 w^2) and
    # statsmodels GofChisquarePower().power(0.346, 140, 0.01, n_bins=3) agree on it).
    assert chisq_power(0.346, 2, 140, 0.01) == pytest.approx(0.8854052872, rel=1e-8)
    # w = .3, df = 1, N = 100: 0.8508387683; Cohen's power table lists .85 (from memory).
    assert chisq_power(0.3, 1, 100, 0.05) == pytest.approx(0.8508387683, rel=1e-9)


def test_detectable_effect_inverts_power():
    w = detectable_effect(88, 1, 0.05, 0.8)
    assert chisq_power(w, 1, 88, 0.05) == pytest.approx(0.8, abs=1e-9)
    assert w < 0.3 < detectable_effect(87, 1, 0.05, 0.8) + 1e-3
    assert detectable_effect(785, 1, 0.05, 0.8) <= 0.1


def test_bad_arguments():
    with pytest.raises(InvalidArgumentError, match="dof"):
        chisq_power(0.3, 0, 100, 0.05)
    with pytest.raises(InvalidArgumentError, match="alpha"):
        chisq_power(0.3, 1, 100, 1.5)
    with pytest.raises(InvalidArgumentError, match="w"):
        sample_size_for_power(0.0, 1, 0.05, 0.8)
    with pytest.raises(InvalidArgumentError, match="n"):
        detectable_effect(-5, 1)


@settings(derandomize=True, max_examples=40, deadline=None)
@given(st.floats(0.05, 1.0), st.integers(1, 15), st.integers(5, 5000),
       st.sampled_from([0.01, 1 / 370, 0.05]))
def test_matches_statsmodels_gof_power(w, df, n, alpha):
    # Reference library: statsmodels GofChisquarePower.power, which takes n_bins = df + 1
    # (number of categories), not df (statsmodels docs, GofChisquarePower.power).
    ref = GofChisquarePower().power(w, n, alpha, n_bins=df + 1)
    assert chisq_power(w, df, n, alpha) == pytest.approx(ref, rel=1e-9, abs=1e-12)
    need = sample_size_for_power(w, df, alpha, 0.8)
    assert chisq_power(w, df, need, alpha) >= 0.8
    assert need == 1 or chisq_power(w, df, need - 1, alpha) < 0.8
