"""Shared fixtures. Append new fixtures at the end; keep each one small and documented."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

# A small valid plant: 3 shifts (C crosses midnight), 4 lines, 6 categories, one "*"
# baseline and [thresholds]. Invented figures for tests only.
PLANT_CONFIG_TEXT = """\
[plant]
name = "Test plant"
timezone = "America/Chicago"
non_production_days = ["Sun"]

[[shift]]
name = "A"
start = "06:00"
end = "14:00"

[[shift]]
name = "B"
start = "14:00"
end = "22:00"

[[shift]]
name = "C"
start = "22:00"
end = "06:00"

[lines]
L1 = "Line 1"
L2 = "Line 2"
L3 = "Line 3"
L4 = "Line 4"

[categories]
SCR = "scratch"
DNT = "dent"
FL = "flash"
SH = "short shot"
BUR = "burr"
OTH = "other"

[thresholds]
alarm_level = 0.01
watch_level = 0.05
min_effect_w = 0.30
min_effect_v = 0.15
multiple_testing = "bh"

[baseline.plant]
lines = "*"
effective = 2026-01-05
proportions = { SCR = 0.30, DNT = 0.25, FL = 0.15, SH = 0.12, BUR = 0.10, OTH = 0.08 }
rate = 0.012
"""


@pytest.fixture
def plant_config_text() -> str:
    """TOML text of a small valid plant config (America/Chicago, shifts A/B/C, L1-L4,
    categories SCR DNT FL SH BUR OTH, one "*" baseline effective 2026-01-05)."""
    return PLANT_CONFIG_TEXT


def _write_config(tmp_path: Path, text: str, name: str = "plant.toml") -> Path:
    path = Path(tmp_path) / name
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture
def write_config():
    """``write_config(tmp_path, text, name="plant.toml") -> Path``: write a UTF-8 config."""
    return _write_config


@pytest.fixture(autouse=True)
def _clear_qcfit_env(monkeypatch: pytest.MonkeyPatch) -> None:
    """No test sees the developer's QCFIT_* environment variables (QCFIT_CONFIG, QCFIT_STORE,
    ...). Test-infrastructure variables named QCFIT_TEST_* (e.g. QCFIT_TEST_PG_URL) stay."""
    for key in list(os.environ):
        if key.startswith("QCFIT_") and not key.startswith("QCFIT_TEST_"):
            monkeypatch.delenv(key, raising=False)


@pytest.fixture
def plant_store(tmp_path: Path, plant_config_text: str):
    """An initialised SQLite store for the test plant (``plant_config_text``).

    Returns a namespace with ``config_path``, ``config``, ``url``, ``engine`` (disposed
    after the test) and ``dump()`` -> {table: sorted rows} of every table, for "the store
    is unchanged" checks.
    """
    import datetime as dt
    import sqlite3
    from types import SimpleNamespace

    from qcfit.config import load_config
    from qcfit.store.engine import make_engine
    from qcfit.store.migrate import init_store

    config_path = _write_config(tmp_path, plant_config_text)
    config = load_config(config_path)
    db = tmp_path / "plant.sqlite"
    url = f"sqlite:///{db}"
    engine = make_engine(url)
    init_store(engine, config, os_user="tester", now=dt.datetime(2026, 1, 1, tzinfo=dt.UTC))

    def dump() -> dict[str, list[tuple]]:
        with sqlite3.connect(db) as con:
            names = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")]
            return {n: sorted(con.execute(f'SELECT * FROM "{n}"').fetchall(), key=repr) for n in names}

    yield SimpleNamespace(config_path=config_path, config=config, url=url, engine=engine, dump=dump)
    engine.dispose()
