"""Cell checks for events and counts (pure: a real calendar, no store).

Clock changes used below (US rule since 2007, Energy Policy Act of 2005: second Sunday of
March and first Sunday of November at 02:00 local): America/Chicago in 2026 springs forward
on 2026-03-08 (02:00 CST -> 03:00 CDT) and falls back on 2026-11-01 (02:00 CDT -> 01:00 CST).
"""

from __future__ import annotations

import datetime as dt
import functools
import tomllib
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcfit.calendar import ShiftCalendar
from qcfit.config import parse_config
from qcfit.errors import BadRow
from qcfit.ingest_csv import read_table
from qcfit.ingest_rows import (
    COUNT_COLUMNS,
    COUNT_OPTIONAL,
    EVENT_COLUMNS,
    EVENT_OPTIONAL,
    validate_counts,
    validate_events,
)
from qcfit.ingest_time import localize_naive

NOW = dt.datetime(2026, 12, 1, tzinfo=dt.UTC)
CHICAGO = ZoneInfo("America/Chicago")


@pytest.fixture
def config(plant_config_text):
    return parse_config(tomllib.loads(plant_config_text), text=plant_config_text)


@pytest.fixture
def calendar(config):
    return ShiftCalendar.from_config(config)


def events(config, calendar, text: str, **kw):
    table = read_table(
        text.encode(), source="e.csv", required=EVENT_COLUMNS, optional=EVENT_OPTIONAL
    )
    return validate_events(
        table,
        lines=config.lines,
        categories=config.categories,
        calendar=calendar,
        now=kw.pop("now", NOW),
        **kw,
    )


def counts(config, calendar, text: str, now=NOW):
    table = read_table(
        text.encode(), source="c.csv", required=COUNT_COLUMNS, optional=COUNT_OPTIONAL
    )
    return validate_counts(
        table, lines=config.lines, categories=config.categories, calendar=calendar, now=now
    )


def utc(*args) -> np.datetime64:
    return np.datetime64(dt.datetime(*args), "us")


def test_offsets_are_converted_and_naive_is_plant_time(config, calendar):
    b = events(
        config,
        calendar,
        "timestamp,line,category\n"
        "2026-01-05T06:30:00-06:00,L1,SCR\n"  # plant offset
        "2026-01-05T13:30:00+01:00,L1,DNT\n"  # Berlin offset: 12:30Z
        "2026-01-05T14:45:10.5Z,L2,FL\n"
        "2026-01-05 09:15,L3,SH\n",
    )  # naive: CST, 15:15Z
    assert b.bad_rows == ()
    assert b.events["ts_utc"].tolist() == [
        utc(2026, 1, 5, 12, 30),
        utc(2026, 1, 5, 12, 30),
        utc(2026, 1, 5, 14, 45, 10, 500000),
        utc(2026, 1, 5, 15, 15),
    ]
    assert b.events["quantity"].tolist() == [1, 1, 1, 1]
    assert [b.instances[i].id for i in b.events["shift"]] == ["2026-01-05_A"] * 4
    assert b.notes == (
        "2 timestamp(s) carried an offset other than America/Chicago's and were converted to plant time",
    )


def test_codes_with_surrounding_spaces_are_accepted_and_said(config, calendar):
    b = events(
        config, calendar, "timestamp,line,category,quantity\n 2026-01-05 09:15 , L1 ,SCR  , 3 \n"
    )
    assert b.bad_rows == ()
    assert (b.events["line"][0], b.events["category"][0], int(b.events["quantity"][0])) == (
        "L1",
        "SCR",
        3,
    )
    assert b.notes == ("4 cell(s) had surrounding spaces, which were removed",)


@pytest.mark.parametrize(
    "row,reason",
    [
        ("2026-01-05 09:15,L9,SCR,1", "unknown line 'L9' (not in [lines] of the config)"),
        (
            "2026-01-05 09:15,l1,SCR,1",
            "unknown line 'l1' (codes are case-sensitive: did you mean 'L1'?)",
        ),
        ("2026-01-05 09:15,L1,XX,1", "unknown category 'XX' (not in [categories] of the config)"),
        ("2026-01-05 09:15,,SCR,1", "line is empty"),
        ("2026-01-05 09:15,L1,SCR,-2", "quantity '-2' is negative"),
        ("2026-01-05 09:15,L1,SCR,1.5", "quantity '1.5' is not a whole number"),
        (
            "2026-01-05 09:15,L1,SCR,2.0",
            "quantity '2.0' must be written as a whole number with digits only (no sign, decimals or exponent)",
        ),
        ("2026-01-05 09:15,L1,SCR,many", "quantity 'many' is not a number"),
        ("2026-01-05 09:15,L1,SCR,", "quantity is empty"),
        (
            "2026-01-05 09:15,L1,SCR,1000000000000",
            "quantity 1000000000000 is larger than 1,000,000,000 (not a plausible count for one row: a unit or export error?)",
        ),
        (
            "2026-01-05 09:15,L1,SCR,1000000001",
            "quantity 1000000001 is larger than 1,000,000,000 (not a plausible count for one row: a unit or export error?)",
        ),
        (
            "05/01/2026 09:15,L1,SCR,1",
            "timestamp '05/01/2026 09:15' is not an ISO 8601 date and time (e.g. 2026-01-05T06:30:00-06:00 or 2026-01-05 06:30:00)",
        ),
        (
            "2026-01-05,L1,SCR,1",
            "timestamp '2026-01-05' is not an ISO 8601 date and time (e.g. 2026-01-05T06:30:00-06:00 or 2026-01-05 06:30:00)",
        ),
        ("2026-02-30 09:15,L1,SCR,1", "timestamp '2026-02-30 09:15' is not a valid date and time"),
        (
            "2026-01-04 09:15,L1,SCR,1",  # a Sunday: non-production day in the test plant
            "timestamp '2026-01-04 09:15' falls in no shift of the calendar (between shifts or on a non-production day)",
        ),
        (
            "1899-12-30 09:00,L1,SCR,1",
            "timestamp '1899-12-30 09:00' is before 1970-01-01; check the date",
        ),
        (
            "2026-12-01T00:16:00Z,L1,SCR,1",
            "timestamp '2026-12-01T00:16:00Z' is later than the time of loading (2026-12-01 00:00 UTC); check the date and the offset",
        ),
    ],
)
def test_bad_event_cells(config, calendar, row, reason):
    b = events(
        config, calendar, f"timestamp,line,category,quantity\n2026-01-05 09:00,L1,SCR,1\n{row}\n"
    )
    assert b.bad_rows == (BadRow(3, reason),)
    assert len(b.events) == 1 and b.events["line_no"].tolist() == [2]


def test_every_problem_of_a_row_is_listed(config, calendar):
    b = events(config, calendar, "timestamp,line,category,quantity\nnope,L9,XX,-1\n")
    assert b.bad_rows == (
        BadRow(
            2,
            "unknown line 'L9' (not in [lines] of the config); unknown category 'XX' "
            "(not in [categories] of the config); timestamp 'nope' is not an ISO 8601 date and time "
            "(e.g. 2026-01-05T06:30:00-06:00 or 2026-01-05 06:30:00); quantity '-1' is negative",
        ),
    )


def test_one_billion_is_accepted(config, calendar):
    b = events(
        config,
        calendar,
        "timestamp,line,category,quantity\n2026-01-05 09:00,L1,SCR,1000000000\n2026-01-05 09:01,L1,SCR,007\n",
    )
    assert b.bad_rows == () and b.events["quantity"].tolist() == [10**9, 7]


def test_duplicate_event_key_names_the_first_line(config, calendar):
    b = events(
        config,
        calendar,
        "timestamp,line,category\n2026-01-05 09:00,L1,SCR\n2026-01-05 09:00,L2,SCR\n"
        "2026-01-05T15:00:00Z,L1,SCR\n",
    )  # same instant as line 2, written in UTC
    assert b.bad_rows == (
        BadRow(
            4, "duplicate of line 2 (same timestamp, line and category; put the total in quantity)"
        ),
    )


def test_spring_gap_time_is_a_bad_row(config, calendar):
    b = events(
        config,
        calendar,
        "timestamp,line,category\n2026-03-08 02:30,L1,SCR\n2026-03-08 03:30,L1,SCR\n",
    )
    assert b.bad_rows == (
        BadRow(
            2,
            "timestamp '2026-03-08 02:30' does not exist in America/Chicago "
            "(the clocks skip that hour); give the offset",
        ),
    )
    assert b.events["ts_utc"].tolist() == [utc(2026, 3, 8, 8, 30)]  # 03:30 CDT = 08:30Z
    assert b.instances[b.events["shift"][0]].id == "2026-03-07_C"


@pytest.mark.parametrize(
    "ambiguous,expected", [("earlier", utc(2026, 11, 1, 6, 30)), ("later", utc(2026, 11, 1, 7, 30))]
)
def test_repeated_hour_is_resolved_only_when_asked(config, calendar, ambiguous, expected):
    text = "timestamp,line,category\n2026-11-01 01:30,L1,SCR\n"
    refused = events(config, calendar, text)
    assert refused.bad_rows == (
        BadRow(
            2,
            "timestamp '2026-11-01 01:30' occurs twice in America/Chicago (the clocks "
            "repeat that hour); give the offset, or load with --ambiguous earlier|later",
        ),
    )
    b = events(config, calendar, text, ambiguous=ambiguous)
    assert b.bad_rows == () and b.events["ts_utc"].tolist() == [expected]
    assert b.instances[b.events["shift"][0]].id == "2026-10-31_C"


def test_autumn_night_shift_takes_nine_hours_of_events(config, calendar):
    """One event per UTC hour over the fall-back night: shift C of 2026-10-31 runs
    22:00 CDT (03:00Z) to 06:00 CST (12:00Z), 9 real hours, so it gets 9 events."""
    start = dt.datetime(2026, 11, 1, 0, 30, tzinfo=dt.UTC)
    rows = [(start + dt.timedelta(hours=h)).isoformat() for h in range(16)]
    b = events(
        config, calendar, "timestamp,line,category\n" + "".join(f"{r},L1,SCR\n" for r in rows)
    )
    ids = [b.instances[i].id for i in b.events["shift"]]
    assert ids.count("2026-10-31_C") == 9


@settings(max_examples=300, deadline=None)
@given(
    zone=st.sampled_from(
        [
            "America/Chicago",
            "Europe/Berlin",
            "Australia/Lord_Howe",
            "Europe/Dublin",
            "Asia/Kolkata",
            "America/St_Johns",
            "Pacific/Chatham",
        ]
    ),
    seconds=st.integers(min_value=0, max_value=3 * 365 * 86400),
    near_change=st.booleans(),
)
def test_localize_naive_agrees_with_zoneinfo(zone, seconds, near_change):
    """Reference: Python's zoneinfo with PEP 495 ``fold`` (fold=0 first, fold=1 second
    occurrence; a wall time that does not round-trip does not exist)."""
    tz = ZoneInfo(zone)
    base = dt.datetime(2025, 1, 1)
    if near_change:  # land within two hours of a real transition of this zone
        changes = _transitions(zone, 2025, 2028)
        if changes:
            base = changes[seconds % len(changes)] - dt.timedelta(hours=1)
            seconds = seconds % (2 * 3600)
    wall = base + dt.timedelta(seconds=seconds)
    first = wall.replace(tzinfo=tz, fold=0).astimezone(dt.UTC).replace(tzinfo=None)
    second = wall.replace(tzinfo=tz, fold=1).astimezone(dt.UTC).replace(tzinfo=None)
    exists = first.replace(tzinfo=dt.UTC).astimezone(tz).replace(tzinfo=None) == wall
    twice = exists and first != second
    arr = np.array([np.datetime64(wall, "us")])
    for mode in ("raise", "earlier", "later"):
        got, gap, unresolved = localize_naive(arr, tz, mode)
        assert bool(gap[0]) == (not exists)
        assert bool(unresolved[0]) == (twice and mode == "raise")
        if exists and not (twice and mode == "raise"):
            want = (
                {"earlier": min(first, second), "later": max(first, second)}.get(mode, first)
                if twice
                else first
            )
            assert got[0] == np.datetime64(want, "us")


@functools.cache
def _transitions(zone: str, first_year: int, last_year: int) -> list[dt.datetime]:
    """Naive local wall times just after each offset change (found by hourly scan)."""
    tz = ZoneInfo(zone)
    out = []
    t = dt.datetime(first_year, 1, 1, tzinfo=dt.UTC)
    end = dt.datetime(last_year, 1, 1, tzinfo=dt.UTC)
    prev = t.astimezone(tz).utcoffset()
    while t < end:
        t += dt.timedelta(hours=1)
        off = t.astimezone(tz).utcoffset()
        if off != prev:
            out.append(t.astimezone(tz).replace(tzinfo=None))
            prev = off
    return out


# --- counts -------------------------------------------------------------------------------


def test_counts_with_units(config, calendar):
    b = counts(
        config,
        calendar,
        "shift,line,category,count,units_inspected\n"
        "2026-01-05_A,L1,SCR,12,4800\n2026-01-05_A,L1,DNT,0,4800\n2026-01-05_A,L2,SCR,3,\n",
    )
    assert b.bad_rows == ()
    assert b.counts[["shift", "line", "category", "count"]].to_numpy().tolist() == [
        ["2026-01-05_A", "L1", "SCR", 12],
        ["2026-01-05_A", "L1", "DNT", 0],
        ["2026-01-05_A", "L2", "SCR", 3],
    ]
    assert b.units[["shift", "line", "units"]].to_numpy().tolist() == [["2026-01-05_A", "L1", 4800]]
    assert b.instances["2026-01-05_A"].start == dt.datetime(2026, 1, 5, 6, tzinfo=CHICAGO)


@pytest.mark.parametrize(
    "row,reason",
    [
        (
            "2026-01-05_Z,L1,SCR,1,",
            "shift '2026-01-05_Z': no shift 'Z' (the config has shifts A, B, C)",
        ),
        (
            "2026-01-04_A,L1,SCR,1,",
            "shift '2026-01-04_A': no shift 2026-01-04_A (Sun 2026-01-04 is a non-production day)",
        ),
        (
            "05.01.2026_A,L1,SCR,1,",
            "shift '05.01.2026_A' is not a shift id (start date and shift name, e.g. 2026-01-05_A)",
        ),
        (
            "2026-02-30_A,L1,SCR,1,",
            "shift '2026-02-30_A' is not a shift id (start date and shift name, e.g. 2026-01-05_A)",
        ),
        (
            "2026-12-01_A,L1,SCR,1,",
            "shift '2026-12-01_A' has not started yet (it starts 2026-12-01T06:00:00-06:00)",
        ),
        ("0226-01-05_A,L1,SCR,1,", "shift '0226-01-05_A' is before 1970-01-01; check the date"),
        ("2026-01-05_A,L1,SCR,-3,", "count '-3' is negative"),
        ("2026-01-05_A,L1,SCR,2.5,", "count '2.5' is not a whole number"),
        (
            "2026-01-05_A,L1,SCR,1000000000000,",
            "count 1000000000000 is larger than 1,000,000,000 (not a plausible count for one row: a unit or export error?)",
        ),
        ("2026-01-05_A,L1,DNT,1,abc", "units_inspected 'abc' is not a number"),
        (
            "2026-01-05_A,L1,DNT,1,4000",
            "units_inspected 4000 differs from 5000 on line 2 for the same shift and line",
        ),
        ("2026-01-05_A,L1,SCR,7,5000", "duplicate of line 2 (same shift, line and category)"),
    ],
)
def test_bad_count_cells(config, calendar, row, reason):
    b = counts(
        config,
        calendar,
        f"shift,line,category,count,units_inspected\n2026-01-05_A,L1,SCR,1,5000\n{row}\n",
    )
    assert b.bad_rows == (BadRow(3, reason),)
    assert b.counts["line_no"].tolist() == [2]
