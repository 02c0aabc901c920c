"""Exact Poisson test of a defect rate and the exact interval for a rate."""

import math

import numpy as np
import pytest
from scipy import stats

from qcfit.errors import InvalidArgumentError
from qcfit.stats import poisson_isf, poisson_rate_interval, poisson_sf, rate_test


def test_r_poisson_test_example_interval():
    # R stats::poisson.test help example "SMR, Welsh Nickel workers": poisson.test(137,
    # 24.19893) (input as printed on that R help page); its output, rate 5.661407 and 95% interval
    # 4.753125 - 6.692709, is from memory. Cross-checked with the Garwood chi-square formula.
    low, high = poisson_rate_interval(137, 24.19893, 0.95)
    assert low == pytest.approx(4.753125, abs=5e-7)
    assert high == pytest.approx(6.692709, abs=5e-7)
    r = rate_test(137, 24.19893, 1.0)
    assert r.rate == pytest.approx(5.661407, abs=5e-7)
    assert r.ratio == pytest.approx(5.661407, abs=5e-7)
    assert r.pvalue < 1e-50


def test_one_sided_pvalue_is_the_poisson_upper_tail():
    # p = P(X >= d), X ~ Poisson(u r0): brute-force sum of the pmf as the reference.
    d, u, r0 = 9, 1000.0, 0.004
    r = rate_test(d, u, r0)
    brute = 1.0 - sum(math.exp(-4.0) * 4.0**j / math.factorial(j) for j in range(d))
    assert r.pvalue == pytest.approx(brute, rel=1e-12)
    assert r.expected == pytest.approx(4.0) and r.ratio == pytest.approx(2.25)
    assert r.ci_low < r.rate < r.ci_high
    # coverage identity: the interval ends are where the one-sided tails equal alpha/2
    assert stats.poisson.sf(d - 1, r.ci_low * u) == pytest.approx(0.025, rel=1e-9)
    assert stats.poisson.cdf(d, r.ci_high * u) == pytest.approx(0.025, rel=1e-9)


def test_zero_defects_and_zero_units():
    r = rate_test([0, 5, 3], [10, 10, 0], 0.2)
    assert r.pvalue[0] == 1.0 and r.ci_low[0] == 0.0
    # upper end for 0 events: -ln(0.025) = 3.689 per 10 units (Garwood; epitools pois.exact
    # documents 3.689 for x = 0)
    assert r.ci_high[0] == pytest.approx(-math.log(0.025) / 10, rel=1e-9)
    assert not r.tested[2] and math.isnan(r.pvalue[2])
    assert r.method_reason[2] == "not tested: no inspected units"
    row = r.row(1)
    assert type(row.pvalue) is float and row.pvalue == r.pvalue[1]
    assert not r.pvalue.flags.writeable


def test_batch_equals_single():
    d, u = np.array([0, 2, 7, 30]), np.array([50.0, 100.0, 120.0, 400.0])
    b = rate_test(d, u, 0.03)
    for i in range(4):
        s = rate_test(int(d[i]), float(u[i]), 0.03)
        assert s.pvalue == b.pvalue[i] and s.ci_high == b.ci_high[i]


def test_bad_input():
    with pytest.raises(InvalidArgumentError, match="defects: negative"):
        rate_test(-1, 10, 0.1)
    with pytest.raises(InvalidArgumentError, match="baseline_rate"):
        rate_test(1, 10, 0.0)
    with pytest.raises(InvalidArgumentError, match="units"):
        rate_test(1, -10, 0.1)
    with pytest.raises(InvalidArgumentError, match="defects: NaN"):
        rate_test(float("nan"), 10, 0.1)


def test_poisson_tail_functions_equal_scipy_stats_bit_for_bit():
    # poisson_sf / poisson_isf skip scipy.stats' argument handling; the values must not move
    rng = np.random.default_rng(20260105)
    mu = np.concatenate([rng.gamma(1.0, 20.0, 5000), [0.0, 1e-9, 3.7, 1e4]])
    k = np.concatenate([rng.integers(-3, 200, 5000).astype(float), [0.5, -0.5, 2.7, 0.0]])
    q = np.concatenate([rng.uniform(1e-6, 0.3, 5000), [0.01, 0.05, 0.5, 1e-12]])
    assert np.array_equal(poisson_sf(k, mu), stats.poisson.sf(k, mu))
    assert np.array_equal(poisson_isf(q, mu), stats.poisson.isf(q, mu))
    # outside the fast path: scipy.stats' own answer (NaN for a negative mean, q = 0 or 1)
    assert np.array_equal(poisson_sf([1.0, 2.0], [-1.0, 2.0]), stats.poisson.sf([1.0, 2.0], [-1.0, 2.0]),
                          equal_nan=True)
    assert np.array_equal(poisson_isf([0.0, 1.0], [2.0, 2.0]), stats.poisson.isf([0.0, 1.0], [2.0, 2.0]))


def test_rate_test_without_interval_has_the_same_pvalues():
    d, u = np.array([0, 2, 7, 30]), np.array([50.0, 100.0, 0.0, 400.0])
    full, bare = rate_test(d, u, 0.03), rate_test(d, u, 0.03, interval=False)
    assert np.array_equal(full.pvalue, bare.pvalue, equal_nan=True)
    assert np.isnan(bare.ci_low).all() and np.isnan(bare.ci_high).all()
