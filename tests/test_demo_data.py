"""The demo plant in sample_lines/: reproducible from its generator, consistent with its config,
and the injected faults are present where and how sample_lines/SCENARIO.md says.

Shift windows here are rebuilt from the config with zoneinfo (not taken from the generator), so
the data are checked against the plant's calendar as qcfit will read it.
"""

from __future__ import annotations

import datetime as dt
import importlib.util
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from qcfit.calendar import ShiftCalendar
from qcfit.config import Config, load_config, parse_config
from qcfit.ingest_csv import read_table
from qcfit.ingest_rows import (
    COUNT_COLUMNS,
    COUNT_OPTIONAL,
    EVENT_COLUMNS,
    EVENT_OPTIONAL,
    UNIT_COLUMNS,
    validate_counts,
    validate_events,
    validate_units,
)

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_lines"
DATA = SAMPLE / "data"
DATA_FILES = ("defect_events.csv", "shift_counts.csv", "units_inspected.csv", "truth.csv")
# The store is loaded after the data end; validation takes "now" as a parameter.
LOAD_TIME = dt.datetime(2026, 12, 1, 12, 0, tzinfo=dt.UTC)

# 3-sigma Shewhart false-alarm rate 0.0027 <-> in-control ARL 370 (Montgomery, Introduction to
# Statistical Quality Control, ch. 6; from memory). The per-shift test "at the ARL-370 level".
ALPHA_ARL370 = 1 / 370


def _load_generator():
    spec = importlib.util.spec_from_file_location("qcfit_demo_generate", SAMPLE / "generate.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses need the module registered
    spec.loader.exec_module(module)
    return module


gen = _load_generator()


@pytest.fixture(scope="module")
def config() -> Config:
    return load_config(SAMPLE / "plant.toml")


def _shift_windows(config: Config, first: dt.date, last: dt.date) -> pd.DataFrame:
    """Worked shifts between two local dates from the config: id, name, start/end (UTC)."""
    rows = []
    day = first
    while day <= last:
        if day.weekday() not in config.non_production_weekdays:
            for s in config.shifts:
                end_day = day + dt.timedelta(days=1) if s.end <= s.start else day
                start = dt.datetime.combine(day, s.start, tzinfo=config.timezone)
                end = dt.datetime.combine(end_day, s.end, tzinfo=config.timezone)
                rows.append((f"{day.isoformat()}_{s.name}", s.name, start.astimezone(dt.UTC),
                             end.astimezone(dt.UTC)))
        day += dt.timedelta(days=1)
    frame = pd.DataFrame(rows, columns=["shift", "name", "start", "end"])
    frame["start"] = pd.to_datetime(frame["start"], utc=True)
    frame["end"] = pd.to_datetime(frame["end"], utc=True)
    return frame


@pytest.fixture(scope="module")
def events() -> pd.DataFrame:
    frame = pd.read_csv(DATA / "defect_events.csv", dtype={"timestamp": str})
    frame["ts"] = pd.to_datetime(frame["timestamp"], format="ISO8601", utc=True)
    return frame


@pytest.fixture(scope="module")
def truth() -> pd.DataFrame:
    return pd.read_csv(DATA / "truth.csv")


@pytest.fixture(scope="module")
def windows(config: Config) -> pd.DataFrame:
    return _shift_windows(config, gen.FIRST_DATE, gen.LAST_DATE)


@pytest.fixture(scope="module")
def counts(events: pd.DataFrame, windows: pd.DataFrame, config: Config) -> pd.DataFrame:
    """Sum of quantity per (shift, line) x category, every worked shift x line present."""
    starts = windows["start"].to_numpy()
    index = np.searchsorted(starts, events["ts"].to_numpy(), side="right") - 1
    assert (index >= 0).all(), "an event before the first shift"
    inside = events["ts"].to_numpy() < windows["end"].to_numpy()[index]
    assert inside.all(), f"events outside every worked shift: {events[~inside].head()}"
    frame = events.assign(shift=windows["shift"].to_numpy()[index])
    table = frame.pivot_table(index=["shift", "line"], columns="category", values="quantity",
                              aggfunc="sum", fill_value=0)
    full = pd.MultiIndex.from_product([windows["shift"], list(config.lines)],
                                      names=["shift", "line"])
    return table.reindex(index=full, columns=list(config.categories), fill_value=0)


def _line(counts: pd.DataFrame, line: str) -> pd.DataFrame:
    return counts.xs(line, level="line")


def _baseline(config: Config, line: str) -> np.ndarray:
    spec = next(b for b in config.baselines if line in b.lines)
    return np.array([spec.proportions[c] for c in config.categories])


def _pearson_p(observed: np.ndarray, p0: np.ndarray) -> np.ndarray:
    """Per-row Pearson X^2 goodness-of-fit p-values (scipy.stats.chisquare as reference)."""
    n = observed.sum(axis=1, keepdims=True)
    return stats.chisquare(observed, f_exp=n * p0, axis=1).pvalue


# ----------------------------------------------------------------- reproducible, small, shaped


def test_generator_script_rewrites_the_committed_files_byte_for_byte(tmp_path: Path) -> None:
    done = subprocess.run([sys.executable, str(SAMPLE / "generate.py"), "--out", str(tmp_path)],
                          capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    for name in DATA_FILES:
        assert (tmp_path / name).read_bytes() == (DATA / name).read_bytes(), name


def test_data_files_are_plain_csv_of_a_few_megabytes() -> None:
    sizes = {name: (DATA / name).stat().st_size for name in DATA_FILES}
    assert sizes["defect_events.csv"] < 5_000_000
    assert sum(sizes.values()) < 6_000_000
    header = (DATA / "defect_events.csv").read_text(encoding="utf-8").splitlines()[0]
    assert header == "timestamp,line,category,quantity"
    counts_header = (DATA / "shift_counts.csv").read_text(encoding="utf-8").splitlines()[0]
    assert counts_header == "shift,line,category,count,units_inspected"
    units_header = (DATA / "units_inspected.csv").read_text(encoding="utf-8").splitlines()[0]
    assert units_header == "shift,line,units_inspected"


def test_config_describes_the_generated_plant(config: Config) -> None:
    assert config.timezone_name == gen.TIMEZONE
    assert [(s.name, s.start, s.end) for s in config.shifts] == list(gen.SHIFTS)
    assert any(s.end <= s.start for s in config.shifts), "one shift crosses midnight"
    assert config.non_production_weekdays == gen.NON_PRODUCTION_WEEKDAYS
    assert tuple(config.lines) == tuple(gen.LINES)
    assert tuple(config.categories) == gen.CATEGORIES
    assert dict(config.categories) == gen.CATEGORY_NAMES
    assert 4 <= len(config.lines) <= 6 and 6 <= len(config.categories) <= 10
    for line, spec in gen.LINES.items():
        covering = [b for b in config.baselines if line in b.lines]
        assert len(covering) == 1, line
        baseline = covering[0]
        assert baseline.effective == gen.FIRST_DATE
        assert baseline.rate == pytest.approx(spec.rate, abs=1e-12)
        proportions = [baseline.proportions[c] for c in gen.CATEGORIES]
        assert proportions == pytest.approx(gen.MIX[spec.group], abs=1e-12)
        assert sum(proportions) == pytest.approx(1.0, abs=1e-9)
    assert config.sequential.enabled
    assert config.report.folder
    assert config.warnings == ()


def test_the_per_shift_effect_floor_is_one_a_shift_can_see(config: Config,
                                                          truth: pd.DataFrame) -> None:
    # plant.toml raises min_effect_w to 0.35 so that a typical press shift has the configured
    # power against it (otherwise no shift could be called in control). Power of the Pearson
    # X^2 test: P(noncentral chi2(df, n w^2) > chi2_{1-alpha}(df)) (Cohen 1988, Statistical
    # Power Analysis, ch. 7); scipy.stats.ncx2 as reference.
    t = config.thresholds
    df = len(config.categories) - 1
    n = truth[truth["line"] != "IM5"]["defects"].median()
    critical = stats.chi2.isf(t.alarm_level, df)
    assert stats.ncx2.sf(critical, df, n * t.min_effect_w**2) >= t.power
    assert stats.ncx2.sf(critical, df, n * 0.10**2) < 0.1  # the 0.10 default: hopeless per shift


def _uncommented(text: str) -> str:
    """The config with every commented-out setting or table header switched on."""
    out = []
    for line in text.splitlines():
        rest = line[2:] if line.startswith("# ") else None
        if rest is not None and re.fullmatch(r"\[[\w.-]+\]", rest.strip()):
            line = rest
        elif rest is not None:
            try:
                line = rest if tomllib.loads(rest) else line
            except tomllib.TOMLDecodeError:
                pass
        out.append(line)
    return "\n".join(out) + "\n"


def test_commented_examples_in_the_config_are_valid_too() -> None:
    # plant.toml doubles as the complete example config: what it shows commented out must
    # work when switched on.
    text = _uncommented((SAMPLE / "plant.toml").read_text(encoding="utf-8"))
    config = parse_config(tomllib.loads(text), text=text)
    assert config.source is not None and config.source.kind == "events"
    assert config.store.url and config.store.url.startswith("postgresql")
    assert config.notify.smtp_host and config.notify.command
    assert config.log.file == "qcfit.log"
    micro = next(b for b in config.baselines if b.name == "micro-cell")
    assert micro.thresholds == {"min_effect_w": 0.30}


# ----------------------------------------------------------------------- calendar and time


def test_period_covers_60_days_three_shifts_and_the_end_of_summer_time(
    windows: pd.DataFrame, events: pd.DataFrame, config: Config
) -> None:
    production_days = windows["shift"].str[:10].nunique()
    assert production_days >= 60 and len(windows) == 3 * production_days
    assert windows["shift"].iloc[0] == "2026-09-07_A"
    assert windows["end"].max() < pd.Timestamp("2026-12-01T00:00", tz=config.timezone_name)
    # EU summer time ends on the last Sunday of October at 01:00 UTC (Directive 2000/84/EC,
    # art. 3): 2026-10-25. The night shift starting Saturday 24 October lasts 9 hours.
    night = windows.set_index("shift").loc["2026-10-24_C"]
    assert (night["end"] - night["start"]) == pd.Timedelta(hours=9)
    others = windows[windows["shift"] != "2026-10-24_C"]
    assert ((others["end"] - others["start"]) == pd.Timedelta(hours=8)).all()
    repeated_hour = events["timestamp"].str.startswith("2026-10-25T02:")
    assert set(events.loc[repeated_hour, "timestamp"].str[-6:]) == {"+02:00", "+01:00"}


def test_timestamps_are_plant_local_with_the_right_offset(events: pd.DataFrame) -> None:
    assert events["timestamp"].str.fullmatch(
        r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d[+-]\d\d:\d\d").all()
    local = events["ts"].dt.tz_convert(gen.TIMEZONE).dt.strftime("%Y-%m-%dT%H:%M:%S%z")
    rebuilt = local.str[:-2] + ":" + local.str[-2:]
    assert (rebuilt == events["timestamp"]).all()
    assert events["ts"].is_monotonic_increasing


def test_no_event_on_a_non_production_day(events: pd.DataFrame, counts: pd.DataFrame) -> None:
    # The counts fixture asserts every event is inside a worked shift; here directly: none
    # falls between Sunday 06:00 and Monday 06:00 (no shift starts on a Sunday).
    local = events["ts"].dt.tz_convert(gen.TIMEZONE)
    sunday_day = (local.dt.day_of_week == 6) & (local.dt.hour >= 6)
    monday_early = (local.dt.day_of_week == 0) & (local.dt.hour < 6)
    assert not (sunday_day | monday_early).any()


def test_counts_units_and_truth_agree(counts: pd.DataFrame, truth: pd.DataFrame,
                                     events: pd.DataFrame) -> None:
    by_shift_line = truth.set_index(["shift", "line"])
    assert counts.sum(axis=1).to_numpy().tolist() == by_shift_line["defects"].tolist()
    assert list(counts.index) == list(by_shift_line.index)
    per_shift = pd.read_csv(DATA / "shift_counts.csv")
    wide = per_shift.pivot_table(index=["shift", "line"], columns="category", values="count",
                                 aggfunc="sum").reindex(index=counts.index, columns=counts.columns)
    assert (wide.to_numpy() == counts.to_numpy()).all()
    units = per_shift.groupby(["shift", "line"], sort=False)["units_inspected"].agg(["min", "max"])
    assert (units["min"] == units["max"]).all()
    assert units["min"].tolist() == by_shift_line["units_inspected"].tolist()
    units_file = pd.read_csv(DATA / "units_inspected.csv")  # the raw-event path's units
    assert list(zip(units_file["shift"], units_file["line"], strict=True)) == list(counts.index)
    assert units_file["units_inspected"].tolist() == units["min"].tolist()
    assert set(events["quantity"]) == {1, 2, 3}
    assert not events.duplicated(["timestamp", "line", "category"]).any()


def test_defect_rates_and_volumes_are_realistic(truth: pd.DataFrame) -> None:
    pooled = truth.groupby("line")[["defects", "units_inspected"]].sum()
    rate = pooled["defects"] / pooled["units_inspected"]
    assert rate.between(0.005, 0.02).all(), rate
    big = truth[truth["line"] != "IM5"].groupby("line")["defects"].mean()
    assert big.between(150, 300).all(), big


def test_qcfit_calendar_gives_the_same_shifts(config: Config, windows: pd.DataFrame,
                                              events: pd.DataFrame, counts: pd.DataFrame) -> None:
    calendar = ShiftCalendar.from_config(config)
    first = windows["start"].iloc[0].to_pydatetime()
    last = windows["end"].iloc[-1].to_pydatetime()
    instances = calendar.instances_between(first, last)
    assert [i.id for i in instances] == windows["shift"].tolist()
    assert [i.start for i in instances] == [t.to_pydatetime() for t in windows["start"]]
    assert [i.end for i in instances] == [t.to_pydatetime() for t in windows["end"]]
    assigned, index = calendar.assign(events["ts"])
    assert (index >= 0).all()
    ids = np.array([i.id for i in assigned])[index]
    per_shift = events.assign(shift=ids).groupby("shift")["quantity"].sum()
    assert per_shift.reindex(windows["shift"], fill_value=0).tolist() == (
        counts.groupby(level="shift", sort=False).sum().sum(axis=1).tolist())


def test_qcfit_accepts_every_row_of_the_data_files(config: Config) -> None:
    calendar = ShiftCalendar.from_config(config)
    options = dict(lines=config.lines, categories=config.categories, calendar=calendar,
                   now=LOAD_TIME)
    path = DATA / "defect_events.csv"
    table = read_table(path.read_bytes(), source=str(path), required=EVENT_COLUMNS,
                       optional=EVENT_OPTIONAL)
    events = validate_events(table, **options)
    assert events.bad_rows == () and len(events.events) == table.records
    assert int(events.events["quantity"].sum()) == 145_851
    path = DATA / "shift_counts.csv"
    table = read_table(path.read_bytes(), source=str(path), required=COUNT_COLUMNS,
                       optional=COUNT_OPTIONAL)
    counts = validate_counts(table, **options)
    assert counts.bad_rows == () and len(counts.counts) == 198 * 5 * 8
    assert len(counts.units) == 198 * 5 and int(counts.counts["count"].sum()) == 145_851
    path = DATA / "units_inspected.csv"
    table = read_table(path.read_bytes(), source=str(path), required=UNIT_COLUMNS)
    units = validate_units(table, lines=config.lines, calendar=calendar, now=LOAD_TIME)
    assert units.bad_rows == () and len(units.units) == 198 * 5
    assert units.units.sort_values(["shift", "line"])["units"].tolist() == (
        counts.units.sort_values(["shift", "line"])["units"].tolist())


# ----------------------------------------------------------------------------- the faults


def test_jump_flash_triples_on_im2_from_its_first_shift(
    counts: pd.DataFrame, truth: pd.DataFrame, config: Config
) -> None:
    phase = truth[truth["line"] == "IM2"].set_index("shift")["phase"]
    faulty = list(phase[phase == "jump"].index)
    assert faulty[0] == "2026-10-07_B" and faulty[-1] == "2026-10-10_C" and len(faulty) == 11
    im2 = _line(counts, "IM2")
    p0 = _baseline(config, "IM2")
    before, first = im2.loc["2026-10-07_A"].to_numpy(), im2.loc["2026-10-07_B"].to_numpy()
    assert _pearson_p(before[None], p0)[0] > 0.01
    assert _pearson_p(first[None], p0)[0] < 1e-10
    assert first[1] / first.sum() > 0.3  # flash (FL) share, baseline 0.14
    window = im2.loc[faulty].to_numpy().sum(axis=0)
    assert window[1] / window.sum() == pytest.approx(0.42, abs=0.03)
    repaired = im2.loc["2026-10-12_A":].to_numpy().sum(axis=0)
    assert repaired[1] / repaired.sum() == pytest.approx(0.14, abs=0.02)
    im2_truth = truth[(truth["line"] == "IM2") & (truth["phase"] == "jump")]
    ratio = im2_truth["defects"].sum() / im2_truth["units_inspected"].sum() / 0.012
    assert ratio > 1.25
    # SCENARIO.md: the rate crosses the 1.25 floor in every faulty shift but the first two.
    assert _rate_crossings(truth, "IM2") == faulty[2:]


def _rate_crossings(truth: pd.DataFrame, line: str) -> list[str]:
    """Shifts where defects / (units x baseline rate) >= 1.25 with exact Poisson p < 0.002
    (upper tail, scipy.stats.poisson as reference)."""
    rows = truth[truth["line"] == line]
    mu = rows["units_inspected"] * gen.LINES[line].rate
    p = stats.poisson.sf(rows["defects"] - 1, mu)
    return rows.loc[(rows["defects"] / mu >= 1.25) & (p < 0.002), "shift"].tolist()


def test_drift_sink_mark_share_rises_linearly_on_im3(
    counts: pd.DataFrame, truth: pd.DataFrame, config: Config
) -> None:
    im3_truth = truth[truth["line"] == "IM3"].reset_index(drop=True)
    start = int(im3_truth.index[im3_truth["phase"] != "in-control"][0])
    assert im3_truth.loc[start, "shift"] == "2026-10-19_A"
    w = im3_truth["true_cohen_w"].to_numpy()
    # Documented crossings of the true w (SCENARIO.md): 0.1, 0.2, 0.3 at steps 18, 36, 54.
    for level, shift_id in ((0.1, "2026-10-24_C"), (0.2, "2026-10-31_C"), (0.3, "2026-11-07_C")):
        assert im3_truth.loc[int(np.argmax(w >= level - 1e-9)), "shift"] == shift_id
    sk = _line(counts, "IM3")["SK"].to_numpy()
    n = _line(counts, "IM3").sum(axis=1).to_numpy()
    assert sk[:start].sum() / n[:start].sum() == pytest.approx(0.16, abs=0.01)
    plateau = slice(start + 54, None)
    assert sk[plateau].sum() / n[plateau].sum() == pytest.approx(0.27, abs=0.015)
    ramp = slice(start, start + 54)
    fit = stats.linregress(np.arange(1, 55), sk[ramp] / n[ramp])
    assert fit.slope == pytest.approx(0.11 / 54, abs=0.0008)  # ~3 standard errors


def test_drift_is_slow_for_the_per_shift_test(counts: pd.DataFrame, config: Config) -> None:
    im3 = _line(counts, "IM3")
    p = pd.Series(_pearson_p(im3.to_numpy(), _baseline(config, "IM3")), index=im3.index)
    drift = p.loc["2026-10-19_A":]
    # SCENARIO.md: first p < 1/370 on 2026-10-31_A (step 34), first p < 0.01 on 2026-10-26_C.
    assert drift.index[np.argmax(drift.to_numpy() < ALPHA_ARL370)] == "2026-10-31_A"
    assert drift.index[np.argmax(drift.to_numpy() < 0.01)] == "2026-10-26_C"
    assert (drift.loc[:"2026-10-24_C"] > 0.01).all()  # nothing in the first week (w < 0.1)


def test_drift_rate_crosses_the_floor_only_by_chance_late(truth: pd.DataFrame) -> None:
    assert _rate_crossings(truth, "IM3") == ["2026-11-03_C", "2026-11-10_B", "2026-11-11_A",
                                             "2026-11-14_A", "2026-11-14_C", "2026-11-17_B",
                                             "2026-11-18_C"]
    for line in ("IM1", "IM4", "IM5"):
        assert _rate_crossings(truth, line) == [], line


def test_sparse_line_im5(truth: pd.DataFrame) -> None:
    im5 = truth[truth["line"] == "IM5"]
    assert im5["defects"].mean() < 5 and im5["defects"].max() <= 10
    zero = im5.loc[im5["defects"] == 0, "shift"].tolist()
    assert zero == ["2026-09-18_A", "2026-09-18_C", "2026-09-21_C", "2026-09-24_A",
                    "2026-10-01_A", "2026-10-09_C", "2026-10-26_C", "2026-11-06_B",
                    "2026-11-06_C", "2026-11-20_A", "2026-11-21_B"]


def test_healthy_lines_fit_their_baseline(counts: pd.DataFrame, truth: pd.DataFrame,
                                         config: Config) -> None:
    crossings = {}
    for line in ("IM1", "IM2", "IM3", "IM4", "IM5"):
        in_control = truth[(truth["line"] == line) & (truth["phase"] == "in-control")]["shift"]
        observed = _line(counts, line).loc[list(in_control)].to_numpy()
        p0 = _baseline(config, line)
        pooled = _pearson_p(observed.sum(axis=0)[None], p0)[0]
        assert pooled > 0.001, (line, pooled)
        if line != "IM5":
            p = _pearson_p(observed, p0)
            crossings[line] = list(in_control[p < ALPHA_ARL370])
    # 691 in-control line-shifts x 1/370 = 1.9 expected; SCENARIO.md lists these two.
    assert crossings == {"IM1": ["2026-10-22_C"], "IM2": [], "IM3": ["2026-09-23_C"], "IM4": []}


def test_scenario_names_the_fault_shifts() -> None:
    text = (SAMPLE / "SCENARIO.md").read_text(encoding="utf-8")
    for shift_id in (gen.JUMP_FIRST, "2026-10-10_C", gen.JUMP_CLEARED, gen.DRIFT_FIRST,
                     "2026-10-24_C", "2026-10-31_C", "2026-11-07_C", "2026-10-31_A"):
        assert shift_id in text, shift_id


# ------------------------------------------------------------------------ generator helpers


@settings(max_examples=200, deadline=None)
@given(
    raw=st.lists(st.floats(0.01, 1.0), min_size=2, max_size=10),
    k=st.integers(0, 9),
    share=st.floats(0.001, 0.999),
)
def test_moving_one_share_keeps_the_rest_in_proportion(raw: list[float], k: int,
                                                       share: float) -> None:
    p0 = np.array(raw) / sum(raw)
    k %= len(p0)
    p = gen._move_share(p0.copy(), k, share)
    assert p.sum() == pytest.approx(1.0, abs=1e-12)
    assert p[k] == share
    rest = np.delete(np.arange(len(p0)), k)
    assert p[rest] / p[rest].sum() == pytest.approx(p0[rest] / p0[rest].sum(), rel=1e-9)
    # Closed form for a one-category move with the rest rescaled (algebra from Cohen's w,
    # Cohen 1988, Statistical Power Analysis for the Behavioral Sciences, eq. 7.2.1):
    # w = |p_k - p0_k| / sqrt(p0_k (1 - p0_k)).
    expected = abs(share - p0[k]) / np.sqrt(p0[k] * (1 - p0[k]))
    assert gen.cohen_w(p, p0) == pytest.approx(expected, rel=1e-9, abs=1e-12)


def test_generator_is_deterministic_in_process(tmp_path: Path) -> None:
    first = gen.generate(tmp_path / "one")
    second = gen.generate(tmp_path / "two")
    for key in first:
        assert first[key].read_bytes() == second[key].read_bytes()


# ------------------------------------------------------------------------- the two load paths


def _store(tmp_path: Path, config: Config, name: str):
    from qcfit.store.engine import make_engine
    from qcfit.store.migrate import init_store

    engine = make_engine(f"sqlite:///{tmp_path / name}")
    init_store(engine, config, os_user="tester", now=LOAD_TIME)
    return engine


def _tables(engine, config: Config) -> dict[str, tuple[list, list]]:
    from qcfit.store.defects import shift_table
    from qcfit.store.engine import read_tx
    from qcfit.store.shifts import shift_row

    lines, cats = list(config.lines), list(config.categories)
    ids = _shift_windows(config, gen.FIRST_DATE, gen.LAST_DATE)["shift"]
    out = {}
    with read_tx(engine) as conn:
        for shift_id in ids:
            counts, units = shift_table(conn, shift_row(conn, shift_id).row_id, lines, cats)
            out[shift_id] = (counts.tolist(), units.tolist())
    return out


def test_events_plus_units_give_the_store_what_the_counts_file_gives(
    tmp_path: Path, config: Config
) -> None:
    """The demo's raw-event path (events, then units) and the counts-file path leave the same
    count table and units for every shift, which is all the evaluation reads."""
    from qcfit.ingest import load_counts_file, load_events_file, load_units_file

    by_counts = _store(tmp_path, config, "counts.sqlite")
    by_events = _store(tmp_path, config, "events.sqlite")
    try:
        load_counts_file(by_counts, config, DATA / "shift_counts.csv", now=LOAD_TIME)
        load_events_file(by_events, config, DATA / "defect_events.csv", now=LOAD_TIME)
        report = load_units_file(by_events, config, DATA / "units_inspected.csv", now=LOAD_TIME)
        assert (report.rows_accepted, report.units_written, report.corrections) == (990, 990, 0)
        expected = _tables(by_counts, config)
        got = _tables(by_events, config)
        assert len(got) == 198 and got == expected
        assert not any(np.isnan(units).any() for _, units in got.values())
    finally:
        by_counts.dispose()
        by_events.dispose()
