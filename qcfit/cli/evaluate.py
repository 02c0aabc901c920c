"""``qcfit evaluate --due | --shift ID | --since DATE [--until DATE]``."""

from __future__ import annotations

import datetime as dt
from collections import Counter
from collections.abc import Sequence
from typing import Any

import click

from qcfit.cli import app, main
from qcfit.errors import EvaluationError, InvalidArgumentError

PROGRESS_FROM = 20  # show a progress bar when at least this many shifts are evaluated
LISTED = 8  # shifts / alarms listed by name in the summary


def _now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


def _date(value: str | None, option: str) -> dt.date | None:
    if value is None:
        return None
    try:
        return dt.date.fromisoformat(value.strip())
    except ValueError:
        raise InvalidArgumentError(option, f"{value!r} is not a date; write it as 2026-01-05") from None


def _plant_midnight(config: Any, day: dt.date) -> dt.datetime:
    return dt.datetime.combine(day, dt.time(0), tzinfo=config.timezone)


def _run(engine: Any, config: Any, shifts: Sequence[Any] | None, now: dt.datetime,
         quiet: bool) -> list[Any]:
    from qcfit import service

    if shifts is None:
        shifts = service.due_shifts(engine, config, now=now)
    if len(shifts) < PROGRESS_FROM or quiet:
        return service.evaluate_shifts(engine, config, shifts, now=now)
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeRemainingColumn,
    )

    columns = (TextColumn("evaluating"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
               TextColumn("{task.fields[shift]}"))
    with Progress(*columns, transient=True) as bar:
        task = bar.add_task("evaluate", total=len(shifts), shift="")
        return service.evaluate_shifts(
            engine, config, shifts, now=now,
            progress=lambda i, n, s: bar.update(task, completed=i, shift=s.shift_id))


def summary_lines(results: Sequence[Any]) -> list[str]:
    """The one-screen summary after an evaluation run."""
    if not results:
        return ["Nothing to evaluate: every ended shift has a current evaluation."]
    ok = [r for r in results if r.ok]
    failed = [r for r in results if not r.ok]
    verdicts: Counter[str] = Counter()
    for r in ok:
        verdicts.update(dict(r.verdicts))
    first, last = results[0].shift_id, results[-1].shift_id
    span = first if first == last else f"{first} .. {last}"
    out = [f"Evaluated {len(results)} shift(s) ({span}): {len(ok)} ok, {len(failed)} failed."]
    forward = [r for r in results if r.forward]
    if forward:
        start = next((r.shift_id for r in results if not r.forward), first)
        out.append(f"  {len(results) - len(forward)} asked for; {len(forward)} later shift(s) "
                   f"re-evaluated too, because the sequential charts are recomputed forward "
                   f"from {start}.")
    replaced = sum(1 for r in results if r.superseded_id is not None)
    if replaced:
        out.append(f"  {replaced} earlier evaluation(s) kept as superseded.")
    if verdicts:
        out.append("  Tests: " + ", ".join(f"{v} {k}" for k, v in sorted(verdicts.items())))
    opened = [(r.shift_id, a) for r in results for a in r.opened]
    n_upd = len({a for r in results for a in r.updated})
    n_clr = len({a for r in results for a in r.cleared})
    out.append(f"  Alarms: {len(opened)} opened, {n_upd} updated, {n_clr} cleared.")
    for shift_id, alarm_id in opened[:LISTED]:
        out.append(f"    alarm {alarm_id} opened by shift {shift_id}")
    if len(opened) > LISTED:
        out.append(f"    ... and {len(opened) - LISTED} more: see `qcfit alarms --open`")
    for r in failed[:LISTED]:
        out.append(f"  FAILED {r.shift_id}: {r.error}")
    if len(failed) > LISTED:
        out.append(f"  ... and {len(failed) - LISTED} more failed shift(s)")
    return out


@main.command("evaluate")
@click.option("--due", is_flag=True, help="Every ended shift with no current evaluation (default).")
@click.option("--shift", "shift_id", metavar="ID", help="One shift, e.g. 2026-01-05_A (re-evaluates).")
@click.option("--since", metavar="DATE", help="Every ended shift starting on or after DATE (re-evaluates).")
@click.option("--until", metavar="DATE", help="With --since: shifts starting before the end of DATE.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bar.")
@click.pass_context
def evaluate_command(ctx: click.Context, due: bool, shift_id: str | None, since: str | None,
                     until: str | None, quiet: bool) -> None:
    """Evaluate ended shifts: test each line's mix and rate, decide alarms, write the log.

    Re-evaluating a shift replaces its results in one transaction; the earlier evaluation is
    kept, marked superseded. With sequential charts every later shift that has chart values is
    re-evaluated too, in order; if the run is interrupted, the shifts it had not reached are
    left for the next `evaluate --due` (or the service). Exit code 1 when an evaluation failed
    (it is recorded, with a service-fault alarm).
    """
    chosen = [name for name, v in (("--due", due), ("--shift", shift_id), ("--since", since)) if v]
    if len(chosen) > 1:
        raise InvalidArgumentError(chosen[1], f"use only one of --due, --shift, --since (got {', '.join(chosen)})")
    if until is not None and since is None:
        raise InvalidArgumentError("--until", "needs --since")
    a = app(ctx)
    config = a.config()
    engine = a.engine()
    from qcfit.calendar import ShiftCalendar
    from qcfit.service import shifts_between
    from qcfit.store.migrate import check_schema

    check_schema(engine)
    now = _now()
    shifts: list[Any] | None = None
    if shift_id:
        shift = ShiftCalendar.from_config(config).from_id(shift_id)
        if shift.end > now:
            raise InvalidArgumentError("--shift", f"shift {shift_id} has not ended yet (ends {shift.end.isoformat()})")
        shifts = [shift]
    elif since:
        start = _date(since, "--since")
        stop = _date(until, "--until")
        assert start is not None
        end = _plant_midnight(config, stop + dt.timedelta(days=1)) if stop else now
        if stop is not None and stop < start:
            raise InvalidArgumentError("--until", f"{until} is before --since {since}")
        shifts = shifts_between(config, _plant_midnight(config, start), end, now=now)
    results = _run(engine, config, shifts, now, quiet)
    for text in summary_lines(results):
        click.echo(text)
    failed = [r for r in results if not r.ok]
    if failed:
        raise EvaluationError(failed[0].shift_id, f"{len(failed)} evaluation(s) failed (recorded)")
