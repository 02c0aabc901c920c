"""The alarm log at the command line: ``alarms``, ``alarm ID``, ``ack ID``, ``clear ID``."""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import math
import textwrap
from collections.abc import Mapping, Sequence
from typing import Any

import click

from qcfit.cli import app, main
from qcfit.errors import InvalidArgumentError

WIDTH = 100
KIND_SHORT = {"baseline": "mix", "between-lines": "lines", "rate": "rate",
              "sequential": "chart", "service-fault": "fault"}
STATE_SHORT = {"open": "OPEN", "acknowledged": "acked", "cleared": "clear"}
EFFECT_LETTER = {"baseline": "w", "between-lines": "V", "rate": "x", "sequential": ""}
CSV_FIELDS = ("id", "kind", "line", "shift_date", "shift_name", "shift_start", "last_shift_start",
              "severity", "state", "pvalue", "adjusted_pvalue", "effect_size", "shift_count",
              "categories", "summary", "opened", "updated", "baseline_version_id")
_RISKY_START = ("=", "+", "-", "@", "\t", "\r")


def _now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


# ---------------------------------------------------------------------------------------
# formatting helpers (pure, tested directly)


def spreadsheet_safe(value: Any) -> Any:
    """A CSV cell that a spreadsheet will not run as a formula: text starting with
    = + - @ (or a tab / carriage return) gets a leading apostrophe. Numbers pass unchanged.
    (OWASP, "CSV Injection", common practice.)"""
    if isinstance(value, str) and value.startswith(_RISKY_START):
        return "'" + value
    return value


def age(since: dt.datetime, now: dt.datetime) -> str:
    seconds = max(0.0, (now - since).total_seconds())
    if seconds < 3600:
        return f"{int(seconds // 60)}m"
    if seconds < 48 * 3600:
        return f"{int(seconds // 3600)}h"
    return f"{int(seconds // 86400)}d"


def fmt_p(p: float | None) -> str:
    if p is None or (isinstance(p, float) and math.isnan(p)):
        return "-"
    if p < 1e-4:
        return "<1e-4"
    return f"{p:.4f}" if p < 0.01 else f"{p:.3f}"


def fmt_effect(kind: str, effect: float | None) -> str:
    if effect is None:
        return "-"
    if kind == "rate":
        return f"{effect:.2f}x"
    if kind == "sequential":  # the leading chart's statistic / its limit
        return f"{effect:.1f}x lim"
    letter = EFFECT_LETTER.get(kind, "")
    return f"{letter} {effect:.2f}".strip()


def _cut(text: str, width: int) -> str:
    text = " ".join(str(text).split())
    return text if len(text) <= width else text[: width - 1] + "~"


COLUMNS = (("ID", 6, ">"), ("Line", 8, "<"), ("Kind", 5, "<"), ("Shift", 14, "<"),
           ("Severity", 8, "<"), ("State", 6, "<"), ("Age", 4, ">"), ("Shifts", 6, ">"),
           ("p", 6, ">"), ("adj. p", 6, ">"), ("Effect", 9, ">"))
INDENT = 8  # the words under each row start here


def table_lines(alarms: Sequence[Any], now: dt.datetime, width: int = WIDTH) -> list[str]:
    """The alarm table: one row of figures per alarm, then what changed in words, indented
    and wrapped; every line at most ``width`` characters. ``Age`` counts from the start of the
    shift that raised the alarm (from its opening when it has no shift)."""
    def row(cells: Sequence[str]) -> str:
        parts = [f"{_cut(c, w):{a}{w}}" for c, (_, w, a) in zip(cells, COLUMNS, strict=True)]
        return " ".join(parts).rstrip()[:width]

    out = [row([h for h, _, _ in COLUMNS])]
    for a in alarms:
        out.append(row([
            str(a.id), a.line or "(all)", KIND_SHORT.get(a.kind, a.kind), a.shift_id or "-",
            a.severity, STATE_SHORT.get(a.state, a.state), age(a.shift_start or a.opened, now),
            str(a.shift_count), fmt_p(a.pvalue), fmt_p(a.adjusted_pvalue),
            fmt_effect(a.kind, a.effect_size),
        ]))
        for clause in a.summary.split("; "):
            out += textwrap.wrap(clause, width=width, initial_indent=" " * INDENT,
                                 subsequent_indent=" " * (INDENT + 2))
    return out


def categories_text(categories: Sequence[Mapping[str, Any]]) -> str:
    parts = []
    for c in categories:
        r = c.get("adjusted_residual")
        where = f"{c['line']} " if c.get("line") else ""
        parts.append(f"{where}{c['code']} {c['direction']}"
                     + (f" {r:+.1f}" if r is not None else ""))
    return "; ".join(parts)


def csv_text(alarms: Sequence[Any], tz: dt.tzinfo | None) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_FIELDS)
    for a in alarms:
        row = a.as_json(tz)
        row["categories"] = categories_text(row["categories"])
        writer.writerow([spreadsheet_safe("" if row[f] is None else row[f]) for f in CSV_FIELDS])
    return buf.getvalue()


def json_text(alarms: Sequence[Any], tz: dt.tzinfo | None) -> str:
    return json.dumps([a.as_json(tz) for a in alarms], indent=2, allow_nan=False)


def _local(ts: dt.datetime | None, tz: dt.tzinfo | None) -> str:
    if ts is None:
        return "-"
    return (ts.astimezone(tz) if tz else ts).strftime("%Y-%m-%d %H:%M %Z").strip()


def story_lines(story: Any, tz: dt.tzinfo | None, names: Mapping[str, str]) -> list[str]:
    """``qcfit alarm ID``: the alarm, its figures, observed vs expected, its history."""
    a = story.alarm
    d = a.details or {}
    out = [f"Alarm {a.id}: {a.kind}, line {a.line or '(all lines)'}, severity {a.severity}, "
           f"state {a.state}",
           f"  {a.summary}",
           f"  Raised by shift {a.shift_id or '-'} (start {_local(a.shift_start, tz)}); "
           f"latest shift {a.last_shift_id or '-'}; covers {a.shift_count} shift(s); "
           f"opened {_local(a.opened, tz)}"]
    if a.pvalue is not None:
        floor = d.get("effect_floor")
        out.append(f"  p {fmt_p(a.pvalue)}, adjusted p {fmt_p(a.adjusted_pvalue)}, "
                   f"{d.get('effect_name') or 'effect'} {a.effect_size:.3f}"
                   + (f" (floor {floor:g})" if floor is not None else "")
                   + (f", {d['statistic']:.2f} on {d['dof']} df" if d.get("statistic") is not None
                      and d.get("dof") is not None else "")
                   + (f", n {d['n']}" if d.get("n") is not None else "")
                   + (f", power {d['power']:.2f}" if d.get("power") is not None else ""))
    if d.get("method") and a.kind != "sequential":
        out.append(f"  p-value by {d['method']}" + (f"; {d['reason']}" if d.get("reason") else ""))
    if a.kind == "sequential":
        out += chart_lines(d.get("extra") or {}, names, a.last_shift_id)
    if a.baseline_version_id is not None:
        eff = story.baseline_effective.isoformat() if story.baseline_effective else "?"
        out.append(f"  Baseline: {a.baseline_name} (version {a.baseline_version_id}, "
                   f"effective {eff})")
    out += _observed_table(d, names)
    if d.get("lines_differing"):
        out.append("  Lines that differ from the rest: " + ", ".join(d["lines_differing"]))
    if d.get("in_control_shifts"):
        out.append(f"  In control since: {', '.join(d['in_control_shifts'])}")
    out.append("History:")
    for e in story.events:
        shift = f" shift {e.shift_id}" if e.shift_id else ""
        out.append(f"  {_local(e.at, tz)}  {e.action:<11} {e.by:<12} "
                   f"{e.from_state or '-'} -> {e.to_state}{shift}")
        for clause in (e.note or "").split("; ") if e.note else []:
            out += textwrap.wrap(clause, width=WIDTH, initial_indent=" " * INDENT,
                                 subsequent_indent=" " * (INDENT + 2))
    return out


def chart_lines(extra: Mapping[str, Any], names: Mapping[str, str],
                reference: str | None = None) -> list[str]:
    """A sequential alarm's charts at their limits (latest shift, ``reference``), with their
    drivers."""
    out = []
    for sig in extra.get("signals") or []:
        start = sig.get("start_shift") or "-"
        out.append(f"  {sig['chart']}: {sig['statistic']:.2f} >= limit {sig['limit']:.2f}, "
                   f"change began {start} ({sig['shifts_back']} shift(s) before "
                   f"{reference or 'the latest shift'})")
        for c in sig.get("drivers") or []:
            ratio = c["share"] / c["reference_share"] if c.get("reference_share") else 0.0
            out.append(f"      {names.get(c['code'], c['code'])} {c['direction']} "
                       f"{100 * c['reference_share']:.1f}% -> {100 * c['share']:.1f}% "
                       f"(x{ratio:.2f}, z {c['adjusted_residual']:+.1f})")
    if extra.get("limits_kind"):
        out.append(f"  Limits {extra['limits_kind']} for about {extra.get('n_level')} "
                   "defects a shift")
    return out


def _observed_table(d: Mapping[str, Any], names: Mapping[str, str]) -> list[str]:
    cats = d.get("categories") or []
    obs, exp, res = d.get("observed") or [], d.get("expected") or [], d.get("adjusted_residuals") or []
    if not cats or len(obs) != len(cats):
        return []
    out = [f"  {'category':<24} {'observed':>9} {'expected':>9} {'adj. residual':>14}"]
    for j, code in enumerate(cats):
        e = exp[j] if j < len(exp) else None
        r = res[j] if j < len(res) else None
        label = _cut(f"{names.get(code, code)} ({code})" if code in names else code, 24)
        out.append(f"  {label:<24} {obs[j]:>9.0f} "
                   f"{(f'{e:.1f}' if e is not None else '-'):>9} "
                   f"{(f'{r:+.2f}' if r is not None else '-'):>14}")
    return out


# ---------------------------------------------------------------------------------------
# commands


def _tz(a: Any) -> dt.tzinfo | None:
    return a.config().timezone


@main.command("alarms")
@click.option("--open", "open_only", is_flag=True, help="Only open and acknowledged alarms.")
@click.option("--line", metavar="L", help="Only alarms of line L.")
@click.option("--since", metavar="DATE",
              help="Only alarms covering a shift that starts on or after DATE (plant date).")
@click.option("--format", "fmt", type=click.Choice(["table", "csv", "json"]), default="table",
              show_default=True, help="Output format.")
@click.pass_context
def alarms_command(ctx: click.Context, open_only: bool, line: str | None, since: str | None,
                   fmt: str) -> None:
    """List alarms, newest first."""
    from qcfit import alarmlog

    a = app(ctx)
    tz = _tz(a)
    since_ts = None
    if since is not None:
        try:
            day = dt.date.fromisoformat(since.strip())
        except ValueError:
            raise InvalidArgumentError("--since", f"{since!r} is not a date; write it as 2026-01-05") from None
        since_ts = dt.datetime.combine(day, dt.time(0), tzinfo=tz)
    rows = alarmlog.list_alarms(a.engine(), open_only=open_only, line=line, since=since_ts)
    if fmt == "json":
        click.echo(json_text(rows, tz))
    elif fmt == "csv":
        click.echo(csv_text(rows, tz), nl=False)
    elif not rows:
        click.echo("No alarms.")
    else:
        for text in table_lines(rows, _now()):
            click.echo(text)


@main.command("alarm")
@click.argument("alarm_id", metavar="ID", type=int)
@click.pass_context
def alarm_command(ctx: click.Context, alarm_id: int) -> None:
    """The full story of one alarm: figures, observed vs expected, history."""
    from qcfit import alarmlog

    a = app(ctx)
    story = alarmlog.alarm_story(a.engine(), alarm_id)
    for text in story_lines(story, _tz(a), dict(a.config().categories)):
        click.echo(text)


@main.command("ack")
@click.argument("alarm_id", metavar="ID", type=int)
@click.option("--by", "by", required=True, metavar="NAME", help="Who acknowledges.")
@click.option("--note", default=None, metavar="TEXT", help="Optional note.")
@click.option("--cause-removed", is_flag=True,
              help="The cause is fixed: the line's sequential charts restart from the next shift.")
@click.pass_context
def ack_command(ctx: click.Context, alarm_id: int, by: str, note: str | None,
                cause_removed: bool) -> None:
    """Acknowledge an open alarm."""
    from qcfit import alarmlog

    alarm = alarmlog.acknowledge(app(ctx).engine(), alarm_id, by=by, note=note, now=_now(),
                                 cause_removed=cause_removed)
    click.echo(f"Alarm {alarm.id} acknowledged by {by.strip()}."
               + (f" Sequential charts of {alarm.line} restart from the next shift."
                  if cause_removed else ""))


@main.command("clear")
@click.argument("alarm_id", metavar="ID", type=int)
@click.option("--by", "by", required=True, metavar="NAME", help="Who clears.")
@click.option("--note", required=True, metavar="TEXT", help="Why it is cleared (required).")
@click.pass_context
def clear_command(ctx: click.Context, alarm_id: int, by: str, note: str) -> None:
    """Clear an open or acknowledged alarm."""
    from qcfit import alarmlog

    alarm = alarmlog.clear(app(ctx).engine(), alarm_id, by=by, note=note, now=_now())
    click.echo(f"Alarm {alarm.id} cleared by {by.strip()}.")
