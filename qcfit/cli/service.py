"""Service commands: ``qcfit serve``, ``qcfit status``, ``qcfit service-file --systemd``.

``serve`` runs the background service (:mod:`qcfit.scheduler`) until SIGTERM/SIGINT;
``serve --once`` runs one catch-up and exits (for plants that start it from the OS's own
scheduler). ``status`` reads the store only (it never takes the service lock for long).
"""

from __future__ import annotations

import collections
import datetime as dt
import json
import os
import sys
from pathlib import Path
from typing import Any

import click

from qcfit.cli import app, main
from qcfit.errors import EXIT_FAILURE, InvalidArgumentError

DEFAULT_WATCHDOG_SEC = 300
DEFAULT_TIMEOUT_STOP_SEC = 300
STALE_AFTER_S = 120.0  # the service beats every 30 s


def _now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


# ---------------------------------------------------------------------------------------
# serve


@main.command("serve")
@click.option("--once", is_flag=True,
              help="Run one catch-up (pull, then evaluate every ended shift not yet evaluated) "
              "and exit.")
@click.option("--standby", is_flag=True,
              help="If another service holds the store, wait until it stops instead of exiting.")
@click.option("--beat-seconds", type=click.FloatRange(0.01, 3600), default=30.0, hidden=True,
              help="Heartbeat period (for tests and tuning).")
@click.option("--poll-seconds", type=click.FloatRange(0.05, 3600), default=5.0, hidden=True,
              help="How often a standby service tries the lock (for tests and tuning).")
@click.option("--in-process", is_flag=True, hidden=True,
              help="Evaluate inside this process (no evaluation child); for tests.")
@click.pass_context
def serve_command(ctx: click.Context, once: bool, standby: bool, beat_seconds: float,
                  poll_seconds: float, in_process: bool) -> None:
    """Run the qcfit service: evaluate every shift once, after its end plus the grace period.

    Stops cleanly on SIGTERM or Ctrl-C (an evaluation in flight is finished); SIGHUP or a
    changed config file reloads the config. A second service on the same store is refused
    with the holder's pid and host (exit 1), unless --standby.
    """
    from qcfit.scheduler import Options, Service

    a = app(ctx)
    if not once and not in_process and os.name == "posix":
        # Become the lean service process (same pid, as systemd expects): without the
        # CLI's imports, evaluating in a child process per catch-up (qcfit.scheduler).
        argv = [sys.executable, "-m", "qcfit.scheduler", "serve", "--config",
                str(a.config_path.resolve()), "--beat-seconds", str(beat_seconds),
                "--poll-seconds", str(poll_seconds)]
        if a.store_url_override:
            argv += ["--store", a.store_url_override]
        if standby:
            argv.append("--standby")
        sys.stdout.flush()
        sys.stderr.flush()
        os.execv(sys.executable, argv)
    svc = Service(a.config_path, store_url=a.store_url_override,
                  options=Options(standby=standby, beat_s=beat_seconds,
                                  standby_poll_s=poll_seconds,
                                  loop_s=min(5.0, poll_seconds)))
    if once:
        done = svc.run_once()
        failed = [s for s in done if not s.ok]
        opened = sum(len(s.opened) for s in done)
        click.echo(f"{len(done)} shift(s) evaluated, {len(failed)} failed, "
                   f"{opened} alarm(s) opened")
        for s in failed:
            click.echo(f"failed: {s.shift_id}: {s.error}", err=True)
        if failed:
            ctx.exit(EXIT_FAILURE)
        return
    code = svc.run()
    if code:
        ctx.exit(code)


# ---------------------------------------------------------------------------------------
# status


def gather_status(engine: Any, config: Any, *, store_url: str, config_path: Path,
                  now: dt.datetime) -> dict[str, Any]:
    """What ``qcfit status`` shows, as a JSON-ready dict (times ISO 8601, plant time)."""
    from qcfit import alarmlog, service
    from qcfit.store.heartbeat import read_heartbeat
    from qcfit.store.lock import lock_holder
    from qcfit.store.migrate import check_schema

    tz = config.timezone

    def iso(ts: dt.datetime | None) -> str | None:
        return None if ts is None else ts.astimezone(tz).isoformat(timespec="seconds")

    check_schema(engine)
    holder = lock_holder(engine)
    hb = read_heartbeat(engine)
    waiting = service.due_shifts(engine, config, now=now)
    severities = collections.Counter(a.severity for a in alarmlog.list_alarms(engine, open_only=True))
    beat = None
    if hb is not None:
        age = hb.age_s(now)
        beat = {
            "pid": hb.pid, "host": hb.host, "started": iso(hb.started), "beat": iso(hb.beat),
            "age_s": round(age, 1), "fresh": holder is not None and age <= STALE_AFTER_S,
            "status": hb.status, "config_hash": hb.config_hash,
            "last_wake": iso(hb.last_wake), "next_wake": iso(hb.next_wake),
        }
    return {
        "store": store_url,
        "config": str(config_path),
        "config_hash": config.hash,
        "service": None if holder is None else {
            "pid": holder.pid, "host": holder.host, "since": iso(holder.since),
            "lock": holder.lock},
        "heartbeat": beat,
        "shifts_waiting": len(waiting),
        "oldest_waiting": waiting[0].id if waiting else None,
        "open_alarms": {sev: severities.get(sev, 0) for sev in ("alarm", "watch")},
    }


def status_lines(st: dict[str, Any]) -> list[str]:
    """The table form of :func:`gather_status` for a person."""
    out = [f"store:          {st['store']}",
           f"config:         {st['config']} (hash {st['config_hash'][:12]})"]
    svc = st["service"]
    if svc is None:
        out.append("service:        not running (nobody holds the store lock)")
    else:
        since = f" since {svc['since']}" if svc["since"] else ""
        out.append(f"service:        running, pid {svc['pid']} on {svc['host']}{since}")
    hb = st["heartbeat"]
    if hb is None:
        out.append("heartbeat:      none (no service has run on this store)")
    else:
        state = "fresh" if hb["fresh"] else "STALE" if svc is not None else "last"
        out.append(f"heartbeat:      {state}, {hb['beat']} ({hb['age_s']:.0f} s ago), "
                   f"status {hb['status']}, pid {hb['pid']} on {hb['host']}")
        if hb["config_hash"] and hb["config_hash"] != st["config_hash"]:
            out.append(f"                service runs config {hb['config_hash'][:12]}, "
                       "not the file's (reload pending, or the file is invalid)")
        out.append(f"last wake:      {hb['last_wake'] or '-'}")
        out.append(f"next wake:      {hb['next_wake'] or '-'}")
    oldest = f" (oldest {st['oldest_waiting']})" if st["oldest_waiting"] else ""
    out.append(f"shifts waiting: {st['shifts_waiting']}{oldest}")
    alarms = st["open_alarms"]
    out.append(f"open alarms:    {alarms['alarm']} alarm, {alarms['watch']} watch")
    return out


@main.command("status")
@click.option("--format", "fmt", type=click.Choice(["table", "json"]), default="table",
              show_default=True, help="table for reading, json for programs.")
@click.pass_context
def status_command(ctx: click.Context, fmt: str) -> None:
    """Show the store, config hash, whether a service runs, its last and next wake, the
    shifts waiting for evaluation and open alarms by severity."""
    a = app(ctx)
    from qcfit.store.engine import store_info

    st = gather_status(a.engine(), a.config(), store_url=store_info(a.engine()).url,
                       config_path=a.config_path.resolve(), now=_now())
    if fmt == "json":
        click.echo(json.dumps(st, indent=2))
    else:
        for text in status_lines(st):
            click.echo(text)


# ---------------------------------------------------------------------------------------
# service-file


def _arg(value: str) -> str:
    """One ExecStart argument, double-quoted when systemd would split it."""
    if value and not any(c in value for c in ' \t"\'\\;$%'):
        return value
    return '"' + value.replace("\\", "\\\\").replace('"', '\\"').replace("%", "%%") + '"'


def systemd_unit(*, python: str, config_path: Path, store: str | None, user: str | None,
                 group: str | None, watchdog_sec: int, timeout_stop_sec: int) -> str:
    """The text of a systemd service unit running ``qcfit serve`` for ``config_path``."""
    argv = [python, "-m", "qcfit", "--config", str(config_path)]
    if store:
        argv += ["--store", store]
    argv.append("serve")
    account = ""
    if user:
        account += f"User={user}\n"
    if group:
        account += f"Group={group}\n"
    return f"""\
# qcfit service for {config_path}
# Install: save as /etc/systemd/system/qcfit.service, then
#   systemctl daemon-reload && systemctl enable --now qcfit
# See the README, "Running as a service".
[Unit]
Description=qcfit shift quality monitor ({config_path.name})
After=network-online.target
Wants=network-online.target
StartLimitIntervalSec=600
StartLimitBurst=5

[Service]
Type=notify
NotifyAccess=main
ExecStart={" ".join(_arg(a) for a in argv)}
ExecReload=/bin/kill -HUP $MAINPID
WorkingDirectory={str(config_path.parent).replace("%", "%%")}
{account}UMask=0002
Restart=on-failure
RestartSec=10
WatchdogSec={watchdog_sec}
TimeoutStartSec=120
TimeoutStopSec={timeout_stop_sec}
KillSignal=SIGTERM
Environment=PYTHONUNBUFFERED=1

[Install]
WantedBy=multi-user.target
"""


@main.command("service-file")
@click.option("--systemd", "systemd", is_flag=True, required=True,
              help="Print a systemd unit (Linux).")
@click.option("--user", default=None, help="Account the service runs as (User=).")
@click.option("--group", default=None, help="Group of the service (Group=); share it with the "
              "operators so both can write the store folder.")
@click.option("--python", "python", default=None,
              help="Python interpreter with qcfit installed (default: this one).")
@click.option("--watchdog-sec", type=click.IntRange(60, 86400), default=DEFAULT_WATCHDOG_SEC,
              show_default=True, help="systemd restarts the service when its heartbeat is "
              "this much older.")
@click.option("--timeout-stop-sec", type=click.IntRange(10, 86400),
              default=DEFAULT_TIMEOUT_STOP_SEC, show_default=True,
              help="Time allowed for a clean stop (longer than one shift's evaluation).")
@click.pass_context
def service_file_command(ctx: click.Context, systemd: bool, user: str | None, group: str | None,
                         python: str | None, watchdog_sec: int, timeout_stop_sec: int) -> None:
    """Print a service definition that runs `qcfit serve` for this config at boot."""
    a = app(ctx)
    a.config()  # refuse to write a unit for a config that does not load
    config_path = a.config_path.resolve()
    py = python or sys.executable
    if not Path(py).is_absolute():
        raise InvalidArgumentError("--python", f"{py!r}: give an absolute path")
    if not systemd:  # pragma: no cover - click enforces the flag
        raise InvalidArgumentError("--systemd", "only systemd units are written")
    click.echo(systemd_unit(python=py, config_path=config_path, store=a.store_url_override,
                            user=user, group=group, watchdog_sec=watchdog_sec,
                            timeout_stop_sec=timeout_stop_sec), nl=False)


__all__ = ["gather_status", "status_lines", "systemd_unit"]
