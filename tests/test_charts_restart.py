"""Kill between shifts: a real evaluating process is killed with SIGKILL between two shifts;
the next run resumes the sequential charts from the store and every later chart value equals
the uninterrupted run, bit for bit."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from sqlalchemy import select
from test_charts import FAST, after, drift_counts, load, make_plant, shifts

from qcfit import service
from qcfit.store.engine import read_tx
from qcfit.store.schema import alarm, chart_state, shift

ROOT = Path(__file__).resolve().parents[1]
KILL_AFTER = 8  # shifts the first process commits before it is killed

CHILD = textwrap.dedent("""
    import datetime as dt, sys
    from qcfit import service
    from qcfit.calendar import ShiftCalendar
    from qcfit.config import load_config
    from qcfit.store.engine import make_engine

    config = load_config(sys.argv[1])
    engine = make_engine(sys.argv[2])
    cal = ShiftCalendar.from_config(config)
    now = dt.datetime.fromisoformat(sys.argv[3])
    for shift_id in sys.argv[4:]:
        s = service.evaluate_shift(engine, config, cal.from_id(shift_id), now=now)
        print("done", s.shift_id, s.status, flush=True)
        sys.stdin.readline()  # wait here, between shifts, for the go-ahead
""")


def chart_values(engine) -> list[tuple]:
    with read_tx(engine) as conn:
        rows = conn.execute(
            select(chart_state.c.line, chart_state.c.chart, shift.c.shift_date,
                   shift.c.shift_name, chart_state.c.state, chart_state.c.statistic,
                   chart_state.c.threshold)
            .join(shift, shift.c.id == chart_state.c.shift_id)
            .order_by(shift.c.start_utc, chart_state.c.line, chart_state.c.chart))
        return [(r.line, r.chart, str(r.shift_date), r.shift_name,
                 json.dumps(r.state, sort_keys=True), r.statistic, r.threshold) for r in rows]


def sequential_alarms(engine) -> list[tuple]:
    with read_tx(engine) as conn:
        return [(r.line, r.state, r.shift_count, r.summary) for r in conn.execute(
            select(alarm).where(alarm.c.kind == "sequential").order_by(alarm.c.id))]


@pytest.mark.slow
def test_sigkill_between_shifts_then_resume_gives_the_uninterrupted_values(
        tmp_path, plant_config_text):
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    _, config_a, engine_a, cal = make_plant(tmp_path / "a", plant_config_text, FAST)
    path_b, config_b, engine_b, _ = make_plant(tmp_path / "b", plant_config_text, FAST)
    work = shifts(cal, 16)
    counts = drift_counts(start=4)
    load(engine_a, work, counts)
    load(engine_b, work, counts)
    now = after(work)
    # the uninterrupted run
    assert all(s.ok for s in service.evaluate_shifts(engine_a, config_a, work, now=now))

    url_b = f"sqlite:///{tmp_path / 'b' / 'store.sqlite'}"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    child = subprocess.Popen(
        [sys.executable, "-c", CHILD, str(path_b), url_b, now.isoformat(), *[s.id for s in work]],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, env=env, cwd=ROOT)
    try:
        for i in range(KILL_AFTER):
            line = child.stdout.readline()
            assert line.split() == ["done", work[i].id, "ok"], line
            if i < KILL_AFTER - 1:
                child.stdin.write("go\n")
                child.stdin.flush()
        child.send_signal(signal.SIGKILL)  # it is waiting between shift 8 and shift 9
        assert child.wait(timeout=30) == -signal.SIGKILL
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    done_b = chart_values(engine_b)
    assert {r[2] + "_" + r[3] for r in done_b} == {s.id for s in work[:KILL_AFTER]}

    # the next run (the service's catch-up) picks up where the killed one stopped
    resumed = service.evaluate_due(engine_b, config_b, now=now)
    assert [s.shift_id for s in resumed] == [s.id for s in work[KILL_AFTER:]]
    a, b = chart_values(engine_a), chart_values(engine_b)
    first_after = [r for r in a if r[2] + "_" + r[3] == work[KILL_AFTER].id]
    assert first_after and first_after == [r for r in b if r[2] + "_" + r[3] == work[KILL_AFTER].id]
    assert a == b
    assert sequential_alarms(engine_a) == sequential_alarms(engine_b)
    assert any(r[0] == "L3" for r in sequential_alarms(engine_b))  # the drift was charted
    engine_a.dispose()
    engine_b.dispose()
