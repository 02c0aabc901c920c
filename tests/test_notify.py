"""Notifications against a real SMTP server on loopback (aiosmtpd) and a real command."""

from __future__ import annotations

import email
import json
import socket
import sys
import threading
import time

import pytest
from aiosmtpd.controller import Controller

from qcfit.config import NotifySettings
from qcfit.notify import Delivery, Notifier, mail_message

ALARM = {
    "id": 17, "kind": "baseline", "line": "L2", "shift_date": "2026-01-05", "shift_name": "A",
    "severity": "alarm", "state": "open", "summary": "flash share 2.4x baseline",
    "pvalue": 1e-6, "categories": [{"code": "FL", "direction": "up", "adjusted_residual": 6.1}],
}


class Inbox:
    """aiosmtpd handler keeping every message it receives."""

    def __init__(self) -> None:
        self.messages: list[tuple[str, list[str], bytes]] = []
        self.got = threading.Event()

    async def handle_DATA(self, server, session, envelope):  # noqa: N802 - aiosmtpd's name
        self.messages.append((envelope.mail_from, list(envelope.rcpt_tos), envelope.content))
        self.got.set()
        return "250 OK"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture
def smtp():
    inbox = Inbox()
    ctl = Controller(inbox, hostname="127.0.0.1", port=free_port())
    ctl.start()
    yield ctl, inbox
    ctl.stop()


def settings(**kw) -> NotifySettings:
    return NotifySettings(**({"retries": 3} | kw))


class Collect:
    def __init__(self) -> None:
        self.items: list[Delivery] = []
        self.done = threading.Event()
        self.expect = 1

    def __call__(self, d: Delivery) -> None:
        self.items.append(d)
        if len(self.items) >= self.expect:
            self.done.set()


def test_mail_reaches_a_local_smtp_server(smtp):
    ctl, inbox = smtp
    got = Collect()
    n = Notifier(settings(smtp_host="127.0.0.1", smtp_port=ctl.port, mail_from="qcfit@plant.test",
                          mail_to=("lead@plant.test", "qa@plant.test")), on_delivery=got)
    assert n.submit(ALARM) is True
    assert got.done.wait(20)
    n.close()
    assert got.items == [Delivery(17, "mail", True, 1)]
    sender, rcpts, raw = inbox.messages[0]
    assert (sender, rcpts) == ("qcfit@plant.test", ["lead@plant.test", "qa@plant.test"])
    msg = email.message_from_bytes(raw)
    assert msg["Subject"] == "qcfit ALARM: L2 baseline, shift 2026-01-05_A (alarm 17)"
    body = msg.get_payload(decode=True).decode()
    assert body.startswith("flash share 2.4x baseline")
    assert json.loads(body[body.index("{"):]) == ALARM


def test_mail_is_retried_with_backoff_until_the_server_is_up():
    port = free_port()
    inbox = Inbox()
    got = Collect()
    n = Notifier(settings(smtp_host="127.0.0.1", smtp_port=port, mail_from="q@p.test",
                          mail_to=("l@p.test",), retries=5), backoff_s=0.2, on_delivery=got)
    n.submit(ALARM)
    time.sleep(0.5)  # first attempts are refused: nothing listens yet
    ctl = Controller(inbox, hostname="127.0.0.1", port=port)
    ctl.start()
    try:
        assert got.done.wait(30)
    finally:
        n.close()
        ctl.stop()
    (d,) = got.items
    assert d.ok and d.channel == "mail" and d.attempts >= 2
    assert len(inbox.messages) == 1


def test_mail_gives_up_after_the_configured_retries():
    got = Collect()
    n = Notifier(settings(smtp_host="127.0.0.1", smtp_port=free_port(), mail_from="q@p.test",
                          mail_to=("l@p.test",), retries=2), backoff_s=0.05, on_delivery=got)
    n.submit(ALARM)
    assert got.done.wait(30)
    n.close()
    (d,) = got.items
    assert (d.ok, d.attempts) == (False, 3)
    assert "ConnectionRefusedError" in d.error


def test_command_gets_the_alarm_json_on_stdin(tmp_path):
    out = tmp_path / "alarm.json"
    script = "import sys, pathlib; pathlib.Path(sys.argv[1]).write_bytes(sys.stdin.buffer.read())"
    got = Collect()
    n = Notifier(settings(command=(sys.executable, "-c", script, str(out))), on_delivery=got)
    n.submit(ALARM)
    assert got.done.wait(30)
    n.close()
    assert got.items == [Delivery(17, "command", True, 1)]
    assert json.loads(out.read_text(encoding="utf-8")) == ALARM


def test_failing_command_is_retried_and_its_error_kept(tmp_path):
    marker = tmp_path / "tried"
    # fails the first time (leaves a marker), succeeds the second time
    script = ("import sys, pathlib; m = pathlib.Path(sys.argv[1])\n"
              "if not m.exists():\n    m.write_text('x'); print('printer offline', file=sys.stderr);"
              " sys.exit(3)\n")
    got = Collect()
    n = Notifier(settings(command=(sys.executable, "-c", script, str(marker))), backoff_s=0.05,
                 on_delivery=got)
    n.submit(ALARM)
    assert got.done.wait(30)
    n.close()
    assert got.items == [Delivery(17, "command", True, 2)]

    always = "import sys; print('printer offline', file=sys.stderr); sys.exit(3)"
    got2 = Collect()
    n2 = Notifier(settings(command=(sys.executable, "-c", always), retries=1), backoff_s=0.05,
                  on_delivery=got2)
    n2.submit(ALARM)
    assert got2.done.wait(30)
    n2.close()
    (d,) = got2.items
    assert not d.ok and d.attempts == 2
    assert d.error.endswith("exited with 3: printer offline")


def test_submit_returns_while_a_slow_command_still_runs(tmp_path):
    gate = tmp_path / "go"
    out = tmp_path / "out"
    script = ("import sys, time, pathlib\n"
              "while not pathlib.Path(sys.argv[1]).exists(): time.sleep(0.02)\n"
              "pathlib.Path(sys.argv[2]).write_bytes(sys.stdin.buffer.read())\n")
    got = Collect()
    got.expect = 2
    n = Notifier(settings(command=(sys.executable, "-c", script, str(gate), str(out))),
                 on_delivery=got)
    assert n.submit(ALARM) and n.submit(ALARM | {"id": 18})
    # both submits returned although the command cannot finish until the gate opens
    assert not out.exists() and got.items == []
    gate.write_text("open")
    assert got.done.wait(30)
    n.close()
    assert [d.alarm_id for d in got.items] == [17, 18]


def test_both_channels_and_nothing_configured(smtp, tmp_path):
    ctl, inbox = smtp
    out = tmp_path / "a.json"
    script = "import sys, pathlib; pathlib.Path(sys.argv[1]).write_bytes(sys.stdin.buffer.read())"
    got = Collect()
    got.expect = 2
    n = Notifier(settings(smtp_host="127.0.0.1", smtp_port=ctl.port, mail_from="q@p.test",
                          mail_to=("l@p.test",), command=(sys.executable, "-c", script, str(out))),
                 on_delivery=got)
    n.submit(ALARM)
    assert got.done.wait(30)
    n.close()
    assert sorted(d.channel for d in got.items) == ["command", "mail"]
    assert all(d.ok for d in got.items)
    off = Notifier(settings())
    assert off.enabled is False and off.submit(ALARM) is False
    off.close()


def test_mail_message_for_a_plant_wide_fault():
    msg = mail_message({"id": 3, "kind": "service-fault", "line": None, "severity": "alarm",
                        "summary": "config reload: thresholds.alarm_level: must be in (0, 1)"},
                       mail_from="q@p.test", mail_to=("l@p.test",))
    assert msg["Subject"] == "qcfit ALARM: plant service-fault (alarm 3)"
    assert msg["To"] == "l@p.test"


def test_each_alarm_opened_by_a_catch_up_runs_the_command(tmp_path, plant_config_text):
    """End to end: the service's catch-up opens alarms; the command gets each one's JSON."""
    import datetime as dt

    from test_scheduler import T0, Plant, with_keys

    out = tmp_path / "alarms.jsonl"
    script = ("import sys; open(sys.argv[1], 'a', encoding='utf-8')"
              ".write(sys.stdin.read().strip() + '\\n')")
    text = with_keys(plant_config_text, "thresholds", mc_draws=500, min_effect_w=0.3,
                     min_effect_v=0.3)
    cmd = ", ".join(json.dumps(a) for a in (sys.executable, "-c", script, str(out)))
    text += f"\n[notify]\ncommand = [{cmd}]\nretries = 1\n"
    plant = Plant(tmp_path, text)
    shifts = plant.load(T0, T0 + dt.timedelta(days=1))
    plant.load(T0, T0 + dt.timedelta(days=1), seed=2, skew={s.id: {"L3"} for s in shifts})
    svc = plant.service()
    try:
        done = svc.catch_up(now=T0 + dt.timedelta(days=1, hours=1))
        svc.notifier.close(30)
    finally:
        svc.engine.dispose()
        plant.engine.dispose()
    opened = sorted(a for d in done for a in d.opened)
    assert opened
    sent = [json.loads(line) for line in out.read_text(encoding="utf-8").splitlines()]
    assert sorted(a["id"] for a in sent) == opened
    assert {a["state"] for a in sent} == {"open"}
