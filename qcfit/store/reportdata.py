"""Read queries for the shift report (:mod:`qcfit.report`): one shift and the shifts before it.

Every function takes a Connection inside a read transaction the caller opened
(:func:`~qcfit.store.engine.read_tx`) and returns plain values (dicts, tuples). Times come out
as naive UTC, as the store keeps them (see :mod:`qcfit.store.schema`); the caller makes them
aware. Nothing here writes.

The history queries take lists of shift row ids and select only the columns the report draws,
so a report over 50 lines and 30 shifts reads a few thousand narrow rows.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Sequence
from typing import Any

from sqlalchemy import and_, or_, select
from sqlalchemy.engine import Connection

from qcfit.store.schema import (
    alarm,
    alarm_event,
    baseline_version,
    chart_state,
    defect_count,
    evaluation,
    finding,
    shift,
    units_inspected,
)

__all__ = [
    "alarm_events",
    "alarms_of_shift",
    "baseline_versions",
    "chart_states",
    "counts_of",
    "finding_rows",
    "history_findings",
    "latest_evaluated_shift",
    "shift_evaluation",
    "shifts_before",
    "units_of",
]

CHUNK = 400  # ids per IN (...): far below every driver's parameter limit

_SHIFT_COLUMNS = (shift.c.id, shift.c.shift_date, shift.c.shift_name, shift.c.start_utc,
                  shift.c.end_utc)
_EVAL_COLUMNS = (
    evaluation.c.id.label("evaluation_id"),
    evaluation.c.status,
    evaluation.c.error,
    evaluation.c.config_hash,
    evaluation.c.code_version,
    evaluation.c.seed,
    evaluation.c.started_utc,
    evaluation.c.finished_utc,
)


def _chunks(ids: Sequence[int]) -> Iterable[list[int]]:
    for i in range(0, len(ids), CHUNK):
        yield list(ids[i:i + CHUNK])


def _date(value: Any) -> dt.date:
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    return dt.date.fromisoformat(str(value))


def _naive(value: Any) -> dt.datetime | None:
    if value is None or isinstance(value, dt.datetime):
        return value
    return dt.datetime.fromisoformat(str(value))


def _shift_dict(row: Any) -> dict[str, Any]:
    out = dict(row)
    out["shift_date"] = _date(out["shift_date"])
    for key in ("start_utc", "end_utc", "started_utc", "finished_utc"):
        if key in out:
            out[key] = _naive(out[key])
    return out


def _current_join():
    return shift.join(evaluation, and_(evaluation.c.shift_id == shift.c.id, evaluation.c.is_current))


def shift_evaluation(conn: Connection, shift_date: dt.date, shift_name: str) -> dict[str, Any] | None:
    """The shift row with its current evaluation (keys ``id``, ``shift_date``, ``shift_name``,
    ``start_utc``, ``end_utc``, ``evaluation_id``, ``status``, ``error``, ``config_hash``,
    ``code_version``, ``seed``, ``started_utc``, ``finished_utc``); ``evaluation_id`` is None
    when the shift exists but has no current evaluation; None when there is no such shift."""
    row = conn.execute(
        select(*_SHIFT_COLUMNS, *_EVAL_COLUMNS)
        .select_from(shift.outerjoin(evaluation, and_(evaluation.c.shift_id == shift.c.id,
                                                      evaluation.c.is_current)))
        .where(shift.c.shift_date == shift_date, shift.c.shift_name == shift_name)
    ).mappings().first()
    return _shift_dict(row) if row else None


def latest_evaluated_shift(conn: Connection) -> dict[str, Any] | None:
    """The latest-starting shift that has a current evaluation (same keys as
    :func:`shift_evaluation`), or None when nothing was evaluated yet."""
    row = conn.execute(
        select(*_SHIFT_COLUMNS, *_EVAL_COLUMNS).select_from(_current_join())
        .order_by(shift.c.start_utc.desc()).limit(1)
    ).mappings().first()
    return _shift_dict(row) if row else None


def shifts_before(conn: Connection, start_utc: dt.datetime, limit: int) -> list[dict[str, Any]]:
    """Up to ``limit`` shifts starting at or before ``start_utc`` that have a current ``ok``
    evaluation, oldest first (same keys as :func:`shift_evaluation`)."""
    if limit <= 0:
        return []
    rows = conn.execute(
        select(*_SHIFT_COLUMNS, *_EVAL_COLUMNS).select_from(_current_join())
        .where(shift.c.start_utc <= start_utc, evaluation.c.status == "ok")
        .order_by(shift.c.start_utc.desc()).limit(limit)
    ).mappings().all()
    return [_shift_dict(r) for r in reversed(rows)]


def finding_rows(conn: Connection, evaluation_id: int) -> list[dict[str, Any]]:
    """Every finding row of one evaluation (all columns), in the order they were written."""
    rows = conn.execute(
        select(finding).where(finding.c.evaluation_id == evaluation_id).order_by(finding.c.id)
    ).mappings()
    return [dict(r) for r in rows]


def history_findings(conn: Connection, evaluation_ids: Sequence[int], kinds: Sequence[str]
                     ) -> list[dict[str, Any]]:
    """Narrow finding rows of many evaluations: ``evaluation_id``, ``kind``, ``line``,
    ``verdict``, ``pvalue``, ``adjusted_pvalue``, ``effect_size``, ``n``, ``min_expected``,
    ``baseline_version_id`` (no JSON columns)."""
    cols = (finding.c.evaluation_id, finding.c.kind, finding.c.line, finding.c.verdict,
            finding.c.pvalue, finding.c.adjusted_pvalue, finding.c.effect_size, finding.c.n,
            finding.c.min_expected, finding.c.baseline_version_id)
    out: list[dict[str, Any]] = []
    for part in _chunks(list(evaluation_ids)):
        rows = conn.execute(
            select(*cols).where(finding.c.evaluation_id.in_(part), finding.c.kind.in_(list(kinds)))
        ).mappings()
        out += [dict(r) for r in rows]
    return out


def counts_of(conn: Connection, shift_row_ids: Sequence[int]) -> list[tuple[int, str, str, int]]:
    """(shift row id, line, category, count) of every stored count cell of these shifts."""
    out: list[tuple[int, str, str, int]] = []
    for part in _chunks(list(shift_row_ids)):
        rows = conn.execute(
            select(defect_count.c.shift_id, defect_count.c.line, defect_count.c.category,
                   defect_count.c["count"]).where(defect_count.c.shift_id.in_(part)))
        out += [(int(a), str(b), str(c), int(d)) for a, b, c, d in rows]
    return out


def units_of(conn: Connection, shift_row_ids: Sequence[int]) -> list[tuple[int, str, int]]:
    """(shift row id, line, units inspected) of these shifts."""
    out: list[tuple[int, str, int]] = []
    for part in _chunks(list(shift_row_ids)):
        rows = conn.execute(
            select(units_inspected.c.shift_id, units_inspected.c.line, units_inspected.c.units)
            .where(units_inspected.c.shift_id.in_(part)))
        out += [(int(a), str(b), int(c)) for a, b, c in rows]
    return out


def baseline_versions(conn: Connection, ids: Iterable[int]) -> list[dict[str, Any]]:
    """Baseline version rows (``id``, ``name``, ``content_hash``, ``effective``, ``rate``,
    ``lines``) for these ids, by id."""
    wanted = sorted({int(i) for i in ids})
    out: list[dict[str, Any]] = []
    for part in _chunks(wanted):
        rows = conn.execute(
            select(baseline_version.c.id, baseline_version.c.name, baseline_version.c.content_hash,
                   baseline_version.c.effective, baseline_version.c.rate, baseline_version.c.lines)
            .where(baseline_version.c.id.in_(part)).order_by(baseline_version.c.id)
        ).mappings()
        out += [dict(r) | {"effective": _date(r["effective"])} for r in rows]
    return out


_first = shift.alias("first_shift")
_last = shift.alias("last_shift")


def alarms_of_shift(conn: Connection, shift_row_id: int, start_utc: dt.datetime
                    ) -> list[dict[str, Any]]:
    """Alarms the report of one shift lists: those with an event recorded for this shift
    (opened, updated, cleared by it) and those opened by an earlier shift (or by no shift: a
    service fault) that are still open or acknowledged now. Each row has the alarm's columns
    plus ``first_shift_date``, ``first_shift_name``, ``last_shift_date``, ``last_shift_name``,
    ``baseline_name`` and ``events`` (``(action, note)`` of the events recorded for this shift, oldest first: the
    note of an open or update event is what the alarm said about this shift)."""
    touched: dict[int, list[tuple[str, str | None]]] = {}
    for alarm_id, action, note in conn.execute(
        select(alarm_event.c.alarm_id, alarm_event.c.action, alarm_event.c.note)
        .where(alarm_event.c.shift_id == shift_row_id).order_by(alarm_event.c.id)
    ):
        touched.setdefault(int(alarm_id), []).append((str(action), note))
    still = conn.execute(
        select(alarm.c.id)
        .select_from(alarm.outerjoin(_first, _first.c.id == alarm.c.first_shift_id))
        .where(alarm.c.state.in_(("open", "acknowledged")),
               or_(_first.c.start_utc <= start_utc, alarm.c.first_shift_id.is_(None)))
    ).scalars().all()
    ids = sorted(set(touched) | {int(i) for i in still})
    if not ids:
        return []
    query = (
        select(alarm,
               _first.c.shift_date.label("first_shift_date"),
               _first.c.shift_name.label("first_shift_name"),
               _last.c.shift_date.label("last_shift_date"),
               _last.c.shift_name.label("last_shift_name"),
               baseline_version.c.name.label("baseline_name"))
        .select_from(alarm.outerjoin(_first, _first.c.id == alarm.c.first_shift_id)
                     .outerjoin(_last, _last.c.id == alarm.c.last_shift_id)
                     .outerjoin(baseline_version,
                                baseline_version.c.id == alarm.c.baseline_version_id))
    )
    out: list[dict[str, Any]] = []
    for part in _chunks(ids):
        for r in conn.execute(query.where(alarm.c.id.in_(part))).mappings():
            row = dict(r)
            for key in ("first_shift_date", "last_shift_date"):
                row[key] = None if row[key] is None else _date(row[key])
            for key in ("opened_utc", "updated_utc"):
                row[key] = _naive(row[key])
            row["events"] = tuple(touched.get(int(row["id"]), ()))
            out.append(row)
    return sorted(out, key=lambda r: int(r["id"]))


def alarm_events(conn: Connection, alarm_ids: Sequence[int]) -> list[dict[str, Any]]:
    """Events (``alarm_id``, ``at_utc``, ``action``, ``by``, ``note``, ``to_state``) of these
    alarms, oldest first."""
    out: list[dict[str, Any]] = []
    for part in _chunks(list(alarm_ids)):
        rows = conn.execute(
            select(alarm_event.c.alarm_id, alarm_event.c.at_utc, alarm_event.c.action,
                   alarm_event.c.by, alarm_event.c.note, alarm_event.c.to_state)
            .where(alarm_event.c.alarm_id.in_(part)).order_by(alarm_event.c.id)
        ).mappings()
        out += [dict(r) | {"at_utc": _naive(r["at_utc"])} for r in rows]
    return out


def chart_states(conn: Connection, shift_row_ids: Sequence[int]) -> list[dict[str, Any]]:
    """Sequential chart values (``line``, ``chart``, ``shift_id``, ``statistic``,
    ``threshold``) of these shifts; the JSON state is left out."""
    out: list[dict[str, Any]] = []
    for part in _chunks(list(shift_row_ids)):
        rows = conn.execute(
            select(chart_state.c.line, chart_state.c.chart, chart_state.c.shift_id,
                   chart_state.c.statistic, chart_state.c.threshold)
            .where(chart_state.c.shift_id.in_(part))
        ).mappings()
        out += [dict(r) for r in rows]
    return out
