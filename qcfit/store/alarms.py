"""SQL for the ``alarm`` and ``alarm_event`` tables.

An alarm's identity is its unique key (shift_key, line_key, kind, baseline_key): the shift that
raised it, the line ("" when plant-wide), the kind and the baseline version (0 when none).
Functions take a Connection inside the caller's transaction and return plain dicts; every
alarm row comes joined with the first and last shift it covers (date, name, start) and the
baseline version's name and effective date.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from typing import Any

from sqlalchemy import and_, bindparam, insert, or_, select, update
from sqlalchemy.engine import Connection

from qcfit.store.schema import alarm, alarm_event, baseline_version, shift

_first = shift.alias("first_shift")
_last = shift.alias("last_shift")


def _alarm_select():
    return (
        select(
            alarm,
            _first.c.shift_date.label("shift_date"),
            _first.c.shift_name.label("shift_name"),
            _first.c.start_utc.label("shift_start_utc"),
            _last.c.shift_date.label("last_shift_date"),
            _last.c.shift_name.label("last_shift_name"),
            _last.c.start_utc.label("last_shift_start_utc"),
            baseline_version.c.name.label("baseline_name"),
            baseline_version.c.effective.label("baseline_effective"),
        )
        .select_from(
            alarm.outerjoin(_first, _first.c.id == alarm.c.first_shift_id)
            .outerjoin(_last, _last.c.id == alarm.c.last_shift_id)
            .outerjoin(baseline_version, baseline_version.c.id == alarm.c.baseline_version_id)
        )
    )


def get_alarm(conn: Connection, alarm_id: int) -> dict[str, Any] | None:
    row = conn.execute(_alarm_select().where(alarm.c.id == alarm_id)).mappings().first()
    return dict(row) if row else None


def find_by_key(
    conn: Connection, shift_key: int, line_key: str, kind: str, baseline_key: int
) -> dict[str, Any] | None:
    row = conn.execute(
        _alarm_select().where(
            alarm.c.shift_key == shift_key,
            alarm.c.line_key == line_key,
            alarm.c.kind == kind,
            alarm.c.baseline_key == baseline_key,
        )
    ).mappings().first()
    return dict(row) if row else None


def select_alarms(
    conn: Connection,
    *,
    states: Sequence[str] | None = None,
    line: str | None = None,
    since_utc: dt.datetime | None = None,
    first_shift_id: int | None = None,
) -> list[dict[str, Any]]:
    """Alarms, newest first; ``since_utc`` keeps alarms whose latest shift starts at or after
    it (an alarm tied to no shift: updated at or after it). ``first_shift_id`` adds alarms
    raised by that shift whatever their state."""
    query = _alarm_select()
    conds = []
    if states:
        conds.append(alarm.c.state.in_(list(states)))
    if line is not None:
        conds.append(alarm.c.line == line)
    if since_utc is not None:
        conds.append(or_(_last.c.start_utc >= since_utc,
                         and_(alarm.c.last_shift_id.is_(None), alarm.c.updated_utc >= since_utc)))
    if conds:
        where = and_(*conds)
        if first_shift_id is not None:
            where = or_(where, alarm.c.first_shift_id == first_shift_id)
        query = query.where(where)
    rows = conn.execute(query.order_by(alarm.c.opened_utc.desc(), alarm.c.id.desc())).mappings()
    return [dict(r) for r in rows]


_SHIFT_START = select(shift.c.start_utc).where(shift.c.id == bindparam("shift_row_id"))


def _around():
    start = bindparam("start_utc", type_=shift.c.start_utc.type)
    return (_alarm_select()
            .where(or_(alarm.c.state.in_(["open", "acknowledged"]),
                       alarm.c.first_shift_id == bindparam("shift_row_id"),
                       and_(_first.c.start_utc <= start, _last.c.start_utc >= start)))
            .order_by(alarm.c.opened_utc.desc(), alarm.c.id.desc()))


_AROUND = _around()


def alarms_around_shift(conn: Connection, shift_id: int) -> tuple[list[dict[str, Any]],
                                                                  dt.datetime | None]:
    """Alarms open or acknowledged, plus every alarm (any state) raised by shift ``shift_id``
    or spanning it (first shift start <= its start <= last shift start); and that shift's
    start (naive UTC, None when the shift row is missing)."""
    start = conn.execute(_SHIFT_START, {"shift_row_id": shift_id}).scalar()
    rows = conn.execute(_AROUND, {"shift_row_id": shift_id, "start_utc": start}).mappings()
    return [dict(r) for r in rows], start


_INSERT_ALARM = insert(alarm)
_UPDATE_ALARM = update(alarm).where(alarm.c.id == bindparam("alarm_row_id"))
_INSERT_EVENT = insert(alarm_event)


def insert_alarm(conn: Connection, values: Mapping[str, Any]) -> int:
    result = conn.execute(_INSERT_ALARM, dict(values))
    return int(result.inserted_primary_key[0])


def update_alarm(conn: Connection, alarm_id: int, values: Mapping[str, Any]) -> None:
    """Set ``values`` (column -> value) on one alarm."""
    if values:
        conn.execute(_UPDATE_ALARM, {**values, "alarm_row_id": alarm_id})


def set_state(
    conn: Connection, alarm_id: int, *, expected_state: str, state: str, at_utc: dt.datetime
) -> bool:
    """Compare-and-set the state (no lost update when two people act at once)."""
    result = conn.execute(
        update(alarm)
        .where(alarm.c.id == alarm_id, alarm.c.state == expected_state)
        .values(state=state, updated_utc=at_utc)
    )
    return result.rowcount == 1


def insert_event(conn: Connection, values: Mapping[str, Any]) -> int:
    result = conn.execute(_INSERT_EVENT, dict(values))
    return int(result.inserted_primary_key[0])


def has_event(conn: Connection, alarm_id: int, action: str | Sequence[str],
              shift_id: int | None) -> bool:
    """Whether the alarm has an event of ``action`` (or any of several) for that shift."""
    actions = [action] if isinstance(action, str) else list(action)
    row = conn.execute(
        select(alarm_event.c.id).where(
            alarm_event.c.alarm_id == alarm_id,
            alarm_event.c.action.in_(actions),
            alarm_event.c.shift_id == shift_id,
        ).limit(1)
    ).first()
    return row is not None


def shifts_with_events(conn: Connection, shift_ids: Sequence[int],
                       actions: Sequence[str]) -> set[int]:
    """Which of the shifts have an event of one of ``actions`` (any alarm)."""
    if not shift_ids:
        return set()
    rows = conn.execute(select(alarm_event.c.shift_id).distinct().where(
        alarm_event.c.shift_id.in_(list(shift_ids)), alarm_event.c.action.in_(list(actions))))
    return {int(r[0]) for r in rows}


def events_of(conn: Connection, alarm_id: int) -> list[dict[str, Any]]:
    """State changes of an alarm, oldest first, with the shift id's date and name."""
    rows = conn.execute(
        select(alarm_event, shift.c.shift_date, shift.c.shift_name)
        .select_from(alarm_event.outerjoin(shift, shift.c.id == alarm_event.c.shift_id))
        .where(alarm_event.c.alarm_id == alarm_id)
        .order_by(alarm_event.c.id)
    ).mappings()
    return [dict(r) for r in rows]
