"""Shift calendar: DST nights, gaps, non-production days, scalar vs vectorized assignment.

Reference dates of the 2025 clock changes used below:
- USA (America/Chicago): DST from the second Sunday of March to the first Sunday of November,
  changing at 02:00 local time (Energy Policy Act of 2005, section 110, 15 U.S.C. 260a).
  2025: Sunday 9 March (CST -6 -> CDT -5) and Sunday 2 November (CDT -5 -> CST -6).
- EU (Europe/Berlin): summer time from the last Sunday of March to the last Sunday of October,
  changing at 01:00 UTC (Directive 2000/84/EC, articles 2 and 3).
  2025: Sunday 30 March (CET +1 -> CEST +2) and Sunday 26 October (CEST +2 -> CET +1).
- India (Asia/Kolkata): UTC+05:30 all year, no DST (IANA tz database, file "asia"; from memory
  that IST has had no DST since 1945). Japan (Asia/Tokyo): UTC+09:00 all year, no DST since
  1951 (IANA tz database, file "asia").
"""

from __future__ import annotations

import datetime as dt
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcfit.calendar import ShiftCalendar
from qcfit.config import ShiftSpec, load_config
from qcfit.errors import InvalidArgumentError, NotFoundError

UTC = dt.UTC
T = dt.time
ABC = (ShiftSpec("A", T(6), T(14)), ShiftSpec("B", T(14), T(22)), ShiftSpec("C", T(22), T(6)))


def cal(zone: str, shifts=ABC, weekdays=(), dates=()) -> ShiftCalendar:
    return ShiftCalendar(ZoneInfo(zone), shifts, weekdays, dates)


def utc(*args: int) -> dt.datetime:
    return dt.datetime(*args, tzinfo=UTC)


def day(text: str) -> dt.date:
    return dt.date.fromisoformat(text)


# --------------------------------------------------------------------------- the DST nights

@pytest.mark.parametrize(
    ("zone", "night", "start_utc", "end_utc", "hours"),
    [
        # 22:00 CST (-6) -> 06:00 CDT (-5): 7 h (US rule, see module docstring)
        ("America/Chicago", "2025-03-08", utc(2025, 3, 9, 4), utc(2025, 3, 9, 11), 7.0),
        # 22:00 CDT (-5) -> 06:00 CST (-6): 9 h
        ("America/Chicago", "2025-11-01", utc(2025, 11, 2, 3), utc(2025, 11, 2, 12), 9.0),
        # 22:00 CET (+1) -> 06:00 CEST (+2): 7 h (Directive 2000/84/EC)
        ("Europe/Berlin", "2025-03-29", utc(2025, 3, 29, 21), utc(2025, 3, 30, 4), 7.0),
        # 22:00 CEST (+2) -> 06:00 CET (+1): 9 h
        ("Europe/Berlin", "2025-10-25", utc(2025, 10, 25, 20), utc(2025, 10, 26, 5), 9.0),
        # no DST: 22:00 IST (+05:30) -> 06:00 IST, 8 h on the US and EU change nights alike
        ("Asia/Kolkata", "2025-03-08", utc(2025, 3, 8, 16, 30), utc(2025, 3, 9, 0, 30), 8.0),
        ("Asia/Kolkata", "2025-10-25", utc(2025, 10, 25, 16, 30), utc(2025, 10, 26, 0, 30), 8.0),
        ("Asia/Tokyo", "2025-11-01", utc(2025, 11, 1, 13), utc(2025, 11, 1, 21), 8.0),
    ],
)
def test_night_shift_has_its_real_length(zone, night, start_utc, end_utc, hours):
    inst = cal(zone).instance(day(night), "C")
    assert inst.start == start_utc and inst.end == end_utc
    assert inst.hours == hours
    assert (inst.end - inst.start) == dt.timedelta(hours=hours)  # exact, not wall-clock 8 h
    assert inst.id == f"{night}_C" and inst.date == day(night)
    assert inst.start.strftime("%H:%M") == "22:00" and inst.end.strftime("%H:%M") == "06:00"


@pytest.mark.parametrize(
    ("zone", "first_day", "night", "hours"),
    [
        ("America/Chicago", "2025-03-07", "2025-03-08_C", 7),
        ("America/Chicago", "2025-10-31", "2025-11-01_C", 9),
        ("Europe/Berlin", "2025-03-28", "2025-03-29_C", 7),
        ("Europe/Berlin", "2025-10-24", "2025-10-25_C", 9),
        ("Asia/Kolkata", "2025-03-28", None, 8),
        ("Asia/Tokyo", "2025-10-24", None, 8),
    ],
)
def test_one_event_per_minute_is_counted_exactly_once(zone, first_day, night, hours):
    # Three days around the change, one event per UTC minute: every event lands in exactly
    # one shift; each shift gets its real minutes; the total is the number of events.
    calendar = cal(zone)
    since = calendar.localize(dt.datetime.combine(day(first_day), T(6)))
    until = calendar.localize(dt.datetime.combine(day(first_day) + dt.timedelta(days=3), T(6)))
    ts = np.arange(np.datetime64(since.astimezone(UTC).replace(tzinfo=None), "m"),
                   np.datetime64(until.astimezone(UTC).replace(tzinfo=None), "m"),
                   np.timedelta64(1, "m"))
    assert len(ts) == 3 * 24 * 60 + {9: 60, 7: -60, 8: 0}[hours]
    instances, index = calendar.assign(ts)
    assert len(instances) == 9 and (index >= 0).all()
    counts = np.bincount(index, minlength=len(instances))
    by_id = {inst.id: int(n) for inst, n in zip(instances, counts, strict=True)}
    assert sum(by_id.values()) == len(ts)
    for inst in instances:
        assert by_id[inst.id] == round(inst.hours * 60)
    if night is not None:
        assert by_id[night] == hours * 60
    between = calendar.instances_between(since, until)
    assert between == instances
    assert between[0].start == since and between[-1].end == until
    for a, b in zip(between, between[1:], strict=False):
        assert a.end == b.start  # one shared boundary instant: nothing lost, nothing doubled


def test_ended_by_around_the_autumn_night():
    calendar = cal("Europe/Berlin")
    since = utc(2025, 10, 25, 0)
    night_end = utc(2025, 10, 26, 5)  # 06:00 CET
    before = calendar.ended_by(since, night_end - dt.timedelta(microseconds=1))
    at = calendar.ended_by(since, night_end)
    assert [i.id for i in before] == ["2025-10-25_A", "2025-10-25_B"]
    assert [i.id for i in at] == ["2025-10-25_A", "2025-10-25_B", "2025-10-25_C"]
    assert at[-1].hours == 9
    # the night of 24/25 started before `since`: not listed even though it ended after it
    assert calendar.ended_by(utc(2025, 10, 24, 21), night_end)[0].id == "2025-10-25_A"
    assert calendar.ended_by(night_end, night_end) == []


def test_ended_by_around_the_spring_night_in_chicago():
    calendar = cal("America/Chicago")
    since = utc(2025, 3, 8, 12)  # 06:00 CST on Saturday
    now = utc(2025, 3, 9, 11)  # 06:00 CDT on Sunday
    ended = calendar.ended_by(since, now)
    assert [(i.id, i.hours) for i in ended] == [
        ("2025-03-08_A", 8.0), ("2025-03-08_B", 8.0), ("2025-03-08_C", 7.0)]
    assert calendar.next_end(now).id == "2025-03-09_A"
    assert calendar.next_end(now - dt.timedelta(seconds=1)).id == "2025-03-08_C"


def test_instances_between_is_half_open_and_sorted():
    calendar = cal("America/Chicago")
    a = calendar.instance(day("2025-11-02"), "A")
    got = calendar.instances_between(a.start, a.start + dt.timedelta(hours=16))
    assert [i.id for i in got] == ["2025-11-02_A", "2025-11-02_B"]
    assert calendar.instances_between(a.start + dt.timedelta(microseconds=1), a.end) == []
    assert calendar.instances_between(a.end, a.start) == []


# --------------------------------------------------------------------------- gaps and boundaries

def test_boundary_in_the_spring_gap_moves_to_the_change():
    # Shifts meeting at 02:30: on 9 March 2025 that wall time does not exist in Chicago; the
    # boundary becomes the first valid instant, 03:00 CDT = 08:00 UTC, for both shifts.
    shifts = (ShiftSpec("N", T(18, 30), T(2, 30)), ShiftSpec("M", T(2, 30), T(10, 30)),
              ShiftSpec("D", T(10, 30), T(18, 30)))
    calendar = cal("America/Chicago", shifts)
    night = calendar.instance(day("2025-03-08"), "N")
    morning = calendar.instance(day("2025-03-09"), "M")
    assert night.end == morning.start == utc(2025, 3, 9, 8)
    assert night.hours == 7.5 and morning.hours == 7.5
    assert calendar.shift_at(utc(2025, 3, 9, 7, 59, 59)).id == "2025-03-08_N"
    assert calendar.shift_at(utc(2025, 3, 9, 8)).id == "2025-03-09_M"


def test_boundary_in_the_repeated_hour_is_the_first_occurrence():
    # 01:30 occurs twice on 2 November 2025 in Chicago: 06:30 UTC (CDT) and 07:30 UTC (CST).
    shifts = (ShiftSpec("N", T(17, 30), T(1, 30)), ShiftSpec("M", T(1, 30), T(9, 30)),
              ShiftSpec("D", T(9, 30), T(17, 30)))
    calendar = cal("America/Chicago", shifts)
    night = calendar.instance(day("2025-11-01"), "N")
    morning = calendar.instance(day("2025-11-02"), "M")
    assert night.end == morning.start == utc(2025, 11, 2, 6, 30)
    assert (night.hours, morning.hours) == (8.0, 9.0)
    assert calendar.shift_at(utc(2025, 11, 2, 7, 45)).id == "2025-11-02_M"  # second 01:45


def test_shift_wholly_inside_the_spring_gap_is_skipped():
    shifts = (ShiftSpec("X", T(2, 0), T(2, 30)), ShiftSpec("A", T(6), T(14)))
    calendar = cal("America/Chicago", shifts)
    ghost = calendar.instance(day("2025-03-09"), "X")
    assert ghost.start == ghost.end == utc(2025, 3, 9, 8)
    got = calendar.instances_between(utc(2025, 3, 9, 0), utc(2025, 3, 10, 0))
    assert [i.id for i in got] == ["2025-03-09_A"]
    assert [i.id for i in calendar.instances_between(utc(2025, 3, 10, 0), utc(2025, 3, 11, 0))] == [
        "2025-03-10_X", "2025-03-10_A"]


def test_events_between_shifts_belong_to_none():
    calendar = cal("Europe/Berlin", ABC[:2])  # A and B only: 22:00-06:00 is a gap
    assert calendar.shift_at(utc(2025, 10, 25, 21)) is None
    assert calendar.shift_at(utc(2025, 10, 26, 5)).id == "2025-10-26_A"  # 06:00 CET
    ts = np.array(["2025-10-25T21:00", "2025-10-26T05:00", "2025-10-26T04:59"], dtype="datetime64[s]")
    instances, index = calendar.assign(ts)
    assert index.tolist()[0] == -1 and index.tolist()[2] == -1
    assert instances[index[1]].id == "2025-10-26_A"


# --------------------------------------------------------------------------- non-production days

def test_non_production_weekday_and_holiday():
    # 2026-01-04 is a Sunday; 2026-01-06 declared a holiday.
    calendar = cal("Europe/Berlin", ABC, weekdays={6}, dates={day("2026-01-06")})
    assert not calendar.is_production_day(day("2026-01-04"))
    assert calendar.shift_at(utc(2026, 1, 4, 10)) is None
    # Saturday's night shift starts on a production day and runs into Sunday
    assert calendar.shift_at(utc(2026, 1, 4, 3)).id == "2026-01-03_C"
    assert calendar.shift_at(utc(2026, 1, 6, 10)) is None
    assert calendar.shift_at(utc(2026, 1, 5, 22)).id == "2026-01-05_C"  # into the holiday
    week = calendar.instances_between(utc(2026, 1, 3, 0), utc(2026, 1, 8, 0))
    assert {i.date.isoformat() for i in week} == {"2026-01-03", "2026-01-05", "2026-01-07"}
    with pytest.raises(NotFoundError, match="non-production day"):
        calendar.instance(day("2026-01-04"), "A")
    assert calendar.from_id("2026-01-06_B", include_non_production=True).hours == 8


# --------------------------------------------------------------------------- ids, localize, errors

def test_from_id_and_instance_errors():
    calendar = cal("America/Chicago")
    inst = calendar.from_id("2025-11-01_C")
    assert inst == calendar.instance(day("2025-11-01"), "C")
    assert calendar.shift_at(utc(2025, 11, 2, 7)) == inst
    with pytest.raises(NotFoundError, match="the config has shifts A, B, C"):
        calendar.from_id("2025-11-01_Z")
    with pytest.raises(InvalidArgumentError, match="--shift"):
        calendar.from_id("yesterday-night")


def test_localize_ambiguous_and_nonexistent():
    calendar = cal("America/Chicago")
    repeated = dt.datetime(2025, 11, 2, 1, 30)
    with pytest.raises(InvalidArgumentError, match="occurs twice"):
        calendar.localize(repeated)
    assert calendar.localize(repeated, ambiguous="earlier") == utc(2025, 11, 2, 6, 30)
    assert calendar.localize(repeated, ambiguous="later") == utc(2025, 11, 2, 7, 30)
    skipped = dt.datetime(2025, 3, 9, 2, 30)
    with pytest.raises(InvalidArgumentError, match="does not exist"):
        calendar.localize(skipped)
    assert calendar.localize(skipped, nonexistent="forward") == utc(2025, 3, 9, 8)
    plain = calendar.localize(dt.datetime(2025, 7, 1, 12))
    assert plain == utc(2025, 7, 1, 17) and plain.utcoffset() == dt.timedelta(hours=-5)
    aware = calendar.localize(utc(2025, 1, 1, 12))
    assert aware.isoformat() == "2025-01-01T06:00:00-06:00"


def test_naive_input_is_refused():
    calendar = cal("UTC")
    for call in (lambda: calendar.shift_at(dt.datetime(2025, 1, 1)),
                 lambda: calendar.instances_between(dt.datetime(2025, 1, 1), utc(2025, 1, 2)),
                 lambda: calendar.ended_by(utc(2025, 1, 1), dt.datetime(2025, 1, 2))):
        with pytest.raises(InvalidArgumentError, match="no time zone"):
            call()
    with pytest.raises(InvalidArgumentError, match="at least one shift"):
        ShiftCalendar(ZoneInfo("UTC"), ())
    with pytest.raises(InvalidArgumentError, match="B overlaps shift A"):
        ShiftCalendar(ZoneInfo("UTC"), (ShiftSpec("A", T(22), T(6)), ShiftSpec("B", T(5), T(9))))
    with pytest.raises(InvalidArgumentError, match="names repeat"):
        ShiftCalendar(ZoneInfo("UTC"), (ShiftSpec("A", T(6), T(9)), ShiftSpec("A", T(9), T(12))))


def test_from_config(tmp_path, plant_config_text, write_config):
    config = load_config(write_config(tmp_path, plant_config_text))
    calendar = ShiftCalendar.from_config(config)
    assert calendar.tz.key == "America/Chicago"
    assert [s.name for s in calendar.shifts] == ["A", "B", "C"]
    assert calendar.shift_at(utc(2026, 1, 4, 18)) is None  # Sunday, non-production in the fixture
    assert calendar.shift_at(utc(2026, 1, 5, 18)).id == "2026-01-05_A"


# --------------------------------------------------------------------------- assign input forms

def test_assign_accepts_units_nat_pandas_and_aware_datetimes():
    calendar = cal("Europe/Berlin")
    ns = np.array(["2025-10-26T01:30:00.000000001", "NaT"], dtype="datetime64[ns]")
    instances, index = calendar.assign(ns)
    assert instances[index[0]].id == "2025-10-25_C" and index[1] == -1
    assert not index.flags.writeable
    series = pd.Series(pd.to_datetime(["2025-10-26 02:30+01:00", "2025-10-26 02:30+02:00"],
                                      utc=True)).dt.tz_convert("Europe/Berlin")
    instances, index = calendar.assign(series)
    assert [instances[k].id for k in index] == ["2025-10-25_C", "2025-10-25_C"]
    aware = [dt.datetime(2025, 10, 26, 7, tzinfo=ZoneInfo("Europe/Berlin")), utc(2025, 10, 26, 13)]
    instances, index = calendar.assign(aware)
    assert [instances[k].id for k in index] == ["2025-10-26_A", "2025-10-26_B"]
    assert calendar.assign(np.array([], dtype="datetime64[us]"))[0] == []
    with pytest.raises(InvalidArgumentError, match="ts_utc"):
        calendar.assign(["not a time"])


# --------------------------------------------------------------------------- invariants

_ZONES = ("America/Chicago", "Europe/Berlin", "Asia/Kolkata", "Asia/Tokyo")
# Windows of eight days around the 2025 changes (US: Mar 9, Nov 2; EU: Mar 30, Oct 26)
_WINDOWS = [utc(2025, 3, 5), utc(2025, 10, 29), utc(2025, 3, 26), utc(2025, 10, 22)]
_SPAN_US = 8 * 24 * 3600 * 10**6
_SHIFT_SETS = (
    ABC,
    ABC[:2],  # with a gap at night
    (ShiftSpec("N", T(18, 30), T(2, 30)), ShiftSpec("M", T(2, 30), T(10, 30))),
    (ShiftSpec("E", T(1, 15), T(3, 45)), ShiftSpec("L", T(23), T(1, 15))),
)


@settings(max_examples=60, deadline=None, derandomize=True)
@given(
    zone=st.sampled_from(_ZONES),
    window=st.sampled_from(_WINDOWS),
    shifts=st.sampled_from(_SHIFT_SETS),
    sunday_off=st.booleans(),
    offsets=st.lists(st.integers(0, _SPAN_US), min_size=1, max_size=200),
)
def test_vectorized_assign_agrees_with_shift_at(zone, window, shifts, sunday_off, offsets):
    calendar = cal(zone, shifts, weekdays={6} if sunday_off else ())
    base = np.datetime64(window.replace(tzinfo=None), "us")
    ts = base + np.array(offsets, dtype="timedelta64[us]")
    instances, index = calendar.assign(ts)
    assert [i.start for i in instances] == sorted(i.start for i in instances)
    for t_us, k in zip(offsets, index.tolist(), strict=True):
        moment = window + dt.timedelta(microseconds=t_us)
        expect = calendar.shift_at(moment)
        got = instances[k] if k >= 0 else None
        assert got == expect, moment
        if got is not None:
            assert got.start <= moment < got.end
            assert calendar.is_production_day(got.date)
        else:  # really in no shift: no nearby instance contains it
            near = calendar.instances_between(moment - dt.timedelta(days=2),
                                              moment + dt.timedelta(days=1))
            assert not any(i.start <= moment < i.end for i in near)


@settings(max_examples=100, deadline=None, derandomize=True)
@given(zone=st.sampled_from(_ZONES), window=st.sampled_from(_WINDOWS),
       offset=st.integers(0, _SPAN_US))
def test_localize_round_trips_every_instant(zone, window, offset):
    # The local wall time of any instant reads back to that instant as its earlier or later
    # reading; only in the repeated hour do the two readings differ.
    calendar = cal(zone)
    moment = window + dt.timedelta(microseconds=offset)
    naive = moment.astimezone(ZoneInfo(zone)).replace(tzinfo=None, fold=0)
    earlier = calendar.localize(naive, ambiguous="earlier")
    later = calendar.localize(naive, ambiguous="later")
    assert moment in (earlier, later) and earlier <= later
    if earlier != later:
        assert later - earlier == dt.timedelta(hours=1)
        with pytest.raises(InvalidArgumentError):
            calendar.localize(naive)
    else:
        assert calendar.localize(naive) == moment


@settings(max_examples=100, deadline=None, derandomize=True)
@given(zone=st.sampled_from(_ZONES), window=st.sampled_from(_WINDOWS),
       minutes=st.lists(st.integers(0, 8 * 24 * 60 - 1), min_size=2, max_size=30))
def test_wall_time_to_instant_never_runs_backwards(zone, window, minutes):
    # The property that keeps shifts from overlapping after conversion: a later wall time
    # never gives an earlier instant (gap times collapse onto the change, nothing reverses).
    calendar = cal(zone)
    start = window.replace(tzinfo=None)
    walls = sorted(start + dt.timedelta(minutes=m) for m in minutes)
    instants = [calendar.wall_to_instant(w.date(), w.time()) for w in walls]
    assert instants == sorted(instants)


def test_zone_changing_at_midnight_moves_the_missing_midnight_forward():
    # Cuba changes clocks at midnight (from memory, IANA tz database file "northamerica",
    # Rule Cuba: second Sunday of March 00:00 CST -> 01:00 CDT; first Sunday of November
    # 01:00 CDT -> 00:00 CST). In 2025 those are 9 March and 2 November.
    # Two 12-hour shifts meeting at midnight: the missing 00:00 of 9 March becomes 01:00 CDT.
    shifts = (ShiftSpec("D", T(0), T(12)), ShiftSpec("N", T(12), T(0)))
    calendar = cal("America/Havana", shifts)
    night = calendar.instance(day("2025-03-08"), "N")
    first_day = calendar.instance(day("2025-03-09"), "D")
    assert night.end == first_day.start == utc(2025, 3, 9, 5)
    assert (night.hours, first_day.hours) == (12.0, 11.0)
    assert first_day.start.isoformat() == "2025-03-09T01:00:00-04:00"
    # autumn: midnight comes twice; the boundary is the first, the day shift gets 13 h
    autumn = calendar.instance(day("2025-11-02"), "D")
    assert autumn.start == utc(2025, 11, 2, 4) and autumn.hours == 13.0
