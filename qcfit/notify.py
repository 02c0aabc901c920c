"""Telling people about new alarms: email over SMTP and/or a command, per ``[notify]``.

:class:`Notifier` runs a background thread with a queue. :meth:`Notifier.submit` only puts
the alarm's JSON on the queue and returns at once, so a slow mail server or a hanging
command can never block or fail an evaluation. The thread sends each alarm on every
configured channel:

* **mail**: one message per alarm to ``mail_to`` from ``mail_from`` through ``smtp_host``
  (plain SMTP, with STARTTLS when the server offers it), subject
  ``qcfit ALARM: L2 baseline, shift 2026-01-05_A``, body the summary and the JSON;
* **command**: the program in ``command`` (argv list, no shell) run once per alarm with the
  alarm's JSON on stdin (UTF-8, one object); exit code 0 is success, and it must finish
  within :data:`COMMAND_TIMEOUT_S`.

A failed send is retried up to ``retries`` more times per channel, waiting
``backoff_s * 2**attempt`` seconds between attempts (1, 2, 4 ... s by default, capped at
:data:`MAX_BACKOFF_S`). Every failure is logged; a send that fails every attempt is logged
at ERROR and dropped (the alarm itself is safe in the store). The queue holds at most
:data:`QUEUE_SIZE` alarms; beyond that new ones are logged and dropped.
"""

from __future__ import annotations

import json
import logging
import queue
import smtplib
import subprocess
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from email.message import EmailMessage
from typing import Any

__all__ = ["Delivery", "Notifier", "mail_message"]

log = logging.getLogger(__name__)

DEFAULT_BACKOFF_S = 1.0
MAX_BACKOFF_S = 300.0
SMTP_TIMEOUT_S = 20.0
COMMAND_TIMEOUT_S = 60.0
QUEUE_SIZE = 1000
_STOP = object()


@dataclass(frozen=True, slots=True)
class Delivery:
    """The outcome of sending one alarm on one channel (``mail`` or ``command``)."""

    alarm_id: int | None
    channel: str
    ok: bool
    attempts: int
    error: str | None = None


def mail_message(alarm: Mapping[str, Any], *, mail_from: str, mail_to: tuple[str, ...]
                 ) -> EmailMessage:
    """The email for one alarm (its JSON as produced by ``AlarmView.as_json``)."""
    msg = EmailMessage()
    where = " ".join(str(p) for p in (alarm.get("line") or "plant", alarm.get("kind")) if p)
    shift = ""
    if alarm.get("shift_date") and alarm.get("shift_name"):
        shift = f", shift {alarm['shift_date']}_{alarm['shift_name']}"
    severity = str(alarm.get("severity") or "alarm").upper()
    msg["Subject"] = f"qcfit {severity}: {where}{shift} (alarm {alarm.get('id')})"
    msg["From"] = mail_from
    msg["To"] = ", ".join(mail_to)
    body = [str(alarm.get("summary") or ""), "", json.dumps(alarm, indent=2, default=str)]
    msg.set_content("\n".join(body))
    return msg


class Notifier:
    """Background sender for new alarms; see the module docstring.

    ``settings`` is a :class:`qcfit.config.NotifySettings`. ``on_delivery`` (optional) is
    called in the sender thread with each :class:`Delivery` (tests and the service log use
    it). Use :meth:`close` at shutdown.
    """

    def __init__(self, settings: Any, *, backoff_s: float = DEFAULT_BACKOFF_S,
                 on_delivery: Callable[[Delivery], None] | None = None) -> None:
        self.settings = settings
        self.backoff_s = float(backoff_s)
        self._on_delivery = on_delivery
        self._queue: queue.Queue[Any] = queue.Queue(maxsize=QUEUE_SIZE)
        self._closing = threading.Event()
        self._thread: threading.Thread | None = None

    @property
    def enabled(self) -> bool:
        s = self.settings
        return bool(s.smtp_host and s.mail_to) or bool(s.command)

    def submit(self, alarm: Mapping[str, Any]) -> bool:
        """Queue one alarm for sending; returns at once (False if nothing will be sent)."""
        if not self.enabled or self._closing.is_set():
            return False
        self._start()
        try:
            self._queue.put_nowait(dict(alarm))
        except queue.Full:
            log.error("notification queue full: alarm %s not sent", alarm.get("id"))
            return False
        return True

    def close(self, timeout_s: float = 10.0) -> None:
        """Send what is queued for up to ``timeout_s`` seconds, then stop the thread."""
        self._closing.set()
        thread = self._thread
        if thread is None:
            return
        try:
            self._queue.put(_STOP, timeout=timeout_s)
        except queue.Full:
            log.warning("notification queue still full at shutdown")
        thread.join(timeout_s)
        if thread.is_alive():
            log.warning("notifications still pending at shutdown were not sent")

    def pending(self) -> int:
        return self._queue.qsize()

    # --- the sender thread -------------------------------------------------------------

    def _start(self) -> None:
        if self._thread is None or not self._thread.is_alive():
            self._thread = threading.Thread(target=self._run, name="qcfit-notify", daemon=True)
            self._thread.start()

    def _run(self) -> None:
        while True:
            item = self._queue.get()
            if item is _STOP:
                return
            for channel, send in self._channels():
                delivery = self._with_retries(item, channel, send)
                if self._on_delivery is not None:
                    try:
                        self._on_delivery(delivery)
                    except Exception:  # a listener must not stop the sender
                        log.exception("notification listener failed")

    def _channels(self) -> list[tuple[str, Callable[[Mapping[str, Any]], None]]]:
        s = self.settings
        out: list[tuple[str, Callable[[Mapping[str, Any]], None]]] = []
        if s.smtp_host and s.mail_to:
            out.append(("mail", self._send_mail))
        if s.command:
            out.append(("command", self._run_command))
        return out

    def _with_retries(self, alarm: Mapping[str, Any], channel: str,
                      send: Callable[[Mapping[str, Any]], None]) -> Delivery:
        attempts = 1 + max(0, int(self.settings.retries))
        error = None
        for attempt in range(attempts):
            try:
                send(alarm)
            except Exception as exc:  # every failure is retried, then logged
                error = f"{type(exc).__name__}: {exc}"
                log.warning("alarm %s: %s notification attempt %d of %d failed: %s",
                            alarm.get("id"), channel, attempt + 1, attempts, error)
                if attempt + 1 < attempts:
                    # an early wake-up at shutdown just retries sooner
                    self._closing.wait(min(MAX_BACKOFF_S, self.backoff_s * 2 ** attempt))
                continue
            log.info("alarm %s: %s notification sent", alarm.get("id"), channel)
            return Delivery(alarm.get("id"), channel, True, attempt + 1)
        log.error("alarm %s: %s notification failed after %d attempt(s): %s",
                  alarm.get("id"), channel, attempts, error)
        return Delivery(alarm.get("id"), channel, False, attempts, error)

    def _send_mail(self, alarm: Mapping[str, Any]) -> None:
        s = self.settings
        msg = mail_message(alarm, mail_from=s.mail_from, mail_to=tuple(s.mail_to))
        with smtplib.SMTP(s.smtp_host, int(s.smtp_port), timeout=SMTP_TIMEOUT_S) as smtp:
            smtp.ehlo()
            if smtp.has_extn("starttls"):
                smtp.starttls()
                smtp.ehlo()
            smtp.send_message(msg)

    def _run_command(self, alarm: Mapping[str, Any]) -> None:
        data = json.dumps(alarm, default=str).encode("utf-8")
        started = time.monotonic()
        done = subprocess.run(list(self.settings.command), input=data, capture_output=True,
                              timeout=COMMAND_TIMEOUT_S, check=False)
        if done.returncode != 0:
            err = done.stderr.decode("utf-8", "replace").strip().splitlines()
            raise RuntimeError(f"{self.settings.command[0]} exited with {done.returncode}"
                               + (f": {err[-1]}" if err else ""))
        log.debug("notification command finished in %.1f s", time.monotonic() - started)
