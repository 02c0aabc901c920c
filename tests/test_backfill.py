"""Helper processes in a long run: the store ends up exactly as after a run in one process,
a helper that dies costs only time, and helpers do not outlive the run's process."""

from __future__ import annotations

import concurrent.futures as cf
import datetime as dt
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
from test_service import (
    LINES,
    T0,
    after,
    flash_jump,
    healthy,
    load_counts,
    make_store,
    plant_text,
)

from qcfit import backfill, service
from qcfit.calendar import ShiftCalendar

#: columns that record when or how long, not what
CLOCK_COLUMNS = ("finished_utc", "seconds", "code_version")


def store_rows(engine) -> dict[str, list[tuple]]:
    """Every row of the tables a run writes, in key order, without clock columns."""
    import sqlalchemy as sa

    from qcfit.store import schema

    out = {}
    with engine.connect() as conn:
        for name in ("shift", "evaluation", "finding", "alarm", "alarm_event", "chart_state"):
            table = schema.metadata.tables[name]
            cols = [c for c in table.columns if c.name not in CLOCK_COLUMNS]
            out[name] = [tuple(r) for r in conn.execute(
                sa.select(*cols).order_by(*table.primary_key.columns))]
    return out


def backfilled(folder: Path, text: str, helpers: int, *, url: str | None = None,
               progress=None) -> dict[str, list]:
    """15 shifts of 4 lines (L1 with a flash jump in shifts 3-5, L3 sparse) evaluated in
    chunks of 3, with the sequential charts, in a new store (SQLite in ``folder``, or
    ``url``); every table of the store afterwards."""
    folder.mkdir()
    if url is None:
        config, engine = make_store(folder, text)
    else:
        config, engine = store_at(folder, text, url)
    shifts = ShiftCalendar.from_config(config).instances_between(
        dt.datetime(2026, 1, 6, 12, tzinfo=dt.UTC), dt.datetime(2026, 1, 11, 12, tzinfo=dt.UTC))
    rng = np.random.default_rng(21)
    for k, s in enumerate(shifts):
        counts = {ln: healthy(250, rng) for ln in LINES}
        counts["L1"] = flash_jump(250, rng) if 3 <= k <= 5 else counts["L1"]
        counts["L3"] = healthy(12, rng)
        load_counts(engine, s, counts, units={ln: 20_000 for ln in LINES})
    done = service.evaluate_shifts(engine, config, shifts, now=after(shifts[-1]), chunk=3,
                                   helpers=helpers, progress=progress)
    assert len(done) == len(shifts) and all(s.ok for s in done)
    try:
        return store_rows(engine)
    finally:
        engine.dispose()


def store_at(folder: Path, text: str, url: str):
    from qcfit.config import load_config
    from qcfit.store.engine import make_engine
    from qcfit.store.migrate import init_store

    path = folder / "plant.toml"
    path.write_text(text, encoding="utf-8")
    config = load_config(path)
    engine = make_engine(url)
    init_store(engine, config, os_user="test", now=T0)
    return config, engine


@pytest.fixture
def text(plant_config_text) -> str:
    return plant_text(plant_config_text, min_effect_w=0.3, min_effect_v=0.3, mc_draws=2000)


_ONE_PROCESS: dict[str, dict[str, list]] = {}


@pytest.fixture
def one_process(tmp_path_factory, text) -> dict[str, list]:
    """The store after the run in one process (made once per test process)."""
    if text not in _ONE_PROCESS:
        _ONE_PROCESS[text] = backfilled(tmp_path_factory.mktemp("one") / "store", text, helpers=0)
    return _ONE_PROCESS[text]


@pytest.fixture(autouse=True)
def patient(monkeypatch) -> None:
    """The run's process waits for its helpers to start before handing out chunks (a run
    this short would otherwise be over before they are up)."""
    original = backfill.Lookahead._hand_out

    def hand_out(self, k: int) -> None:
        if self.ready is not None:
            cf.wait([self.ready], timeout=60)
        original(self, k)

    monkeypatch.setattr(backfill.Lookahead, "_hand_out", hand_out)


def count_prepared(monkeypatch) -> list[int]:
    """Counts the chunks written from a helper's answer (one entry per shift)."""
    seen: list[int] = []
    original = service._Run.chunk_prepared

    def counted(self, shifts, rest, prepared):
        seen.extend(range(len(prepared.shifts)))
        return original(self, shifts, rest, prepared)

    monkeypatch.setattr(service._Run, "chunk_prepared", counted)
    return seen


def test_helpers_leave_the_store_exactly_as_one_process(tmp_path, text, one_process, monkeypatch,
                                                        caplog):
    prepared = count_prepared(monkeypatch)
    with_helpers = backfilled(tmp_path / "helpers", text, helpers=2)
    assert len(prepared) >= 6  # at least two of the five chunks came from a helper
    assert not [r for r in caplog.records if r.levelname == "WARNING"]
    assert one_process["finding"] and one_process["alarm"] and one_process["chart_state"]
    for table, rows in one_process.items():
        assert with_helpers[table] == rows, table


def test_a_helper_killed_midway_costs_time_not_results(tmp_path, text, one_process, caplog):
    killed: list[int] = []

    def kill_helpers(i: int, n: int, summary) -> None:
        import multiprocessing

        if i == 3:  # after the first chunk: the helpers are testing the next ones
            for child in multiprocessing.active_children():
                os.kill(child.pid, signal.SIGKILL)
                killed.append(child.pid)

    assert backfilled(tmp_path / "killed", text, helpers=2, progress=kill_helpers) == one_process
    assert killed
    assert any("testing them here" in r.getMessage() for r in caplog.records)


@pytest.mark.parametrize(("chunks", "cpus", "want"), [
    (1, 8, 0), (backfill.MIN_CHUNKS - 1, 8, 0),  # too short to pay for starting them
    (backfill.MIN_CHUNKS, 1, 0),                   # one CPU: nothing to share
    (backfill.MIN_CHUNKS, 2, 1), (22, 2, 1),       # the run's process keeps one CPU
    (22, 4, backfill.MAX_HELPERS), (22, 64, backfill.MAX_HELPERS),
])
def test_how_many_helpers(chunks: int, cpus: int, want: int) -> None:
    assert backfill.helpers_for(chunks, cpus) == want


HOLDER = textwrap.dedent(
    """
    import os, sys, time
    import sqlalchemy as sa
    from qcfit import backfill

    def pid(engine, config, versions, shifts, memo):
        return os.getpid()

    if __name__ == "__main__":
        pool = backfill.HelperPool(sa.create_engine("sqlite://"), None, {}, 1)
        print(pool.submit(pid, []).result(timeout=60), flush=True)
        time.sleep(600)
    """
)


@pytest.mark.skipif(sys.platform == "win32", reason="SIGKILL and reparenting are POSIX")
def test_helpers_end_when_the_run_process_is_killed(tmp_path):
    script = tmp_path / "holder.py"
    script.write_text(HOLDER, encoding="utf-8")
    proc = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE, text=True)
    try:
        helper = int(proc.stdout.readline())
        proc.kill()
        proc.wait(timeout=30)
        deadline = time.monotonic() + 20
        while _alive(helper) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert not _alive(helper)
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.stdout.close()


def _alive(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii") as f:
            return f.read().split(") ")[1][0] != "Z"
    except FileNotFoundError:
        return False

