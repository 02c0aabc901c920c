"""Re-evaluating an early shift recomputes every later shift forward; a run that is killed,
stopped or hits a failed shift midway leaves nothing resting on an outdated past: the next
``evaluate --due`` finishes it, and the store ends as an uninterrupted run leaves it.
Real temp SQLite stores, a real ``python -m qcfit evaluate`` process killed with SIGKILL."""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest
from click.testing import CliRunner
from sqlalchemy import and_, func, select
from test_charts import FAST, after, drift_counts, load, make_plant, shifts

from qcfit import service
from qcfit.cli import main
from qcfit.config import load_config
from qcfit.store.engine import make_engine, read_tx
from qcfit.store.schema import alarm, chart_state, evaluation, finding, shift
from qcfit.store.shifts import shift_row

ROOT = Path(__file__).resolve().parents[1]
N = 60  # shifts: a re-evaluation from shift 3 spans two write transactions of CHUNK (50)
EARLY = 3  # the shift whose counts are corrected
FIXED = {ln: [90, 60, 40, 30, 20, 10] for ln in ("L1", "L2", "L3", "L4")}  # invented


def _sid(r) -> str:
    return f"{r.shift_date}_{r.shift_name}"


def chart_values(engine) -> list[tuple]:
    with read_tx(engine) as conn:
        rows = conn.execute(
            select(chart_state.c.line, chart_state.c.chart, shift.c.shift_date,
                   shift.c.shift_name, chart_state.c.state, chart_state.c.statistic,
                   chart_state.c.threshold)
            .join(shift, shift.c.id == chart_state.c.shift_id)
            .order_by(shift.c.start_utc, chart_state.c.line, chart_state.c.chart))
        return [(r.line, r.chart, _sid(r), json.dumps(r.state, sort_keys=True), r.statistic,
                 r.threshold) for r in rows]


def current_findings(engine) -> list[tuple]:
    with read_tx(engine) as conn:
        rows = conn.execute(
            select(shift.c.shift_date, shift.c.shift_name, finding.c.kind, finding.c.line,
                   finding.c.verdict, finding.c.statistic, finding.c.pvalue,
                   finding.c.adjusted_pvalue, finding.c.effect_size, finding.c.method)
            .join(evaluation, and_(evaluation.c.shift_id == shift.c.id, evaluation.c.is_current))
            .join(finding, finding.c.evaluation_id == evaluation.c.id)
            .order_by(shift.c.start_utc, finding.c.kind, finding.c.line))
        return [(_sid(r), *tuple(r)[2:]) for r in rows]


def current_per_shift(engine) -> dict[str, tuple[int, str]]:
    """shift id -> (number of current evaluations, status of one of them)."""
    with read_tx(engine) as conn:
        rows = conn.execute(
            select(shift.c.shift_date, shift.c.shift_name, func.count(), func.max(evaluation.c.status))
            .join(evaluation, and_(evaluation.c.shift_id == shift.c.id, evaluation.c.is_current))
            .group_by(shift.c.id))
        return {_sid(r): (int(r[2]), str(r[3])) for r in rows}


def alarms(engine, *, faults: bool = True) -> list[tuple]:
    q = select(alarm.c.kind, alarm.c.line, alarm.c.state, alarm.c.severity, alarm.c.shift_count,
               alarm.c.summary, alarm.c.first_shift_id, alarm.c.last_shift_id).order_by(alarm.c.id)
    if not faults:
        q = q.where(alarm.c.kind != "service-fault")
    with read_tx(engine) as conn:
        return [tuple(r) for r in conn.execute(q)]


def fast(text: str) -> str:
    """The shared test plant with few Monte Carlo draws (speed)."""
    return text.replace("[thresholds]\n", "[thresholds]\nmc_draws = 300\n", 1)


def evaluated_pair(tmp_path: Path, text: str, counts, n: int = N):
    """Two stores with the same data, every shift evaluated once (in the first store, then
    copied), then shift EARLY corrected in both."""
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    path, config, engine, cal = make_plant(tmp_path / "a", text, FAST)
    work = shifts(cal, n)
    load(engine, work, counts)
    assert all(s.ok for s in service.evaluate_shifts(engine, config, work, now=after(work)))
    engine.dispose()
    with sqlite3.connect(tmp_path / "a" / "store.sqlite") as src, \
            sqlite3.connect(tmp_path / "b" / "store.sqlite") as dst:
        src.backup(dst)
    out = []
    for name in ("a", "b"):
        (tmp_path / name / "plant.toml").write_text(text + FAST, encoding="utf-8")
        config = load_config(tmp_path / name / "plant.toml")
        url = f"sqlite:///{tmp_path / name / 'store.sqlite'}"
        engine = make_engine(url)
        load(engine, [work[EARLY]], lambda i, s: FIXED)
        out.append((tmp_path / name / "plant.toml", config, engine, url))
    return work, out


def test_stopped_after_the_first_commit_leaves_the_rest_due(tmp_path, plant_config_text):
    """A run stopped after its first write transaction (as the service stops between two
    chunks): the shifts it had not reached are due, their old evaluations kept superseded;
    ``evaluate_due`` finishes them and the store equals an uninterrupted run."""
    work, ((_, config, engine, _), (_, config_b, engine_b, _)) = evaluated_pair(
        tmp_path, fast(plant_config_text), drift_counts(start=10, seed=5), n=20)
    n = len(work)
    now = after(work)

    class Stop(Exception):
        pass

    def stop_after_first_chunk(i, _of, _summary):
        if i == 5:
            raise Stop

    with pytest.raises(Stop):
        service.evaluate_shifts(engine, config, [work[EARLY]], now=now, chunk=5,
                                progress=stop_after_first_chunk)
    due = service.due_shifts(engine, config, now=now)
    assert [s.id for s in due] == [s.id for s in work[EARLY + 5:]]
    per_shift = current_per_shift(engine)
    assert set(per_shift) == {s.id for s in work} - {s.id for s in due}
    with read_tx(engine) as conn:  # nothing lost: the n first evaluations and 5 new ones
        n_evals = conn.execute(select(func.count()).select_from(evaluation)).scalar()
    assert n_evals == n + n - EARLY - len(due)

    finished = service.evaluate_due(engine, config, now=now)
    assert [s.shift_id for s in finished] == [s.id for s in due]
    assert all(s.ok and s.superseded_id is None for s in finished)  # superseded when marked
    uninterrupted = service.evaluate_shifts(engine_b, config_b, [work[EARLY]], now=now)
    assert [s.forward for s in uninterrupted] == [False] + [True] * (n - EARLY - 1)
    assert all(v == (1, "ok") for v in current_per_shift(engine).values())
    assert len(current_per_shift(engine)) == n
    assert chart_values(engine) == chart_values(engine_b)
    assert current_findings(engine) == current_findings(engine_b)
    assert alarms(engine) == alarms(engine_b)
    engine.dispose()
    engine_b.dispose()


def _wait_for(cond, timeout: float = 60.0) -> None:
    end = time.monotonic() + timeout
    while not cond():
        assert time.monotonic() < end, "condition not met in time"
        time.sleep(0.005)


@pytest.mark.slow
def test_killed_re_evaluation_is_finished_by_evaluate_due(tmp_path, plant_config_text):
    """``qcfit evaluate --shift`` of an early shift, SIGKILLed after its first write
    transaction committed (the test then holds the store's write lock, so the process is
    killed waiting for its second); ``evaluate --due`` finishes the job: one current
    evaluation per shift, chart values, findings and alarms as an uninterrupted run."""
    work, ((path, config, engine, url), (path_b, config_b, engine_b, url_b)) = evaluated_pair(
        tmp_path, fast(plant_config_text), drift_counts(start=30, seed=5))
    db = url.removeprefix("sqlite:///")
    with read_tx(engine) as conn:
        before = conn.execute(select(func.count()).select_from(evaluation)).scalar()

    def evaluations() -> int:
        with sqlite3.connect(db) as con:
            return con.execute("SELECT count(*) FROM evaluation").fetchone()[0]

    env = dict(os.environ, PYTHONPATH=str(ROOT), OPENBLAS_NUM_THREADS="1")
    child = subprocess.Popen(
        [sys.executable, "-m", "qcfit", "--config", str(path), "--store", url, "evaluate",
         "--shift", work[EARLY].id, "--quiet"],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env=env, cwd=ROOT)
    lock = sqlite3.connect(db, isolation_level=None, timeout=60)
    try:
        _wait_for(lambda: evaluations() > before or child.poll() is not None)
        lock.execute("BEGIN IMMEDIATE")  # its next write transaction now waits for us
        assert child.poll() is None, child.stdout.read()
        child.send_signal(signal.SIGKILL)
        assert child.wait(timeout=30) == -signal.SIGKILL
    finally:
        if lock.in_transaction:
            lock.execute("ROLLBACK")
        lock.close()
        if child.poll() is None:
            child.kill()
            child.wait()
        child.stdout.close()

    now = after(work)
    due = service.due_shifts(engine, config, now=now)
    assert due, "the killed run had finished: nothing was left to test"
    assert due == work[-len(due):] and len(due) < N - EARLY  # the first commit landed
    assert all(n == 1 for n, _ in current_per_shift(engine).values())

    finished = service.evaluate_due(engine, config, now=now)  # what `evaluate --due` runs
    assert [s.shift_id for s in finished] == [s.id for s in due] and all(s.ok for s in finished)
    assert service.due_shifts(engine, config, now=now) == []

    # the uninterrupted run, through the CLI (its summary names the forward recomputation)
    result = CliRunner().invoke(main, ["--config", str(path_b), "--store", url_b, "evaluate",
                                       "--shift", work[EARLY].id, "--quiet"])
    assert result.exit_code == 0, result.output
    lines = result.output.splitlines()
    assert lines[0].startswith(f"Evaluated {N - EARLY} shift(s) ({work[EARLY].id} .. ")
    assert lines[1] == (f"  1 asked for; {N - EARLY - 1} later shift(s) re-evaluated too, "
                        f"because the sequential charts are recomputed forward from "
                        f"{work[EARLY].id}.")

    per_shift = current_per_shift(engine)
    assert len(per_shift) == N and set(per_shift.values()) == {(1, "ok")}
    a, b = chart_values(engine), chart_values(engine_b)
    assert a == b and any(r[2] == work[-1].id for r in a)
    assert current_findings(engine) == current_findings(engine_b)
    assert alarms(engine) == alarms(engine_b)
    assert any(r[0] == "sequential" for r in alarms(engine))  # the drift was charted
    engine.dispose()
    engine_b.dispose()


def test_a_failed_shift_in_the_middle_is_retried_with_every_later_shift(
        tmp_path, plant_config_text):
    """Shift 12 fails (a real error inside the store), the later shifts are evaluated without
    it; the retry (``evaluate_due``) re-evaluates 12 and every later shift forward, so the
    charts, findings and open alarms equal a run that never failed."""
    counts = drift_counts(start=8, seed=6)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    _, config, engine, cal = make_plant(tmp_path / "a", fast(plant_config_text), FAST)
    _, config_b, engine_b, _ = make_plant(tmp_path / "b", fast(plant_config_text), FAST)
    work = shifts(cal, 30)
    now = after(work)
    load(engine, work, counts)
    load(engine_b, work, counts)
    assert all(s.ok for s in service.evaluate_shifts(engine_b, config_b, work, now=now))

    db = tmp_path / "a" / "store.sqlite"
    assert all(s.ok for s in service.evaluate_shifts(engine, config, work[:12], now=now))
    with sqlite3.connect(db) as con:
        con.execute("CREATE TRIGGER boom BEFORE INSERT ON finding "
                    "BEGIN SELECT RAISE(ABORT, 'injected disk trouble'); END")
    (bad,) = service.evaluate_shifts(engine, config, [work[12]], now=now)
    assert not bad.ok and "injected disk trouble" in bad.error
    with sqlite3.connect(db) as con:
        con.execute("DROP TRIGGER boom")
    later = service.evaluate_shifts(engine, config, work[13:], now=now)
    assert all(s.ok and not s.forward for s in later)
    assert chart_values(engine) != chart_values(engine_b)  # charted without shift 12

    assert [s.id for s in service.due_shifts(engine, config, now=now)] == [work[12].id]
    retry = service.evaluate_due(engine, config, now=now)
    assert [s.shift_id for s in retry] == [s.id for s in work[12:]]
    assert all(s.ok for s in retry) and [s.forward for s in retry] == [False] + [True] * 17
    assert service.due_shifts(engine, config, now=now) == []
    per_shift = current_per_shift(engine)
    assert len(per_shift) == len(work) and set(per_shift.values()) == {(1, "ok")}
    assert chart_values(engine) == chart_values(engine_b)
    assert current_findings(engine) == current_findings(engine_b)

    def still_open(eng):
        return [r for r in alarms(eng, faults=False) if r[2] in ("open", "acknowledged")]
    assert still_open(engine) == still_open(engine_b) != []
    engine.dispose()
    engine_b.dispose()


def test_a_shift_failing_inside_a_run_fails_alone_and_the_retry_finishes(
        tmp_path, plant_config_text):
    """One run of 30 shifts where only shift 12 cannot be written (a real error inside the
    store): the later shifts go on from the chart rows the store has (not from shift 12's,
    which were never committed), so they do not fail with it; the retry then redoes 12 and
    every later shift, and the store equals a run that never failed."""
    counts = drift_counts(start=8, seed=6)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    _, config, engine, cal = make_plant(tmp_path / "a", fast(plant_config_text), FAST)
    _, config_b, engine_b, _ = make_plant(tmp_path / "b", fast(plant_config_text), FAST)
    work = shifts(cal, 30)
    now = after(work)
    load(engine, work, counts)
    load(engine_b, work, counts)
    assert all(s.ok for s in service.evaluate_shifts(engine_b, config_b, work, now=now))
    with read_tx(engine) as conn:
        row_12 = shift_row(conn, work[12].id).row_id
    db = tmp_path / "a" / "store.sqlite"
    with sqlite3.connect(db) as con:
        con.execute(f"CREATE TRIGGER boom BEFORE INSERT ON finding WHEN NEW.evaluation_id IN "
                    f"(SELECT id FROM evaluation WHERE shift_id = {row_12}) "
                    f"BEGIN SELECT RAISE(ABORT, 'injected disk trouble'); END")
    first = service.evaluate_shifts(engine, config, work, now=now)
    assert [s.shift_id for s in first if not s.ok] == [work[12].id]
    with sqlite3.connect(db) as con:
        con.execute("DROP TRIGGER boom")
    assert [s.id for s in service.due_shifts(engine, config, now=now)] == [work[12].id]
    retry = service.evaluate_due(engine, config, now=now)
    assert [s.shift_id for s in retry] == [s.id for s in work[12:]] and all(s.ok for s in retry)
    per_shift = current_per_shift(engine)
    assert len(per_shift) == len(work) and set(per_shift.values()) == {(1, "ok")}
    assert chart_values(engine) == chart_values(engine_b)
    assert current_findings(engine) == current_findings(engine_b)
    engine.dispose()
    engine_b.dispose()
