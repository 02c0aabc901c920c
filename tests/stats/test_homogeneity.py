"""Lines x categories: published tables, scipy/statsmodels as reference, Monte Carlo vs exact."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy import stats
from statsmodels.stats.contingency_tables import Table

from qcfit.errors import InvalidArgumentError
from qcfit.stats import (
    HomogeneityResult,
    bergsma_v,
    compare_each_to_rest,
    compare_groups,
    compare_with_rest,
)

# Agresti, An Introduction to Categorical Data Analysis (2nd ed., 2007), p. 38-39: party
# identification by gender (rows F, M; columns Democrat, Independent, Republican).
PARTY = [[762, 327, 468], [484, 239, 477]]


def test_agresti_party_by_gender():
    # R chisq.test help "From Agresti(2007) p.39": X-squared = 30.070149, df = 2,
    # p = 2.953589e-07 (R 4.0.2 output); Agresti prints X^2 = 30.1, G^2 = 30.0 (from memory).
    # G^2 oracle: scipy chi2_contingency(PARTY, lambda_="log-likelihood") = 30.01669261.
    r = compare_groups(PARTY, pvalue="asymptotic")
    assert r.statistic == pytest.approx(30.0701491, rel=1e-8)
    assert round(r.statistic, 2) == 30.07 and r.dof == 2
    assert r.pvalue == pytest.approx(2.953589183e-07, rel=1e-6)
    np.testing.assert_allclose(r.expected, [[703.671382, 319.645267, 533.683351],
                                            [542.328618, 246.354733, 411.316649]], atol=1e-6)
    g = compare_groups(PARTY, statistic="g", pvalue="asymptotic")
    assert g.statistic == pytest.approx(30.01669261, rel=1e-8)  # scipy, see above
    assert round(g.statistic, 2) == 30.02
    assert g.pvalue == pytest.approx(3.033597911e-07, rel=1e-7)


def test_agresti_adjusted_residuals():
    # R package chisq.posthoc.test example output on the Agresti (2007) p. 39 table:
    # F: 4.502054, 0.6994517, -5.315946; M: opposite signs (Agresti prints 4.50, 0.70, -5.32;
    # from memory).
    r = compare_groups(PARTY)
    np.testing.assert_allclose(r.adjusted_residuals[0], [4.502054, 0.6994517, -5.315946],
                               atol=5e-7)
    np.testing.assert_allclose(r.adjusted_residuals[1], -r.adjusted_residuals[0], atol=1e-12)


def test_effect_sizes_on_published_tables():
    # Tables: Agresti (2007) p. 39 party x gender; Agresti, Categorical Data Analysis (2nd ed.,
    # 2002), party x gender, GSS 1991; Agresti (2007) religious beliefs x highest degree;
    # Montgomery & Runger, Applied Statistics and Probability for Engineers, pension plan x
    # job class; Agresti (2002) job satisfaction x income, n = 96 (table numbers from memory).
    # V: scipy.stats.contingency.association(table, method="cramer"), checked below. Bergsma
    # V: no published value; Bergsma (2013), J. Korean Stat. Soc. 42:323-328, formula,
    # regression values.
    cases = {
        "CT-1": (PARTY, 0.1044358024, 0.1009199828),
        "CT-2": ([[279, 73, 225], [165, 47, 191]], 0.08457301891, 0.07151866361),
        "CT-3": ([[178, 138, 108], [570, 648, 442], [138, 252, 252]], 0.1126261902,
                 0.1093594595),
        "CT-4": ([[160, 140, 40], [40, 60, 60]], 0.3150630189, 0.3089465461),
        "CT-7": ([[1, 3, 10, 6], [2, 3, 10, 7], [1, 6, 14, 12], [0, 1, 9, 11]], 0.1439221745,
                 0.0),
    }
    for name, (table, v, vbc) in cases.items():
        r = compare_groups(table, pvalue="asymptotic")
        assert r.effect_size == pytest.approx(v, rel=1e-8), name
        assert r.effect_size_corrected == pytest.approx(vbc, rel=1e-8, abs=1e-15), name
        assert r.effect_size == pytest.approx(
            stats.contingency.association(np.array(table), method="cramer"), rel=1e-12)


def test_scipy_association_docstring_and_bias_correction_clip():
    # scipy.stats.contingency.association docstring, obs4x2 example ->
    # Cramér's V = 0.18617813077483678; Bergsma V = 0.1828618806 (no published value:
    # Bergsma 2013 formula, regression value).
    r = compare_groups([[100, 150], [203, 322], [420, 700], [320, 210]], pvalue="asymptotic")
    assert r.effect_size == pytest.approx(0.18617813077483678, rel=1e-12)
    assert r.statistic == pytest.approx(84.05606871861963, rel=1e-10)
    assert r.effect_size_corrected == pytest.approx(0.1828618806, rel=1e-8)
    # R confintr / rcompanion cramerV(mtcars am x vs) = 0.1683451; effectsize
    # cramers_v(adjust = TRUE) = 0 (the test files of the R packages confintr and
    # effectsize; mtcars counts am x vs [[12, 7], [6, 7]] from memory, consistent with V).
    m = compare_groups([[12, 7], [6, 7]], pvalue="asymptotic")
    assert m.effect_size == pytest.approx(0.1683451246, abs=5e-8)
    assert m.effect_size_corrected == 0.0


def test_two_by_two_is_uncorrected():
    # R chisq.test help x <- matrix(c(12, 5, 7, 7), ncol = 2): Yates X^2 = 0.64112; the
    # uncorrected X^2 = 1.371646027, p = 0.2415292748 (scipy chi2_contingency(x,
    # correction=False)). V from the uncorrected statistic = 0.2103488674 (scipy association),
    # not the Yates-based 0.1438 that the R package relper's tests show for chisq.test(x).
    r = compare_groups([[12, 7], [5, 7]], pvalue="asymptotic")
    assert r.statistic == pytest.approx(1.371646027, rel=1e-8)
    assert r.pvalue == pytest.approx(0.2415292748, rel=1e-8)
    assert r.effect_size == pytest.approx(0.2103488674, rel=1e-8)
    assert r.effect_size_corrected == pytest.approx(0.1062526885, rel=1e-8)


def test_montgomery_pension_plan_and_scipy_docstring():
    # Montgomery & Runger, Applied Statistics and Probability for Engineers, pension plan by
    # job class: chi^2_0 = 49.63, df = 2 (from memory; oracle scipy 49.63235294,
    # p = 1.669058262e-11). Adjusted residuals: no published value; statsmodels
    # Table(t, shift_zeros=False).standardized_resids gives the same (Haberman 1973).
    r = compare_groups([[160, 140, 40], [40, 60, 60]], pvalue="asymptotic")
    assert r.statistic == pytest.approx(49.63235294, rel=1e-8)
    assert abs(r.statistic - 49.63) <= 0.005
    assert r.pvalue == pytest.approx(1.669058262e-11, rel=1e-6)
    np.testing.assert_allclose(r.adjusted_residuals[0], [4.69668218, 0.78278036, -6.71094365],
                               atol=5e-8)
    # scipy chi2_contingency docstring example: 2.7777777777777777, p = 0.24935220877729619.
    d = compare_groups([[10, 10, 20], [20, 20, 20]], pvalue="asymptotic")
    assert d.statistic == pytest.approx(2.7777777777777777, rel=1e-12)
    assert d.pvalue == pytest.approx(0.24935220877729619, rel=1e-12)
    np.testing.assert_allclose(d.expected, [[12, 12, 16], [18, 18, 24]])


def test_g_statistic_on_agresti_tables():
    # Agresti (2002) party x gender, GSS 1991: G^2 = 7.003, the residual deviance of the
    # Poisson independence model in the R package vcdExtra's GSS help page; Agresti (2007)
    # religious beliefs x degree G^2 = 69.8 and Agresti (2002) job satisfaction x income
    # G^2 = 6.76 (both from memory); oracle values from scipy chi2_contingency(t,
    # lambda_="log-likelihood").
    cases = {"CT-2": ([[279, 73, 225], [165, 47, 191]], 7.002593856, 0.03015824497),
             "CT-3": ([[178, 138, 108], [570, 648, 442], [138, 252, 252]], 69.81162113,
                      2.487504183e-14),
             "CT-7": ([[1, 3, 10, 6], [2, 3, 10, 7], [1, 6, 14, 12], [0, 1, 9, 11]],
                      6.764053201, 0.6616695832)}
    for name, (table, g2, p) in cases.items():
        r = compare_groups(table, statistic="g", pvalue="asymptotic")
        assert r.statistic == pytest.approx(g2, rel=1e-8), name
        assert r.pvalue == pytest.approx(p, rel=1e-7), name


def test_zero_cells_use_haberman_not_shifted_residuals():
    # Haberman (1973), Biometrics 29:205-220, adjusted residuals of [[0,5],[5,5]] are
    # +-1.9364917 (statsmodels Table(t, shift_zeros=False).standardized_resids); statsmodels'
    # default shift_zeros=True would give +-1.6106.
    r = compare_groups([[0, 5], [5, 5]])
    np.testing.assert_allclose(np.abs(r.adjusted_residuals), 1.9364917, atol=5e-7)


def test_exact_and_monte_carlo_conditional_pvalue():
    # R chisq.test help, "Effect of simulating p-values": for matrix(c(12,5,7,7), ncol = 2)
    # simulate.p.value = TRUE, B = 10000 gives "around 0.29!"; exact conditional
    # P(X^2 >= 1.371646 | margins) = 0.288308104 = scipy.stats.fisher_exact two-sided p.
    t = [[12, 7], [5, 7]]
    ex = compare_groups(t, pvalue="exact")
    assert ex.pvalue == pytest.approx(0.288308104, rel=1e-8) and ex.method == "exact"
    assert ex.pvalue == pytest.approx(stats.fisher_exact(t).pvalue, rel=1e-9)
    mc = compare_groups(t, pvalue="monte-carlo", draws=10_000, seed=2)
    assert abs(mc.pvalue - 0.288308104) <= 0.015 and abs(mc.pvalue - ex.pvalue) <= 4 * mc.pvalue_se


def test_monte_carlo_with_fixed_margins_agrees_with_scipy_on_a_sparse_table():
    table = np.array([[1, 3, 10, 6], [2, 3, 10, 7], [1, 6, 14, 12], [0, 1, 9, 11]])
    r = compare_groups(table, pvalue="monte-carlo", draws=20_000, seed=4)
    ref = stats.chi2_contingency(table, correction=False, method=stats.MonteCarloMethod(
        n_resamples=20_000, rng=np.random.default_rng(9)))
    assert abs(r.pvalue - ref.pvalue) <= 4 * math.sqrt(2) * r.pvalue_se
    auto = compare_groups(table)
    assert auto.method == "monte-carlo" and "Cochran" in auto.method_reason


def test_empty_rows_and_columns_are_dropped_and_reported():
    # scipy 1.17.1 chi2_contingency([[0,0,0],[10,5,3]]) raises ValueError (a zero expected
    # frequency).
    r = compare_groups([[0, 0, 0, 0], [10, 5, 3, 0], [4, 4, 1, 0]], pvalue="asymptotic")
    ref = compare_groups([[10, 5, 3], [4, 4, 1]], pvalue="asymptotic")
    assert r.dropped_rows == (0,) and r.dropped_columns == (3,)
    assert r.dof == 2 and r.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert r.expected.shape == (3, 4) and r.adjusted_residuals[0].tolist() == [0, 0, 0, 0]
    one = compare_groups([[0, 0], [3, 4]])
    assert not one.tested and one.method_reason == "not tested: fewer than 2 lines with defects"
    none = compare_groups([[0, 0], [0, 0]])
    assert none.method_reason == "not tested: no defects" and math.isnan(none.pvalue)


def test_exact_is_refused_for_larger_tables():
    with pytest.raises(InvalidArgumentError, match="only available for one line or two-row"):
        compare_groups([[1, 2], [3, 1], [2, 2]], pvalue="exact")


def test_bad_table_is_rejected():
    with pytest.raises(InvalidArgumentError, match=r"table: negative count -1 at \[1, 0\]"):
        compare_groups([[1, 2], [-1, 3]])
    with pytest.raises(InvalidArgumentError, match="table: expected 2-D"):
        compare_groups([1, 2, 3])


@settings(derandomize=True, max_examples=50, deadline=None)
@given(arrays(np.int64, st.tuples(st.integers(2, 5), st.integers(2, 6)),
              elements=st.integers(1, 300)))
def test_matches_scipy_and_statsmodels(table):
    r = compare_groups(table, pvalue="asymptotic")
    ref = stats.chi2_contingency(table, correction=False)
    assert r.statistic == pytest.approx(ref.statistic, rel=1e-9, abs=1e-9)
    assert r.pvalue == pytest.approx(ref.pvalue, rel=1e-8, abs=1e-12)
    assert r.dof == ref.dof
    np.testing.assert_allclose(r.expected, ref.expected_freq, rtol=1e-12)
    g = compare_groups(table, statistic="g", pvalue="asymptotic")
    gref = stats.chi2_contingency(table, correction=False, lambda_="log-likelihood")
    assert g.statistic == pytest.approx(gref.statistic, rel=1e-9, abs=1e-9)
    sm = Table(table, shift_zeros=False)
    np.testing.assert_allclose(r.adjusted_residuals, sm.standardized_resids, atol=1e-9)
    assert r.effect_size == pytest.approx(
        stats.contingency.association(table, method="cramer", correction=False), rel=1e-9)
    rr, cc = table.shape
    n = table.sum()
    phi2 = max(0.0, ref.statistic / n - (rr - 1) * (cc - 1) / (n - 1))
    rt, ct = rr - (rr - 1) ** 2 / (n - 1), cc - (cc - 1) ** 2 / (n - 1)
    assert r.effect_size_corrected == pytest.approx(math.sqrt(phi2 / min(rt - 1, ct - 1)),
                                                    abs=1e-12)


def test_each_line_against_the_rest():
    rows = np.array([[30, 10, 5, 5], [28, 12, 6, 4], [10, 5, 25, 10], [0, 0, 0, 0]])
    r = compare_each_to_rest(rows, pvalue="asymptotic")
    assert r.pvalue.shape == (4,) and r.adjusted_residuals.shape == (4, 4)
    for i in range(3):
        pair = np.vstack([rows[i], rows.sum(axis=0) - rows[i]])
        ref = compare_groups(pair, pvalue="asymptotic")
        assert r.statistic[i] == pytest.approx(ref.statistic, rel=1e-12)
        assert r.pvalue[i] == pytest.approx(ref.pvalue, rel=1e-12)
        np.testing.assert_allclose(r.adjusted_residuals[i], ref.adjusted_residuals[0])
    assert np.argmin(r.pvalue[:3]) == 2  # the line that differs
    assert not r.tested[3] and math.isnan(r.pvalue[3]) and r.method[3] == "not-tested"
    # the Agresti 2 x 3 table: each row against the other is the full test
    p = compare_each_to_rest(PARTY, pvalue="asymptotic")
    assert p.statistic[0] == pytest.approx(30.0701491, rel=1e-8)
    # small counts: exact (hypergeometric) p for 2 x c tables
    s = compare_each_to_rest([[3, 1, 0], [1, 3, 2], [2, 2, 2]], pvalue="exact")
    pair0 = [[3, 1, 0], [3, 5, 4]]
    assert s.pvalue[0] == pytest.approx(compare_groups(pair0, pvalue="exact").pvalue, rel=1e-12)
    mc = compare_each_to_rest([[3, 1, 0], [1, 3, 2], [2, 2, 2]], pvalue="monte-carlo", seed=1)
    assert np.all(np.abs(mc.pvalue - s.pvalue) <= 4 * mc.pvalue_se + 1e-12)


def test_result_is_frozen_with_plain_scalars():
    r = compare_groups(PARTY)
    assert isinstance(r, HomogeneityResult)
    assert type(r.statistic) is float and type(r.dof) is int and type(r.pvalue) is float
    with pytest.raises(ValueError):
        r.adjusted_residuals[0, 0] = 0.0
    assert float(bergsma_v(30.0701491, 2757, 2, 3)) == pytest.approx(0.1009199828, rel=1e-8)


@settings(derandomize=True, max_examples=30, deadline=None)
@given(arrays(np.int64, st.tuples(st.integers(2, 4), st.integers(2, 5)),
              elements=st.integers(0, 40)), st.randoms(use_true_random=False))
def test_invariant_under_relabelling_and_transposing(table, rnd):
    if (table.sum(axis=0) > 0).sum() < 2 or (table.sum(axis=1) > 0).sum() < 2:
        return
    rows, cols = list(range(table.shape[0])), list(range(table.shape[1]))
    rnd.shuffle(rows)
    rnd.shuffle(cols)
    a = compare_groups(table, pvalue="asymptotic")
    b = compare_groups(table[np.ix_(rows, cols)], pvalue="asymptotic")
    c = compare_groups(table.T, pvalue="asymptotic")
    for other in (b, c):
        assert a.statistic == pytest.approx(other.statistic, rel=1e-10, abs=1e-12)
        assert a.effect_size == pytest.approx(other.effect_size, rel=1e-10, abs=1e-12)
        assert a.effect_size_corrected == pytest.approx(other.effect_size_corrected,
                                                        rel=1e-9, abs=1e-12)
    assert 0.0 <= a.effect_size_corrected <= a.effect_size + 1e-12
    np.testing.assert_allclose(b.adjusted_residuals, a.adjusted_residuals[np.ix_(rows, cols)],
                               atol=1e-10)


@settings(derandomize=True, max_examples=40, deadline=None)
@given(arrays(np.int64, st.tuples(st.integers(1, 5), st.integers(2, 6)), elements=st.integers(0, 60)),
       arrays(np.int64, st.tuples(st.integers(1, 5), st.integers(2, 6)), elements=st.integers(0, 9)))
def test_rows_of_several_tables_against_their_own_rest_equal_each_table_alone(a, b):
    # compare_with_rest on the stacked rows of tables with the same number of columns with
    # defects gives each row of compare_each_to_rest (asymptotic) at its kept columns, bit for bit
    a[:, 0] += 1  # at least two columns with defects in each table
    a[0, 1] += 1
    b[:, -1] += 1
    b[0, 0] += 1
    parts, mine, rest = [], [], []
    for t in (a, b):
        keep = t.sum(axis=0) > 0
        parts.append((compare_each_to_rest(t, pvalue="asymptotic"), keep))
        mine.append(t[:, keep])
        rest.append(t[:, keep].sum(axis=0) - t[:, keep])
    if mine[0].shape[1] != mine[1].shape[1]:
        mine, rest, parts = mine[:1], rest[:1], parts[:1]
    together = compare_with_rest(np.concatenate(mine), np.concatenate(rest))
    at = 0
    for alone, keep in parts:
        rows = slice(at, at + len(alone.n))
        at += len(alone.n)
        for name in ("statistic", "dof", "pvalue", "effect_size", "n", "pvalue_se", "tested"):
            np.testing.assert_array_equal(getattr(together, name)[rows], getattr(alone, name))
        np.testing.assert_array_equal(together.expected[rows], alone.expected[:, keep])
        np.testing.assert_array_equal(together.adjusted_residuals[rows],
                                      alone.adjusted_residuals[:, keep])
        assert together.method[rows].tolist() == alone.method.tolist()
        assert together.method_reason[rows].tolist() == alone.method_reason.tolist()
