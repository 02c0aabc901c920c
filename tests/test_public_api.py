"""The public API is declared once (qcfit.__all__) and every name resolves; every CLI command
has --help and appears in the README."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import click
from click.testing import CliRunner

import qcfit
from qcfit.cli import main

ROOT = Path(__file__).resolve().parents[1]

PINNED = {
    "__version__", "Config", "load_config", "parse_config", "store_url_for", "ShiftCalendar",
    "ShiftInstance", "make_engine", "init_store", "LoadReport", "load_events_file",
    "load_counts_file", "load_units_file", "pull", "evaluate_shift", "evaluate_due",
    "list_alarms", "get_alarm", "alarm_story", "acknowledge", "clear", "write_shift_report",
    "QcfitError", "ConfigError", "InputFileError", "StoreError",
}


def test_all_is_pinned():
    assert set(qcfit.__all__) == PINNED


def test_every_public_name_resolves():
    for name in qcfit.__all__:
        assert getattr(qcfit, name) is not None, name


def test_importing_qcfit_stats_does_not_load_the_store():
    code = "import sys, qcfit.stats; print('sqlalchemy' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def _commands(group: click.Group, prefix: tuple[str, ...] = ()) -> list[tuple[str, ...]]:
    out = []
    for name, cmd in group.commands.items():
        path = (*prefix, name)
        out.append(path)
        if isinstance(cmd, click.Group):
            out += _commands(cmd, path)
    return out


def test_every_command_has_help_and_is_in_the_readme():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    runner = CliRunner()
    commands = _commands(main)
    assert len(commands) >= 15
    for path in commands:
        result = runner.invoke(main, [*path, "--help"])
        assert result.exit_code == 0, (path, result.output)
        assert "Usage:" in result.output
        leaf = path[-1]
        # a group's subcommands may be listed as "baseline list | show NAME | diff V1 V2"
        pattern = rf"qcfit {re.escape(path[0])}\b" if len(path) == 1 else (
            rf"qcfit {re.escape(path[0])}\b[^\n`]*\b{re.escape(leaf)}\b")
        assert re.search(pattern, readme), f"`qcfit {' '.join(path)}` is not in the README"
