"""The sequential stage (qcfit/charts.py) and its store (qcfit/store/charts.py): pure steps,
exact state round trips, and the stage inside the service on real temp SQLite stores."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as sps
from sqlalchemy import func, select

from qcfit import charts, service
from qcfit.calendar import ShiftCalendar
from qcfit.cli import main
from qcfit.config import Concern, SequentialSettings, load_config
from qcfit.errors import StoreError
from qcfit.model import BaselineRef
from qcfit.stats.sequential import init_state, make_design, make_limits, update
from qcfit.store import charts as chart_sql
from qcfit.store import jsontext
from qcfit.store.defects import insert_load, write_counts
from qcfit.store.engine import make_engine, read_tx, write_tx
from qcfit.store.migrate import init_store
from qcfit.store.schema import alarm, chart_calibration, chart_state
from qcfit.store.shifts import ensure_shifts, shift_row

UTC = dt.UTC
T0 = dt.datetime(2026, 1, 1, tzinfo=UTC)
CATS = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")
PROPS = np.array([0.30, 0.25, 0.15, 0.12, 0.10, 0.08])  # the conftest plant's baseline


def _share_up(p: np.ndarray, j: int, factor: float) -> np.ndarray:
    out = p * (1 - factor * p[j]) / (1 - p[j])
    out[j] = factor * p[j]
    return out


FLASH_X14 = _share_up(PROPS, 2, 1.4)  # flash 0.15 -> 0.21, Cohen's w ~ 0.17


def ref(props=PROPS, version: int = 1, codes=CATS) -> BaselineRef:
    return BaselineRef(version_id=version, name="plant", effective=dt.date(2026, 1, 5),
                       categories=tuple(codes), proportions=tuple(float(p) for p in props))


# --------------------------------------------------------------------------------- pure


def test_first_shift_mewma_is_the_pearson_x2_of_that_shift():
    plan = charts.plan_line("L1", ref(), SequentialSettings())
    lim = charts.fallback_limits(plan, 200, 370.0, "k", "test")
    x = np.array([70, 41, 45, 20, 15, 9])
    ls = charts.advance(plan, None, x, lim)
    # Lowry, Woodall, Champ & Rigdon (1992): with Z_0 = p0 the first MEWMA step has covariance
    # lam^2 Sigma / n, so Q_1 is the Pearson X^2 of the shift; reference: scipy.stats.chisquare
    want = sps.chisquare(x, x.sum() * PROPS).statistic
    assert ls.step.ewma_stat[0] == pytest.approx(want, rel=1e-12)
    assert ls.started == "first shift charted for this line" and ls.step.t[0] == 1


def test_zero_share_categories_are_left_out_and_impossible_concerns_skipped():
    props = np.array([0.5, 0.3, 0.0, 0.2, 0.0, 0.0])
    conc = (Concern("FL", 2.0), Concern("SCR", 2.5), Concern("DNT", 1.5))
    plan = charts.plan_line("L1", ref(props), SequentialSettings(concerns=conc))
    assert plan.codes == ("SCR", "DNT", "SH") and plan.columns == (0, 1, 3)
    # FL has no baseline share; SCR x2.5 would make its share 1.25
    assert plan.skipped == ("FL x2", "SCR x2.5")
    assert plan.charts == ("MEWMA", "bank", "CUSUM DNT x1.5")
    assert plan.design.d == 6  # every ordered pair of the 3 charted categories


def test_n_level_is_a_median_on_a_grid_and_the_profile_is_poisson():
    assert charts.n_level([200] * 30) == 181  # 2 ** (round(2 log2 200) / 2) = 2 ** 7.5
    assert charts.n_level([190, 205, 0, 2000, 200]) == 181
    assert charts.n_level([250] * 30) == 256
    assert charts.n_level([0, 0, 1]) == 1
    prof = charts.n_profile(181)
    assert prof.size == 20 and abs(prof.mean() / 181 - 1) < 0.02
    assert abs(prof.std() / np.sqrt(181) - 1) < 0.15  # Poisson: sd = sqrt(mean)
    assert charts.split_targets(370, 0) == (370.0, float("inf"))
    assert charts.split_targets(370, 2) == (740.0, 1480.0)


@settings(max_examples=25, deadline=None)
@given(st.lists(st.integers(0, 400), min_size=1, max_size=12), st.integers(0, 2**31 - 1))
def test_stored_rows_resume_bit_for_bit(totals, seed):
    """Chaining through JSON rows equals running the stats core straight through."""
    conc = (Concern("FL", 2.0),)
    plan = charts.plan_line("L1", ref(), SequentialSettings(concerns=conc))
    lim = charts.LineLimits("k", make_limits(plan.design, ewma=14.0, concerns=3.0, bank=6.0),
                            charts.CALIBRATED, 200, {})
    rng = np.random.default_rng(seed)
    xs = [rng.multinomial(n, FLASH_X14) for n in totals]
    prior, direct = None, init_state(plan.design)
    for i, x in enumerate(xs):
        ls = charts.advance(plan, prior, x, lim)
        rows = json.loads(json.dumps([dict(r) for r in ls.rows]))
        prior = charts.PriorCharts(f"s{i}", {r["chart"]: r["state"] for r in rows})
        direct, _ = update(direct, x[None, :], plan.design, lim.limits)
        direct = charts.capped(direct, lim.limits)
    back = charts.state_from_rows(plan, prior.states)
    for name in ("t", "ewma_z", "ewma_v", "cusum_s", "cusum_counts", "bank_s", "bank_zero"):
        assert np.array_equal(getattr(back, name), getattr(direct, name)), name


def test_cusums_are_held_at_one_and_a_half_limits_after_a_signal():
    plan = charts.plan_line("L1", ref(), SequentialSettings(concerns=(Concern("FL", 2.0),)))
    lim = charts.LineLimits("k", make_limits(plan.design, ewma=14.0, concerns=3.0, bank=6.0),
                            charts.CALIBRATED, 200, {})
    prior, big = None, np.array([20, 20, 200, 10, 10, 10])
    for i in range(3):
        ls = charts.advance(plan, prior, big, lim)
        prior = charts.PriorCharts(f"s{i}", {r["chart"]: r["state"] for r in ls.rows})
    assert ls.reports and ls.step.concern_stat[0, 0] > 3.0 * 1.5
    assert ls.state.cusum_s[0, 0] == pytest.approx(4.5) and ls.state.bank_s.max() == 9.0


def test_line_false_alarm_budget_holds_with_concerns():
    """The whole chart set of a line (MEWMA + bank + two concern CUSUMs, budget split as in
    charts.split_targets) has an in-control ARL of at least about the target."""
    target = 60.0
    conc = (Concern("FL", 1.5), Concern("OTH", 2.0))
    plan = charts.plan_line("L1", ref(), SequentialSettings(concerns=conc))
    lim = charts.calibrate_plan(plan, 150, target, seed=11, paths=400)
    paths, horizon = 3000, 240
    d = make_design(np.tile(plan.design.p0, (paths, 1)), ewma_lambda=plan.design.ewma_lambda,
                    concerns=[charts.concern_share_up(PROPS, 2, 1.5),
                              charts.concern_share_up(PROPS, 5, 2.0)])
    limits = make_limits(d, ewma=lim.limits.ewma[0], concerns=lim.limits.concerns[0],
                         bank=lim.limits.bank[0])
    rng = np.random.default_rng(5)
    state, first = init_state(d), np.full(paths, horizon)
    for t in range(horizon):
        n = rng.poisson(150, size=paths)
        state, step = update(state, rng.multinomial(n, PROPS), d, limits)
        first = np.where((first == horizon) & step.signal, t + 1, first)
    alarmed = first < horizon
    # renewal ratio estimator (as in qcfit.stats.sequential_calibration): shifts / alarms
    arl0 = np.minimum(first, horizon).sum() / alarmed.sum()
    se = arl0 / np.sqrt(alarmed.sum())
    assert arl0 >= 0.9 * target - 2 * se, (arl0, se)
    assert arl0 <= 2.0 * target  # the union bound is not wildly conservative


# ------------------------------------------------------------------------ on a real store


def make_plant(tmp_path: Path, text: str, extra: str = ""):
    path = tmp_path / "plant.toml"
    path.write_text(text + extra, encoding="utf-8")
    config = load_config(path)
    engine = make_engine(f"sqlite:///{tmp_path / 'store.sqlite'}")
    init_store(engine, config, os_user="test", now=T0)
    return path, config, engine, ShiftCalendar.from_config(config)


FAST = "\n[sequential]\ntarget_arl = 100\nconcerns = [{ category = \"FL\", factor = 1.5 }]\n"


def load(engine, shifts, counts_of) -> None:
    """counts_of(i, shift) -> {line: counts}; one load per shift, through the store."""
    for i, s in enumerate(shifts):
        rows = [(ln, c, int(v)) for ln, vals in counts_of(i, s).items()
                for c, v in zip(CATS, vals, strict=True)]
        with write_tx(engine) as conn:
            sid = ensure_shifts(conn, [s])[s.id]
            digest = hashlib.sha256(repr((s.id, rows)).encode()).hexdigest()
            load_id = insert_load(conn, kind="counts", source="test", content_hash=digest,
                                  loaded=T0, os_user="test", host="test")
            frame = pd.DataFrame(rows, columns=["line", "category", "count"]).assign(shift_id=sid)
            write_counts(conn, frame[["shift_id", "line", "category", "count"]], load_id)


def drift_counts(start: int, seed: int = 3):
    rng = np.random.default_rng(seed)
    cache: dict[int, dict] = {}

    def counts_of(i, _s):
        if i not in cache:
            cache[i] = {ln: rng.multinomial(250, FLASH_X14 if ln == "L3" and i >= start
                                            else PROPS) for ln in ("L1", "L2", "L3", "L4")}
        return cache[i]
    return counts_of


def shifts(cal, n: int, first: str = "2026-01-05_A"):
    start = cal.from_id(first).start
    return cal.instances_between(start, start + dt.timedelta(days=n))[:n]


def after(shifts_) -> dt.datetime:
    return shifts_[-1].end + dt.timedelta(minutes=30)


def chart_rows(engine, line=None) -> list[tuple]:
    with read_tx(engine) as conn:
        q = select(chart_state).order_by(chart_state.c.shift_id, chart_state.c.line,
                                         chart_state.c.chart)
        if line:
            q = q.where(chart_state.c.line == line)
        return [(r.line, r.chart, r.shift_id, json.dumps(r.state, sort_keys=True))
                for r in conn.execute(q)]


def seq_alarms(engine) -> list[dict]:
    with read_tx(engine) as conn:
        return [dict(r._mapping) for r in conn.execute(
            select(alarm).where(alarm.c.kind == "sequential").order_by(alarm.c.id))]


@pytest.fixture
def drifted(tmp_path, plant_config_text):
    path, config, engine, cal = make_plant(tmp_path, plant_config_text, FAST)
    work = shifts(cal, 45)
    load(engine, work, drift_counts(start=20))
    out = service.evaluate_shifts(engine, config, work, now=after(work))
    assert all(s.ok for s in out)
    yield path, config, engine, cal, work
    engine.dispose()


def test_a_drift_raises_one_sequential_alarm_naming_category_and_start(drifted):
    _, config, engine, _, work = drifted
    mine = [a for a in seq_alarms(engine) if a["line"] == "L3"]
    assert len(mine) == 1  # updated while it lasts, not raised again
    a = mine[0]
    assert a["shift_count"] > 5 and a["severity"] == "alarm" and a["state"] == "open"
    assert "flash up 15.0% ->" in a["summary"] and "change most likely began" in a["summary"]
    assert a["categories"][0]["code"] == "FL" and a["categories"][0]["direction"] == "up"
    with read_tx(engine) as conn:
        first = conn.execute(select(alarm.c.first_shift_id).where(alarm.c.id == a["id"])).scalar()
    ids = [s.id for s in work]
    raised_at = next(i for i, s in enumerate(work) if shift_row_id(engine, s.id) == first)
    assert 20 < raised_at < 35  # the change began at index 20 (w ~ 0.17, n = 250)
    story = service_story(engine, a["id"])
    start = story["extra"]["start_shift"]
    assert start in ids and abs(ids.index(start) - 20) <= 6
    # every line has one row per chart per shift
    assert len(chart_rows(engine, "L1")) == 45 * 3
    # healthy lines: at ARL 100 per line, 3 lines x 45 shifts give about 1.4 false alarms
    assert len([x for x in seq_alarms(engine) if x["line"] != "L3"]) <= 4


def shift_row_id(engine, shift_id: str) -> int:
    with read_tx(engine) as conn:
        return shift_row(conn, shift_id).row_id


def service_story(engine, alarm_id: int) -> dict:
    with read_tx(engine) as conn:
        return conn.execute(select(alarm.c.details).where(alarm.c.id == alarm_id)).scalar()


def test_calibration_is_cached_and_redone_only_when_its_inputs_change(drifted):
    path, config, engine, _, work = drifted
    with read_tx(engine) as conn:
        keys = {r.key for r in conn.execute(select(chart_calibration))}
    assert 1 <= len(keys) <= 3  # four lines with one baseline and about 250 defects a shift
    stage = charts.ChartStage(engine, config, now=after(work))
    b = ref()
    plan = charts.plan_line("L1", b, config.sequential)
    lim = stage.limits(plan, charts.n_level([250] * 30))
    assert stage.calibrations == 0 and lim.key in keys and lim.kind == charts.CALIBRATED
    text = path.read_text().replace("target_arl = 100", "target_arl = 120")
    path.write_text(text)
    stage2 = charts.ChartStage(engine, load_config(path), now=after(work))
    lim2 = stage2.limits(plan, charts.n_level([250] * 30))
    assert stage2.calibrations == 1 and lim2.key not in keys
    assert lim2.limits.bank[0] > lim.limits.bank[0]  # a longer ARL needs a higher limit


def test_ack_with_cause_removed_restarts_the_line_charts(drifted):
    path, config, engine, cal, work = drifted
    a = [x for x in seq_alarms(engine) if x["line"] == "L3"][0]
    url = f"sqlite:///{path.parent / 'store.sqlite'}"
    res = CliRunner().invoke(main, ["--config", str(path), "--store", url, "ack", str(a["id"]),
                                    "--by", "Ana", "--cause-removed"])
    assert res.exit_code == 0, res.output
    assert "Sequential charts of L3 restart from the next shift." in res.output
    more = shifts(cal, 47)[45:]
    load(engine, more, lambda i, s: {ln: [75, 62, 38, 30, 25, 20] for ln in ("L1", "L2", "L3",
                                                                           "L4")})
    assert all(s.ok for s in service.evaluate_shifts(engine, config, more, now=after(more)))
    with read_tx(engine) as conn:
        got = chart_sql.states_at(conn, shift_row_id(engine, more[0].id), ["L3", "L1"])
    assert got["L3"].states["MEWMA"]["t"] == 1 and got["L1"].states["MEWMA"]["t"] == 46
    with read_tx(engine) as conn:
        marked = chart_sql.states_at(conn, shift_row_id(engine, work[-1].id), ["L3"])["L3"]
    assert marked.reset_after == f"alarm {a['id']} acknowledged by Ana, cause removed"
    # re-evaluating the marked shift (and so the next ones) keeps the restart where it was
    redone = service.evaluate_shifts(engine, config, [work[-1]], now=after(more))
    assert [r.shift_id for r in redone] == [work[-1].id, *(m.id for m in more)]
    with read_tx(engine) as conn:
        again = chart_sql.states_at(conn, shift_row_id(engine, more[0].id), ["L3"])
        marked = chart_sql.states_at(conn, shift_row_id(engine, work[-1].id), ["L3"])["L3"]
    assert again["L3"].states["MEWMA"]["t"] == 1 and marked.reset_after
    plant_wide = CliRunner().invoke(main, ["--config", str(path), "--store", url, "ack", "999",
                                           "--by", "Ana", "--cause-removed"])
    assert plant_wide.exit_code == 2  # no such alarm


def test_new_baseline_version_restarts_the_charts(tmp_path, plant_config_text):
    extra = FAST + """
[baseline.l1-new]
lines = ["L1"]
effective = 2026-01-08
proportions = { SCR = 0.28, DNT = 0.27, FL = 0.15, SH = 0.12, BUR = 0.10, OTH = 0.08 }
rate = 0.012
"""
    _, config, engine, cal = make_plant(tmp_path, plant_config_text, extra)
    work = shifts(cal, 12)
    load(engine, work, drift_counts(start=99))
    assert all(s.ok for s in service.evaluate_shifts(engine, config, work, now=after(work)))
    first_new = next(s for s in work if s.date >= dt.date(2026, 1, 8))
    with read_tx(engine) as conn:
        got = chart_sql.states_at(conn, shift_row_id(engine, first_new.id), ["L1", "L2"])
    assert got["L1"].states["MEWMA"]["t"] == 1 and got["L2"].states["MEWMA"]["t"] > 1
    assert got["L1"].baseline_version_id != got["L2"].baseline_version_id
    engine.dispose()


def test_re_evaluating_an_old_shift_recomputes_every_later_chart(tmp_path, plant_config_text):
    """After a correction of shift 5, the chart rows equal an in-order run on the corrected
    data (in a second store)."""
    _, config, engine, cal = make_plant(tmp_path, plant_config_text, FAST)
    work = shifts(cal, 14)
    base = drift_counts(start=99, seed=8)
    fixed = {ln: [90, 60, 40, 30, 20, 10] for ln in ("L1", "L2", "L3", "L4")}
    load(engine, work, base)
    service.evaluate_shifts(engine, config, work, now=after(work))
    before = chart_rows(engine)
    load(engine, [work[5]], lambda i, s: fixed)  # corrected counts of shift 5
    redone = service.evaluate_shifts(engine, config, [work[5]], now=after(work))
    assert [s.shift_id for s in redone] == [s.id for s in work[5:]]
    (tmp_path / "b").mkdir()
    _, config2, engine2, _ = make_plant(tmp_path / "b", plant_config_text, FAST)
    load(engine2, work, lambda i, s: fixed if i == 5 else base(i, s))
    service.evaluate_shifts(engine2, config2, work, now=after(work))
    assert chart_rows(engine) == chart_rows(engine2) != before
    engine.dispose()
    engine2.dispose()


def test_a_stale_start_is_refused_and_writes_nothing(tmp_path, plant_config_text):
    _, config, engine, cal = make_plant(tmp_path, plant_config_text, FAST)
    work = shifts(cal, 3)
    load(engine, work, drift_counts(start=99))
    service.evaluate_shifts(engine, config, work[:1], now=after(work))
    stage = charts.ChartStage(engine, config, now=after(work))
    table = service._read_tables(engine, config, [work[2]])[0]
    baselines = {ln: ref() for ln in table.lines}
    stage(table, baselines)  # computed from shift 0's rows
    service.evaluate_shifts(engine, config, work[1:2], now=after(work))  # shift 1 lands meanwhile
    with pytest.raises(StoreError, match="changed while shift"):
        with write_tx(engine) as conn:
            stage.write(conn, work[2], ensure_shifts(conn, [work[2]])[work[2].id])
    with read_tx(engine) as conn:
        n = conn.execute(select(func.count()).select_from(chart_state)
                         .where(chart_state.c.shift_id == shift_row_id(engine, work[2].id))).scalar()
    assert n == 0
    engine.dispose()


def test_sequential_off_writes_no_chart_rows(tmp_path, plant_config_text):
    _, config, engine, cal = make_plant(tmp_path, plant_config_text,
                                           "\n[sequential]\nenabled = false\n")
    work = shifts(cal, 2)
    load(engine, work, drift_counts(start=99))
    out = service.evaluate_shifts(engine, config, work, now=after(work))
    assert all(s.ok for s in out) and chart_rows(engine) == []
    engine.dispose()


def test_a_spent_calibration_budget_gives_conservative_limits_until_a_later_run(
        tmp_path, plant_config_text):
    _, config, engine, cal = make_plant(tmp_path, plant_config_text, FAST)
    stage = charts.ChartStage(engine, config, now=T0, budget_s=0.0)
    plan = charts.plan_line("L1", ref(), config.sequential)
    lim = stage.limits(plan, 256)
    assert lim.kind == charts.CONSERVATIVE and stage.calibrations == 0
    assert np.isinf(lim.limits.ewma[0])  # MEWMA off: no bound covers it
    # ln(D ARL0) for the bank of D = 30 pairs at the pair's ARL0 of 2 x 100 (one concern)
    assert lim.limits.bank[0] == pytest.approx(np.log(30 * 200.0))
    later = charts.ChartStage(engine, config, now=T0)
    assert later.limits(plan, 256).kind == charts.CALIBRATED and later.calibrations == 1
    engine.dispose()


def test_the_alarm_story_lists_the_charts_and_where_the_change_began(drifted):
    path, _, engine, _, work = drifted
    a = [x for x in seq_alarms(engine) if x["line"] == "L3"][0]
    url = f"sqlite:///{path.parent / 'store.sqlite'}"
    res = CliRunner().invoke(main, ["--config", str(path), "--store", url, "alarm", str(a["id"])])
    assert res.exit_code == 0, res.output
    lines = res.output.splitlines()
    assert lines[0] == f"Alarm {a['id']}: sequential, line L3, severity alarm, state open"
    began = [ln for ln in lines if ">= limit" in ln and "change began 2026-01-" in ln]
    assert began and any("flash up 15.0% ->" in ln for ln in lines)
    assert "p-value by" not in res.output  # a chart has no p-value


def test_a_baseline_with_one_category_is_not_charted(tmp_path, plant_config_text):
    _, config, engine, cal = make_plant(tmp_path, plant_config_text, FAST)
    work = shifts(cal, 1)
    load(engine, work, drift_counts(start=99))
    table = service._read_tables(engine, config, work)[0]
    one = ref(np.array([1.0, 0, 0, 0, 0, 0]))
    found = charts.ChartStage(engine, config, now=T0)(table, {"L1": one, "L2": None})
    assert [(f.line, f.verdict) for f in found] == [("L1", "not-tested")]
    assert "needs two categories with a share > 0" in found[0].reason
    engine.dispose()


def test_stage_rows_equal_the_one_line_path_byte_for_byte(tmp_path, plant_config_text):
    """The stage advances lines together and keeps their values in memory between shifts;
    the rows it stores are the bytes the one-line path (advance from the previous rows,
    the store's JSON text of each state) makes, for lines of different category counts."""
    _, config, engine, cal = make_plant(tmp_path, plant_config_text, FAST)
    work = shifts(cal, 16)
    load(engine, work, drift_counts(start=4))
    tables = service._read_tables(engine, config, work)
    baselines = {"L1": ref(), "L2": ref(np.array([0.35, 0.25, 0.20, 0.12, 0.08, 0.0])),
                 "L3": ref(), "L4": ref(np.array([0.2, 0.2, 0.2, 0.2, 0.1, 0.1]))}
    stage = charts.ChartStage(engine, config, now=after(work))
    names = dict(config.categories)
    prior: dict[str, charts.PriorCharts | None] = dict.fromkeys(baselines)
    signalled = 0
    for s, table in zip(work, tables, strict=True):
        found = {f.line: f for f in stage(table, baselines)}
        with write_tx(engine) as conn:
            sid = ensure_shifts(conn, [s])[s.id]
            stage.write(conn, s, sid)
        with read_tx(engine) as conn:
            stored = {(r[0], r[1]): r[2:] for r in conn.exec_driver_sql(
                "SELECT line, chart, state, statistic, threshold FROM chart_state "
                "WHERE shift_id = ?", (sid,))}
        for i, ln in enumerate(table.lines):
            plan = charts.plan_line(ln, baselines[ln], config.sequential)
            lim = stage.limits(plan, found[ln].details["n_level"])
            ls = charts.advance(plan, prior[ln], table.counts[i], lim)
            assert len(ls.rows) == len([k for k in stored if k[0] == ln])
            for r in ls.rows:
                assert stored[(ln, r["chart"])] == (jsontext.dumps(r["state"]), r["statistic"],
                                                    r["threshold"])
            if not ls.reports:
                assert found[ln] == charts.line_finding(plan, ls, lim, [s.id], names)
            signalled += bool(ls.reports)
            prior[ln] = charts.PriorCharts(s.id, {r["chart"]: r["state"] for r in ls.rows})
    assert signalled  # the drifting line's signals went through the stage too
    engine.dispose()


def test_rows_written_as_text_keep_a_reset_mark_as_dict_rows_do(tmp_path, plant_config_text):
    _, config, engine, cal = make_plant(tmp_path, plant_config_text, FAST)
    work = shifts(cal, 1)
    state = {"format": 1, "t": 3, "bank_s": [0.5, 0.0], "bank_counts": [[1.0, 2.0, 3.0]]}
    with write_tx(engine) as conn:
        sid = ensure_shifts(conn, [work[0]])[work[0].id]
        rows = [{"chart": "MEWMA", "state": state}, {"chart": "bank", "state": state}]
        chart_sql.write_states_many(conn, sid, {"L1": rows})
        assert chart_sql.mark_reset(conn, "L1", "ack 7") == work[0].id
        text = chart_sql.StateText(jsontext.dumps(state))
        chart_sql.write_states_many(conn, sid, {"L1": [{"chart": "MEWMA", "state": text},
                                                       {"chart": "bank", "state": text}],
                                                "L2": [{"chart": "MEWMA", "state": text}]},
                                    probe_chart="MEWMA")
        got = dict(conn.exec_driver_sql("SELECT line || chart, state FROM chart_state").all())
    marked = jsontext.dumps(state | {chart_sql.RESET_KEY: "ack 7"})
    assert got == {"L1MEWMA": marked, "L1bank": marked, "L2MEWMA": jsontext.dumps(state)}
    engine.dispose()


def test_a_chunk_write_retried_after_a_rollback_stores_every_chart_row(tmp_path, plant_config_text):
    """``run_write`` runs a chunk's write again when the store stayed locked (on PostgreSQL a
    lock timeout can come mid-transaction): the stage's second ``write`` of each shift must
    store the same rows as a first one that committed."""
    from qcfit.errors import StoreError
    from qcfit.store.engine import run_write

    stored = []
    for name, fail_once in (("plain", False), ("retried", True)):
        (tmp_path / name).mkdir()
        _, config, engine, cal = make_plant(tmp_path / name, plant_config_text, FAST)
        work = shifts(cal, 3)
        load(engine, work, drift_counts(start=1))
        tables = service._read_tables(engine, config, work)
        baselines = dict.fromkeys(("L1", "L2", "L3", "L4"), ref())
        stage = charts.ChartStage(engine, config, now=after(work))
        for table in tables:
            stage(table, baselines)
        attempts = []

        def write_all(conn, fail_once=fail_once, work=work, stage=stage, attempts=attempts):
            attempts.append(1)
            ids = ensure_shifts(conn, work)
            for s in work:
                stage.write(conn, s, ids[s.id])
            if fail_once and len(attempts) == 1:
                err = StoreError("database is locked (injected after the writes)")
                err.locked = True
                raise err

        run_write(engine, write_all)
        assert len(attempts) == (2 if fail_once else 1)
        stored.append(chart_rows(engine))
        engine.dispose()
    assert stored[0] and stored[0] == stored[1]
    assert {r[2] for r in stored[1]} == {1, 2, 3}  # every shift has its rows
