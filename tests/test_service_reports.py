"""The service writes the shift reports of each catch-up: ``serve --once`` (in-process), the
lean service's evaluation child, ``[report] keep``, and a report folder that cannot be
written (the evaluations stay committed, the failure is logged)."""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path

import pytest
from click.testing import CliRunner
from test_scheduler import T0, Plant, counts_csv, with_keys

from qcfit import scheduler as sch
from qcfit.calendar import ShiftCalendar
from qcfit.cli import main
from qcfit.config import load_config
from qcfit.ingest import load_counts_file
from qcfit.report.write import CATCH_UP_REPORTS
from qcfit.store.engine import make_engine
from qcfit.store.migrate import init_store

REPORT = re.compile(r"^shift-(\d{4}-\d{2}-\d{2}_[ABC])\.html$")


def reports(folder: Path) -> list[str]:
    """Shift ids of the reports in ``folder`` (sorted by name)."""
    return sorted(m.group(1) for p in folder.iterdir() if (m := REPORT.match(p.name)))


def recent_plant(tmp_path: Path, text: str, days: int = 3) -> tuple[list[str], list[str]]:
    """Config + store + counts for the shifts that ended in the last ``days`` days (the CLI
    reads the real clock). Returns the CLI's leading arguments and the ids of every due
    shift."""
    path = tmp_path / "plant.toml"
    path.write_text(text, encoding="utf-8")
    config = load_config(path)
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    engine = make_engine(url)
    now = sch.utc_now()
    init_store(engine, config, os_user="test", now=now)
    cal = ShiftCalendar.from_config(config)
    shifts = [s for s in cal.instances_between(now - dt.timedelta(days=days), now)
              if s.end <= now]
    data = counts_csv(tmp_path / "recent.csv", shifts, seed=4)
    load_counts_file(engine, config, data, now=now, os_user="test", host="test")
    # every ended shift from the earliest one in the store is due (see service.due_shifts)
    due = [s.id for s in cal.ended_by(shifts[0].start, sch.utc_now())]
    engine.dispose()
    return ["--config", str(path), "--store", url], due


def fast(text: str, **report: object) -> str:
    text = with_keys(text, "thresholds", mc_draws=300, min_effect_w=0.3, min_effect_v=0.3)
    return with_keys(text, "report", **report)


@pytest.mark.parametrize("keep", [30, 2])  # 30: the catch-up cap applies
def test_serve_once_writes_one_report_per_evaluated_shift_up_to_keep(
        tmp_path, plant_config_text, keep):
    args, due = recent_plant(tmp_path, fast(plant_config_text, folder="reports", keep=keep))
    assert len(due) >= 3  # three days, Sundays off: at least three ended shifts
    result = CliRunner().invoke(main, [*args, "serve", "--once"])
    assert result.exit_code == 0, result.output
    assert f"{len(due)} shift(s) evaluated, 0 failed" in result.output
    # the newest `keep` (at most CATCH_UP_REPORTS) of the shifts this catch-up evaluated
    newest = min(keep, CATCH_UP_REPORTS)
    assert reports(tmp_path / "reports") == sorted(due[-newest:])
    page = (tmp_path / "reports" / f"shift-{due[-1]}.html").read_text(encoding="utf-8")
    assert page.lstrip().lower().startswith("<!doctype html") and due[-1] in page


def test_an_unwritable_report_folder_does_not_fail_the_catch_up(tmp_path, plant_config_text):
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the report folder should be\n", encoding="utf-8")
    text = fast(plant_config_text, folder=str(blocker))
    text = with_keys(text, "log", file=str(tmp_path / "qcfit.log"), level="INFO")
    args, due = recent_plant(tmp_path, text)
    result = CliRunner().invoke(main, [*args, "serve", "--once"])
    assert result.exit_code == 0, result.output
    assert f"{len(due)} shift(s) evaluated, 0 failed, " in result.output
    log = (tmp_path / "qcfit.log").read_text(encoding="utf-8")
    for shift_id in due:
        assert f"shift {shift_id} evaluated" in log
    assert f"report of shift {due[-1]} not written" in log
    assert blocker.is_file()  # left alone
    # committed: nothing is due any more
    again = CliRunner().invoke(main, [*args, "serve", "--once"])
    assert again.exit_code == 0 and "0 shift(s) evaluated" in again.output


def test_the_lean_services_child_writes_the_reports(tmp_path, plant_config_text):
    """``qcfit serve`` on POSIX evaluates in ``python -m qcfit.scheduler catch-up``; the
    reports are written there, after the commits, for the shifts that child evaluated."""
    p = Plant(tmp_path, fast(plant_config_text, folder="out", keep=30))
    shifts = p.load(T0, T0 + dt.timedelta(days=1))
    now = T0 + dt.timedelta(days=1)
    svc = p.service(isolate=True)
    try:
        assert svc.catch_up(now=now) == []  # the summaries stay in the child
        ended = [s.id for s in shifts if s.end <= now]
        assert svc.evaluated == len(ended) > 0
        assert reports(tmp_path / "out") == sorted(ended)
        # a catch-up with nothing due writes nothing new
        for f in (tmp_path / "out").iterdir():
            f.unlink()
        assert svc.catch_up(now=now) == [] and reports(tmp_path / "out") == []
    finally:
        svc.engine.dispose()
        p.engine.dispose()
