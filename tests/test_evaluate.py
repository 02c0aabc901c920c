"""Findings of one shift (pure): fit to baseline, between lines, each line vs rest, rate,
power ("too little data"), and the cases where no test is run."""

from __future__ import annotations

import dataclasses
import datetime as dt

import numpy as np
import pytest
from scipy import stats as sps

from qcfit import evaluate as ev
from qcfit.config import Thresholds
from qcfit.model import BaselineRef, CountTable, ShiftInstance

UTC = dt.UTC
SHIFT = ShiftInstance(dt.datetime(2026, 1, 6, 12, tzinfo=UTC), dt.datetime(2026, 1, 6, 20, tzinfo=UTC),
                      dt.date(2026, 1, 6), "A")
CATS = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")
PROPS = (0.30, 0.25, 0.15, 0.12, 0.10, 0.08)
# explicit floors, so the checks below do not move when the config defaults do
LIMITS = Thresholds(min_effect_w=0.10, min_effect_v=0.10, alarm_level=0.01, watch_level=0.05,
                    power=0.80)
BASE = BaselineRef(version_id=3, name="plant", effective=dt.date(2026, 1, 5), categories=CATS,
                   proportions=PROPS, rate=0.012)


def table(rows: dict[str, list[int]], units: dict[str, float] | None = None,
          cats: tuple[str, ...] = CATS) -> CountTable:
    lines = tuple(rows)
    counts = np.array([rows[ln] for ln in lines], dtype=np.int64)
    u = np.array([(units or {}).get(ln, np.nan) for ln in lines], dtype=float)
    counts.setflags(write=False)
    u.setflags(write=False)
    return CountTable(SHIFT, lines, cats, counts, u)


def by(findings, kind, line=None):
    hits = [f for f in findings if f.kind == kind and f.line == line]
    assert len(hits) == 1, hits
    return hits[0]


def run(rows, units=None, baselines=None, thresholds=None, seed=11, cats=CATS):
    t = table(rows, units, cats)
    b = baselines if baselines is not None else {ln: BASE for ln in rows}
    return ev.evaluate_table(t, b, thresholds or LIMITS, seed=seed)


# --------------------------------------------------------------------------- fit to baseline


def test_large_line_matches_scipy_chisquare():
    obs = [620, 480, 340, 220, 190, 150]  # n = 2000, every expected count >= 160: asymptotic
    f = by(run({"L1": obs, "L2": [30, 25, 15, 12, 10, 8]}), ev.KIND_BASELINE, "L1")
    # scipy.stats.chisquare as the reference library (Pearson X^2, df = k - 1)
    ref = sps.chisquare(obs, np.array(PROPS) * 2000)
    assert f.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert f.pvalue == pytest.approx(ref.pvalue, rel=1e-9)
    assert f.dof == 5 and f.n == 2000
    assert f.effect_size == pytest.approx(np.sqrt(ref.statistic / 2000), rel=1e-12)  # Cohen's w
    assert f.method == "asymptotic"
    assert f.baseline_version_id == 3
    # power against w = 0.10 at alpha = 0.01, df = 5, n = 2000 (Cohen 1988, ch. 7; scipy ncx2);
    # n = 2000 is above the 1787 needed for power 0.80, so the line is "tested"
    assert f.power == pytest.approx(sps.ncx2.sf(sps.chi2.isf(0.01, 5), 5, 2000 * 0.01), rel=1e-9)
    assert f.verdict == ev.TESTED


def test_top_categories_name_direction_and_shares():
    obs = [300, 250, 290, 60, 60, 40]  # flash well up, short shot and burr down (n = 1000)
    f = by(run({"L1": obs}), ev.KIND_BASELINE, "L1")
    top = f.top_categories[0]
    assert (top.code, top.direction) == ("FL", "up")
    assert top.ratio == pytest.approx(0.29 / 0.15)
    # adjusted residual (o - e)/sqrt(e (1 - p)) (Haberman 1973; Agresti 2007, sec. 2.4.5)
    assert top.adjusted_residual == pytest.approx((290 - 150) / np.sqrt(150 * 0.85))
    assert all(c.direction == "down" for c in f.top_categories[1:])


def test_too_few_defects_is_too_little_data_never_tested_in_control():
    f = by(run({"L1": [3, 2, 1, 1, 0, 1]}), ev.KIND_BASELINE, "L1")
    assert f.verdict == ev.TOO_LITTLE_DATA
    assert f.pvalue is not None  # the test still ran (a clear signal can still alarm)
    # Cohen (1988) noncentral chi-square power, w = 0.10, df = 5, n = 8, alpha = 0.01
    assert f.power == pytest.approx(sps.ncx2.sf(sps.chi2.isf(0.01, 5), 5, 8 * 0.01), rel=1e-9)
    assert f.power < 0.8
    assert "too little data to tell" in f.reason


def test_sparse_line_is_routed_away_from_the_asymptotic_test():
    # 20 defects: most expected counts below 5, so Cochran's rule fails (common practice)
    f = by(run({"L1": [6, 4, 3, 4, 2, 1]}), ev.KIND_BASELINE, "L1")
    assert f.method in ("exact", "monte-carlo")
    assert f.method_reason


def test_no_defects_is_not_tested():
    found = run({"L1": [0] * 6, "L2": [30, 25, 15, 12, 10, 8]})
    f = by(found, ev.KIND_BASELINE, "L1")
    assert f.verdict == ev.NOT_TESTED and f.pvalue is None
    assert by(found, ev.KIND_VS_REST, "L1").verdict == ev.NOT_TESTED


def test_impossible_category_is_reported_not_crashed():
    base = BaselineRef(3, "plant", dt.date(2026, 1, 5), CATS, (0.35, 0.25, 0.15, 0.15, 0.10, 0.0))
    f = by(run({"L1": [30, 25, 15, 12, 10, 3]}, baselines={"L1": base}), ev.KIND_BASELINE, "L1")
    assert f.verdict == ev.IMPOSSIBLE
    assert "OTH (3)" in f.reason
    assert f.top_categories[0].code == "OTH"


def test_missing_baseline_gives_a_finding_with_a_reason():
    f = by(run({"L1": [30, 25, 15, 12, 10, 8]}, baselines={"L1": None}), ev.KIND_BASELINE, "L1")
    assert f.verdict == ev.NO_BASELINE
    assert "no baseline in force for line L1 on 2026-01-06" == f.reason


def test_category_the_baseline_lacks():
    base = BaselineRef(4, "old", dt.date(2025, 1, 1), CATS[:5], (0.3, 0.3, 0.2, 0.1, 0.1))
    f = by(run({"L1": [30, 25, 15, 12, 10, 8]}, baselines={"L1": base}), ev.KIND_BASELINE, "L1")
    assert f.verdict == ev.UNKNOWN_CATEGORY
    assert "no share for category OTH" in f.reason


def test_fault_in_one_line_is_contained():
    # a corrupt baseline for L2 (6 categories, 5 shares) makes its test raise
    broken = BaselineRef(5, "broken", dt.date(2026, 1, 1), CATS, PROPS[:5])
    rows = {"L1": [30, 25, 15, 12, 10, 8], "L2": [30, 25, 15, 12, 10, 8], "L3": [31, 24, 16, 11, 10, 8]}
    found = run(rows, baselines={"L1": BASE, "L2": broken, "L3": BASE})
    f2 = by(found, ev.KIND_BASELINE, "L2")
    assert f2.verdict == ev.FAULT
    assert "ValueError" in f2.reason
    assert by(found, ev.KIND_BASELINE, "L1").verdict in ev.TESTABLE
    assert by(found, ev.KIND_BASELINE, "L3").verdict in ev.TESTABLE
    assert by(found, ev.KIND_BETWEEN).verdict in ev.TESTABLE


# --------------------------------------------------------------------------- between lines


def test_between_lines_matches_chi2_contingency_and_cramers_v():
    # Agresti (2007), An Introduction to Categorical Data Analysis, 2nd ed., p. 39 (party
    # identification by gender): X^2 = 30.07, df = 2; used here as two "lines" x 3 categories.
    cats = ("A", "B", "C")
    base = BaselineRef(1, "b", dt.date(2026, 1, 1), cats, (0.5, 0.2, 0.3))
    rows = {"F": [762, 327, 468], "M": [484, 239, 477]}
    found = run(rows, baselines={"F": base, "M": base}, cats=cats)
    g = by(found, ev.KIND_BETWEEN)
    assert g.statistic == pytest.approx(30.0701491, rel=1e-8)
    assert g.dof == 2
    assert g.pvalue == pytest.approx(2.953589e-07, rel=1e-6)  # R chisq.test output
    # scipy.stats.contingency.association as the reference for Cramér's V
    ref_v = sps.contingency.association(np.array(list(rows.values())), method="cramer")
    assert g.effect_size == pytest.approx(ref_v, rel=1e-12)


def test_line_vs_rest_names_the_line_that_differs():
    rows = {"L1": [60, 50, 30, 24, 20, 16], "L2": [58, 52, 29, 25, 19, 17],
            "L3": [40, 30, 90, 20, 12, 8], "L4": [61, 49, 31, 23, 21, 15]}
    found = run(rows)
    vs = {f.line: f for f in found if f.kind == ev.KIND_VS_REST}
    assert min(vs, key=lambda ln: vs[ln].pvalue) == "L3"
    assert vs["L3"].top_categories[0].code == "FL"
    assert vs["L3"].top_categories[0].direction == "up"
    # L3 vs the pooled rest is a 2 x 6 table: its X^2 is chi2_contingency's (scipy reference)
    pair = np.array([rows["L3"], np.sum([rows[k] for k in ("L1", "L2", "L4")], axis=0)])
    ref = sps.chi2_contingency(pair, correction=False)
    assert vs["L3"].statistic == pytest.approx(ref.statistic, rel=1e-10)
    assert vs["L3"].effect_size == pytest.approx(np.sqrt(ref.statistic / pair.sum()), rel=1e-10)


def test_one_line_with_defects_gives_no_between_lines_test():
    g = by(run({"L1": [30, 25, 15, 12, 10, 8], "L2": [0] * 6}), ev.KIND_BETWEEN)
    assert g.verdict == ev.NOT_TESTED
    assert g.details["lines_without_defects"] == ["L2"]


# --------------------------------------------------------------------------- rate


def test_rate_against_baseline_rate():
    found = run({"L1": [30, 25, 15, 12, 10, 8]}, units={"L1": 5000.0})  # 100 defects, 60 expected
    f = by(found, ev.KIND_RATE, "L1")
    # exact one-sided Poisson p-value P(X >= 100 | mu = 60) (scipy.stats.poisson reference)
    assert f.pvalue == pytest.approx(sps.poisson.sf(99, 60.0), rel=1e-9)
    assert f.effect_size == pytest.approx(100 / 5000 / 0.012)
    assert f.details["expected_defects"] == pytest.approx(60.0)


def test_rate_power_is_the_exact_poisson_power():
    mu0, ratio, alpha = 60.0, 1.25, 0.01
    c = next(k for k in range(1, 500) if sps.poisson.sf(k - 1, mu0) <= alpha)  # critical count
    assert ev.poisson_power(mu0, ratio, alpha) == pytest.approx(sps.poisson.sf(c - 1, mu0 * ratio))
    assert sps.poisson.sf(c - 2, mu0) > alpha


def test_no_rate_test_without_units_or_baseline_rate():
    found = run({"L1": [30, 25, 15, 12, 10, 8]})  # units unknown (NaN)
    assert [f for f in found if f.kind == ev.KIND_RATE] == []
    norate = BaselineRef(3, "plant", dt.date(2026, 1, 5), CATS, PROPS, rate=None)
    found = run({"L1": [30, 25, 15, 12, 10, 8]}, units={"L1": 100.0}, baselines={"L1": norate})
    assert [f for f in found if f.kind == ev.KIND_RATE] == []


def test_zero_units_is_not_tested():
    f = by(run({"L1": [1, 0, 0, 0, 0, 0]}, units={"L1": 0.0}), ev.KIND_RATE, "L1")
    assert f.verdict == ev.NOT_TESTED and "no units" in f.reason


# --------------------------------------------------------------------------- seeds, overrides


def test_same_seed_same_numbers_monte_carlo_included():
    rows = {"L1": [6, 4, 3, 4, 2, 1], "L2": [2, 9, 1, 1, 3, 0], "L3": [5, 5, 5, 0, 0, 1]}
    a = run(rows, seed=99)
    b = run(rows, seed=99)
    assert a == b
    assert any(f.method == "monte-carlo" for f in a)


def test_per_baseline_threshold_overrides():
    strict = BaselineRef(3, "plant", dt.date(2026, 1, 5), CATS, PROPS, rate=0.012,
                         thresholds=(("min_effect_w", 0.3), ("alarm_level", 0.001)))
    f = by(run({"L1": [30, 25, 15, 12, 10, 8]}, baselines={"L1": strict}), ev.KIND_BASELINE, "L1")
    assert f.effect_floor == 0.3 and f.alarm_level == 0.001


def test_derived_seeds_are_stable_and_distinct():
    assert ev.derive_seed(20260105, "shift", "2026-01-05_A") == ev.derive_seed(20260105, "shift", "2026-01-05_A")
    assert ev.derive_seed(1, "a") != ev.derive_seed(1, "b")
    assert 0 <= ev.derive_seed(2**40, "x") < 2**63


def test_extra_findings_are_appended_unchanged():
    extra = ev.Finding(kind=ev.KIND_SEQUENTIAL, line="L1", verdict=ev.TESTED, reason="chart")
    found = ev.evaluate_table(table({"L1": [30, 25, 15, 12, 10, 8]}), {"L1": BASE}, LIMITS,
                              seed=1, extra=[extra])
    assert found[-1] is extra


def test_negative_counts_are_refused_naming_the_argument():
    bad = CountTable(SHIFT, ("L1",), CATS, np.array([[1, -1, 0, 0, 0, 0]]), np.array([np.nan]))
    with pytest.raises(ValueError, match=r"table.counts: has a negative count at \[0, 1\]"):
        ev.evaluate_table(bad, {"L1": BASE}, LIMITS, seed=1)


def test_refining_only_near_decisions_gives_the_same_verdicts_as_refining_everywhere():
    # 8 seeded shifts of 8 lines, some lines with a moderate flash shift, n ~ 60..300
    from qcfit import policy

    rng = np.random.default_rng(20260105)
    shifted = np.array([0.26, 0.22, 0.24, 0.11, 0.10, 0.07])
    t = LIMITS
    crossings = 0
    for shift_no in range(8):
        rows = {f"L{i}": [int(x) for x in rng.multinomial(int(rng.integers(60, 300)),
                                                          shifted if i % 3 == 0 else PROPS)]
                for i in range(8)}
        tab = table(rows)
        base = {ln: BASE for ln in rows}
        quick = ev.evaluate_table(tab, base, t, seed=shift_no)
        full = (ev.fit_lines(tab, base, t, seed=shift_no)
                + [f for f in quick if f.kind != ev.KIND_BASELINE])
        verdicts = [(f.kind, f.line, f.verdict) for f in policy.judge(quick, "bh")]
        assert verdicts == [(f.kind, f.line, f.verdict) for f in policy.judge(full, "bh")]
        crossings += sum(v[2] in ("watch", "alarm") for v in verdicts)
        for f in quick:
            if f.kind == ev.KIND_BASELINE and f.method == "asymptotic":
                assert f.method_reason == ev.FAR_REASON
    assert crossings > 0  # the comparison covered decisions, not only quiet shifts


# --------------------------------------------------------------------------- batch helpers


def test_batch_helpers_equal_their_one_line_versions():
    # the vectorised builders must give exactly what the one-line functions give
    rng = np.random.default_rng(20260105)
    obs = rng.poisson(4.0, (40, 6))
    exp = rng.gamma(2.0, 2.0, (40, 6))
    res = rng.normal(0.0, 2.5, (40, 6))
    res[3, 2] = np.nan
    res[5] = np.nan
    res[7, :2] = 3.0  # a tie
    ref = rng.dirichlet(np.ones(6), 40)
    rows = ev.top_shifts_rows(CATS, obs, exp, res, ref)
    assert rows == [ev.top_shifts(CATS, obs[i], exp[i], res[i], ref[i]) for i in range(40)]
    mask = rng.random((40, 6)) > 0.2
    mask[0] = False
    exp[1, 0] = np.nan
    assert ev.cochran_rows(exp, mask).tolist() == [ev.cochran_ok(exp[i][mask[i]]) for i in range(40)]


def test_with_values_is_a_replace():
    f = by(run({"L1": [30, 25, 15, 12, 10, 8], "L2": [31, 24, 16, 11, 10, 8]}), ev.KIND_BASELINE, "L1")
    assert ev.with_values(f, severity="alarm", adjusted_pvalue=0.5) == dataclasses.replace(
        f, severity="alarm", adjusted_pvalue=0.5)
    assert ev.with_values(f) == f and ev.with_values(f) is not f
    with pytest.raises(TypeError, match="no field colour"):
        ev.with_values(f, colour="red")
