"""The background service: wake at each shift end, catch up from the store, stay healthy.

One catch-up (:meth:`Service.catch_up`) is the whole job body: pull new rows when the config
has a ``[source]``, then :func:`qcfit.service.evaluate_due`, which evaluates every ended shift
with no current ``ok`` evaluation, then (with a ``[report] folder``) the shift reports of the
shifts it evaluated, after their commits (:func:`qcfit.report.write.write_after_evaluation`:
the newest ``[report] keep``; a report that cannot be written is logged and never fails the
catch-up). The store is the watermark, so a PC that was off, asleep, crashed or had its clock
changed loses no shift and evaluates none twice; the scheduler only decides *when* to look.

Scheduling (APScheduler 3.x ``BackgroundScheduler`` in the plant time zone, memory job
store rebuilt from the config at each start and reload, job defaults set explicitly:
``misfire_grace_time=None`` so a late wake still runs, ``coalesce=True``, ``max_instances=1``):

* ``start``: one catch-up as soon as the service runs;
* ``wake``: at each shift end + ``[schedule] grace_minutes``. :class:`ShiftEndTrigger` takes
  the instants from :class:`~qcfit.calendar.ShiftCalendar` (UTC arithmetic), so DST nights,
  non-production days and holidays need no cron rules: one wake per shift, at its real end;
* ``tick``: every ``[schedule] tick_minutes``, the same catch-up (covers suspend, clock jumps
  and any wake lost at shutdown);
* ``beat``: every :attr:`Options.beat_s` seconds, writes the ``heartbeat`` row; a catch-up
  writes it too.

Catch-ups never overlap (one lock); one in flight stops between two write transactions when
the service is asked to stop (each a chunk of shifts, committed whole or absent; the shifts the
catch-up had not reached are left due, so the next catch-up finishes a forward recomputation,
see :mod:`qcfit.service`).

The main thread runs ``while not stop.wait(loop)``: it re-checks the store lock (exit 1 if it
is lost, so the supervisor restarts the service), reloads the config on SIGHUP or when the
file changed (an invalid file keeps the last good config running and raises a
``service-fault`` alarm naming the problem), and sends the systemd watchdog ping only while
the heartbeat is fresh (a dead scheduler thread stops the pings, and systemd restarts us).
SIGTERM, SIGINT (and SIGBREAK on Windows) set the stop event; then the scheduler is shut down
waiting for the job in flight. This module and the CLI are the only places that read the clock.

Lean process (:attr:`Options.isolate`, what ``qcfit serve`` runs on POSIX): ``qcfit serve``
replaces itself (``exec``, same pid) with ``python -m qcfit.scheduler serve``, which never
imports the statistics stack. A catch-up with shifts due starts ``python -m qcfit.scheduler
catch-up``: it evaluates, logs each alarm change, writes the shift reports (where the
evaluation ran: the lean process never imports matplotlib either) and sends message lines
(``@qcfit {json}``) back on stdout; the service re-logs the child's lines (it stays the only
writer of the log file) and sends the notifications. SIGTERM is passed on to the child, which
stops after the write transaction in flight; the kernel kills the child if the service dies
(Linux ``PR_SET_PDEATHSIG``). ``qcfit serve --once`` and Windows evaluate in-process.
"""

from __future__ import annotations

import datetime as dt
import getpass
import logging
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from apscheduler.executors.pool import ThreadPoolExecutor
from apscheduler.jobstores.memory import MemoryJobStore
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.base import BaseTrigger
from apscheduler.triggers.interval import IntervalTrigger

from qcfit import servicelog
from qcfit.calendar import ShiftCalendar
from qcfit.config import Config, load_config, resolve_path, store_url_for, timezone_source
from qcfit.errors import AlreadyRunningError, ConfigError, QcfitError, StoreError
from qcfit.notify import Notifier
from qcfit.store.engine import make_engine, store_info, to_utc_naive, write_tx
from qcfit.store.heartbeat import (
    Heartbeat,
    alarm_changes_after,
    last_alarm_event,
    write_heartbeat,
)
from qcfit.store.lock import StoreLock, store_lock
from qcfit.store.migrate import check_schema
from qcfit.store.shifts import ensure_shifts

if TYPE_CHECKING:
    from qcfit import service

__all__ = [
    "JOB_DEFAULTS",
    "Options",
    "Service",
    "ShiftEndTrigger",
    "record_service_fault",
    "sd_notify",
    "utc_now",
]

log = logging.getLogger("qcfit.scheduler")  # also when run as __main__

JOB_DEFAULTS = {"misfire_grace_time": None, "coalesce": True, "max_instances": 1}
EXECUTOR_THREADS = 3  # start/wake/tick share one catch-up lock; beat runs beside them
FAULT_ANCHOR_TRIES = 10
_ACTION_WORDS = {"open": "opened", "update": "updated", "auto-clear": "cleared"}  # policy's
SYSTEM_USER = "qcfit"  # who the alarm log records for the service's own changes
MSG = "@qcfit "  # prefix of a message line from an evaluation child to the service


def utc_now() -> dt.datetime:
    """The clock (aware UTC). Only here and in the CLI."""
    return dt.datetime.now(dt.UTC)


# ---------------------------------------------------------------------------------------
# the wake trigger


class ShiftEndTrigger(BaseTrigger):
    """Fires at every production shift's end plus ``grace``, from the shift calendar."""

    def __init__(self, calendar: ShiftCalendar, grace: dt.timedelta) -> None:
        self.calendar = calendar
        self.grace = grace

    def get_next_fire_time(self, previous_fire_time: dt.datetime | None,
                           now: dt.datetime) -> dt.datetime | None:
        # strictly after the previous fire time; at or after now for the first one
        after = previous_fire_time if previous_fire_time is not None else now - dt.timedelta(
            microseconds=1)
        inst = self.calendar.next_end(after - self.grace)
        if inst is None:
            return None
        return (inst.end + self.grace).astimezone(self.calendar.tz)

    def __str__(self) -> str:
        return f"shift end + {self.grace}"


# ---------------------------------------------------------------------------------------
# systemd notification (a few lines over $NOTIFY_SOCKET; no-op without it)


def sd_notify(message: str, environ: dict[str, str] | None = None) -> bool:
    """Send ``message`` (``READY=1``, ``WATCHDOG=1``, ...) to systemd; False when there is
    no ``NOTIFY_SOCKET`` or it cannot be reached."""
    env = os.environ if environ is None else environ
    addr = env.get("NOTIFY_SOCKET")
    if not addr or not hasattr(socket, "AF_UNIX"):
        return False
    if addr.startswith("@"):
        addr = "\0" + addr[1:]  # abstract namespace
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
            sock.connect(addr)
            sock.sendall(message.encode("utf-8"))
    except OSError as exc:
        log.debug("sd_notify %s failed: %s", message, exc)
        return False
    return True


def watchdog_interval_s(environ: dict[str, str] | None = None) -> float | None:
    """systemd's watchdog timeout in seconds (``WATCHDOG_USEC``), or None when off or meant
    for another process (``WATCHDOG_PID``)."""
    env = os.environ if environ is None else environ
    pid = env.get("WATCHDOG_PID")
    if pid and pid.isdigit() and int(pid) != os.getpid():
        return None
    usec = env.get("WATCHDOG_USEC", "")
    return int(usec) / 1e6 if usec.isdigit() and int(usec) > 0 else None


# ---------------------------------------------------------------------------------------
# service-fault alarms outside an evaluation (config reload, pull)


def record_service_fault(engine: Any, config: Config, reason: str, *, now: dt.datetime,
                         source: str) -> tuple[int, bool] | None:
    """Raise (or update the open) plant-wide ``service-fault`` alarm for ``reason``.

    The alarm is tied to the shift running at ``now`` (or the next one); an open plant-wide
    fault alarm is updated instead of opening a second one, like a failed evaluation does.
    Returns (alarm id, newly opened), or None when the store could not be written.
    """
    from qcfit import alarmlog, policy

    cal = ShiftCalendar.from_config(config)
    summary = f"{source}: {reason}"[:500]
    details = {"error": reason, "source": source}
    try:
        with write_tx(engine) as conn:
            active = [a for a in alarmlog.active_alarms(conn)
                      if a.kind == policy.KIND_FAULT and a.line is None]
            anchor = cal.shift_at(now) or cal.next_end(now)
            if active:
                a = active[0]
                shift_id = anchor.id if anchor else (a.first_shift or "")
                row = ensure_shifts(conn, [anchor])[anchor.id] if anchor else None
                d = policy.AlarmDecision(
                    action=policy.UPDATE, kind=policy.KIND_FAULT, line=None, shift_id=shift_id,
                    alarm_id=a.id, severity=policy.ALARM, summary=summary, note=summary,
                    shifts=tuple(sorted(set(a.shifts) | {shift_id} - {""})), details=details)
                alarmlog.apply_decisions(conn, [d], shift_row_id=row, now=now,
                                         shift_start_utc=to_utc_naive(anchor.start) if anchor else None)
                return a.id, False
            return _raise_fault(conn, cal, anchor, summary, details, now)
    except QcfitError as exc:
        log.error("could not record the service fault %r: %s", summary, exc)
        return None


def _raise_fault(conn: Any, cal: ShiftCalendar, anchor: Any, summary: str,
                 details: dict[str, str], now: dt.datetime) -> tuple[int, bool]:
    from qcfit import alarmlog, policy
    from qcfit.store import alarms as alarm_rows

    for _ in range(FAULT_ANCHOR_TRIES):
        row = ensure_shifts(conn, [anchor])[anchor.id] if anchor else None
        # a cleared fault of the same shift keeps its key: move to the next shift
        if anchor is None or alarm_rows.find_by_key(conn, row, "", policy.KIND_FAULT, 0) is None:
            break
        anchor = cal.next_end(anchor.end)
    d = policy.AlarmDecision(
        action=policy.RAISE, kind=policy.KIND_FAULT, line=None,
        shift_id=anchor.id if anchor else "", severity=policy.ALARM, summary=summary,
        note=summary, shifts=(anchor.id,) if anchor else (), details=details)
    applied = alarmlog.apply_decisions(
        conn, [d], shift_row_id=row, now=now,
        shift_start_utc=to_utc_naive(anchor.start) if anchor else None)
    ids = applied.opened or applied.updated
    return int(ids[0]), bool(applied.opened)


# ---------------------------------------------------------------------------------------
# the service


@dataclass(frozen=True, slots=True)
class Options:
    """How the service runs (seconds). Defaults suit a plant PC; tests shorten them."""

    standby: bool = False
    beat_s: float = 30.0  # heartbeat job period
    stale_after_s: float | None = None  # heartbeat older than this is unhealthy; 3 beats
    loop_s: float = 5.0  # main loop: lock check, reload check, watchdog ping
    standby_poll_s: float = 5.0
    notify_backoff_s: float = 1.0
    stop_timeout_s: float = 10.0  # notifications still queued at shutdown
    # Evaluate in a child process, one per catch-up that has work: the long-lived service
    # then never imports the statistics stack (scipy, pandas), so it idles at about half
    # the memory. A catch-up with nothing due starts no child.
    isolate: bool = False

    @property
    def stale_s(self) -> float:
        return self.stale_after_s if self.stale_after_s is not None else 3 * self.beat_s


class _Stopping(Exception):
    """Raised from the progress callback to end a catch-up between two shifts."""


class Service:
    """The qcfit service for one config file (see the module docstring).

    ``clock`` returns aware UTC now; tests pass their own. ``store_url`` overrides the
    config's store (``--store``).
    """

    def __init__(self, config_path: str | Path, *, store_url: str | None = None,
                 options: Options | None = None,
                 clock: Callable[[], dt.datetime] = utc_now,
                 config: Config | None = None) -> None:
        self.config_path = Path(config_path).resolve()
        self.options = options or Options()
        self.clock = clock
        self.stop = threading.Event()
        self.exit_code = 0
        self._store_override = store_url
        self.config: Config = config if config is not None else load_config(self.config_path)
        self.store_url = self._url_for(self.config)
        self.engine = make_engine(self.store_url)
        self.notifier = Notifier(self.config.notify, backoff_s=self.options.notify_backoff_s)
        self.scheduler: BackgroundScheduler | None = None
        self.lock: StoreLock | None = None
        self._catchup = threading.Lock()
        self._reload = threading.Event()
        self._file_sig = _signature(self.config_path)
        self._bad_hash: str | None = None
        self._faults: dict[str, str] = {}  # source -> last reason recorded
        self._beat_mono: float | None = None
        self._started = self.clock()
        self._last_wake: dt.datetime | None = None
        self._status = "starting"
        self._first_pull = True
        self._host = socket.gethostname()
        self._announced: int | None = None  # alarm events up to this id are announced
        self._child_mode = False  # True in an evaluation child (see _child_main)
        self._child: subprocess.Popen[str] | None = None
        self.beats = 0  # heartbeat rows written
        self.evaluated = 0  # shifts evaluated by this process

    # --- pieces the tests call directly ----------------------------------------------

    def _url_for(self, config: Config) -> str:
        return self._store_override or store_url_for(config, self.config_path)

    def check_store(self) -> None:
        """Refuse a store that is missing, not initialised or at another schema revision."""
        check_schema(self.engine)

    def catch_up(self, now: dt.datetime | None = None) -> list[service.EvaluationSummary]:
        """ONE catch-up: pull (when ``[source]``), then evaluate every due shift.

        Never overlaps another catch-up; stops between write transactions when the service
        stops. Returns the evaluation summaries (empty when nothing was due or the pull
        failed). With :attr:`Options.isolate` the work runs in a child process (see
        :meth:`_catch_up_in_child`) and the summaries stay there (empty list here).
        """
        if self.options.isolate:
            return self._catch_up_in_child(now)
        return self._catch_up_here(now)

    def _catch_up_here(self, now: dt.datetime | None = None) -> list[service.EvaluationSummary]:
        from qcfit import service

        with self._catchup:
            now = self.clock() if now is None else now
            config = self.config
            self._last_wake = now
            self._status = "catching up"
            if self._announced is None:
                self._announced = last_alarm_event(self.engine)
            try:
                if config.source is not None and not self._pull(config, now):
                    return []
                done: list[service.EvaluationSummary] = []
                try:
                    service.evaluate_due(self.engine, config, now=now, os_user=_os_user(),
                                         progress=self._progress(done))
                except _Stopping:
                    log.info("stopping: catch-up ended after %d shift(s)", len(done))
                self.evaluated += len(done)
                self._after(done, config)
                self._reports(done, config, now)
                return done
            finally:
                self._status = "idle"
                if not self._child_mode:
                    self.beat()

    def due_count(self, now: dt.datetime) -> int:
        """How many ended shifts lack a current ``ok`` evaluation (what
        ``service.due_shifts`` returns), without importing the statistics stack."""
        from qcfit.store import evaluations as esql
        from qcfit.store.engine import from_utc_naive, read_tx

        with read_tx(self.engine) as conn:
            first = esql.earliest_shift_start(conn)
            if first is None:
                return 0
            ended = ShiftCalendar.from_config(self.config).ended_by(from_utc_naive(first), now)
            if not ended:
                return 0
            status = esql.current_status_between(
                conn, to_utc_naive(ended[0].start),
                to_utc_naive(ended[-1].start) + dt.timedelta(seconds=1))
        return sum(1 for s in ended if status.get((s.date, s.name)) != "ok")

    def _catch_up_in_child(self, now: dt.datetime | None = None) -> list[Any]:
        """The catch-up in a child process (``python -m qcfit.scheduler catch-up``): it
        pulls, evaluates, logs each alarm change and reports back on stdout; its log lines
        are re-logged here, so this process stays the only writer of the log file, and
        notifications are sent from here. The child dies with this process (Linux)."""
        with self._catchup:
            now = self.clock() if now is None else now
            self._last_wake = now
            if self._announced is None:
                self._announced = last_alarm_event(self.engine)
            try:
                if self.due_count(now) == 0:
                    return []
            except QcfitError as exc:
                log.error("cannot tell which shifts are due: %s", exc)
                return []
            self._status = "catching up"
            try:
                self._run_child(now)
            finally:
                self._status = "idle"
                self.beat()
            return []

    def _run_child(self, now: dt.datetime) -> None:
        argv = [sys.executable, "-m", "qcfit.scheduler", "catch-up", "--config",
                str(self.config_path), "--now", now.isoformat(), "--after-event",
                str(self._announced or 0)]
        if self._store_override:
            argv += ["--store", self._store_override]
        child = subprocess.Popen(argv, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                 stderr=subprocess.STDOUT, text=True, encoding="utf-8",
                                 errors="replace")
        self._child = child
        assert child.stdin is not None and child.stdout is not None
        # the config this service runs (the last good one), not whatever the file says now
        child.stdin.write(self.config.text)
        child.stdin.close()
        if self.stop.is_set():
            child.terminate()
        for line in child.stdout:
            self._from_child(line.rstrip("\n"))
        code = child.wait()
        self._child = None
        if code != 0:
            log.error("evaluation process exited with code %s", code)

    def _from_child(self, line: str) -> None:
        import json

        if not line.startswith(MSG):
            _relog(line)
            return
        msg = json.loads(line[len(MSG):])
        self._beat_mono = time.monotonic()  # the catch-up is alive
        if "notify" in msg:
            self.notifier.submit(msg["notify"])
        if "announced" in msg:
            self._announced = max(self._announced or 0, int(msg["announced"]))
        if "evaluated" in msg:
            self.evaluated += int(msg["evaluated"])

    def _progress(self, done: list[service.EvaluationSummary]
                  ) -> Callable[[int, int, service.EvaluationSummary], None]:
        from qcfit import service

        chunk = max(1, int(getattr(service, "CHUNK", 1)))

        def progress(i: int, n: int, summary: service.EvaluationSummary) -> None:
            done.append(summary)
            self._beat_mono = time.monotonic()  # a long catch-up is alive
            if self._child_mode:
                _message({"progress": i, "of": n})
            # stop only after a whole write transaction (a chunk of shifts) has committed
            if self.stop.is_set() and i < n and i % chunk == 0:
                raise _Stopping()
        return progress

    def _pull(self, config: Config, now: dt.datetime) -> bool:
        from qcfit.ingest import DEFAULT_PULL_LOOKBACK, pull

        since = now - DEFAULT_PULL_LOOKBACK
        if self._first_pull:  # after an outage, reach back to where the last run stopped
            since = min(since, self._previous_beat(now) - DEFAULT_PULL_LOOKBACK)
        try:
            report = pull(self.engine, config, now=now, since=since, os_user=_os_user(),
                          host=self._host)
        except QcfitError as exc:
            log.error("pull from [source] failed; shifts are not evaluated until it works: %s",
                      exc)
            self.fault("pull from [source]", str(exc), now=now)
            return False
        self._first_pull = False
        self._faults.pop("pull from [source]", None)
        for text in report.summary():
            log.info("pull: %s", text)
        return True

    def _previous_beat(self, now: dt.datetime) -> dt.datetime:
        from qcfit.store.heartbeat import read_heartbeat

        try:
            hb = read_heartbeat(self.engine)
        except QcfitError:
            return now
        return min(now, hb.beat) if hb is not None else now

    def _after(self, done: list[service.EvaluationSummary], config: Config) -> None:
        if done:
            log.info("catch-up: %d shift(s) evaluated, %d failed, %d alarm(s) opened",
                     len(done), sum(1 for s in done if not s.ok),
                     sum(len(s.opened) for s in done))
        self.announce(config)

    def _reports(self, done: list[service.EvaluationSummary], config: Config,
                 now: dt.datetime) -> None:
        """The shift reports of this catch-up's committed ``ok`` evaluations, written here,
        in the process that evaluated (``[report] folder``; the newest ``keep``). A report
        that cannot be written is logged; the evaluations stay committed."""
        ids = [s.shift_id for s in done if s.ok]
        if not ids or not config.report.folder:
            return
        try:
            from qcfit.report.write import write_after_evaluation

            written = write_after_evaluation(self.engine, config, ids, now=now)
        except Exception as exc:  # a report never fails the catch-up
            log.error("shift reports not written: %s: %s", type(exc).__name__, exc)
            return
        if written:
            log.info("%d shift report(s) written to %s", len(written), written[-1].parent)

    def announce(self, config: Config | None = None) -> int:
        """One log line per alarm change the service made since the last call (they are
        committed: read back from the store), and a notification per new alarm."""
        config = config or self.config
        try:
            if self._announced is None:
                self._announced = last_alarm_event(self.engine)
                return 0
            changes = alarm_changes_after(self.engine, self._announced, by=SYSTEM_USER)
        except QcfitError as exc:
            log.error("alarm changes not announced: %s", exc)
            return 0
        for event_id, alarm_id, action in changes:
            self._announce(alarm_id, _ACTION_WORDS.get(action, action), config)
            self._announced = event_id
        return len(changes)

    def _announce(self, alarm_id: int, action: str, config: Config) -> None:
        from qcfit import alarmlog

        try:
            view = alarmlog.get_alarm(self.engine, alarm_id)
        except QcfitError as exc:
            log.error("alarm %s %s (could not be read back: %s)", alarm_id, action, exc)
            return
        servicelog.log_alarm(action, view)
        if action == "opened":
            alarm = view.as_json(config.timezone)
            if self._child_mode:  # the service sends it (one notifier, one log writer)
                _message({"notify": alarm})
            else:
                self.notifier.submit(alarm)

    def fault(self, source: str, reason: str, *, now: dt.datetime | None = None) -> None:
        """Record a service fault once per distinct reason per source (no alarm spam)."""
        if self._faults.get(source) == reason:
            return
        now = self.clock() if now is None else now
        if self._announced is None:
            self._announced = last_alarm_event(self.engine)
        got = record_service_fault(self.engine, self.config, reason, now=now, source=source)
        if got is not None:
            self._faults[source] = reason
            self.announce()

    def beat(self, now: dt.datetime | None = None) -> bool:
        """Write the heartbeat row; the watchdog counts only beats that reached the store."""
        now = self.clock() if now is None else now
        hb = Heartbeat(pid=os.getpid(), host=self._host, started=self._started, beat=now,
                       last_wake=self._last_wake, next_wake=self.next_wake(),
                       config_hash=self.config.hash, status=self._status)
        try:
            write_heartbeat(self.engine, hb)
        except QcfitError as exc:
            log.error("heartbeat not written: %s", exc)
            return False
        self._beat_mono = time.monotonic()
        self.beats += 1
        return True

    def healthy(self) -> bool:
        """True while the heartbeat is fresh (see :attr:`Options.stale_s`)."""
        beat = self._beat_mono
        return beat is not None and time.monotonic() - beat <= self.options.stale_s

    def next_wake(self) -> dt.datetime | None:
        sched = self.scheduler
        if sched is None or not sched.running:
            return None
        times = [j.next_run_time for j in sched.get_jobs()
                 if j.id in ("wake", "tick", "start") and j.next_run_time is not None]
        return min(times).astimezone(dt.UTC) if times else None

    # --- config reload ------------------------------------------------------------------

    def request_reload(self) -> None:
        self._reload.set()

    def request_stop(self) -> None:
        self.stop.set()

    def check_reload(self) -> bool:
        """Reload when asked (SIGHUP) or when the file changed; True if a new config is live."""
        sig = _signature(self.config_path)
        if not self._reload.is_set() and sig == self._file_sig:
            return False
        self._reload.clear()
        self._file_sig = sig
        return self.reload()

    def reload(self) -> bool:
        """Load the config file again; an invalid one keeps the running config and raises a
        service-fault alarm naming the problem (once per distinct bad file)."""
        try:
            new = load_config(self.config_path)
            if self._url_for(new) != self.store_url:
                raise ConfigError([_problem("store.url", "changed; restart the service to use "
                                            "another store (the running one keeps the old)")],
                                  str(self.config_path))
        except ConfigError as exc:
            bad = _text_hash(self.config_path)
            log.error("config not reloaded, the last good one keeps running: %s", exc)
            if bad != self._bad_hash:
                self._bad_hash = bad
                self._faults.pop("config reload", None)
                self.fault("config reload", f"{exc}; the service keeps the previous config "
                           f"{self.config.hash[:12]}")
            return False
        self._bad_hash = None
        if new.hash == self.config.hash:
            return False
        log.info("config reloaded: %s -> %s", self.config.hash[:12], new.hash[:12])
        self.config = new
        self.notifier.settings = new.notify
        self._configure_logging(new)
        if self.scheduler is not None and self.scheduler.running:
            self._add_jobs(new, start=False)
        self.beat()
        return True

    # --- running --------------------------------------------------------------------------

    def _configure_logging(self, config: Config) -> None:
        file = resolve_path(config, config.log.file, self.config_path) if config.log.file else None
        servicelog.configure(config.log.level, file, max_bytes=config.log.max_bytes,
                             backups=config.log.backups)

    def _add_jobs(self, config: Config, *, start: bool) -> None:
        """Jobs from ``config`` (memory job store; replaced in place on reload)."""
        sched = self.scheduler
        assert sched is not None
        cal = ShiftCalendar.from_config(config)
        grace = dt.timedelta(minutes=config.schedule.grace_minutes)
        tz = config.timezone
        if start:  # no trigger: runs once, now
            sched.add_job(self._job, id="start", name="start catch-up", args=("start",))
        jobs = [
            ("wake", "shift end + grace", self._job, ("wake",), ShiftEndTrigger(cal, grace)),
            ("tick", "tick", self._job, ("tick",),
             IntervalTrigger(minutes=config.schedule.tick_minutes, timezone=tz)),
            ("beat", "heartbeat", self.beat, (),
             IntervalTrigger(seconds=self.options.beat_s, timezone=tz)),
        ]
        for job_id, name, func, args, trigger in jobs:
            sched.add_job(func, trigger, id=job_id, name=name, args=args, replace_existing=True)

    def _job(self, why: str) -> None:
        if self.stop.is_set():
            return
        try:
            done = self.catch_up()
        except Exception:  # logged; the next tick tries again
            log.exception("catch-up (%s) failed", why)
            return
        log.debug("catch-up (%s): %d shift(s)", why, len(done))

    def _make_scheduler(self, config: Config) -> BackgroundScheduler:
        return BackgroundScheduler(
            timezone=config.timezone,
            jobstores={"default": MemoryJobStore()},
            executors={"default": ThreadPoolExecutor(EXECUTOR_THREADS)},
            job_defaults=dict(JOB_DEFAULTS),
        )

    def acquire_lock(self) -> bool:
        """Take the store lock; standby waits (pinging the watchdog) until it is free.
        False when stopped while waiting."""
        self.lock = store_lock(self.engine, now=self.clock())
        while True:
            try:
                self.lock.acquire()
                return True
            except AlreadyRunningError as exc:
                if not self.options.standby:
                    raise
                self._status = "standby"
                log.info("standby: %s; waiting for the store lock", exc)
                sd_notify(f"STATUS=standby, the store is held by {exc.holder}")
                if watchdog_interval_s() is not None:
                    sd_notify("WATCHDOG=1")
                if self.stop.wait(self.options.standby_poll_s):
                    return False

    def start(self) -> bool:
        """Schema check, lock, scheduler; READY=1. False when stopped while on standby."""
        self._configure_logging(self.config)
        log.info("qcfit service starting: config %s (%s), store %s, zone %s (%s)",
                 self.config_path, self.config.hash[:12], store_info(self.engine).url,
                 self.config.timezone_name, timezone_source(self.config.timezone_name))
        self.check_store()
        if self.options.standby:
            sd_notify("READY=1\nSTATUS=standby")
        if not self.acquire_lock():
            return False
        self.scheduler = self._make_scheduler(self.config)
        self.scheduler.start()
        self._add_jobs(self.config, start=True)
        self._status = "idle"
        self.beat()
        sd_notify(f"READY=1\nSTATUS=running, config {self.config.hash[:12]}\nMAINPID={os.getpid()}")
        log.info("qcfit service running (pid %d); next wake %s", os.getpid(), self.next_wake())
        return True

    def loop_once(self) -> None:
        """One pass of the main loop: lock, reload, watchdog."""
        assert self.lock is not None
        try:
            self.lock.check()
        except StoreError as exc:
            log.critical("%s; stopping so the supervisor restarts the service", exc)
            self.exit_code = 1
            self.stop.set()
            return
        self.check_reload()
        if self.healthy():
            if watchdog_interval_s() is not None:
                sd_notify("WATCHDOG=1")
        else:
            log.warning("heartbeat is stale (scheduler not running?): no watchdog ping")

    def run(self) -> int:
        """Run until stopped; returns the exit code (0 after SIGTERM/SIGINT)."""
        with _signals(self):
            try:
                if not self.start():
                    return 0
                wd = watchdog_interval_s()
                period = min(self.options.loop_s, wd / 3) if wd else self.options.loop_s
                while not self.stop.wait(period):
                    self.loop_once()
            finally:
                self.shutdown()
        return self.exit_code

    def run_once(self) -> list[service.EvaluationSummary]:
        """``qcfit serve --once``: lock, one catch-up, release."""
        self._configure_logging(self.config)
        self.check_store()
        with _signals(self):
            if not self.acquire_lock():
                return []
            try:
                return self.catch_up()
            finally:
                self.shutdown()

    def shutdown(self) -> None:
        sd_notify("STOPPING=1")
        child = self._child
        if child is not None and child.poll() is None:
            child.terminate()  # it stops after the write transaction in flight
        if self.scheduler is not None and self.scheduler.running:
            self.scheduler.shutdown(wait=True)  # the catch-up in flight ends between shifts
        self._status = "stopped"
        self.notifier.close(self.options.stop_timeout_s)
        if self.lock is not None and self.lock.held:
            try:
                self.beat()
            finally:
                self.lock.release()
        self.engine.dispose()
        log.info("qcfit service stopped: %d shift(s) evaluated, %d heartbeat(s) written",
                 self.evaluated, self.beats)
        servicelog.reset()


# ---------------------------------------------------------------------------------------
# helpers


@contextmanager
def _signals(svc: Service) -> Iterator[None]:
    """SIGTERM/SIGINT/SIGBREAK stop, SIGHUP reloads; only from the main thread."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    wanted: dict[str, Callable[..., None]] = {
        "SIGTERM": lambda *_: svc.request_stop(),
        "SIGINT": lambda *_: svc.request_stop(),
        "SIGBREAK": lambda *_: svc.request_stop(),
        "SIGHUP": lambda *_: svc.request_reload(),
    }
    old = {}
    for name, handler in wanted.items():
        sig = getattr(signal, name, None)
        if sig is not None:
            old[sig] = signal.signal(sig, handler)
    try:
        yield
    finally:
        for sig, handler in old.items():
            signal.signal(sig, handler)


def _signature(path: Path) -> tuple[int, int] | None:
    try:
        st = path.stat()
    except OSError:
        return None
    return (st.st_mtime_ns, st.st_size)


def _text_hash(path: Path) -> str:
    import hashlib

    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError as exc:
        return f"unreadable: {exc}"


def _problem(key: str, reason: str) -> Any:
    from qcfit.errors import Problem

    return Problem(key, reason)


def _os_user() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return SYSTEM_USER


def _message(payload: dict[str, Any]) -> None:
    """A message line from an evaluation child to the service (stdout)."""
    import json

    sys.stdout.write(MSG + json.dumps(payload, default=str) + "\n")
    sys.stdout.flush()


CHILD_FORMAT = "%(levelname)s %(name)s: %(message)s"


def _relog(line: str) -> None:
    """Log a line of the evaluation child (``LEVEL name: message``) as if it were ours."""
    level_name, _, rest = line.partition(" ")
    name, sep, message = rest.partition(": ")
    level = logging.getLevelName(level_name)
    if not isinstance(level, int) or not sep:
        logging.getLogger("qcfit.scheduler.child").info("%s", line)
        return
    logging.getLogger(name).log(level, "%s", message)


def _die_with_parent() -> None:
    """Linux: the kernel kills this process when its parent dies (even by kill -9), so an
    evaluation child never outlives its service."""
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        log.debug("no PR_SET_PDEATHSIG here")


def _child_main(args: Any) -> int:
    """``python -m qcfit.scheduler catch-up``: one catch-up for the service that started it
    (which holds the store lock), then report back."""
    _die_with_parent()
    if os.getppid() == 1:
        return 1  # the service is already gone
    import tomllib

    from qcfit.config import parse_config

    logging.basicConfig(level=logging.INFO, format=CHILD_FORMAT, stream=sys.stdout, force=True)
    text = sys.stdin.read()  # the service's config text (its last good one)
    config = parse_config(tomllib.loads(text), text=text, path=Path(args.config))
    svc = Service(args.config, store_url=args.store, config=config)
    logging.getLogger().setLevel(svc.config.log.level)
    svc._child_mode = True
    svc._announced = args.after_event
    for name in ("SIGTERM", "SIGINT"):
        signal.signal(getattr(signal, name), lambda *_: svc.request_stop())
    try:
        done = svc.catch_up(dt.datetime.fromisoformat(args.now))
    finally:
        svc.engine.dispose()
    _message({"evaluated": len(done), "failed": sum(1 for d in done if not d.ok),
              "announced": svc._announced or 0})
    return 0


def _serve_main(args: Any) -> int:
    """``python -m qcfit.scheduler serve``: the service without the CLI's imports (what
    ``qcfit serve`` turns itself into on POSIX; same process id)."""
    try:
        svc = Service(args.config, store_url=args.store, options=Options(
            standby=args.standby, beat_s=args.beat_seconds, standby_poll_s=args.poll_seconds,
            loop_s=min(5.0, args.poll_seconds), isolate=True))
        return svc.run()
    except QcfitError as exc:
        sys.stderr.write(f"Error: {exc}\n")
        return exc.exit_code


def main(argv: list[str] | None = None) -> int:
    import argparse

    parser = argparse.ArgumentParser(prog="python -m qcfit.scheduler")
    sub = parser.add_subparsers(dest="command", required=True)
    child = sub.add_parser("catch-up")
    child.add_argument("--config", required=True)
    child.add_argument("--store", default=None)
    child.add_argument("--now", required=True)
    child.add_argument("--after-event", type=int, default=0)
    serve = sub.add_parser("serve")
    serve.add_argument("--config", required=True)
    serve.add_argument("--store", default=None)
    serve.add_argument("--standby", action="store_true")
    serve.add_argument("--beat-seconds", type=float, default=30.0)
    serve.add_argument("--poll-seconds", type=float, default=5.0)
    args = parser.parse_args(argv)
    return _child_main(args) if args.command == "catch-up" else _serve_main(args)


if __name__ == "__main__":
    sys.exit(main())
