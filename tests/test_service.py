"""The evaluation service on real temp SQLite stores: records, re-evaluation, life cycle,
catch-up, failures."""

from __future__ import annotations

import datetime as dt
import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import func, select

from qcfit import alarmlog, policy, service
from qcfit import evaluate as ev
from qcfit.calendar import ShiftCalendar
from qcfit.config import load_config
from qcfit.store.defects import insert_load, write_counts, write_units
from qcfit.store.engine import make_engine, read_tx, write_tx
from qcfit.store.evaluations import evaluations_of, findings_of
from qcfit.store.migrate import init_store
from qcfit.store.schema import alarm, alarm_event, evaluation, finding
from qcfit.store.shifts import ensure_shifts, shift_row

UTC = dt.UTC
T0 = dt.datetime(2026, 1, 12, 12, 0, tzinfo=UTC)
PROPS = np.array([0.30, 0.25, 0.15, 0.12, 0.10, 0.08])  # SCR DNT FL SH BUR OTH (conftest)
LINES = ("L1", "L2", "L3", "L4")


def plant_text(base: str, **thresholds: object) -> str:
    """The shared test plant with [thresholds] keys replaced or added."""
    lines = base.splitlines()
    i = lines.index("[thresholds]")
    keep = [ln for ln in lines[i + 1:] if ln.split("=")[0].strip() not in thresholds]
    extra = [f"{k} = {v!r}" if not isinstance(v, str) else f'{k} = "{v}"' for k, v in thresholds.items()]
    return "\n".join(lines[: i + 1] + extra + keep) + "\n"


def make_store(tmp_path: Path, text: str):
    path = tmp_path / "plant.toml"
    path.write_text(text, encoding="utf-8")
    config = load_config(path)
    engine = make_engine(f"sqlite:///{tmp_path / 'store.sqlite'}")
    init_store(engine, config, os_user="test", now=T0)
    return config, engine


def load_counts(engine, shift, counts: dict[str, list[int]], units: dict[str, float] | None = None):
    """Write one shift's counts (and units) straight through the store functions."""
    cats = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")
    rows = [(line, c, int(v)) for line, vals in counts.items() for c, v in zip(cats, vals, strict=True)]
    with write_tx(engine) as conn:
        sid = ensure_shifts(conn, [shift])[shift.id]
        digest = hashlib.sha256(repr((shift.id, rows, units)).encode()).hexdigest()
        load_id = insert_load(conn, kind="counts", source="test", content_hash=digest, loaded=T0,
                              os_user="test", host="test")
        frame = pd.DataFrame(rows, columns=["line", "category", "count"]).assign(shift_id=sid)
        write_counts(conn, frame[["shift_id", "line", "category", "count"]], load_id)
        if units:
            u = pd.DataFrame([(sid, ln, int(v)) for ln, v in units.items()],
                             columns=["shift_id", "line", "units"])
            write_units(conn, u, load_id)


def healthy(n: int, rng: np.random.Generator) -> list[int]:
    return [int(x) for x in rng.multinomial(n, PROPS)]


def flash_jump(n: int, rng: np.random.Generator) -> list[int]:
    p = np.array([0.20, 0.17, 0.40, 0.09, 0.08, 0.06])
    return [int(x) for x in rng.multinomial(n, p)]


@pytest.fixture
def plant(tmp_path, plant_config_text):
    # effect floors of 0.3: with 300 defects a line has the power to call "in control"
    text = plant_text(plant_config_text, min_effect_w=0.3, min_effect_v=0.3, mc_draws=2000)
    config, engine = make_store(tmp_path, text)
    yield config, engine, ShiftCalendar.from_config(config)
    engine.dispose()


def shifts_from(cal: ShiftCalendar, first: str, count: int):
    start = cal.from_id(first).start
    return cal.instances_between(start, start + dt.timedelta(days=count))[:count]


def after(shift) -> dt.datetime:
    return shift.end + dt.timedelta(minutes=20)


def count_rows(engine, table, *where) -> int:
    with read_tx(engine) as conn:
        return int(conn.execute(select(func.count()).select_from(table).where(*where)).scalar())


# --------------------------------------------------------------------------- one shift


def test_evaluation_records_what_reproduces_it(plant):
    config, engine, cal = plant
    shift = cal.from_id("2026-01-06_A")
    rng = np.random.default_rng(1)
    load_counts(engine, shift, {ln: healthy(300, rng) for ln in LINES}, {ln: 25000 for ln in LINES})
    s = service.evaluate_shift(engine, config, shift, now=after(shift))
    assert s.ok and s.evaluation_id is not None
    with read_tx(engine) as conn:
        row = shift_row(conn, shift.id)
        (ev_row,) = evaluations_of(conn, row.row_id)
        found = findings_of(conn, s.evaluation_id)
    import qcfit

    assert ev_row["status"] == "ok" and ev_row["is_current"]
    assert ev_row["config_hash"] == config.hash
    assert ev_row["code_version"] == qcfit.__version__
    assert ev_row["seed"] == service.shift_seed(config.thresholds.seed, shift.id)
    assert ev_row["started_utc"] <= ev_row["finished_utc"]
    kinds = {f["kind"] for f in found}
    assert {"baseline", "between-lines", "line-vs-rest", "rate"} <= kinds
    base = [f for f in found if f["kind"] == "baseline"]
    assert len(base) == 4
    assert all(f["baseline_version_id"] is not None for f in base)  # baseline version per test
    assert all(f["verdict"] in ("in-control", "watch", "alarm") for f in base)
    assert all(f["adjusted_pvalue"] >= f["pvalue"] for f in base)
    assert all(f["power"] >= 0.8 and f["details"]["reason"] for f in base)


def test_re_evaluation_gives_the_same_numbers_and_keeps_the_old_one(plant):
    config, engine, cal = plant
    shift = cal.from_id("2026-01-06_B")
    rng = np.random.default_rng(2)
    # sparse lines (Monte Carlo or exact p-values) and one line with a flash jump
    counts = {"L1": healthy(14, rng), "L2": healthy(9, rng), "L3": flash_jump(300, rng),
              "L4": healthy(300, rng)}
    load_counts(engine, shift, counts)
    first = service.evaluate_shift(engine, config, shift, now=after(shift))
    second = service.evaluate_shift(engine, config, shift, now=after(shift) + dt.timedelta(hours=1))
    assert first.ok and second.ok and second.superseded_id == first.evaluation_id
    with read_tx(engine) as conn:
        old, new = findings_of(conn, first.evaluation_id), findings_of(conn, second.evaluation_id)
        evals = evaluations_of(conn, shift_row(conn, shift.id).row_id)

    def numbers(rows):
        keep = ("kind", "line", "verdict", "statistic", "pvalue", "adjusted_pvalue", "effect_size",
                "method", "power", "top_categories", "details")
        return [{k: r[k] for k in keep} for r in rows]

    assert numbers(old) == numbers(new)
    assert any(r["method"] in ("monte-carlo", "exact") for r in new)
    assert [e["is_current"] for e in evals] == [False, True]
    assert evals[0]["superseded_utc"] is not None
    assert evals[0]["seed"] == evals[1]["seed"]
    # the alarm raised by the shift is not duplicated by re-evaluating it
    assert count_rows(engine, alarm) == len(first.opened) >= 1
    assert second.opened == () and set(second.updated) == set(first.opened)
    assert count_rows(engine, alarm_event, alarm_event.c.action == "open") == len(first.opened)


def test_failure_midway_leaves_no_partial_evaluation(plant):
    config, engine, cal = plant
    shift = cal.from_id("2026-01-07_A")
    rng = np.random.default_rng(3)
    load_counts(engine, shift, {ln: healthy(300, rng) for ln in LINES})

    def unwritable(table, baselines):  # a finding the store cannot serialise: fails mid-write
        return [ev.Finding(kind=ev.KIND_SEQUENTIAL, line="L1", verdict=ev.TESTED, reason="x",
                           details={"state": object()})]

    s = service.evaluate_shift(engine, config, shift, now=after(shift), extra=unwritable)
    assert s.status == "failed" and s.error
    assert count_rows(engine, evaluation, evaluation.c.status == "ok") == 0
    assert count_rows(engine, finding) == 0
    assert count_rows(engine, evaluation, evaluation.c.status == "failed", evaluation.c.is_current) == 1
    (fault,) = alarmlog.list_alarms(engine)
    assert fault.kind == policy.KIND_FAULT and fault.line is None and fault.state == "open"
    assert shift.id in fault.summary
    # the failed shift is due again, and the retry supersedes the failed row
    assert [x.id for x in service.due_shifts(engine, config, now=after(shift))] == [shift.id]
    (retry,) = service.evaluate_due(engine, config, now=after(shift) + dt.timedelta(minutes=5))
    assert retry.ok
    assert count_rows(engine, evaluation, evaluation.c.is_current) == 1
    assert service.due_shifts(engine, config, now=after(shift)) == []


def test_failed_re_evaluation_keeps_the_good_evaluation_current(plant):
    config, engine, cal = plant
    shift = cal.from_id("2026-01-07_B")
    load_counts(engine, shift, {ln: healthy(300, np.random.default_rng(4)) for ln in LINES})
    good = service.evaluate_shift(engine, config, shift, now=after(shift))

    def boom(table, baselines):
        raise RuntimeError("chart state unreadable")

    bad = service.evaluate_shift(engine, config, shift, now=after(shift), extra=boom)
    assert bad.status == "failed" and "RuntimeError: chart state unreadable" in bad.error
    with read_tx(engine) as conn:
        evals = evaluations_of(conn, shift_row(conn, shift.id).row_id)
    assert [(e["status"], e["is_current"]) for e in evals] == [("ok", True), ("failed", False)]
    assert evals[0]["id"] == good.evaluation_id


def test_line_without_baseline_is_a_finding_and_the_others_still_run(tmp_path, plant_config_text):
    text = plant_text(plant_config_text, min_effect_w=0.3, min_effect_v=0.3).replace(
        'lines = "*"', 'lines = ["L1", "L2", "L3"]')
    config, engine = make_store(tmp_path, text)
    shift = ShiftCalendar.from_config(config).from_id("2026-01-06_A")
    rng = np.random.default_rng(5)
    load_counts(engine, shift, {ln: healthy(300, rng) for ln in LINES})
    s = service.evaluate_shift(engine, config, shift, now=after(shift))
    assert s.ok
    with read_tx(engine) as conn:
        base = {f["line"]: f for f in findings_of(conn, s.evaluation_id) if f["kind"] == "baseline"}
    assert base["L4"]["verdict"] == ev.NO_BASELINE
    assert "no baseline in force for line L4" in base["L4"]["details"]["reason"]
    assert all(base[ln]["verdict"] in ("in-control", "watch", "alarm") for ln in ("L1", "L2", "L3"))
    engine.dispose()


# --------------------------------------------------------------------------- life cycle


def test_alarm_life_cycle_update_ack_auto_clear(plant):
    config, engine, cal = plant
    shifts = shifts_from(cal, "2026-01-06_A", 6)
    rng = np.random.default_rng(6)
    bad = {"L1": flash_jump(400, rng)} | {ln: healthy(400, rng) for ln in LINES[1:]}
    for s in shifts[:2]:
        load_counts(engine, s, bad | {"L1": flash_jump(400, rng)})
    for s in shifts[2:]:
        load_counts(engine, s, {ln: healthy(400, rng) for ln in LINES})
    first = service.evaluate_shift(engine, config, shifts[0], now=after(shifts[0]))
    mix = [a for a in alarmlog.list_alarms(engine) if a.kind == ev.KIND_BASELINE]
    assert [a.line for a in mix] == ["L1"] and mix[0].id in first.opened
    alarm_id = mix[0].id
    assert "flash share" in mix[0].summary and "x baseline (adj. residual +" in mix[0].summary

    second = service.evaluate_shift(engine, config, shifts[1], now=after(shifts[1]))
    assert alarm_id in second.updated and alarm_id not in second.opened
    a = alarmlog.get_alarm(engine, alarm_id)
    assert a.shift_count == 2 and a.last_shift_id == shifts[1].id and a.shift_id == shifts[0].id

    alarmlog.acknowledge(engine, alarm_id, by="Ann Lee", note="die checked", now=after(shifts[1]))
    assert alarmlog.get_alarm(engine, alarm_id).state == "acknowledged"

    for s in shifts[2:4]:
        service.evaluate_shift(engine, config, s, now=after(s))
    a = alarmlog.get_alarm(engine, alarm_id)
    assert a.state == "acknowledged" and a.in_control_streak == 2
    last = service.evaluate_shift(engine, config, shifts[4], now=after(shifts[4]))
    assert alarm_id in last.cleared
    story = alarmlog.alarm_story(engine, alarm_id)
    assert [e.action for e in story.events] == ["open", "update", "acknowledge", "auto-clear"]
    assert story.events[2].by == "Ann Lee" and story.events[2].note == "die checked"
    assert story.alarm.state == "cleared"
    # evaluating the same in-control shift again changes nothing
    again = service.evaluate_shift(engine, config, shifts[4], now=after(shifts[4]))
    assert again.cleared == () and again.opened == ()
    assert len(alarmlog.alarm_story(engine, alarm_id).events) == 4


def test_persistence_k_of_m_through_the_store(tmp_path, plant_config_text):
    text = plant_text(plant_config_text, min_effect_w=0.3, min_effect_v=0.3, persistence_k=2,
                      persistence_m=2)
    config, engine = make_store(tmp_path, text)
    shifts = shifts_from(ShiftCalendar.from_config(config), "2026-01-06_A", 2)
    rng = np.random.default_rng(7)
    for s in shifts:
        load_counts(engine, s, {"L1": flash_jump(400, rng)} | {ln: healthy(400, rng) for ln in LINES[1:]})
    one = service.evaluate_shift(engine, config, shifts[0], now=after(shifts[0]))
    assert not [a for a in alarmlog.list_alarms(engine) if a.kind == ev.KIND_BASELINE]
    assert one.ok
    two = service.evaluate_shift(engine, config, shifts[1], now=after(shifts[1]))
    mix = [a for a in alarmlog.list_alarms(engine) if a.kind == ev.KIND_BASELINE]
    assert [a.line for a in mix] == ["L1"] and mix[0].id in two.opened
    engine.dispose()


# --------------------------------------------------------------------------- catch-up


def test_evaluate_due_catches_up_once(plant):
    config, engine, cal = plant
    shifts = shifts_from(cal, "2026-01-06_A", 5)
    rng = np.random.default_rng(8)
    load_counts(engine, shifts[0], {ln: healthy(200, rng) for ln in LINES})
    load_counts(engine, shifts[3], {ln: healthy(200, rng) for ln in LINES})
    now = after(shifts[3])
    done = service.evaluate_due(engine, config, now=now)
    assert [s.shift_id for s in done] == [s.id for s in shifts[:4]]  # shift 5 has not ended
    assert all(s.ok for s in done)
    quiet = {dict(s.verdicts).get(ev.NOT_TESTED, 0) for s in done[1:3]}
    assert quiet and min(quiet) > 0  # shifts with no data are evaluated as "not tested"
    assert service.evaluate_due(engine, config, now=now) == []
    assert count_rows(engine, evaluation) == 4


def test_evaluate_due_on_an_empty_store_does_nothing(plant):
    config, engine, _ = plant
    assert service.evaluate_due(engine, config, now=T0) == []


def test_same_shift_same_seed_across_stores(tmp_path, plant_config_text):
    text = plant_text(plant_config_text, mc_draws=2000)
    seeds = []
    for sub in ("a", "b"):
        (tmp_path / sub).mkdir()
        config, engine = make_store(tmp_path / sub, text)
        shift = ShiftCalendar.from_config(config).from_id("2026-01-06_C")
        load_counts(engine, shift, {"L1": [3, 1, 4, 1, 5, 0], "L2": [2, 6, 0, 0, 1, 1]})
        s = service.evaluate_shift(engine, config, shift, now=after(shift))
        with read_tx(engine) as conn:
            seeds.append((s.seed, [(f["pvalue"], f["method"]) for f in findings_of(conn, s.evaluation_id)]))
        engine.dispose()
    assert seeds[0] == seeds[1]


def test_a_run_collects_cycles_less_often_and_restores_the_thresholds(plant):
    import gc

    config, engine, _ = plant
    shifts = shifts_from(ShiftCalendar.from_config(config), "2026-01-06_A", 3)
    rng = np.random.default_rng(4)
    for s in shifts:
        load_counts(engine, s, {ln: healthy(300, rng) for ln in LINES})
    before = gc.get_threshold()
    during = []
    done = service.evaluate_shifts(engine, config, shifts, now=after(shifts[-1]), chunk=2,
                                   progress=lambda i, n, summary: during.append(gc.get_threshold()))
    assert all(s.ok for s in done) and len(during) == 3
    assert all(t[0] == max(service.RUN_GC_THRESHOLD, before[0]) for t in during)
    assert gc.get_threshold() == before


def test_a_shift_listed_twice_in_one_chunk_gets_one_event(tmp_path, plant_config_text):
    """The chunk asks once which shifts already have alarm events; a shift written twice in
    the same chunk (possible without the chart stage, which sorts and de-duplicates) must not
    count as new the second time."""
    text = plant_text(plant_config_text, min_effect_w=0.3, min_effect_v=0.3, mc_draws=2000)
    config, engine = make_store(tmp_path, text + "\n[sequential]\nenabled = false\n")
    shifts = shifts_from(ShiftCalendar.from_config(config), "2026-01-06_A", 3)
    rng = np.random.default_rng(6)
    for s in shifts:
        load_counts(engine, s, {"L1": flash_jump(400, rng)} | {ln: healthy(400, rng) for ln in LINES[1:]})
    done = service.evaluate_shifts(engine, config, [shifts[0], shifts[1], shifts[1], shifts[2]],
                                   now=after(shifts[-1]))
    assert all(s.ok for s in done) and any(s.opened for s in done)
    with read_tx(engine) as conn:
        events = conn.execute(select(alarm_event.c.alarm_id, alarm_event.c.action,
                                     alarm_event.c.shift_id)).all()
    assert events and len(events) == len(set(events))
    assert sum(1 for _, action, _ in events if action == "update") == 2  # shifts B and C
    engine.dispose()


def test_backfill_in_chunks_equals_shift_by_shift(tmp_path, plant_config_text):
    text = plant_text(plant_config_text, min_effect_w=0.3, min_effect_v=0.3, mc_draws=2000)
    results = []
    for sub, chunk in (("one", 1), ("chunks", 4)):
        (tmp_path / sub).mkdir()
        config, engine = make_store(tmp_path / sub, text)
        shifts = shifts_from(ShiftCalendar.from_config(config), "2026-01-06_A", 7)
        rng = np.random.default_rng(9)
        for k, s in enumerate(shifts):
            bad = flash_jump(300, rng) if 1 <= k <= 2 else healthy(300, rng)
            load_counts(engine, s, {"L1": bad} | {ln: healthy(300, rng) for ln in LINES[1:]})
        done = service.evaluate_shifts(engine, config, shifts, now=after(shifts[-1]), chunk=chunk)
        with read_tx(engine) as conn:
            found = [(f["kind"], f["line"], f["verdict"], f["pvalue"], f["adjusted_pvalue"])
                     for s in done for f in findings_of(conn, s.evaluation_id)]
        story = [(a.kind, a.line, a.state, a.shift_count, a.shift_id) for a in alarmlog.list_alarms(engine)]
        results.append(([(s.shift_id, s.opened, s.cleared) for s in done], found, story))
        engine.dispose()
    assert results[0] == results[1]
    assert any(opened for _, opened, _ in results[0][0])
