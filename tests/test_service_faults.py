"""The service as real processes: SIGTERM/SIGINT mid-evaluation, kill -9 at random points
during a backlog, a second instance and --standby, and the service and a CLI writer
side by side on one SQLite store.

Each service is a real OS process. To keep the file fast, most are forked from a "zygote"
process that has already imported qcfit (a fork is a real process with its own pid, killed
by a real SIGKILL; it just skips the 1-2 s of imports); one test starts ``python -m qcfit``
from scratch. Lock and crash tests also run on PostgreSQL when ``QCFIT_TEST_PG_URL`` is set.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import random
import re
import signal
import socket
import sqlite3
import subprocess
import sys
import textwrap
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import sqlalchemy as sa
from sqlalchemy import func, select

from qcfit import scheduler as sch
from qcfit.calendar import ShiftCalendar
from qcfit.config import load_config
from qcfit.ingest import load_counts_file
from qcfit.store.engine import make_engine, read_tx
from qcfit.store.heartbeat import read_heartbeat
from qcfit.store.migrate import init_store
from qcfit.store.schema import alarm, alarm_event, evaluation, finding

PG_URL = os.environ.get("QCFIT_TEST_PG_URL")
CATS = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")  # the shared test plant (tests/conftest.py)
PROPS = np.array([0.30, 0.25, 0.15, 0.12, 0.10, 0.08])
SKEW = np.array([0.10, 0.10, 0.55, 0.10, 0.10, 0.05])  # invented flash jump
LINES = ("L1", "L2", "L3", "L4")
BACKLOG_DAYS = 14

ZYGOTE = textwrap.dedent(
    """
    import ctypes, json, os, sys, time
    ctypes.CDLL("libc.so.6").prctl(1, 9)  # PR_SET_PDEATHSIG: end with the test process
    import qcfit.cli, qcfit.scheduler, qcfit.service, qcfit.ingest  # imported once, here
    print(json.dumps({"ready": os.getpid()}), flush=True)
    for line in sys.stdin:
        req = json.loads(line)
        if "spawn" in req:
            pid = os.fork()
            if pid == 0:
                fd = os.open(req["log"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
                os.dup2(fd, 1)
                os.dup2(fd, 2)
                os.dup2(os.open(os.devnull, os.O_RDONLY), 0)
                code = 1
                try:  # as the console script runs it (standalone: exit codes kept)
                    qcfit.cli.main.main(args=req["spawn"], prog_name="qcfit")
                    code = 0
                except SystemExit as exc:
                    code = exc.code if isinstance(exc.code, int) else 1
                finally:
                    sys.stdout.flush()
                    sys.stderr.flush()
                    os._exit(code)
            print(json.dumps({"pid": pid}), flush=True)
        elif "wait" in req:
            end = time.monotonic() + req["timeout"]
            out = {"running": True}
            while time.monotonic() < end:
                pid, status = os.waitpid(req["wait"], os.WNOHANG)
                if pid:
                    if os.WIFSIGNALED(status):
                        out = {"signal": os.WTERMSIG(status)}
                    else:
                        out = {"code": os.WEXITSTATUS(status)}
                    break
                time.sleep(0.01)
            print(json.dumps(out), flush=True)
    """
)


class Zygote:
    """A process with qcfit imported that forks service processes on request."""

    def __init__(self) -> None:
        env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
        self.proc = subprocess.Popen([sys.executable, "-c", ZYGOTE], stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, text=True, env=env)
        assert "ready" in self._read()

    def _read(self) -> dict:
        line = self.proc.stdout.readline()
        assert line, "zygote died"
        return json.loads(line)

    def _ask(self, req: dict) -> dict:
        self.proc.stdin.write(json.dumps(req) + "\n")
        self.proc.stdin.flush()
        return self._read()

    def spawn(self, argv: list[str], log: Path) -> int:
        return int(self._ask({"spawn": argv, "log": str(log)})["pid"])

    def wait(self, pid: int, timeout: float = 60.0) -> tuple[str, int] | None:
        out = self._ask({"wait": pid, "timeout": timeout})
        if "running" in out:
            return None
        return ("signal", out["signal"]) if "signal" in out else ("exit", out["code"])

    def close(self) -> None:
        self.proc.stdin.close()
        self.proc.wait(30)
        self.proc.stdout.close()


@pytest.fixture(scope="module")
def zygote() -> Iterator[Zygote]:
    z = Zygote()
    yield z
    z.close()


# ---------------------------------------------------------------------------------------
# a plant with a backlog, on SQLite or PostgreSQL


def _pg_schema_url() -> tuple[str, str]:
    assert PG_URL is not None
    admin = sa.create_engine(PG_URL.replace("postgresql://", "postgresql+psycopg://", 1)
                             if PG_URL.startswith("postgresql://") else PG_URL,
                             isolation_level="AUTOCOMMIT", poolclass=sa.NullPool)
    schema = f"t_{uuid.uuid4().hex[:16]}"
    with admin.connect() as conn:
        conn.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    admin.dispose()
    url = sa.engine.make_url(PG_URL).update_query_dict({"options": f"-csearch_path={schema}"})
    return url.render_as_string(hide_password=False), schema


def _drop_pg_schema(schema: str) -> None:
    admin = sa.create_engine(sa.engine.make_url(PG_URL).set(drivername="postgresql+psycopg"),
                             isolation_level="AUTOCOMMIT", poolclass=sa.NullPool)
    with admin.connect() as conn:
        conn.exec_driver_sql(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
    admin.dispose()


class Backlog:
    """Config + initialised store + counts for the last ``days`` days (shifts ended by now)."""

    def __init__(self, tmp_path: Path, text: str, url: str, *, days: int, seed: int = 7,
                 skew_every: int = 5) -> None:
        self.dir = tmp_path
        self.config_path = tmp_path / "plant.toml"
        self.config_path.write_text(text, encoding="utf-8")
        self.config = load_config(self.config_path)
        self.url = url
        self.sqlite = url.startswith("sqlite")
        self.engine = make_engine(url)
        now = sch.utc_now()
        init_store(self.engine, self.config, os_user="test", now=now)
        cal = ShiftCalendar.from_config(self.config)
        self.shifts = [s for s in cal.instances_between(now - dt.timedelta(days=days), now)
                       if s.end <= now]
        self.rng = np.random.default_rng(seed)
        self.skew_every = skew_every
        self._load(self.shifts, now)

    def _load(self, shifts: list, now: dt.datetime) -> None:
        rows = ["shift,line,category,count,units_inspected"]
        for i, s in enumerate(shifts):
            for line in LINES:
                skewed = line in ("L1", "L2") and (i + 1) % self.skew_every == 0
                for cat, c in zip(CATS, self.rng.multinomial(300, SKEW if skewed else PROPS),
                                  strict=True):
                    rows.append(f"{s.id},{line},{cat},{int(c)},25000")
        data = self.dir / f"backlog-{shifts[0].id}.csv"
        data.write_text("\n".join(rows) + "\n", encoding="utf-8")
        load_counts_file(self.engine, self.config, data, now=now, os_user="test", host="test")

    def extend_back(self, days: int) -> None:
        """Counts for ``days`` more days before the first shift (due, oldest first, so the
        next service run starts with them)."""
        first = self.shifts[0].start
        older = list(ShiftCalendar.from_config(self.config).instances_between(
            first - dt.timedelta(days=days), first))
        older = [s for s in older if s.start < first]
        self._load(older, sch.utc_now())
        self.shifts = older + self.shifts

    def argv(self, *args: str) -> list[str]:
        return ["--config", str(self.config_path), "--store", self.url, *args]

    def current(self) -> dict[int, int]:
        with read_tx(self.engine) as conn:
            rows = conn.execute(select(evaluation.c.shift_id, func.count())
                                .where(evaluation.c.is_current, evaluation.c.status == "ok")
                                .group_by(evaluation.c.shift_id)).all()
        return {int(a): int(b) for a, b in rows}

    def evaluated(self) -> int:
        return len(self.current())

    def check_whole(self) -> None:
        """Each evaluation complete, no duplicate alarms or events, store intact."""
        with read_tx(self.engine) as conn:
            cur = conn.execute(select(evaluation.c.shift_id, func.count())
                               .where(evaluation.c.is_current)
                               .group_by(evaluation.c.shift_id)).all()
            per_eval = conn.execute(
                select(func.count(finding.c.id))
                .select_from(evaluation.outerjoin(finding, finding.c.evaluation_id == evaluation.c.id))
                .where(evaluation.c.status == "ok").group_by(evaluation.c.id)).scalars().all()
            dup_alarms = conn.execute(
                select(alarm.c.kind, alarm.c.line_key, alarm.c.first_shift_id, func.count())
                .group_by(alarm.c.kind, alarm.c.line_key, alarm.c.first_shift_id)
                .having(func.count() > 1)).all()
            dup_events = conn.execute(
                select(alarm_event.c.alarm_id, alarm_event.c.action, alarm_event.c.shift_id,
                       func.count())
                .where(alarm_event.c.action.in_(["open", "update"]))
                .group_by(alarm_event.c.alarm_id, alarm_event.c.action, alarm_event.c.shift_id)
                .having(func.count() > 1)).all()
        assert all(n == 1 for _, n in cur)
        assert per_eval and set(per_eval) == {per_eval[0]} and per_eval[0] > 0
        assert dup_alarms == [] and dup_events == []
        if self.sqlite:
            with sqlite3.connect(self.url.removeprefix("sqlite:///")) as con:
                assert con.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
                assert con.execute("PRAGMA foreign_key_check").fetchall() == []


def plant_text(base: str, **extra: str) -> str:
    text = base.replace("[thresholds]\n", "[thresholds]\nmc_draws = 300\n", 1)
    text = text.replace("min_effect_w = 0.10", "min_effect_w = 0.3")
    text = text.replace("min_effect_v = 0.10", "min_effect_v = 0.3")
    # a baseline in force long before the backlog, which the kill test extends into the past
    text = text.replace("effective = 2026-01-05", "effective = 2020-01-06")
    return text + "".join(f"\n{v}\n" for v in extra.values())


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def backend_url(request, tmp_path) -> Iterator[str]:
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'plant.sqlite'}"
        return
    if PG_URL is None:
        pytest.skip("QCFIT_TEST_PG_URL not set (source .ci/start-postgres)")
    url, schema = _pg_schema_url()
    try:
        yield url
    finally:
        _drop_pg_schema(schema)


def wait_until(cond, timeout: float = 60.0, step: float = 0.02) -> None:
    end = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > end:
            raise AssertionError("condition not met in time")
        time.sleep(step)


# ---------------------------------------------------------------------------------------
# stop signals (check 3)


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "SIGINT"])
def test_stop_signal_during_an_evaluation_exits_0_between_shifts(
        zygote, tmp_path, plant_config_text, sig):
    bl = Backlog(tmp_path, plant_text(plant_config_text), f"sqlite:///{tmp_path / 'p.sqlite'}",
                 days=3 * BACKLOG_DAYS)
    try:
        pid = zygote.spawn(bl.argv("serve", "--in-process"), tmp_path / "serve.log")
        wait_until(lambda: bl.evaluated() >= 2)
        os.kill(pid, sig)
        assert zygote.wait(pid, 60) == ("exit", 0), (tmp_path / "serve.log").read_text()
        done = bl.evaluated()
        log = _text(tmp_path / "serve.log")
        assert 2 <= done < len(bl.shifts), "\n".join(
            ln[:160] for ln in log.splitlines() if "qcfit.alarms" not in ln)
        bl.check_whole()
        log = (tmp_path / "serve.log").read_text()
        assert "catch-up ended after" in log and "qcfit service stopped" in log
        hb = read_heartbeat(bl.engine)
        assert hb.pid == pid and hb.status == "stopped"
    finally:
        bl.engine.dispose()


def _children(pid: int) -> list[int]:
    """Child processes of ``pid`` (of any of its threads)."""
    out: list[int] = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            out += [int(p) for p in (task / "children").read_text().split()]
        except OSError:
            continue
    return out


def _alive(pid: int) -> bool:
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return stat.rsplit(")", 1)[1].split()[0] != "Z"


@pytest.mark.skipif(not Path("/proc/self/task").exists(), reason="needs Linux /proc")
def test_production_service_evaluates_in_a_child_that_stops_and_dies_with_it(
        tmp_path, plant_config_text):
    """``python -m qcfit serve`` as systemd starts it: the lean service process (same pid)
    runs each catch-up in an evaluation child; SIGTERM stops both cleanly, and a service
    killed by SIGKILL takes its child with it."""
    bl = Backlog(tmp_path, plant_text(plant_config_text), f"sqlite:///{tmp_path / 'p.sqlite'}",
                 days=3 * BACKLOG_DAYS)
    log = tmp_path / "serve.log"
    try:
        with log.open("w") as out:
            proc = subprocess.Popen([sys.executable, "-m", "qcfit", *bl.argv("serve")],
                                    stdout=out, stderr=subprocess.STDOUT, cwd="/")
        wait_until(lambda: len(_children(proc.pid)) == 1, timeout=120)
        (child,) = _children(proc.pid)
        wait_until(lambda: bl.evaluated() >= 1, timeout=120)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(120) == 0, _text(log)[-3000:]
        assert not _alive(child)
        text = _text(log)
        assert 1 <= bl.evaluated() < len(bl.shifts), text[-3000:]
        assert "catch-up ended after" in text  # the child's own line, logged by the service
        assert "evaluation process exited" not in text
        bl.check_whole()
        # again, now killed: the kernel ends the child too, and nothing is half-written
        with log.open("w") as out:
            proc = subprocess.Popen([sys.executable, "-m", "qcfit", *bl.argv("serve")],
                                    stdout=out, stderr=subprocess.STDOUT, cwd="/")
        wait_until(lambda: len(_children(proc.pid)) == 1, timeout=120)
        (child,) = _children(proc.pid)
        time.sleep(0.5)
        proc.kill()
        proc.wait(30)
        wait_until(lambda: not _alive(child), timeout=10)
        bl.check_whole()
    finally:
        bl.engine.dispose()


# ---------------------------------------------------------------------------------------
# kill -9 at random points (at least 20 kills during a backlog)


@pytest.mark.slow
def test_kill_9_at_random_points_loses_and_duplicates_nothing(
        zygote, tmp_path, plant_config_text, backend_url):
    bl = Backlog(tmp_path, plant_text(plant_config_text), backend_url, days=320)
    rng = random.Random(20261202)
    kills = progressed = 0
    try:
        for i in range(20):
            before = bl.evaluated()
            if len(bl.shifts) - before < 400:  # however fast evaluation gets, kill inside it
                bl.extend_back(120)
            pid = zygote.spawn(bl.argv("serve", "--in-process"), tmp_path / f"serve-{i}.log")
            if i % 4:  # anywhere: start-up, schema check, lock, scheduler, evaluation
                time.sleep(rng.uniform(0.0, 1.0))
            else:  # inside the backlog: once it has committed something, a little later
                _wait_quietly(lambda b=before: bl.evaluated() > b, 20.0)
                time.sleep(rng.uniform(0.0, 0.4))
            os.kill(pid, signal.SIGKILL)
            assert zygote.wait(pid, 30) == ("signal", signal.SIGKILL)
            kills += 1
            progressed += bl.evaluated() > before
            assert bl.evaluated() < len(bl.shifts)  # every kill fell inside the backlog
        assert kills == 20 and progressed >= 4, (kills, progressed)
        # after the crashes, one catch-up finishes the backlog
        pid = zygote.spawn(bl.argv("serve", "--in-process", "--once"), tmp_path / "once.log")
        assert zygote.wait(pid, 120) == ("exit", 0), (tmp_path / "once.log").read_text()
        current = bl.current()
        assert len(current) == len(bl.shifts) and set(current.values()) == {1}
        bl.check_whole()
    finally:
        bl.engine.dispose()


# ---------------------------------------------------------------------------------------
# one instance per store (check 10)


def test_second_instance_is_refused_and_standby_takes_over(
        zygote, tmp_path, plant_config_text, backend_url):
    bl = Backlog(tmp_path, plant_text(plant_config_text), backend_url, days=1)
    try:
        first = zygote.spawn(bl.argv("serve", "--in-process", "--beat-seconds", "0.2"),
                             tmp_path / "first.log")
        wait_until(lambda: _beat_pid(bl) == first)
        # a plain second start is refused with the holder's pid and host, exit 1
        second = zygote.spawn(bl.argv("serve", "--in-process"), tmp_path / "second.log")
        assert zygote.wait(second, 60) == ("exit", 1)
        err = (tmp_path / "second.log").read_text()
        assert f"Error: already running: pid {first} on {socket.gethostname()}" in err
        # --standby waits ...
        standby = zygote.spawn(bl.argv("serve", "--in-process", "--standby",
                                       "--poll-seconds", "0.2",
                                       "--beat-seconds", "0.2"), tmp_path / "standby.log")
        wait_until(lambda: "standby:" in _text(tmp_path / "standby.log"))
        assert zygote.wait(standby, 0.5) is None
        assert _beat_pid(bl) == first
        # ... and takes over when the first one dies (even by kill -9)
        os.kill(first, signal.SIGKILL)
        assert zygote.wait(first, 30) == ("signal", signal.SIGKILL)
        wait_until(lambda: _beat_pid(bl) == standby)
        os.kill(standby, signal.SIGTERM)
        assert zygote.wait(standby, 60) == ("exit", 0)
        assert read_heartbeat(bl.engine).status == "stopped"
    finally:
        bl.engine.dispose()


def _text(path: Path) -> str:
    return path.read_text(encoding="utf-8") if path.exists() else ""


def _wait_quietly(cond, timeout: float) -> None:
    end = time.monotonic() + timeout
    while not cond() and time.monotonic() < end:
        time.sleep(0.01)


def _beat_pid(bl: Backlog) -> int | None:
    hb = read_heartbeat(bl.engine)
    return None if hb is None or hb.status == "stopped" else hb.pid


def test_python_m_qcfit_serve_refuses_a_second_instance_from_scratch(
        zygote, tmp_path, plant_config_text):
    """The real entry point, started from scratch (imports included), as systemd does."""
    bl = Backlog(tmp_path, plant_text(plant_config_text), f"sqlite:///{tmp_path / 'p.sqlite'}",
                 days=1)
    try:
        first = zygote.spawn(bl.argv("serve", "--in-process", "--beat-seconds", "0.2"),
                             tmp_path / "first.log")
        wait_until(lambda: _beat_pid(bl) == first)
        done = subprocess.run([sys.executable, "-m", "qcfit", *bl.argv("serve")],
                              capture_output=True, text=True, timeout=120, cwd="/")
        assert done.returncode == 1
        assert f"already running: pid {first} on {socket.gethostname()}" in done.stderr
        os.kill(first, signal.SIGTERM)
        assert zygote.wait(first, 60) == ("exit", 0)
    finally:
        bl.engine.dispose()


# ---------------------------------------------------------------------------------------
# service and CLI writer side by side (check 5)

WRITER = textwrap.dedent(
    """
    import datetime as dt, json, sys, time
    from sqlalchemy import select
    from qcfit import alarmlog
    from qcfit.config import load_config
    from qcfit.errors import InvalidArgumentError, QcfitError
    from qcfit.ingest import load_counts_file
    from qcfit.store.engine import make_engine, read_tx
    from qcfit.store.schema import alarm
    # what `qcfit load counts`, `qcfit ack` and `qcfit clear` call; config loaded once
    config_path, url, folder, n, shift, limit = sys.argv[1:7]
    config, engine = load_config(config_path), make_engine(url)
    ops = {"load": 0, "ack": 0, "clear": 0, "refused": 0, "last": None, "errors": []}

    def first(state):
        with read_tx(engine) as conn:
            return conn.execute(select(alarm.c.id).where(alarm.c.state == state)
                                .order_by(alarm.c.id).limit(1)).scalar()

    print("ready", flush=True)
    sys.stdin.readline()  # go: the service has been started
    i, deadline = 0, time.monotonic() + float(limit)
    while ops["load"] + ops["ack"] + ops["clear"] + ops["refused"] < int(n):
        if time.monotonic() > deadline:
            break
        i += 1
        now = dt.datetime.now(dt.UTC)
        try:
            if i % 10 == 0:
                path = f"{folder}/w{i}.csv"
                with open(path, "w", encoding="utf-8") as f:
                    f.write(f"shift,line,category,count\\n{shift},L1,OTH,{i}\\n")
                load_counts_file(engine, config, path, now=now, os_user="writer", host="test")
                ops["load"] += 1
                ops["last"] = i
            elif (target := first("acknowledged")) is not None:
                alarmlog.clear(engine, target, by="writer", note=f"op {i}", now=now)
                ops["clear"] += 1
            elif (target := first("open")) is not None:
                alarmlog.acknowledge(engine, target, by="writer", note=f"op {i}", now=now)
                ops["ack"] += 1
            else:  # nothing to acknowledge or clear: restate the cell instead
                path = f"{folder}/w{i}.csv"
                with open(path, "w", encoding="utf-8") as f:
                    f.write(f"shift,line,category,count\\n{shift},L1,OTH,{i}\\n")
                load_counts_file(engine, config, path, now=now, os_user="writer", host="test")
                ops["load"] += 1
                ops["last"] = i
        except InvalidArgumentError as exc:  # the service changed it first: a fair refusal
            ops["refused"] += 1
        except QcfitError as exc:
            ops["errors"].append(str(exc))
    print(json.dumps(ops), flush=True)
    """
)


@pytest.mark.slow
def test_service_and_cli_writer_side_by_side(zygote, tmp_path, plant_config_text):
    bl = Backlog(tmp_path, plant_text(plant_config_text), f"sqlite:///{tmp_path / 'p.sqlite'}",
                 days=3 * BACKLOG_DAYS, skew_every=1)
    target = bl.shifts[0]  # the writer restates one cell of this shift again and again
    # The writer's own count is fixed (every iteration is a write), so the total does not depend
    # on how fast this machine is: evaluations (at least one per shift) make up the rest.
    n_writer = 1000 - len(bl.shifts)
    try:
        writer = subprocess.Popen(
            [sys.executable, "-c", WRITER, str(bl.config_path), bl.url, str(tmp_path),
             str(n_writer), target.id, "240"],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        assert writer.stdout.readline().strip() == "ready", writer.stderr.read()[-2000:]
        pid = zygote.spawn(bl.argv("serve", "--in-process", "--beat-seconds", "0.01"),
                           tmp_path / "serve.log")
        out, err = writer.communicate("go\n", timeout=300)
        assert writer.returncode == 0, err[-3000:]
        ops = json.loads(out.strip().splitlines()[-1])
        _wait_quietly(lambda: bl.evaluated() == len(bl.shifts), 120)
        log = _text(tmp_path / "serve.log")
        assert bl.evaluated() == len(bl.shifts), (bl.evaluated(), len(bl.shifts), log[-3000:])
        os.kill(pid, signal.SIGTERM)
        assert zygote.wait(pid, 60) == ("exit", 0)
        log = _text(tmp_path / "serve.log")
        assert "database is locked" not in err + log
        assert ops["errors"] == []
        writer_ops = ops["load"] + ops["ack"] + ops["clear"] + ops["refused"]
        with sqlite3.connect(tmp_path / "p.sqlite") as con:
            # no lost update on counts: the cell holds the last value written, and the
            # corrections chain from value to value with none skipped
            (count,) = con.execute(
                "SELECT d.count FROM defect_count d JOIN shift s ON s.id = d.shift_id "
                "WHERE s.shift_date = ? AND s.shift_name = ? AND d.line = 'L1' "
                "AND d.category = 'OTH'", (str(target.date), target.name)).fetchone()
            chain = con.execute(
                "SELECT old_value, new_value FROM count_correction WHERE line = 'L1' "
                "AND category = 'OTH' ORDER BY id").fetchall()
            loads = con.execute("SELECT count(*) FROM load WHERE kind = 'counts'").fetchone()[0]
            events = con.execute("SELECT alarm_id, action, from_state, to_state, by "
                                 "FROM alarm_event ORDER BY id").fetchall()
            states = dict(con.execute("SELECT id, state FROM alarm").fetchall())
            assert con.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
        assert count == ops["last"] and chain[-1][1] == ops["last"]
        assert len(chain) == ops["load"]
        assert all(b[0] == a[1] for a, b in zip(chain, chain[1:], strict=False))
        assert loads == 1 + ops["load"]  # the backlog file, then one audit row per load
        # no lost update on alarms: every state change starts from the state the one before
        # left, and each alarm ends in the state of its last change
        last: dict[int, str] = {}
        for alarm_id, _action, before, after, _by in events:
            assert before == last.get(alarm_id), (alarm_id, before, last.get(alarm_id))
            last[alarm_id] = after
        assert last == states
        by_writer = [e[1] for e in events if e[4] == "writer"]
        assert by_writer.count("acknowledge") == ops["ack"] > 0
        assert by_writer.count("clear") == ops["clear"] > 0
        # operations: the writer's, plus the service's evaluations and heartbeat rows (each
        # its own write transaction), as the service's last log line counts them
        m = re.search(r"service stopped: (\d+) shift\(s\) evaluated, (\d+) heartbeat", log)
        service_ops = int(m[1]) + int(m[2])
        assert int(m[1]) >= len(bl.shifts)
        assert writer_ops + service_ops >= 1000, (ops, service_ops)
        bl.check_whole()
    finally:
        bl.engine.dispose()
