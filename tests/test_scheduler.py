"""The service in-process on real temp SQLite stores: shift-end wakes across DST, the
store as the watermark, failed evaluations retried, config reload, alarm log lines after
commit, heartbeat and watchdog, and one smoke run of the real scheduler."""

from __future__ import annotations

import datetime as dt
import logging
import os
import socket
import sqlite3
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import func, select

from qcfit import scheduler as sch
from qcfit.calendar import ShiftCalendar
from qcfit.config import load_config
from qcfit.errors import AlreadyRunningError
from qcfit.ingest import load_counts_file
from qcfit.store.engine import make_engine, read_tx
from qcfit.store.heartbeat import read_heartbeat
from qcfit.store.migrate import init_store
from qcfit.store.schema import alarm, alarm_event, evaluation

UTC = dt.UTC
CATS = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")  # the shared test plant (tests/conftest.py)
PROPS = np.array([0.30, 0.25, 0.15, 0.12, 0.10, 0.08])
SKEW = np.array([0.10, 0.10, 0.55, 0.10, 0.10, 0.05])  # flash jump (invented)
LINES = ("L1", "L2", "L3", "L4")
T0 = dt.datetime(2026, 1, 5, 12, 0, tzinfo=UTC)  # a Monday, 06:00 Chicago


def counts_csv(path: Path, shifts, *, seed: int, skew: dict[str, set[str]] | None = None,
               n: int = 300) -> Path:
    """A per-shift counts file (invented, seeded); ``skew``: shift id -> lines with flash up."""
    rng = np.random.default_rng(seed)
    rows = ["shift,line,category,count,units_inspected"]
    for s in shifts:
        for line in LINES:
            p = SKEW if skew and line in skew.get(s.id, ()) else PROPS
            for cat, c in zip(CATS, rng.multinomial(n, p), strict=True):
                rows.append(f"{s.id},{line},{cat},{int(c)},25000")
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    return path


def with_keys(text: str, section: str, **values: object) -> str:
    """The config text with ``[section]`` keys set (replaced, or the section appended)."""
    body = [f"{k} = {v!r}" if not isinstance(v, str) else f'{k} = "{v}"'
            for k, v in values.items()]
    lines = text.splitlines()
    if f"[{section}]" not in lines:
        return "\n".join(lines + ["", f"[{section}]"] + body) + "\n"
    i = lines.index(f"[{section}]")
    j = next((k for k in range(i + 1, len(lines)) if lines[k].startswith("[")), len(lines))
    keep = [ln for ln in lines[i + 1:j] if ln.split("=")[0].strip() not in values]
    return "\n".join(lines[:i + 1] + body + keep + lines[j:]) + "\n"


class Plant:
    """A config file, an initialised store and helpers, all in tmp_path."""

    def __init__(self, tmp_path: Path, text: str) -> None:
        self.dir = tmp_path
        self.config_path = tmp_path / "plant.toml"
        self.config_path.write_text(text, encoding="utf-8")
        self.config = load_config(self.config_path)
        self.db = tmp_path / "plant.sqlite"
        self.url = f"sqlite:///{self.db}"
        self.engine = make_engine(self.url)
        init_store(self.engine, self.config, os_user="test", now=T0)
        self.cal = ShiftCalendar.from_config(self.config)

    def load(self, since: dt.datetime, until: dt.datetime, *, seed: int = 1, skew=None) -> list:
        shifts = self.cal.instances_between(since, until)
        path = counts_csv(self.dir / f"counts-{seed}.csv", shifts, seed=seed, skew=skew)
        load_counts_file(self.engine, self.config, path, now=until + dt.timedelta(days=1),
                         os_user="test", host="test")
        return shifts

    def service(self, clock=None, **opts) -> sch.Service:
        return sch.Service(self.config_path, options=sch.Options(**opts),
                           clock=clock or (lambda: T0))

    def evaluations(self) -> dict[int, int]:
        """shift row id -> number of current evaluations."""
        with read_tx(self.engine) as conn:
            rows = conn.execute(select(evaluation.c.shift_id, func.count())
                                .where(evaluation.c.is_current).group_by(evaluation.c.shift_id))
            return {int(a): int(b) for a, b in rows}

    def evaluation_rows(self) -> int:
        with read_tx(self.engine) as conn:
            return int(conn.execute(select(func.count()).select_from(evaluation)).scalar_one())

    def faults(self) -> list:
        with read_tx(self.engine) as conn:
            return conn.execute(select(alarm).where(alarm.c.kind == "service-fault")).all()


@pytest.fixture
def plant(tmp_path, plant_config_text):
    text = with_keys(plant_config_text, "thresholds", mc_draws=500, min_effect_w=0.3,
                     min_effect_v=0.3)
    p = Plant(tmp_path, text)
    yield p
    p.engine.dispose()


# ---------------------------------------------------------------------------------------
# wake trigger across DST (check 1 of the pitfalls list)

DST_CASES = [
    # zone, night shift start date (a Saturday), expected real hours, its end in UTC.
    # Offsets from the IANA tz database (zone.tab rules for 2025; from memory of the rules,
    # checked here through zoneinfo): Chicago CST -6 / CDT -5, Berlin CET +1 / CEST +2.
    ("America/Chicago", dt.date(2025, 3, 8), 7.0, dt.datetime(2025, 3, 9, 11, 0, tzinfo=UTC)),
    ("America/Chicago", dt.date(2025, 11, 1), 9.0, dt.datetime(2025, 11, 2, 12, 0, tzinfo=UTC)),
    ("Europe/Berlin", dt.date(2025, 3, 29), 7.0, dt.datetime(2025, 3, 30, 4, 0, tzinfo=UTC)),
    ("Europe/Berlin", dt.date(2025, 10, 25), 9.0, dt.datetime(2025, 10, 26, 5, 0, tzinfo=UTC)),
]


@pytest.mark.parametrize(("zone", "night", "hours", "end_utc"), DST_CASES)
def test_wake_fires_once_per_shift_at_its_real_end_across_dst(
        tmp_path, plant_config_text, zone, night, hours, end_utc):
    text = plant_config_text.replace('timezone = "America/Chicago"', f'timezone = "{zone}"')
    config = load_config(_write(tmp_path, text))
    cal = ShiftCalendar.from_config(config)
    trigger = sch.ShiftEndTrigger(cal, dt.timedelta(minutes=15))
    start = dt.datetime.combine(night - dt.timedelta(days=2), dt.time(0), config.timezone)
    fires, prev = [], None
    now = start
    while len(fires) < 12:
        nxt = trigger.get_next_fire_time(prev, now)
        fires.append(nxt)
        prev = now = nxt
    assert fires == sorted(set(fires))  # strictly increasing: no double fire
    ends = [i.end for i in cal.instances_between(start - dt.timedelta(days=1),
                                                 fires[-1] + dt.timedelta(days=1))]
    assert all(f - dt.timedelta(minutes=15) in ends for f in fires)
    c = cal.instance(night, "C")
    assert c.hours == hours
    assert c.end == end_utc
    assert end_utc + dt.timedelta(minutes=15) in fires
    # local wall time of every wake is a shift end + 15 min: 06:15, 14:15 or 22:15
    assert {f.astimezone(config.timezone).strftime("%H:%M") for f in fires} == {
        "06:15", "14:15", "22:15"}
    # Sunday is a non-production day in the test plant: no shift starts then
    assert all(f.astimezone(config.timezone).weekday() != 6
               or f.astimezone(config.timezone).hour == 6 for f in fires)


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "p.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_wake_after_a_previous_fire_is_the_next_shift_end(plant):
    trigger = sch.ShiftEndTrigger(plant.cal, dt.timedelta(minutes=15))
    # T0 = Mon 06:00 Chicago; no night shift ends then (it would start on Sunday)
    first = trigger.get_next_fire_time(None, T0)
    assert first.astimezone(plant.config.timezone).strftime("%a %H:%M") == "Mon 14:15"
    second = trigger.get_next_fire_time(first, first)
    assert second.astimezone(plant.config.timezone).strftime("%a %H:%M") == "Mon 22:15"
    # a fire time equal to now (the first call) is allowed, a repeat of the previous is not
    assert trigger.get_next_fire_time(None, first) == first


# ---------------------------------------------------------------------------------------
# the store is the watermark (check 2)


def test_outage_then_duplicate_wakes_evaluate_each_shift_exactly_once(plant):
    shifts = plant.load(T0, T0 + dt.timedelta(days=4))
    svc = plant.service()
    try:
        day1 = T0 + dt.timedelta(days=1)
        done = svc.catch_up(now=day1)
        ended1 = [s for s in shifts if s.end <= day1]
        assert [d.shift_id for d in done] == [s.id for s in ended1]
        # the PC is off for 3 days; then the tick, a wake and the start run at once
        later = day1 + dt.timedelta(days=3)
        done = svc.catch_up(now=later)
        assert [d.shift_id for d in done] == [s.id for s in shifts
                                              if day1 < s.end <= later]
        assert svc.catch_up(now=later) == []
        assert svc.catch_up(now=later + dt.timedelta(minutes=5)) == []
    finally:
        svc.engine.dispose()
    ended = [s for s in shifts if s.end <= later]
    current = plant.evaluations()
    assert len(current) == len(ended) and set(current.values()) == {1}
    assert plant.evaluation_rows() == len(ended)  # nothing evaluated twice


def test_concurrent_catch_ups_do_not_overlap(plant):
    shifts = plant.load(T0, T0 + dt.timedelta(days=2))
    svc = plant.service()
    now = T0 + dt.timedelta(days=2)
    results: list[list] = []
    threads = [threading.Thread(target=lambda: results.append(svc.catch_up(now=now)))
               for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    svc.engine.dispose()
    assert sorted(len(r) for r in results) == [0, 0, len(shifts)]
    assert plant.evaluation_rows() == len(shifts)


def test_second_service_on_the_store_is_refused_with_the_holder(plant):
    first, second = plant.service(), plant.service()
    try:
        assert first.acquire_lock()
        with pytest.raises(AlreadyRunningError) as err:
            second.acquire_lock()
        assert f"pid {os.getpid()} on {socket.gethostname()}" in str(err.value)
    finally:
        first.lock.release()
        first.engine.dispose()
        second.engine.dispose()


# ---------------------------------------------------------------------------------------
# failures become records and are retried (check 4)


def test_failed_evaluation_is_recorded_then_retried_by_the_next_tick(plant):
    shifts = plant.load(T0, T0 + dt.timedelta(hours=8))
    svc = plant.service()
    now = T0 + dt.timedelta(hours=9)
    # a real failure inside the store: the finding insert aborts
    with sqlite3.connect(plant.db) as con:
        con.execute("CREATE TRIGGER boom BEFORE INSERT ON finding "
                    "BEGIN SELECT RAISE(ABORT, 'injected disk trouble'); END")
    try:
        done = svc.catch_up(now=now)
        assert [d.status for d in done] == ["failed"]
        assert "injected disk trouble" in done[0].error
        with read_tx(plant.engine) as conn:
            row = conn.execute(select(evaluation)).one()
        assert (row.status, row.is_current) == ("failed", True)
        assert len(plant.faults()) == 1
        with sqlite3.connect(plant.db) as con:
            con.execute("DROP TRIGGER boom")
        done = svc.catch_up(now=now + dt.timedelta(minutes=5))
        assert [(d.shift_id, d.status) for d in done] == [(shifts[0].id, "ok")]
        assert svc.catch_up(now=now + dt.timedelta(minutes=10)) == []
    finally:
        svc.engine.dispose()
    with read_tx(plant.engine) as conn:
        rows = conn.execute(select(evaluation.c.status, evaluation.c.is_current)
                            .order_by(evaluation.c.id)).all()
    assert [tuple(r) for r in rows] == [("failed", False), ("ok", True)]


# ---------------------------------------------------------------------------------------
# config reload


def test_invalid_config_keeps_the_last_good_one_and_raises_one_fault(plant):
    svc = plant.service()
    good = svc.config.hash
    text = plant.config_path.read_text(encoding="utf-8")
    try:
        plant.config_path.write_text(text.replace("alarm_level = 0.01", "alarm_level = 2"),
                                     encoding="utf-8")
        svc.request_reload()  # as SIGHUP does
        assert svc.check_reload() is False
        assert svc.config.hash == good
        faults = plant.faults()
        assert len(faults) == 1
        assert "thresholds.alarm_level" in faults[0].summary
        assert faults[0].state == "open"
        # the same bad file seen again (next loop, another SIGHUP): no new alarm or event
        svc.request_reload()
        svc.check_reload()
        with read_tx(plant.engine) as conn:
            events = conn.execute(select(func.count()).select_from(alarm_event)).scalar_one()
        assert len(plant.faults()) == 1 and events == 1
        # a good file is picked up because it changed (no signal needed)
        fixed = with_keys(text, "schedule", tick_minutes=7)
        plant.config_path.write_text(fixed, encoding="utf-8")
        os.utime(plant.config_path, ns=(time.time_ns(), time.time_ns() + 10**9))
        assert svc.check_reload() is True
        assert svc.config.schedule.tick_minutes == 7
        assert svc.config.hash != good
    finally:
        svc.engine.dispose()


def test_config_naming_another_store_is_not_taken(plant, tmp_path):
    svc = plant.service()
    try:
        text = plant.config_path.read_text(encoding="utf-8")
        other = tmp_path / "other.sqlite"
        plant.config_path.write_text(with_keys(text, "store", url=f"sqlite:///{other}"),
                                     encoding="utf-8")
        svc.request_reload()
        assert svc.check_reload() is False
        assert "store.url: changed; restart the service" in plant.faults()[0].summary
    finally:
        svc.engine.dispose()


# ---------------------------------------------------------------------------------------
# alarm log lines after commit, carrying the id


def test_each_alarm_is_logged_after_its_commit_with_its_id(plant, caplog):
    shifts = plant.load(T0, T0 + dt.timedelta(days=1), skew={})
    skew = {s.id: {"L2"} for s in shifts}
    plant.load(T0, T0 + dt.timedelta(days=1), seed=2, skew=skew)
    seen: list[tuple[str, bool]] = []

    class Check(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            msg = record.getMessage()
            alarm_id = int(msg.split()[1])
            with sqlite3.connect(plant.db) as con:  # another connection sees it: committed
                found = con.execute("SELECT 1 FROM alarm WHERE id = ?", (alarm_id,)).fetchone()
            seen.append((msg, found is not None))

    handler = Check()
    logging.getLogger("qcfit.alarms").addHandler(handler)
    svc = plant.service()
    try:
        done = svc.catch_up(now=T0 + dt.timedelta(days=1, hours=1))
    finally:
        logging.getLogger("qcfit.alarms").removeHandler(handler)
        svc.engine.dispose()
    opened = [a for d in done for a in d.opened]
    assert opened, "the skewed line should open alarms"
    assert all(ok for _, ok in seen)
    assert {int(m.split()[1]) for m, _ in seen if " opened:" in m} == set(opened)
    line = next(m for m, _ in seen if " opened:" in m)
    assert "kind=" in line and "severity=" in line and "shift=2026-01-0" in line


# ---------------------------------------------------------------------------------------
# heartbeat, watchdog (checks 4 and G1) and the real scheduler


class FakeSystemd:
    """A datagram socket standing in for systemd's notify socket."""

    def __init__(self) -> None:
        self.dir = tempfile.mkdtemp(prefix="qcsd", dir="/tmp")
        self.path = os.path.join(self.dir, "notify")
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(self.path)
        self.sock.settimeout(0.05)

    def drain(self) -> list[str]:
        out = []
        while True:
            try:
                out.extend(self.sock.recv(4096).decode().splitlines())
            except TimeoutError:
                return out

    def close(self) -> None:
        self.sock.close()
        os.unlink(self.path)
        os.rmdir(self.dir)


def run_in_thread(svc: sch.Service) -> tuple[threading.Thread, list[int]]:
    codes: list[int] = []
    thread = threading.Thread(target=lambda: codes.append(svc.run()), daemon=True)
    thread.start()
    return thread, codes


def wait_for(cond, timeout: float = 20.0) -> None:
    end = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > end:
            raise AssertionError("condition not met in time")
        time.sleep(0.05)


def test_watchdog_pings_only_while_the_heartbeat_is_fresh(plant, monkeypatch):
    fake = FakeSystemd()
    monkeypatch.setenv("NOTIFY_SOCKET", fake.path)
    monkeypatch.setenv("WATCHDOG_USEC", "3000000")
    monkeypatch.setenv("WATCHDOG_PID", str(os.getpid()))
    svc = plant.service(beat_s=0.2, stale_after_s=0.6, loop_s=0.1)
    thread, codes = run_in_thread(svc)
    try:
        wait_for(lambda: svc.scheduler is not None and svc.healthy())
        time.sleep(0.8)
        first = fake.drain()
        assert first[0] == "READY=1"
        assert first.count("WATCHDOG=1") >= 3
        # the scheduler thread dies: no more beats, so the pings stop
        svc.scheduler.shutdown(wait=True)
        time.sleep(svc.options.stale_s + 0.3)
        fake.drain()
        time.sleep(0.6)
        assert "WATCHDOG=1" not in fake.drain()
        assert not svc.healthy()
        svc.request_stop()
        thread.join(30)
        assert "STOPPING=1" in fake.drain()
    finally:
        svc.request_stop()
        thread.join(30)
        fake.close()
    assert codes == [0]


def test_sd_notify_is_a_no_op_without_the_socket():
    assert sch.sd_notify("READY=1", environ={}) is False
    assert sch.watchdog_interval_s({}) is None
    assert sch.watchdog_interval_s({"WATCHDOG_USEC": "4000000"}) == 4.0
    assert sch.watchdog_interval_s({"WATCHDOG_USEC": "4000000", "WATCHDOG_PID": "1"}) is None


def test_real_scheduler_smoke_run(plant):
    shifts = plant.load(T0, T0 + dt.timedelta(days=1))
    now = T0 + dt.timedelta(days=1)
    svc = plant.service(clock=lambda: now, beat_s=0.2, loop_s=0.1)
    thread, codes = run_in_thread(svc)
    try:
        ended = [s for s in shifts if s.end <= now]
        wait_for(lambda: len(plant.evaluations()) == len(ended))
        jobs = {j.id: j for j in svc.scheduler.get_jobs()}
        assert set(jobs) == {"wake", "tick", "beat"}  # "start" ran once and is gone
        for job in jobs.values():
            assert (job.misfire_grace_time, job.coalesce, job.max_instances) == (None, True, 1)
        assert str(svc.scheduler.timezone) == "America/Chicago"
        real = sch.utc_now()
        expect = plant.cal.next_end(real - dt.timedelta(minutes=15)).end
        assert jobs["wake"].next_run_time == expect + dt.timedelta(minutes=15)
        assert jobs["tick"].trigger.interval == dt.timedelta(minutes=5)
        hb = read_heartbeat(plant.engine)
        assert hb.pid == os.getpid() and hb.config_hash == plant.config.hash
        assert hb.last_wake == now and hb.next_wake is not None
        # reload through the running scheduler: the tick job is rebuilt from the new config
        text = plant.config_path.read_text(encoding="utf-8")
        plant.config_path.write_text(with_keys(text, "schedule", tick_minutes=11),
                                     encoding="utf-8")
        svc.request_reload()
        wait_for(lambda: svc.scheduler.get_job("tick").trigger.interval
                 == dt.timedelta(minutes=11))
    finally:
        svc.request_stop()
        thread.join(30)
    assert codes == [0]
    hb = read_heartbeat(plant.engine)
    assert hb.status == "stopped"
    assert plant.evaluation_rows() == len(ended)


def test_light_due_count_matches_the_service(plant):
    """The lean service decides whether to start an evaluation child with its own count of
    due shifts; it must agree with service.due_shifts."""
    from qcfit import service

    plant.load(T0, T0 + dt.timedelta(days=3))
    svc = plant.service()
    try:
        for hours in (0, 5, 9, 30, 80):
            now = T0 + dt.timedelta(hours=hours)
            assert svc.due_count(now) == len(service.due_shifts(plant.engine, plant.config,
                                                                 now=now))
        svc.catch_up(now=T0 + dt.timedelta(hours=30))
        assert svc.due_count(T0 + dt.timedelta(hours=30)) == 0
        assert svc.due_count(T0 + dt.timedelta(hours=80)) == len(
            service.due_shifts(plant.engine, plant.config, now=T0 + dt.timedelta(hours=80))) > 0
    finally:
        svc.engine.dispose()


def test_evaluation_child_runs_the_last_good_config_not_the_file(plant):
    """Lean mode: the catch-up runs in ``python -m qcfit.scheduler catch-up``; with an
    invalid file on disk the child still gets the config the service runs."""
    shifts = plant.load(T0, T0 + dt.timedelta(days=1))
    svc = plant.service(isolate=True)
    try:
        good = svc.config.hash
        text = plant.config_path.read_text(encoding="utf-8")
        plant.config_path.write_text(text.replace("[lines]", "[lines\n"), encoding="utf-8")
        svc.request_reload()
        assert svc.check_reload() is False and svc.config.hash == good
        now = T0 + dt.timedelta(days=1)
        assert svc.catch_up(now=now) == []  # the summaries stay in the child
        ended = [s for s in shifts if s.end <= now]
        assert len(plant.evaluations()) == len(ended) and svc.evaluated == len(ended)
        with read_tx(plant.engine) as conn:
            hashes = set(conn.execute(select(evaluation.c.config_hash)).scalars())
        assert hashes == {good}
        assert svc.due_count(now) == 0
        assert svc.catch_up(now=now) == []  # nothing due: no child at all
        assert svc.evaluated == len(ended)
    finally:
        svc.engine.dispose()
