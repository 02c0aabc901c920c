"""The alarm log on a real temp SQLite store: idempotent writes, states, who/when/note."""

from __future__ import annotations

import dataclasses
import datetime as dt
import threading

import pytest
from sqlalchemy import func, select
from test_service import make_store

from qcfit import alarmlog, policy
from qcfit import evaluate as ev
from qcfit.errors import InvalidArgumentError, NotFoundError
from qcfit.evaluate import CategoryShift
from qcfit.store.engine import read_tx, to_utc_naive, write_tx
from qcfit.store.schema import alarm, alarm_event
from qcfit.store.shifts import ensure_shifts

UTC = dt.UTC
NOW = dt.datetime(2026, 1, 7, 8, 0, tzinfo=UTC)


@pytest.fixture
def store(tmp_path, plant_config_text):
    from qcfit.calendar import ShiftCalendar

    config, engine = make_store(tmp_path, plant_config_text)
    cal = ShiftCalendar.from_config(config)
    shifts = [cal.from_id(i) for i in ("2026-01-06_A", "2026-01-06_B", "2026-01-06_C")]
    with write_tx(engine) as conn:
        rows = ensure_shifts(conn, shifts)
    yield engine, shifts, rows
    engine.dispose()


def raise_decision(shift_id: str, *, line="L1", severity=policy.WATCH, p=0.003):
    cat = CategoryShift("FL", "up", 3.4, 30, 15.0, 0.3, 0.15)
    return policy.AlarmDecision(
        action=policy.RAISE, kind=ev.KIND_BASELINE, line=line, shift_id=shift_id,
        severity=severity, baseline_version_id=None, pvalue=p / 4, adjusted_pvalue=p,
        effect_size=0.25, categories=(cat,), summary="flash share 2.0x baseline (adj. residual +3.4)",
        shifts=(shift_id,), details={"observed": [30.0], "categories": ["FL"]})


def apply(engine, shifts, rows, i, decisions):
    s = shifts[i]
    with write_tx(engine) as conn:
        return alarmlog.apply_decisions(conn, decisions, shift_row_id=rows[s.id],
                                        shift_start_utc=to_utc_naive(s.start), now=NOW)


def count(engine, table, *where) -> int:
    with read_tx(engine) as conn:
        return int(conn.execute(select(func.count()).select_from(table).where(*where)).scalar())


def test_raising_twice_for_the_same_shift_keeps_one_alarm(store):
    engine, shifts, rows = store
    first = apply(engine, shifts, rows, 0, [raise_decision(shifts[0].id)])
    second = apply(engine, shifts, rows, 0, [raise_decision(shifts[0].id, p=0.002)])
    assert len(first.opened) == 1 and second.opened == () and second.updated == first.opened
    assert count(engine, alarm) == 1
    assert count(engine, alarm_event) == 1  # one "open" event
    a = alarmlog.get_alarm(engine, first.opened[0])
    assert a.adjusted_pvalue == 0.002 and a.shift_count == 1
    assert a.categories[0]["code"] == "FL" and a.categories[0]["direction"] == "up"


def test_update_through_the_policy_then_same_shift_again(store):
    engine, shifts, rows = store
    (alarm_id,) = apply(engine, shifts, rows, 0, [raise_decision(shifts[0].id)]).opened
    finding = ev.Finding(kind=ev.KIND_BASELINE, line="L1", verdict=ev.TESTED, reason="r",
                         pvalue=1e-6, effect_size=0.4, effect_floor=0.1, n=300, effect_name="w",
                         top_categories=(CategoryShift("FL", "up", 5.0, 60, 30.0, 0.2, 0.1),))
    for _ in range(2):  # the same shift applied twice counts once
        with write_tx(engine) as conn:
            active = alarmlog.active_alarms(conn, rows[shifts[1].id])
        decided = policy.decide([finding], _thresholds(), shift_id=shifts[1].id, active=active)
        apply(engine, shifts, rows, 1, decided.decisions)
    a = alarmlog.get_alarm(engine, alarm_id)
    assert a.shift_count == 2 and a.last_shift_id == shifts[1].id
    assert a.severity == policy.ALARM and a.shift_id == shifts[0].id
    assert count(engine, alarm) == 1
    assert count(engine, alarm_event, alarm_event.c.action == "update") == 1


def test_prefetched_rows_and_a_fresh_shift_write_what_the_plain_path_writes(store):
    """``rows`` (read with the active alarms) and ``fresh`` (no event of the shift yet) only
    save queries: an update then a second decision on the same alarm in the same apply still
    give one update event, and the figures of the last decision."""
    engine, shifts, rows = store
    (alarm_id,) = apply(engine, shifts, rows, 0, [raise_decision(shifts[0].id)]).opened
    finding = ev.Finding(kind=ev.KIND_BASELINE, line="L1", verdict=ev.TESTED, reason="r",
                         pvalue=1e-6, effect_size=0.4, effect_floor=0.1, n=300, effect_name="w",
                         top_categories=(CategoryShift("FL", "up", 5.0, 60, 30.0, 0.2, 0.1),))
    s = shifts[1]
    with write_tx(engine) as conn:
        assert alarmlog.shifts_with_events(conn, [rows[s.id], rows[shifts[0].id]]) == {
            rows[shifts[0].id]}
        active, prefetched = alarmlog.active_alarms_with_rows(conn, rows[s.id])
        assert set(prefetched) == {alarm_id}
        (update,) = policy.decide([finding], _thresholds(), shift_id=s.id,
                                  active=active).decisions
        again = dataclasses.replace(update, effect_size=0.5)
        applied = alarmlog.apply_decisions(conn, [update, again], shift_row_id=rows[s.id],
                                           shift_start_utc=to_utc_naive(s.start), now=NOW,
                                           rows=prefetched, fresh=True)
    assert applied.updated == (alarm_id, alarm_id)
    assert count(engine, alarm_event, alarm_event.c.action == "update") == 1
    a = alarmlog.get_alarm(engine, alarm_id)
    assert a.effect_size == 0.5 and a.shift_count == 2 and a.last_shift_id == s.id


def _thresholds():
    from qcfit.config import Thresholds

    return Thresholds()


def test_open_ack_clear_with_who_when_and_note(store):
    engine, shifts, rows = store
    (alarm_id,) = apply(engine, shifts, rows, 0, [raise_decision(shifts[0].id)]).opened
    later = NOW + dt.timedelta(hours=2)
    a = alarmlog.acknowledge(engine, alarm_id, by=" Ann Lee ", note="checking mould 4", now=later)
    assert a.state == "acknowledged" and a.updated == later
    with pytest.raises(InvalidArgumentError, match="is acknowledged by Ann Lee at 2026-01-07T10:00"):
        alarmlog.acknowledge(engine, alarm_id, by="Bob", now=later)
    with pytest.raises(InvalidArgumentError, match="--note: say why"):
        alarmlog.clear(engine, alarm_id, by="Bob", note="  ", now=later)
    alarmlog.clear(engine, alarm_id, by="Bob", note="insert replaced", now=later)
    with pytest.raises(InvalidArgumentError, match="is cleared by Bob"):
        alarmlog.clear(engine, alarm_id, by="Bob", note="again", now=later)
    story = alarmlog.alarm_story(engine, alarm_id)
    assert [(e.action, e.by, e.from_state, e.to_state, e.note) for e in story.events] == [
        ("open", "qcfit", None, "open", "flash share 2.0x baseline (adj. residual +3.4)"),
        ("acknowledge", "Ann Lee", "open", "acknowledged", "checking mould 4"),
        ("clear", "Bob", "acknowledged", "cleared", "insert replaced"),
    ]
    assert story.events[1].at == later
    assert story.events[0].shift_id == shifts[0].id


def test_open_can_be_cleared_directly_and_unknown_ids_are_refused(store):
    engine, shifts, rows = store
    (alarm_id,) = apply(engine, shifts, rows, 0, [raise_decision(shifts[0].id)]).opened
    assert alarmlog.clear(engine, alarm_id, by="Bob", note="false alarm: gauge fault", now=NOW).state == "cleared"
    with pytest.raises(NotFoundError, match="no alarm 42"):
        alarmlog.acknowledge(engine, 42, by="Ann", now=NOW)


def test_escalation_reopens_an_acknowledged_watch(store):
    engine, shifts, rows = store
    (alarm_id,) = apply(engine, shifts, rows, 0, [raise_decision(shifts[0].id)]).opened
    alarmlog.acknowledge(engine, alarm_id, by="Ann", now=NOW)
    worse = ev.Finding(kind=ev.KIND_BASELINE, line="L1", verdict=ev.TESTED, reason="r", pvalue=1e-9,
                       effect_size=0.5, effect_floor=0.1, n=400, effect_name="w")
    with write_tx(engine) as conn:
        active = alarmlog.active_alarms(conn, rows[shifts[1].id])
    apply(engine, shifts, rows, 1,
          policy.decide([worse], _thresholds(), shift_id=shifts[1].id, active=active).decisions)
    a = alarmlog.get_alarm(engine, alarm_id)
    assert (a.state, a.severity) == ("open", "alarm")
    last = alarmlog.alarm_story(engine, alarm_id).events[-1]
    assert (last.action, last.from_state, last.to_state) == ("update", "acknowledged", "open")
    assert "escalated" in last.note


def test_list_filters(store):
    engine, shifts, rows = store
    apply(engine, shifts, rows, 0, [raise_decision(shifts[0].id, line="L1"),
                                    raise_decision(shifts[0].id, line="L2")])
    ids = {a.line: a.id for a in alarmlog.list_alarms(engine)}
    alarmlog.clear(engine, ids["L2"], by="Ann", note="noise", now=NOW)
    assert [a.line for a in alarmlog.list_alarms(engine, open_only=True)] == ["L1"]
    assert [a.line for a in alarmlog.list_alarms(engine, line="L2")] == ["L2"]
    assert alarmlog.list_alarms(engine, since=NOW + dt.timedelta(days=1)) == []


def test_two_people_acknowledging_at_once_one_wins(store):
    engine, shifts, rows = store
    (alarm_id,) = apply(engine, shifts, rows, 0, [raise_decision(shifts[0].id)]).opened
    results: list[str] = []

    def ack(name: str) -> None:
        try:
            alarmlog.acknowledge(engine, alarm_id, by=name, now=NOW)
            results.append("ok")
        except InvalidArgumentError:
            results.append("refused")

    threads = [threading.Thread(target=ack, args=(n,)) for n in ("Ann", "Bob", "Cy", "Di")]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(results) == ["ok", "refused", "refused", "refused"]
    assert count(engine, alarm_event, alarm_event.c.action == "acknowledge") == 1


def test_json_row_fields_and_plant_time(store):
    engine, shifts, rows = store
    (alarm_id,) = apply(engine, shifts, rows, 0, [raise_decision(shifts[0].id)]).opened
    row = alarmlog.get_alarm(engine, alarm_id).as_json(shifts[0].start.tzinfo)
    assert row["shift_start"] == shifts[0].start.isoformat()
    assert row["line"] == "L1" and row["categories"] == [
        {"code": "FL", "direction": "up", "adjusted_residual": 3.4}]


def test_service_fault_without_a_shift_is_raised_once_then_updated(store):
    engine, _, _ = store
    first = alarmlog.record_service_fault(engine, "config plant.toml: thresholds.alarm_level: must be < 1",
                                          now=NOW)
    again = alarmlog.record_service_fault(engine, "config plant.toml: still invalid",
                                          now=NOW + dt.timedelta(minutes=5))
    assert first == again
    a = alarmlog.get_alarm(engine, first)
    assert (a.kind, a.line, a.state, a.shift_id) == ("service-fault", None, "open", None)
    assert a.summary == "service: config plant.toml: still invalid"
    assert [e.action for e in alarmlog.alarm_story(engine, first).events] == ["open", "update"]


def test_a_service_fault_after_a_cleared_one_is_open_again(store):
    # faults tied to no shift share one key: the cleared alarm must be opened again, visibly
    engine, _, _ = store
    first = alarmlog.record_service_fault(engine, "config plant.toml: bad key", now=NOW)
    alarmlog.clear(engine, first, by="Dana", note="config fixed", now=NOW + dt.timedelta(hours=1))
    later = NOW + dt.timedelta(hours=2)
    second = alarmlog.record_service_fault(engine, "store locked for 30 s", now=later)
    a = alarmlog.get_alarm(engine, second)
    assert (a.state, a.summary, a.opened) == ("open", "service: store locked for 30 s", later)
    assert [x.id for x in alarmlog.list_alarms(engine, open_only=True)] == [second]
    events = alarmlog.alarm_story(engine, second).events
    assert [(e.action, e.from_state, e.to_state) for e in events] == [
        ("open", None, "open"), ("clear", "open", "cleared"), ("open", "cleared", "open")]


def test_a_shift_without_defects_is_not_tested_by_the_sequential_charts(tmp_path,
                                                                         plant_config_text):
    # a line with no defects says nothing about its mix: the chart finding is "not tested"
    # (common practice, no source: the same words as the other tests with n = 0) and such a
    # shift cannot count toward auto-clearing that line's alarms
    import numpy as np
    from test_service import LINES, healthy, load_counts

    from qcfit import service
    from qcfit.calendar import ShiftCalendar
    from qcfit.store.evaluations import findings_of

    config, engine = make_store(tmp_path, plant_config_text)
    cal = ShiftCalendar.from_config(config)
    shifts = [cal.from_id(i) for i in ("2026-01-06_A", "2026-01-06_B", "2026-01-06_C")]
    rng = np.random.default_rng(5)
    for i, s in enumerate(shifts):
        counts = {ln: healthy(300, rng) for ln in LINES}
        if i == 1:
            counts["L1"] = [0] * 6
        load_counts(engine, s, counts)
    got = service.evaluate_shifts(engine, config, shifts, now=shifts[-1].end + dt.timedelta(hours=1))
    with read_tx(engine) as conn:
        seq = [{f["line"]: f for f in findings_of(conn, g.evaluation_id)
                if f["kind"] == ev.KIND_SEQUENTIAL} for g in got]
    assert seq[1]["L1"]["verdict"] == ev.NOT_TESTED
    assert seq[1]["L1"]["details"]["reason"] == "not tested: no defects this shift"
    assert seq[1]["L2"]["verdict"] == policy.IN_CONTROL
    assert seq[0]["L1"]["verdict"] == seq[2]["L1"]["verdict"] == policy.IN_CONTROL
    engine.dispose()
    # ... and does not count toward auto-clearing the line's sequential alarm
    from qcfit.config import Thresholds

    a = policy.ActiveAlarm(id=1, kind=ev.KIND_SEQUENTIAL, line="L1", severity=policy.ALARM,
                           state=policy.OPEN, first_shift="2026-01-05_B", baseline_version_id=None,
                           shifts=("2026-01-05_B",), in_control_shifts=("2026-01-05_C",
                                                                        "2026-01-06_A"))
    f = ev.Finding(kind=ev.KIND_SEQUENTIAL, line="L1", verdict=ev.NOT_TESTED,
                   reason="not tested: no defects this shift")
    assert policy.decide([f], Thresholds(auto_clear_after=3), shift_id="2026-01-06_B",
                         active=[a]).decisions == ()
