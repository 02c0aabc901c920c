"""`qcfit evaluate`, `alarms`, `alarm`, `ack`, `clear` in-process against real temp stores."""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import re

import numpy as np
import pytest
from click.testing import CliRunner
from test_service import LINES, flash_jump, healthy, load_counts, make_store, plant_text

from qcfit.alarmlog import AlarmView
from qcfit.calendar import ShiftCalendar
from qcfit.cli import main
from qcfit.cli.alarms import csv_text, fmt_effect, spreadsheet_safe, table_lines

JSON_FIELDS = {"id", "kind", "line", "shift_date", "shift_name", "shift_start", "pvalue",
               "adjusted_pvalue", "effect_size", "severity", "state", "categories",
               "last_shift_start"}


@pytest.fixture
def cli(tmp_path, plant_config_text):
    text = plant_text(plant_config_text, min_effect_w=0.3, min_effect_v=0.1, mc_draws=2000)
    config, engine = make_store(tmp_path, text)
    cal = ShiftCalendar.from_config(config)
    rng = np.random.default_rng(21)
    shifts = [cal.from_id("2026-01-06_A"), cal.from_id("2026-01-06_B")]
    for s in shifts:
        load_counts(engine, s, {"L1": flash_jump(400, rng)} | {ln: healthy(400, rng) for ln in LINES[1:]})
    engine.dispose()
    base = ["--config", str(tmp_path / "plant.toml"), "--store", f"sqlite:///{tmp_path / 'store.sqlite'}"]

    def run(*args: str):
        return CliRunner().invoke(main, [*base, *args], catch_exceptions=False)

    return run


def evaluated(cli):
    r = cli("evaluate", "--since", "2026-01-06", "--until", "2026-01-06")
    assert r.exit_code == 0, r.output
    return r


def test_evaluate_prints_a_one_screen_summary(cli):
    r = evaluated(cli)
    lines = r.output.splitlines()
    assert lines[0] == "Evaluated 3 shift(s) (2026-01-06_A .. 2026-01-06_C): 3 ok, 0 failed."
    assert any(ln.startswith("  Alarms: ") and "opened" in ln for ln in lines)
    assert len(lines) <= 24


def test_evaluate_due_then_nothing_left(tmp_path, plant_config_text):
    config, engine = make_store(tmp_path, plant_config_text)
    cal = ShiftCalendar.from_config(config)
    # the CLI reads the real clock: put data in the latest shift that ended two days ago or
    # earlier (a plant with no weekend shifts may have none in the day before that)
    recent = cal.ended_by(dt.datetime.now(dt.UTC) - dt.timedelta(days=10),
                          dt.datetime.now(dt.UTC) - dt.timedelta(days=2))[-1]
    load_counts(engine, recent, {ln: healthy(100, np.random.default_rng(2)) for ln in LINES})
    engine.dispose()
    base = ["--config", str(tmp_path / "plant.toml"), "--store", f"sqlite:///{tmp_path / 'store.sqlite'}"]
    first = CliRunner().invoke(main, [*base, "evaluate", "--due"])
    assert first.exit_code == 0, first.output
    assert first.output.startswith("Evaluated ") and f"({recent.id} .. " in first.output
    again = CliRunner().invoke(main, [*base, "evaluate", "--due"])
    assert again.exit_code == 0
    assert again.output.strip() == "Nothing to evaluate: every ended shift has a current evaluation."


def test_evaluate_one_shift_again_supersedes(cli):
    evaluated(cli)
    r = cli("evaluate", "--shift", "2026-01-06_A")
    assert r.exit_code == 0
    # the shift itself (and any later shift whose results depend on it) is redone
    assert re.search(r"\n  [1-3] earlier evaluation\(s\) kept as superseded\.\n", r.output)


def test_evaluate_refuses_two_modes_and_bad_dates(cli):
    r = cli("evaluate", "--due", "--shift", "2026-01-06_A")
    assert r.exit_code == 2
    assert "Error: --shift: use only one of --due, --shift, --since" in r.output
    r = cli("evaluate", "--since", "6 Jan")
    assert r.exit_code == 2 and "Error: --since: '6 Jan' is not a date" in r.output
    r = cli("evaluate", "--until", "2026-01-06")
    assert r.exit_code == 2 and "Error: --until: needs --since" in r.output


def test_alarms_json_has_the_agreed_fields(cli):
    evaluated(cli)
    r = cli("alarms", "--format", "json")
    assert r.exit_code == 0
    rows = json.loads(r.output)
    assert rows and all(JSON_FIELDS <= set(row) for row in rows)
    mix = [row for row in rows if row["kind"] == "baseline"]
    between = [row for row in rows if row["kind"] == "between-lines"]
    assert [row["line"] for row in mix] == ["L1"]
    assert between and all(row["line"] is None for row in between)
    assert between[0]["categories"][0]["code"] == "FL"  # named from the line that differs
    assert between[0]["categories"][0]["line"] == "L1"  # ... and carries that line
    assert between[0]["summary"].startswith("lines differ") and "L1: " in between[0]["summary"]
    m = mix[0]
    assert (m["shift_date"], m["shift_name"]) == ("2026-01-06", "A")
    assert m["shift_start"] == "2026-01-06T06:00:00-06:00"  # plant time, America/Chicago
    assert m["last_shift_start"] == "2026-01-06T14:00:00-06:00"  # updated by shift B
    assert m["severity"] in ("watch", "alarm") and m["state"] == "open"
    assert 0 <= m["adjusted_pvalue"] <= 1 and m["effect_size"] >= 0.3
    assert m["categories"] and m["categories"][0]["code"] == "FL"
    for c in m["categories"]:
        assert set(c) == {"code", "direction", "adjusted_residual"}
        assert c["direction"] in ("up", "down")
        assert (c["adjusted_residual"] > 0) == (c["direction"] == "up")


def test_alarm_table_fits_100_columns_and_says_what_changed(cli):
    evaluated(cli)
    r = cli("alarms")
    assert r.exit_code == 0
    lines = r.output.splitlines()
    assert lines[0].split()[:4] == ["ID", "Line", "Kind", "Shift"]
    assert all(len(ln) <= 100 for ln in lines)
    assert any("flash share" in ln and "x baseline (adj. residual +" in ln for ln in lines)


def test_filters(cli):
    evaluated(cli)
    rows = json.loads(cli("alarms", "--line", "L1", "--format", "json").output)
    assert rows and {r["line"] for r in rows} == {"L1"}
    assert json.loads(cli("alarms", "--since", "2099-01-01", "--format", "json").output) == []
    r = cli("alarms", "--line", "L9")
    assert r.exit_code == 2
    assert r.output.strip() == "Error: --line: unknown line 'L9'; the lines are L1, L2, L3, L4"


def test_since_filters_on_the_shifts_covered_not_on_when_evaluate_ran(cli):
    # evaluated today (wall clock), covering shifts of 2026-01-06 only (plant dates)
    evaluated(cli)
    every = json.loads(cli("alarms", "--format", "json").output)
    assert every
    assert json.loads(cli("alarms", "--since", "2026-01-06", "--format", "json").output) == every
    assert json.loads(cli("alarms", "--since", "2026-01-07", "--format", "json").output) == []


def test_age_counts_from_the_shift_that_raised_the_alarm(cli):
    evaluated(cli)
    rows = [ln.split() for ln in cli("alarms").output.splitlines()[1:] if ln[:6].strip().isdigit()]
    assert rows
    # the shifts are of 2026-01-06 and the table is read today: days old, not minutes
    ages = [row[6] for row in rows]
    assert all(a.endswith("d") and int(a[:-1]) >= 1 for a in ages), ages


def _mix_id(cli) -> int:
    rows = json.loads(cli("alarms", "--format", "json").output)
    return next(r["id"] for r in rows if r["kind"] == "baseline")


def test_ack_clear_and_the_full_story(cli):
    evaluated(cli)
    alarm_id = _mix_id(cli)
    r = cli("ack", str(alarm_id), "--by", "Ann Lee", "--note", "mould 4 inspected")
    assert r.exit_code == 0 and r.output.strip() == f"Alarm {alarm_id} acknowledged by Ann Lee."
    r = cli("ack", str(alarm_id), "--by", "Bob")
    assert r.exit_code == 2
    assert f"Error: ID: alarm {alarm_id} is acknowledged by Ann Lee at " in r.output
    r = cli("clear", str(alarm_id), "--by", "Bob")
    assert r.exit_code == 2 and "--note" in r.output
    r = cli("clear", str(alarm_id), "--by", "Bob", "--note", "new die fitted")
    assert r.exit_code == 0 and r.output.strip() == f"Alarm {alarm_id} cleared by Bob."
    open_rows = json.loads(cli("alarms", "--open", "--format", "json").output)
    assert alarm_id not in [r["id"] for r in open_rows]
    story = cli("alarm", str(alarm_id))
    assert story.exit_code == 0
    text = story.output
    assert f"Alarm {alarm_id}: baseline, line L1" in text
    assert "Baseline: plant (version 1, effective 2026-01-05)" in text
    assert "flash (FL)" in text and "observed" in text and "adj. residual" in text
    history = text.split("History:")[1].splitlines()
    actions = [ln.split()[3] for ln in history if ln.startswith("  2")]  # event lines
    assert actions == ["open", "update", "acknowledge", "clear"]
    assert "mould 4 inspected" in text and "new die fitted" in text
    assert all(len(ln) <= 100 for ln in history)


def test_unknown_alarm_and_blank_name(cli):
    evaluated(cli)
    r = cli("alarm", "999")
    assert r.exit_code == 2 and r.output.strip() == "Error: no alarm 999"
    r = cli("ack", str(_mix_id(cli)), "--by", "  ")
    assert r.exit_code == 2 and "Error: --by: give the name" in r.output


def test_csv_export_parses_and_has_a_header(cli):
    evaluated(cli)
    r = cli("alarms", "--format", "csv")
    rows = list(csv.DictReader(io.StringIO(r.output)))
    assert rows and {"baseline", "between-lines"} <= {row["kind"] for row in rows}
    assert any(row["categories"].startswith("FL up +") for row in rows)


# --------------------------------------------------------------------------- CSV safety


@pytest.mark.parametrize("cell,safe", [
    ("=HYPERLINK(\"x\")", "'=HYPERLINK(\"x\")"), ("+1", "'+1"), ("-2+3", "'-2+3"),
    ("@SUM(A1)", "'@SUM(A1)"), ("\tx", "'\tx"), ("flash", "flash"), ("", ""),
])
def test_spreadsheet_safe_neutralises_formula_starts(cell, safe):
    # OWASP "CSV Injection": cells starting with = + - @ (tab, CR) are run as formulas
    assert spreadsheet_safe(cell) == safe


def _view(**kw) -> AlarmView:
    t = dt.datetime(2026, 1, 6, 12, tzinfo=dt.UTC)
    base = dict(id=1, kind="baseline", line="=L1", severity="alarm", state="open",
                summary="-cmd|' /C calc'!A0", pvalue=1e-6, adjusted_pvalue=-0.0 + 2e-5,
                effect_size=0.4, categories=({"code": "@X", "direction": "up", "adjusted_residual": 4.0},),
                shift_id="2026-01-06_A", shift_date=dt.date(2026, 1, 6), shift_name="A",
                shift_start=t, last_shift_id="2026-01-06_A", last_shift_start=t, shift_count=1,
                in_control_streak=0, baseline_version_id=1, baseline_name="plant", opened=t,
                updated=t)
    return AlarmView(**(base | kw))


def test_csv_cells_are_neutralised_but_numbers_are_kept():
    rows = list(csv.DictReader(io.StringIO(csv_text([_view()], dt.UTC))))
    (row,) = rows
    assert row["line"] == "'=L1"
    assert row["summary"] == "'-cmd|' /C calc'!A0"
    assert row["categories"] == "'@X up +4.0"
    assert row["adjusted_pvalue"] == "2e-05"  # a number, not neutralised


def test_table_lines_never_exceed_the_width():
    long = _view(summary="flash share 2.6x baseline (adj. residual +4.1); " * 5, line="LINE-WITH-A-LONG-CODE")
    now = dt.datetime(2026, 1, 9, tzinfo=dt.UTC)
    for text in table_lines([long, _view(id=123456, shift_count=7)], now):
        assert len(text) <= 100


def test_effect_of_a_sequential_alarm_is_labelled_as_a_share_of_the_limit():
    # a sequential alarm's effect_size is the leading chart's statistic / its limit
    assert fmt_effect("sequential", 8.83) == "8.8x lim"
    assert (fmt_effect("baseline", 0.48), fmt_effect("rate", 1.35)) == ("w 0.48", "1.35x")
    seq = _view(kind="sequential", effect_size=12.34, pvalue=None, adjusted_pvalue=None)
    header, row = table_lines([seq], dt.datetime(2026, 1, 9, tzinfo=dt.UTC))[:2]
    assert row.endswith("12.3x lim") and len(header) == len(row)
