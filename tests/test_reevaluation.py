"""Re-evaluating shifts that are already evaluated, on unchanged data, leaves the alarm log as
it was: no alarm opened, ids, states, acknowledgements and state-change events unchanged.
Real temp SQLite stores, the real service (sequential charts included)."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from sqlalchemy import select
from test_service import LINES, flash_jump, healthy, load_counts, make_store, plant_text

from qcfit import alarmlog, service
from qcfit.calendar import ShiftCalendar
from qcfit.store.engine import read_tx
from qcfit.store.schema import alarm_event

N_SHIFTS = 24
L3_JUMP = range(3, 6)  # a jump that ends: its alarms clear themselves
L2_JUMP = range(15, N_SHIFTS)  # a jump that lasts to the end: its alarm stays open


@pytest.fixture
def backfilled(tmp_path, plant_config_text):
    text = plant_text(plant_config_text, min_effect_w=0.3, min_effect_v=0.3, mc_draws=2000,
                      auto_clear_after=3)
    config, engine = make_store(tmp_path, text)
    cal = ShiftCalendar.from_config(config)
    start = cal.from_id("2026-01-06_A").start
    shifts = cal.instances_between(start, start + dt.timedelta(days=N_SHIFTS))[:N_SHIFTS]
    rng = np.random.default_rng(2026)
    for i, s in enumerate(shifts):
        counts = {ln: healthy(300, rng) for ln in LINES}
        if i in L3_JUMP:
            counts["L3"] = flash_jump(300, rng)
        if i in L2_JUMP:
            counts["L2"] = flash_jump(300, rng)
        load_counts(engine, s, counts, {ln: 25000 for ln in LINES})
    now = shifts[-1].end + dt.timedelta(hours=1)
    first = service.evaluate_shifts(engine, config, shifts, now=now)
    assert all(s.ok for s in first)
    yield config, engine, shifts, now
    engine.dispose()


def log_state(engine) -> tuple[list[tuple], list[tuple]]:
    """Every alarm (id, kind, line, raising shift, state, severity, shifts covered) and every
    state-change event (alarm, action, by, from, to, shift)."""
    alarms = [(a.id, a.kind, a.line, a.shift_id, a.state, a.severity, a.shift_count)
              for a in alarmlog.list_alarms(engine)]
    with read_tx(engine) as conn:
        events = [tuple(r) for r in conn.execute(select(
            alarm_event.c.alarm_id, alarm_event.c.action, alarm_event.c.by,
            alarm_event.c.from_state, alarm_event.c.to_state, alarm_event.c.shift_id)
            .order_by(alarm_event.c.id))]
    return alarms, events


def test_re_evaluating_a_range_twice_after_an_ack_changes_nothing(backfilled):
    config, engine, shifts, now = backfilled
    alarms = alarmlog.list_alarms(engine)
    still_open = [a for a in alarms if a.state == "open" and a.line == "L2"]
    assert still_open, "the lasting L2 jump leaves an open alarm"
    assert any(a.state == "cleared" and a.line == "L3" for a in alarms)  # the ended jump
    acked = alarmlog.acknowledge(engine, still_open[0].id, by="Dana", note="looking",
                                 now=now + dt.timedelta(minutes=5))
    before = log_state(engine)
    for k in (1, 2):
        again = service.evaluate_shifts(engine, config, shifts, now=now + dt.timedelta(hours=k))
        assert all(s.ok for s in again)
        assert [o for s in again for o in s.opened] == []  # 0 alarms opened
        assert log_state(engine) == before  # ids, states, acknowledgement, events unchanged
    assert alarmlog.get_alarm(engine, acked.id).state == "acknowledged"


def test_re_evaluating_one_old_shift_does_not_clear_a_later_alarm(backfilled):
    # a shift before the open alarm was raised is in control: it must not count toward the
    # alarm's auto-clear (the alarm did not exist yet at that shift)
    config, engine, shifts, now = backfilled
    before = log_state(engine)
    for k, i in enumerate((7, 8, 9, 3)):
        got = service.evaluate_shift(engine, config, shifts[i], now=now + dt.timedelta(hours=k))
        assert got.ok and got.opened == () and got.cleared == ()
    assert log_state(engine) == before
