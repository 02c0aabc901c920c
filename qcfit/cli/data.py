"""Data commands: ``qcfit load events|counts|units FILE``, ``qcfit counts``, ``qcfit pull``,
``qcfit loads``.

File formats and load rules: see :mod:`qcfit.ingest` (and the README's "Data formats").
"""

from __future__ import annotations

import csv
import datetime as dt
import getpass
import io
import json
import socket
from collections.abc import Sequence
from typing import Any

import click
import pandas as pd

from qcfit.calendar import ShiftCalendar
from qcfit.cli import app, main
from qcfit.errors import InvalidArgumentError
from qcfit.ingest import (
    REJECTS_SUFFIX,
    LoadReport,
    load_counts_file,
    load_events_file,
    load_units_file,
    pull,
    spreadsheet_safe,
)
from qcfit.store.defects import list_loads, read_counts
from qcfit.store.engine import read_tx

FORMATS = ("table", "csv", "json")
JSON_FIELDS = ("shift_date", "shift_name", "shift_start", "shift_end", "line", "category", "count")


def _now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


def _who() -> dict[str, str]:
    try:
        user = getpass.getuser()
    except (KeyError, OSError):  # no login name (a service account without one)
        user = "unknown"
    return {"os_user": user, "host": socket.gethostname()}


def _echo_report(report: LoadReport) -> None:
    for text in report.summary():
        click.echo(text)


_skip_bad = click.option(
    "--skip-bad",
    is_flag=True,
    help="Load the good rows and write the bad ones to a rejects file (default: any bad row "
    "rejects the whole file).",
)
_rejects = click.option(
    "--rejects",
    "rejects",
    type=click.Path(dir_okay=False),
    default=None,
    help=f"Where --skip-bad writes the bad rows (default: FILE's name with {REJECTS_SUFFIX}).",
)


@main.group("load")
def load_group() -> None:
    """Load defect data or units inspected from a CSV file into the store (one transaction
    per file)."""


@load_group.command("events")
@click.argument("file", type=click.Path(dir_okay=False))
@_skip_bad
@_rejects
@click.option(
    "--ambiguous",
    type=click.Choice(["raise", "earlier", "later"]),
    default="raise",
    show_default=True,
    help="A naive local time in the repeated hour of an autumn clock change: a bad row "
    "(raise), or its first (earlier) or second (later) occurrence.",
)
@click.pass_context
def load_events_command(
    ctx: click.Context, file: str, skip_bad: bool, rejects: str | None, ambiguous: str
) -> None:
    """Load defect events: columns timestamp,line,category[,quantity].

    Timestamps are ISO 8601 with an offset (converted) or plant-local (naive). Counts of
    every shift and line the events touch are recomputed from all stored events, so loading
    the same events again changes nothing.
    """
    a = app(ctx)
    report = load_events_file(
        a.engine(),
        a.config(),
        file,
        now=_now(),
        skip_bad=skip_bad,
        rejects=rejects,
        ambiguous=ambiguous,
        **_who(),
    )
    _echo_report(report)


@load_group.command("counts")
@click.argument("file", type=click.Path(dir_okay=False))
@_skip_bad
@_rejects
@click.pass_context
def load_counts_command(ctx: click.Context, file: str, skip_bad: bool, rejects: str | None) -> None:
    """Load per-shift counts: columns shift,line,category,count[,units_inspected].

    shift is the shift id (local start date and shift name, e.g. 2026-01-05_A). A cell that
    restates a stored value differently is recorded as a correction.
    """
    a = app(ctx)
    report = load_counts_file(
        a.engine(), a.config(), file, now=_now(), skip_bad=skip_bad, rejects=rejects, **_who()
    )
    _echo_report(report)


@load_group.command("units")
@click.argument("file", type=click.Path(dir_okay=False))
@_skip_bad
@_rejects
@click.pass_context
def load_units_command(ctx: click.Context, file: str, skip_bad: bool, rejects: str | None) -> None:
    """Load units inspected per shift and line: columns shift,line,units_inspected.

    For lines whose counts come from defect events (or to restate the units of a counts
    file): the rate test needs the units. A value that restates a stored one differently is
    recorded as a correction.
    """
    a = app(ctx)
    report = load_units_file(
        a.engine(), a.config(), file, now=_now(), skip_bad=skip_bad, rejects=rejects, **_who()
    )
    _echo_report(report)


def _date(value: str | None, option: str) -> dt.date | None:
    if value is None:
        return None
    try:
        return dt.date.fromisoformat(value.strip())
    except ValueError:
        raise InvalidArgumentError(
            option, f"{value!r} is not a date; write it as 2026-01-05"
        ) from None


@main.command("counts")
@click.option(
    "--since", default=None, help="First shift date (local start date, YYYY-MM-DD), inclusive."
)
@click.option("--until", default=None, help="Last shift date (YYYY-MM-DD), inclusive.")
@click.option("--line", "lines", multiple=True, help="Only this line code (repeat for several).")
@click.option(
    "--format",
    "fmt",
    type=click.Choice(FORMATS),
    default="table",
    show_default=True,
    help="table for reading, csv for a spreadsheet, json for programs.",
)
@click.pass_context
def counts_command(
    ctx: click.Context, since: str | None, until: str | None, lines: Sequence[str], fmt: str
) -> None:
    """Print stored defect counts per shift x line x category."""
    a = app(ctx)
    config = a.config()
    first, last = _date(since, "--since"), _date(until, "--until")
    if first and last and first > last:
        raise InvalidArgumentError("--until", f"{last} is before --since {first}")
    unknown = [code for code in lines if code not in config.lines]
    if unknown:
        raise InvalidArgumentError(
            "--line", f"unknown line {unknown[0]!r}; the config has {', '.join(config.lines)}"
        )
    with read_tx(a.engine()) as conn:
        frame = read_counts(
            conn, since=first, until=last, lines=list(lines) or None, tz=config.timezone
        )
    if fmt == "json":
        click.echo(json.dumps(counts_json(frame), indent=2))
    elif fmt == "csv":
        click.echo(counts_csv(frame), nl=False)
    else:
        for text in counts_table(frame, list(config.categories)):
            click.echo(text)


def counts_json(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """Rows for ``--format json`` (dates as YYYY-MM-DD, times ISO 8601 with offset)."""
    return [
        {
            "shift_date": r.shift_date.isoformat(),
            "shift_name": str(r.shift_name),
            "shift_start": r.shift_start.isoformat(),
            "shift_end": r.shift_end.isoformat(),
            "line": str(r.line),
            "category": str(r.category),
            "count": int(r.count),
        }
        for r in frame.itertuples(index=False)
    ]


def counts_csv(frame: pd.DataFrame) -> str:
    """``--format csv``: one row per cell; text a spreadsheet would run as a formula is
    prefixed with ``'``."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(JSON_FIELDS)
    for row in counts_json(frame):
        writer.writerow([spreadsheet_safe(v) if isinstance(v, str) else v for v in row.values()])
    return buf.getvalue()


def counts_table(frame: pd.DataFrame, categories: Sequence[str]) -> list[str]:
    """``--format table``: one line per shift x line, one column per category, and the total."""
    if len(frame) == 0:
        return ["no counts stored for this selection"]
    cats = list(categories) + sorted(set(frame["category"]) - set(categories))
    wide = frame.assign(
        shift=[
            f"{d.isoformat()}_{n}"
            for d, n in zip(frame["shift_date"], frame["shift_name"], strict=True)
        ]
    )
    pivot = wide.pivot_table(
        index=["shift", "line"],
        columns="category",
        values="count",
        aggfunc="sum",
        fill_value=0,
        sort=False,
    )
    pivot = pivot.reindex(columns=[c for c in cats if c in pivot.columns])
    header = ["shift", "line", *pivot.columns, "total"]
    body = [
        [s, li, *(str(int(v)) for v in vals), str(int(sum(vals)))]
        for (s, li), vals in zip(pivot.index, pivot.to_numpy().tolist(), strict=True)
    ]
    widths = [max(len(str(row[i])) for row in [header, *body]) for i in range(len(header))]
    out = []
    for row in [header, *body]:
        cells = [
            str(v).ljust(widths[i]) if i < 2 else str(v).rjust(widths[i]) for i, v in enumerate(row)
        ]
        out.append("  ".join(cells).rstrip())
    return out


def _since_instant(value: str | None, calendar: ShiftCalendar) -> dt.datetime | None:
    if value is None:
        return None
    text = value.strip()
    try:
        if len(text) == 10:
            midnight = dt.datetime.combine(dt.date.fromisoformat(text), dt.time())
            return calendar.localize(midnight, ambiguous="earlier", nonexistent="forward")
        stamp = dt.datetime.fromisoformat(text)
    except ValueError:
        raise InvalidArgumentError(
            "--since",
            f"{value!r} is not a date or ISO 8601 time (e.g. 2026-01-05 or 2026-01-05T06:00-06:00)",
        ) from None
    if stamp.tzinfo is None:
        return calendar.localize(stamp, ambiguous="earlier", nonexistent="forward")
    return stamp


@main.command("pull")
@click.option(
    "--since",
    default=None,
    help="Pull rows from this date (plant-local midnight) or ISO 8601 time on "
    "(default: the last 7 days).",
)
@_skip_bad
@click.option(
    "--rejects",
    "rejects",
    type=click.Path(dir_okay=False),
    default=None,
    help="Where --skip-bad writes the bad rows (default: qcfit-pull-TIME.rejects.csv here).",
)
@click.pass_context
def pull_command(
    ctx: click.Context, since: str | None, skip_bad: bool, rejects: str | None
) -> None:
    """Load defect rows from the database named in the config's [source] section.

    The rows go through the same checks as a CSV file; rows already stored are not counted
    twice, so overlapping pulls are safe.
    """
    a = app(ctx)
    config = a.config()
    now = _now()
    start = _since_instant(since, ShiftCalendar.from_config(config))
    if skip_bad and rejects is None:
        rejects = f"qcfit-pull-{now:%Y%m%dT%H%M%SZ}{REJECTS_SUFFIX}"
    report = pull(
        a.engine(), config, now=now, since=start, skip_bad=skip_bad, rejects=rejects, **_who()
    )
    _echo_report(report)


@main.command("loads")
@click.option(
    "--limit",
    type=click.IntRange(min=1),
    default=20,
    show_default=True,
    help="How many loads, newest first.",
)
@click.option(
    "--format", "fmt", type=click.Choice(("table", "json")), default="table", show_default=True
)
@click.pass_context
def loads_command(ctx: click.Context, limit: int, fmt: str) -> None:
    """Show the audit trail of loads: source, content hash, rows, corrections, who and when."""
    with read_tx(app(ctx).engine()) as conn:
        rows = list_loads(conn, limit=limit)
    data = [
        {
            "id": r.id,
            "kind": r.kind,
            "loaded_utc": r.loaded.isoformat(),
            "os_user": r.os_user,
            "host": r.host,
            "rows_accepted": r.rows_accepted,
            "rows_rejected": r.rows_rejected,
            "corrections": r.corrections,
            "sha256": r.content_hash,
            "source": r.source,
            "note": r.note,
        }
        for r in rows
    ]
    if fmt == "json":
        click.echo(json.dumps(data, indent=2))
        return
    if not data:
        click.echo("no loads yet")
        return
    for d in data:
        click.echo(
            f"{d['id']:>5}  {d['loaded_utc'][:16].replace('T', ' ')} UTC  {d['kind']:<6}  "
            f"{d['rows_accepted']} ok, {d['rows_rejected']} bad, {d['corrections']} corr.  "
            f"{d['os_user']}@{d['host']}  {d['sha256'][:12]}  {d['source']}"
        )
