"""Alarm policy: multiplicity, both conditions, severities, persistence, life cycle, words."""

from __future__ import annotations

import dataclasses

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcfit import evaluate as ev
from qcfit import policy
from qcfit.config import Thresholds
from qcfit.evaluate import CategoryShift, Finding

# Benjamini & Hochberg (1995), JRSS-B 57:289-300, section 4 example: 15 p-values; at q = 0.05
# BH rejects the 4 smallest. Holm and BY reject 3 (statsmodels.stats.multitest.multipletests
# gives the same). Without adjustment 9 are below 0.05.
BH_EXAMPLE = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
              0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]


def a_finding(line: str = "L1", *, p: float = 0.5, w: float = 0.3, kind: str = ev.KIND_BASELINE,
           verdict: str = ev.TESTED, floor: float = 0.10, alarm: float = 0.01,
           watch: float = 0.05, cats: tuple[CategoryShift, ...] = ()) -> Finding:
    return Finding(kind=kind, line=line if kind != ev.KIND_BETWEEN else None, verdict=verdict,
                   reason="power 0.95", baseline_version_id=1 if kind != ev.KIND_BETWEEN else None,
                   statistic=10.0, dof=5, pvalue=p, effect_size=w, effect_name="w",
                   effect_floor=floor, alarm_level=alarm, watch_level=watch, power=0.95,
                   power_needed=0.8, method="asymptotic", n=200, top_categories=cats)


FLASH_UP = CategoryShift("FL", "up", 4.1, 40, 15.0, 0.39, 0.15)


def decide(findings, thresholds=None, **kw):
    kw.setdefault("shift_id", "2026-01-06_A")
    return policy.decide(findings, thresholds or Thresholds(), **kw)


# --------------------------------------------------------------------------- multiplicity


@pytest.mark.parametrize("method,expected", [("bh", 4), ("holm", 3), ("by", 3), ("none", 9)])
def test_multiplicity_on_the_benjamini_hochberg_example(method, expected):
    findings = [a_finding(f"L{i}", p=p, w=0.5, alarm=0.05, watch=0.05) for i, p in enumerate(BH_EXAMPLE)]
    result = decide(findings, Thresholds(multiple_testing=method, alarm_level=0.05))
    alarms = [f for f in result.findings if f.verdict == policy.ALARM]
    assert len(alarms) == expected
    assert len(result.by_action(policy.RAISE)) == expected


def test_bh_adjusted_pvalues_match_statsmodels():
    from statsmodels.stats.multitest import multipletests

    findings = [a_finding(f"L{i}", p=p) for i, p in enumerate(BH_EXAMPLE)]
    result = decide(findings)
    # statsmodels multipletests(method="fdr_bh") as the reference library
    reference = multipletests(BH_EXAMPLE, method="fdr_bh")[1]
    got = [f.adjusted_pvalue for f in result.findings]
    assert got == pytest.approx(list(reference), rel=1e-12)


def test_untestable_findings_do_not_count_in_the_family():
    lone = a_finding("L1", p=0.004)
    quiet = Finding(kind=ev.KIND_BASELINE, line="L2", verdict=ev.NOT_TESTED, reason="no defects")
    result = decide([lone, quiet], Thresholds(multiple_testing="holm"))
    assert result.findings[0].adjusted_pvalue == pytest.approx(0.004)  # m = 1, not 2
    assert result.findings[1].adjusted_pvalue is None


def test_line_vs_rest_is_its_own_family():
    main = a_finding("L1", p=0.004)
    rest = [a_finding(f"L{i}", p=0.5, kind=ev.KIND_VS_REST) for i in range(1, 5)]
    result = decide([main, *rest], Thresholds(multiple_testing="holm"))
    assert result.findings[0].adjusted_pvalue == pytest.approx(0.004)
    assert result.findings[1].adjusted_pvalue == pytest.approx(1.0)


# --------------------------------------------------------------------------- thresholds


@pytest.mark.parametrize(
    "p,w,verdict",
    [
        (0.001, 0.30, policy.ALARM),  # both conditions
        (0.001, 0.05, policy.IN_CONTROL),  # significant but below the effect floor
        (0.020, 0.30, policy.WATCH),  # between alarm and watch level
        (0.200, 0.90, policy.IN_CONTROL),  # large effect, not significant
        (0.010, 0.10, policy.WATCH),  # alarm needs p strictly below the level; w at the floor counts
    ],
)
def test_alarm_needs_both_adjusted_p_and_effect(p, w, verdict):
    result = decide([a_finding(p=p, w=w)])
    assert result.findings[0].verdict == verdict
    raised = result.by_action(policy.RAISE)
    assert len(raised) == (verdict != policy.IN_CONTROL)
    if raised:
        assert raised[0].severity == verdict


def test_small_effect_reason_says_why():
    f = decide([a_finding(p=1e-6, w=0.04)]).findings[0]
    assert f.verdict == policy.IN_CONTROL
    assert "too small to matter" in f.reason and "0.04" in f.reason


def test_too_little_data_is_never_in_control():
    f = a_finding(p=0.6, w=0.2, verdict=ev.TOO_LITTLE_DATA)
    result = decide([f])
    assert result.findings[0].verdict == ev.TOO_LITTLE_DATA
    assert result.decisions == ()


def test_too_little_data_still_alarms_on_a_clear_signal():
    f = a_finding(p=1e-5, w=0.8, verdict=ev.TOO_LITTLE_DATA)
    assert decide([f]).findings[0].verdict == policy.ALARM


def test_a_crossing_says_why_it_crossed_not_the_power_words():
    f = a_finding(p=1e-5, w=0.8, verdict=ev.TOO_LITTLE_DATA)
    f = dataclasses.replace(f, reason="too little data to tell: power 0.74 < 0.80", power=0.74)
    (g,) = decide([f]).findings
    assert g.severity == policy.ALARM and "too little data" not in g.reason
    assert g.reason == ("adjusted p 1e-05 < 0.01 and w 0.800 >= 0.1: alarm "
                        "(power 0.74 < 0.80, yet the signal is clear)")
    (g,) = decide([a_finding(p=0.03, w=0.3)]).findings
    assert (g.severity, g.reason) == (policy.WATCH, "adjusted p 0.03 < 0.05 and w 0.300 >= 0.1: watch")


def test_impossible_category_is_an_alarm():
    f = Finding(kind=ev.KIND_BASELINE, line="L2", verdict=ev.IMPOSSIBLE, reason="SCR (3)",
                baseline_version_id=1,
                top_categories=(CategoryShift("SCR", "up", float("inf"), 3, 0.0, 0.1, 0.0),))
    result = decide([f], names={"SCR": "scratch"})
    (d,) = result.by_action(policy.RAISE)
    assert d.severity == policy.ALARM
    assert d.summary == "scratch seen 3x, baseline share 0"


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0, 1), min_size=1, max_size=12), st.sampled_from(policy.METHODS))
def test_adjusted_p_never_below_raw_and_severity_consistent(ps, method):
    findings = [a_finding(f"L{i}", p=p) for i, p in enumerate(ps)]
    out = decide(findings, Thresholds(multiple_testing=method)).findings
    for f in out:
        assert f.adjusted_pvalue >= f.pvalue - 1e-12
        assert f.adjusted_pvalue <= 1.0
        if f.verdict == policy.ALARM:
            assert f.adjusted_pvalue < f.alarm_level and f.effect_size >= f.effect_floor


# --------------------------------------------------------------------------- persistence


def test_k_of_m_persistence():
    t = Thresholds(persistence_k=2, persistence_m=3)
    f = a_finding(p=1e-4)
    first = decide([f], t, history={})
    assert [d.action for d in first.decisions] == [policy.NOT_YET]
    assert first.findings[0].verdict == policy.ALARM  # the test crossed; no alarm yet
    again = decide([f], t, history={("L1", ev.KIND_BASELINE): [False, True]})
    assert [d.action for d in again.decisions] == [policy.RAISE]
    old = decide([f], t, history={("L1", ev.KIND_BASELINE): [True, False, False]})
    assert [d.action for d in old.decisions] == [policy.NOT_YET]  # only the last m-1 count


# --------------------------------------------------------------------------- life cycle


def active(**kw) -> policy.ActiveAlarm:
    base = dict(id=7, kind=ev.KIND_BASELINE, line="L1", severity=policy.WATCH, state=policy.OPEN,
                first_shift="2026-01-05_C", baseline_version_id=1, shifts=("2026-01-05_C",))
    return policy.ActiveAlarm(**(base | kw))


def test_open_alarm_is_updated_not_raised_again():
    result = decide([a_finding(p=1e-5, cats=(FLASH_UP,))], active=[active()], names={"FL": "flash"})
    (d,) = result.decisions
    assert d.action == policy.UPDATE and d.alarm_id == 7
    assert d.shifts == ("2026-01-05_C", "2026-01-06_A")
    assert d.severity == policy.ALARM  # escalated from watch
    assert d.summary == "flash share 2.6x baseline (adj. residual +4.1)"


def test_update_is_idempotent_for_the_same_shift():
    a = active(shifts=("2026-01-05_C", "2026-01-06_A"))
    (d,) = decide([a_finding(p=1e-5)], active=[a]).decisions
    assert d.shifts == ("2026-01-05_C", "2026-01-06_A")


def test_acknowledged_alarm_is_updated_too():
    (d,) = decide([a_finding(p=1e-5)], active=[active(state=policy.ACKNOWLEDGED)]).decisions
    assert d.action == policy.UPDATE


def test_auto_clear_after_n_in_control_shifts():
    t = Thresholds(auto_clear_after=3)
    a = active(in_control_shifts=("2026-01-06_A",))
    (d,) = decide([a_finding(p=0.7)], t, active=[a], shift_id="2026-01-06_B").decisions
    assert d.action == policy.IN_CONTROL_SHIFT and len(d.in_control_shifts) == 2
    a = active(in_control_shifts=("2026-01-06_A", "2026-01-06_B"))
    (d,) = decide([a_finding(p=0.7)], t, active=[a], shift_id="2026-01-06_C").decisions
    assert d.action == policy.AUTO_CLEAR
    assert "3 shifts" in d.note


def test_too_little_data_does_not_count_toward_auto_clear():
    a = active(in_control_shifts=("2026-01-05_A", "2026-01-05_B"))
    f = a_finding(p=0.7, verdict=ev.TOO_LITTLE_DATA)  # shift 2026-01-06_A
    assert decide([f], Thresholds(auto_clear_after=3), active=[a]).decisions == ()


def test_crossing_resets_the_in_control_streak():
    a = active(in_control_shifts=("2026-01-05_A", "2026-01-05_B"))
    (d,) = decide([a_finding(p=1e-5)], active=[a]).decisions
    assert d.action == policy.UPDATE and d.in_control_shifts == ()


def test_reevaluation_that_no_longer_crosses_withdraws_the_alarm():
    a = active(first_shift="2026-01-06_A", shifts=("2026-01-06_A",))
    (d,) = decide([a_finding(p=0.7)], active=[a]).decisions
    assert d.action == policy.WITHDRAW
    assert "no longer supports" in d.note


def test_fault_finding_raises_service_fault_for_that_line_only():
    fault = Finding(kind=ev.KIND_BASELINE, line="L2", verdict=ev.FAULT,
                    reason="baseline test failed: ValueError: boom")
    result = decide([a_finding("L1", p=0.5), fault])
    (d,) = result.decisions
    assert (d.action, d.kind, d.line) == (policy.RAISE, policy.KIND_FAULT, "L2")
    assert "ValueError: boom" in d.summary


def test_service_fault_alarm_clears_after_clean_shifts():
    a = active(kind=policy.KIND_FAULT, line=None, severity=policy.ALARM,
               in_control_shifts=("2026-01-05_A", "2026-01-05_B"))  # raised by 2026-01-05_C
    (d,) = decide([a_finding("L1", p=0.5)], Thresholds(auto_clear_after=3), active=[a]).decisions
    assert d.action == policy.AUTO_CLEAR


def test_failed_evaluation_updates_an_open_plant_fault():
    a = active(kind=policy.KIND_FAULT, line=None, severity=policy.ALARM)
    (d,) = policy.fault_decisions("2026-01-06_A", "StoreError: locked", [a])
    assert d.action == policy.UPDATE and d.alarm_id == 7
    (d,) = policy.fault_decisions("2026-01-06_A", "StoreError: locked", [])
    assert d.action == policy.RAISE and d.kind == policy.KIND_FAULT


def test_between_lines_alarm_names_the_differing_line():
    between = a_finding(kind=ev.KIND_BETWEEN, p=1e-6, w=0.3)
    between = dataclasses.replace(between, effect_name="V")
    vs = a_finding("L3", kind=ev.KIND_VS_REST, p=1e-7, w=0.4,
                cats=(CategoryShift("FL", "up", 5.2, 30, 12.0, 0.3, 0.12),))
    result = decide([between, vs], names={"FL": "flash"})
    (d,) = result.decisions
    assert d.kind == ev.KIND_BETWEEN and d.line is None
    assert d.summary == "lines differ (V 0.30); L3: flash share 2.5x rest (adj. residual +5.2)"
    assert d.details["lines_differing"] == ["L3"]
    assert [c.code for c in d.categories] == ["FL"]  # from the line that differs
    assert d.category_lines == ("L3",)


def test_between_lines_categories_carry_the_lines_the_summary_names():
    between = dataclasses.replace(a_finding(kind=ev.KIND_BETWEEN, p=1e-6, w=0.3), effect_name="V")
    vs = [a_finding("L2", kind=ev.KIND_VS_REST, p=1e-8, w=0.5,
                    cats=(CategoryShift("FL", "up", 8.4, 60, 20.0, 0.3, 0.1),
                          CategoryShift("SCR", "down", -3.0, 10, 20.0, 0.1, 0.2))),
          a_finding("L4", kind=ev.KIND_VS_REST, p=1e-4, w=0.3,
                    cats=(CategoryShift("SH", "up", 3.3, 25, 11.0, 0.25, 0.11),))]
    (d,) = decide([between, *vs], names={"FL": "flash", "SH": "short shot"}).decisions
    assert d.summary.startswith("lines differ (V 0.30); L2: flash share 3.0x rest")
    assert "; L4: short shot share 2.3x rest" in d.summary
    assert [(ln, c.code) for ln, c in zip(d.category_lines, d.categories, strict=True)] == [
        ("L2", "FL"), ("L2", "SCR"), ("L4", "SH")]


def test_rate_words():
    f = dataclasses.replace(
        a_finding(kind=ev.KIND_RATE, p=1e-6, w=1.8, floor=1.25), n=54,
        details={"units": 2500.0, "expected_defects": 30.0})
    (d,) = decide([f]).decisions
    assert d.summary == "defect rate 1.8x baseline (54 defects in 2,500 units, expected 30.0)"


def test_unknown_multiple_testing_method_is_refused():
    with pytest.raises(ValueError, match="multiple_testing"):
        policy.adjust([0.1, 0.2], "bonferroni")


# --------------------------------------------------------------------------- re-evaluation


def test_an_alarm_raised_by_a_later_shift_is_ignored():
    # judging 2026-01-06_A again: an alarm raised on 2026-01-08_B does not exist yet there
    later = active(first_shift="2026-01-08_B", shifts=("2026-01-08_B",), raised_after=True,
                   crossed_after=True, in_control_shifts=("2026-01-09_A", "2026-01-09_B"))
    assert decide([a_finding(p=0.7)], Thresholds(auto_clear_after=3), active=[later]).decisions == ()
    (d,) = decide([a_finding(p=1e-5)], active=[later]).decisions
    assert d.action == policy.RAISE and d.alarm_id is None


def test_a_crossing_shift_reuses_the_alarm_that_covers_it_whatever_its_state():
    for state in (policy.CLEARED, policy.ACKNOWLEDGED):
        covering = active(state=state, shifts=("2026-01-05_C", "2026-01-06_A"),
                          in_control_shifts=("2026-01-06_B",), crossed_after=False)
        (d,) = decide([a_finding(p=1e-5)], active=[covering]).decisions
        assert (d.action, d.alarm_id) == (policy.UPDATE, 7)
        assert d.shifts == covering.shifts and d.in_control_shifts == ("2026-01-06_B",)


def test_in_control_before_the_last_crossing_does_not_count_toward_auto_clear():
    a = active(shifts=("2026-01-05_C", "2026-01-06_B"), crossed_after=True,
               in_control_shifts=("2026-01-06_C", "2026-01-07_A"))
    assert decide([a_finding(p=0.7)], Thresholds(auto_clear_after=3), active=[a]).decisions == ()


# --------------------------------------------------------------------------- sequential start


def a_signal(t: int, *signals: tuple[str, int, str | None]) -> Finding:
    """A sequential crossing at chart step t; signals (chart, shifts back, start shift), the
    first ranking first."""
    sigs = [{"chart": c, "shifts_back": b, "start_shift": s, "statistic": 10.0, "limit": 5.0}
            for c, b, s in signals]
    words = f"flash up 14.0% -> 26.6% (x1.90); {signals[0][0]} 10.00 >= limit 5.00; " \
            f"change most likely began in shift {signals[0][2]} ({signals[0][1]} shifts back)"
    return Finding(kind=ev.KIND_SEQUENTIAL, line="L2", verdict=policy.ALARM,
                   severity=policy.ALARM, reason=words, effect_size=2.0,
                   details={"t": t, "signals": sigs})


def test_the_start_estimate_is_kept_from_the_raising_shift():
    # raised on 2026-10-07_B by the bank chart: the change began in that very shift
    (d,) = decide([a_signal(30, ("bank (CT -> FL)", 0, "2026-10-07_B"))],
                  shift_id="2026-10-07_B").decisions
    assert d.action == policy.RAISE
    assert d.summary.endswith("; change most likely began in shift 2026-10-07_B")
    held = d.details["change_start"]
    a = active(kind=ev.KIND_SEQUENTIAL, line="L2", severity=policy.ALARM,
               first_shift="2026-10-07_B", shifts=("2026-10-07_B",), change_start=held)
    # 10 charted shifts later the MEWMA ranks first and points 26 shifts back: no drift
    later = a_signal(40, ("MEWMA", 26, "2026-09-28_A"), ("bank (CT -> FL)", 10, "2026-10-07_B"))
    (u,) = decide([later], active=[a], shift_id="2026-10-11_A").decisions
    assert u.action == policy.UPDATE and u.details["change_start"] == held
    assert u.summary.endswith("; change most likely began in shift 2026-10-07_B")
    assert u.summary.count("most likely began") == 1
    # the bank chart restarted (its run now begins at step 48): the estimate moves with it
    again = a_signal(50, ("bank (CT -> FL)", 2, "2026-10-14_C"))
    (r,) = decide([again], active=[a], shift_id="2026-10-15_B").decisions
    assert r.summary.endswith("change most likely began in shift 2026-10-14_C "
                              "(2 shifts before 2026-10-15_B)")
