"""Config file: parsing, validation (every problem at once), baselines, loading."""

from __future__ import annotations

import dataclasses
import hashlib
import os
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcfit.config import (
    DEFAULT_MC_DRAWS,
    BaselineSpec,
    Config,
    ShiftSpec,
    Thresholds,
    baseline_for,
    load_config,
    parse_config,
    store_url_for,
    thresholds_for,
)
from qcfit.errors import ConfigError, Problem


def parse(text: str) -> Config:
    return parse_config(tomllib.loads(text), text=text)


def problems_of(text: str) -> list[Problem]:
    with pytest.raises(ConfigError) as info:
        parse(text)
    return info.value.problems


def keys_of(text: str) -> set[str]:
    return {p.key for p in problems_of(text)}


def reasons(text: str, key: str) -> list[str]:
    return [p.reason for p in problems_of(text) if p.key == key]


# --------------------------------------------------------------------------- the valid plant

def test_valid_plant_config_is_read_completely(tmp_path, plant_config_text, write_config):
    path = write_config(tmp_path, plant_config_text)
    config = load_config(path)
    assert config.path == path
    assert config.text == plant_config_text
    assert config.hash == hashlib.sha256(plant_config_text.encode()).hexdigest()
    assert config.timezone_name == "America/Chicago"
    assert config.timezone.key == "America/Chicago"
    assert config.plant_name == "Test plant"
    assert [s.name for s in config.shifts] == ["A", "B", "C"]
    assert config.shifts[2].start.hour == 22 and config.shifts[2].end.hour == 6
    assert config.non_production_weekdays == frozenset({6})
    assert list(config.lines) == ["L1", "L2", "L3", "L4"]
    assert config.categories["FL"] == "flash"
    assert list(config.categories) == ["SCR", "DNT", "FL", "SH", "BUR", "OTH"]
    assert config.thresholds == Thresholds()
    assert config.source is None
    assert config.store.url is None
    assert config.warnings == ()
    (spec,) = config.baselines
    assert spec.name == "plant" and spec.lines == ("*",) and spec.all_lines
    assert list(spec.proportions) == list(config.categories)
    assert spec.proportions["SCR"] == pytest.approx(0.30)
    assert spec.rate == pytest.approx(0.012)


def test_config_objects_are_frozen(plant_config_text):
    config = parse(plant_config_text)
    with pytest.raises(dataclasses.FrozenInstanceError):
        config.timezone_name = "UTC"  # type: ignore[misc]
    with pytest.raises(TypeError):
        config.lines["L9"] = "new"  # type: ignore[index]
    with pytest.raises(TypeError):
        config.baselines[0].proportions["SCR"] = 1.0  # type: ignore[index]
    assert hash(config.baselines[0]) == hash(parse(plant_config_text).baselines[0])


def test_defaults_when_optional_sections_are_absent():
    text = """
[plant]
timezone = "UTC"
[[shift]]
name = "D"
start = "00:00"
end = "00:00"
[lines]
L1 = "Line 1"
[categories]
A = "a"
B = "b"
"""
    config = parse(text)
    assert config.shifts == (ShiftSpec("D", *(2 * [config.shifts[0].start])),)
    assert config.shifts[0].minutes == 1440  # start == end: one 24-hour shift
    assert config.thresholds.mc_draws == DEFAULT_MC_DRAWS
    assert config.schedule.grace_minutes == 15 and config.schedule.tick_minutes == 5
    assert config.sequential.enabled and config.sequential.target_arl == 370
    assert config.report.keep == 30 and config.report.folder is None
    assert config.notify.command is None and config.notify.mail_to == ()
    assert config.log.level == "INFO"
    assert config.baselines == ()


def test_parse_is_pure_and_hash_stands_in_without_text(plant_config_text):
    mapping = tomllib.loads(plant_config_text)
    a = parse_config(mapping)
    b = parse_config(tomllib.loads(plant_config_text))
    assert a.hash == b.hash and len(a.hash) == 64
    assert a.text  # a canonical rendering stands in for the file text
    assert mapping == tomllib.loads(plant_config_text)  # input not modified


# --------------------------------------------------------------------------- every problem at once

BROKEN = """
[plant]
timezone = "America/Chicgo"
non_production_days = ["Sonntag"]

[[shift]]
name = "A"
start = "06:00"
end = "14:00"

[[shift]]
name = "B"
start = "14:00"
end = "25:00"

[[shift]]
name = "C"
start = "22:00"
ende = "06:00"

[lines]
L1 = "Line 1"

[categories]
SCR = "scratch"
DNT = "dent"
OTH = "other"

[thresholds]
alarm_levl = 0.01
power = 1.5

[baseline.glaze-lines]
lines = ["L1"]
effective = 2026-01-05
proportions = { DNT = 0.5, OTH = 0.5 }
"""


def test_every_problem_is_reported_at_once_with_its_key():
    with pytest.raises(ConfigError) as info:
        parse_config(tomllib.loads(BROKEN), text=BROKEN, path=Path("plant.toml"))
    err = info.value
    assert err.exit_code == 2
    assert err.path == "plant.toml"
    msg = str(err)
    assert 'shift[2].end: "25:00" is not a time of day' in msg
    assert "baseline.glaze-lines.proportions: category SCR of the plant is missing" in msg
    assert "plant.timezone: \"America/Chicgo\" is not a known time zone; did you mean 'America/Chicago'?" in msg
    assert 'plant.non_production_days: "Sonntag" is not a weekday name' in msg
    assert "shift[3].ende: unknown key; did you mean 'end'?" in msg
    assert "shift[3].end: missing" in msg
    assert "thresholds.alarm_levl: unknown key; did you mean 'alarm_level'?" in msg
    assert "thresholds.power: 1.5 must be < 1" in msg
    assert "config plant.toml has 8 problem(s)" in msg
    assert len(err.problems) == 8


def test_unknown_keys_are_caught_at_every_level(plant_config_text):
    text = plant_config_text.replace("[thresholds]", "[treshold]\nx = 1\n[thresholds]")
    text = text.replace('name = "Test plant"', 'name = "Test plant"\ntimezon = "UTC"')
    text = text.replace('name = "A"', 'name = "A"\nstrat = "06:00"')
    text = text.replace("rate = 0.012", "rate = 0.012\nefective = 2026-01-01\n"
                        "[baseline.plant.thresholds]\nalarm = 0.001")
    text += "\n[schedule]\ngrace = 5\n[notify]\nsmtp = \"mail\"\n[log]\nlevl = \"INFO\"\n"
    text += "[sequential]\nlamda = 0.2\n[report]\nfolders = \"r\"\n[store]\nuri = \"x\"\n"
    text += "[source]\nurl = \"sqlite:///x\"\nquery = \"select 1\"\nkind = \"events\"\nknd = 1\n"
    found = {p.key: p.reason for p in problems_of(text)}
    for key in ("treshold", "plant.timezon", "shift[1].strat", "baseline.plant.efective",
                "baseline.plant.thresholds.alarm", "schedule.grace", "notify.smtp", "log.levl",
                "sequential.lamda", "report.folders", "store.uri", "source.knd"):
        assert found[key].startswith("unknown key"), key
    assert found["shift[1].strat"] == "unknown key; did you mean 'start'?"


# --------------------------------------------------------------------------- plant and shifts

PLANT = """
[plant]
timezone = "Europe/Berlin"
{plant_extra}
{shifts}
[lines]
L1 = "Line 1"
[categories]
A = "a"
B = "b"
"""


def plant(shifts: str, plant_extra: str = "") -> str:
    return PLANT.format(shifts=shifts, plant_extra=plant_extra)


def shift_tables(*spans: tuple[str, str, str]) -> str:
    return "\n".join(f'[[shift]]\nname = "{n}"\nstart = {s}\nend = {e}\n' for n, s, e in spans)


@pytest.mark.parametrize("value", ['"25:00"', '"6"', '"06:60"', '"6 am"', "6", '""', '"24:00:01"'])
def test_a_bad_time_of_day_names_the_shift_and_key(value):
    text = plant(shift_tables(("A", '"06:00"', value)))
    (reason,) = reasons(text, "shift[1].end")
    assert reason.startswith(f"{value} is not a time of day")


def test_times_as_strings_or_toml_local_times_and_24_00_as_end():
    text = plant(shift_tables(("A", "06:00:00", '"14:00:30"'), ("B", '"14:00:30"', '"24:00"')))
    config = parse(text)
    a, b = config.shifts
    assert (a.start.hour, a.end.hour, a.end.second) == (6, 14, 30)
    assert b.end.hour == 0 and b.minutes == pytest.approx(10 * 60 - 0.5)
    assert reasons(plant(shift_tables(("A", '"24:00"', '"06:00"'))), "shift[1].start")


@pytest.mark.parametrize(
    ("spans", "expect"),
    [
        ((("A", '"06:00"', '"14:00"'), ("B", '"13:00"', '"22:00"')), "shift[2]"),
        ((("A", '"22:00"', '"06:00"'), ("B", '"05:00"', '"13:00"')), "shift[2]"),
        ((("A", '"06:00"', '"06:00"'), ("B", '"08:00"', '"09:00"')), "shift[2]"),
        ((("A", '"08:00"', '"09:00"'), ("B", '"23:00"', '"23:30"'), ("C", '"20:00"', '"10:00"')),
         "shift[3]"),
    ],
)
def test_overlapping_shifts_are_an_error(spans, expect):
    found = {p.key: p.reason for p in problems_of(plant(shift_tables(*spans)))}
    assert "overlaps" in found[expect]


def test_gaps_between_shifts_are_allowed_and_touching_shifts_do_not_overlap():
    config = parse(plant(shift_tables(("A", '"06:00"', '"14:00"'), ("C", '"22:00"', '"06:00"'))))
    assert [s.name for s in config.shifts] == ["A", "C"]


def test_shift_names_are_unique_and_plain():
    text = plant(shift_tables(("A", '"06:00"', '"14:00"'), ("A", '"14:00"', '"22:00"'),
                              ("x y", '"22:00"', '"23:00"')))
    found = {p.key: p.reason for p in problems_of(text)}
    assert found["shift[2].name"] == '"A" is already the name of shift[1]'
    assert "letters, digits" in found["shift[3].name"]


def test_shift_must_be_an_array_of_tables():
    text = PLANT.format(plant_extra="", shifts='[shift]\nname = "A"\nstart = "06:00"\nend = "07:00"\n')
    assert "[[shift]]" in reasons(text, "shift")[0]
    assert "missing" in reasons(PLANT.format(plant_extra="", shifts=""), "shift")[0]


def test_non_production_weekdays_and_holidays():
    extra = ('non_production_days = ["sun", "Saturday"]\n'
             'holidays = [2026-12-25, "2027-01-01"]')
    config = parse(plant(shift_tables(("A", '"06:00"', '"14:00"')), extra))
    assert config.non_production_weekdays == frozenset({5, 6})
    assert {d.isoformat() for d in config.non_production_dates} == {"2026-12-25", "2027-01-01"}
    bad = 'non_production_days = ["Su", "Moonday"]\nholidays = ["2026-13-01", 2026-12-25T00:00:00]'
    found = problems_of(plant(shift_tables(("A", '"06:00"', '"14:00"')), bad))
    assert [p.key for p in found] == ["plant.non_production_days"] * 2 + [
        "plant.holidays[1]", "plant.holidays[2]"]
    every = 'non_production_days = ["Mon","Tue","Wed","Thu","Fri","Sat","Sun"]'
    assert reasons(plant(shift_tables(("A", '"06:00"', '"14:00"')), every),
                   "plant.non_production_days") == ["every weekday is a non-production day"]


def test_missing_sections_are_named(plant_config_text):
    found = {p.key: p.reason for p in problems_of('title = "x"\n')}
    assert found["title"].startswith("unknown key")
    for key in ("plant", "shift", "lines", "categories"):
        assert found[key].startswith("missing"), key
    assert "timezone" in reasons(plant_config_text.replace('timezone = "America/Chicago"', ""),
                                 "plant.timezone")[0]


def test_codes_of_lines_and_categories():
    text = plant(shift_tables(("A", '"06:00"', '"14:00"'))).replace(
        'L1 = "Line 1"', '" L2" = "two"\n"*" = "all"\nL3 = 3\nL4 = ""')
    found = {p.key: p.reason for p in problems_of(text)}
    assert "surrounding spaces" in found["lines. L2"]
    assert "reserved" in found["lines.*"]
    assert "display name must be a string" in found["lines.L3"]
    one = plant(shift_tables(("A", '"06:00"', '"14:00"'))).replace('B = "b"\n', "")
    assert reasons(one, "categories") == ["needs at least 2 entries"]
    ok = parse(plant(shift_tables(("A", '"06:00"', '"14:00"'))).replace('L1 = "Line 1"', 'L4 = ""'))
    assert ok.lines["L4"] == "L4"  # an empty display name falls back to the code


# --------------------------------------------------------------------------- time zone

def test_time_zone_loads_from_the_tzdata_package_with_no_system_database(tmp_path, plant_config_text,
                                                                        write_config):
    # Windows has no IANA database; an empty TZPATH simulates it (tzdata must be installed).
    path = write_config(tmp_path, plant_config_text.replace("America/Chicago", "Europe/Berlin"))
    code = (
        "import sys, zoneinfo; from qcfit.config import load_config, timezone_source\n"
        "assert zoneinfo.TZPATH == (), zoneinfo.TZPATH\n"
        "c = load_config(sys.argv[1]); print(c.timezone.key, '|', timezone_source(c.timezone.key))\n"
    )
    env = {k: v for k, v in os.environ.items() if not k.startswith("QCFIT_")}
    env["PYTHONTZPATH"] = ""
    out = subprocess.run([sys.executable, "-c", code, str(path)], env=env, capture_output=True,
                         text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    zone, source = out.stdout.strip().split(" | ")
    assert zone == "Europe/Berlin" and source.startswith("tzdata package")


@pytest.mark.parametrize("name", ["Mars/Olympus", "../etc/passwd", "", "America"])
def test_unknown_time_zone_is_a_problem(plant_config_text, name):
    text = plant_config_text.replace("America/Chicago", name)
    (reason,) = reasons(text, "plant.timezone")
    assert "not a known time zone" in reason or reason == "must not be empty"


# --------------------------------------------------------------------------- thresholds

@pytest.mark.parametrize(
    ("key", "value", "fragment"),
    [
        ("alarm_level", "0", "must be > 0"),
        ("alarm_level", "1.0", "must be < 1"),
        ("alarm_level", "true", "must be a number"),
        ("alarm_level", "nan", "finite"),
        ("watch_level", '"0.05"', "must be a number"),
        ("min_effect_w", "-0.1", "must be >= 0"),
        ("min_effect_v", "1.5", "must be <= 1"),
        ("min_rate_ratio", "0.9", "must be >= 1"),
        ("multiple_testing", '"fdr"', "is not one of"),
        ("power", "0", "must be > 0"),
        ("persistence_k", "0", "must be >= 1"),
        ("persistence_m", "2.0", "whole number"),
        ("auto_clear_after", "-1", "must be >= 0"),
        ("mc_draws", "10", "must be >= 100"),
        ("seed", "-5", "must be >= 0"),
    ],
)
def test_threshold_ranges(key, value, fragment):
    text = plant(shift_tables(("A", '"06:00"', '"14:00"'))) + f"[thresholds]\n{key} = {value}\n"
    (reason,) = reasons(text, f"thresholds.{key}")
    assert fragment in reason


def test_threshold_cross_checks(plant_config_text):
    text = plant_config_text.replace("alarm_level = 0.01", "alarm_level = 0.1\npersistence_k = 3\n"
                                     "persistence_m = 2")
    found = {p.key: p.reason for p in problems_of(text)}
    assert "above watch_level" in found["thresholds.alarm_level"]
    assert "k of the last m" in found["thresholds.persistence_k"]


def test_thresholds_read_and_integers_accepted_for_numbers(plant_config_text):
    text = plant_config_text.replace("min_effect_w = 0.30", "min_effect_w = 1\nmc_draws = 2000\n"
                                     'multiple_testing = "holm"').replace(
        'multiple_testing = "bh"', "")
    t = parse(text).thresholds
    assert t.min_effect_w == 1.0 and isinstance(t.min_effect_w, float)
    assert t.mc_draws == 2000 and t.multiple_testing == "holm"


# --------------------------------------------------------------------------- baselines

BASE = """
[plant]
timezone = "Europe/Berlin"
[[shift]]
name = "A"
start = "06:00"
end = "06:00"
[lines]
L1 = "Line 1"
L2 = "Line 2"
L3 = "Line 3"
[categories]
SCR = "scratch"
DNT = "dent"
OTH = "other"
"""


def with_baselines(body: str) -> str:
    return BASE + body


GLAZE = """
[baseline.glaze-lines]
lines = ["L1", "L2"]
effective = 2026-01-05
proportions = { SCR = 0.40, DNT = 0.35, OTH = 0.25 }
rate = 0.012
"""


def test_baseline_of_the_issue_shape():
    (spec,) = parse(with_baselines(GLAZE)).baselines
    assert spec.name == "glaze-lines" and spec.lines == ("L1", "L2")
    assert spec.effective.isoformat() == "2026-01-05"
    assert dict(spec.proportions) == pytest.approx({"SCR": 0.40, "DNT": 0.35, "OTH": 0.25})
    assert spec.covers("L2") and not spec.covers("L3")
    assert spec.counts is None and spec.thresholds == {}


@pytest.mark.parametrize(
    ("props", "key", "fragment"),
    [
        ("{ SCR = 0.5, DNT = 0.5 }", "baseline.b.proportions",
         "category OTH of the plant is missing from baseline 'b'"),
        ("{ SCR = 0.5, DNT = 0.5, OTH = 0.0 }", "baseline.b.proportions.OTH", "must be > 0"),
        ("{ SCR = 0.6, DNT = 0.5, OTH = -0.1 }", "baseline.b.proportions.OTH", "must be > 0"),
        ("{ SCR = 0.5, DNT = 0.5, OTH = nan }", "baseline.b.proportions.OTH", "finite"),
        ('{ SCR = 0.5, DNT = 0.3, OTH = "0.2" }', "baseline.b.proportions.OTH", "must be a number"),
        ("{ SCR = 0.5, DNT = 0.3, OTH = 0.1, XYZ = 0.1 }", "baseline.b.proportions.XYZ",
         "unknown category"),
        ("{ SCR = 0.5, DNT = 0.3, OTH = 0.1 }", "baseline.b.proportions", "sum to 0.9, not 1"),
        ("[0.5, 0.3, 0.2]", "baseline.b.proportions", "must be a table"),
    ],
)
def test_bad_proportions(props, key, fragment):
    text = with_baselines(f'[baseline.b]\nlines = "*"\neffective = 2026-01-05\nproportions = {props}\n')
    assert any(fragment in r for r in reasons(text, key)), problems_of(text)


def test_sum_within_tolerance_is_accepted_as_written():
    # 1 - 5e-7 is within the 1e-6 tolerance (common practice, no source)
    text = with_baselines('[baseline.b]\nlines = "*"\neffective = 2026-01-05\n'
                          "proportions = { SCR = 0.4999995, DNT = 0.3, OTH = 0.2 }\n")
    config = parse(text)
    assert config.baselines[0].proportions["SCR"] == 0.4999995 and config.warnings == ()


def test_normalize_scales_the_shares_with_a_warning(tmp_path, write_config, caplog):
    text = with_baselines('[baseline.b]\nlines = "*"\neffective = 2026-01-05\nnormalize = true\n'
                          "proportions = { SCR = 40, DNT = 35, OTH = 25 }\n")
    config = load_config(write_config(tmp_path, text))
    spec = config.baselines[0]
    assert dict(spec.proportions) == pytest.approx({"SCR": 0.40, "DNT": 0.35, "OTH": 0.25}, abs=1e-12)
    (warning,) = config.warnings
    assert warning.key == "baseline.b.proportions" and "sum to 100" in warning.reason
    assert "sum to 100" in caplog.text


def test_counts_derive_the_proportions():
    text = with_baselines('[baseline.b]\nlines = "*"\neffective = 2026-01-05\n'
                          "counts = { SCR = 80, DNT = 70, OTH = 50 }\n")
    spec = parse(text).baselines[0]
    assert dict(spec.proportions) == pytest.approx({"SCR": 0.40, "DNT": 0.35, "OTH": 0.25})
    assert dict(spec.counts) == {"SCR": 80, "DNT": 70, "OTH": 50}
    bad = text.replace("OTH = 50", "OTH = 0").replace("DNT = 70", "DNT = 7.5")
    found = {p.key: p.reason for p in problems_of(bad)}
    assert "must be >= 1" in found["baseline.b.counts.OTH"]
    assert "whole number" in found["baseline.b.counts.DNT"]


def test_proportions_or_counts_but_not_both_nor_neither():
    both = with_baselines('[baseline.b]\nlines = "*"\neffective = 2026-01-05\n'
                          "counts = { SCR = 1, DNT = 1, OTH = 1 }\n"
                          "proportions = { SCR = 0.5, DNT = 0.25, OTH = 0.25 }\n")
    assert "not both" in reasons(both, "baseline.b")[0]
    neither = with_baselines('[baseline.b]\nlines = "*"\neffective = 2026-01-05\n')
    assert "either proportions" in reasons(neither, "baseline.b")[0]


@pytest.mark.parametrize(
    ("line", "key", "fragment"),
    [
        ('lines = ["L1", "L9"]', "baseline.glaze-lines.lines", 'unknown line "L9"'),
        ('lines = ["*", "L1"]', "baseline.glaze-lines.lines", "already means every line"),
        ("lines = []", "baseline.glaze-lines.lines", "non-empty list"),
        ('lines = ["L1", "L1"]', "baseline.glaze-lines.lines", "listed twice"),
        ("effective = 2026-02-30", None, None),
        ('effective = "soon"', "baseline.glaze-lines.effective", "is not a date"),
        ("rate = 0", "baseline.glaze-lines.rate", "must be > 0"),
        ("rate = -0.5", "baseline.glaze-lines.rate", "must be > 0"),
        ('note = 5', "baseline.glaze-lines.note", "must be a string"),
        ("normalize = 1", "baseline.glaze-lines.normalize", "true or false"),
    ],
)
def test_bad_baseline_keys(line, key, fragment):
    name = line.split(" = ")[0]
    body = "\n".join(x for x in GLAZE.splitlines() if not x.startswith(f"{name} ="))
    text = with_baselines(body + "\n" + line + "\n")
    if key is None:  # not even TOML: a syntax error from the parser
        with pytest.raises(tomllib.TOMLDecodeError):
            tomllib.loads(text)
        return
    assert any(fragment in r for r in reasons(text, key)), problems_of(text)


def test_missing_effective_date_and_lines():
    text = with_baselines("[baseline.b]\nproportions = { SCR = 0.4, DNT = 0.35, OTH = 0.25 }\n")
    found = {p.key: p.reason for p in problems_of(text)}
    assert found["baseline.b.effective"].startswith("missing")
    assert found["baseline.b.lines"].startswith("missing")


def test_overlapping_effective_dates_for_the_same_line_are_an_error():
    other = GLAZE.replace("glaze-lines", "l2-only").replace('["L1", "L2"]', '["L2", "L3"]')
    found = {p.key: p.reason for p in problems_of(with_baselines(GLAZE + other))}
    assert found["baseline.l2-only.effective"] == (
        "2026-01-05 is also the effective date of baseline.glaze-lines for line L2; "
        "give one of them another date")
    # both "*" on the same date
    star = GLAZE.replace('["L1", "L2"]', '"*"')
    twice = star + star.replace("glaze-lines", "again")
    assert 'every line ("*")' in reasons(with_baselines(twice), "baseline.again.effective")[0]



def test_overlap_is_reported_beside_the_baselines_other_problems():
    # Every problem at once: both baselines also have errors of their own (a negative rate,
    # an unknown category), and the shared line and date are still reported.
    first = GLAZE.replace("rate = 0.012", "rate = -1")
    other = (GLAZE.replace("glaze-lines", "l2-only").replace('["L1", "L2"]', '["L2", "L3"]')
             .replace("SCR = 0.40", "XYZ = 0.40"))
    found = {p.key: p.reason for p in problems_of(with_baselines(first + other))}
    assert found["baseline.l2-only.effective"] == (
        "2026-01-05 is also the effective date of baseline.glaze-lines for line L2; "
        "give one of them another date")
    assert "baseline.glaze-lines.rate" in found
    assert any(k.startswith("baseline.l2-only.proportions") for k in found)
    # a baseline whose lines did not parse takes no part (no guess at what it meant)
    unknown_line = other.replace('["L2", "L3"]', '["L2", "L9"]')
    keys = keys_of(with_baselines(first + unknown_line))
    assert "baseline.l2-only.lines" in keys and "baseline.l2-only.effective" not in keys


def test_explicit_and_star_on_one_date_or_one_line_on_two_dates_are_fine():
    star = GLAZE.replace("glaze-lines", "all").replace('["L1", "L2"]', '"*"')
    later = GLAZE.replace("glaze-lines", "glaze-2026b").replace("2026-01-05", "2026-03-01")
    config = parse(with_baselines(GLAZE + star + later))
    assert [s.name for s in config.baselines] == ["all", "glaze-lines", "glaze-2026b"]


def test_baseline_for_picks_explicit_then_latest_effective():
    star = (GLAZE.replace("glaze-lines", "all").replace('["L1", "L2"]', '"*"')
            .replace("2026-01-05", "2026-01-01"))
    star2 = star.replace("[baseline.all]", "[baseline.all-2]").replace("2026-01-01", "2026-04-01")
    later = GLAZE.replace("glaze-lines", "glaze-b").replace("2026-01-05", "2026-03-01")
    config = parse(with_baselines(GLAZE + star + star2 + later))
    import datetime as dt

    def name(line, day):
        spec = baseline_for(config, line, dt.date.fromisoformat(day))
        return spec.name if spec else None

    assert name("L1", "2025-12-31") is None  # before any baseline
    assert name("L1", "2026-01-04") == "all"  # the line's own is not yet in force
    assert name("L1", "2026-01-05") == "glaze-lines"  # effective on its date
    assert name("L1", "2026-02-28") == "glaze-lines"
    assert name("L1", "2026-03-01") == "glaze-b"
    assert name("L1", "2026-05-01") == "glaze-b"  # explicit beats a later "*"
    assert name("L3", "2026-03-01") == "all"
    assert name("L3", "2026-04-01") == "all-2"


def test_per_baseline_threshold_overrides(plant_config_text):
    text = plant_config_text + "\n[baseline.plant.thresholds]\nalarm_level = 0.001\nmc_draws = 500\n"
    config = parse(text)
    spec = config.baselines[0]
    assert dict(spec.thresholds) == {"alarm_level": 0.001, "mc_draws": 500}
    merged = thresholds_for(config, spec)
    assert merged.alarm_level == 0.001 and merged.mc_draws == 500
    assert merged.watch_level == config.thresholds.watch_level
    assert thresholds_for(config, None) is config.thresholds
    bad = plant_config_text + "\n[baseline.plant.thresholds]\nwatch_level = 0.001\npower = 2\n"
    found = {p.key: p.reason for p in problems_of(bad)}
    assert "above watch_level 0.001" in found["baseline.plant.thresholds.alarm_level"]
    assert "must be < 1" in found["baseline.plant.thresholds.power"]


# --------------------------------------------------------------------------- canonical text

def test_same_content_gives_the_same_hash_whatever_the_formatting():
    a = with_baselines(GLAZE)
    b = with_baselines("""
# our glaze lines, agreed at the quality meeting
[baseline."glaze-lines"]
rate = 1.2e-2
proportions.OTH = 0.25
proportions.SCR = 0.4          # scratches
proportions.DNT = 3.5e-1
effective = 2026-01-05
lines = [ "L2",
          "L1" ]
normalize = false
""")
    sa, sb = parse(a).baselines[0], parse(b).baselines[0]
    assert sa.toml_text == sb.toml_text
    assert sa.content_hash == sb.content_hash == hashlib.sha256(sa.toml_text.encode()).hexdigest()
    assert sa.toml_text.startswith("[baseline.glaze-lines]\n")
    assert tomllib.loads(sa.toml_text)["baseline"]["glaze-lines"]["proportions"] == {
        "DNT": 0.35, "OTH": 0.25, "SCR": 0.4}
    as_string = parse(with_baselines(GLAZE.replace("2026-01-05", '"2026-01-05"'))).baselines[0]
    assert as_string.content_hash == sa.content_hash
    changed = parse(with_baselines(GLAZE.replace("0.012", "0.013"))).baselines[0]
    assert changed.content_hash != sa.content_hash


def test_canonical_text_round_trips_into_the_same_baseline():
    spec = parse(with_baselines(GLAZE + "note = \"fitted 2025-Q4\"\n[baseline.glaze-lines.thresholds]\n"
                                "alarm_level = 0.005\n")).baselines[0]
    again = parse(with_baselines(spec.toml_text)).baselines[0]
    assert again == spec
    assert "[baseline.glaze-lines.thresholds]" in spec.toml_text


# --------------------------------------------------------------------------- other sections

def test_sequential_concerns(plant_config_text):
    ok = plant_config_text + '\n[sequential]\nenabled = false\ntarget_arl = 500\nconcerns = [{category = "FL", factor = 2.0}, {category = "SCR", factor = 0.5}]\n'
    seq = parse(ok).sequential
    assert not seq.enabled and seq.target_arl == 500.0
    assert [(c.category, c.factor) for c in seq.concerns] == [("FL", 2.0), ("SCR", 0.5)]
    bad = plant_config_text + '\n[sequential]\newma_lambda = -0.1\nconcerns = [{category = "XX", factor = 1}, {factor = -1}, 3]\n'
    found = {p.key: p.reason for p in problems_of(bad)}
    assert "must be >= 0" in found["sequential.ewma_lambda"]
    assert "not a category" in found["sequential.concerns[1].category"]
    assert "1 means no change" in found["sequential.concerns[1].factor"]
    assert found["sequential.concerns[2].category"] == "missing"
    assert "must be > 0" in found["sequential.concerns[2].factor"]
    assert "must be a table" in found["sequential.concerns[3]"]


def test_notify_report_log_schedule(plant_config_text):
    ok = plant_config_text + (
        '\n[notify]\nsmtp_host = "mail.plant.local"\nmail_from = "qc@plant.local"\n'
        'mail_to = "lead@plant.local"\ncommand = ["/usr/bin/logger", "-t", "qcfit"]\n'
        '[report]\nfolder = "reports"\nkeep = 10\n[log]\nfile = "qcfit.log"\nlevel = "debug"\n'
        "[schedule]\ngrace_minutes = 0\ntick_minutes = 1\n")
    config = parse(ok)
    assert config.notify.mail_to == ("lead@plant.local",)
    assert config.notify.command == ("/usr/bin/logger", "-t", "qcfit")
    assert config.report == dataclasses.replace(config.report, folder="reports", keep=10)
    assert config.log.level == "DEBUG" and config.log.file == "qcfit.log"
    assert config.schedule.grace_minutes == 0.0 and config.schedule.tick_minutes == 1.0
    bad = plant_config_text + (
        '\n[notify]\nsmtp_host = "mail"\nsmtp_port = 70000\ncommand = "notify --json"\n'
        'mail_to = ["not-an-address"]\n[report]\nkeep = 0\n[log]\nlevel = "LOUD"\n'
        "[schedule]\ntick_minutes = 0\n")
    found = {p.key: p.reason for p in problems_of(bad)}
    assert "must be <= 65535" in found["notify.smtp_port"]
    assert "list of strings" in found["notify.command"]
    assert "not a mail address" in found["notify.mail_to[1]"]
    assert "must be >= 1" in found["report.keep"]
    assert "is not one of" in found["log.level"]
    assert "must be > 0" in found["schedule.tick_minutes"]
    lonely = plant_config_text + '\n[notify]\nmail_to = ["a@b.c"]\n'
    assert "need a mail server" in reasons(lonely, "notify.smtp_host")[0]


def test_source_section(plant_config_text):
    ok = plant_config_text + '\n[source]\nurl = "sqlite:///stations.db"\nquery = "select 1"\nkind = "counts"\n'
    source = parse(ok).source
    assert source.kind == "counts" and source.ambiguous == "raise"
    bad = plant_config_text + '\n[source]\nurl = "sqlite:///x"\nkind = "rows"\n'
    found = {p.key: p.reason for p in problems_of(bad)}
    assert found["source.query"] == "missing" and "is not one of" in found["source.kind"]


# --------------------------------------------------------------------------- loading files

def test_byte_order_mark_is_accepted(tmp_path, plant_config_text):
    path = tmp_path / "bom.toml"
    path.write_bytes(b"\xef\xbb\xbf" + plant_config_text.encode("utf-8"))
    config = load_config(path)
    assert config.text == plant_config_text and config.timezone_name == "America/Chicago"


def test_non_utf8_file_names_file_and_line(tmp_path, plant_config_text):
    path = tmp_path / "latin1.toml"
    text = plant_config_text.replace('SH = "short shot"', 'SH = "Lunker größe"')
    path.write_bytes(text.encode("latin-1"))
    with pytest.raises(ConfigError) as info:
        load_config(path)
    line_no = text.splitlines().index('SH = "Lunker größe"') + 1
    (problem,) = info.value.problems
    assert problem.key == f"line {line_no}, column 16"  # the ö after "SH = \"Lunker gr"
    assert "byte 0xf6 is not UTF-8" in problem.reason
    assert str(path) in str(info.value) and info.value.exit_code == 2


def test_toml_syntax_error_names_line_and_gives_a_hint_for_bare_times(tmp_path, write_config,
                                                                      plant_config_text):
    text = plant_config_text.replace('start = "22:00"', "start = 22:00")
    path = write_config(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_config(path)
    (problem,) = info.value.problems
    line_no = text.splitlines().index("start = 22:00") + 1
    assert problem.key.startswith(f"line {line_no}, column")
    assert 'write a time of day in quotes ("06:00")' in problem.reason
    assert problem.reason.endswith(": start = 22:00")
    assert f"config {path} has 1 problem(s)" in str(info.value)


def test_missing_file_and_folder(tmp_path):
    with pytest.raises(ConfigError) as info:
        load_config(tmp_path / "nope.toml")
    assert info.value.problems == [Problem("file", "not found")]
    with pytest.raises(ConfigError) as info:
        load_config(tmp_path)
    assert "folder" in info.value.problems[0].reason


def test_validation_problems_carry_the_file_name(tmp_path, write_config, plant_config_text):
    path = write_config(tmp_path, plant_config_text.replace('end = "14:00"', 'end = "14:99"'))
    with pytest.raises(ConfigError) as info:
        load_config(str(path))
    assert info.value.path == str(path)
    assert 'shift[1].end: "14:99" is not a time of day' in str(info.value)


# --------------------------------------------------------------------------- store url

def test_store_url_defaults_beside_the_config(tmp_path, write_config, plant_config_text):
    path = write_config(tmp_path, plant_config_text)
    config = load_config(path)
    assert store_url_for(config, path) == f"sqlite:///{(tmp_path / 'plant.sqlite').as_posix()}"


@pytest.mark.parametrize(
    ("url", "expected"),
    [
        ("sqlite:///data/qc.sqlite", "sqlite:///{dir}/data/qc.sqlite"),
        ("sqlite:////var/lib/qc.sqlite", "sqlite:////var/lib/qc.sqlite"),
        ("sqlite:///:memory:", "sqlite:///:memory:"),
        ("postgresql+psycopg://qc@db/qcfit", "postgresql+psycopg://qc@db/qcfit"),
    ],
)
def test_store_url_from_config(tmp_path, write_config, plant_config_text, url, expected):
    path = write_config(tmp_path, plant_config_text + f'\n[store]\nurl = "{url}"\n')
    config = load_config(path)
    assert store_url_for(config, path) == expected.format(dir=tmp_path.resolve().as_posix())


# --------------------------------------------------------------------------- invariants

_quarter = st.integers(0, 95)


@settings(max_examples=150, deadline=None, derandomize=True)
@given(st.lists(st.tuples(_quarter, _quarter), min_size=1, max_size=4))
def test_overlap_check_agrees_with_a_minute_by_minute_count(spans):
    # Any set of shifts on a 15-minute grid: the config is rejected for overlap exactly
    # when some minute of the 24-hour clock is covered twice.
    def hhmm(q: int) -> str:
        return f'"{q // 4:02d}:{(q % 4) * 15:02d}"'

    text = plant(shift_tables(*((f"S{i}", hhmm(s), hhmm(e)) for i, (s, e) in enumerate(spans))))
    cover = [0] * 96
    for s, e in spans:
        length = (e - s) % 96 or 96
        for k in range(length):
            cover[(s + k) % 96] += 1
    expect_overlap = max(cover) > 1
    try:
        parse(text)
        overlap = False
    except ConfigError as err:
        overlap = any("overlaps" in p.reason for p in err.problems)
    assert overlap == expect_overlap


def test_baseline_spec_is_a_plain_record():
    spec = parse(with_baselines(GLAZE)).baselines[0]
    assert isinstance(spec, BaselineSpec)
    assert isinstance(spec.rate, float) and isinstance(spec.proportions["SCR"], float)


def test_uncovered_hours_are_a_warning_not_an_error():
    config = parse(plant(shift_tables(("A", '"06:00"', '"14:00"'), ("B", '"14:00"', '"21:30"'))))
    assert config.warnings == (
        Problem("shift", "no shift covers 21:30-06:00; events then belong to no shift"),)
    full = parse(plant(shift_tables(("A", '"06:00"', '"18:00"'), ("N", '"18:00"', '"06:00"'))))
    assert full.warnings == ()


# --------------------------------------------------------------------------- the reference

def _documented_example() -> str:
    import textwrap

    import qcfit.config as module

    doc = module.__doc__ or ""
    return textwrap.dedent(doc.split("Complete example", 1)[1].split("::\n", 1)[1])


def test_the_documented_complete_example_loads_and_uses_every_key(tmp_path, write_config):
    text = _documented_example()
    config = load_config(write_config(tmp_path, text))
    raw = tomllib.loads(text)
    sections = {"store": config.store, "schedule": config.schedule, "source": config.source,
                "thresholds": config.thresholds, "sequential": config.sequential,
                "report": config.report, "notify": config.notify, "log": config.log}
    for name, settings_obj in sections.items():
        assert set(raw[name]) == {f.name for f in dataclasses.fields(settings_obj)}, name
    assert set(raw["plant"]) == {"name", "timezone", "non_production_days", "holidays"}
    baseline_keys = set(raw["baseline"]["presses"]) | set(raw["baseline"]["press-2-new-mould"])
    assert baseline_keys == {"lines", "effective", "proportions", "counts", "normalize", "rate",
                             "note", "thresholds"}
    # the defaults the reference claims are the defaults of the dataclasses
    assert config.thresholds == Thresholds()
    assert [s.name for s in config.baselines] == ["presses", "press-2-new-mould"]
    assert config.warnings == ()
    import qcfit.config as module

    for key in (*raw["thresholds"], *raw["notify"], *raw["log"], *raw["sequential"]):
        assert f"``{key}``" in (module.__doc__ or ""), key


def test_a_baseline_without_a_name_is_explained():
    text = with_baselines('[baseline]\nlines = "*"\neffective = 2026-01-05\n')
    found = {p.key: p.reason for p in problems_of(text)}
    assert "[baseline.NAME]" in found["baseline.lines"]


def test_paths_in_the_config_are_taken_from_its_folder(tmp_path, write_config, plant_config_text):
    from qcfit.config import resolve_path, timezone_source

    path = write_config(tmp_path, plant_config_text + '\n[report]\nfolder = "reports"\n')
    config = load_config(path)
    assert resolve_path(config, config.report.folder) == tmp_path.resolve() / "reports"
    assert resolve_path(config, str(tmp_path / "abs.log")) == tmp_path / "abs.log"
    source = timezone_source("America/Chicago")
    assert source.startswith(("system time-zone database", "tzdata package"))


def test_syntax_errors_at_the_end_and_duplicate_keys(tmp_path, write_config, plant_config_text):
    unclosed = write_config(tmp_path, plant_config_text + 'holidays = [2026-12-25,\n')
    with pytest.raises(ConfigError) as info:
        load_config(unclosed)
    (problem,) = info.value.problems
    assert problem.key == f"line {len(plant_config_text.splitlines()) + 1}, end of file"
    twice = write_config(tmp_path, plant_config_text.replace('L2 = "Line 2"', 'L1 = "again"'),
                         name="twice.toml")
    with pytest.raises(ConfigError) as info:
        load_config(twice)
    (problem,) = info.value.problems
    line_no = plant_config_text.splitlines().index('L2 = "Line 2"') + 1
    assert problem.key.startswith(f"line {line_no}, column")
    assert problem.reason.startswith("Cannot overwrite a value")


def test_the_shared_fixture_in_a_fresh_pytest(tmp_path):
    # Run a one-test pytest session with QCFIT_CONFIG and QCFIT_TEST_PG_URL set: the first is
    # hidden from the test, the second is kept.
    conftest = Path(__file__).with_name("conftest.py")
    (tmp_path / "conftest.py").write_text(conftest.read_text(encoding="utf-8"), encoding="utf-8")
    (tmp_path / "test_env.py").write_text(
        "import os\n\ndef test_env():\n"
        "    assert 'QCFIT_CONFIG' not in os.environ\n"
        "    assert os.environ['QCFIT_TEST_PG_URL'] == 'postgresql://x'\n", encoding="utf-8")
    env = dict(os.environ, QCFIT_CONFIG="/nonexistent.toml", QCFIT_TEST_PG_URL="postgresql://x")
    out = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider",
                          "-p", "no:xdist", str(tmp_path)], cwd=tmp_path, env=env,
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "1 passed" in out.stdout


def test_sequential_defaults_agree_with_the_charts():
    # The config's defaults must be the ones the ARL study and the chart code assume.
    from qcfit.config import SequentialSettings
    from qcfit.stats import sequential

    assert SequentialSettings().ewma_lambda == sequential.DEFAULT_EWMA_LAMBDA
    assert SequentialSettings().target_arl == sequential.DEFAULT_ARL0
