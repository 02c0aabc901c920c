"""qcfit: shift-by-shift monitor of defect-category mix and defect rate per production line.

The public Python API, re-exported here (``__all__`` is pinned by a test). Names load on first
use, so ``import qcfit`` stays cheap and the pure core (``qcfit.stats``) can be imported alone::

    import datetime as dt, qcfit
    config = qcfit.load_config("plant.toml")
    engine = qcfit.make_engine(qcfit.store_url_for(config, config.path))
    now = dt.datetime.now(dt.UTC)
    qcfit.init_store(engine, config, os_user="me", now=now)
    qcfit.load_events_file(engine, config, "events.csv", now=now)
    qcfit.evaluate_due(engine, config, now=now)
    for alarm in qcfit.list_alarms(engine, open_only=True):
        print(alarm)
"""

from __future__ import annotations

import importlib
from importlib.metadata import PackageNotFoundError, version
from typing import Any

try:
    __version__ = version("qcfit")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0+unknown"

_EXPORTS: dict[str, str] = {
    # config and calendar
    "Config": "qcfit.config",
    "load_config": "qcfit.config",
    "parse_config": "qcfit.config",
    "store_url_for": "qcfit.config",
    "ShiftCalendar": "qcfit.calendar",
    "ShiftInstance": "qcfit.model",
    # store
    "make_engine": "qcfit.store.engine",
    "init_store": "qcfit.store.migrate",
    # loading
    "LoadReport": "qcfit.ingest",
    "load_events_file": "qcfit.ingest",
    "load_counts_file": "qcfit.ingest",
    "load_units_file": "qcfit.ingest",
    "pull": "qcfit.ingest",
    # evaluation and the alarm log
    "evaluate_shift": "qcfit.service",
    "evaluate_due": "qcfit.service",
    "list_alarms": "qcfit.alarmlog",
    "get_alarm": "qcfit.alarmlog",
    "alarm_story": "qcfit.alarmlog",
    "acknowledge": "qcfit.alarmlog",
    "clear": "qcfit.alarmlog",
    # report
    "write_shift_report": "qcfit.report.write",
    # errors
    "QcfitError": "qcfit.errors",
    "ConfigError": "qcfit.errors",
    "InputFileError": "qcfit.errors",
    "StoreError": "qcfit.errors",
}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name: str) -> Any:
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'qcfit' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
