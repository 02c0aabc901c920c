"""The service's log: a rotating log file plus stderr, and one line per alarm change.

* :func:`configure` sets up the root logger of the service process: stderr (which systemd
  puts in the journal) and, when ``[log] file`` is set, a rotating file (``max_bytes``,
  ``backups``). Only the service writes this file; the CLI logs to stderr only, because
  Python's logging does not support several processes writing one file.
  The ``apscheduler`` loggers are set explicitly: ``apscheduler.scheduler`` at INFO,
  ``apscheduler.executors.default`` at WARNING (missed runs; job tracebacks at ERROR).
* :func:`log_alarm` writes one alarm as one line, after the transaction that wrote it has
  committed, carrying the alarm id: the store is the source of truth and the file can be
  regenerated from it. Logger ``qcfit.alarms``; the line looks like
  ``alarm 17 opened: severity=alarm kind=baseline line=L2 shift=2026-01-05_A state=open:
  flash up ...``.
"""

from __future__ import annotations

import logging
import logging.handlers
import sys
from pathlib import Path
from typing import Any

__all__ = ["ALARM_LOGGER", "FORMAT", "configure", "log_alarm", "reset"]

FORMAT = "%(asctime)s %(levelname)s %(name)s: %(message)s"
ALARM_LOGGER = "qcfit.alarms"
_MARK = "_qcfit_service_handler"

alarm_log = logging.getLogger(ALARM_LOGGER)


def _mark(handler: logging.Handler) -> logging.Handler:
    setattr(handler, _MARK, True)
    handler.setFormatter(logging.Formatter(FORMAT))
    return handler


def reset() -> None:
    """Remove (and close) the handlers :func:`configure` added to the root logger."""
    root = logging.getLogger()
    for h in list(root.handlers):
        if getattr(h, _MARK, False):
            root.removeHandler(h)
            h.close()


def configure(level: str = "INFO", file: Path | None = None, *, max_bytes: int = 10_000_000,
              backups: int = 5, stderr: bool = True) -> None:
    """(Re)configure the service's logging: stderr and an optional rotating ``file``.

    Replaces every handler on the root logger (the service owns its process), so calling it
    again after a config reload switches level and file without duplicating lines.
    """
    root = logging.getLogger()
    for h in list(root.handlers):
        # ours from an earlier call, and the plain stderr handler of the CLI's basicConfig
        if getattr(h, _MARK, False) or type(h) is logging.StreamHandler:
            root.removeHandler(h)
            if getattr(h, _MARK, False):
                h.close()
    if stderr:
        root.addHandler(_mark(logging.StreamHandler(sys.stderr)))
    if file is not None:
        file.parent.mkdir(parents=True, exist_ok=True)
        root.addHandler(_mark(logging.handlers.RotatingFileHandler(
            file, maxBytes=max_bytes, backupCount=backups, encoding="utf-8", delay=True)))
    root.setLevel(getattr(logging, level.upper(), logging.INFO))
    # Set explicitly: the scheduler's own messages at INFO; the executor logs every job run
    # at INFO (a heartbeat every 30 s), so only its warnings (missed runs) and errors (job
    # tracebacks) are kept.
    logging.getLogger("apscheduler").setLevel(logging.INFO)
    logging.getLogger("apscheduler.scheduler").setLevel(logging.INFO)
    logging.getLogger("apscheduler.executors.default").setLevel(logging.WARNING)


def _clean(text: Any) -> str:
    return " ".join(str(text).split())


def log_alarm(action: str, alarm: Any) -> str:
    """Write one line for an alarm that was ``action`` (opened, updated, cleared); call it
    only after the alarm's transaction committed. ``alarm`` is an
    :class:`qcfit.alarmlog.AlarmView`. Returns the line written."""
    line = (
        f"alarm {alarm.id} {action}: severity={alarm.severity} kind={alarm.kind} "
        f"line={alarm.line or '-'} shift={alarm.shift_id or '-'} state={alarm.state}: "
        f"{_clean(alarm.summary)}"
    )
    level = logging.WARNING if action == "opened" else logging.INFO
    alarm_log.log(level, "%s", line)
    return line
