"""``qcfit serve --once``, ``qcfit status`` and ``qcfit service-file --systemd`` in-process
(click's CliRunner) against real files in tmp_path."""

from __future__ import annotations

import datetime as dt
import json
import os
import shutil
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from qcfit import scheduler as sch
from qcfit.calendar import ShiftCalendar
from qcfit.cli import main
from qcfit.config import load_config
from qcfit.ingest import load_counts_file
from qcfit.store.engine import make_engine
from qcfit.store.migrate import init_store

CATS = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")  # the shared test plant (tests/conftest.py)
PROPS = np.array([0.30, 0.25, 0.15, 0.12, 0.10, 0.08])
SKEW = np.array([0.10, 0.10, 0.55, 0.10, 0.10, 0.05])  # invented flash jump


@pytest.fixture
def plant(tmp_path, plant_config_text):
    """The test plant with the last 3 days of counts loaded (shifts ended by now)."""
    text = plant_config_text.replace("[thresholds]\n", "[thresholds]\nmc_draws = 300\n", 1)
    text = text.replace("min_effect_w = 0.10", "min_effect_w = 0.3")
    path = tmp_path / "plant.toml"
    path.write_text(text, encoding="utf-8")
    config = load_config(path)
    engine = make_engine(f"sqlite:///{tmp_path / 'plant.sqlite'}")
    now = sch.utc_now()
    init_store(engine, config, os_user="test", now=now)
    cal = ShiftCalendar.from_config(config)
    shifts = [s for s in cal.instances_between(now - dt.timedelta(days=3), now)
              if s.end <= now]
    rng = np.random.default_rng(5)
    rows = ["shift,line,category,count,units_inspected"]
    for i, s in enumerate(shifts):
        for line in ("L1", "L2", "L3", "L4"):
            p = SKEW if line == "L2" and i == len(shifts) - 1 else PROPS
            rows += [f"{s.id},{line},{c},{int(v)},25000"
                     for c, v in zip(CATS, rng.multinomial(300, p), strict=True)]
    data = tmp_path / "counts.csv"
    data.write_text("\n".join(rows) + "\n", encoding="utf-8")
    load_counts_file(engine, config, data, now=now, os_user="test", host="test")
    engine.dispose()
    return path, shifts


def cli(*args: str):
    return CliRunner().invoke(main, list(args), catch_exceptions=False)


# ---------------------------------------------------------------------------------------
# status


def test_status_of_a_store_no_service_has_run_on(plant):
    path, shifts = plant
    res = cli("--config", str(path), "status")
    assert res.exit_code == 0, res.output
    lines = res.output.splitlines()
    config = load_config(path)
    assert lines[0] == f"store:          sqlite:///{path.parent / 'plant.sqlite'}"
    assert lines[1] == f"config:         {path} (hash {config.hash[:12]})"
    assert lines[2] == "service:        not running (nobody holds the store lock)"
    assert lines[3] == "heartbeat:      none (no service has run on this store)"
    assert lines[4] == f"shifts waiting: {len(shifts)} (oldest {shifts[0].id})"
    assert lines[5] == "open alarms:    0 alarm, 0 watch"


def test_serve_once_then_status_with_a_running_service(plant):
    path, shifts = plant
    res = cli("--config", str(path), "serve", "--once")
    assert res.exit_code == 0, res.output
    first = res.output.splitlines()[-1]
    assert first.startswith(f"{len(shifts)} shift(s) evaluated, 0 failed, ")
    opened = int(first.split(", ")[2].split()[0])
    assert opened >= 1  # the skewed last shift on L2
    # a service holds the lock and has beaten
    svc = sch.Service(path)
    try:
        assert svc.acquire_lock()
        assert svc.beat()
        res = cli("--config", str(path), "status", "--format", "json")
        st = json.loads(res.output)
        assert st["service"]["pid"] == os.getpid()
        assert st["service"]["host"] == socket.gethostname()
        assert st["heartbeat"]["fresh"] is True and st["heartbeat"]["status"] == "starting"
        assert st["heartbeat"]["config_hash"] == st["config_hash"] == svc.config.hash
        assert st["shifts_waiting"] == 0 and st["oldest_waiting"] is None
        assert sum(st["open_alarms"].values()) >= 1
        table = cli("--config", str(path), "status").output
        assert f"service:        running, pid {os.getpid()} on {socket.gethostname()}" in table
        assert "heartbeat:      fresh, " in table
        assert "shifts waiting: 0\n" in table
        # a second service is refused, naming the holder; exit 1
        res = CliRunner().invoke(main, ["--config", str(path), "serve", "--once"])
        assert res.exit_code == 1
        assert f"Error: already running: pid {os.getpid()} on {socket.gethostname()}" in res.output
    finally:
        svc.lock.release()
        svc.engine.dispose()


def test_status_on_an_uninitialised_store_says_what_to_do(tmp_path, plant_config_text):
    path = tmp_path / "plant.toml"
    path.write_text(plant_config_text, encoding="utf-8")
    res = CliRunner().invoke(main, ["--config", str(path), "status"])
    assert res.exit_code == 1
    assert res.output == "Error: store not initialised: run `qcfit init`\n"


# ---------------------------------------------------------------------------------------
# service-file


def unit_text(path: Path, *extra: str) -> str:
    res = cli("--config", str(path), "service-file", "--systemd", *extra)
    assert res.exit_code == 0, res.output
    return res.output


def test_systemd_unit_runs_serve_for_this_config(plant):
    path, _ = plant
    text = unit_text(path, "--user", "qcfit", "--group", "quality")
    unit, service = text.split("[Service]")
    assert "StartLimitIntervalSec=600" in unit and "StartLimitBurst=5" in unit
    for line in ("Type=notify", "Restart=on-failure", "WatchdogSec=300", "UMask=0002",
                 "TimeoutStopSec=300", f"WorkingDirectory={path.parent}", "User=qcfit",
                 "Group=quality", f"ExecStart={sys.executable} -m qcfit --config {path} serve"):
        assert f"\n{line}\n" in service, line


def test_systemd_unit_quotes_paths_with_spaces(tmp_path, plant_config_text):
    folder = tmp_path / "qc data"
    folder.mkdir()
    path = folder / "my plant.toml"
    path.write_text(plant_config_text, encoding="utf-8")
    text = unit_text(path)
    assert f'--config "{path}" serve' in text
    assert f"\nWorkingDirectory={folder}\n" in text


@pytest.mark.skipif(shutil.which("systemd-analyze") is None, reason="no systemd-analyze here")
@pytest.mark.parametrize("spaces", [False, True])
def test_systemd_analyze_verify_accepts_the_unit(tmp_path, plant_config_text, spaces):
    folder = tmp_path / ("qc data" if spaces else "qc")
    folder.mkdir()
    path = folder / "plant.toml"
    path.write_text(plant_config_text, encoding="utf-8")
    unit = tmp_path / "qcfit.service"
    unit.write_text(unit_text(path), encoding="utf-8")
    done = subprocess.run(["systemd-analyze", "verify", str(unit)], capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert "qcfit.service" not in done.stderr


def test_service_file_refuses_a_bad_config_or_relative_python(tmp_path, plant_config_text):
    bad = tmp_path / "bad.toml"
    bad.write_text(plant_config_text.replace('"America/Chicago"', '"Mars/Olympus"'),
                   encoding="utf-8")
    res = CliRunner().invoke(main, ["--config", str(bad), "service-file", "--systemd"])
    assert res.exit_code == 2
    assert res.output.startswith(f"Error: config {bad} has 1 problem(s):\n  plant.timezone:")
    good = tmp_path / "plant.toml"
    good.write_text(plant_config_text, encoding="utf-8")
    res = CliRunner().invoke(main, ["--config", str(good), "service-file", "--systemd",
                                    "--python", "python3"])
    assert res.exit_code == 2
    assert res.output == "Error: --python: 'python3': give an absolute path\n"


@pytest.mark.parametrize("command", ["serve", "status", "service-file"])
def test_every_service_command_has_help(command):
    res = cli(command, "--help")
    assert res.exit_code == 0 and res.output.startswith(f"Usage: main {command} [OPTIONS]")
